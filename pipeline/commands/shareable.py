"""Which files under OUT are safe to share, and the check that a pseudonymised build's
shareable files name nobody.

Private (never share): ``cache/`` (the per-file caches, which key on real paths, and
the private mapping from references back to RAW's names), ``logs/`` (a run's log names
real files) and the run lock. Everything else under OUT is shareable in a pseudonymised
build: manifests, stage manifests, rejects, summaries, the report, the lexicon files, the
ledger and the review decisions beside it (``.jsonl``, read as text), the review page's
spectrogram pictures, the resolved config and the clips.

The check reads RAW's real names (speaker ids, folder names, file stems) from the
private mapping the ingest stage wrote, and looks for each as a whole token (letters and
digits around it do not count, ``_`` and punctuation do) in every shareable file's name
and text: Parquet string cells, JSON, HTML, TSV, Markdown and other text. A name in a
transcript, or in a file built from the transcripts (``lexicon/``), is a warning, as
transcripts are the user's data and stay; anywhere else it is an error.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.core import names
from pipeline.core.errors import UsageError
from pipeline.core.manifest import Problem
from pipeline.stages.privacy import name_pattern, read_mapping, real_names

PRIVATE_TOP = (names.CACHE, names.LOGS, names.LOCK)
TEXT_SUFFIXES = (".json", ".jsonl", ".html", ".tsv", ".md", ".txt", ".csv")
# Columns holding the transcripts or what is derived from them (the user's words).
TRANSCRIPT_COLUMNS = ("transcript", "norm_text", "words", "phones")
TRANSCRIPT_FOLDERS = ("lexicon",)


def is_private(rel: str) -> bool:
    """Whether the OUT-relative path ``rel`` is one of Loam's private files.

    >>> is_private("cache/privacy-mapping.tsv"), is_private("logs/last-run.json"), is_private("manifests/labelled.parquet")
    (True, True, False)
    """
    top = rel.split("/", 1)[0]
    return top in PRIVATE_TOP or top.startswith(".")


def shareable_files(out: Path) -> list[str]:
    """The OUT-relative paths of every shareable file, sorted."""
    found = []
    for path in out.rglob("*"):
        rel = path.relative_to(out).as_posix()
        if path.is_file() and not is_private(rel):
            found.append(rel)
    return sorted(found)


def _parquet_cells(path: Path) -> Iterator[tuple[str, str]]:
    """(column, text) of every string cell and of the file's key-value metadata."""
    pf = pq.ParquetFile(path)
    for k, v in (pf.schema_arrow.metadata or {}).items():
        yield "(metadata)", k.decode("utf-8", "replace") + " " + v.decode("utf-8", "replace")
    table = pf.read()
    for name in table.column_names:
        column = table.column(name)
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            yield name, "\n".join(v for v in column.to_pylist() if v is not None)
        elif pa.types.is_list(column.type) and pa.types.is_string(column.type.value_type):
            yield name, "\n".join(x for v in column.to_pylist() if v for x in v if x is not None)


def _texts(out: Path, rel: str) -> Iterator[tuple[str | None, str]]:
    """(column or None, text) of one shareable file: its name, then what it holds."""
    yield "(file name)", rel
    path = out / rel
    if rel.endswith(".parquet"):
        yield from _parquet_cells(path)
    elif rel.endswith(TEXT_SUFFIXES):
        yield None, path.read_text(encoding="utf-8", errors="replace")


def check_names(out: Path) -> list[Problem]:
    """The problems of a pseudonymised OUT whose shareable files hold a real name; one
    finding per file and column (or file), naming the first name found."""
    mapping_path = out / names.PRIVATE_MAPPING
    if not mapping_path.is_file():
        return [Problem("error", "privacy_names", names.PRIVATE_MAPPING, None, None, "no such file",
                        "the private mapping the ingest stage writes in a pseudonymised build; rerun `loam prepare`")]
    mapping = read_mapping(mapping_path)
    pattern = name_pattern(real_names(mapping["speaker"], mapping["source"]))
    if pattern is None:
        return []
    problems = []
    for rel in shareable_files(out):
        for column, text in _texts(out, rel):
            hit = pattern.search(text)
            if hit is None:
                continue
            from_words = column in TRANSCRIPT_COLUMNS or rel.split("/", 1)[0] in TRANSCRIPT_FOLDERS
            problems.append(Problem(
                "warning" if from_words else "error", "privacy_names", rel, None, column,
                f"the real name {hit.group(0)!r} from RAW",
                "no speaker id, folder name or file stem of RAW in a shareable file"
                + (" (it is in the transcripts: check they may name this person)" if from_words else "")))
    return problems


def share_note(*, pseudonymised: bool, names_found: int = 0) -> str:
    """A sentence saying which files under OUT are safe to share and which are not.

    ``names_found`` counts the ``privacy_names`` errors of a validation: a pseudonymised
    build in which real names were still found is not safe to share either.

    >>> share_note(pseudonymised=False).startswith("not safe to share")
    True
    >>> share_note(pseudonymised=True, names_found=2).startswith("not safe to share")
    True
    """
    if pseudonymised and names_found:
        return (f"not safe to share: this build is pseudonymised, but {names_found} real name(s) from RAW "
                "were found in shareable files (the privacy_names errors above); remove them and validate again")
    if not pseudonymised:
        return ("not safe to share: this build is not pseudonymised, so manifests, rejects and the report "
                "name RAW's speakers, folders and files; set privacy.pseudonymise = true before sharing OUT")
    return (f"safe to share: every file under OUT except {names.CACHE}/, {names.LOGS}/ and {names.LOCK}, "
            "which are private (they name RAW's files); transcripts stay as written and may name people")


def locate(ref: str, *, out: Path | None, mapping_file: Path | None) -> tuple[str, str]:
    """``(kind, real name)`` of a reference or pseudonym, read from ``mapping_file`` or
    else from OUT's private mapping; UsageError when neither holds it.

    Examples
    --------
    >>> import tempfile
    >>> from pipeline.stages.privacy import mapping_text
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     _ = Path(tmp, "map.tsv").write_text(mapping_text({"ana": "spk-1"}, {"ana/a.wav": "src-2"}))
    ...     locate("src-2", out=None, mapping_file=Path(tmp, "map.tsv"))
    ('source', 'ana/a.wav')
    """
    tried = [p for p in (mapping_file, out / names.PRIVATE_MAPPING if out is not None else None) if p is not None]
    if not tried:
        raise UsageError("loam locate: give OUT (its private mapping) or --mapping FILE (privacy.mapping_file)")
    for path in tried:
        if not path.is_file():
            continue
        for kind, pairs in read_mapping(path).items():
            for name, reference in pairs.items():
                if reference == ref:
                    return kind, name
    raise UsageError(f"loam locate: {ref!r} is in none of {', '.join(str(p) for p in tried)} "
                     "(a reference of another key, or a build that is not pseudonymised?)")
