"""Parquet manifests and their JSON Schemas.

Each manifest has a schema ``schemas/<name>.schema.json`` describing one row. The
Arrow schema of the file (column names, order and types) is derived from it, and
every row is checked against its rules.

Row checks are vectorised with pyarrow.compute for the keywords our schemas use
(type, null, enum, minimum/maximum, pattern, minLength, items, minItems): calling a
jsonschema validator on each of 100,000 rows takes tens of seconds, while the
columnar check takes milliseconds. The compiled jsonschema validator still gives
the wording of every reported failure, and ``exhaustive=True`` runs it on every
row (the tests assert both paths agree).
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from pipeline.core.errors import ManifestError
from pipeline.core.fsio import write_bytes_atomic
from pipeline.core.schemas_io import load_schema, row_validator
from pipeline.core.startup import pandas_left_unloaded

_SCALAR_TYPES = {
    "string": pa.string(),
    "integer": pa.int64(),
    "number": pa.float64(),
    "boolean": pa.bool_(),
}
# Keywords the columnar checker understands; a schema using any other keyword on a
# column is refused so the fast path can never silently skip a rule.
_KNOWN_KEYWORDS = {
    "type", "enum", "minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum",
    "pattern", "minLength", "items", "minItems", "description", "uniqueItems",
}
SHOWN_FAILURES = 5


@dataclass(frozen=True)
class Problem:
    """One finding about a manifest: where, what was found, what was expected."""

    severity: str  # "error" or "warning"
    check: str
    file: str
    row: int | None
    column: str | None
    found: str
    expected: str

    def __str__(self) -> str:
        where = self.file
        if self.row is not None:
            where += f": row {self.row}"
        if self.column:
            where += f", column '{self.column}'"
        return f"{where}: found {self.found}; expected {self.expected}"

    def to_json(self) -> dict[str, Any]:
        return asdict(self)


def _types(prop: dict[str, Any]) -> tuple[str, bool]:
    kind = prop.get("type")
    kinds = [kind] if isinstance(kind, str) else list(kind or [])
    nullable = "null" in kinds
    concrete = [k for k in kinds if k != "null"]
    if len(concrete) != 1:
        raise ValueError(f"column schema needs exactly one non-null type, got {kind!r}")
    return concrete[0], nullable


def _arrow_type(prop: dict[str, Any]) -> pa.DataType:
    kind, _ = _types(prop)
    if kind == "array":
        return pa.list_(_arrow_type(prop["items"]))
    return _SCALAR_TYPES[kind]


@functools.cache
def arrow_schema(name: str) -> pa.Schema:
    """The Arrow schema for manifest ``name``: one field per property, in order."""
    schema = load_schema(name)
    fields = []
    for column, prop in schema["properties"].items():
        unknown = set(prop) - _KNOWN_KEYWORDS
        if unknown:
            raise ValueError(f"schemas/{name}.schema.json: column {column!r} uses {sorted(unknown)}")
        fields.append(pa.field(column, _arrow_type(prop), nullable=_types(prop)[1]))
    return pa.schema(fields)


def table_from_rows(name: str, rows: list[dict[str, Any]]) -> pa.Table:
    """Build a manifest table from row dicts (missing keys become nulls)."""
    schema = arrow_schema(name)
    columns = {f.name: [row.get(f.name) for row in rows] for f in schema}
    with pandas_left_unloaded():
        return pa.table(columns, schema=schema)


def table_from_columns(name: str, columns: dict[str, Any]) -> pa.Table:
    """Build a manifest table from whole columns (lists or arrays)."""
    schema = arrow_schema(name)
    missing = [f.name for f in schema if f.name not in columns]
    if missing:
        raise ManifestError(f"manifest '{name}': columns missing: {', '.join(missing)}")
    with pandas_left_unloaded():
        return pa.table({f.name: columns[f.name] for f in schema}, schema=schema)


class ManifestBuilder:
    """Rows in, one manifest table out, held as Arrow record batches rather than rows.

    A stage appends its rows as they come (from workers or the cache, in any order);
    every ``batch_rows`` rows the pending values become an Arrow record batch, so a
    corpus of a million clips is never a million Python dicts in memory, only compact
    columns and at most one batch of pending rows. ``table(sort_by=...)`` gives the
    rows in key order whatever the order they arrived in, as one chunk per column, so
    the Parquet bytes depend only on the rows.

    Examples
    --------
    >>> b = ManifestBuilder("rejected", batch_rows=2)
    >>> for path in ("b.wav", "a.wav", "c.wav"):
    ...     b.append({"source_path": path, "reason": "empty", "detail": path + ": empty",
    ...               "stage": "ingest", "clip_id": None})
    >>> b.table(sort_by="source_path").column("source_path").to_pylist()
    ['a.wav', 'b.wav', 'c.wav']
    """

    def __init__(self, name: str, *, batch_rows: int = 8192) -> None:
        if batch_rows < 1:
            raise ValueError(f"batch_rows={batch_rows} must be at least 1")
        self.name = name
        self.schema = arrow_schema(name)
        self.batch_rows = batch_rows
        self._pending: dict[str, list[Any]] = {f.name: [] for f in self.schema}
        self._count = 0
        self._batches: list[pa.RecordBatch] = []

    def __len__(self) -> int:
        return sum(b.num_rows for b in self._batches) + self._count

    @property
    def pending_rows(self) -> int:
        """Rows not yet turned into a record batch (at most ``batch_rows``)."""
        return self._count

    def append(self, row: dict[str, Any]) -> None:
        """Add one row (missing keys become nulls, as in :func:`table_from_rows`)."""
        for column, values in self._pending.items():
            values.append(row.get(column))
        self._count += 1
        if self._count >= self.batch_rows:
            self._flush()

    def extend(self, rows: Iterable[dict[str, Any]]) -> None:
        for row in rows:
            self.append(row)

    def extend_table(self, table: pa.Table) -> None:
        """Add the rows of an Arrow table holding (at least) this manifest's columns,
        such as rows reused from a columnar cache: no Python value per cell."""
        self._flush()
        columns = [table.column(f.name).cast(f.type) for f in self.schema]
        for batch in pa.Table.from_arrays(columns, schema=self.schema).to_batches():
            self._batches.append(batch)

    def _flush(self) -> None:
        if not self._count:
            return
        with pandas_left_unloaded():
            arrays = [pa.array(self._pending[f.name], type=f.type) for f in self.schema]
        self._batches.append(pa.RecordBatch.from_arrays(arrays, schema=self.schema))
        for values in self._pending.values():
            values.clear()
        self._count = 0

    def table(self, *, sort_by: str | None = None) -> pa.Table:
        """Every row appended so far, sorted by ``sort_by`` (ascending) when given.

        The builder is left empty: its batches move into the table, so the unsorted
        copy is freed as soon as the sorted one exists.
        """
        self._flush()
        table = pa.Table.from_batches(self._batches, schema=self.schema)
        self._batches = []
        if sort_by is not None:
            table = table.sort_by(sort_by)
        return table.combine_chunks()


def empty_table(name: str) -> pa.Table:
    return arrow_schema(name).empty_table()


def _rule_mask(values: pa.ChunkedArray | pa.Array, prop: dict[str, Any]) -> pa.Array:
    """Boolean array: True where a non-null value breaks one of the column's rules."""
    bad = pa.array(np.zeros(len(values), dtype=bool))
    if "enum" in prop:
        allowed = [v for v in prop["enum"] if v is not None]
        bad = pc.or_(bad, pc.invert(pc.is_in(values, value_set=pa.array(allowed, values.type))))
    for key, op in (
        ("minimum", pc.less),
        ("maximum", pc.greater),
        ("exclusiveMinimum", pc.less_equal),
        ("exclusiveMaximum", pc.greater_equal),
    ):
        if key in prop:
            bad = pc.or_(bad, op(values, prop[key]))
    if "pattern" in prop:
        bad = pc.or_(bad, pc.invert(pc.match_substring_regex(values, prop["pattern"])))
    if "minLength" in prop:
        bad = pc.or_(bad, pc.less(pc.utf8_length(values), prop["minLength"]))
    if "minItems" in prop:
        bad = pc.or_(bad, pc.less(pc.list_value_length(values), prop["minItems"]))
    if "items" in prop and pa.types.is_list(values.type):
        flat = pc.list_flatten(values)
        parents = pc.list_parent_indices(values)
        item_bad = _rule_mask(flat, prop["items"])
        if not _types(prop["items"])[1]:
            item_bad = pc.or_(item_bad, pc.is_null(flat))
        item_bad = pc.fill_null(item_bad, False)
        if pc.any(item_bad).as_py():
            extra = np.zeros(len(values), dtype=bool)
            extra[np.asarray(pc.filter(parents, item_bad), dtype=np.int64)] = True
            bad = pc.or_(bad, pa.array(extra))
    # Nulls are judged by the column's type alone (checked by the caller).
    return pc.and_(pc.fill_null(bad, False), pc.is_valid(values))


