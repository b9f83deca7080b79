"""Ingest stage: scan the raw dump, probe every audio file, pair transcripts, quarantine.

Nothing here writes inside RAW or follows a path out of it. Every audio file found
and every metadata row ends up exactly once in ``stages/ingest.parquet`` or in the
rejects: a metadata row is accounted for by the ingest row that uses it
(``metadata_line``), by its own reject (``<table>:<line>``), or by the reject of the
audio file it names; a row whose speaker is used while its transcript is set aside
has both. A transcript problem (``pipeline.stages.transcripts``) costs only the transcript:
the audio goes on as untranscribed audio.
"""

from __future__ import annotations

import bisect
import os
import posixpath
import re
import unicodedata
from collections import defaultdict
from collections.abc import Callable, Collection, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.core import names
from pipeline.core.cache import TableCache, cache_key
from pipeline.core.codeversion import code_version
from pipeline.core.columns import distinct_count
from pipeline.core.fsio import write_text_atomic
from pipeline.core.manifest import arrow_schema, table_from_columns
from pipeline.core.names import stage_manifest
from pipeline.core.parallel import batches, each_result, resolve_workers
from pipeline.core.pool import run_alone
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.core.startup import pandas_left_unloaded
from pipeline.stages import ingest_probe, ingest_rows
from pipeline.stages.ingest_probe import (
    PROBE_FIELDS,
    STAT_FIELDS,
    UNCACHED,
    ProbeJob,
    cacheable,
    probe_schema,
    probe_table,
)
from pipeline.stages.paths import check_relative_path, is_inside
from pipeline.stages.speaker_source import SpeakerRule, path_speaker, speaker_rule
from pipeline.stages.speakers import speaker_id
from pipeline.stages.transcripts import (
    MetadataRow,
    collapse_rows,
    pair_transcript,
    read_metadata_table,
    read_sidecar,
)

NAME = "ingest"
# The module of the per-file probe, whose code version scopes the probe cache.
PROBE_MODULE = "ingest_probe"
# Reasons for which ingest sets aside a transcript and keeps its audio.
TRANSCRIPT_REASONS = frozenset({"transcript_encoding", "transcript_unreadable", "empty_transcript",
                                "conflicting_transcripts"})

_SLUG_KEEP = re.compile(r"[^a-z0-9_-]+")


def slug(text: str, *, max_chars: int = 40) -> str:
    """Lower-case ASCII id fragment of ``text`` (accents folded, other runs -> '-')."""
    # NFKD leaves ASCII as it is: most names skip the fold.
    ascii_text = text if text.isascii() else unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode()
    cleaned = _SLUG_KEEP.sub("-", ascii_text.lower()).strip("-_")[:max_chars].strip("-_")
    return cleaned or "clip"


def source_id(stem: str, sha256: str) -> str:
    """Stable source id: a readable slug plus the content hash, so renames are visible."""
    return f"{slug(stem)}-{sha256[:10]}"


