"""Transcript sources for ingest: sidecar files, the metadata table, and pairing them.

A transcript problem costs only the transcript. A sidecar that does not decode, cannot
be read or is empty, and transcripts that disagree, are set aside with a reject row
(naming the file, the problem and the fix) while their audio goes on as untranscribed
audio; a fixed transcript is picked up by the next run.

Text is decoded with ``ingest.transcript_encoding``; a file that starts with the UTF-8
byte-order mark is read as UTF-8 whatever that says (the mark declares the encoding,
Unicode Standard, section 23.8, "Specials"; cited from memory).
"""

from __future__ import annotations

import csv
import io
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.core.errors import ConfigError, DataError
from pipeline.core.stage import reject
from pipeline.stages.paths import check_relative_path, is_inside

# Transcript problems are found while ingesting, so ingest sets them aside.
REJECTING_STAGE = "ingest"
UTF8_BOM = b"\xef\xbb\xbf"
# Characters of a transcript shown in a reject sentence.
SHOWN_CHARS = 60


def decode_text(data: bytes, *, encoding: str) -> tuple[str | None, int | None]:
    """Text of ``data``, or ``(None, offset)`` of the first byte that does not decode.

    Parameters
    ----------
    data : bytes
        The file's bytes.
    encoding : str
        A text encoding Python knows; a leading UTF-8 byte-order mark overrides it.

    Returns
    -------
    tuple of (str or None, int or None)
        The text and None, or None and the byte offset (from the start of ``data``).

    Examples
    --------
    >>> decode_text("café".encode("latin-1"), encoding="utf-8")
    (None, 3)
    >>> decode_text("café".encode("latin-1"), encoding="latin-1")
    ('café', None)
    >>> decode_text(UTF8_BOM + "café".encode("utf-8"), encoding="cp1252")
    ('café', None)
    """
    if data.startswith(UTF8_BOM):
        data, encoding, skipped = data[len(UTF8_BOM):], "utf-8", len(UTF8_BOM)
    else:
        skipped = 0
    try:
        return data.decode(encoding), None
    except UnicodeError as exc:
        return None, skipped + int(getattr(exc, "start", 0))


def _shown(text: str) -> str:
    return repr(text if len(text) <= SHOWN_CHARS else text[: SHOWN_CHARS - 3] + "...")


def encoding_problem(data: bytes, offset: int, *, encoding: str) -> str:
    """'byte 17 (0xe9, after 'Le caf') is not valid utf-8', for a reject sentence."""
    before = data[:offset].decode(encoding, "replace").lstrip("\ufeff")[-24:]
    after = f", after {before!r}" if before else ""
    return f"byte {offset} (0x{data[offset]:02x}{after}) is not valid {encoding}"


def encoding_fix(encoding: str, what: str) -> str:
    return (f"save {what} as {encoding}, or set ingest.transcript_encoding to the encoding it was written in "
            '(for example "cp1252" for Windows Western European text), then run again')


@dataclass
class MetadataRow:
    line: int
    path: str
    transcript: str
    speaker: str | None
    # Why the transcript cannot be used (it did not decode), or None.
    transcript_problem: str | None = None


def _field_problem(value: str, *, encoding: str) -> str | None:
    """For a field decoded with surrogateescape: which byte of it did not decode."""
    index = next((i for i, ch in enumerate(value) if "\udc80" <= ch <= "\udcff"), None)
    if index is None:
        return None
    bad = ord(value[index]) - 0xDC00
    try:  # the codec's own prefix (a UTF-16 byte-order mark) is not part of the field
        offset = len(value[:index].encode(encoding, "surrogateescape")) - len("".encode(encoding))
        where = f"byte {offset} of the field"
    except UnicodeError:
        where = "a byte"
    shown = value[:index][-24:]
    after = f", after {shown!r}" if shown else ""
    return f"{where} (0x{bad:02x}{after}) is not valid {encoding}"