def _describe_jsonschema_error(error: Any) -> tuple[str, str]:
    found = json.dumps(error.instance, ensure_ascii=False, default=str)
    if len(found) > 80:
        found = found[:77] + "..."
    return f"{found} ({error.validator}: {json.dumps(error.validator_value, ensure_ascii=False)})", error.message


def check_table(name: str, table: pa.Table, *, where: str, exhaustive: bool = False) -> list[Problem]:
    """All schema problems of ``table`` against manifest schema ``name``.

    Column names and types are compared with the derived Arrow schema; row rules are
    checked column by column. At most ``SHOWN_FAILURES`` failing rows are described
    per column, each with the jsonschema wording of the rule it breaks.
    """
    with pandas_left_unloaded():
        return _check_table(name, table, where=where, exhaustive=exhaustive)


def _structure_problems(name: str, table: pa.Table, *, where: str) -> list[Problem]:
    """Columns missing, undeclared or of the wrong Arrow type."""
    expected = arrow_schema(name)
    problems: list[Problem] = []
    names = set(table.column_names)
    for f in expected:
        if f.name not in names:
            problems.append(Problem("error", "schema", where, None, f.name, "no such column", f"a column of type {f.type}"))
        elif not table.schema.field(f.name).type.equals(f.type):
            problems.append(Problem("error", "schema", where, None, f.name,
                                    f"type {table.schema.field(f.name).type}", f"type {f.type}"))
    for extra in sorted(names - {f.name for f in expected}):
        problems.append(Problem("error", "schema", where, None, extra, "an undeclared column",
                                f"only the columns of schemas/{name}.schema.json"))
    return problems


