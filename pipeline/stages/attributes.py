"""Speaker attributes for balancing the held-out parts (``split.balance_table``).

The table is CSV (or TSV, by its ``.tsv`` extension) inside RAW, UTF-8 unless
``ingest.transcript_encoding`` says otherwise, one row per speaker: a speaker column
(``split.balance_speaker_column``) and the attribute columns of
``split.balance_columns`` (gender, age band, dialect, recording device, ...). Its
speaker names are written as in RAW and made into speaker ids as ingest makes them
(and into pseudonyms in a pseudonymised build), so they match the manifests. A
speaker the table does not list, or an empty cell, has the value ``""``, shown as
"(unknown)".
"""

from __future__ import annotations

import csv
import io
from collections.abc import Callable, Sequence
from pathlib import Path

from pipeline.core.errors import ConfigError, DataError
from pipeline.stages.paths import check_relative_path

Attributes = dict[str, dict[str, str]]


def parse_attribute_table(text: str, *, table: str, speaker_column: str, columns: Sequence[str],
                          delimiter: str = ",") -> Attributes:
    """Attributes by speaker name as written, from the table's text.

    Raises ``ConfigError`` when a named column is missing and ``DataError`` naming the
    line for a row that does not parse or repeats a speaker.

    Examples
    --------
    >>> parse_attribute_table("speaker,gender\\nana,f\\nbo,m\\n", table="s.csv", speaker_column="speaker",
    ...                       columns=["gender"])
    {'ana': {'gender': 'f'}, 'bo': {'gender': 'm'}}
    """
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    try:
        header = [h.strip() for h in next(reader)]
    except (StopIteration, csv.Error) as exc:
        raise DataError(f"{table}: line 1: expected a header naming the columns {speaker_column!r} and "
                        f"{', '.join(map(repr, columns))}") from exc
    missing = [c for c in (speaker_column, *columns) if c not in header]
    if missing:
        raise ConfigError(f"{table}: line 1: the header has no column {', '.join(map(repr, missing))} (named by "
                          f"split.balance_speaker_column or split.balance_columns); the columns present are "
                          f"{', '.join(map(repr, header))}")
    out: Attributes = {}
    where = {name: header.index(name) for name in (speaker_column, *columns)}
    while True:
        line = reader.line_num + 1
        try:
            fields = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            raise DataError(f"{table}: line {line}: the row does not parse ({exc})") from exc
        if not any(f.strip() for f in fields):
            continue
        if len(fields) != len(header):
            raise DataError(f"{table}: line {line}: found {len(fields)} fields; expected {len(header)}, one per column")
        speaker = fields[where[speaker_column]].strip()
        if not speaker:
            raise DataError(f"{table}: line {line}: column {speaker_column!r} is empty; expected a speaker")
        if speaker in out:
            raise DataError(f"{table}: line {line}: speaker {speaker!r} appears a second time; expected one row "
                            "per speaker")
        out[speaker] = {c: fields[where[c]].strip() for c in columns}
    return out


def read_attributes(raw: Path, table_rel: str, *, speaker_column: str, columns: Sequence[str],
                    encoding: str, speaker_key: Callable[[str], str]) -> Attributes:
    """The balance table's attributes by speaker id (``speaker_key`` of each name).

    ``ConfigError`` when the table is outside RAW, missing or unreadable.
    """
    rel, problem = check_relative_path(raw, table_rel)
    if problem or rel is None:
        raise ConfigError(f"key 'split.balance_table' has value {table_rel!r}: {problem}")
    try:
        data = (raw / rel).read_bytes()
    except OSError as exc:
        raise ConfigError(f"key 'split.balance_table' has value {table_rel!r}: cannot read it ({exc.strerror}); "
                          "expected a CSV or TSV file inside RAW") from exc
    if data.startswith(b"\xef\xbb\xbf"):
        data, encoding = data[3:], "utf-8"
    try:
        text = data.decode(encoding)
    except UnicodeDecodeError as exc:
        raise DataError(f"{table_rel}: byte {exc.start} is not valid {encoding}; expected text in "
                        "ingest.transcript_encoding") from exc
    delimiter = "\t" if table_rel.lower().endswith(".tsv") else ","
    by_name = parse_attribute_table(text, table=table_rel, speaker_column=speaker_column, columns=columns,
                                    delimiter=delimiter)
    return {speaker_key(name): values for name, values in by_name.items()}