def _decode_table(data: bytes, table_rel: str, *, encoding: str) -> tuple[str, str]:
    """The table's text and the encoding it was read with (UTF-8 after a byte-order mark)."""
    if data.startswith(UTF8_BOM):
        data, encoding = data[len(UTF8_BOM):], "utf-8"
    try:
        # surrogateescape keeps undecodable bytes visible per row instead of failing the file.
        return data.decode(encoding, "surrogateescape"), encoding
    except UnicodeError as exc:
        start = int(getattr(exc, "start", 0))
        raise DataError(f"{table_rel}: byte {start} is not valid {encoding}, and the table cannot be read row "
                        f"by row; {encoding_fix(encoding, 'the table')}") from exc


def _header(reader: Any, table_rel: str, required: dict[str, str], origin: Callable[[str], str]) -> list[str]:
    """The header's column names; every required column (config key -> name) must be there."""
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise DataError(f"{table_rel}: the metadata table is empty; expected a header line naming its columns "
                        f"({', '.join(repr(c) for c in required.values())})") from None
    except csv.Error as exc:
        raise DataError(f"{table_rel}: line 1: the header does not parse ({exc})") from exc
    missing = [(key, name) for key, name in required.items() if name not in header]
    if missing:
        asked = "; ".join(f"column {name!r} (ingest.{key}, from {origin('ingest.' + key)})" for key, name in missing)
        raise ConfigError(
            f"{table_rel}: line 1: the header has no {asked}; the columns present are "
            f"{', '.join(repr(h) for h in header)}. Name the table's columns in [ingest] of the config "
            "(or with --set ingest.KEY=NAME)")
    return header


def read_metadata_table(
    raw: Path, table_rel: str, *, path_column: str, transcript_column: str, speaker_column: str,
    need_speaker: bool, encoding: str = "utf-8", origin: Callable[[str], str] | None = None,
) -> tuple[list[MetadataRow], list[dict[str, Any]]]:
    """Parse a CSV/TSV table; rows that fail are returned as rejects with their line.

    A table the config names wrongly (outside RAW, missing, or without a column the
    config asks for) is a configuration error; one that cannot be parsed at all is a
    data error. A transcript field that does not decode keeps its row (path and
    speaker still count) with ``transcript_problem`` set. ``origin(dotted key)`` says
    where a config value came from, for messages.
    """
    origin = origin or (lambda key: "the config")
    path, problem = check_relative_path(raw, table_rel)
    if problem or path is None:
        raise ConfigError(f"{origin('ingest.metadata')}: key 'ingest.metadata' has value {table_rel!r}: {problem}")
    try:
        data = (raw / path).read_bytes()
    except OSError as exc:
        raise ConfigError(f"{origin('ingest.metadata')}: key 'ingest.metadata' has value {table_rel!r}: cannot "
                          f"read the metadata table ({exc.strerror}); expected a CSV or TSV file inside RAW") from exc
    delimiter = "\t" if table_rel.lower().endswith(".tsv") else ","
    text, encoding = _decode_table(data, table_rel, encoding=encoding)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    required = {"metadata_path_column": path_column, "metadata_transcript_column": transcript_column}
    if need_speaker:
        required["metadata_speaker_column"] = speaker_column
    header = _header(reader, table_rel, required, origin)
    index = {name: header.index(name) for name in (path_column, transcript_column, speaker_column) if name in header}
    rejects: list[dict[str, Any]] = []
    rows: list[MetadataRow] = []
    while True:
        line = reader.line_num + 1
        try:
            fields = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            rejects.append(reject(REJECTING_STAGE, f"{table_rel}:{line}", "metadata_parse_error",
                                  f"{table_rel}: line {line}: the row does not parse as {'TSV' if delimiter == chr(9) else 'CSV'} ({exc})"))
            continue
        row, problem = _row(fields, line, header, index, path_column=path_column, transcript_column=transcript_column,
                            speaker_column=speaker_column, need_speaker=need_speaker, encoding=encoding)
        if problem:
            rejects.append(reject(REJECTING_STAGE, f"{table_rel}:{line}", "metadata_parse_error", f"{table_rel}: line {line}: {problem}"))
        elif row is not None:
            rows.append(row)
    return rows, rejects


