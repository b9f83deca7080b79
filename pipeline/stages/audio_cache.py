"""The audio stage's per-source cache, as one columnar table.

Each source's outcome (its clip rows, the stat of each clip file it wrote, and its
rejects) is stored under a key that hashes everything the outcome depends on: the
source's content hash, the audio section of the config, the stage's code version, and
the ingest fields copied into the rows. The outcomes of the last run are one Parquet
table (``OUT/cache/audio/outcomes.parquet``, see ``pipeline.core.cache.TableCache``):
one row per clip or reject, so reusing 100,000 sources reads one file and hands the
reused clip rows to the manifest as Arrow columns, with one ``stat`` per clip to make
sure the file is still the one written.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pyarrow as pa

from pipeline.core.cache import TableCache, cache_key
from pipeline.core.manifest import ManifestBuilder, arrow_schema
from pipeline.core.stage import reject
from pipeline.core.startup import pandas_left_unloaded

# Fresh outcomes are written in parts of this many rows, so an interrupted run keeps
# most of its work (the clips of the rows not yet written are orphans, removed next run).
PART_ROWS = 2048
_EXTRA = (("cache_key", pa.string()), ("reject_reason", pa.string()), ("reject_detail", pa.string()),
          ("reject_stage", pa.string()), ("st_size", pa.int64()), ("st_mtime_ns", pa.int64()),
          ("st_ino", pa.uint64()))


def cache_schema() -> pa.Schema:
    """The audio manifest's columns, all nullable (a reject row has none of them but
    its source_path and clip_id), then the key, the reject and the clip file's stat."""
    fields = [pa.field(f.name, f.type, nullable=True) for f in arrow_schema("audio")]
    return pa.schema([*fields, *(pa.field(name, kind) for name, kind in _EXTRA)])


def source_keys(ingest: pa.Table, *, section: dict[str, Any], code: str,
                long: Mapping[str, tuple[str, str]] | None = None) -> list[str]:
    """One cache key per ingest row: its content hash and the fields copied into its
    rows (source_id, source_path, speaker, whether it has a transcript), under the
    audio section and code version; for a source in ``long`` (source_id -> transcript,
    voice: a long transcribed source the alignment cuts) also its transcript and voice."""
    # The constant part is hashed once; each row adds its own fields.
    prefix = cache_key("audio", section, code)
    long = long or {}
    columns = [ingest.column(c).to_pylist() for c in ("sha256", "source_id", "source_path", "speaker")]
    transcribed = ingest.column("transcript").is_valid().to_pylist()
    return [hashlib.sha256("\0".join((prefix, *fields, "1" if t else "0", *long.get(fields[1], ()))).encode()).hexdigest()
            for *fields, t in zip(*columns, transcribed, strict=True)]


class OutcomeCache:
    """Reuse and record the audio stage's outcomes (see the module docstring)."""

    def __init__(self, root: Path, *, section: dict[str, Any], code: str, enabled: bool) -> None:
        self.table = TableCache(root, "audio", "outcomes", scope=cache_key("audio-outcomes", section, code),
                                enabled=enabled)
        self.schema = cache_schema()
        self._kept: pa.Table | None = None
        self._fresh: list[pa.Table] = []
        self._pending: list[dict[str, Any]] = []
        self._changed = False

    def reuse(self, keys: list[str], *, out: Path, builder: ManifestBuilder) -> tuple[list[int], dict[int, list[dict[str, Any]]]]:
        """Put the clip rows of every source whose outcome is cached, with its clip files
        intact, into ``builder``; return the indices of the other sources and the
        cached rejects by source index."""
        table = self.table.load()
        if table is None:
            self._changed = True
            return list(range(len(keys))), {}
        rows_of = _rows_by_key(table.column("cache_key").to_pylist())
        reasons = table.column("reject_reason").to_pylist()
        intact = _ClipCheck(table, out)
        todo: list[int] = []
        rejects_at: dict[int, list[dict[str, Any]]] = {}
        kept: list[int] = []
        for i, key in enumerate(keys):
            rows = rows_of.get(key)
            if rows is None or not all(reasons[j] is not None or intact(j) for j in rows):
                todo.append(i)
                continue
            kept.extend(rows)
            found = [intact.reject(j) for j in rows if reasons[j] is not None]
            if found:
                rejects_at[i] = found
        with pandas_left_unloaded():
            self._kept = table.take(pa.array(kept, pa.int64()))
        self._changed = self._kept.num_rows != table.num_rows or self.table.has_parts
        clips = self._kept.filter(self._kept.column("reject_reason").is_null())
        builder.extend_table(clips)
        return todo, rejects_at

    def add(self, key: str, rows: list[dict[str, Any]], rejects: list[dict[str, Any]],
            written: dict[str, list[int]]) -> None:
        """Record one fresh outcome (a part is written every ``PART_ROWS`` rows)."""
        for row in rows:
            size, mtime_ns, inode = written[row["audio_path"]]
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
        """Replace the stored outcomes by this run's: the reused and the fresh ones."""
        self._flush()
        if not self._changed:
            return
        tables = ([self._kept] if self._kept is not None else []) + self._fresh
        self.table.save(pa.concat_tables(tables) if tables else self.schema.empty_table())


def _rows_by_key(keys: list[str]) -> dict[str, list[int]]:
    """Row indices by key. One outcome's rows are written together; a key met again
    after other keys is a newer outcome of the same source (a part written after an
    interrupted run's), which replaces the older."""
    rows_of: dict[str, list[int]] = {}
    previous = None
    for j, key in enumerate(keys):
        if key == previous:
            rows_of[key].append(j)
        else:
            rows_of[key] = [j]
        previous = key
    return rows_of


class _ClipCheck:
    """Whether a cached clip row's file is still the one written (size, mtime, inode);
    and a cached reject row as a reject."""

    def __init__(self, table: pa.Table, out: Path) -> None:
        self.root = os.fspath(out)
        self.table = table
        self.paths = table.column("audio_path").to_pylist()
        self.stats = list(zip(*(table.column(c).to_pylist() for c in ("st_size", "st_mtime_ns", "st_ino")),
                              strict=True))

    def __call__(self, j: int) -> bool:
        try:
            st = os.stat(os.path.join(self.root, self.paths[j]))
        except (OSError, TypeError):
            return False
        return (st.st_size, st.st_mtime_ns, st.st_ino) == self.stats[j]

    def reject(self, j: int) -> dict[str, Any]:
        row = {c: self.table.column(c)[j].as_py()
               for c in ("source_path", "clip_id", "reject_reason", "reject_detail", "reject_stage")}
        return reject(row["reject_stage"], row["source_path"], row["reject_reason"], row["reject_detail"],
                      row["clip_id"])
