"""The ingest rows cache: each audio file's row from the last run, reused when nothing it
depends on has changed (``OUT/cache/ingest/rows.arrow``).

A file's ingest row is a function of its path, its content hash, its metadata table rows,
the sidecar paired with it and what that sidecar holds, the speaker rule and the ingest
settings, and of whether an earlier file holds the same bytes. The table keeps, for every
file whose last fate was a row and no reject, that row with those inputs: the hash, the
rows (as written by ``repr``), the sidecar's path and its size, modification time and
inode (the test the sidecar cache already trusts). Its scope holds the stage's code
version, the ingest section and the speaker rule. A file is reused when every input is
the one recorded and it is the first file of its content; the test is made in Arrow, so
an unchanged file costs no Python of its own. Anything else (a new or changed file, a
duplicate, a file with rejects) follows the full path, whose result is the same as the
cache's: the cache changes how fast a row is found, never which row.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.cache import TableCache, cache_key
from pipeline.core.codeversion import code_version
from pipeline.core.stage import StageContext
from pipeline.core.startup import pandas_left_unloaded

NAME = "ingest"
# The row's own fields (the probe's columns come from the probe cache), then its inputs.
ROW_FIELDS = (("source_id", "string"), ("speaker", "string"), ("transcript", "string"),
              ("transcript_origin", "string"), ("metadata_line", "int64"))
KEY_FIELDS = (("path", "string"), ("sha256", "string"), ("metadata", "string"), ("sidecar", "string"),
              ("sidecar_size", "int64"), ("sidecar_mtime_ns", "int64"), ("sidecar_ino", "uint64"))


def schema() -> pa.Schema:
    return pa.schema([(name, getattr(pa, kind)()) for name, kind in (*KEY_FIELDS, *ROW_FIELDS)])


def rows_cache(ctx: StageContext, *, rule: tuple[str | None, str]) -> TableCache:
    """The cache for this run's code, ingest settings and speaker rule ``(constant, origin)``;
    disabled with pseudonyms (the rows are rewritten after the fact)."""
    code = code_version(NAME, cache_dir=ctx.cache_dir if ctx.use_cache else None)
    scope = cache_key("rows", code, ctx.config.section("ingest"), *rule)
    return TableCache(ctx.cache_dir, NAME, "rows", scope=scope,
                      enabled=ctx.use_cache and not ctx.config.privacy.pseudonymise, mapped=True)


def key_columns(paths: Sequence[str] | pa.Array, sha256: pa.ChunkedArray, metadata: Sequence[str | None] | None,
                sidecars: pa.Array, sidecar_at: np.ndarray,
                sidecar_stat: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]) -> dict[str, Any]:
    """Each file's inputs as Arrow arrays (``paths`` given as a list or as Arrow strings):
    ``metadata`` (None: no file has rows), its sidecar (Arrow strings), and that sidecar's stat,
    ``sidecar_stat[k][sidecar_at[i]]`` (-1: no sidecar; a sidecar not stat'ed, a link,
    has none)."""
    size, mtime, inode, statted = sidecar_stat
    at = np.maximum(sidecar_at, 0)
    missing = (sidecar_at < 0) | ~(statted[at] if len(statted) else np.zeros(len(at), dtype=bool))
    n = len(paths)
    with pandas_left_unloaded():
        def stat_column(values: np.ndarray, kind: pa.DataType) -> pa.Array:
            taken = values[at] if len(values) else np.zeros(n, dtype=values.dtype)
            return pa.array(taken, kind, mask=missing)

        return {"path": paths if isinstance(paths, pa.Array) else pa.array(paths, pa.string()), "sha256": sha256.cast(pa.string()).combine_chunks(),
                "metadata": pa.nulls(n, pa.string()) if metadata is None else pa.array(metadata, pa.string()),
                "sidecar": sidecars, "sidecar_size": stat_column(size, pa.int64()),
                "sidecar_mtime_ns": stat_column(mtime, pa.int64()), "sidecar_ino": stat_column(inode, pa.uint64())}


def first_of_content(sha256: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """Per file, the index of the first file (in order) with the same hash; -1 for a file
    without one (its probe failed). A file with ``first[i] == i`` is no duplicate.

    Examples
    --------
    >>> first_of_content(pa.chunked_array([["a", None, "b", "a"]])).tolist()
    [0, -1, 2, 0]
    """
    with pandas_left_unloaded():
        # Arrow numbers the distinct values in the order they first appear, so the files
        # where a code first appears are where it exceeds every earlier code (no sort).
        whole = sha256.combine_chunks() if isinstance(sha256, pa.ChunkedArray) else sha256
        codes = np.asarray(pc.dictionary_encode(whole).indices.fill_null(-1), dtype=np.int64)
    if not len(codes):
        return np.full(0, -1, dtype=np.int64)
    before = np.maximum.accumulate(np.concatenate([[-1], codes[:-1]]))
    first_by_code = np.flatnonzero(codes > before)
    return np.where(codes >= 0, first_by_code[np.maximum(codes, 0)] if len(first_by_code) else -1, -1)


def _same(now: pa.Array, then: pa.Array) -> np.ndarray:
    """Element-wise equality where two nulls are equal."""
    equal = pc.fill_null(pc.equal(now, then), False)
    both_null = pc.and_(pc.is_null(now), pc.is_null(then))
    return np.asarray(pc.or_(equal, both_null), dtype=bool)


def _statless_sidecar(keys: dict[str, Any]) -> np.ndarray:
    """Files whose sidecar has no stat (a link, read again every run): never reused."""
    return np.asarray(pc.and_(pc.is_valid(keys["sidecar"]), pc.is_null(keys["sidecar_size"])), dtype=bool)


def reusable(previous: pa.Table | None, keys: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """Per file: the row of ``previous`` recorded last for its path (a part written later
    wins over the table), and whether every input recorded there is the file's now (a
    hash is never null when it matches)."""
    n = len(keys["path"])
    if previous is None or not previous.num_rows or not n:
        return np.zeros(n, dtype=np.int64), np.zeros(n, dtype=bool)
    last = previous.num_rows - 1
    with pandas_left_unloaded():
        # index_in finds a value's first row: look the paths up in the table reversed.
        reversed_paths = previous.column("path").take(pa.array(np.arange(last, -1, -1))).combine_chunks()
        found = pc.index_in(keys["path"], value_set=reversed_paths)
        hit = np.asarray(pc.is_valid(found), dtype=bool)
        row = last - np.asarray(found.fill_null(last), dtype=np.int64)
        then = previous.select([name for name, _ in KEY_FIELDS[1:]]).take(pa.array(row))
        hit &= np.asarray(pc.fill_null(pc.equal(keys["sha256"], then.column("sha256").combine_chunks()), False),
                          dtype=bool)
        for name, _ in KEY_FIELDS[2:]:
            hit &= _same(keys[name], then.column(name).combine_chunks())
    return row, hit & ~_statless_sidecar(keys)


def fresh_table(rows: list[dict[str, Any]]) -> pa.Table:
    """The own fields of ``rows`` (ingest rows as dicts) as a table."""
    with pandas_left_unloaded():
        return pa.table({name: pa.array([r[name] for r in rows], getattr(pa, kind)()) for name, kind in ROW_FIELDS})


def save(cache: TableCache, keys: dict[str, Any], own: pa.Table, kept: np.ndarray, clean: np.ndarray, *,
         append: bool = False) -> None:
    """Record the rows of the files ``clean`` marks (a fate that was a row and no reject):
    ``own`` holds the kept files' own fields (row for row with ``kept``, their indices
    among the files). ``append`` adds them as a part instead of rewriting the table."""
    take = np.flatnonzero((clean & ~_statless_sidecar(keys))[kept])
    with pandas_left_unloaded():
        at = pa.array(kept[take])
        columns = {name: keys[name].take(at) for name, _ in KEY_FIELDS}
        columns.update({name: own.column(name).take(pa.array(take)) for name, _ in ROW_FIELDS})
        table = pa.table(columns, schema=schema())
    if append:
        cache.append(table)
    else:
        cache.save(table)
