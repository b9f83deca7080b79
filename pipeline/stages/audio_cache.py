"""The audio stage's per-source cache, as one columnar table.

Each source's outcome (its clip rows, the stat of each clip file it wrote, and its
rejects) is stored under a key holding what the outcome depends on per source: the
source's content hash and the ingest fields copied into the rows (:func:`source_keys`);
the audio section of the config, the code version of the per-file work
(``pipeline.stages.audio_file``) and the table's schema are the scope of the whole
table, which another scope leaves unread (:func:`outcome_code`). The outcomes of the last run are one
Arrow IPC table (``OUT/cache/audio/outcomes.arrow``, see
``pipeline.core.cache.TableCache``): one row per clip or reject, so reusing 100,000
sources maps one file into memory (checked against its SHA-256) and hands the reused
clip rows to the manifest as Arrow columns, with nothing decoded. Whether each clip
file is still the one written is settled by one listing of ``OUT/audio``
(:func:`file_listing`, one ``lstat`` per file) joined to the table in Arrow: no Python
work per reused source. A clip file of the recorded size and mtime but another inode (a
copied or moved OUT) is hashed, and stands when its bytes have the ``audio_sha256``
recorded for it (:func:`same_bytes`); its new inode is recorded.
"""

from __future__ import annotations

import contextlib
import operator
import os
from array import array
from collections.abc import Mapping, Sequence
from itertools import chain, compress
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.cache import TableCache, cache_key
from pipeline.core.codeversion import code_version
from pipeline.core.fsio import sha256_file
from pipeline.core.manifest import arrow_schema
from pipeline.core.stage import reject
from pipeline.core.startup import pandas_left_unloaded

# Fresh outcomes are written in parts of this many rows, so an interrupted run keeps
# most of its work (the clips of the rows not yet written are orphans, removed next run).
PART_ROWS = 2048
# A run that reused every stored outcome leaves the table as it is and its fresh
# outcomes in their parts, until the parts hold this share of all rows: rewriting the
# 33 MB table of 100,000 sources cost 0.34 CPU seconds of a rebuild adding 1,000.
PARTS_SHARE = 0.25
# The module of the per-file work, by its name under pipeline/stages: its code version
# (codeversion.stage_code) covers it and every module it reaches.
PER_FILE_MODULE = "audio_file"
_EXTRA = (("cache_key", pa.string()), ("reject_reason", pa.string()), ("reject_detail", pa.string()),
          ("reject_stage", pa.string()), ("st_size", pa.int64()), ("st_mtime_ns", pa.int64()),
          ("st_ino", pa.uint64()))


def cache_schema() -> pa.Schema:
    """The audio manifest's columns, all nullable (a reject row has none of them but
    its source_path and clip_id), then the key, the reject and the clip file's stat."""
    fields = [pa.field(f.name, f.type, nullable=True) for f in arrow_schema("audio")]
    return pa.schema([*fields, *(pa.field(name, kind) for name, kind in _EXTRA)])


def outcome_code(*, cache_dir: Path | None) -> str:
    """What every stored outcome depends on besides its source (:func:`source_keys`)
    and the audio section: the code version of the per-file work (:data:`PER_FILE_MODULE`:
    its module, every module it reaches, the libraries they use) and the table's schema
    (:func:`cache_schema`). The stage's driver (``pipeline.stages.audio``) and this
    module are left out: how the stage lists, reuses, sorts and records outcomes makes
    none of them, so an upgrade that edits only those conditions no source again.
    ``cache_dir`` is where codeversion keeps what it parsed (None: parse again).

    Examples
    --------
    >>> outcome_code(cache_dir=None) == outcome_code(cache_dir=None), len(outcome_code(cache_dir=None))
    (True, 64)
    """
    return cache_key(code_version(PER_FILE_MODULE, cache_dir=cache_dir), str(cache_schema()))