def _failing_rows(name: str, table: pa.Table, *, exhaustive: bool = False) -> dict[str, list[int]]:
    """Column -> indices of the rows breaking that column's rules (structure checked;
    a column ``table`` leaves out, as :func:`read_checked` may, is not checked)."""
    schema = load_schema(name)
    if set(table.column_names) != set(schema["properties"]):
        schema = {**schema, "properties": {c: p for c, p in schema["properties"].items() if c in table.column_names}}
    if exhaustive:
        validator = row_validator(name)
        return {
            column: [i for i, row in enumerate(table.to_pylist())
                     if any(e.absolute_path and e.absolute_path[0] == column for e in validator.iter_errors(row))]
            for column in schema["properties"]
        }
    expected = arrow_schema(name)
    failing = {}
    for column, prop in schema["properties"].items():
        values = table.column(column).combine_chunks() if table.num_rows else pa.array([], expected.field(column).type)
        bad = _rule_mask(values, prop)
        if not _types(prop)[1]:
            bad = pc.or_(bad, pc.is_null(values))
        failing[column] = pc.indices_nonzero(bad).to_pylist() if pc.any(bad).as_py() else []
    return failing


def _row_error(name: str, row: dict[str, Any], column: str) -> tuple[str, str]:
    """(found, expected) in jsonschema's words for the first rule ``row`` breaks in ``column``."""
    # Compiled only when a row fails: a clean table never needs jsonschema's wording.
    validator = row_validator(name)
    errors = [e for e in validator.iter_errors(row) if e.absolute_path and e.absolute_path[0] == column]
    if errors:
        return _describe_jsonschema_error(errors[0])
    return repr(row[column]), "agreement between the columnar and row checkers"  # pragma: no cover


def _check_table(name: str, table: pa.Table, *, where: str, exhaustive: bool) -> list[Problem]:
    problems = _structure_problems(name, table, where=where)
    if problems:
        return problems
    return _value_problems(name, table, where=where, exhaustive=exhaustive)


def _value_problems(name: str, table: pa.Table, *, where: str, exhaustive: bool = False) -> list[Problem]:
    """The rows of ``table`` (structure checked) that break a rule of their column."""
    problems: list[Problem] = []
    for column, rows in _failing_rows(name, table, exhaustive=exhaustive).items():
        for i in rows[:SHOWN_FAILURES]:
            found, expected_text = _row_error(name, table.slice(i, 1).to_pylist()[0], column)
            problems.append(Problem("error", "schema", where, i, column, found, expected_text))
        if len(rows) > SHOWN_FAILURES:
            problems.append(Problem("error", "schema", where, None, column,
                                    f"{len(rows) - SHOWN_FAILURES} more failing rows", "no failures"))
    return problems


@dataclass(frozen=True)
class InvalidRow:
    """A row set aside because its values break the schema: the row and what it breaks."""

    row: dict[str, Any]
    detail: str


