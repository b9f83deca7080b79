"""The stage contract: one frozen ``Stage`` per stage, and the registry that lists them.

Each stage module under ``pipeline/stages/`` ends with one declaration,
``STAGE = Stage(name=..., inputs=..., outputs=..., config_sections=..., run=...)``, and
the runner reads that object's fields and nothing else from the module. ``Stage``
checks itself when it is built (a misspelt stage name, an input that runs later, a hook
that is not callable, an output outside OUT), so a mistake stops the import with a
sentence naming the field instead of counting silently as absent.

The stages are found through a ``StageRegistry`` (``pipeline.stages.STAGES``), which the
commands hand to the runner: ``pipeline.core`` never imports a stage by name. The
registry imports a stage's module only when it is asked for that stage, so a stage's
code version (``pipeline.core.codeversion``, derived from the imports of the stage's
module, never declared) does not reach the other stages.

The runner hands the stage its validated input tables in ``ctx.inputs``, and
validates and writes whatever the stage returns. A stage never writes a
manifest itself; it may write other files (audio, lexicons) through
``pipeline.core.fsio.atomic_output``, and names them in ``written_files``.
"""

from __future__ import annotations

import importlib
import logging
import posixpath
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa

from pipeline.core import names
from pipeline.core.config import SECTIONS, UNHASHED_SECTIONS, Config
from pipeline.core.errors import ParameterError, UsageError
from pipeline.core.manifest import table_from_rows
from pipeline.core.schemas_io import SCHEMA_DIR

# Sections whose settings can change an output (``run`` holds workers, scheduler, progress;
# ``datasheet`` only answers for the report's datasheet).
OUTPUT_SECTIONS = tuple(name for name in SECTIONS if name not in UNHASHED_SECTIONS)


@dataclass(frozen=True)
class Output:
    """A manifest a stage writes: its path relative to OUT and the schema of its rows.

    Examples
    --------
    >>> Output(names.stage_manifest("audio"), schema="audio")
    Output(path='stages/audio.parquet', schema='audio')
    """

    path: str
    schema: str