def source_keys(ingest: pa.Table, *, long: Mapping[str, tuple[str, str]] | None = None) -> pa.Array:
    """One cache key per ingest row: its content hash and the fields copied into its
    rows (source_id, source_path, speaker, whether it has a transcript), joined by NUL;
    for a source in ``long`` (source_id -> transcript, voice: a long transcribed source
    the alignment cuts) also its transcript and voice. The audio section and the code
    version of the per-file work are the table's scope (:class:`OutcomeCache`), not part of each key.

    Built in Arrow: a rebuild's 100,000 keys cost no Python work per source (hashing
    each in Python cost 0.18 CPU s).

    Examples
    --------
    >>> ingest = pa.table({"sha256": ["ab", "cd"], "source_id": ["a", "b"], "source_path": ["s/a.wav", "s/b.wav"],
    ...                    "speaker": ["s", "s"], "transcript": [None, "Two."]})
    >>> [k.replace("\\0", "|") for k in source_keys(ingest, long={"b": ("Two.", "sw")}).to_pylist()]
    ['ab|a|s/a.wav|s|0|', 'cd|b|s/b.wav|s|1|Two.|sw']
    """
    long = long or {}
    flag = pc.if_else(ingest.column("transcript").is_valid(), "1", "0")
    extra = pa.nulls(ingest.num_rows, pa.string())
    if long:
        at = pc.index_in(ingest.column("source_id").combine_chunks(), value_set=pa.array(list(long), pa.string()))
        extra = pa.array(["\0".join(value) for value in long.values()], pa.string()).take(at)
    columns = [ingest.column(c) for c in ("sha256", "source_id", "source_path", "speaker")]
    keys = pc.binary_join_element_wise(*columns, flag, pc.fill_null(extra, ""), "\0")
    return keys.combine_chunks() if isinstance(keys, pa.ChunkedArray) else keys


def file_listing(folder: Path, *, base: Path) -> pa.Table:
    """Every file under ``folder``: its '/'-separated path relative to ``base`` and its
    ``lstat`` (``st_size``, ``st_mtime_ns``, ``st_ino``, ``st_mode``); empty when there
    is no folder.

    One ``os.scandir`` per folder and one ``lstat`` per file, their numbers packed by
    the array module with no Python value per file (the 100,000 clips of the
    100,000-source rebuild: 0.31 to 0.29 CPU s, best of 7): the reuse check of 100,000 sources
    joins this table to the cache's in Arrow.

    Examples
    --------
    >>> import tempfile
    >>> out = Path(tempfile.mkdtemp())
    >>> (out / "audio" / "ana").mkdir(parents=True)
    >>> _ = (out / "audio" / "ana" / "take.flac").write_bytes(b"abc")
    >>> listing = file_listing(out / "audio", base=out)
    >>> listing.column("path").to_pylist(), listing.column("st_size").to_pylist()
    (['audio/ana/take.flac'], [3])
    >>> file_listing(out / "none", base=out).num_rows
    0
    >>> import shutil; shutil.rmtree(out)
    """
    paths: list[str] = []
    numbers, inodes = array("q"), array("Q")
    root = os.fspath(base)
    stack = [os.fspath(folder)]
    while stack:
        where = stack.pop()
        prefix = os.path.relpath(where, root).replace(os.sep, "/") + "/"
        # Listed by descriptor, so each file is stat'ed relative to its folder (fstatat):
        # 0.22 against 0.26 CPU s for the 100,000 clips by path.
        try:
            fd = os.open(where, _FOLDER_FLAGS)
        except OSError:  # gone, or no folder at all: nothing in it is intact
            continue
        try:
            with os.scandir(fd) as entries:
                listed = list(entries)
            folders = list(map(_IS_FOLDER, listed))
            files = list(compress(listed, map(operator.not_, folders)))
            try:
                stats = list(map(_LSTAT, files))
            except OSError:  # one gone meanwhile: the others one by one
                files, stats = _each_stat(files)
        except OSError:
            continue
        finally:
            os.close(fd)
        stack += (os.path.join(where, entry.name) for entry in compress(listed, folders))
        paths += map(prefix.__add__, map(_NAME, files))
        numbers += array("q", chain.from_iterable(map(_NUMBERS, stats)))
        inodes += array("Q", map(_INODE, stats))
    values = np.frombuffer(numbers, dtype=np.int64).reshape(-1, 3)
    with pandas_left_unloaded():
        return pa.table([pa.array(paths, pa.string()), pa.array(values[:, 0]), pa.array(values[:, 1]),
                         pa.array(np.frombuffer(inodes, dtype=np.uint64)), pa.array(values[:, 2])],
                        names=["path", "st_size", "st_mtime_ns", "st_ino", "st_mode"])


