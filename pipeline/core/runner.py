"""Runs the stages in order, checks every manifest between them, and skips a stage
whose inputs, parameters and code are unchanged since its manifest was written."""

from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import logging
import os
import sys
import time
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor, wait
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from pipeline import __version__
from pipeline.core import checked_tables, names, outputs_record, snapshot
from pipeline.core.codeversion import code_version
from pipeline.core.config import Config, canonical_json
from pipeline.core.errors import DataError
from pipeline.core.fsio import remove_stale_temporaries, sha256_file, write_text_atomic
from pipeline.core.lock import output_lock
from pipeline.core.manifest import (
    Written,
    partition_rows,
    read_manifest,
    read_metadata,
    table_from_rows,
    validate_table,
    write_manifest,
)
from pipeline.core.schemas_io import SCHEMA_DIR
from pipeline.core.stage import Stage, StageContext, StageRegistry, StageResult, reject
from pipeline.core.tree_listing import folder_bytes


def params_sha256(stage: Stage, config: Config, *, cache_dir: Path | None = None) -> str:
    """Hash of everything in the config and code that a stage's output depends on
    (``cache_dir`` keeps what the code version parsed, see pipeline.core.codeversion)."""
    parts = {
        "stage": stage.name,
        "code_version": code_version(stage.name, cache_dir=cache_dir),
        "loam_version": __version__,
        "seed": config.seed,
        "sections": {s: config.section(s) for s in stage.config_sections},
    }
    return hashlib.sha256(canonical_json(parts)).hexdigest()


def inputs_sha256(out: Path, stage: Stage, ctx: StageContext, registry: StageRegistry,
                  watched: set[str] | None = None, *,
                  manifest_digest: Callable[[str], str] | None = None,
                  extras: list[bytes] | None = None) -> str:
    """Hash of the upstream manifests' bytes (found through ``registry``) plus any extra
    files the stage reads (their absolute paths are added to ``watched``).

    ``manifest_digest(rel)`` gives the hex SHA-256 of the manifest at ``rel`` under
    ``out`` (the runner's answers from what it recorded, see ``Runner.manifest_digest``);
    by default each file is hashed. Files are read in blocks, never whole: the audio
    manifest of 233,161 clips is 370 MB. ``extras``: what :func:`extra_parts` gave
    for the stage, taken earlier; by default it is taken now."""
    watched = set() if watched is None else watched
    digest_of = manifest_digest or (lambda rel: sha256_file(out / rel))
    digest = hashlib.sha256()
    for name in stage.inputs:
        digest.update(name.encode() + b"\0")
        digest.update(bytes.fromhex(digest_of(registry[name].main_manifest)))
    for part in extra_parts(stage, ctx, watched) if extras is None else extras:
        digest.update(part)
    return digest.hexdigest()


def extra_parts(stage: Stage, ctx: StageContext, watched: set[str]) -> list[bytes]:
    """What :func:`inputs_sha256` hashes after the input manifests: the content of the
    stage's extra input files (their absolute paths are added to ``watched``) and its
    extra digest. Taken before the stage runs, so that a file changed while it runs
    leaves a hash the next run finds stale."""
    parts = []
    # Content only, not the paths: the same inputs under another OUT or checkout must
    # give byte-identical manifests, metadata included.
    for path in stage.extra_inputs(ctx) if stage.extra_inputs else []:
        watched.add(os.path.abspath(path))
        try:
            parts.append(b"extra\0" + bytes.fromhex(sha256_file(path)))
        except FileNotFoundError:
            parts.append(b"extra\0<missing>")
    if stage.extra_digest:
        parts.append(b"digest\0" + hashlib.sha256(stage.extra_digest(ctx)).digest())
    return parts


@functools.cache
def schema_sha256(name: str) -> str:
    """SHA-256 of ``schemas/<name>.schema.json``, the rules a manifest was checked against."""
    return sha256_file(SCHEMA_DIR / f"{name}.schema.json")