def _storable(text: str) -> bool:
    """Whether ``text`` can be stored as UTF-8 (a name os.walk decoded with
    surrogateescape from bytes that are not UTF-8 cannot)."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _shown_path(text: str) -> str:
    """A path that is not UTF-8, with its undecodable bytes written as \\xNN."""
    return os.fsencode(text).decode("utf-8", "backslashreplace")


@dataclass(frozen=True)
class SortedPaths(Collection[str]):
    """Sorted paths (``Scan.audio``) asked whether they hold a path by bisection: the
    few rejects ask, where a set of 100,000 paths took 6 to 13 ms to build.

    Examples
    --------
    >>> found = SortedPaths(["a/x.wav", "b/y.wav"])
    >>> "b/y.wav" in found, "b/z.wav" in found, "" in found, len(found)
    (True, False, False, 2)
    """

    paths: list[str]

    def __contains__(self, rel: object) -> bool:
        if not isinstance(rel, str):
            return False
        i = bisect.bisect_left(self.paths, rel)
        return i < len(self.paths) and self.paths[i] == rel

    def __iter__(self) -> Iterator[str]:
        return iter(self.paths)

    def __len__(self) -> int:
        return len(self.paths)


@dataclass
class Scan:
    """What :func:`scan` found under RAW."""

    audio: list[str]  # relative paths of audio files, sorted
    sidecars: set[str]  # relative paths of sidecar transcripts
    links: set[str]  # the relative paths among those that are symbolic links
    rejects: list[dict[str, Any]]  # links that leave RAW, names that are not UTF-8
    # From the run's listing (scan_listing): the sidecars' paths as Arrow strings, sorted,
    # with their size, mtime_ns and inode row for row (None: take them from os.stat).
    sidecar_listing: tuple[Any, np.ndarray] | None = None
    # The audio paths as Arrow strings (scan_listing has them; None: build them from ``audio``).
    audio_array: Any = None


def _walk(raw: Path) -> Any:
    """``(relative folder prefix, entries)`` for every folder under RAW, parents first,
    each folder's entries and subfolders in name order (never the file system's order).
    Links to folders are listed, not followed."""
    stack = [(os.fspath(raw), "")]
    while stack:
        folder, prefix = stack.pop()
        with os.scandir(folder) as it:
            entries = sorted(it, key=lambda e: e.name)
        yield prefix, entries
        stack.extend(reversed([(e.path, f"{prefix}{e.name}/") for e in entries
                               if e.is_dir(follow_symlinks=False)]))


def scan(raw: Path, extensions: tuple[str, ...], sidecar_extension: str) -> Scan:
    """Audio files, sidecars and the links among them, and rejects for links that
    leave RAW. Sorting makes every later choice independent of walk order.

    One ``os.scandir`` per folder: whether an entry is a folder or a link comes with
    the listing, so a file costs no ``stat`` here (a link to a folder costs one).
    """
    wanted = {"." + e.lower() for e in extensions}
    side = "." + sidecar_extension.lower()
    found = Scan([], set(), set(), [])
    outside: list[str] = []  # links to audio files outside RAW
    root = raw.resolve()
    for prefix, entries in _walk(raw):
        for entry in entries:
            rel = prefix + entry.name
            link = entry.is_symlink()
            if link and entry.is_dir():
                if not is_inside(Path(entry.path), folder=root):
                    shown = _shown_path(rel)
                    found.rejects.append(reject(NAME, shown, "path_outside_root",
                                                f"{shown}: a symbolic link to a folder outside the raw folder; not followed"))
                continue
            if entry.is_dir(follow_symlinks=False):
                continue
            ext = os.path.splitext(entry.name)[1].lower()
            if ext in wanted and not _storable(rel):
                shown = _shown_path(rel)
                found.rejects.append(reject(NAME, shown, "file_name_encoding",
                                            f"{shown}: the path is not valid UTF-8 (its undecodable bytes shown as \\x "
                                            "escapes); expected UTF-8 names: rename the file or folder"))
            elif ext in wanted:
                if link and not is_inside(Path(entry.path), folder=root):
                    outside.append(rel)
                    continue
                found.audio.append(rel)
            elif ext == side:
                found.sidecars.add(rel)
            else:
                continue
            if link:
                found.links.add(rel)
    found.audio.sort()
    found.rejects.extend(reject(NAME, rel, "path_outside_root",
                                f"{rel}: a symbolic link to a file outside the raw folder; not opened")
                         for rel in sorted(outside))
    return found


def scan_listing(listing: Any, extensions: tuple[str, ...], sidecar_extension: str,
                 ) -> tuple[Scan, tuple[np.ndarray, ...]] | None:
    """What :func:`scan` finds, taken from the run's listing of RAW (``StageContext.raw_stats``,
    a :class:`pipeline.core.snapshot.Listing`) instead of a second walk, with the audio
    files' stats as :func:`_stats` gives them; None when the listing cannot stand for the
    walk (not complete: a link, a special file, an unlistable folder; a name that is not
    UTF-8; a value out of range). Columnar: a file costs no Python of its own here, but
    for names outside ASCII, whose extension is lower-cased as :func:`scan` does it."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if not getattr(listing, "complete", False):
        return None
    # The listing's columns (mode, size and mtime_ns of each file, then the inodes),
    # mapped into numpy without a copy: no Python value per file.
    names, numbers, inodes = listing.columns()
    values = np.column_stack([np.frombuffer(numbers, dtype=np.int64).reshape(-1, 3)[:, 1:],
                              np.frombuffer(inodes, dtype=np.uint64).view(np.int64)])
    try:
        with pandas_left_unloaded():
            arr = pa.array(names, pa.string())
    except (UnicodeEncodeError, OverflowError, ValueError):
        return None
    if (values < 0).any():
        return None
    wanted = {"." + e.lower() for e in extensions}
    side = "." + sidecar_extension.lower()
    with pandas_left_unloaded():
        # An ASCII name whose file name does not start with a dot has the extension it
        # ends with (an extension holds no dot); the others are judged one by one.
        lowered = pc.ascii_lower(arr)
        audio = np.zeros(len(names), dtype=bool)
        for suffix in sorted(wanted):
            audio |= np.asarray(pc.ends_with(lowered, suffix), dtype=bool)
        sidecar = np.asarray(pc.ends_with(lowered, side), dtype=bool) & ~audio
        odd = pc.or_(pc.invert(pc.string_is_ascii(arr)), pc.or_(pc.starts_with(arr, "."), pc.match_substring(arr, "/.")))
        for i in np.flatnonzero(np.asarray(odd, dtype=bool)).tolist():
            name_ext = os.path.splitext(posixpath.basename(names[i]))[1].lower()
            audio[i], sidecar[i] = name_ext in wanted, name_ext == side and name_ext not in wanted
        at = np.flatnonzero(audio)
        at = at[np.asarray(pc.sort_indices(arr.take(pa.array(at))), dtype=np.int64)]
        audio_array = arr.take(pa.array(at))
        paths = audio_array.to_pylist()
        side_at = np.flatnonzero(sidecar)
        side_at = side_at[np.asarray(pc.sort_indices(arr.take(pa.array(side_at))), dtype=np.int64)]
        sidecar_names = arr.take(pa.array(side_at))
        sidecars = set(sidecar_names.to_pylist())
    stat = values[at]
    found = Scan(paths, sidecars, set(), [], (sidecar_names, values[side_at]), audio_array)
    return found, (stat[:, 0].copy(), stat[:, 1].copy(), stat[:, 2].astype(np.uint64), np.ones(len(at), dtype=bool))


# Fresh probes are written to the cache in parts of this many, so an interrupted run
# keeps most of what it probed.
_PROBE_PART_ROWS = 4096
# Bytes of audio to probe that repay a worker process: hashing and reading headers took
# 1.1 to 1.4 CPU seconds per GB here, and each worker past the first cost 0.02 CPU
# seconds and 0.05 s of waiting to start and stop; a second one pays when it halves at
# least 0.1 s of work. A rebuild's few new files are probed by one worker.
_PROBE_BYTES_PER_WORKER = 64 * 2**20
# What a file costs beyond its bytes (opening it, reading its header, the result's trip),
# in bytes of hashing: 100,000 files of 61 kB took 25.8 s on two workers here, about
# 0.5 ms of a worker's time each, of which hashing their bytes is under a fifth. Without
# it a rebuild's 1,000 new short files (61 MB) would get one worker.
_PROBE_FILE_BYTES = 384 * 2**10


