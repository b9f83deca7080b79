"""What the datasheet reads from a build, besides the report's summary: the sources'
formats and rates, the stages' summaries, the software each stage ran, and the review
decisions the stages applied.

Everything here depends only on OUT's manifests and summaries and on the installed
code, never on the run's history, so the datasheet is the same on every rerun.
"""

from __future__ import annotations

import json
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq

from pipeline.core.codeversion import stage_code
from pipeline.core.manifest import read_metadata
from pipeline.core.names import STAGES, stage_manifest, stage_summary, subset_manifest

# The manifest whose metadata records the code version that wrote each stage's outputs.
MAIN_MANIFEST = {"ingest": stage_manifest("ingest"), "audio": stage_manifest("audio"),
                 "text": stage_manifest("text"), "split": subset_manifest("labelled")}
_SOURCE_COLUMNS = ("format", "subtype", "channels", "sample_rate", "duration_s", "transcript_origin")


@dataclass(frozen=True)
class StageSoftware:
    """The libraries a stage's code can run, and whether the installed code wrote its outputs."""

    stage: str
    libraries: tuple[str, ...]  # "distribution version", installed ones only
    recorded_version: str | None  # from the main manifest's metadata
    installed_version: str

    @property
    def same_code(self) -> bool:
        """Whether the installed code (libraries included) is the code that wrote the outputs."""
        return self.recorded_version == self.installed_version


def stage_summaries(out: Path) -> dict[str, dict[str, Any]]:
    """Each stage's ``stages/<name>.summary.json``; an empty dict when missing or unreadable."""
    found: dict[str, dict[str, Any]] = {}
    for name in STAGES:
        try:
            data = json.loads((out / stage_summary(name)).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            data = None
        found[name] = data if isinstance(data, dict) else {}
    return found


def source_formats(out: Path) -> tuple[list[dict[str, Any]], dict[str, int]]:
    """The accepted sources by format, subtype, channels and rate, and where transcripts came from.

    Parameters
    ----------
    out : Path
        An output folder.

    Returns
    -------
    tuple of (list of dict, dict of str to int)
        Rows with ``format``, ``subtype``, ``channels``, ``sample_rate``, ``files`` and
        ``seconds``, most files first; and files per transcript origin (``none`` for
        files without a transcript). Both empty without ``stages/ingest.parquet``.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     source_formats(Path(tmp))
    ([], {})
    """
    path = out / stage_manifest("ingest")
    try:
        names = pq.read_schema(path).names
        table = pq.read_table(path, columns=[c for c in _SOURCE_COLUMNS if c in names])
    except (OSError, ValueError):
        return [], {}
    cols = {c: table.column(c).to_pylist() if c in table.column_names else [None] * table.num_rows
            for c in _SOURCE_COLUMNS}
    files: Counter[tuple[Any, ...]] = Counter()
    seconds: Counter[tuple[Any, ...]] = Counter()
    for i in range(table.num_rows):
        key = (str(cols["format"][i]), str(cols["subtype"][i]), cols["channels"][i], cols["sample_rate"][i])
        files[key] += 1
        seconds[key] += float(cols["duration_s"][i] or 0.0)
    rows = [{"format": k[0], "subtype": k[1], "channels": k[2], "sample_rate": k[3], "files": n,
             "seconds": round(seconds[k], 3)}
            for k, n in sorted(files.items(), key=lambda kv: (-kv[1], str(kv[0])))]
    origins = Counter(str(o) if o else "none" for o in cols["transcript_origin"])
    return rows, dict(sorted(origins.items()))


def stage_software(out: Path) -> list[StageSoftware]:
    """For each stage, the installed libraries its code can run and the code versions.

    The libraries are those of :func:`pipeline.core.codeversion.stage_code`, read from
    the installed distributions; when the installed code version differs from the one
    in the stage's main manifest, the outputs were written by other code (or other
    library versions), and the datasheet says so.
    """
    found = []
    for name in STAGES:
        code = stage_code(name)
        try:
            recorded = read_metadata(out / MAIN_MANIFEST[name]).get("code_version")
        except (OSError, ValueError, KeyError):
            recorded = None
        libraries = tuple(label for _, label in code.libraries if label != "not installed")
        found.append(StageSoftware(name, libraries, recorded, code.version))
    return found


def review_counts(out: Path, summaries: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The ``review`` entry of each stage summary that has one (decisions applied and not,
    by kind and by why), with ``file_exists``: whether the decisions file it names (from
    OUT when inside it) is there.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     entry = {"decisions_file": "ledger.decisions.jsonl", "applied_total": 0}
    ...     review_counts(Path(tmp), {"split": {"review": entry}, "audio": {}})["split"]["file_exists"]
    False
    """
    found = {}
    for name, summary in summaries.items():
        entry = summary.get("review")
        if isinstance(entry, dict):
            path = Path(str(entry.get("decisions_file") or ""))
            exists = bool(entry.get("decisions_file")) and (path if path.is_absolute() else out / path).is_file()
            found[name] = {**entry, "file_exists": exists}
    return found