def _file_stat(path: Path) -> list[int] | None:
    """``[size, mtime_ns, inode]`` of ``path``, None when it cannot be stat'ed."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns, st.st_ino]


@dataclass
class StageRecord:
    name: str
    ran: bool
    seconds: float
    summary: dict[str, Any]
    # What depends on this run's history (StageResult.run_stats); logged, not in OUT.
    run_stats: dict[str, Any] = field(default_factory=dict)
    # The stage whose workers were busy while this one ran in the driver, if any.
    during: str | None = None
    # The driver's CPU seconds (time.process_time) from the stage's start to its end,
    # what it did meanwhile for other stages included; its workers' are not.
    cpu_seconds: float = 0.0


class Runner:
    """One ``loam prepare`` (or ``loam stage``) invocation on an output folder."""

    def __init__(
        self,
        raw: Path,
        out: Path,
        config: Config,
        *,
        stages: StageRegistry,
        workers: int = 0,
        scheduler: str = "",
        use_cache: bool = True,
        options: dict[str, Any] | None = None,
        log: logging.Logger | None = None,
        invocation: str | None = None,
        raw_listing: Callable[[], snapshot.Listing] | None = None,
    ) -> None:
        # Absolute from here on: every path handed to a worker, which may run in another
        # working folder or on another machine, must mean the same file there.
        self.raw = Path(os.path.abspath(raw))
        self.out = Path(os.path.abspath(out))
        self.config = config
        # The stages this runner may run, in order (pipeline.stages.STAGES, passed in by
        # the commands: pipeline.core never imports a stage itself).
        self.stages = stages
        self.workers = workers
        self.scheduler = scheduler
        self.use_cache = use_cache
        self.options = options or {}
        self.log = log or logging.getLogger("loam")
        self.records: list[StageRecord] = []
        # Digest of the command (pipeline.core.snapshot); when set, a finished full run
        # records a snapshot that lets an identical rerun end at once.
        self.invocation = invocation
        # Files outside RAW a stage read or wrote: the snapshot watches them too.
        self.watched: set[str] = set()
        # RAW's files as the snapshot listed them when the run began (StageContext.raw_stats).
        self.raw_stats: dict[str, tuple[int, int, int]] | None = None
        # Gives RAW's listing with its digest, begun as the command began
        # (pipeline.core.raw_walk.RawWalk.listing; the no-change check may have asked for
        # it already); by default the run walks RAW itself.
        self.raw_listing = raw_listing
        # Stages finished (run or reused) in this invocation, and those under way.
        self.done: set[str] = set()
        self.running: list[str] = []
        # Set by a stage whose result says the run cannot usefully go on (StageResult.stop).
        self.stop_reason = ""
        # What the runner recorded of each manifest it wrote, by path relative to OUT:
        # [size, mtime_ns, inode, sha256, schema, schema sha256] (see _manifest_fact).
        self._facts: dict[str, list[Any]] | None = None
        # Folders of OUT a stage of this run listed and handed back whole
        # (StageResult.listed_folder): the bytes the snapshot hashes for each, by
        # relative path with its trailing '/'.
        self._listed: dict[str, bytes] = {}
        # The main manifests this run wrote (or read), by path relative to OUT, as the
        # tables reading the files gives (schema metadata included): a later stage gets
        # them from here while the file is the one the runner recorded (_manifest_fact),
        # instead of reading back what was just written (0.29 CPU s, 0.5 s of wall time
        # for the five inputs of a 100,000-source rebuild). Held until the run ends:
        # the last stage reads every earlier one's anyway.
        self._tables: dict[str, pa.Table] = {}
        # Each main manifest this run wrote, by path relative to OUT: the encoder
        # thread's work making its bytes (under a temporary name until the writer
        # thread puts them in place, see _write_result), which gives their hash.
        self._written: dict[str, Future[Written]] = {}
        # The hex SHA-256 of the file each of those replaces, by path relative to OUT,
        # when the new bytes cannot be the same (_replaced_digest): a later stage that
        # last ran on that file must run again, known before the new bytes are made
        # (_stale_while_encoding).
        self._replaced: dict[str, str] = {}
        # The thread that makes the main manifests' Parquet bytes while the next stage
        # starts (one at a time, in order).
        self._encoder: ThreadPoolExecutor | None = None
        # The thread that writes a stage's files while the next stage computes (one at
        # a time, in order), and what it has been given whose records are not yet made:
        # its work and what records the files once they are in place (_finish_writes).
        self._writer: ThreadPoolExecutor | None = None
        self._writing: list[tuple[Future[Written], Callable[[Written], None]]] = []

    def _check_cluster(self) -> None:
        """Before any per-file work on a cluster: every worker must see RAW and OUT
        (``parallel.check_cluster_paths``, which raises UsageError when one does not)."""
        from pipeline.core.parallel import check_cluster_paths

        self.out.mkdir(parents=True, exist_ok=True)
        seen = check_cluster_paths(self.scheduler, raw=str(self.raw), raw_file=_first_file(self.raw),
                                   out=str(self.out))
        hosts = sorted({report["host"] for report in seen.values()})
        self.log.info("cluster: %d workers (on %s) see RAW and OUT at this machine's paths", len(seen),
                      ", ".join(hosts))

    def _context(self, inputs: dict[str, pa.Table], meanwhile: Callable[[], None] | None = None) -> StageContext:
        return StageContext(
            raw=self.raw, out=self.out, config=self.config, inputs=inputs, workers=self.workers,
            scheduler=self.scheduler, progress=self.config.run.progress, log=self.log,
            use_cache=self.use_cache, options=self.options, meanwhile=meanwhile, raw_stats=self.raw_stats,
        )

    def _ready_stages(self, pending: list[str]) -> Callable[[], None]:
        """The work this process can do while a stage's workers are busy: run, in order,
        the pending stages whose inputs are all done (text, while audio's pool runs),
        then let the others load what they will need (``prepare_driver``: audio's
        imports and tables while ingest's probing pool runs)."""
        def run_ready() -> None:
            waiting = self.running[-1] if self.running else None
            for name in list(pending):
                if all(i in self.done for i in self.stages[name].inputs):
                    pending.remove(name)
                    self.run_stage(name).during = waiting
            for name in pending:
                hook = self.stages[name].prepare_driver
                if hook is not None:
                    hook(self.config)
        return run_ready

    def _load_input(self, name: str) -> pa.Table:
        """An upstream stage's main manifest, checked against its schema unless it is the
        very file this runner checked and wrote (``_manifest_fact``); the table this run
        already holds for that file, if any."""
        rel = self.stages[name].main_manifest
        path = self.out / rel
        held = self._tables.get(rel)
        if held is not None and rel in self._written:
            return held
        fact = self._manifest_fact(rel)
        recorded = fact is not None and fact[4:] == [name, schema_sha256(name)]
        if held is not None and recorded:
            return held
        if not path.exists():
            raise DataError(f"{path}: missing; run the '{name}' stage first (loam prepare runs all stages)")
        table = read_manifest(path)
        if not recorded:
            validate_table(name, table, where=str(path))
        self._tables[rel] = table
        return table

    def _manifest_fact(self, rel: str) -> list[Any] | None:
        """What was recorded when the runner wrote manifest ``rel`` (its stat, content
        hash and the schema it met), while the file still has that size, mtime and inode;
        else None. Files are replaced by renames, so a rewritten manifest has another
        inode: a record of an earlier file never passes for the current one."""
        fact = self._loaded_facts().get(rel)
        return fact if fact is not None and fact[:3] == _file_stat(self.out / rel) else None

    def _loaded_facts(self) -> dict[str, list[Any]]:
        """Every stage's ``names.stage_manifest_facts``, read once (an unreadable one is
        only a miss: its manifests are hashed and checked again)."""
        if self._facts is None:
            self._facts = {}
            for stage in self.stages.order:
                try:
                    facts = json.loads((self.out / names.stage_manifest_facts(stage)).read_text(encoding="utf-8"))
                except (OSError, ValueError):
                    continue
                if isinstance(facts, dict):
                    self._facts.update((k, v) for k, v in facts.items() if isinstance(v, list) and len(v) == 6)
        return self._facts

    def manifest_digest(self, rel: str) -> str:
        """Hex SHA-256 of manifest ``rel``'s bytes: the one recorded when the runner wrote
        it, while the file is that one (``_manifest_fact``), else hashed now. A rebuild
        hashed each upstream manifest once per stage reading it (ingest's three times);
        now each is hashed once, as it is written. One this run wrote is known from its
        bytes, even before the writer thread has put it in place (waiting for the
        encoder thread to make them, if it has not yet)."""
        if rel in self._written:
            return self._written[rel].result().sha256
        fact = self._manifest_fact(rel)
        return fact[3] if fact is not None else sha256_file(self.out / rel)

    def _replaced_digest(self, rel: str, schema: pa.Schema, num_rows: int) -> str | None:
        """The hex SHA-256 of manifest ``rel``'s file as it is, when the file about to
        replace it cannot hold the same bytes: its footer records another row count
        than ``num_rows`` or another schema than ``schema`` (metadata included: the
        stage's input and parameter hashes); else None. The hash is the one recorded
        (``_manifest_fact``), else the file is hashed (a copied OUT: 0.016 s for the
        31 MB audio manifest of 100,000 sources)."""
        import pyarrow.parquet as pq

        path = self.out / rel
        before = _file_stat(path)
        if before is None:
            return None
        try:
            footer = pq.ParquetFile(path)
            same = footer.metadata.num_rows == num_rows and footer.schema_arrow.equals(schema, check_metadata=True)
        except Exception:  # not readable Parquet: unknown
            return None
        if same:
            return None
        fact = self._manifest_fact(rel)
        digest = fact[3] if fact is not None else sha256_file(path)
        # What was read is the file's bytes only if it stayed in place meanwhile.
        return digest if _file_stat(path) == before else None

    def _record_main_manifest(self, stage: Stage, written: Written | None = None) -> None:
        """Record the stat, content hash and schema of the stage's main manifest, just
        written and checked against that schema, in ``names.stage_manifest_facts`` (only
        main manifests are ever a stage's input): as ``write_manifest`` gave them
        (``written``: the hash of the bytes it wrote and the stat of the file holding
        them), else hashed now. Nothing is recorded for a file whose stat moved while it
        was hashed."""
        rel, schema = stage.main_manifest, stage.outputs[0].schema
        path = self.out / rel
        if written is not None:
            before: list[int] | None = [written.stat.st_size, written.stat.st_mtime_ns, written.stat.st_ino]
            digest, after = written.sha256, before
        else:
            before = _file_stat(path)
            digest = sha256_file(path)
            after = _file_stat(path)
        facts = ({rel: [*before, digest, schema, schema_sha256(schema)]}
                 if before is not None and before == after else {})
        self._loaded_facts().pop(rel, None)
        self._loaded_facts().update(facts)
        write_text_atomic(self.out / names.stage_manifest_facts(stage.name), json.dumps(facts) + "\n")

    def _up_to_date(self, stage: Stage, params: str, inputs: str) -> bool:
        if stage.always_run:
            return False
        if any(self.options.get(o) for o in stage.run_when_options):
            return False
        main = self.out / stage.main_manifest
        if not (main.exists() and (self.out / names.stage_rejects(stage.name)).exists()
                and (self.out / names.stage_summary(stage.name)).exists()):
            return False
        try:
            meta = read_metadata(main)
        except Exception:  # unreadable or foreign file: rebuild it
            return False
        if meta.get("params_sha256") != params or meta.get("inputs_sha256") != inputs:
            return False
        return self._outputs_unchanged(stage.name)

    def _stale_while_encoding(self, stage: Stage, ctx: StageContext, extras: list[bytes]) -> bool:
        """Whether the stage must run, shown without waiting for the input manifests
        whose bytes the encoder thread is still making: the stage's manifest records
        the input hash of the files they replace (``_replaced``, whose bytes the new
        ones cannot be), so the new input hash differs from it. False when that is not
        shown (the stage may be up to date: the input hash decides, as ever); running a
        stage that was up to date would only cost its time, never change its output.

        At 100,000 sources the audio manifest's bytes take 0.14 to 0.4 s to make, the
        ingest manifest's 0.06 to 0.14 s: the next stage starts meanwhile."""
        rels = [self.stages[n].main_manifest for n in stage.inputs]
        making = [rel for rel in rels if rel in self._written and not self._written[rel].done()]
        if not making or any(rel not in self._replaced for rel in making):
            return False
        try:
            recorded = read_metadata(self.out / stage.main_manifest).get("inputs_sha256")
        except Exception:  # unreadable or missing: the usual checks say so
            return False
        # Every input this run rewrote with other bytes at its old digest: the stage ran
        # last on those files, if this gives the hash its manifest records.
        replaced = {rel: self._replaced[rel] for rel in rels if rel in self._replaced}
        before = inputs_sha256(self.out, stage, ctx, self.stages, self.watched, extras=extras,
                               manifest_digest=lambda rel: replaced.get(rel) or self.manifest_digest(rel))
        return recorded == before

    def _outputs_unchanged(self, name: str) -> bool:
        """Whether every file the stage wrote last time is still as it left it."""
        recorded = outputs_record.read(self.out / names.stage_outputs_record(name))
        return recorded is not None and outputs_record.unchanged(self.out, recorded)

    def _record_outputs(self, stage: Stage, manifests: list[str], main: pa.Table | None = None,
                        known: pa.Table | None = None) -> pa.Array:
        """Record the stat of every file the stage wrote (``main``: its main manifest's
        table when the caller holds it, else it is read back; ``known``: stats the stage
        already holds, StageResult.file_stats); returns the stage's ``written_files``."""
        written = pa.array([], pa.string())
        if stage.written_files is not None:
            table = main if main is not None else read_manifest(self.out / stage.main_manifest)
            written = _string_array(stage.written_files(self.out, table))
        rels = pa.array([*manifests, names.stage_rejects(stage.name), names.stage_summary(stage.name)], pa.string())
        outputs_record.write(self.out / names.stage_outputs_record(stage.name),
                             outputs_record.stat_table(self.out, pa.concat_arrays([rels, written]), known))
        return written

    def _metadata(self, stage: Stage, params: str, inputs: str, extra: dict[str, str]) -> dict[str, str]:
        meta = {
            "version": __version__,
            "stage": stage.name,
            "code_version": code_version(stage.name),
            "config_sha256": self.config.sha256(),
            "params_sha256": params,
            "inputs_sha256": inputs,
        }
        meta.update({k: v for k, v in extra.items()})
        return meta

    def run_stage(self, name: str, *, meanwhile: Callable[[], None] | None = None) -> StageRecord:
        self.running.append(name)
        try:
            return self._run_stage(name, meanwhile)
        finally:
            self.running.pop()

    def _run_stage(self, name: str, meanwhile: Callable[[], None] | None) -> StageRecord:
        stage = self.stages[name]
        start, cpu_start = time.perf_counter(), time.process_time()
        inputs = {n: self._load_input(n) for n in stage.inputs}
        ctx = self._context(inputs, meanwhile)
        params = params_sha256(stage, self.config, cache_dir=ctx.cache_dir if ctx.use_cache else None)
        extras = extra_parts(stage, ctx, self.watched)
        inputs = functools.partial(inputs_sha256, self.out, stage, ctx, self.stages, self.watched,
                                   manifest_digest=self.manifest_digest, extras=extras)
        # Known stale without the input hash: it is taken once the stage has run, when
        # the input manifests' bytes being made meanwhile are long done.
        in_hash = None if self._stale_while_encoding(stage, ctx, extras) else inputs()
        if in_hash is not None and self._up_to_date(stage, params, in_hash):
            self._refresh_config_hash(stage)
            summary = json.loads((self.out / names.stage_summary(name)).read_text(encoding="utf-8"))
            record = StageRecord(name, False, time.perf_counter() - start, summary)
            self.log.info("%-6s reused: inputs, parameters and code unchanged", name)
            if stage.reuse_note is not None:
                self.log.info("%s", stage.reuse_note(summary))
        else:
            self.log.info("%-6s running", name)
            result: StageResult = stage.run(ctx)
            if stage.inputs_after_run:
                # The stage rewrote one of its own inputs (the split ledger): record the
                # state it left, which a rerun would reproduce.
                in_hash = inputs_sha256(self.out, stage, ctx, self.stages, self.watched,
                                        manifest_digest=self.manifest_digest)
            elif in_hash is None:
                in_hash = inputs()
            self._write_result(stage, result, params, in_hash)
            if result.stop:
                self.stop_reason = f"{name}: {result.stop}"
            record = StageRecord(name, True, time.perf_counter() - start, result.summary, result.run_stats)
            self.log.info("%-6s done in %.1f s: %s", name, record.seconds, _short(result.summary))
            if result.run_stats:
                self.log.info("%-6s this run: %s", name, _short(result.run_stats))
        record.cpu_seconds = time.process_time() - cpu_start
        self.records.append(record)
        self.done.add(name)
        return record

    def _write_result(self, stage: Stage, result: StageResult, params: str, inputs: str) -> None:
        """Check the stage's tables, then write its files: the main manifest's bytes on
        the encoder thread, under a temporary name (a later stage's input hash needs
        their SHA-256, :meth:`manifest_digest`; it reads the table from memory), the
        rest on the writer thread (:meth:`_write_files`) while the next stage computes.
        A stage's files are written after the previous stage's, and its main manifest
        is put in place after its other files, so the metadata that marks a stage up to
        date lands last, as when all was written here."""
        meta = self._metadata(stage, params, inputs, result.metadata)
        _check_declared(stage, result)
        rel = stage.main_manifest
        staged = _temporary_beside(self.out / rel)
        making: Future[Written] | None = None
        try:
            # Everything is validated before anything is put in place, so a bad table
            # leaves the old files.
            making = self._checked_and_staged(stage, result, meta, staged)
            rejects = result.rejects_table()
            validate_table("rejected", rejects, where=str(self.out / names.stage_rejects(stage.name)))
            table = result.manifests[rel][1]
            schema = _read_back_schema(stage.outputs[0].schema, table.schema, meta)
            self._hold(rel, table, schema)
            replaced = self._replaced_digest(rel, schema, table.num_rows)
            for earlier, _ in self._writing:
                if earlier.done():
                    earlier.result()  # an earlier stage's files could not be written: stop here
        except BaseException:
            if making is not None:
                wait([making])
            staged.unlink(missing_ok=True)
            raise
        self._written[rel] = making
        self._replaced.pop(rel, None)
        if replaced is not None:
            self._replaced[rel] = replaced
        job = functools.partial(self._write_files, stage, result, rejects, meta, staged, making, schema,
                                after=[earlier for earlier, _ in self._writing])
        records = functools.partial(self._record_written, stage, result)
        if self._writer is None:
            records(job())
        else:
            self._writing.append((self._writer.submit(job), records))

    def _checked_and_staged(self, stage: Stage, result: StageResult, meta: dict[str, str],
                            staged: Path) -> Future[Written]:
        """Set aside the rows that break their schema (:meth:`_set_aside_invalid_rows`)
        while the encoder thread writes the main manifest's table, as the stage gave
        it, to ``staged`` (Parquet is made without the GIL, the checks are Arrow's too);
        it is written again, without them, when rows were set aside (rare). At 100,000
        sources the checks took 0.024 s beside the ingest manifest's 0.055 and 0.034
        beside the audio manifest's 0.14. The encoder's work, which goes on after this
        returns (waited for here when no run holds an encoder thread)."""
        schema, table = result.manifests[stage.main_manifest]
        pool = self._encoder or ThreadPoolExecutor(max_workers=1, thread_name_prefix="loam-encoder")
        try:
            making = pool.submit(write_manifest, staged, schema, table, metadata=meta, checked=True)
            try:
                self._set_aside_invalid_rows(stage, result)
            except BaseException:
                wait([making])  # done before the caller removes what it wrote
                raise
            # Each table was checked by _set_aside_invalid_rows, which kept only valid rows.
            kept = result.manifests[stage.main_manifest][1]
            if kept is not table:
                making.result()
                making = pool.submit(write_manifest, staged, schema, kept, metadata=meta, checked=True)
            return making
        finally:
            if pool is not self._encoder:
                pool.shutdown(wait=True)

    def _write_files(self, stage: Stage, result: StageResult, rejects: pa.Table, meta: dict[str, str],
                     staged: Path, making: Future[Written], schema: pa.Schema, *,
                     after: list[Future[Written]] | None = None) -> Written:
        """The stage's rejects, summary and other manifests, then its main manifest
        (``making``: the encoder's work writing it to ``staged``) put in place; what the
        main manifest's file holds. Nothing is written when an earlier stage's files
        (``after``, done first: the thread takes its work in order) or the main
        manifest could not be, or when the main manifest's file does not read back as
        ``schema``, the schema of the table later stages were given (:meth:`_hold`)."""
        try:
            if any(earlier.exception() is not None for earlier in after or []):
                raise RuntimeError(f"{stage.name}: not written, as an earlier stage's files could not be")
            main = making.result()
            if not _file_schema(staged).equals(schema, check_metadata=True):
                raise RuntimeError(f"{stage.main_manifest}: the file's schema is not the one the table handed "
                                   f"to later stages was given: {_file_schema(staged)} against {schema}")
            return self._write_staged(stage, result, rejects, meta, staged, main)
        except BaseException:
            staged.unlink(missing_ok=True)
            raise

    def _write_staged(self, stage: Stage, result: StageResult, rejects: pa.Table, meta: dict[str, str],
                      staged: Path, main: Written) -> Written:
        # The text of json.dumps(indent=2, sort_keys=True, ensure_ascii=False), built per
        # column: 0.06 CPU s against 0.17 for the split summary at 100,000 clips.
        from pipeline.core.json_text import dumps_indented

        others = [(self.out / names.stage_rejects(stage.name), "rejected", rejects),
                  *((self.out / rel, schema, table) for rel, (schema, table) in sorted(result.manifests.items())
                    if rel != stage.main_manifest)]
        # Parquet is made without the GIL: the other manifests on two threads of their own
        # while this one builds the summary's text (the split stage's writes, which
        # nothing follows, 0.18 s on this thread alone).
        with ThreadPoolExecutor(max_workers=2, thread_name_prefix="loam-encoder") as pool:
            jobs = [pool.submit(write_manifest, path, schema, table, metadata=meta, checked=True)
                    for path, schema, table in others]
            write_text_atomic(self.out / names.stage_summary(stage.name), dumps_indented(result.summary) + "\n")
            for job in jobs:
                job.result()
        return _put_in_place(staged, self.out / stage.main_manifest, main)

    def _record_written(self, stage: Stage, result: StageResult, main: Written) -> None:
        """The runner's records of a stage's files once they are in place: the stat of
        each, the main manifest's facts (``main``: what its file holds) and the
        snapshot's bytes for the folder the stage handed back whole."""
        written = self._record_outputs(stage, list(result.manifests), result.manifests[stage.main_manifest][1],
                                       result.file_stats)
        self._record_main_manifest(stage, main)
        self._keep_listing(result, written)

    def _finish_writes(self) -> None:
        """Wait for the writer thread's work, stage by stage, and record each stage's
        files in this thread (raising the first error the writer met, if any).

        The records are made here, not on the writer thread: most of their work holds
        the GIL (the audio stage's list of 101,000 clip paths, its folder's listing), so
        beside the next stage they slowed it by as much (the text stage 0.15 to
        0.31-0.49 s at 100,000 sources), while here, at the end of the run, they go
        beside the last stage's Parquet, which is made without it. Until then a
        stage's record of written files is the previous run's: a run killed before
        this only reruns the stage."""
        while self._writing:
            future, records = self._writing.pop(0)
            records(future.result())

    def _record_finished(self) -> None:
        """Record the files of each stage the writer finished, in order, up to the first
        it could not write (whose error was raised already, or is being raised)."""
        while self._writing:
            future, records = self._writing.pop(0)
            if not future.done() or future.exception() is not None:
                self._writing.clear()
                return
            records(future.result())

    def _hold(self, rel: str, table: pa.Table, schema: pa.Schema) -> None:
        """Keep ``table``, being written for manifest ``rel``, as reading the file back
        would give it: with its file's ``schema`` (:func:`_read_back_schema`: a list's
        item field is named 'element' there), metadata included."""
        # A cast, not a comparison: Arrow's type equality ignores the item field's name.
        # It renames without copying the data.
        self._tables[rel] = table.cast(schema).replace_schema_metadata(schema.metadata)

    def _keep_listing(self, result: StageResult, written: pa.Array) -> None:
        """Keep the snapshot's bytes for the folder the stage handed back whole
        (StageResult.listed_folder): its files are those of its written_files (rows set
        aside gone), each with its stat in file_stats; otherwise the snapshot walks it."""
        folder, stats = result.listed_folder, result.file_stats
        if not folder or stats is None or "st_mode" not in stats.column_names:
            return
        if stats.num_rows == len(written) and stats.column("path").combine_chunks().equals(written):
            # The stage's stats in its manifest's order: taken whole. A path named twice
            # is not one file per row, which folder_bytes tells (its one hash of the
            # 101,000 clip paths of the audio stage), as it would below.
            files = stats
        else:
            written = pc.unique(written)
            files = stats.filter(pc.is_in(stats.column("path"), value_set=written))
        given = folder_bytes(folder, files) if files.num_rows == len(written) else None
        if given is not None:
            self._listed[folder + "/"] = given

    def _set_aside_invalid_rows(self, stage: Stage, result: StageResult) -> None:
        """Move rows whose values break their schema from the manifests to the rejects.

        ``manifest.partition_rows`` tells a row whose inputs gave a value the schema
        refuses (rejected as ``invalid_measurement``; the run goes on) from a table
        the stage's code got wrong (ManifestError: the run stops). Files the main
        manifest's invalid rows wrote (the stage's ``written_files``) are deleted.
        """
        set_aside = 0
        for rel, (schema, table) in sorted(result.manifests.items()):
            if checked_tables.was_checked(schema, table):
                continue  # the stage checked this very table (the split stage's subset manifests)
            kept, invalid = partition_rows(schema, table, where=str(self.out / rel))
            if not invalid:
                continue
            result.manifests[rel] = (schema, kept)
            set_aside += len(invalid)
            for bad in invalid:
                row = bad.row
                source = row.get("source_path") or row.get("clip_id") or rel
                clip = row.get("clip_id")
                what = f"clip {clip}" if clip and clip != row.get("source_id") else "its row"
                detail = (f"{source}: {what} in {rel} breaks schemas/{schema}.schema.json ({bad.detail}); "
                          "expected values within the schema, so the row is set aside")
                self.log.warning("%s", detail)
                result.rejects.append(reject(stage.name, str(source), "invalid_measurement", detail,
                                             clip if isinstance(clip, str) else None))
            if rel == stage.main_manifest and stage.written_files is not None:
                rows = table_from_rows(schema, [b.row for b in invalid])
                self._remove_written(_string_array(stage.written_files(self.out, rows)).to_pylist())
        if set_aside:
            result.summary["invalid_rows"] = set_aside

    def _remove_written(self, rels: list[str]) -> None:
        """Delete files a stage wrote for rows that were set aside (only inside OUT)."""
        root = self.out.resolve()
        for rel in rels:
            path = (self.out / rel).resolve()
            if path.is_relative_to(root) and path.is_file():
                path.unlink()

    def _refresh_config_hash(self, stage: Stage) -> None:
        """A reused stage's manifests still record the hash of the config in force now
        (a change in a section the stage does not read)."""
        current = self.config.sha256()
        self._finish_writes()  # the earlier stages' files are in place before these change
        # The main manifest goes last, as in _write_result.
        manifests = [(names.stage_rejects(stage.name), "rejected"),
                     *((o.path, o.schema) for o in reversed(stage.outputs))]
        rewritten = False
        for rel, schema in manifests:
            path = self.out / rel
            meta = read_metadata(path)
            if meta.get("config_sha256") != current:
                rewritten = True
                self._tables.pop(rel, None)
                table = read_manifest(path)
                meta["config_sha256"] = current
                write_manifest(path, schema, table.replace_schema_metadata(None),
                               metadata={k: v for k, v in meta.items() if k != "schema"})
        if rewritten:
            self._record_outputs(stage, [o.path for o in stage.outputs])
            self._record_main_manifest(stage)

    def _sweep(self, skip: frozenset[str] = frozenset(), *, folder: str = "") -> None:
        """Remove the temporaries an interrupted run left in OUT (in its ``folder`` only,
        when given), but in the top-level folders of ``skip``."""
        removed = remove_stale_temporaries(self.out / folder if folder else self.out, skip=skip)
        if removed:
            self.log.info("removed %d temporary files left by an interrupted run", removed)

    def write_rejected(self) -> int:
        """Gather every stage's rejects into ``manifests/rejected.parquet``."""
        tables = []
        for name in self.stages.order:
            path = self.out / names.stage_rejects(name)
            if path.exists():
                tables.append(read_manifest(path).replace_schema_metadata(None))
        table = pa.concat_tables(tables) if tables else table_from_rows("rejected", [])
        meta = {"version": __version__, "stage": "all", "config_sha256": self.config.sha256()}
        write_manifest(self.out / names.REJECTED, "rejected", table, metadata=meta)
        return table.num_rows

    def prepare(self, stages: tuple[str, ...] | None = None) -> list[StageRecord]:
        """Run ``stages`` (default: every registered stage) in order, reusing those up to date."""
        order = self.stages.order
        stages = order if stages is None else stages
        with output_lock(self.out):
            # RAW is listed before any work, so a file that arrives during the run
            # makes the next run a full one.
            record_snapshot = self.invocation is not None and tuple(stages) == order
            snapshot.forget(self.out)
            # A folder a stage of this run clears itself (Stage.cleans_folder) is swept
            # by that stage's run, or below if it does not run.
            cleaned = frozenset(folder for name in stages if (folder := self.stages[name].cleans_folder))
            self._sweep(cleaned)
            write_text_atomic(self.out / names.RESOLVED_CONFIG,
                              json.dumps(self.config.to_json(), indent=2, sort_keys=True, ensure_ascii=False) + "\n")
            # Only OUT has been touched so far: the listing (whose walk may have begun
            # with the command, see raw_listing) is taken before any stage reads RAW.
            raw_listing = ""
            if record_snapshot:
                if self.raw_listing is not None:
                    self.raw_stats = self.raw_listing()
                else:
                    self.raw_stats = snapshot.Listing()
                    snapshot.raw_digest(self.raw, stats=self.raw_stats)
                raw_listing = self.raw_stats.digest
            if self.scheduler:
                self._check_cluster()
            pending = list(stages)
            self._writer = ThreadPoolExecutor(max_workers=1, thread_name_prefix="loam-writer")
            self._encoder = ThreadPoolExecutor(max_workers=1, thread_name_prefix="loam-encoder")
            try:
                while pending and not self.stop_reason:
                    self.run_stage(pending.pop(0), meanwhile=self._ready_stages(pending))
                self._finish_writes()
            except BaseException:
                # The stages whose files are in place still get their records, so the
                # next run reuses them; the error raised is the one that stopped this run.
                self._writer.shutdown(wait=True)
                with contextlib.suppress(Exception):
                    self._record_finished()
                raise
            finally:
                # Whatever happened, nothing is left writing when the lock is let go.
                self._writer.shutdown(wait=True)
                self._encoder.shutdown(wait=True)
                self._writer = self._encoder = None
            # Stages may finish out of order (see _ready_stages); logs list them in order.
            self.records.sort(key=lambda r: order.index(r.name))
            ran = {r.name for r in self.records if r.ran}
            for name in stages:
                if (folder := self.stages[name].cleans_folder) and name not in ran:
                    self._sweep(folder=folder)
            n = self.write_rejected()
            self.log.info("rejected: %d rows in %s", n, self.out / names.REJECTED)
            # Timings live under logs/, never in a manifest, so manifests stay byte-identical.
            write_text_atomic(self.out / names.LAST_RUN, json.dumps({
                "stages": [{"name": r.name, "ran": r.ran, "seconds": round(r.seconds, 4),
                            "cpu_seconds": round(r.cpu_seconds, 4),
                            **({"during": r.during} if r.during else {}),
                            **({"run_stats": r.run_stats} if r.run_stats else {})} for r in self.records],
                "workers": self.workers, "scheduler": self.scheduler,
                "driver_peak_rss_mb": _peak_rss_mb(),
            }, indent=2) + "\n")
            if self.stop_reason:
                # No snapshot: the next run must look at RAW again.
                raise DataError(self.stop_reason)
            if record_snapshot and self.invocation is not None:
                notes = [note(r.summary) for r in self.records
                         if (note := self.stages[r.name].reuse_note) is not None]
                notes.append(f"rejected: {n} rows in {self.out / names.REJECTED}")
                snapshot.save(self.out, snapshot.capture(invocation=self.invocation, raw_digest=raw_listing,
                                                         out=self.out, watched=sorted(self.watched), notes=notes,
                                                         given=self._listed))
        return self.records


def _check_declared(stage: Stage, result: StageResult) -> None:
    """The manifests a stage returned must be exactly the outputs it declares, each with
    its declared schema: anything else is the stage's code going wrong."""
    declared = {output.path: output.schema for output in stage.outputs}
    returned = {rel: schema for rel, (schema, _) in result.manifests.items()}
    if returned != declared:
        raise RuntimeError(f"stage {stage.name} returned manifests {sorted(returned.items())}; "
                           f"its Stage declares outputs {sorted(declared.items())}")


def _temporary_beside(path: Path) -> Path:
    """A new hidden name in ``path``'s folder, which a killed run's sweep removes
    (``fsio.remove_stale_temporaries``: ``.loam-*.tmp``)."""
    return path.with_name(f".loam-{path.name}.{os.urandom(6).hex()}.tmp")


def _put_in_place(staged: Path, target: Path, written: Written) -> Written:
    """Rename ``staged`` (``written``: its hash and stat) over ``target``, unless
    ``target`` already holds those bytes: then it is left alone, its mtime with it, as
    ``fsio.write_bytes_atomic`` does. What ``target`` holds afterwards."""
    try:
        st = os.stat(target)
        if st.st_size == written.stat.st_size and sha256_file(target) == written.sha256:
            staged.unlink()
            return Written(written.sha256, st)
    except FileNotFoundError:
        pass
    os.replace(staged, target)  # a rename keeps the size, mtime and inode
    return written


def _file_schema(path: Path) -> pa.Schema:
    """The schema of the table reading Parquet file ``path`` gives, from its footer."""
    import pyarrow.parquet as pq

    return pq.read_schema(path)


def _read_back_schema(name: str, schema: pa.Schema, metadata: dict[str, str]) -> pa.Schema:
    """The schema reading back the file ``manifest.write_manifest`` makes of a table of
    ``schema`` for manifest ``name`` with ``metadata`` gives, before that file exists:
    that of a file of no rows, written in memory with the same schema and metadata (a
    Parquet file's schema is its footer's, which the rows do not change; the writer
    thread checks it against the file, see ``Runner._write_files``).

    Examples
    --------
    >>> schema = _read_back_schema("x", pa.schema([("phones", pa.list_(pa.string()))]), {"stage": "text"})
    >>> schema.field("phones").type.value_field.name, schema.metadata[b"loam.stage"]
    ('element', b'text')
    """
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    file_metadata = {b"loam.schema": name.encode()}
    file_metadata.update({f"loam.{k}".encode(): str(v).encode() for k, v in sorted(metadata.items())})
    pq.write_table(schema.empty_table().replace_schema_metadata(file_metadata), sink)
    return pq.read_schema(pa.BufferReader(sink.getvalue()))


def _string_array(paths: list[str] | pa.Array | pa.ChunkedArray) -> pa.Array:
    """A stage's ``written_files`` (a list or an Arrow column of paths) as one Arrow array."""
    if isinstance(paths, list):
        return pa.array(paths, pa.string())
    return (paths.combine_chunks() if isinstance(paths, pa.ChunkedArray) else paths).cast(pa.string())


def _peak_rss_mb() -> float | None:
    """This process's peak resident memory so far (MB), for the run log; None where
    the resource module is missing (Windows)."""
    try:
        import resource
    except ImportError:  # pragma: no cover - not POSIX
        return None
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    # Linux reports kilobytes, macOS bytes.
    return round(peak / (1024 * 1024 if sys.platform == "darwin" else 1024), 1)


def _first_file(raw: Path) -> str | None:
    """A regular file of RAW (the first in sorted order), for workers to look for."""
    for folder, dirs, files in os.walk(raw):
        dirs.sort()
        for name in sorted(files):
            path = os.path.join(folder, name)
            if os.path.isfile(path) and not os.path.islink(path):
                return path
    return None


def _short(summary: dict[str, Any]) -> str:
    items = [f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in summary.items()
             if isinstance(v, (int, float, str)) and not isinstance(v, bool)]
    return ", ".join(items[:8])
