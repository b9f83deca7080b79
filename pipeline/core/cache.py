"""Caches of per-file results under ``OUT/cache/<namespace>/``.

Keys are SHA-256 digests of everything a result depends on (source content hash,
stage parameters, stage code version), so a hit can be reused without asking
whether anything changed, and a changed input simply misses.

- :func:`cache_key`: a SHA-256 key of any JSON-able parts;
- :class:`TableCache`: one Parquet table per namespace holding every result of the
  last run, valid for one ``scope`` (the stage's code version and parameters). A
  stage reads it once and looks results up in memory, where one small JSON file per
  source (the earlier layout) cost an open and a parse per source.
"""

from __future__ import annotations

import contextlib
import hashlib
from pathlib import Path
from typing import Any

from pipeline.core.config import canonical_json
from pipeline.core.fsio import atomic_output, sha256_file, write_text_atomic

# Parts a table may gather before a run folds them into it (TableCache.compaction_due).
MAX_PARTS = 16


def cache_key(*parts: Any) -> str:
    return hashlib.sha256(canonical_json(list(parts))).hexdigest()


class TableCache:
    """Per-file results as one Parquet table, ``OUT/cache/<namespace>/<name>.parquet``.

    The table records the ``scope`` it was written under (a digest of the code
    version and parameters its rows depend on) in its metadata; :meth:`load` leaves
    out a file of another scope, a damaged one, and everything when the cache is
    disabled, and the stage computes those results again. The stage decides which
    rows it keeps: it saves the results of the run (reused and fresh), so the table
    holds the last run's sources and never grows with history.

    While a run goes on, :meth:`append` writes its fresh results as parts beside the
    table (``<name>.part-*.parquet``) every so many results, so an interrupted run
    loses at most the results since the last part; :meth:`load` reads the table and
    its parts, in the order written, and :meth:`save` replaces all of them by one table.

    With ``mapped``, the files are Arrow IPC (``<name>.arrow``) read by mapping them into
    memory: a table a rebuild reuses whole costs no decoding, only a check of its bytes.

    Examples
    --------
    >>> import tempfile, pyarrow as pa
    >>> folder = tempfile.mkdtemp()
    >>> cache = TableCache(Path(folder), "ingest", "probes", scope="v1")
    >>> cache.save(pa.table({"path": ["a.wav"], "frames": [16000]}))
    >>> cache.load().to_pylist()
    [{'path': 'a.wav', 'frames': 16000}]
    >>> cache.append(pa.table({"path": ["b.wav"], "frames": [8000]}))
    >>> cache.load().column("path").to_pylist()
    ['a.wav', 'b.wav']
    >>> TableCache(Path(folder), "ingest", "probes", scope="v2").load() is None
    True
    >>> mapped = TableCache(Path(folder), "audio", "outcomes", scope="v1", mapped=True)
    >>> (Path(folder) / "audio").mkdir()
    >>> _ = (Path(folder) / "audio" / "outcomes.parquet").write_bytes(b"an older layout")
    >>> mapped.save(pa.table({"path": ["a.wav"], "frames": [16000]}))
    >>> mapped.path.name, mapped.load().to_pylist()
    ('outcomes.arrow', [{'path': 'a.wav', 'frames': 16000}])
    >>> sorted(p.name for p in (Path(folder) / "audio").iterdir())
    ['outcomes.arrow', 'outcomes.arrow.sha256']
    >>> import shutil; shutil.rmtree(folder)
    """

    def __init__(self, root: Path, namespace: str, name: str, *, scope: str, enabled: bool = True,
                 mapped: bool = False) -> None:
        # mapped: Arrow IPC files, memory-mapped when read, instead of Parquet: no decoding
        # at all when the table is loaded (0.19 to 0.26 CPU s for the audio stage's 100,000
        # outcomes in Parquet), twice the bytes on disk (73 MB against 37 MB there).
        self.mapped = mapped
        self.path = Path(root) / namespace / f"{name}.{'arrow' if mapped else 'parquet'}"
        self.scope = scope
        self.enabled = enabled
        # Whether the last load found parts, which a save would fold into the table, how
        # many, and how many rows the parts hold (those of this run's appends included).
        self.has_parts = False
        self.parts = 0
        self.part_rows = 0

    def _files(self) -> list[Path]:
        """The table, then its parts in the order they were written."""
        parts = sorted(self.path.parent.glob(f"{self.path.stem}.part-*{self.path.suffix}"))
        return [self.path, *parts]

    def load(self) -> Any | None:
        """The rows saved under this scope (table and parts, without metadata), or None."""
        if not self.enabled:
            return None
        import pyarrow as pa

        files = self._files()
        self.has_parts = len(files) > 1
        self.parts = len(files) - 1
        read = [(path, self._read(path)) for path in files]
        tables = [t for _, t in read if t is not None]
        self.part_rows = sum(t.num_rows for path, t in read if t is not None and path != self.path)
        if not tables:
            return None
        try:
            return pa.concat_tables(tables)
        except pa.ArrowInvalid:  # a part of another layout (an older loam): use the table alone
            return tables[0]

    def _read(self, path: Path) -> Any | None:
        import pyarrow.parquet as pq

        try:
            # Not read_table for Parquet: see manifest.read_manifest.
            table = _read_mapped(path) if self.mapped else pq.ParquetFile(path).read()
        except (OSError, ValueError, TypeError):
            # Missing, or damaged (pyarrow's errors derive from these): only a miss.
            return None
        if table is None:  # a mapped file whose bytes are not the ones written
            return None
        meta = table.schema.metadata or {}
        if meta.get(b"loam_cache_scope") != self.scope.encode():
            return None
        return table.replace_schema_metadata(None)

    def _write(self, path: Path, table: Any) -> None:
        import pyarrow.feather as feather
        import pyarrow.parquet as pq

        table = table.replace_schema_metadata({"loam_cache_scope": self.scope})
        with atomic_output(path, durable=False) as tmp:
            if self.mapped:
                feather.write_feather(table, tmp, compression="uncompressed")
            else:
                pq.write_table(table, tmp, compression="zstd")
        if self.mapped:
            # Written after the table: a run stopped between the two leaves a mismatch, a miss.
            write_text_atomic(_digest_path(path), f"{sha256_file(path)}\n{_stat_line(path)}\n")

    def append(self, table: Any) -> None:
        """Write ``table`` as one more part (a run's fresh results so far)."""
        if self.enabled and table.num_rows:
            parts = len(self._files()) - 1
            self._write(self.path.with_name(f"{self.path.stem}.part-{parts:06d}{self.path.suffix}"), table)
            self.part_rows += table.num_rows

    def compaction_due(self, *, stored: int, used: int) -> bool:
        """Whether a run that used ``used`` of the ``stored`` rows it loaded should
        rewrite the table (:meth:`save`) rather than add its fresh rows as a part: when
        nothing was stored, when parts have piled up, or when more than an eighth of
        the stored rows are no longer used (files gone or changed). Between two
        rewrites a run writes only what it computed, so a rebuild's cost does not grow
        with what it reused; the rows it no longer uses stay until the next rewrite,
        and a later part's row for a key wins over an earlier one.

        Examples
        --------
        >>> cache = TableCache(Path("/nonexistent"), "ingest", "probes", scope="v1")
        >>> cache.compaction_due(stored=1000, used=990), cache.compaction_due(stored=1000, used=800)
        (False, True)
        """
        return stored == 0 or self.parts >= MAX_PARTS or (stored - used) * 8 > stored

    def save(self, table: Any) -> None:
        """Replace the stored table and its parts by ``table`` (atomically; no fsync:
        a damaged or torn file is only a miss)."""
        if not self.enabled:
            return
        parts = self._files()[1:]
        if self.mapped:  # the Parquet table and parts an older Loam left: never read again
            parts += sorted(self.path.parent.glob(f"{self.path.stem}.parquet"))
            parts += sorted(self.path.parent.glob(f"{self.path.stem}.part-*.parquet"))
        self._write(self.path, table)
        for part in parts:
            with contextlib.suppress(OSError):
                part.unlink()
            with contextlib.suppress(OSError):
                _digest_path(part).unlink()


