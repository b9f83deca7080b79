"""The runner's record of the files a stage wrote: one row per file, its path relative
to OUT and its ``stat`` (``st_size``, ``st_mtime_ns``, ``st_ino``; all null when it
could not be stat'ed), as an Arrow IPC file (``names.stage_outputs_record``).

The audio stage of 100,000 sources writes about 135,000 clips: their record as JSON
(the earlier layout, ``cache/stages/<stage>.json``) was 7.9 MB, built, written and
read back per clip in Python. As columns it is written from the stage's own table of
stats and compared in Arrow (:func:`unchanged`); the JSON record an older Loam left is
never read (a missing record is a miss: the stage runs again) and is removed when the
new one is written.
"""

from __future__ import annotations

import contextlib
import os
import posixpath
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.columns import distinct_count
from pipeline.core.fsio import atomic_output

SCHEMA = pa.schema([("path", pa.string()), ("st_size", pa.int64()), ("st_mtime_ns", pa.int64()),
                    ("st_ino", pa.uint64())])
_STATS = ("st_size", "st_mtime_ns", "st_ino")


def stat_table(out: Path, rels: list[str] | pa.Array, known: pa.Table | None = None) -> pa.Table:
    """The record of ``rels`` (paths relative to ``out``), each once, those in ``known``
    first (in the order of ``rels``): a path in ``known`` (a table of :data:`SCHEMA`'s
    columns, one row per path, e.g. the stage's StageResult.file_stats) taken as given
    there, the others stat'ed now. Not sorted: :func:`unchanged` looks paths up (the
    record of a rebuild's 101,000 clips took 0.033 CPU s with two look-ups and a sort
    by path, 0.018 with one look-up, best of 7).

    Examples
    --------
    >>> import tempfile
    >>> out = Path(tempfile.mkdtemp())
    >>> _ = (out / "a.txt").write_bytes(b"abc")
    >>> known = pa.table({"path": ["b.flac"], "st_size": [7], "st_mtime_ns": [1], "st_ino": [2]}, schema=SCHEMA)
    >>> record = stat_table(out, ["gone.txt", "b.flac", "a.txt", "b.flac"], known).to_pydict()
    >>> record["path"], record["st_size"]
    (['b.flac', 'gone.txt', 'a.txt'], [7, None, 3])
    >>> import shutil; shutil.rmtree(out)
    """
    rels = pa.array(rels, pa.string()) if isinstance(rels, list) else rels
    if isinstance(rels, pa.ChunkedArray):
        rels = rels.combine_chunks()
    given = _given_last(rels, known)
    if given is not None:
        return pa.concat_tables([given, _stat_now(out, rels.slice(0, len(rels) - given.num_rows).to_pylist())])
    rels = pc.unique(rels)
    parts = []
    if known is not None and known.num_rows:
        known = known.select(SCHEMA.names).cast(SCHEMA)
        if distinct_count(known.column("path")) == known.num_rows:
            # One look-up of each path among the known ones: their row, or null.
            row = pc.index_in(rels, value_set=known.column("path"))
            parts.append(known.take(row.drop_null()))
            rels = rels.filter(row.is_null())
    parts.append(_stat_now(out, rels.to_pylist()))
    return pa.concat_tables(parts)


def _given_last(rels: pa.Array, known: pa.Table | None) -> pa.Table | None:
    """``known`` (as :data:`SCHEMA`) when its paths are the last of ``rels``, in the same
    order, and no path of ``rels`` is there twice: then the record is ``known`` followed
    by the others stat'ed, as :func:`stat_table` would order it, found with one hash of
    the paths instead of four (the audio stage's 101,000 clips, whose stats it hands
    over in its manifest's order); else None."""
    if known is None or not known.num_rows or len(rels) < known.num_rows:
        return None
    paths = known.column("path").combine_chunks().cast(pa.string())
    if not rels.slice(len(rels) - known.num_rows).equals(paths):
        return None
    if rels.null_count or distinct_count(rels) != len(rels):
        return None
    return known.select(SCHEMA.names).cast(SCHEMA)


def _stat_now(out: Path, rels: list[str]) -> pa.Table:
    """``os.stat`` of each of ``rels`` (few: the manifests, rejects and summary)."""
    root = os.fspath(out)
    columns: dict[str, list[Any]] = {name: [] for name in _STATS}
    for rel in rels:
        try:
            st = os.stat(os.path.join(root, rel))
            values: tuple[Any, ...] = (st.st_size, st.st_mtime_ns, st.st_ino)
        except OSError:
            values = (None, None, None)
        for name, value in zip(_STATS, values, strict=True):
            columns[name].append(value)
    return pa.table({"path": pa.array(rels, pa.string()), **columns}, schema=SCHEMA)