@dataclass(frozen=True)
class Stage:
    """What one stage is, for the runner: the contract every stage module declares once.

    Parameters
    ----------
    name : str
        One of ``names.STAGES``; the stage's module is ``pipeline/stages/<name>.py``.
    inputs : tuple of str
        The stages whose main manifests it reads (each runs earlier); the runner loads
        and validates them into ``ctx.inputs``.
    outputs : tuple of Output
        Every manifest it returns in ``StageResult.manifests``, the main one first: the
        main manifest's metadata (``params_sha256``, ``inputs_sha256``) marks the stage
        up to date, and later stages read it as this stage's output.
    config_sections : tuple of str
        The config sections its output depends on; with ``seed``, its code version and
        Loam's version they make its parameter hash.
    run : callable
        ``run(ctx: StageContext) -> StageResult``.
    always_run : bool
        The stage reads something the runner cannot hash (the raw folder): never reused.
    run_when_options : tuple of str
        Command-line options (``"fresh"``) that force a run when set.
    inputs_after_run : bool
        The stage rewrites one of its ``extra_inputs`` itself (the split ledger), so the
        input hash is taken after the run.
    extra_inputs : callable or None
        ``extra_inputs(ctx) -> list[Path]``: files besides the input manifests whose bytes
        join the input hash (a lexicon, the ledger); the no-change snapshot watches them.
    extra_digest : callable or None
        ``extra_digest(ctx) -> bytes``: what the stage reads of a file it shares with
        others, when only part of it matters (the text stage's share of the review
        decisions); the bytes join the input hash. The file itself must be in some
        stage's ``extra_inputs``, so the snapshot watches it.
    written_files : callable or None
        ``written_files(out, table)``: files besides manifests the stage wrote (paths
        relative to OUT, like its clips), given its main manifest's table: a list of
        str, or an Arrow string column (no Python string per clip).
        The runner records their stat and reuses the stage only while they all match,
        and deletes those of a row it sets aside.
    reuse_note : callable or None
        ``reuse_note(summary) -> str``: a line logged when the stage is reused.
    prepare_driver : callable or None
        ``prepare_driver(config) -> None``: loads into this process what the stage's
        workers will need (imports, tables), called while an earlier stage waits for its
        pool; only a stage with a pool of its own needs it.
    cleans_folder : str
        A top-level folder of OUT whose every file the stage's run lists (the audio stage:
        while its workers condition the new sources) and removes at its end unless a row
        names it or the run wrote it (the audio stage's clips): the stale
        ``.loam-*.tmp`` files of an interrupted run there go with them, so the runner's
        sweep for those leaves the folder to the run, and sweeps it itself only when the
        stage does not run (OUT/audio holds 100,000 clips at 100,000 sources: listed
        once per rebuild instead of twice).

    Raises
    ------
    ParameterError
        A field the runner could not use, named with its value.

    Examples
    --------
    >>> def run(ctx): ...
    >>> stage = Stage(name="text", inputs=("ingest",), config_sections=("text",), run=run,
    ...               outputs=(Output(names.stage_manifest("text"), schema="text"),))
    >>> stage.main_manifest
    'stages/text.parquet'
    >>> Stage(name="text", inputs=("split",), config_sections=("text",), run=run,
    ...       outputs=(Output(names.stage_manifest("text"), schema="text"),))
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: stage 'text': inputs=('split',): 'split' runs after 'text' (order: ingest, audio, text, split); a stage reads only the manifests of stages before it
    """

    name: str
    inputs: tuple[str, ...]
    outputs: tuple[Output, ...]
    config_sections: tuple[str, ...]
    run: Callable[[StageContext], StageResult]
    always_run: bool = False
    run_when_options: tuple[str, ...] = ()
    inputs_after_run: bool = False
    extra_inputs: Callable[[StageContext], list[Path]] | None = None
    extra_digest: Callable[[StageContext], bytes] | None = None
    written_files: Callable[[Path, pa.Table], list[str] | pa.Array | pa.ChunkedArray] | None = None
    reuse_note: Callable[[dict[str, Any]], str] | None = None
    prepare_driver: Callable[[Config], None] | None = None
    cleans_folder: str = ""

    def __post_init__(self) -> None:
        if self.name not in names.STAGES:
            raise ParameterError(f"stage name={self.name!r} is not one of {', '.join(names.STAGES)} "
                                 "(pipeline/core/names.py STAGES)")
        self._check_strings("inputs", self.inputs)
        for upstream in self.inputs:
            self._check_input(upstream)
        self._check_outputs()
        self._check_strings("config_sections", self.config_sections)
        for section in self.config_sections:
            if section not in OUTPUT_SECTIONS:
                self._fail(f"config_sections={self.config_sections!r}: {section!r} is not one of "
                           f"{', '.join(OUTPUT_SECTIONS)}")
        self._check_strings("run_when_options", self.run_when_options)
        for flag in ("always_run", "inputs_after_run"):
            if not isinstance(getattr(self, flag), bool):
                self._fail(f"{flag}={getattr(self, flag)!r}: expected True or False")
        self._check_callables()
        folder = self.cleans_folder
        if not (isinstance(folder, str) and (not folder or (folder not in (".", "..") and "/" not in folder
                                                             and "\\" not in folder))):
            self._fail(f"cleans_folder={folder!r}: expected the name of a top-level folder of OUT, or ''")
        if self.inputs_after_run and self.extra_inputs is None:
            self._fail("inputs_after_run=True without extra_inputs: there is no file to hash after the run")

    @property
    def main_manifest(self) -> str:
        """The path (relative to OUT) of the manifest that marks the stage up to date."""
        return self.outputs[0].path

    def _fail(self, message: str) -> None:
        raise ParameterError(f"stage {self.name!r}: {message}")

    def _check_strings(self, field_name: str, value: object) -> None:
        if not (isinstance(value, tuple) and all(isinstance(item, str) and item for item in value)):
            self._fail(f"{field_name}={value!r}: expected a tuple of non-empty strings")
        if len(set(value)) != len(value):  # type: ignore[arg-type]
            self._fail(f"{field_name}={value!r}: an entry is listed twice")

    def _check_input(self, upstream: str) -> None:
        order = names.STAGES
        if upstream not in order:
            self._fail(f"inputs={self.inputs!r}: {upstream!r} is not one of {', '.join(order)}")
        if order.index(upstream) >= order.index(self.name):
            self._fail(f"inputs={self.inputs!r}: {upstream!r} runs after {self.name!r} (order: "
                       f"{', '.join(order)}); a stage reads only the manifests of stages before it")

    def _check_outputs(self) -> None:
        outputs = self.outputs
        if not (isinstance(outputs, tuple) and outputs and all(isinstance(o, Output) for o in outputs)):
            self._fail(f"outputs={outputs!r}: expected a non-empty tuple of Output, the main manifest first")
        paths = [o.path for o in outputs]
        if len(set(paths)) != len(paths):
            self._fail(f"outputs={paths!r}: a path is listed twice")
        runner_owned = {names.REJECTED, names.stage_rejects(self.name)}
        for output in outputs:
            path = output.path
            inside = (isinstance(path, str) and path.endswith(".parquet") and not posixpath.isabs(path)
                      and posixpath.normpath(path) == path and not path.startswith("../"))
            if not inside:
                self._fail(f"outputs: path={path!r}: expected a normalised '/'-separated .parquet path inside OUT")
            if path in runner_owned:
                self._fail(f"outputs: path={path!r} is written by the runner, not by a stage")
            if not (SCHEMA_DIR / f"{output.schema}.schema.json").is_file():
                self._fail(f"outputs: {path!r} has schema={output.schema!r}, but there is no "
                           f"schemas/{output.schema}.schema.json")

    def _check_callables(self) -> None:
        if not callable(self.run):
            self._fail(f"run={self.run!r}: expected a function run(ctx) -> StageResult")
        for hook in ("extra_inputs", "extra_digest", "written_files", "reuse_note", "prepare_driver"):
            value = getattr(self, hook)
            if value is not None and not callable(value):
                self._fail(f"{hook}={value!r}: expected a function or None")