def partition_rows(name: str, table: pa.Table, *, where: str) -> tuple[pa.Table, list[InvalidRow]]:
    """Split ``table`` into the rows that meet schema ``name`` and those that do not.

    A value that breaks a rule in a few rows (a loudness beyond the maximum, a string
    a pattern refuses) comes from those rows' inputs: they are returned, with the
    jsonschema wording of every rule they break, for the caller to reject, and the
    rest is kept. A table whose columns are missing, undeclared or of the wrong Arrow
    type, or whose rules are broken by most of its rows (more than half, and at least
    two), points at the code that built it, and raises ManifestError instead.

    Parameters
    ----------
    name : the manifest schema (``schemas/<name>.schema.json``).
    table : the rows to check.
    where : the file the table is for, named in the error.

    Returns
    -------
    The valid rows (``table`` itself when all are valid) and the invalid ones.

    Examples
    --------
    >>> rows = [{"source_path": p, "reason": "empty", "detail": d, "stage": "ingest", "clip_id": None}
    ...         for p, d in (("a.wav", "a.wav: empty"), ("b.wav", ""), ("c.wav", "c.wav: empty"))]
    >>> kept, invalid = partition_rows("rejected", table_from_rows("rejected", rows), where="r.parquet")
    >>> kept.num_rows, invalid[0].row["source_path"]
    (2, 'b.wav')
    >>> print(invalid[0].detail)
    column 'detail': found "" (minLength: 1)
    """
    with pandas_left_unloaded():
        problems = _structure_problems(name, table, where=where)
        if problems:
            raise ManifestError(f"manifest {where} breaks schemas/{name}.schema.json in its structure:\n  "
                                + "\n  ".join(str(p) for p in problems))
        failing = _failing_rows(name, table)
        bad = sorted({i for rows in failing.values() for i in rows})
        if not bad:
            return table, []
        if len(bad) >= 2 and 2 * len(bad) > table.num_rows:
            validate_table(name, table, where=f"{where} ({len(bad)} of {table.num_rows} rows failing: "
                           "a rule most rows break points at the code, not at the inputs)")
        invalid = []
        for i in bad:
            row = table.slice(i, 1).to_pylist()[0]
            words = [f"column '{column}': found {_row_error(name, row, column)[0]}"
                     for column, rows in failing.items() if i in rows]
            invalid.append(InvalidRow(row, "; ".join(words)))
        keep = [True] * table.num_rows
        for i in bad:
            keep[i] = False
        return table.filter(pa.array(keep, pa.bool_())), invalid


def validate_table(name: str, table: pa.Table, *, where: str) -> None:
    """Raise ManifestError listing the first failures when ``table`` breaks its schema."""
    problems = check_table(name, table, where=where)
    if problems:
        lines = "\n  ".join(str(p) for p in problems[: 2 * SHOWN_FAILURES])
        raise ManifestError(f"manifest {where} breaks schemas/{name}.schema.json:\n  {lines}")


@dataclass(frozen=True)
class Written:
    """A manifest as :func:`write_manifest` left it: the hex SHA-256 of its bytes and
    the ``stat`` of the file holding them (``st_size``, ``st_mtime_ns``, ``st_ino``)."""

    sha256: str
    stat: os.stat_result


def write_manifest(path: str | Path, name: str, table: pa.Table, *, metadata: dict[str, str],
                   checked: bool = False) -> Written:
    """Validate, then write ``table`` atomically with key-value metadata; what was written.

    ``checked``: the caller has just checked this very table against schema ``name``
    (:func:`partition_rows` found no failing row), so the check is not repeated (it
    cost 0.05 CPU seconds per 100,000 clips of the audio manifest).

    The Parquet bytes are made in memory, hashed there and written by
    ``fsio.write_bytes_atomic`` (flushed to disk before the rename; a file already
    holding them is left alone): the caller gets their hash without reading the file
    back (the 32 MB audio manifest of 100,000 sources), and the stat of the very file
    written.
    """
    if not checked:
        validate_table(name, table, where=str(path))
    meta = {b"loam.schema": name.encode()}
    meta.update({f"loam.{k}".encode(): str(v).encode() for k, v in sorted(metadata.items())})
    table = table.replace_schema_metadata(meta)
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd", write_statistics=True)
    # Unsigned bytes: a view of signed ones would never compare equal to a file's bytes.
    data = memoryview(sink.getvalue()).cast("B")
    return Written(hashlib.sha256(data).hexdigest(), write_bytes_atomic(path, data))