def _stats(root: str, paths: list[str], known: Mapping[str, tuple[int, int, int]] | None = None,
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Size, mtime_ns and inode of each file, and whether it could be stat'ed: from
    ``known`` (StageContext.raw_stats, the run's listing of RAW) or ``os.stat``."""
    sizes, mtimes, inodes = [], [], []
    known = known or {}
    for rel in paths:
        given = known.get(rel)
        if given is not None:
            sizes.append(given[0])
            mtimes.append(given[1])
            inodes.append(given[2])
            continue
        try:
            st = os.stat(os.path.join(root, rel))
        except OSError:
            sizes.append(-1)
            mtimes.append(-1)
            inodes.append(0)
            continue
        sizes.append(st.st_size)
        mtimes.append(st.st_mtime_ns)
        inodes.append(st.st_ino)
    size = np.array(sizes, dtype=np.int64)
    return size, np.array(mtimes, dtype=np.int64), np.array(inodes, dtype=np.uint64), size >= 0


def _reusable(previous: Any, paths: list[str], stat: tuple[np.ndarray, ...], *, names: Any = None,
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per path: the row of ``previous`` (a cache of results by path and stat; a later row
    wins) holding its result, whether that row's stat is the file's now, and whether only
    its inode differs (a moved or copied RAW). Columnar: no Python per file (``names``:
    ``paths`` as Arrow strings, when the caller has them)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    size, mtime, inode, statted = stat
    if previous is None or not previous.num_rows or not paths:
        return np.zeros(len(paths), dtype=np.int64), np.zeros(len(paths), dtype=bool), np.zeros(len(paths), dtype=bool)
    # index_in finds a value's first row: look the paths up in the table reversed, so the
    # last row written for a path (a part after the table) is the one found.
    last = previous.num_rows - 1
    with pandas_left_unloaded():
        reversed_paths = previous.column("path").take(pa.array(np.arange(last, -1, -1)))
        found = pc.index_in(pa.array(paths, pa.string()) if names is None else names, value_set=reversed_paths)
        # Arrow to numpy imports pandas too (0.17 s, a third of a 20,000-file rerun's ingest).
        row = last - np.asarray(found.fill_null(last + 1), dtype=np.int64)
        hit = row >= 0
        row = np.where(hit, row, 0)
        for column, now in (("st_size", size), ("st_mtime_ns", mtime)):
            hit &= previous.column(column).fill_null(0).to_numpy()[row] == now
        same_inode = previous.column("st_ino").fill_null(0).to_numpy()[row] == inode
    return row, hit & statted & same_inode, hit & statted & ~same_inode


@dataclass(frozen=True)
class Probes:
    """Each file's probe result, in the order of the paths: row ``at[i]`` of ``table``
    (the probe cache's columns: the rows it held, then this run's). The rows are taken
    only for the columns and files asked for: at 100,000 files, a take of every column
    of every row, as a table in path order, cost more than the cache's whole load."""

    table: Any
    at: np.ndarray

    def column(self, name: str) -> Any:
        """Column ``name`` for every file, in order."""
        import pyarrow as pa

        with pandas_left_unloaded():
            return self.table.column(name).take(pa.array(self.at))

    def of(self, files: np.ndarray) -> Any:
        """The rows of the files at indices ``files``, in that order, as a table."""
        import pyarrow as pa

        with pandas_left_unloaded():
            return self.table.take(pa.array(self.at[files]))


def _probe_all(ctx: StageContext, raw: Path, paths: list[str], stat: tuple[np.ndarray, ...] | None = None, *,
               names: Any = None, meanwhile: Callable[[], None] | None = None) -> Probes:
    """Probe results for ``paths`` (:class:`Probes`, the probe cache's columns), reusing earlier results for files whose size, modification time and inode are
    unchanged (hashing is most of ingest's cost), and for files of unchanged size and
    modification time whose bytes still hash to the cached hash (a moved or copied RAW
    gives every file a new inode: such a file costs its hash, not its probe).

    The results live in one table (``OUT/cache/ingest/probes.arrow``), read once and
    joined to this run's listing in Arrow: a file reused costs no Python work of its own;
    only the new and changed files are probed, in workers (:func:`_probe_fresh`, which
    calls ``meanwhile`` while they run).
    """
    import pyarrow as pa

    cache, previous, stored = _probe_cache(ctx)
    size, mtime, inode, statted = stat = stat if stat is not None else _stats(os.fspath(raw), paths, ctx.raw_stats)
    row, hit, moved = _reusable(previous, paths, stat, names=names)
    todo = np.flatnonzero(~hit).tolist()
    known = _cached_hashes(previous, row, moved)

    def stat_of(i: int) -> tuple[Any, Any, Any]:
        return (int(size[i]), int(mtime[i]), int(inode[i])) if statted[i] else (None, None, None)

    pending: list[tuple[str, tuple[Any, Any, Any], dict[str, Any]]] = []
    confirmed: list[int] = []

    def remember(j: int, res: dict[str, Any]) -> dict[str, Any]:
        i = todo[j]
        if res == ingest_probe.SAME_BYTES:  # a result from a worker is a copy
            confirmed.append(i)
            res = _cached_result(previous, int(row[i]))
        if statted[i] and cacheable(res):
            pending.append((paths[i], stat_of(i), res))
        if len(pending) >= _PROBE_PART_ROWS:
            cache.append(probe_table(pending))
            pending.clear()
        return res

    jobs = [ProbeJob(str(raw / paths[i]), paths[i], known.get(i)) for i in todo]
    fresh = _probe_fresh(ctx, jobs, [(int(size[i]) if statted[i] else 0) for i in todo], remember,
                         meanwhile=meanwhile)
    reused = np.flatnonzero(hit)
    probes = Probes(probe_table([(paths[i], stat_of(i), res) for i, res in zip(todo, fresh, strict=True)]),
                    np.arange(len(paths)))
    if previous is not None and len(reused):
        # The cached rows followed by the fresh ones.
        at = np.empty(len(paths), dtype=np.int64)
        at[reused] = row[reused]
        at[todo] = previous.num_rows + np.arange(len(todo))
        with pandas_left_unloaded():
            probes = Probes(pa.concat_tables([previous.cast(probe_schema()), probes.table]), at)
    _save_probes(cache, probes, pending, stored=stored, used=len(reused) + len(confirmed))
    if known:
        ctx.log.info("ingest: %d files of unchanged size and time but a new inode (RAW moved or copied?) hashed "
                     "again: %d hold the bytes cached for them", len(known), len(confirmed))
    ctx.log.info("ingest: %d files probed, %d reused from cache", len(todo) - len(confirmed),
                 len(reused) + len(confirmed))
    return probes


def _probe_cache(ctx: StageContext) -> tuple[TableCache, Any, int]:
    """The probe cache (``OUT/cache/ingest/probes.arrow``), the probes it holds (None:
    none) and how many rows it stores for :meth:`TableCache.compaction_due`.

    Mapped (see :class:`TableCache`): at 100,000 files its 18 MB are used without
    decoding, where the Parquet table an older Loam kept took 25 to 70 ms of CPU. That
    table holds probes of the same scope, which still stand: it is read once (100,000
    files took 26 s of two workers to probe), and counted as nothing stored, so the
    run writes the mapped table, which replaces it.
    """
    # The probe's own code version (pipeline.stages.ingest_probe): an edit within its
    # reach probes every file again, an edit elsewhere in the stage does not.
    code = code_version(PROBE_MODULE, cache_dir=ctx.cache_dir if ctx.use_cache else None)
    scope = cache_key("probe", code)
    cache = TableCache(ctx.cache_dir, NAME, "probes", scope=scope, enabled=ctx.use_cache, mapped=True)
    previous = cache.load()
    if previous is not None:
        return cache, previous, previous.num_rows
    return cache, TableCache(ctx.cache_dir, NAME, "probes", scope=scope, enabled=ctx.use_cache).load(), 0


def _cached_hashes(previous: Any, row: np.ndarray, moved: np.ndarray) -> dict[int, str]:
    """The cached content hash (None for a cached error) of each file ``moved`` marks, by
    its index, from its row ``row[i]`` of the probe cache ``previous``."""
    import pyarrow as pa

    if not moved.any():
        return {}
    at = np.flatnonzero(moved)
    return dict(zip(at.tolist(), previous.column("sha256").take(pa.array(row[at])).to_pylist(), strict=True))


def _save_probes(cache: TableCache, probes: Probes, pending: list[Any], *, stored: int, used: int) -> None:
    """Rewrite the probe cache from this run's ``probes`` when due (TableCache.compaction_due),
    else add the fresh results not yet written (``pending``) as a part."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if cache.compaction_due(stored=stored, used=used):
        # The rewritten table holds this run's files only: what left RAW leaves the cache.
        table = probes.of(np.arange(len(probes.at)))
        with pandas_left_unloaded():
            uncached = pc.fill_null(pc.is_in(table.column("error_reason"), value_set=pa.array(UNCACHED)), False)
        cache.save(table.filter(pc.and_(pc.is_valid(table.column("st_size")), pc.invert(uncached))))
    elif pending:
        cache.append(probe_table(pending))


def _cached_result(previous: Any, row: int) -> dict[str, Any]:
    """Row ``row`` of the probe cache as probe_file gave it (an error as its reason and sentence)."""
    cached = previous.slice(row, 1).to_pylist()[0]
    if cached["error_reason"] is not None:
        return {"error": (cached["error_reason"], cached["error_detail"])}
    return {name: cached[name] for name, _ in PROBE_FIELDS}


def _probe_fresh(ctx: StageContext, jobs: list[ProbeJob], sizes: list[int],
                 remember: Callable[[int, dict[str, Any]], dict[str, Any]], *,
                 meanwhile: Callable[[], None] | None = None) -> list[dict[str, Any]]:
    """Probe results for ``jobs`` (files of ``sizes`` bytes) in their order, each passed
    through ``remember(index, result)`` as it arrives, which gives the result to keep;
    ``meanwhile`` is this process's work while the workers run (``each_result``).

    Files travel to the workers in batches (``parallel.batches``): one task, one message
    and one future per batch instead of per file. A batch whose worker died twice, the
    second time alone, is probed again file by file, each alone, so only the file that
    crashes the library is rejected (``decoder_crashed``), whoever shared its batch.
    """
    groups = batches(range(len(jobs)), threads=resolve_workers(ctx.workers))
    fresh: list[dict[str, Any]] = [{}] * len(jobs)

    def arrived(b: int, results: list[dict[str, Any]]) -> None:
        for j, res in zip(groups[b], results, strict=True):
            fresh[j] = remember(j, res)

    def crashed(b: int, how: str) -> list[dict[str, Any]]:
        results = []
        for j in groups[b]:
            ok, value = run_alone(ingest_probe.probe_files, [jobs[j]])
            results.append(value[0] if ok else {"error": (
                "decoder_crashed", f"{jobs[j].rel}: the worker process probing it died ({value}), also when it "
                "ran alone; expected a file the audio library can read without crashing")})
        return results

    each_result(ingest_probe.probe_files, [[jobs[j] for j in group] for group in groups], arrived,
                workers=ctx.workers, scheduler=ctx.scheduler, desc="probe", progress=ctx.progress,
                costs=[sum(sizes[j] + _PROBE_FILE_BYTES for j in group) for group in groups],
                cost_per_worker=_PROBE_BYTES_PER_WORKER, meanwhile=meanwhile, on_crash=crashed)
    return fresh


_SIDECAR_FIELDS = (*STAT_FIELDS, ("text", "string"), ("reason", "string"), ("sentence", "string"),
                   ("fix", "string"))
SidecarRead = tuple[str | None, tuple[str, str, str] | None]


@dataclass
class Sidecars:
    """The sidecars a run pairs (``needed``, sorted Arrow strings), their stats as arrays
    (``statted`` False for a link or a sidecar that could not be stat'ed) and what
    ``read_sidecar`` gives for each: read this run (``fresh``, by index in ``needed``) or
    taken on demand from the cache table's row ``row[i]`` where ``hit[i]``."""

    needed: Any
    stat: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
    hit: np.ndarray
    row: np.ndarray
    table: Any
    fresh: dict[int, SidecarRead]

    def get(self, i: int) -> SidecarRead | None:
        """The reading of sidecar ``needed[i]`` (None for ``i`` -1: no sidecar)."""
        if i < 0:
            return None
        if i in self.fresh:
            return self.fresh[i]
        text, reason, sentence, fix = (self.table.column(name)[int(self.row[i])].as_py()
                                       for name in ("text", "reason", "sentence", "fix"))
        return text, None if reason is None else (reason, sentence, fix)


def _listed_stats(paths: Any, listing: tuple[Any, np.ndarray]) -> tuple[np.ndarray, ...]:
    """What :func:`_stats` gives for ``paths`` (Arrow strings), looked up in Arrow in a
    listing of ``(paths, stats)`` (``Scan.sidecar_listing``) instead of a dict per path."""
    import pyarrow.compute as pc

    listed, values = listing
    with pandas_left_unloaded():
        at = np.asarray(pc.index_in(paths, value_set=listed).fill_null(-1), dtype=np.int64)
    found = at >= 0
    taken = values[np.maximum(at, 0)] if len(values) else np.zeros((len(paths), 3), dtype=np.int64)
    size = np.where(found, taken[:, 0], -1)
    return size, np.where(found, taken[:, 1], -1), np.where(found, taken[:, 2], 0).astype(np.uint64), found


def _read_sidecars(ctx: StageContext, needed: Any, links: set[str],
                   listing: tuple[Any, np.ndarray] | None = None) -> Sidecars:
    """What ``read_sidecar`` gives for each sidecar in ``needed`` (Arrow strings), reusing the last run's
    reading of a sidecar whose size, mtime and inode are unchanged (a ``stat`` instead
    of an open and a read: reading sidecars took a third of a 20,000-file rebuild's
    ingest), matched in Arrow like the probes. Links are always read (where they lead is
    checked each time), and so is a sidecar that could not be read (a permission says
    something about this machine). ``listing`` (``Scan.sidecar_listing``) gives the
    stats when the run's listing of RAW stood for the walk (no links then)."""

    cfg = ctx.config.ingest
    code = code_version(NAME, cache_dir=ctx.cache_dir if ctx.use_cache else None)
    cache = TableCache(ctx.cache_dir, NAME, "sidecars", scope=cache_key("sidecar", code, cfg.transcript_encoding),
                       enabled=ctx.use_cache, mapped=True)
    table = cache.load()
    stat = _listed_stats(needed, listing) if listing is not None else _walked_stats(ctx, needed.to_pylist(), links)
    row, hit, _ = _reusable(table, needed, stat, names=needed)
    fresh: dict[int, SidecarRead] = {}
    for i in np.flatnonzero(~hit).tolist():
        rel = needed[i].as_py()
        fresh[i] = read_sidecar(ctx.raw, rel, encoding=cfg.transcript_encoding, link=rel in links)
    found = Sidecars(needed, stat, hit, row, table, fresh)
    _save_sidecars(cache, found)
    return found


def _walked_stats(ctx: StageContext, needed: list[str], links: set[str]) -> tuple[np.ndarray, ...]:
    """The stats of the sidecars ``needed`` when RAW was walked (:func:`_stats`), none for
    a link (read again every run)."""
    unlinked = [rel for rel in needed if rel not in links] if links else needed
    stat = _stats(os.fspath(ctx.raw), unlinked, ctx.raw_stats)
    if len(unlinked) == len(needed):
        return stat
    at = np.array([i for i, rel in enumerate(needed) if rel not in links], dtype=np.int64)
    full = tuple(np.zeros(len(needed), dtype=a.dtype) for a in stat)
    for column, values in zip(full, stat, strict=True):
        column[at] = values
    return full


def _save_sidecars(cache: TableCache, found: Sidecars) -> None:
    """The fresh readings worth keeping as a part, or the whole table rewritten when
    due (TableCache.compaction_due): the reused rows and the fresh ones."""
    import pyarrow as pa

    size, mtime, inode, statted = found.stat
    keep = [i for i, (_, problem) in found.fresh.items()
            if statted[i] and (problem is None or problem[0] != "transcript_unreadable")]
    compact = cache.compaction_due(stored=0 if found.table is None else found.table.num_rows,
                                   used=int(found.hit.sum()))
    if not keep and not compact:
        return
    rows = []
    for i in keep:
        text, problem = found.fresh[i]
        rows.append((found.needed[i].as_py(), int(size[i]), int(mtime[i]), int(inode[i]), text,
                     *(problem or (None, None, None))))
    schema = pa.schema([(name, getattr(pa, kind)()) for name, kind in _SIDECAR_FIELDS])
    with pandas_left_unloaded():
        part = pa.table([pa.array([r[i] for r in rows], f.type) for i, f in enumerate(schema)], schema=schema)
        if compact and found.table is not None and found.hit.any():
            part = pa.concat_tables([found.table.take(pa.array(found.row[found.hit])).cast(schema), part])
    cache.save(part) if compact else cache.append(part)


def extra_inputs(ctx: StageContext) -> list[Path]:
    """Files outside RAW this stage reads or writes: the pseudonym key and mapping."""
    privacy = ctx.config.privacy
    if not privacy.pseudonymise:
        return []
    return [ctx.config.resolve_path(p) for p in (privacy.key_file, privacy.mapping_file) if p]


def _pseudonymise(ctx: StageContext, rows: list[dict[str, Any]], rejects: list[dict[str, Any]],
                  *, paths: Sequence[str], metadata_speakers: set[str]) -> None:
    """Replace speaker ids by keyed pseudonyms, source paths by keyed references and
    drop file stems (which often carry names) from source ids; rewrite the rejects'
    paths and sentences so they name no folder, file stem or speaker of RAW (the
    metadata table's speaker names as written count too, with the pseudonym of their id). The mapping
    back goes to ``privacy.mapping_file`` and to the private file under OUT's cache."""
    from pipeline.stages.privacy import (
        load_key,
        mapping_text,
        name_pattern,
        pseudonym,
        real_names,
        scrub,
        source_reference,
        write_mapping,
    )

    privacy = ctx.config.privacy
    key = load_key(ctx.config.resolve_path(privacy.key_file), out=ctx.out)
    speakers: dict[str, str] = {}
    sources = {rel: source_reference(rel, key=key) for rel in paths}
    for row in rows:
        original = row["speaker"]
        row["speaker"] = speakers.setdefault(original, pseudonym(original, key=key))
        row["source_id"] = source_id("clip", row["sha256"])
        row["source_path"] = sources[row["source_path"]]
    for name in metadata_speakers:  # the names as written in the table, also those of files set aside
        speakers.setdefault(name, pseudonym(speaker_id(name), key=key))
    for r in rejects:  # a rejected sidecar is a file of RAW too ("meta.csv:4", a table's line, is not)
        if r["source_path"] not in sources and (ctx.raw / r["source_path"]).is_file():
            sources[r["source_path"]] = source_reference(r["source_path"], key=key)
    pattern = name_pattern(real_names(speakers, sources))
    for r in rejects:
        r["source_path"] = scrub(r["source_path"], sources=sources, pattern=pattern)
        r["detail"] = scrub(r["detail"], sources=sources, pattern=pattern)
    write_text_atomic(ctx.out / names.PRIVATE_MAPPING, mapping_text(speakers, sources))
    if privacy.mapping_file:
        write_mapping(ctx.config.resolve_path(privacy.mapping_file), speakers, sources, out=ctx.out)


def _metadata_by_audio(ctx: StageContext, paths: list[str]) -> tuple[dict[str, list[MetadataRow]], int, list[dict[str, Any]]]:
    """Metadata rows by the audio file they name, the number of rows read, and the
    rejects of rows that cannot be used; bad paths are rejected before any open."""
    cfg, raw, table_rel = ctx.config.ingest, ctx.raw, ctx.config.ingest.metadata
    by_audio: dict[str, list[MetadataRow]] = defaultdict(list)
    if not table_rel:
        return by_audio, 0, []
    meta_rows, rejects = read_metadata_table(
        raw, table_rel, path_column=cfg.metadata_path_column, transcript_column=cfg.metadata_transcript_column,
        speaker_column=cfg.metadata_speaker_column, need_speaker=cfg.speaker_from == "metadata",
        encoding=cfg.transcript_encoding, origin=ctx.config.origin)
    count = len(meta_rows) + len(rejects)
    path_set = set(paths)
    for row in meta_rows:
        where = f"{table_rel}:{row.line}"
        rel, problem = check_relative_path(raw, row.path)
        if problem or rel is None:
            rejects.append(reject(NAME, where, "path_outside_root", f"{table_rel}: line {row.line}: column '{cfg.metadata_path_column}': {problem}"))
        elif rel not in path_set:
            exists = (raw / rel).is_file()
            why = ("is not an audio file with a configured extension" if exists else "does not exist")
            rejects.append(reject(NAME, where, "metadata_missing_audio",
                                  f"{table_rel}: line {row.line}: audio file {rel!r} {why}"))
        else:
            by_audio[rel].append(row)
    return by_audio, count, rejects


def _speaker(ctx: StageContext, rel: str, rows: list[MetadataRow], via: str,
             rule: SpeakerRule) -> str | dict[str, Any]:
    """The speaker name of one audio file, or the reject row saying why there is none
    (``rule`` from :func:`pipeline.stages.speaker_source.speaker_rule`)."""
    cfg = ctx.config.ingest
    if rule.constant is not None:
        return rule.constant
    if rule.origin == "metadata":
        speakers = {r.speaker for r in rows if r.speaker}
        if len(speakers) != 1:
            found = "none" if not speakers else ", ".join(sorted(speakers))
            return reject(NAME, rel, "missing_speaker",
                          f"{rel}: column '{cfg.metadata_speaker_column}' gives speaker {found}; expected exactly one{via}")
        return speakers.pop()
    name = path_speaker(rel, level=cfg.speaker_path_level)
    if name is None:
        return reject(NAME, rel, "missing_speaker",
                      f"{rel}: no folder at level {cfg.speaker_path_level} to name the speaker; "
                      f"expected RAW/<speaker>/.../<file>, or ingest.speaker for a one-speaker dump{via}")
    return name


def _sidecars_by_stem(sidecars: set[str]) -> dict[str, str]:
    """Sidecars by the stem they transcribe (the extension matches in any case; the first
    in sorted order wins, so the choice never depends on walk order)."""
    by_stem: dict[str, str] = {}
    for side in sorted(sidecars):
        by_stem.setdefault(side.rsplit(".", 1)[0], side)
    return by_stem


# What a path with an extension keeps of itself without it: up to its last dot.
_WITHOUT_EXTENSION = (r"\.[^./]*$", "")


def pair_sidecars(paths: list[str], sidecars: set[str], *, columnar: bool, names: Any = None,
                  sorted_sidecars: Any = None) -> tuple[Any, Any, np.ndarray]:
    """Each audio file's sidecar (see :func:`_sidecars_by_stem`; null: none), the sidecars
    paired (sorted), both as Arrow strings, and each file's sidecar as an index into them
    (-1: none). ``columnar`` (every name is UTF-8, as from :func:`scan_listing`) matches
    stems in Arrow (``names``: ``paths`` as Arrow strings, ``sorted_sidecars``:
    ``sidecars`` so, sorted, when the caller has them).

    Examples
    --------
    >>> paired, needed, at = pair_sidecars(["a/x.wav", "a/y.flac"], {"a/x.txt", "a/x.TXT", "b.txt"}, columnar=True)
    >>> paired.to_pylist(), needed.to_pylist(), at
    (['a/x.TXT', None], ['a/x.TXT'], array([ 0, -1]))
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if not sidecars or not paths:
        return pa.nulls(len(paths), pa.string()), pa.array([], pa.string()), np.full(len(paths), -1, dtype=np.int64)
    if not columnar:
        by_stem = _sidecars_by_stem(sidecars)
        # An audio path has an extension: its stem ends at its last dot.
        paired = [by_stem.get(rel[:rel.rfind(".")]) for rel in paths]
        needed = sorted({s for s in paired if s is not None})
        index = {rel: i for i, rel in enumerate(needed)}
        # A paired sidecar's name is UTF-8: its stem is an audio path's, its extension the configured one.
        return (pa.array(paired, pa.string()), pa.array(needed, pa.string()),
                np.fromiter((index.get(s, -1) for s in paired), dtype=np.int64, count=len(paths)))
    with pandas_left_unloaded():
        side = pa.array(sorted(sidecars), pa.string()) if sorted_sidecars is None else sorted_sidecars
        stems = pc.replace_substring_regex(pa.array(paths, pa.string()) if names is None else names,
                                           *_WITHOUT_EXTENSION)
        # index_in finds a stem's first sidecar in sorted order, as _sidecars_by_stem keeps.
        found = pc.index_in(stems, value_set=pc.replace_substring_regex(side, *_WITHOUT_EXTENSION))
        valid = np.asarray(pc.is_valid(found), dtype=bool)
        at = np.asarray(found.fill_null(0), dtype=np.int64)
        used = np.unique(at[valid])
        return side.take(found), side.take(pa.array(used)), np.where(valid, np.searchsorted(used, at), -1)


@dataclass(frozen=True)
class Fate:
    """What one audio file became: its ingest row (None when set aside) and the rejects
    it caused (its own, or its metadata rows' and transcript's)."""

    row: dict[str, Any] | None
    rejects: tuple[dict[str, Any], ...] = ()


def _ingest_file(ctx: StageContext, rel: str, probe: tuple[str | None, str | None, str | None],
                 rows: list[MetadataRow], *, kept_by_hash: dict[str, str], sidecar: str | None, rule: SpeakerRule,
                 links: set[str], reading: SidecarRead | None) -> Fate:
    """One audio file's fate: probe error, duplicate content, no speaker, or an ingest
    row with its transcript paired. ``probe`` is the file's content hash, or its probe
    error's reason and sentence; the row holds the fields ingest adds to the probe's
    (the stage takes the probe's columns from its table). ``kept_by_hash`` maps the
    hashes of the files kept so far to their paths, and gains this one when it is kept;
    ``reading`` is what ``read_sidecar`` gave for ``sidecar``."""
    cfg, table_rel = ctx.config.ingest, ctx.config.ingest.metadata
    via = f" (named on line {', '.join(str(r.line) for r in rows)} of {table_rel})" if rows else ""
    sha256, reason, sentence = probe
    if reason is not None:
        return Fate(None, (reject(NAME, rel, reason, f"{sentence}{via}"),))
    assert sha256 is not None  # a probe without error has a hash
    if sha256 in kept_by_hash:
        return Fate(None, (reject(NAME, rel, "duplicate_content",
                                  f"{rel}: byte-identical to {kept_by_hash[sha256]!r}, which is kept{via}"),))
    kept_by_hash[sha256] = rel
    rows, repeats = collapse_rows(rows, rel, table_rel) if rows else (rows, [])
    speaker_name = _speaker(ctx, rel, rows, via, rule)
    if isinstance(speaker_name, dict):
        return Fate(None, (*repeats, speaker_name))
    pairing = pair_transcript(ctx.raw, rel, rows, sidecar, table_rel=table_rel,
                              transcript_column=cfg.metadata_transcript_column, encoding=cfg.transcript_encoding,
                              speaker_from_metadata=cfg.speaker_from == "metadata",
                              sidecar_link=sidecar in links, sidecar_read=reading)
    return Fate({
        "source_id": source_id(posixpath.basename(posixpath.splitext(rel)[0]), sha256),
        "source_path": rel,
        "speaker": speaker_id(speaker_name),
        "sha256": sha256,
        "transcript": pairing.transcript,
        "transcript_origin": pairing.origin,
        "metadata_line": pairing.metadata_line,
    }, (*repeats, *pairing.rejects))


def _summary(own: Any, rejects: list[dict[str, Any]], *, paths: Collection[str], metadata_rows: int,
             durations: list[float]) -> dict[str, Any]:
    """Counts of files, rows, transcripts and hours for the report (``own``: the accepted
    rows' own fields; ``durations``: the accepted files' seconds, in their order)."""
    return {
        "audio_files_found": len(paths),
        "audio_files_accepted": own.num_rows,
        "audio_files_rejected": sum(1 for r in rejects if r["source_path"] in paths),
        "metadata_rows": metadata_rows,
        "transcribed": own.num_rows - own.column("transcript").null_count,
        "transcripts_set_aside": sum(1 for r in rejects if r["reason"] in TRANSCRIPT_REASONS),
        "hours": sum(durations) / 3600,
        "speakers": distinct_count(own.column("speaker")),
    }


def run(ctx: StageContext) -> StageResult:
    """Scan RAW, read the metadata table, probe every audio file and follow each to an
    ingest row or a reject (see the module docstring)."""
    cfg = ctx.config.ingest
    listed = scan_listing(ctx.raw_stats, cfg.extensions, cfg.sidecar_extension)
    found, stat = listed or (scan(ctx.raw, cfg.extensions, cfg.sidecar_extension), None)
    paths, rejects = found.audio, found.rejects
    path_set = SortedPaths(paths)
    by_audio, metadata_rows, meta_rejects = _metadata_by_audio(ctx, paths)
    rejects.extend(meta_rejects)

    rule = speaker_rule(paths, speaker=cfg.speaker, speaker_from=cfg.speaker_from)
    if rule.note:
        ctx.log.info("%s", rule.note)
    # What needs no probe (the sidecars paired and read, the rows cache loaded: 0.08 to
    # 0.1 CPU s at 100,000 files) is done while the workers probe, then the runner's
    # other work (the audio stage's imports).
    unprobed: list[_Unprobed] = []

    def meanwhile() -> None:
        unprobed.append(_unprobed(ctx, found, columnar=listed is not None, rule=rule))
        if ctx.meanwhile is not None:
            ctx.meanwhile()

    probes = _probe_all(ctx, ctx.raw, paths, stat, names=found.audio_array, meanwhile=meanwhile)
    if not unprobed:  # no file to probe: no pool ran
        unprobed.append(_unprobed(ctx, found, columnar=listed is not None, rule=rule))
    paired, sidecar_at, readings = unprobed[0].paired, unprobed[0].sidecar_at, unprobed[0].readings
    keys = ingest_rows.key_columns(paths if found.audio_array is None else found.audio_array, probes.column("sha256"),
                                   [repr(by_audio[rel]) if rel in by_audio else None for rel in paths] if by_audio
                                   else None, paired, sidecar_at, readings.stat)
    inputs = _Inputs(paths, by_audio, paired, sidecar_at, readings, found.links, rule)
    own, kept, fate_rejects = _fates(ctx, inputs, probes, keys, rows=(unprobed[0].rows, unprobed[0].previous))
    rejects.extend(fate_rejects)
    probed = probes.of(kept)

    summary = {**_summary(own, rejects, paths=path_set, metadata_rows=metadata_rows,
                          durations=probed.column("duration_s").to_pylist()),
               "speaker_from": rule.origin}
    stop = environment_failure(rejects, paths=path_set, metadata_rows=metadata_rows, accepted=own.num_rows)
    columns = {**{name: own.column(name) for name, _ in ingest_rows.ROW_FIELDS},
               "source_path": keys["path"].take(kept)}
    if ctx.config.privacy.pseudonymise:
        accepted = [{**r, "sha256": h} for r, h in zip(pa_rows(columns), probed.column("sha256").to_pylist(),
                                                        strict=True)]
        _pseudonymise(ctx, accepted, rejects, paths=paths,
                      metadata_speakers={r.speaker for rows in by_audio.values() for r in rows if r.speaker})
        columns = {name: [row[name] for row in accepted] for name in columns}
        stop = _scrubbed(ctx, stop)
    return StageResult(manifests={stage_manifest(NAME): (NAME, _ingest_table(columns, probed,
                                                                             reorder=ctx.config.privacy.pseudonymise))},
                       rejects=rejects, summary=summary, stop=stop)


def pa_rows(columns: dict[str, Any]) -> list[dict[str, Any]]:
    """Rows as dicts from Arrow columns of equal length."""
    names_ = list(columns)
    return [dict(zip(names_, values, strict=True))
            for values in zip(*(columns[n].to_pylist() for n in names_), strict=True)]


@dataclass(frozen=True)
class _Unprobed:
    """What ingest prepares without the probes, while the workers probe: each file's
    sidecar (``paired``, ``sidecar_at``: see :func:`pair_sidecars`), their readings, and
    the rows cache with what it loaded (None: nothing)."""

    paired: Any
    sidecar_at: np.ndarray
    readings: Sidecars
    rows: TableCache
    previous: Any


def _unprobed(ctx: StageContext, found: Scan, *, columnar: bool, rule: SpeakerRule) -> _Unprobed:
    """Pair and read the sidecars of ``found`` and load the rows cache (:class:`_Unprobed`)."""
    paired, needed, sidecar_at = pair_sidecars(found.audio, found.sidecars, columnar=columnar, names=found.audio_array,
                                               sorted_sidecars=None if found.sidecar_listing is None else found.sidecar_listing[0])
    readings = _read_sidecars(ctx, needed, found.links, found.sidecar_listing)
    rows = ingest_rows.rows_cache(ctx, rule=(rule.constant, rule.origin))
    return _Unprobed(paired, sidecar_at, readings, rows, rows.load())


@dataclass(frozen=True)
class _Inputs:
    """What every file's fate is decided from, besides its probe (row for row with paths:
    each file's sidecar, as Arrow strings, and its index in ``readings.needed``)."""

    paths: list[str]
    by_audio: dict[str, list[MetadataRow]]
    paired: Any
    sidecar_at: np.ndarray
    readings: Sidecars
    links: set[str]
    rule: SpeakerRule


def _fates(ctx: StageContext, inputs: _Inputs, probes: Probes, keys: dict[str, Any], *,
           rows: tuple[TableCache, Any]) -> tuple[Any, np.ndarray, list[dict[str, Any]]]:
    """Every file's fate: the accepted rows' own fields (in path order), their files'
    indices in ``inputs.paths`` and the rejects. Files whose inputs are those of a row
    in the rows cache (:mod:`pipeline.stages.ingest_rows`; ``rows``: the cache and what
    it loaded) take that row, in Arrow; the others go through :func:`_ingest_file` one
    by one, in path order."""
    import pyarrow as pa

    paths = inputs.paths
    cache, previous = rows
    first = ingest_rows.first_of_content(keys["sha256"])
    row, hit = ingest_rows.reusable(previous, keys)
    hit &= first == np.arange(len(paths))
    todo = np.flatnonzero(~hit)
    done = probes.of(todo)
    facts = list(zip(*(done.column(c).to_pylist() for c in ("sha256", "error_reason", "error_detail")), strict=True))
    sidecars = inputs.paired.take(pa.array(todo)).to_pylist()
    # A reused file is the first of its content: a later file to do with the same bytes is its duplicate.
    kept_by_hash = {probe[0]: paths[first[i]] for i, probe in zip(todo.tolist(), facts, strict=True)
                    if first[i] >= 0 and hit[first[i]]}
    accepted: list[dict[str, Any]] = []
    fresh: list[int] = []
    rejects: list[dict[str, Any]] = []
    clean = hit.copy()
    for i, probe, sidecar in zip(todo.tolist(), facts, sidecars, strict=True):
        rel = paths[i]
        fate = _ingest_file(ctx, rel, probe, inputs.by_audio.get(rel, []), kept_by_hash=kept_by_hash,
                            sidecar=sidecar, rule=inputs.rule, links=inputs.links,
                            reading=inputs.readings.get(int(inputs.sidecar_at[i])))
        rejects.extend(fate.rejects)
        if fate.row is not None:
            accepted.append(fate.row)
            fresh.append(i)
            clean[i] = not fate.rejects
    reused = np.flatnonzero(hit)
    own = ingest_rows.fresh_table(accepted)
    kept = np.concatenate([reused, np.array(fresh, dtype=np.int64)])
    order = np.argsort(kept, kind="stable")
    if len(reused):
        # One take in path order from the cached rows followed by the fresh ones.
        at = np.concatenate([row[reused], previous.num_rows + np.arange(len(fresh))])[order]
        own = pa.concat_tables([previous.select(own.schema.names).cast(own.schema), own]).take(pa.array(at))
    own = own.combine_chunks()
    kept = kept[order]
    if cache.compaction_due(stored=0 if previous is None else previous.num_rows, used=len(reused)):
        ingest_rows.save(cache, keys, own, kept, clean)
    elif len(todo):
        ingest_rows.save(cache, keys, own, kept, clean & ~hit, append=True)
    ctx.log.info("ingest: %d rows reused, %d files followed one by one", len(reused), len(todo))
    return own, kept, rejects


def _ingest_table(columns: dict[str, Any], probed: Any, *, reorder: bool) -> Any:
    """The ingest manifest: the rows' own fields (``columns``), the probe's columns from
    ``probed`` (row for row), sorted by source_path: in path order already, unless
    pseudonyms replaced the paths (``reorder``)."""
    import pyarrow as pa

    schema = arrow_schema(NAME)
    columns = dict(columns)
    columns.update({name: probed.column(name).cast(schema.field(name).type) for name, _ in PROBE_FIELDS})
    table = table_from_columns(NAME, columns)
    if not reorder:
        return table
    with pandas_left_unloaded():
        return table.take(pa.array(np.argsort(np.array(columns["source_path"], dtype=object), kind="stable")))


def _scrubbed(ctx: StageContext, sentence: str) -> str:
    """``sentence`` without RAW's names, read back from the private mapping just written."""
    from pipeline.stages.privacy import name_pattern, read_mapping, real_names, scrub

    mapping = read_mapping(ctx.out / names.PRIVATE_MAPPING)
    pattern = name_pattern(real_names(mapping["speaker"], mapping["source"]))
    return scrub(sentence, sources=mapping["source"], pattern=pattern)


def environment_failure(rejects: list[dict[str, Any]], *, paths: Collection[str], metadata_rows: int,
                        accepted: int) -> str:
    """A sentence when no audio file got through and every one was rejected for a
    reason that points at the machine rather than the files: all unreadable, or (no
    audio found at all) every metadata row naming a file that is not there; else "".

    Such a run would finish with empty manifests and exit 0, though nothing is wrong
    with the data: a permission, an unmounted share, a wrong RAW.
    """
    if accepted:
        return ""
    unreadable = [r for r in rejects if r["reason"] == "unreadable" and r["source_path"] in paths]
    if paths and len(unreadable) == len(paths):
        return (f"every one of the {len(paths)} audio files was rejected as unreadable (the first: "
                f"{unreadable[0]['detail']}): the environment is the likely cause, not the files; check that "
                "this user (and, on a cluster, every worker) can read RAW at this path")
    missing = [r for r in rejects if r["reason"] == "metadata_missing_audio"]
    if not paths and metadata_rows and len(missing) == metadata_rows:
        return (f"RAW holds none of the {metadata_rows} audio files the metadata table names (the first: "
                f"{missing[0]['detail']}): the environment is the likely cause, not the table; check that RAW "
                "is the folder the table's paths are relative to, and that it is mounted here")
    return ""


STAGE = Stage(
    name=NAME,
    inputs=(),
    outputs=(Output(names.stage_manifest(NAME), schema=NAME),),
    config_sections=("ingest",),
    run=run,
    # The raw folder is its input: it is rescanned every run (unchanged files hit the probe cache).
    always_run=True,
    extra_inputs=extra_inputs,
)