def _digest_path(path: Path) -> Path:
    """Where the SHA-256 of a mapped table file is kept: ``<file>.sha256`` beside it."""
    return path.with_name(path.name + ".sha256")


def _stat_line(path: Path) -> str:
    """The size, modification time (ns) and inode of the file at ``path``, as one line."""
    st = path.stat()
    return f"{st.st_size} {st.st_mtime_ns} {st.st_ino}"


def _read_mapped(path: Path) -> Any | None:
    """The Arrow IPC file at ``path``, mapped into memory, when its bytes have the SHA-256
    recorded beside it; else None.

    Parquet decodes (and so checks) every page it reads; a mapped file is used as it is,
    so a damaged byte would reach the outcomes unseen, and damaged offsets would read
    out of bounds. Arrow's full validation catches the offsets. The bytes are the ones
    whose digest was recorded while the file has the size, modification time and inode
    recorded with it: the cache is written by renames only, so a file written again is
    another inode; the runner trusts its manifests' recorded digests and the audio stage
    its clip files on the same terms. Otherwise they are hashed, from the very mapping the
    table is read from (64 ms for the audio stage's 77 MB at 100,000 sources, 0.1 s of
    a rebuild with the ingest stage's tables; an older cache records no stat).
    """
    import hashlib

    import pyarrow as pa

    recorded = _digest_path(path).read_text(encoding="utf-8").split("\n")
    data = pa.memory_map(str(path)).read_buffer()  # the buffer keeps the mapping open
    if not (len(recorded) > 1 and recorded[1] == _stat_line(path)) and \
            hashlib.sha256(data).hexdigest() != recorded[0].strip():
        return None
    table = pa.ipc.open_file(data).read_all()
    table.validate(full=True)
    return table
