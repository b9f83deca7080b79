"""Audio stage: every accepted ingest row conditioned into clips
(``pipeline.stages.audio_file``, one process per file), reused from the outcome cache
(``pipeline.stages.audio_cache``) when its source and clip files are unchanged, and
gathered into the audio manifest, sorted by clip, with the rejects.
"""

from __future__ import annotations

import contextlib
import functools
import os
import posixpath
import threading
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.core import names
from pipeline.core.fsio import (
    remove_stale_temporaries,
    sync_file_system,
)
from pipeline.core.manifest import ManifestBuilder
from pipeline.core.names import stage_manifest
from pipeline.core.parallel import each_result
from pipeline.core.stage import Output, Stage, StageContext, StageResult
from pipeline.stages.audio_cache import OutcomeCache, file_listing, outcome_code, source_keys
from pipeline.stages.audio_file import (
    AUDIO_DIR,
    NAME,
    AudioJob,
    FileOutcome,
    condition_file,
    crashed_outcome,
    warm_up,
)

# The spool's folder under OUT.
TMP_DIR = "tmp"


def written_files(out: Path, table: Any) -> Any:
    """The clip files the audio manifest names, its ``audio_path`` column (see
    pipeline.core.stage): no Python string per clip (a list of the 101,000 of a
    100,000-source rebuild cost 0.09 to 0.11 s of the runner's records)."""
    return table.column("audio_path")


def remove_orphans(listed: Any, keep: Any, *, base: Path) -> int:
    """Delete the files of ``listed`` not in ``keep``, and the folders they leave empty.

    Parameters
    ----------
    listed : pyarrow.Array of str
        '/'-separated paths relative to ``base`` of the files found under OUT/audio
        (:func:`pipeline.stages.audio_cache.file_listing`, taken before the stage's
        workers ended).
    keep : pyarrow.Array of str
        The paths that stay (the audio manifest's ``audio_path``, or those of its rows
        ``listed`` may hold besides the ones already left out of it).
    base : Path
        The folder both are relative to (OUT).

    Returns
    -------
    int
        How many files were deleted.

    Examples
    --------
    >>> import tempfile
    >>> import pyarrow as pa
    >>> out = Path(tempfile.mkdtemp())
    >>> for name in ("ana/take-0a1b2c3d4e.flac", "ana/gone-5f6a7b8c9d.flac", "bo/gone-1a2b3c4d5e.flac"):
    ...     (out / "audio" / name).parent.mkdir(parents=True, exist_ok=True)
    ...     _ = (out / "audio" / name).write_bytes(b"")
    >>> listed = pa.array(["audio/ana/take-0a1b2c3d4e.flac", "audio/ana/gone-5f6a7b8c9d.flac",
    ...                    "audio/bo/gone-1a2b3c4d5e.flac"])
    >>> remove_orphans(listed, pa.array(["audio/ana/take-0a1b2c3d4e.flac"]), base=out)
    2
    >>> sorted(str(p.relative_to(out)) for p in (out / "audio").rglob("*"))
    ['audio/ana', 'audio/ana/take-0a1b2c3d4e.flac']
    >>> import shutil; shutil.rmtree(out)
    """
    import pyarrow.compute as pc  # here: the workers never need it

    orphans = listed.filter(pc.invert(pc.is_in(listed, value_set=keep))).to_pylist()
    root = os.fspath(base)
    removed = 0
    folders: set[str] = set()
    for rel in orphans:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(os.path.join(root, rel))
            removed += 1
        folders.add(posixpath.dirname(rel))
    # Deepest first, each folder then its parents up to (not including) OUT/audio: a
    # folder goes only when its last file did (rmdir refuses one that is not empty).
    for folder in sorted(folders, key=lambda f: -f.count("/")):
        while folder.count("/") >= 1:
            try:
                os.rmdir(os.path.join(root, folder))
            except OSError:
                break
            folder = posixpath.dirname(folder)
    return removed


def prepare_driver(config: Any) -> None:
    """Stage hook (pipeline.core.stage): the warm-up, for the runner to do while an earlier
    stage waits for its workers."""
    warm_up(config.audio)