_FOLDER_FLAGS = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0)
_IS_FOLDER = operator.methodcaller("is_dir", follow_symlinks=False)
_LSTAT = operator.methodcaller("stat", follow_symlinks=False)
_NAME = operator.attrgetter("name")
_NUMBERS = operator.attrgetter("st_size", "st_mtime_ns", "st_mode")
_INODE = operator.attrgetter("st_ino")


def _each_stat(files: list[os.DirEntry[str]]) -> tuple[list[os.DirEntry[str]], list[os.stat_result]]:
    """The entries of ``files`` that can still be stat'ed, and their ``lstat``."""
    kept, stats = [], []
    for entry in files:
        with contextlib.suppress(OSError):
            stats.append(entry.stat(follow_symlinks=False))
            kept.append(entry)
    return kept, stats


def _intact(table: pa.Table, listing: pa.Table) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per cached row: whether it is a reject row, or a clip row whose file ``listing``
    holds with the size, mtime and inode the table recorded; the row of ``listing``
    naming its file (-1 for none); and whether it is a clip row whose file ``listing``
    holds with the recorded size and mtime but another inode (a copied or moved OUT)."""
    where = pc.index_in(table.column("audio_path"), value_set=listing.column("path"))
    at = np.asarray(where.fill_null(-1), dtype=np.int64)
    found = at >= 0
    index = np.where(found, at, 0)
    rejected = np.asarray(table.column("reject_reason").is_valid(), dtype=bool)
    if not listing.num_rows:
        return rejected, at, np.zeros(len(at), dtype=bool)
    same = found & ~rejected
    for column in ("st_size", "st_mtime_ns"):
        recorded = table.column(column).fill_null(0).to_numpy()
        same &= listing.column(column).to_numpy()[index] == recorded
    same_inode = listing.column("st_ino").to_numpy()[index] == table.column("st_ino").fill_null(0).to_numpy()
    return (same & same_inode) | rejected, at, same & ~same_inode


def same_bytes(paths: Sequence[str], sha256: Sequence[str | None], *, base: Path) -> np.ndarray:
    """Whether each file (``paths``, '/'-separated, relative to ``base``) holds bytes of
    the hex SHA-256 ``sha256`` gives for it; False for a file that cannot be read.

    Hashed here, one file after another: the 100,000 clips (3.1 GB) of the 100,000-source
    workload took 2.5 CPU s and 2.5 s of wall time (page cache warm, load about 1.4; 11.8 s
    as they were first read from disk);
    two threads took 2.4 to 2.5 s of wall time and 3.6 to 3.7 CPU s (a thread per file
    4.4 to 5.9 s), as each file is small and the other core was busy.

    Examples
    --------
    >>> import hashlib, tempfile
    >>> base = Path(tempfile.mkdtemp())
    >>> _ = (base / "a.flac").write_bytes(b"abc")
    >>> same_bytes(["a.flac", "a.flac", "gone.flac"], [hashlib.sha256(b"abc").hexdigest(), "00", "00"],
    ...            base=base).tolist()
    [True, False, False]
    >>> import shutil; shutil.rmtree(base)
    """
    root = os.fspath(base)
    held = np.zeros(len(paths), dtype=bool)
    for i, (rel, expected) in enumerate(zip(paths, sha256, strict=True)):
        # A file gone or unreadable stays False: its source is processed again.
        with contextlib.suppress(OSError):
            held[i] = expected is not None and sha256_file(os.path.join(root, rel)) == expected
    return held


def _outcome_runs(keys: pa.ChunkedArray, wanted: pa.Array) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The table's outcomes: rows of one outcome are written together (a run of one
    key); a key met again after other keys is a newer outcome of the same source (a
    part written after an interrupted run's), which replaces the older. Returns the
    last run of each key of ``wanted`` (-1 for none), and each run's first row and
    length.

    Runs are found by comparing each key with the one before it, and each row's key is
    looked up among ``wanted`` once, on the column as stored (its chunks as mapped):
    no copy of the 11 MB of keys of 100,000 sources (joining the chunks, then taking
    the runs' keys in reverse order, cost two), whose fresh pages cost more system
    time than the look-up.

    Examples
    --------
    >>> run, first, lengths = _outcome_runs(pa.chunked_array([["a", "a", "b", "a"]]), pa.array(["a", "b", "c"]))
    >>> run.tolist(), first.tolist(), lengths.tolist()
    ([2, 1, -1], [0, 2, 3], [2, 1, 1])
    """
    n = len(keys)
    if not n:
        return np.full(len(wanted), -1, dtype=np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64)
    if keys.null_count:  # rows of an older Loam, written without a key
        keys = pc.fill_null(keys, "")
    change = np.r_[True, np.asarray(pc.not_equal(keys.slice(1), keys.slice(0, n - 1)), dtype=bool)]
    first = np.flatnonzero(change)
    lengths = np.diff(np.r_[first, n])
    # The wanted key each run holds (-1 for none): read at each run's first row.
    key_of_run = np.asarray(pc.index_in(keys, value_set=wanted).fill_null(-1), dtype=np.int64)[first]
    runs = np.flatnonzero(key_of_run >= 0)
    # A key in several runs keeps its last: the highest run index.
    last = np.full(len(wanted), -1, dtype=np.int64)
    np.maximum.at(last, key_of_run[runs], runs)
    return last, first, lengths