def _stat_listed(out: Path, rels: pa.Array) -> pa.Table:
    """``os.stat`` of each of ``rels``, taken by listing their folders (one ``scandir``
    per folder, and a stat per entry that follows links as ``os.stat`` does): the
    clips of one speaker share a folder. A path not found has null stats."""
    folders = pc.unique(pc.replace_substring_regex(rels, pattern="/?[^/]*$", replacement=""))
    columns: dict[str, list[Any]] = {"path": [], **{name: [] for name in _STATS}}
    for folder in folders.to_pylist():
        where = os.path.join(os.fspath(out), folder)
        with contextlib.suppress(OSError), os.scandir(where) as entries:
            for entry in entries:
                try:
                    st = entry.stat()
                except OSError:
                    continue
                columns["path"].append(posixpath.join(folder, entry.name))
                columns["st_size"].append(st.st_size)
                columns["st_mtime_ns"].append(st.st_mtime_ns)
                columns["st_ino"].append(st.st_ino)
    return pa.table(columns, schema=SCHEMA)


def unchanged(out: Path, record: pa.Table) -> bool:
    """Whether every file of ``record`` still has the stat recorded (a missing one still
    missing), compared in Arrow."""
    listed = _stat_listed(out, record.column("path"))
    index = pc.index_in(record.column("path"), value_set=listed.column("path"))
    for name in _STATS:
        now = listed.column(name).take(index)
        same = pc.equal(now, record.column(name))
        # Equal values, or null on both sides (recorded missing and still not found).
        agree = pc.or_kleene(same, pc.and_(pc.is_null(now), pc.is_null(record.column(name))))
        if not pc.all(pc.fill_null(agree, False)).as_py():
            return False
    return True


def write(path: Path, table: pa.Table) -> None:
    """Write the record atomically (no fsync: a damaged record is only a miss) and drop
    the JSON record of an older Loam beside it."""
    import pyarrow.feather as feather

    with atomic_output(path, durable=False) as tmp:
        feather.write_feather(table.select(SCHEMA.names).cast(SCHEMA), tmp, compression="uncompressed")
    with contextlib.suppress(OSError):
        path.with_suffix(".json").unlink()


def read(path: Path) -> pa.Table | None:
    """The record at ``path``, or None when it is missing, damaged or of another layout."""
    import pyarrow.feather as feather

    try:
        table = feather.read_table(path, memory_map=False)
    except (OSError, ValueError, TypeError):  # pyarrow's errors derive from these
        return None
    return table if table.schema.equals(SCHEMA) else None


def recorded_manifest(out: Path, stage: str, rel: str) -> bytes | None:
    """The bytes of manifest ``rel`` (relative to ``out``) when their SHA-256 is the one
    the runner recorded as it wrote the file for ``stage`` (``names.stage_manifest_facts``:
    per manifest ``[size, mtime_ns, inode, sha256, schema, schema sha256]``), else None.

    Checked by content, not by stat: a copied or moved OUT (new inodes, perhaps new
    mtimes) keeps what the stage wrote usable, and any edit of the file is seen. The
    bytes returned are the very ones hashed, so a caller parsing them reads what was
    checked even if the file changes meanwhile.

    Examples
    --------
    >>> import hashlib, json, tempfile
    >>> out = Path(tempfile.mkdtemp())
    >>> (out / "stages").mkdir(); (out / "cache" / "stages").mkdir(parents=True)
    >>> _ = (out / "stages" / "x.parquet").write_bytes(b"rows")
    >>> fact = [4, 0, 0, hashlib.sha256(b"rows").hexdigest(), "x", ""]
    >>> _ = (out / "cache" / "stages" / "x.manifests.json").write_text(json.dumps({"stages/x.parquet": fact}))
    >>> recorded_manifest(out, "x", "stages/x.parquet")
    b'rows'
    >>> _ = (out / "stages" / "x.parquet").write_bytes(b"rowz")
    >>> recorded_manifest(out, "x", "stages/x.parquet") is None
    True
    >>> import shutil; shutil.rmtree(out)
    """
    import hashlib
    import json

    from pipeline.core.names import stage_manifest_facts

    try:
        facts = json.loads((out / stage_manifest_facts(stage)).read_text(encoding="utf-8"))
        data = (out / rel).read_bytes()
    except (OSError, ValueError):
        return None
    fact = facts.get(rel) if isinstance(facts, dict) else None
    if not (isinstance(fact, list) and len(fact) == 6 and isinstance(fact[3], str)):
        return None
    return data if hashlib.sha256(data).hexdigest() == fact[3] else None