@dataclass(frozen=True)
class StageRegistry:
    """The stages a runner may run, in running order: the ``Stage`` each module of
    ``package`` declares as ``STAGE``, imported only when asked for.

    Examples
    --------
    >>> registry = StageRegistry(order=("ingest", "audio"), package="pipeline.stages")
    >>> registry["ingest"].main_manifest
    'stages/ingest.parquet'
    >>> [stage.name for stage in registry]
    ['ingest', 'audio']
    >>> registry["mix"]
    Traceback (most recent call last):
    ...
    pipeline.core.errors.UsageError: unknown stage 'mix'; stages are: ingest, audio
    """

    order: tuple[str, ...]
    package: str

    def __post_init__(self) -> None:
        unknown = [name for name in self.order if name not in names.STAGES]
        if unknown or list(self.order) != sorted(self.order, key=names.STAGES.index):
            raise ParameterError(f"order={self.order!r}: expected stage names from pipeline/core/names.py "
                                 f"STAGES in their order ({', '.join(names.STAGES)})")

    def __getitem__(self, name: str) -> Stage:
        if name not in self.order:
            raise UsageError(f"unknown stage {name!r}; stages are: {', '.join(self.order)}")
        where = f"{self.package}.{name}"
        stage = vars(importlib.import_module(where)).get("STAGE")
        if not isinstance(stage, Stage):
            raise ParameterError(f"module {where} declares STAGE={stage!r}; expected STAGE = Stage(...) at its end")
        if stage.name != name:
            raise ParameterError(f"module {where} declares a stage named {stage.name!r}; expected {name!r}")
        return stage

    def __iter__(self) -> Iterator[Stage]:
        return (self[name] for name in self.order)

    def __len__(self) -> int:
        return len(self.order)


@dataclass
class StageContext:
    raw: Path
    out: Path
    config: Config
    inputs: dict[str, pa.Table]
    workers: int
    scheduler: str = ""
    progress: bool = False
    log: logging.Logger = field(default_factory=lambda: logging.getLogger("loam"))
    # Whether to use and fill the per-file caches under OUT/cache.
    use_cache: bool = True
    # Options that do not come from the config file (e.g. --fresh for the ledger).
    options: dict[str, Any] = field(default_factory=dict)
    # Later stages the runner can run in this process while this one waits for its
    # workers; a stage with a pool hands it to map_ordered(meanwhile=...).
    meanwhile: Callable[[], None] | None = None
    # ``(size, mtime_ns, inode)`` of RAW's regular files by relative path, as the runner
    # listed them when the run began (pipeline.core.snapshot.tree_digest), or None: a
    # stage may use it instead of a ``stat`` per file.
    raw_stats: Mapping[str, tuple[int, int, int]] | None = None

    @property
    def cache_dir(self) -> Path:
        return self.out / names.CACHE


@dataclass
class StageResult:
    """What a stage hands back to the runner.

    ``manifests`` maps a path relative to OUT to (schema name, table), one for each of
    the stage's declared ``Stage.outputs``. ``rejects`` are rows of the
    ``rejected`` schema. ``summary`` (JSON-ready) is written to
    ``stages/<name>.summary.json`` for the report, and ``metadata`` is added to every
    manifest's Parquet key-value metadata: both must depend only on RAW, the config
    and the ledger, like the manifests. ``run_stats`` holds what depends on this run's
    history instead (files reused from the cache or processed, orphans removed, cache
    hits): the runner logs it and keeps it in ``logs/last-run.json``, never in OUT's
    outputs, which are compared, hashed and shipped.
    """

    manifests: dict[str, tuple[str, pa.Table]]
    rejects: list[dict[str, Any]] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)
    metadata: dict[str, str] = field(default_factory=dict)
    run_stats: dict[str, Any] = field(default_factory=dict)
    # Non-empty: a sentence saying why the run must stop (exit 1) once this stage's
    # outputs and the rejects are written, e.g. every input unreadable.
    stop: str = ""
    # The stat of files the stage wrote or confirmed unchanged, one row per path
    # (relative to OUT; the columns of pipeline.core.outputs_record.SCHEMA), which the
    # runner records as they are instead of a ``stat`` each (the audio stage's clips);
    # any other file it records is stat'ed.
    file_stats: pa.Table | None = None
    # A folder of OUT (relative path) that, once the stage is done, holds exactly the
    # files of ``file_stats`` its written_files name, each at ``<folder>/<sub>/<name>``,
    # with their ``st_mode`` in file_stats too (the audio stage's clips under audio/):
    # the run's snapshot takes its digest of the folder from them instead of listing it
    # again (pipeline.core.tree_listing).
    listed_folder: str = ""

    def rejects_table(self) -> pa.Table:
        return table_from_rows("rejected", self.rejects)


def reject(stage: str, source_path: str, reason: str, detail: str, clip_id: str | None = None) -> dict[str, Any]:
    """One row for ``rejected.parquet``: a reason code and a sentence a person can act on."""
    return {"source_path": source_path, "reason": reason, "detail": detail, "stage": stage, "clip_id": clip_id}