class OutcomeCache:
    """Reuse and record the audio stage's outcomes (see the module docstring)."""

    def __init__(self, root: Path, *, section: dict[str, Any], code: str, enabled: bool) -> None:
        self.table = TableCache(root, "audio", "outcomes", scope=cache_key("audio-outcomes", section, code),
                                enabled=enabled, mapped=True)
        self.schema = cache_schema()
        self._kept: pa.Table | None = None
        # What stored() found for reuse(): the stored table, and the last run of each
        # source's key, each run's first row and length (_outcome_runs).
        self._stored: pa.Table | None = None
        self._runs: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self._stored_rows = 0
        self._fresh: list[pa.Table] = []
        self._pending: list[dict[str, Any]] = []
        self._changed = False
        # The listing of OUT/audio reuse was given, the row of it naming each kept row's
        # file, and the mode of each fresh clip: the snapshot's digest of OUT/audio is
        # taken from them (file_stats).
        self._listing: pa.Table | None = None
        self._kept_listed_at = np.zeros(0, dtype=np.int64)
        self._fresh_modes: dict[str, int] = {}
        # Clips of another inode hashed by reuse, and how many held their recorded bytes
        # (whose new inode the table then records: ``_restat``).
        self.rechecked = (0, 0)
        self._restat = False

    def stored(self, keys: pa.Array) -> list[int]:
        """Load the stored outcomes and find the last one of each source (``keys``:
        :func:`source_keys`, one per ingest row); return the indices of the sources with
        none. Those are conditioned whatever :meth:`reuse` finds of the others' clip
        files, so the stage starts their work before it lists OUT/audio: the check
        that needs no listing comes first."""
        table = self.table.load()
        if table is None or not len(keys):
            return list(range(len(keys)))
        self._stored = table
        self._stored_rows = table.num_rows
        self._runs = _outcome_runs(table.column("cache_key"), keys)
        return np.flatnonzero(self._runs[0] < 0).tolist()

    def reuse(self, *, listing: pa.Table,
              base: Path) -> tuple[pa.Table, list[int], dict[int, list[dict[str, Any]]]]:
        """The clip rows (the audio manifest's columns) of every source whose outcome
        :meth:`stored` found, with its clip files intact (as ``listing``,
        :func:`file_listing` of OUT/audio, finds them, or of another inode but the
        recorded bytes: :meth:`_recheck`, the paths relative to ``base``), in their
        stored order and chunks (no copy when every stored row is kept); the indices of
        the sources found whose files are not intact (conditioned again, as those with
        no outcome); and the cached rejects by source index. Columnar: Python touches
        only the rejects and the rechecked clips."""
        self._listing = listing
        table, self._stored = self._stored, None
        if table is None or self._runs is None:
            self._changed = True
            return _manifest_columns(self.schema.empty_table()), [], {}
        run, first, lengths = self._runs
        intact, listed_at, moved = _intact(table, listing)
        if moved.any():
            table = self._recheck(table, intact, moved, listed_at, runs=(run[run >= 0], first, lengths),
                                  base=base)
        run_intact = np.logical_and.reduceat(intact, first) if len(first) else np.zeros(0, dtype=bool)
        reused = np.flatnonzero((run >= 0) & run_intact[np.maximum(run, 0)])
        runs = run[reused]
        ends = np.cumsum(lengths[runs])
        kept = np.repeat(first[runs] - ends + lengths[runs], lengths[runs]) + np.arange(ends[-1] if len(ends) else 0)
        source_of = np.repeat(reused, lengths[runs])
        # The kept rows in their stored order (the manifest is sorted by clip_id whatever
        # the order its rows come in): when every stored row is kept, as in a rebuild
        # that only adds sources, the table is handed on without a copy.
        order = np.argsort(kept, kind="stable")
        kept, source_of = kept[order], source_of[order]
        whole = len(kept) == table.num_rows and bool(np.all(kept == np.arange(len(kept))))
        self._kept = table if whole else table.take(pa.array(kept, pa.int64()))
        self._kept_listed_at = listed_at if whole else listed_at[kept]
        # Fresh outcomes may have been recorded already (_flush set _changed).
        self._changed |= self._kept.num_rows != table.num_rows or self.table.has_parts or self._restat
        rejected = np.asarray(self._kept.column("reject_reason").is_valid(), dtype=bool)
        rejects_at: dict[int, list[dict[str, Any]]] = {}
        for position in np.flatnonzero(rejected).tolist():
            rejects_at.setdefault(int(source_of[position]), []).append(_reject_row(self._kept, position))
        clips = _manifest_columns(self._kept.filter(pa.array(~rejected)) if rejected.any() else self._kept)
        stale = run >= 0
        stale[reused] = False
        return clips, np.flatnonzero(stale).tolist(), rejects_at

    def unnamed(self) -> pa.Array:
        """The paths of the listing :meth:`reuse` was given that no kept row names: the
        clip files of OUT/audio no reused outcome holds (this run's fresh clips among
        them when they were written before the listing)."""
        if self._listing is None:
            return pa.array([], pa.string())
        named = np.zeros(self._listing.num_rows, dtype=bool)
        named[self._kept_listed_at[self._kept_listed_at >= 0]] = True
        return self._listing.column("path").filter(pa.array(~named)).combine_chunks()

    def _recheck(self, table: pa.Table, intact: np.ndarray, moved: np.ndarray, listed_at: np.ndarray, *,
                 runs: tuple[np.ndarray, np.ndarray, np.ndarray], base: Path) -> pa.Table:
        """Hash the clip files ``moved`` marks (recorded size and mtime, another inode) of
        the outcomes this run wants (``runs``: the wanted runs, each run's first row and
        length) whose other rows are intact; mark in ``intact`` those holding the bytes
        recorded for them, and return ``table`` with their new inodes."""
        wanted, first, lengths = runs
        run_of = np.repeat(np.arange(len(first)), lengths)
        candidate = np.zeros(len(first), dtype=bool)
        candidate[wanted] = True
        if len(first):
            candidate &= np.logical_and.reduceat(intact | moved, first)
        rows = np.flatnonzero(moved & candidate[run_of])
        at = pa.array(rows, pa.int64())
        held = same_bytes(table.column("audio_path").take(at).to_pylist(),
                          table.column("audio_sha256").take(at).to_pylist(), base=base)
        confirmed = rows[held]
        self.rechecked = (len(rows), len(confirmed))
        if not len(confirmed):
            return table
        intact[confirmed] = True
        self._restat = True
        mask = np.zeros(table.num_rows, dtype=bool)
        mask[confirmed] = True
        inodes = np.zeros(table.num_rows, dtype=np.uint64)
        assert self._listing is not None  # reuse set it
        inodes[confirmed] = self._listing.column("st_ino").to_numpy()[listed_at[confirmed]]
        column = pc.if_else(pa.array(mask), pa.array(inodes, pa.uint64()), table.column("st_ino"))
        return table.set_column(table.schema.get_field_index("st_ino"), "st_ino", column)

    def _fresh_rows(self) -> int:
        return sum(part.num_rows for part in self._fresh)

    def file_stats(self) -> pa.Table:
        """The stat of this run's clips, one row per clip path (the columns of
        ``pipeline.core.outputs_record.SCHEMA``, and ``st_mode``): the reused ones as the
        listing confirmed them, the fresh ones as written (for the stage's record of what
        it wrote and the snapshot's digest of OUT/audio, without a second ``stat`` per
        clip). In Arrow: no Python work per reused clip."""
        self._flush()
        kept = self._kept if self._kept is not None else self.schema.empty_table()
        clips = np.asarray(kept.column("reject_reason").is_null(), dtype=bool)
        if not clips.all():
            kept = kept.filter(pa.array(clips))
        # Kept clips exist only after reuse, which was given the listing and found each
        # kept clip's file in it.
        kept_modes = (self._listing.column("st_mode").combine_chunks().take(pa.array(self._kept_listed_at[clips]))
                      if self._listing is not None and kept.num_rows else pa.nulls(kept.num_rows, pa.int64()))
        fresh = pa.concat_tables(self._fresh) if self._fresh else self.schema.empty_table()
        fresh = fresh.filter(fresh.column("reject_reason").is_null())
        modes = [self._fresh_modes.get(path) for path in fresh.column("audio_path").to_pylist()]
        return pa.table({
            "path": pa.chunked_array([kept.column("audio_path").combine_chunks(),
                                      fresh.column("audio_path").combine_chunks()]),
            **{c: pa.chunked_array([kept.column(c).combine_chunks(), fresh.column(c).combine_chunks()])
               for c in ("st_size", "st_mtime_ns", "st_ino")},
            "st_mode": pa.chunked_array([kept_modes, pa.array(modes, pa.int64())], pa.int64()),
        })

    def add(self, key: str, rows: list[dict[str, Any]], rejects: list[dict[str, Any]],
            written: dict[str, list[int]]) -> None:
        """Record one fresh outcome (a part is written every ``PART_ROWS`` rows)."""
        for row in rows:
            size, mtime_ns, inode, mode = written[row["audio_path"]]
            self._fresh_modes[row["audio_path"]] = mode
            self._pending.append({**row, "cache_key": key, "st_size": size, "st_mtime_ns": mtime_ns, "st_ino": inode})
        for r in rejects:
            self._pending.append({"source_path": r["source_path"], "clip_id": r["clip_id"], "cache_key": key,
                                  "reject_reason": r["reason"], "reject_detail": r["detail"],
                                  "reject_stage": r["stage"]})
        if len(self._pending) >= PART_ROWS:
            self._flush()

    def _flush(self) -> None:
        if not self._pending:
            return
        with pandas_left_unloaded():
            part = pa.Table.from_pylist(self._pending, schema=self.schema)
        self._pending = []
        self._fresh.append(part)
        self.table.append(part)
        self._changed = True

    def save(self) -> None:
        """Replace the stored outcomes by this run's: the reused and the fresh ones.

        When every stored outcome was reused, the stored table and its parts (this run's
        fresh outcomes among them) already hold exactly those: they stay, until the parts
        hold ``PARTS_SHARE`` of the rows and are folded into one table."""
        self._flush()
        if not self._changed:
            return
        every_one_reused = self._kept is not None and self._kept.num_rows == self._stored_rows
        # Rechecked clips' new inodes are in the kept rows only: the table is rewritten.
        if every_one_reused and not self._restat and self.table.part_rows <= PARTS_SHARE * (self._stored_rows + self._fresh_rows()):
            return
        tables = ([self._kept] if self._kept is not None else []) + self._fresh
        self.table.save(pa.concat_tables(tables) if tables else self.schema.empty_table())


def _manifest_columns(table: pa.Table) -> pa.Table:
    """The audio manifest's columns of cached rows ``table``, of the manifest's types
    (as ``ManifestBuilder.extend_table`` takes them): no copy of the values."""
    schema = arrow_schema("audio")
    return pa.Table.from_arrays([table.column(f.name).cast(f.type) for f in schema], schema=schema)


def _reject_row(table: pa.Table, j: int) -> dict[str, Any]:
    """Cached row ``j`` of ``table``, a reject, as a reject row."""
    row = {c: table.column(c)[j].as_py()
           for c in ("source_path", "clip_id", "reject_reason", "reject_detail", "reject_stage")}
    return reject(row["reject_stage"], row["source_path"], row["reject_reason"], row["reject_detail"], row["clip_id"])
