"""Manifest tables this process has checked against their schema, so none is checked twice.

The split stage checks its subset manifests before its ledger names their clips; the
runner then checks every manifest a stage returns (``Runner._set_aside_invalid_rows``),
the same rules again on the same table: 0.04 s of a rebuild's critical path at 101,000
clips. A table checked here, and still the very object the runner is handed, is not
checked there again. Tables are held by weak reference: a table that is gone is no
longer remembered, so another made later at the same address is never taken for it.
"""

from __future__ import annotations

import weakref

import pyarrow as pa

from pipeline.core.manifest import validate_table

__all__ = ["check", "was_checked"]

# id(table) -> (a weak reference to the table, the schema it met).
_checked: dict[int, tuple[weakref.ref[pa.Table], str]] = {}


def check(name: str, table: pa.Table, *, where: str) -> None:
    """Check ``table`` against schema ``name`` (``manifest.validate_table``: ManifestError
    naming ``where`` when it fails) and remember that it passed.

    Examples
    --------
    >>> rows = pa.table({"source_path": ["a.wav"], "reason": ["empty"], "detail": ["a.wav: empty"],
    ...                  "stage": ["ingest"], "clip_id": pa.array([None], pa.string())})
    >>> was_checked("rejected", rows)
    False
    >>> check("rejected", rows, where="rejected.parquet")
    >>> was_checked("rejected", rows), was_checked("rejected", rows.slice(0)), was_checked("subset", rows)
    (True, False, False)
    """
    validate_table(name, table, where=where)
    key = id(table)
    _checked[key] = (weakref.ref(table, lambda _gone: _checked.pop(key, None)), name)


def was_checked(name: str, table: pa.Table) -> bool:
    """Whether this very table object passed :func:`check` against schema ``name``."""
    held = _checked.get(id(table))
    return held is not None and held[0]() is table and held[1] == name