def _clean_up(ctx: StageContext, out: Path, unnamed: Any, fresh: list[str]) -> int:
    """Remove the clip files no row names (``unnamed``: those of OUT/audio, listed as the
    stage began its reuse check, that no reused row names, less ``fresh``: this run's
    clips) and spool debris; how many clip files went. A file written since the listing
    is a row's clip: this run's workers write nothing else there but temporaries of an
    atomic write cut short: a worker stopped when its pool broke leaves one, removed
    before the work goes on (each_result's on_break); a killed run's are removed by the
    next run first."""
    import pyarrow as pa  # here: the workers never need it

    removed = remove_orphans(unnamed, pa.array(fresh, pa.string()), base=out)
    if removed:
        # Counted as files, not clips: a killed run's temporaries there go too.
        ctx.log.info("audio: removed %d file%s under OUT/%s that no row refers to", removed,
                     "" if removed == 1 else "s", AUDIO_DIR)
    # A worker stopped mid-file (the neighbour of a crash) leaves its spool file behind;
    # no worker runs any more, so whatever is left is debris.
    remove_stale_temporaries(out / TMP_DIR)
    with contextlib.suppress(OSError):
        (out / TMP_DIR).rmdir()
    return removed


def _summary(table: Any, rejects: list[dict[str, Any]], *, sources: int) -> dict[str, Any]:
    """Counts of the audio manifest and rejects for the report."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.core.columns import distinct_count

    source_ids = table.column("source_id")
    segmented = pc.not_equal(table.column("clip_id"), source_ids)
    upsampled = pc.is_valid(table.column("upsampled_from"))
    return {
        "sources": sources,
        "sources_with_clips": distinct_count(source_ids),
        "sources_segmented": distinct_count(pc.filter(source_ids, segmented)),
        "clips": table.num_rows,
        # Summed in clip order in Python, as before the rows became columns.
        "hours": sum(table.column("duration_s").to_pylist()) / 3600,
        "upsampled_sources": distinct_count(pc.filter(source_ids, upsampled)),
        "peak_limited_clips": len(pc.filter(source_ids, pc.greater(table.column("peak_limited_db"), 0.0))),
        "rejects": len(rejects),
        "rejects_by_reason": dict(sorted(Counter(r["reason"] for r in rejects).items())),
    }


def _real_paths(ctx: StageContext, out: Path) -> dict[str, str]:
    """In a pseudonymised build, the RAW-relative path of each source reference, read
    from the private mapping the ingest stage wrote; else an empty dict."""
    if not ctx.config.privacy.pseudonymise:
        return {}
    from pipeline.stages.privacy import read_mapping

    return {ref: rel for rel, ref in read_mapping(out / names.PRIVATE_MAPPING)["source"].items()}


def _scrub_rejects(rejects: list[dict[str, Any]], real: dict[str, str], *, raw: Path) -> list[dict[str, Any]]:
    """The rejects with every RAW name in their sentences (a decoder's message may
    quote the file's full path) replaced by the file's reference or ``[withheld]``."""
    from pipeline.stages.privacy import name_pattern, real_names, scrub

    sources = {str(raw / rel): ref for ref, rel in real.items()} | {rel: ref for ref, rel in real.items()}
    pattern = name_pattern(real_names((), real.values()))
    return [{**r, "detail": scrub(r["detail"], sources=sources, pattern=pattern)} for r in rejects]


_VOICE_COLUMNS = ["source_id", "source_path", "transcript", "transcript_origin", "metadata_line"]


def _voices(ctx: StageContext, rows: Any) -> dict[str, tuple[str | None, str]]:
    """``alignment_voices`` of the transcribed rows of table ``rows`` (few: the long
    sources, or those to condition), without a Python row per other source."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.stages.alignment import alignment_voices

    rows = rows.filter(pc.is_valid(rows.column("transcript")))
    return alignment_voices(ctx, rows.select(_VOICE_COLUMNS).to_pylist()) if rows.num_rows else {}


def _long_sources(long: Any, voices: dict[str, tuple[str | None, str]]) -> dict[str, tuple[str, str]]:
    """source_id -> (transcript, voice) of the transcribed sources an alignment may cut
    (``long``: those longer than ``audio.max_clip_s``) that have a voice. Their transcript
    and voice decide how they are cut (pipeline.stages.alignment), so both are in their
    cache key; a short source's transcript text does not reach its clips."""
    return {sid: (text, voices[sid][0]) for sid, text in zip(long.column("source_id").to_pylist(),
                                                             long.column("transcript").to_pylist(), strict=True)
            if voices.get(sid, (None, ""))[0] is not None}


def _aligned_sources(table: Any, transcribed: Any) -> dict[str, dict[str, Any]]:
    """``alignment_summary`` of the clips cut from a source (clip_id not its source_id)
    and the transcribed sources they come from: Python sees only those rows."""
    import pyarrow.compute as pc  # here: the workers never need it

    from pipeline.stages.alignment import alignment_summary

    cut = table.filter(pc.not_equal(table.column("clip_id"), table.column("source_id")))
    sources = transcribed.filter(pc.is_in(transcribed.column("source_id"), value_set=cut.column("source_id")))
    return alignment_summary(cut.select(["source_id", "clip_id", "duration_s", "aligned_transcript"]).to_pylist(),
                             sources.select(["source_id", "source_path", "transcript", "duration_s"]).to_pylist())


@dataclass
class _Conditioning:
    """What turns sources (rows of the ingest table, by index) into worker jobs and
    their outcomes into the stage's rows, cache entries and rejects: the stage runs it
    for the sources with no stored outcome, then for those whose clip files were not
    intact (few, usually none)."""

    ctx: StageContext
    ingest: Any
    long: Any  # the long transcribed ingest rows, whose voices ``voices`` holds
    voices: dict[str, tuple[str | None, str]]
    keys: Any  # the cache key of each ingest row (audio_cache.source_keys)
    cache: OutcomeCache
    builder: ManifestBuilder
    real: dict[str, str]  # a pseudonymised build's RAW path of each source reference (_real_paths)
    rejects_at: dict[int, list[dict[str, Any]]] = field(default_factory=dict)
    fresh_paths: list[str] = field(default_factory=list)  # the audio_path of each fresh clip row
    # The reused clip rows, as the cache holds them (OutcomeCache.reuse); the fresh ones
    # go into ``builder`` as they arrive.
    reused: Any = None

    def jobs(self, todo: list[int]) -> list[AudioJob]:
        """One job per source index of ``todo``, its voice looked up first when it is a
        transcribed source that is not long.

        A job's outcome is stored under the source's key (``source_keys``: its content
        hash, the ingest fields its clips carry, and a long source's transcript and
        voice) and a scope that covers the per-file work's code, not this module's
        (``audio_cache.outcome_code``). So anything added to a job here that can change
        its outcome must go into the key as well, or an outcome made without it would
        be reused."""
        import pyarrow as pa  # here: the workers never need it
        import pyarrow.compute as pc

        ctx, cfg = self.ctx, self.ctx.config.audio
        out, raw = Path(os.path.abspath(ctx.out)), Path(os.path.abspath(ctx.raw))
        chosen = self.ingest.take(pa.array(todo, pa.int64()))
        self.voices.update(_voices(ctx, chosen.filter(pc.invert(pc.is_in(chosen.column("source_id"),
                                                                          value_set=self.long.column("source_id"))))))
        return [AudioJob(row, str(raw / self.real.get(row["source_path"], row["source_path"])), str(out),
                         str(out / TMP_DIR), cfg, *self.voices.get(row["source_id"], (None, "")),
                         durable=False) for row in chosen.to_pylist()]

    def run(self, todo: list[int], *, meanwhile: Callable[[], None] | None) -> bool:
        """Condition the sources ``todo`` on the workers (``each_result``, which calls
        ``meanwhile`` while they run); whether there was a pool to call it for."""
        if not todo:
            return False
        jobs = self.jobs(todo)
        warm_up(self.ctx.config.audio)
        called = []

        def waiting() -> None:
            called.append(True)
            if meanwhile is not None:
                meanwhile()

        def arrived(j: int, outcome: FileOutcome) -> None:
            # A decoder error may be passing (a file still being copied), and a crash may
            # be the library's fault (fixed by an upgrade): neither is remembered.
            if not any(r["reason"] in ("undecodable", "decoder_crashed") for r in outcome.rejects):
                self.cache.add(self.keys[todo[j]].as_py(), outcome.rows, outcome.rejects, outcome.written)
            self.builder.extend(outcome.rows)
            self.fresh_paths.extend(row["audio_path"] for row in outcome.rows)
            if outcome.rejects:
                self.rejects_at[todo[j]] = outcome.rejects

        out = Path(os.path.abspath(self.ctx.out))
        each_result(condition_file, jobs, arrived, workers=self.ctx.workers, scheduler=self.ctx.scheduler,
                    desc="audio", progress=self.ctx.progress,
                    costs=[job.row["num_frames"] * job.row["channels"] for job in jobs],
                    meanwhile=waiting, on_crash=lambda j, how: crashed_outcome(jobs[j], how),
                    after_batch=functools.partial(sync_file_system, str(out)),
                    # The pool's other workers, stopped mid-file when one died, may have left an
                    # atomic write's temporary beside a clip; their files run again, so it is debris.
                    on_break=functools.partial(remove_stale_temporaries, out / AUDIO_DIR))
        return bool(called)


def _reuse_check(work: _Conditioning) -> list[int]:
    """List OUT/audio and put the stored outcomes whose clip files are intact into the
    manifest (``OutcomeCache.reuse``); the indices of the sources to condition again."""
    out = Path(os.path.abspath(work.ctx.out))
    # A clip of another inode (a copied or moved OUT) is hashed here, in the driver: a
    # copy of 100,000 sources costs 2.5 CPU s of hashing (audio_cache.same_bytes).
    work.reused, stale, cached_rejects = work.cache.reuse(listing=file_listing(out / AUDIO_DIR, base=out), base=out)
    work.rejects_at.update(cached_rejects)
    if work.cache.rechecked[0]:
        work.ctx.log.info("audio: %d clip files of unchanged size and time but a new inode (OUT moved or "
                          "copied?) hashed again: %d hold the bytes recorded for them", *work.cache.rechecked)
    return stale


def _condition_all(work: _Conditioning, unknown: list[int]) -> list[int]:
    """Condition the sources ``unknown`` (no stored outcome) and those the reuse check
    finds with clip files not intact; the indices of both, sorted.

    The first start on the workers before OUT/audio is listed: the listing and the
    reuse check (about 0.4 CPU s for 100,000 sources) run while the workers do, then
    the runner's other work (``ctx.meanwhile``), which waits for a pool otherwise."""
    others = [work.ctx.meanwhile]
    stale: list[list[int]] = []

    def meanwhile() -> None:
        stale.append(_reuse_check(work))
        later = others.pop()
        if later is not None:
            later()

    if not work.run(unknown, meanwhile=meanwhile):
        stale.append(_reuse_check(work))
    # A clip file changed or gone since it was written: its source runs again, in a
    # pool of its own (the runner's work, if still waiting, meanwhile).
    work.run(stale[0], meanwhile=others.pop() if others else None)
    return sorted(unknown + stale[0])


def _arrived(work: _Conditioning) -> Any:
    """The manifest's rows as they came, the reused (as the cache holds them: their
    chunks as mapped, no copy) then the fresh, in the order of ``OutcomeCache.file_stats``.
    Clip ids are unique, so the order :func:`_sorted_by_clip` gives depends on them alone.
    The rows are copied once, by that sort's take: joining them into one chunk first (as
    ``ManifestBuilder.table`` does) cost a second copy of the 60 MB of 100,000 clips,
    whose fresh pages cost 0.1 to 0.2 s of system time in a rebuild."""
    import pyarrow as pa  # here: the workers never need it

    fresh = work.builder.table()
    return fresh if work.reused is None else pa.concat_tables([work.reused, fresh])


def _sorted_by_clip(table: Any) -> tuple[Any, Any]:
    """The manifest's rows (``table``, as they came: the reused, then the fresh, in
    chunks) sorted by ``clip_id`` (a stable sort and one take, as ``Table.sort_by``
    does) in one chunk (Parquet's bytes depend on the chunks), and the order taken (for
    :func:`_stats_in_order`)."""
    import pyarrow.compute as pc  # here: the workers never need it

    order = pc.sort_indices(table, sort_keys=[("clip_id", "ascending")])
    return table.take(order).combine_chunks(), order


def _stats_in_order(stats: Any, paths: Any, order: Any) -> Any:
    """The stat of each clip file (``stats``: OutcomeCache.file_stats, one row per clip
    row as the rows came, whose ``audio_path`` is ``paths``) in the manifest's order
    (``order``: :func:`_sorted_by_clip`'s), so that the runner's records take them whole
    instead of looking each path up (see ``outputs_record.stat_table``). Stats in
    another order (not expected) are left as they are: the runner looks them up.

    Examples
    --------
    >>> import pyarrow as pa
    >>> rows, order = _sorted_by_clip(pa.table({"clip_id": ["b", "a", "c"], "audio_path": ["b.f", "a.f", "c.f"]}))
    >>> stats = pa.table({"path": ["b.f", "a.f", "c.f"], "st_size": [2, 1, 3]})
    >>> _stats_in_order(stats, pa.array(["b.f", "a.f", "c.f"]), order).column("st_size").to_pylist()
    [1, 2, 3]
    >>> _stats_in_order(stats, pa.array(["a.f", "b.f", "c.f"]), order).column("st_size").to_pylist()
    [2, 1, 3]
    """
    paths = paths.combine_chunks() if hasattr(paths, "combine_chunks") else paths
    if stats.num_rows != len(paths) or not stats.column("path").combine_chunks().equals(paths):
        return stats
    return stats.take(order).combine_chunks()


def _in_background(work: Callable[[], None]) -> Callable[[], None]:
    """Start ``work`` in a thread; the function that waits for it to end (and raises
    what it raised). For work that waits on the disk rather than the processor (OUT's
    flush, the cache's write and its digest's fsync: 0.1 to 0.25 s of wall time for 0.02
    CPU s at 100,000 sources), while the stage sorts its rows and counts them."""
    failed: list[BaseException] = []

    def guarded() -> None:
        try:
            work()
        except BaseException as exc:  # raised in the stage's thread, by join
            failed.append(exc)

    thread = threading.Thread(target=guarded, name="loam-audio-write")
    thread.start()

    def join() -> None:
        thread.join()
        if failed:
            raise failed[0]
    return join


def run(ctx: StageContext) -> StageResult:
    """Condition every ingest row (cached per file), then drop clip files no row names.

    Returns the ``stages/audio.parquet`` table sorted by ``clip_id``, the rejects in
    source order, and a summary of counts for the report.
    """
    cfg = ctx.config.audio
    out = Path(os.path.abspath(ctx.out))
    raw = Path(os.path.abspath(ctx.raw))
    ingest = ctx.inputs["ingest"]
    code = outcome_code(cache_dir=ctx.cache_dir if ctx.use_cache else None)
    import pyarrow.compute as pc  # here: the workers never need it

    transcribed = ingest.filter(pc.is_valid(ingest.column("transcript")))
    long = transcribed.filter(pc.fill_null(pc.greater(transcribed.column("duration_s"), cfg.max_clip_s), False))
    # The voice of each long source (its cache key holds it), then of each source to condition.
    voices = _voices(ctx, long)
    keys = source_keys(ingest, long=_long_sources(long, voices))
    cache = OutcomeCache(ctx.cache_dir, section=ctx.config.section(NAME), code=code, enabled=ctx.use_cache)
    # Rows go straight into Arrow batches as each outcome arrives (reused ones as
    # columns); no list of every outcome is kept. Rejects are few, kept in source order.
    work = _Conditioning(ctx, ingest, long, voices, keys, cache, ManifestBuilder(NAME), _real_paths(ctx, out))
    todo = _condition_all(work, cache.stored(keys))
    # The clips were written without an fsync each: one flush makes them durable before
    # the manifest that names them is written (reused ones too, which a run stopped
    # before its flush may have left in the cache). On a cluster each worker has also
    # flushed its own after every batch.
    def save_and_flush() -> None:
        cache.save()  # first, so that the flush covers it too (a torn cache is only a miss)
        sync_file_system(out)

    written = _in_background(save_and_flush)
    ctx.log.info("audio: %d files processed, %d reused from cache", len(todo), len(keys) - len(todo))

    arrived = _arrived(work)
    table, order = _sorted_by_clip(arrived)
    rejects = [r for i in sorted(work.rejects_at) for r in work.rejects_at[i]]
    if work.real:
        rejects = _scrub_rejects(rejects, work.real, raw=raw)
    removed = _clean_up(ctx, out, cache.unnamed(), work.fresh_paths)
    summary = _summary(table, rejects, sources=len(keys))
    summary["aligned_sources"] = _aligned_sources(table, transcribed)
    for path, figures in summary["aligned_sources"].items():
        ctx.log.info("audio: %s aligned to its transcript: %.0f%% of its audio in %d transcribed clips, "
                     "%.0f%% of its transcript placed", path, 100 * figures["audio_share_transcribed"],
                     figures["transcribed_clips"], 100 * figures["transcript_share_placed"])
    # These depend on what earlier runs left in the cache and under audio/: the log's.
    run_stats = {"sources_processed": len(todo), "sources_reused": len(keys) - len(todo),
                 "orphans_removed": removed}
    written()
    # After the save: file_stats writes the outcomes still pending, as the save does.
    file_stats = _stats_in_order(cache.file_stats(), arrived.column("audio_path"), order)
    return StageResult(manifests={stage_manifest(NAME): (NAME, table)}, rejects=rejects, summary=summary,
                       run_stats=run_stats, file_stats=file_stats, listed_folder=AUDIO_DIR)


STAGE = Stage(
    name=NAME,
    inputs=("ingest",),
    outputs=(Output(names.stage_manifest(NAME), schema=NAME),),
    config_sections=("audio", "text", "ingest"),  # text, ingest: each transcript's language, for its voice
    run=run,
    written_files=written_files,
    prepare_driver=prepare_driver,
    # _clean_up removes every file of OUT/audio listed as the stage began that no row
    # names: a killed run's temporaries there too.
    cleans_folder=AUDIO_DIR,
)