def _row(fields: list[str], line: int, header: list[str], index: dict[str, int], *, path_column: str,
         transcript_column: str, speaker_column: str, need_speaker: bool,
         encoding: str) -> tuple[MetadataRow | None, str | None]:
    """One parsed row, or the sentence saying why it cannot be used (None, None: blank)."""
    if not fields or all(not f.strip() for f in fields):
        return None, None
    if len(fields) != len(header):
        return None, f"found {len(fields)} fields; expected {len(header)} as in the header"
    # Only the columns Loam reads matter; a path or speaker that does not decode cannot
    # name a file or a person, so the row goes (its audio, if any, is still found).
    for column in (path_column, speaker_column if need_speaker else None):
        if column is not None and (problem := _field_problem(fields[index[column]], encoding=encoding)):
            return None, f"column {column!r}: {problem}; {encoding_fix(encoding, 'the table')}"
    speaker = fields[index[speaker_column]].strip() if speaker_column in index else None
    text = fields[index[transcript_column]]
    problem = _field_problem(text, encoding=encoding)
    return MetadataRow(line, fields[index[path_column]], "" if problem else text, speaker or None,
                       transcript_problem=problem), None


def read_sidecar(raw: Path, rel: str, *, encoding: str,
                 link: bool | None = None) -> tuple[str | None, tuple[str, str, str] | None]:
    """The stripped text of the sidecar ``RAW/rel``, or (None, (reason, problem sentence, fix)).

    ``rel`` is a path ``ingest.scan`` found: its folders are real folders of RAW (the
    walk follows no link), so only the file itself can be a link leading out, and only
    then is the path resolved (two resolves per sidecar cost more than reading it).
    ``link`` says whether it is a link, as the scan saw it; None looks.
    """
    path = raw / rel
    if (os.path.islink(path) if link is None else link) and not is_inside(path, folder=raw):
        return None, ("path_outside_root", f"{rel}: a symbolic link to a file outside the raw folder; not opened",
                      "put the transcript itself in the raw folder")
    try:
        data = path.read_bytes()
    except OSError as exc:
        return None, ("transcript_unreadable", f"{rel}: cannot read the transcript file ({exc.strerror})",
                      "make it readable (check its permissions), then run again")
    text, offset = decode_text(data, encoding=encoding)
    if text is None or offset is not None:
        used = "utf-8" if data.startswith(UTF8_BOM) else encoding  # the mark wins
        return None, ("transcript_encoding", f"{rel}: {encoding_problem(data, offset or 0, encoding=used)}",
                      encoding_fix(used, "the file"))
    if not text.strip():
        return None, ("empty_transcript", f"{rel}: the transcript file is empty",
                      "write the transcript into it, or delete it if the audio has none")
    return text.strip(), None


def collapse_rows(rows: Sequence[MetadataRow], rel: str, table_rel: str) -> tuple[list[MetadataRow], list[dict[str, Any]]]:
    """Rows naming one audio file with the same transcript and speaker collapse into the
    first; the repeats are rejected. Rows whose transcript did not decode never match."""
    distinct: dict[str, MetadataRow] = {}
    rejects = []
    for row in rows:
        text = f"\x01{row.line}" if row.transcript_problem else row.transcript.strip()
        key = f"{text}\x00{row.speaker or ''}"
        if key in distinct:
            rejects.append(reject(REJECTING_STAGE, f"{table_rel}:{row.line}", "metadata_duplicate_row",
                                  f"{table_rel}: line {row.line}: repeats line {distinct[key].line} for {rel!r}"))
        else:
            distinct[key] = row
    return list(distinct.values()), rejects


@dataclass(frozen=True)
class _Found:
    text: str
    label: str  # for sentences: "line 4 of meta.csv" or the sidecar's path
    source: str  # the reject's source_path: "meta.csv:4" or the sidecar's path
    where: str  # start of a reject sentence: "meta.csv: line 4" or the sidecar's path
    line: int | None  # the metadata line, None for the sidecar


