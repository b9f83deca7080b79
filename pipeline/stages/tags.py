"""Each transcribed file's language tag: ``text.language``, or the cell of the metadata
table's column ``ingest.metadata_language_column`` (an empty cell means ``text.language``).

Kept apart from :mod:`pipeline.stages.languages` so that the audio stage, which needs only
the tag (to pick the voice that aligns a long transcript), does not import the text tools.
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path
from typing import Any

from pipeline.core.config import Config
from pipeline.core.stage import StageContext

__all__ = ["LANGUAGE_TAG", "canonical_tag", "file_languages", "language_cells", "metadata_table"]

# A language cell that is a BCP-47 tag in form (any case).
LANGUAGE_TAG = re.compile(r"^[A-Za-z]{2,3}(-[A-Za-z0-9]{1,8})*$")


def canonical_tag(tag: str) -> str:
    """BCP-47 case conventions: language lower, script title, region upper (``en-us`` -> ``en-US``).

    Examples
    --------
    >>> canonical_tag("EN-us"), canonical_tag("sr-latn"), canonical_tag("sw")
    ('en-US', 'sr-Latn', 'sw')
    """
    parts = tag.strip().split("-")
    out = [parts[0].lower()]
    for part in parts[1:]:
        out.append(part.title() if len(part) == 4 else part.upper() if len(part) == 2 else part.lower())
    return "-".join(out)


def metadata_table(config: Config, raw: Path) -> Path | None:
    """The metadata table whose language column sets per-file languages, if configured."""
    ingest = config.ingest
    if ingest.metadata and ingest.metadata_language_column:
        return raw / ingest.metadata
    return None


def _language_cells(path: Path, column: str, *, encoding: str) -> dict[int, str]:
    """Line number (as ingest's ``metadata_line``) -> the column's cell, for every row."""
    data = path.read_bytes()
    if data.startswith(b"\xef\xbb\xbf"):
        data, encoding = data[3:], "utf-8"
    text = data.decode(encoding, "surrogateescape")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter="\t" if path.name.lower().endswith(".tsv") else ",")
    header = [h.strip() for h in next(reader, [])]
    if column not in header:
        return {}
    index = header.index(column)
    cells: dict[int, str] = {}
    while True:
        line = reader.line_num + 1
        try:
            fields = next(reader)
        except StopIteration:
            break
        except csv.Error:
            continue  # ingest rejected that row already
        if index < len(fields):
            cells[line] = fields[index].strip()
    return cells


def file_languages(ctx: StageContext, rows: list[dict[str, Any]]) -> dict[str, str]:
    """source_id -> the raw language cell or ``text.language`` (not yet checked)."""
    import pyarrow as pa

    table = pa.table({"metadata_line": pa.array([r.get("metadata_line") for r in rows], pa.int64()),
                      "transcript_origin": pa.array([r.get("transcript_origin") for r in rows], pa.string())})
    return dict(zip([r["source_id"] for r in rows], language_cells(ctx, table).to_pylist(), strict=True))


def language_cells(ctx: StageContext, rows: Any) -> Any:
    """Per row of the table ``rows`` (its ``metadata_line`` and ``transcript_origin``): the
    raw language cell of the metadata table row it took its transcript from, or
    ``text.language`` for none or an empty one (not yet checked); a pyarrow string array.
    Columnar: a rebuild reading 33,000 transcripts looks none of them up in Python."""
    import pyarrow as pa
    import pyarrow.compute as pc

    default = ctx.config.text.language
    table = metadata_table(ctx.config, ctx.raw)
    cells: dict[int, str] = {}
    if table is not None:
        cells = _language_cells(table, ctx.config.ingest.metadata_language_column,
                                encoding=ctx.config.ingest.transcript_encoding)
    if not cells:
        return pa.array([default] * rows.num_rows, pa.string())
    lines = rows.column("metadata_line").combine_chunks().cast(pa.int64())
    at = pc.index_in(lines, value_set=pa.array(list(cells), pa.int64()))
    cell = pa.array(list(cells.values()), pa.string()).take(at)
    from_metadata = pc.fill_null(pc.equal(rows.column("transcript_origin").combine_chunks(), "metadata"), False)
    cell = pc.fill_null(pc.if_else(from_metadata, cell, None), "")
    return pc.if_else(pc.equal(cell, ""), default, cell)