def read_manifest(path: str | Path) -> pa.Table:
    """Read a manifest written by ``write_manifest`` (or by hand).

    ``ParquetFile.read`` rather than ``pq.read_table``: the latter goes through
    pyarrow.dataset, whose import brings pandas (0.73 s against 0.005 s for the first
    read of a small manifest in a fresh process, on a loaded two-core machine).
    """
    try:
        table = pq.ParquetFile(path).read()
    except (OSError, pa.ArrowException) as exc:
        raise ManifestError(f"{path}: not a readable Parquet file: {exc}") from exc
    # The read's working buffers (the pages, 0.8 GB beside a 0.4 GB table for the audio
    # stage's 233,161 clips) stay with Arrow's allocator once freed: hand them back.
    pa.default_memory_pool().release_unused()
    return table


def read_metadata(path: str | Path) -> dict[str, str]:
    """The ``loam.*`` key-value metadata of a manifest, without the prefix."""
    raw = pq.read_schema(path).metadata or {}
    return {k.decode()[5:]: v.decode() for k, v in raw.items() if k.startswith(b"loam.")}


def _checked_by_type_alone(prop: dict[str, Any]) -> bool:
    """A scalar column whose schema sets no rule beyond its type (and nullability)."""
    return set(prop) <= {"type", "description"} and _types(prop)[0] != "array"


def _nulls_recorded(metadata: pq.FileMetaData, column: str) -> int | None:
    """Nulls in top-level scalar ``column`` by the file's column statistics, or None
    when a row group did not record them."""
    nulls = 0
    for g in range(metadata.num_row_groups):
        group = metadata.row_group(g)
        chunk = next((group.column(j) for j in range(group.num_columns)
                      if group.column(j).path_in_schema == column), None)
        stats = chunk.statistics if chunk is not None else None
        if stats is None or not stats.has_null_count:
            return None
        nulls += stats.null_count
    return nulls


def read_checked(path: str | Path, name: str, *, where: str,
                 keep: Iterable[str] = ()) -> tuple[pa.Table, list[Problem]]:
    """Read a manifest and check it against schema ``name``, as :func:`check_table`
    does, without reading the columns whose check the file's own metadata settles.

    The column names and types come from the Parquet schema. A column whose schema sets
    no rule beyond its type needs no values read: nullable, there is nothing more to
    check; non-null, the null counts its column statistics record (``write_manifest``
    writes them) settle it, and it is read only when a row group lacks them. Such
    columns are left out of the returned table: ``stages/audio.parquet`` spends most of
    its bytes on ``fingerprint`` (4.4 of 4.5 s reading 245,725 rows), which nothing
    that validates it needs to see.

    Parameters
    ----------
    path : str or Path
        The Parquet file.
    name : str
        Its schema (``schemas/<name>.schema.json``).
    where : str
        The file as findings name it.
    keep : iterable of str
        Columns the caller needs, read in any case.

    Returns
    -------
    tuple of (pa.Table, list of Problem)
        The columns read (every column when the structure is off), and the problems
        :func:`check_table` would find. ManifestError when the file is not readable
        Parquet.

    Examples
    --------
    >>> import tempfile
    >>> rows = [{"source_path": "a.wav", "reason": "empty", "detail": "a.wav: empty", "stage": "ingest",
    ...          "clip_id": None}]
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     _ = write_manifest(Path(tmp, "r.parquet"), "rejected", table_from_rows("rejected", rows), metadata={})
    ...     table, problems = read_checked(Path(tmp, "r.parquet"), "rejected", where="r.parquet")
    >>> table.num_rows, problems
    (1, [])
    """
    try:
        file = pq.ParquetFile(path)
        schema = file.schema_arrow
    except (OSError, pa.ArrowException) as exc:
        raise ManifestError(f"{path}: not a readable Parquet file: {exc}") from exc
    with pandas_left_unloaded():
        structure = _structure_problems(name, schema.empty_table(), where=where)
    if structure:
        return read_manifest(path), structure
    props = load_schema(name)["properties"]
    settled = [column for column, prop in props.items() if column not in set(keep) and _checked_by_type_alone(prop)
               and (_types(prop)[1] or _nulls_recorded(file.metadata, column) == 0)]
    try:
        table = file.read(columns=[c for c in schema.names if c not in settled])
    except (OSError, pa.ArrowException) as exc:
        raise ManifestError(f"{path}: not a readable Parquet file: {exc}") from exc
    with pandas_left_unloaded():
        return table, _value_problems(name, table, where=where)