@dataclass
class Pairing:
    """The transcript an audio file gets, where it came from, the metadata line used,
    and the rejects of every transcript set aside."""

    transcript: str | None = None
    origin: str | None = None
    metadata_line: int | None = None
    rejects: list[dict[str, Any]] = field(default_factory=list)


def pair_transcript(raw: Path, rel: str, rows: Sequence[MetadataRow], sidecar_rel: str | None, *,
                    table_rel: str, transcript_column: str, encoding: str, speaker_from_metadata: bool,
                    sidecar_link: bool | None = None,
                    sidecar_read: tuple[str | None, tuple[str, str, str] | None] | None = None) -> Pairing:
    """One transcript for the audio file ``rel`` from its (collapsed) metadata rows and
    its sidecar. An empty metadata field means no transcript; sources that disagree are
    all set aside. The audio is kept whatever happens to its transcripts.
    ``sidecar_link``: whether the sidecar is a symbolic link (see :func:`read_sidecar`);
    ``sidecar_read``: what :func:`read_sidecar` gave for it, when the caller has it."""
    if not rows and sidecar_rel is None:
        return Pairing()  # what the general case below gives, without its work per file
    if not rows and sidecar_read is not None and sidecar_read[1] is None and sidecar_read[0] is not None:
        return Pairing(sidecar_read[0], "sidecar")
    found: list[_Found] = []
    problems: list[tuple[str, str, str, str]] = []  # (source, reason, sentence, fix)
    set_aside: set[int] = set()  # metadata lines whose transcript is set aside
    for row in rows:
        where = f"{table_rel}: line {row.line}"
        if row.transcript_problem:
            set_aside.add(row.line)
            problems.append((f"{table_rel}:{row.line}", "transcript_encoding",
                             f"{where}: column {transcript_column!r}: {row.transcript_problem}",
                             encoding_fix(encoding, "the table")))
        elif row.transcript.strip():
            found.append(_Found(row.transcript.strip(), f"line {row.line} of {table_rel}", f"{table_rel}:{row.line}",
                                where, row.line))
    if sidecar_rel is not None:
        text, problem = (sidecar_read if sidecar_read is not None
                         else read_sidecar(raw, sidecar_rel, encoding=encoding, link=sidecar_link))
        if problem is not None:
            problems.append((sidecar_rel, *problem))
        elif text is not None:
            found.append(_Found(text, sidecar_rel, sidecar_rel, sidecar_rel, None))
    pairing = Pairing()
    untranscribed = f"{rel!r} is kept as untranscribed audio"
    if len(found) > 1 and len({f.text for f in found}) > 1:
        for f in found:
            others = "; ".join(f"{o.label}: {_shown(o.text)}" for o in found if o is not f)
            pairing.rejects.append(reject(REJECTING_STAGE, f.source, "conflicting_transcripts",
                                          f"{f.where}: transcript {_shown(f.text)} for {rel!r} differs from {others}; "
                                          f"all {len(found)} are set aside and {untranscribed}; correct or delete "
                                          "the wrong ones, then run again"))
        set_aside.update(f.line for f in found if f.line is not None)
        found = []
    elif found:
        pairing.transcript = found[0].text
        pairing.origin = "sidecar" if found[0].line is None else "metadata"
    # Worded only for a problem (most files have none).
    fate = "" if not problems else (f"{rel!r} keeps the transcript from {found[0].label}" if found else untranscribed)
    for source, reason, sentence, fix in problems:
        pairing.rejects.append(reject(REJECTING_STAGE, source, reason, f"{sentence}; the transcript is set aside and {fate}; {fix}"))
    # A row is used when it gave the transcript (or said there is none) or the speaker.
    used = [r.line for r in rows if speaker_from_metadata or r.line not in set_aside]
    pairing.metadata_line = min(used) if used else None
    return pairing
