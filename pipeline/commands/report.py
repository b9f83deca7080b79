"""``loam report``: one self-contained HTML page and a JSON file describing an OUT folder.

Every number comes from the manifests themselves (:func:`build_summary`), so the page
describes what a trainer will read, even after a hand edit; the split stage's summary
adds only what the manifests cannot tell (near-duplicate similarities, rejected noisy
clips, the changes of the last rebuild). The page needs no network and no JavaScript:
plots are PNG images from matplotlib's Agg backend, embedded as base64, and the styles
are inline. Text that comes from the inputs (transcripts, paths, speaker ids, reject
details) is always HTML-escaped.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import platform
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipeline import __version__
from pipeline.commands.languages import language_rates
from pipeline.commands.validate import (
    check_out_folder,
    heldout_sentence,
    heldout_sharing,
    load_resolved_config,
    phone_inventory,
)
from pipeline.core.config import Config, parse_duration_s
from pipeline.core.errors import ManifestError
from pipeline.core.fsio import write_text_atomic
from pipeline.core.manifest import read_manifest
from pipeline.core.names import (
    FLAGS,
    HELDOUT,
    LABELLED,
    REJECTED,
    REPORT_PAGE,
    REPORT_SUMMARY,
    RESOLVED_CONFIG,
    STAGES,
    SUBSETS,
    UNLABELLED,
    stage_manifest,
    stage_rejects,
    stage_summary,
    subset_manifest,
)
from pipeline.stages.gates import GATES

# 7 x 3.5 inches at 100 dpi: legible at the page's width without scaling down.
FIGURE_IN = (7.0, 3.5)
FIGURE_DPI = 100
FONT_PT = 11
EXAMPLES_PER_REASON = 3
SAMPLE_CLIPS = 8
OUTLIER_CLIPS = 10
SPEAKERS_PLOTTED = 30
SPEAKERS_LISTED = 200
SUBSET_COLOURS = {LABELLED: "#1b6ca8", UNLABELLED: "#9aa5b1", HELDOUT: "#d9822b"}
# The flags in the order the page lists them: what the quality checks measured (the gates,
# then near-duplicates) before the rest, in the schema's order.
_MEASURED = (*GATES, "near_duplicate")
QUALITY_FLAGS = (*_MEASURED, *(f for f in FLAGS if f not in _MEASURED))
CAUTION = (
    "Voice recordings are personal data. Use this corpus only where every speaker consented to this "
    "use and the recordings' licence allows it, and follow the data-protection law that applies to you "
    "and to the speakers (in the EU the GDPR treats voice as personal data, and as biometric data when "
    "it is used to identify someone). Transcripts, file names and speaker ids can carry names: keep "
    "the corpus and its report as protected as the recordings themselves."
)


# --------------------------------------------------------------------------- reading


def _read_optional(path: Path, columns: Sequence[str] | None = None) -> pa.Table | None:
    """The manifest at ``path`` (only those of ``columns`` it has, when given), or None
    when it is missing or unreadable."""
    if not path.exists():
        return None
    try:
        if columns is None:
            return read_manifest(path)
        present = pq.read_schema(path).names
        return pq.read_table(path, columns=[c for c in columns if c in present])
    except (ManifestError, OSError, pa.ArrowException):
        return None


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


_SCALARS = ("clip_id", "speaker", "group", "duration_s", "loudness_lufs", "loudness_in_lufs",
            "speaking_rate", "rate_z", "transcript", "norm_text", "near_duplicate_of", "source_path",
            "scorable", "part")


def load_clips(out: Path) -> pd.DataFrame:
    """The three subsets as one frame with a ``subset_file`` column.

    Parameters
    ----------
    out : Path
        An output folder.

    Returns
    -------
    pandas.DataFrame
        One row per clip, subset by subset (a missing or unreadable file adds none).
        Columns a file lacks are filled with nulls, so a hand-edited manifest still
        reports; list columns (``phones``, ``tiers``, ``quality_flags``) hold Python
        lists.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     clips = load_clips(Path(tmp))
    >>> len(clips), "subset_file" in clips.columns
    (0, True)
    """
    parts = []
    lists = ("phones", "tiers", "quality_flags")
    for name in SUBSETS:
        table = _read_optional(out / subset_manifest(name), columns=[*_SCALARS, *lists])
        if table is None:
            continue
        columns: dict[str, Any] = {}
        for col in _SCALARS:
            # Arrow to pandas directly (nulls as None or NaN), not through Python lists.
            columns[col] = (table.column(col).to_pandas().astype(object) if col in table.column_names
                            else [None] * table.num_rows)
        for col in lists:
            values = table.column(col).to_pylist() if col in table.column_names else [None] * table.num_rows
            columns[col] = [v if isinstance(v, list) else [] for v in values]
        part = pd.DataFrame(columns)
        part["subset_file"] = name
        parts.append(part)
    if not parts:
        return pd.DataFrame({c: [] for c in [*_SCALARS, "phones", "tiers", "quality_flags", "subset_file"]})
    frame = pd.concat(parts, ignore_index=True)
    for col in ("duration_s", "loudness_lufs", "loudness_in_lufs", "speaking_rate", "rate_z"):
        frame[col] = pd.to_numeric(frame[col], errors="coerce")
    return frame


def load_rejects(out: Path) -> pd.DataFrame:
    """Every reject of ``out``.

    Parameters
    ----------
    out : Path
        An output folder.

    Returns
    -------
    pandas.DataFrame
        The rows of ``manifests/rejected.parquet``, or of the stages' own reject files
        when it is missing (columns ``source_path``, ``reason``, ``detail``, ``stage``,
        ``clip_id``).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     list(load_rejects(Path(tmp)).columns)
    ['source_path', 'reason', 'detail', 'stage', 'clip_id']
    """
    table = _read_optional(out / REJECTED)
    if table is None:
        tables = [t for t in (_read_optional(out / stage_rejects(s)) for s in STAGES) if t is not None]
        table = pa.concat_tables([t.replace_schema_metadata(None) for t in tables]) if tables else None
    columns = ("source_path", "reason", "detail", "stage", "clip_id")
    if table is None:
        return pd.DataFrame({c: [] for c in columns})
    return pd.DataFrame({c: table.column(c).to_pylist() if c in table.column_names else [None] * table.num_rows
                         for c in columns})


# --------------------------------------------------------------------------- numbers


def _hours(seconds: float) -> float:
    return round(seconds / 3600.0, 4)


def hms(seconds: float | None) -> str:
    """A duration as h:mm:ss, rounded to the second.

    Parameters
    ----------
    seconds : float or None
        The duration.

    Returns
    -------
    str
        ``h:mm:ss``; "none" for None or a non-finite value.

    Examples
    --------
    >>> hms(3725.4), hms(59.6), hms(None)
    ('1:02:05', '0:01:00', 'none')
    """
    if seconds is None or not math.isfinite(seconds):
        return "none"
    total = int(round(seconds))
    return f"{total // 3600}:{total % 3600 // 60:02d}:{total % 60:02d}"


def _stats(values: Iterable[float]) -> dict[str, float] | None:
    x = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=np.float64)
    if not x.size:
        return None
    p5, p50, p95 = np.percentile(x, [5, 50, 95])
    return {"n": int(x.size), "min": round(float(x.min()), 3), "p5": round(float(p5), 3),
            "median": round(float(p50), 3), "mean": round(float(x.mean()), 3), "p95": round(float(p95), 3),
            "max": round(float(x.max()), 3)}


def _describe(part: pd.DataFrame) -> dict[str, Any]:
    """Clips, seconds, hours, speakers, groups; the scorable ones (transcript, phones,
    no gate or shared prompt holding them back); and the untranscribed ones."""
    seconds = float(part["duration_s"].fillna(0.0).sum())
    scorable = part.loc[part["scorable"].map(lambda v: v is True).astype(bool)]
    scored_s = float(scorable["duration_s"].fillna(0.0).sum())
    untranscribed = part[part["transcript"].isna()]
    return {
        "clips": int(len(part)),
        "seconds": round(seconds, 3),
        "hours": _hours(seconds),
        "scorable_clips": int(len(scorable)),
        "scorable_seconds": round(scored_s, 3),
        "scorable_hours": _hours(scored_s),
        "speakers": int(part["speaker"].dropna().nunique()),
        "groups": int(part["group"].dropna().nunique()),
        "transcribed_clips": int(part["transcript"].notna().sum()),
        "untranscribed_clips": int(len(untranscribed)),
        "untranscribed_seconds": round(float(untranscribed["duration_s"].fillna(0.0).sum()), 3),
    }


def _phone_counts(phone_lists: pd.Series, boundary: str) -> dict[str, int]:
    """Occurrences of each phone (the word-boundary symbol left out), most frequent first."""
    flat = phone_lists.explode().dropna()
    counts = flat[flat != boundary].value_counts()
    return dict(sorted(((str(k), int(v)) for k, v in counts.items()), key=lambda kv: (-kv[1], kv[0])))


def _finite(value: Any) -> Any:
    """``value`` with every non-finite float replaced by None (JSON has no NaN)."""
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _subsets_section(out: Path, clips: pd.DataFrame) -> dict[str, dict[str, Any]]:
    """Clips, hours, speakers and groups per subset, and the held-out clips that can be scored."""
    present = {name: (out / subset_manifest(name)).exists() for name in SUBSETS}
    subsets = {name: {**_describe(clips[clips["subset_file"] == name]), "file_present": present[name]}
               for name in SUBSETS}
    subsets[HELDOUT]["scored_clips"] = subsets[HELDOUT]["scorable_clips"]
    subsets[HELDOUT]["scored_hours"] = subsets[HELDOUT]["scorable_hours"]
    return subsets


def _parts_section(clips: pd.DataFrame, config: Config, split_summary: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Sizes of each held-out part (config order, then any other part the manifest
    names), with its target and whether it is text-disjoint. A part's untranscribed
    audio is audio of held-out speakers withheld from training."""
    heldout = clips[clips["subset_file"] == HELDOUT]
    specs = {p.name: p for p in config.split.parts}
    names = [*specs, *sorted(set(heldout["part"].dropna()) - set(specs))]
    recorded = split_summary.get("parts") if isinstance(split_summary.get("parts"), dict) else {}
    out = {}
    for name in names:
        row = _describe(heldout[heldout["part"] == name])
        row["target_s"] = (recorded.get(name) or {}).get("target_s")
        row["text_disjoint"] = specs[name].text_disjoint if name in specs else None
        out[name] = row
    return out


def _tiers_section(labelled: pd.DataFrame, config: Config, inventory: set[str]) -> dict[str, dict[str, Any]]:
    """Each labelled tier, smallest budget first: its clips and which phones it covers."""
    boundary = config.text.word_boundary
    tiers = {}
    for tier in sorted(config.split.labelled_budgets, key=parse_duration_s):
        part = labelled[labelled["tiers"].map(lambda ts, t=tier: t in ts).astype(bool)]
        counts = _phone_counts(part["phones"], boundary)
        tiers[tier] = {
            **_describe(part),
            "budget_s": parse_duration_s(tier),
            "phones": len(counts),
            "phone_coverage": round(len(set(counts) & inventory) / len(inventory), 4) if inventory else None,
            "missing_phones": sorted(inventory - set(counts)),
        }
    return tiers


def _quality_section(clips: pd.DataFrame, split_summary: dict[str, Any]) -> dict[str, Any]:
    """Clips per flag and subset, the split stage's gate counts and the near-duplicate pairs."""
    flat = clips[["subset_file", "quality_flags"]].explode("quality_flags").dropna()
    per_flag = flat.groupby(["quality_flags", "subset_file"]).size()
    flags = {f: {name: int(per_flag.get((f, name), 0)) for name in SUBSETS} for f in QUALITY_FLAGS}
    pairs = split_summary.get("near_duplicate_pairs")
    if not isinstance(pairs, list):  # no split summary: the pairs the manifests name, without similarity
        named = clips[clips["near_duplicate_of"].notna()]
        pairs = [{"clips": [a, b], "similarity": None}
                 for a, b in zip(named["clip_id"], named["near_duplicate_of"], strict=True)]
    return {"flags": flags, "gates_from_split": split_summary.get("gates"), "near_duplicate_pairs": pairs}


def _speakers_section(clips: pd.DataFrame) -> dict[str, dict[str, float]]:
    """Hours per speaker and subset, the speaker with the most audio first."""
    if not len(clips):
        return {}
    per = clips.groupby(["speaker", "subset_file"])["duration_s"].sum().unstack(fill_value=0.0)
    per = per.reindex(columns=list(SUBSETS), fill_value=0.0)
    per = per.loc[per.sum(axis=1).sort_values(ascending=False, kind="stable").index]
    return {str(spk): {name: _hours(float(row[name])) for name in SUBSETS} for spk, row in per.iterrows()}


def _rejects_section(rejects: pd.DataFrame) -> dict[str, Any]:
    """Rejects per reason (most frequent first) and per stage, with a few examples of each reason."""
    if not len(rejects):
        return {"total": 0, "by_reason": {}, "by_stage": {}, "examples": {}}
    reasons = rejects.groupby("reason").size().sort_values(ascending=False, kind="stable")
    examples = {}
    for reason in reasons.index:
        some = rejects[rejects["reason"] == reason].sort_values("source_path", kind="stable").head(EXAMPLES_PER_REASON)
        examples[str(reason)] = [{"source_path": r.source_path, "stage": r.stage, "detail": r.detail}
                                 for r in some.itertuples()]
    return {
        "total": int(len(rejects)),
        "by_reason": {str(k): int(v) for k, v in reasons.items()},
        "by_stage": {str(k): int(v) for k, v in rejects.groupby("stage").size().items()},
        "examples": examples,
    }


def build_summary(out: Path, *, clips: pd.DataFrame | None = None) -> dict[str, Any]:
    """Every number the report shows, JSON-ready; the content of ``report/summary.json``.

    Parameters
    ----------
    out : Path
        A folder written by ``loam prepare`` (UsageError otherwise).
    clips : pandas.DataFrame, optional
        :func:`load_clips` of ``out``, when the caller has it already.

    Returns
    -------
    dict
        One section per part of the page (``subsets``, ``tiers``, ``rejects``, ...);
        non-finite numbers are None.

    Examples
    --------
    >>> import tempfile
    >>> from pipeline.core.manifest import empty_table, write_manifest
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     _ = write_manifest(Path(tmp, REJECTED), "rejected", empty_table("rejected"), metadata={})
    ...     summary = build_summary(Path(tmp))
    >>> summary["totals"]["clips"], summary["rejects"]["total"], summary["subsets"][LABELLED]["file_present"]
    (0, 0, False)
    """
    out = check_out_folder(out)
    config, config_problems = load_resolved_config(out)
    clips = load_clips(out) if clips is None else clips
    split_summary = _read_json(out / stage_summary("split"))
    split_summary = split_summary if isinstance(split_summary, dict) else {}
    boundary = config.text.word_boundary
    inventory, inventory_source = phone_inventory(out, config)
    inventory = {p for p in (inventory or set()) if p != boundary}
    labelled = clips[clips["subset_file"] == LABELLED]
    transcribed = clips[clips["speaking_rate"].notna()]
    return _finite({
        "loam_version": __version__,
        "totals": {**_describe(clips)},
        "subsets": _subsets_section(out, clips),
        "parts": _parts_section(clips, config, split_summary),
        "split_by": config.split.group_by,
        "text_overlap": split_summary.get("text_overlap"),
        "balance": split_summary.get("balance"),
        "tiers": _tiers_section(labelled, config, inventory),
        "durations": {name: _stats(clips.loc[clips["subset_file"] == name, "duration_s"]) for name in SUBSETS},
        "loudness": {"target_lufs": config.audio.target_lufs,
                     "before": _stats(clips["loudness_in_lufs"]), "after": _stats(clips["loudness_lufs"])},
        "speaking_rate": _stats(transcribed["speaking_rate"]),
        "phones": {
            "inventory_source": inventory_source or None,
            "inventory": sorted(inventory),
            "labelled_counts": _phone_counts(labelled["phones"], boundary),
        },
        "languages": language_rates(_read_optional(out / stage_manifest("text"),
                                                   columns=["language", "words", "oov_words", "word_backends"])),
        "rejects": _rejects_section(load_rejects(out)),
        "speakers": _speakers_section(clips),
        "disjointness": heldout_sharing(lambda column: clips[[column, "subset_file"]].rename(columns={"subset_file": "_file"}),
                                   group_by=config.split.group_by),
        "quality": _quality_section(clips, split_summary),
        "shortfalls": split_summary.get("shortfalls"),
        "changes": split_summary.get("changes"),
        "config": _read_json(out / RESOLVED_CONFIG) if not config_problems else None,
        "config_sha256": config.sha256() if not config_problems else None,
        "versions": versions(),
    })


def versions() -> dict[str, str]:
    """Versions of Loam and the libraries that shape its output.

    Returns
    -------
    dict of str to str
        Component name to version: loam, python, numpy, pyarrow, pandas, soundfile and
        libsndfile.

    Examples
    --------
    >>> list(versions())
    ['loam', 'python', 'numpy', 'pyarrow', 'pandas', 'soundfile', 'libsndfile']
    """
    import soundfile

    return {
        "loam": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "pyarrow": pa.__version__,
        "pandas": pd.__version__,
        "soundfile": soundfile.__version__,
        "libsndfile": soundfile.__libsndfile_version__,
    }


# --------------------------------------------------------------------------- plots


def _figure() -> tuple[Any, Any]:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": FONT_PT, "axes.titlesize": FONT_PT + 1, "axes.labelsize": FONT_PT,
                         "xtick.labelsize": FONT_PT - 1, "ytick.labelsize": FONT_PT - 1,
                         "legend.fontsize": FONT_PT - 1})
    fig, ax = plt.subplots(figsize=FIGURE_IN, dpi=FIGURE_DPI)
    ax.grid(True, alpha=0.3)
    return fig, ax


def _integer_counts(ax: Any) -> None:
    from matplotlib.ticker import MaxNLocator

    ax.yaxis.set_major_locator(MaxNLocator(integer=True))


def _png(fig: Any) -> str:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.tight_layout()
    # No timestamp or software stamp in the file: the same OUT gives the same page.
    fig.savefig(buf, format="png", dpi=FIGURE_DPI, metadata={"Software": None})
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _bins(values: np.ndarray, n: int = 30) -> np.ndarray:
    lo, hi = float(values.min()), float(values.max())
    if hi - lo < 1e-9:
        lo, hi = lo - 0.5, hi + 0.5
    return np.linspace(lo, hi, n + 1)


def _plot_durations(clips: pd.DataFrame) -> str | None:
    values = clips["duration_s"].dropna().to_numpy(dtype=float)
    if not values.size:
        return None
    fig, ax = _figure()
    groups = [(name, clips.loc[clips["subset_file"] == name, "duration_s"].dropna().to_numpy(dtype=float))
              for name in SUBSETS]
    groups = [(name, x) for name, x in groups if x.size]
    # Side-by-side bars per bin, so equal counts in two subsets never hide each other.
    ax.hist([x for _, x in groups], bins=_bins(values), color=[SUBSET_COLOURS[n] for n, _ in groups],
            label=[f"{n} ({x.size})" for n, x in groups])
    _integer_counts(ax)
    ax.set_title("Clip duration by subset")
    ax.set_xlabel("duration (s)")
    ax.set_ylabel("clips")
    ax.legend()
    return _png(fig)


def _plot_loudness(clips: pd.DataFrame, target_lufs: float) -> str | None:
    before = clips["loudness_in_lufs"].to_numpy(dtype=float)
    after = clips["loudness_lufs"].to_numpy(dtype=float)
    before, after = before[np.isfinite(before)], after[np.isfinite(after)]
    if not (before.size or after.size):
        return None
    fig, ax = _figure()
    bins = _bins(np.concatenate([before, after]), 40)
    ax.hist(before, bins=bins, histtype="stepfilled", alpha=0.5, color="#9aa5b1", label="before normalisation")
    ax.hist(after, bins=bins, histtype="step", linewidth=2, color="#1b6ca8", label="as written")
    ax.axvline(target_lufs, color="#d9822b", linestyle="--", label=f"target {target_lufs:g} LUFS")
    _integer_counts(ax)
    ax.set_title("Integrated loudness (ITU-R BS.1770-4)")
    ax.set_xlabel("loudness (LUFS)")
    ax.set_ylabel("clips")
    ax.legend()
    return _png(fig)


def _plot_speaking_rate(clips: pd.DataFrame) -> str | None:
    x = clips["speaking_rate"].dropna().to_numpy(dtype=float)
    if not x.size:
        return None
    fig, ax = _figure()
    ax.hist(x, bins=_bins(x), color="#1b6ca8")
    _integer_counts(ax)
    ax.set_title("Speaking rate of transcribed clips")
    ax.set_xlabel("phones per second of speech")
    ax.set_ylabel("clips")
    return _png(fig)


def _plot_phones(counts: dict[str, int]) -> str | None:
    if not counts:
        return None
    fig, ax = _figure()
    names = list(counts)
    ax.bar(range(len(names)), [counts[n] for n in names], color="#1b6ca8")
    ax.set_xticks(range(len(names)))
    ax.set_xticklabels(names, rotation=90, fontsize=FONT_PT - 2 if len(names) > 30 else FONT_PT - 1)
    _integer_counts(ax)
    ax.set_title("Phone frequency in labelled")
    ax.set_xlabel("phone")
    ax.set_ylabel("occurrences")
    return _png(fig)


def _plot_speakers(speakers: dict[str, dict[str, float]]) -> str | None:
    if not speakers:
        return None
    shown = list(speakers)[:SPEAKERS_PLOTTED][::-1]
    total = max(sum(v.values()) for v in speakers.values())
    unit, scale = ("hours", 1.0) if total >= 1.0 else ("minutes", 60.0)
    fig, ax = _figure()
    left = np.zeros(len(shown))
    for name in SUBSETS:
        widths = np.array([speakers[s][name] * scale for s in shown])
        ax.barh(range(len(shown)), widths, left=left, color=SUBSET_COLOURS[name], label=name)
        left += widths
    ax.set_yticks(range(len(shown)))
    ax.set_yticklabels(shown)
    more = f" (the {SPEAKERS_PLOTTED} largest of {len(speakers)})" if len(speakers) > SPEAKERS_PLOTTED else ""
    ax.set_title(f"Audio per speaker{more}")
    ax.set_xlabel(unit)
    ax.set_ylabel("speaker")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0))
    fig.set_size_inches(FIGURE_IN[0], max(FIGURE_IN[1], 0.8 + 0.25 * len(shown)))
    return _png(fig)


# --------------------------------------------------------------------------- HTML


def esc(value: Any) -> str:
    """``value`` as text safe inside HTML, attributes included.

    Parameters
    ----------
    value : object
        Anything; None becomes the empty string.

    Returns
    -------
    str
        ``str(value)`` with ``&``, ``<``, ``>`` and both quotes escaped.

    Examples
    --------
    >>> esc('<b>"Ed" & co</b>')
    '&lt;b&gt;&quot;Ed&quot; &amp; co&lt;/b&gt;'
    """
    return html.escape("" if value is None else str(value), quote=True)


def _num(value: Any, digits: int = 3) -> str:
    if value is None:
        return "none"
    if isinstance(value, float):
        return f"{value:.{digits}f}" if math.isfinite(value) else str(value)
    return str(value)


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]], *, empty: str = "none") -> str:
    """An HTML table; every cell is escaped.

    Parameters
    ----------
    headers : sequence of str
        The column headings.
    rows : sequence of sequences
        The cells, row by row (any values; None shows empty).
    empty : str
        The sentence shown instead of a table when there is no row.

    Returns
    -------
    str
        A ``<table>`` element, or a ``<p class="none">`` with ``empty``.

    Examples
    --------
    >>> table(["speaker", "clips"], [["<wren>", 3]])
    '<table><thead><tr><th>speaker</th><th>clips</th></tr></thead><tbody><tr><td>&lt;wren&gt;</td><td>3</td></tr></tbody></table>'
    >>> table(["speaker"], [], empty="no speaker")
    '<p class="none">no speaker</p>'
    """
    if not rows:
        return f'<p class="none">{esc(empty)}</p>'
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = "".join("<tr>" + "".join(f"<td>{esc(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _img(png: str | None, alt: str) -> str:
    if png is None:
        return f'<p class="none">none: no clips to plot for {esc(alt.lower())}</p>'
    return f'<figure><img alt="{esc(alt)}" src="data:image/png;base64,{png}" width="700"></figure>'


def _stats_rows(label: str, stats: dict[str, float] | None) -> list[list[str]]:
    if stats is None:
        return [[label, "none", "", "", "", ""]]
    return [[label, str(stats["n"]), _num(stats["min"], 2), _num(stats["median"], 2), _num(stats["p95"], 2),
             _num(stats["max"], 2)]]


def _inline(value: Any) -> str:
    """Nested JSON data on one line: ``{"a": 1, "b": {}}`` -> ``a 1, b none``."""
    if isinstance(value, dict):
        return ", ".join(f"{k} {_inline(v)}" for k, v in value.items()) or "none"
    if isinstance(value, list):
        return ", ".join(_inline(v) for v in value) or "none"
    return _num(value)


def _value_table(value: dict[str, Any], headers: Sequence[str]) -> str:
    """A stage summary's section as a two-column table, one row per key (escaped)."""
    return table(headers, [[k, _inline(v)] for k, v in value.items()])


CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; max-width: 60rem; margin: 2rem auto;
       padding: 0 1rem; color: #1f2933; line-height: 1.45; font-size: 16px; }
h1 { font-size: 1.7rem; margin-bottom: .2rem; } h2 { font-size: 1.3rem; margin-top: 2.2rem;
     border-bottom: 2px solid #d9e2ec; padding-bottom: .2rem; } h3 { font-size: 1.05rem; }
table { border-collapse: collapse; margin: .6rem 0; font-size: .92rem; }
th, td { border: 1px solid #d9e2ec; padding: .25rem .55rem; text-align: left; vertical-align: top; }
th { background: #f0f4f8; } td.n, th.n { text-align: right; }
.caution { background: #fff4e5; border-left: 4px solid #d9822b; padding: .7rem 1rem; }
.none { color: #616e7c; font-style: italic; }
figure { margin: .8rem 0; } img { max-width: 100%; height: auto; }
pre { background: #f5f7fa; padding: .6rem; overflow-x: auto; font-size: .85rem; }
code { font-size: .9rem; }
"""


def _head_html(s: dict[str, Any]) -> list[str]:
    t = s["totals"]
    return [
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>Loam corpus report</title><style>{CSS}</style></head><body>",
        "<h1>Loam corpus report</h1>",
        f"<p>{t['clips']} clips, {hms(t['seconds'])} ({_num(t['hours'], 2)} h), {t['speakers']} speakers; "
        f"{s['rejects']['total']} inputs set aside. Loam {esc(s['loam_version'])}.</p>",
        f'<p class="caution"><strong>Personal data.</strong> {esc(CAUTION)}</p>',
    ]


def _subsets_html(s: dict[str, Any]) -> list[str]:
    rows = [[name, v["clips"], _num(v["hours"], 3), hms(v["seconds"]), _num(v["scorable_hours"], 3), v["speakers"],
             v["groups"], v["transcribed_clips"], "" if v["file_present"] else "file missing"]
            for name, v in s["subsets"].items()]
    h = s["subsets"][HELDOUT]
    return [
        "<h2>Subsets</h2>",
        table(["subset", "clips", "hours", "h:mm:ss", "scorable hours", "speakers", "groups", "transcribed", "note"],
              rows),
        f"<p>Held-out clips that can be scored: {h['scorable_clips']}, {_num(h['scorable_hours'], 3)} h. "
        f"Untranscribed audio of held-out {esc(s['split_by'])}s, withheld from training: "
        f"{h['untranscribed_clips']} clips, {hms(h['untranscribed_seconds'])}.</p>",
        f"<p>{esc(_sentence_case(heldout_sentence(s['disjointness'])))}.</p>",
    ]


def _sentence_case(text: str) -> str:
    return text[:1].upper() + text[1:]


def _parts_html(s: dict[str, Any]) -> list[str]:
    """The held-out parts' sizes, what keeping their prompts apart cost, and their balance."""
    rows = [[name, v["clips"], _num(v["hours"], 3), v["scorable_clips"], _num(v["scorable_hours"], 3),
             v["speakers"], v["groups"], hms(v["untranscribed_seconds"]),
             "none" if v["target_s"] is None else hms(v["target_s"]),
             {True: "yes", False: "no", None: "not configured"}[v["text_disjoint"]]] for name, v in s["parts"].items()]
    parts = ["<h2>Held-out parts</h2>",
             f"<p>No {esc(s['split_by'])} is in two parts or in a part and training.</p>",
             table(["part", "clips", "hours", "scorable clips", "scorable hours", "speakers", "groups",
                    "untranscribed (withheld)", "target", "text-disjoint"], rows)]
    cost = s.get("text_overlap")
    if isinstance(cost, dict):
        parts.append(
            f"<p>Prompts shared with labelled (split.text_overlap = {esc(cost.get('mode'))}): "
            f"{cost.get('unscored_clips')} held-out clips ({_num(cost.get('unscored_hours'), 4)} h) not scorable; "
            f"{cost.get('demoted_clips')} training clips ({_num(cost.get('demoted_hours'), 4)} h) kept out of "
            f"labelled without their transcripts ({cost.get('demoted_were_labelled')} of them were labelled).</p>")
    balance = s.get("balance")
    if isinstance(balance, dict) and balance.get("rows"):
        names = list(s["parts"])
        parts.append(f"<h3>Balance (tolerance {_num(100 * balance['tolerance'], 1)} percentage points)</h3>")
        parts.append(table(["column", "value", "corpus", *names, "within"],
                           [[r["column"], r["value"], _share(r["corpus"]),
                             *[_share((r.get("parts") or {}).get(n)) for n in names],
                             "yes" if r["within"] else "no"] for r in balance["rows"]]))
        if not balance.get("met"):
            parts.append("<p>The groups could not meet the tolerance everywhere (rows marked no): whole "
                         "groups move, and too few of them have the missing values.</p>")
    return parts


def _share(value: Any) -> str:
    return "none" if value is None else f"{100 * value:.1f} %"


def _tiers_html(s: dict[str, Any]) -> list[str]:
    rows = [[tier, hms(v["budget_s"]), v["clips"], hms(v["seconds"]), v["speakers"], v["phones"],
             "none" if v["phone_coverage"] is None else f"{100 * v['phone_coverage']:.1f} %",
             " ".join(v["missing_phones"]) or "none"] for tier, v in s["tiers"].items()]
    parts = ["<h2>Labelled tiers</h2>",
             table(["tier", "budget", "clips", "selected", "speakers", "phones", "phone coverage", "missing phones"],
                   rows)]
    if s["shortfalls"]:
        parts.append(table(["tier", "budget (s)", "selected (s)", "short by (s)"],
                           [[x.get("tier"), x.get("budget_s"), x.get("selected_s"), x.get("shortfall_s")]
                            for x in s["shortfalls"] if isinstance(x, dict)]))
    return parts


def _measures_html(s: dict[str, Any], clips: pd.DataFrame, figures: dict[str, str | None]) -> list[str]:
    """Durations, loudness and speaking rate: a plot and a table of each."""
    outliers = clips[clips["rate_z"].notna()].copy()
    outliers["abs_z"] = outliers["rate_z"].abs()
    outliers = outliers.sort_values(["abs_z", "clip_id"], ascending=[False, True], kind="stable").head(OUTLIER_CLIPS)
    return [
        "<h2>Durations</h2>",
        _img(figures.get("durations"), "Clip duration by subset"),
        table(["subset", "clips", "min (s)", "median (s)", "95th pct (s)", "max (s)"],
              [r for name in SUBSETS for r in _stats_rows(name, s["durations"][name])]),
        "<h2>Loudness</h2>",
        _img(figures.get("loudness"), "Integrated loudness"),
        table(["loudness", "clips", "min (LUFS)", "median (LUFS)", "95th pct (LUFS)", "max (LUFS)"],
              _stats_rows("before normalisation", s["loudness"]["before"])
              + _stats_rows("as written", s["loudness"]["after"])),
        f"<p>Target: {_num(s['loudness']['target_lufs'], 1)} LUFS.</p>",
        "<h2>Speaking rate</h2>",
        _img(figures.get("speaking_rate"), "Speaking rate"),
        table(["", "clips", "min", "median", "95th pct", "max"], _stats_rows("phones per second", s["speaking_rate"])),
        "<h3>Clips furthest from their speaker's rate</h3>",
        table(["clip", "speaker", "subset", "phones/s", "z", "transcript"],
              [[r.clip_id, r.speaker, r.subset_file, _num(r.speaking_rate, 2), _num(r.rate_z, 2), r.transcript]
               for r in outliers.itertuples()]),
    ]


def _phones_html(s: dict[str, Any], clips: pd.DataFrame, figures: dict[str, str | None]) -> list[str]:
    p = s["phones"]
    sample = clips[clips["subset_file"] == LABELLED].sort_values("clip_id", kind="stable").head(SAMPLE_CLIPS)
    return [
        "<h2>Phones</h2>",
        f"<p>Inventory: {len(p['inventory'])} phones"
        f"{' from ' + esc(p['inventory_source']) if p['inventory_source'] else ''}.</p>",
        _img(figures.get("phones"), "Phone frequency in labelled"),
        "<h2>Languages</h2>",
        table(["language", "transcribed clips", "word tokens", "pronounced by", "OOV rate"],
              [[tag, x["clips"], x["word_tokens"], ", ".join(x["sources"]),
                "no dictionary" if x["oov_rate"] is None else f"{100 * x['oov_rate']:.1f} %"]
               for tag, x in s.get("languages", {}).items()]),
        "<h2>Sample of labelled clips</h2>",
        table(["clip", "speaker", "duration (s)", "transcript", "phones"],
              [[r.clip_id, r.speaker, _num(r.duration_s, 2), r.transcript, " ".join(r.phones)]
               for r in sample.itertuples()]),
    ]


def _rejects_html(s: dict[str, Any]) -> list[str]:
    rj = s["rejects"]
    parts = ["<h2>Rejected inputs</h2>", table(["reason", "inputs"], list(rj["by_reason"].items()))]
    if rj["by_stage"]:
        parts.append("<p>By stage: " + esc(", ".join(f"{k} {v}" for k, v in rj["by_stage"].items())) + ".</p>")
    for reason, items in rj["examples"].items():
        parts.append(f"<h3>{esc(reason)}</h3>")
        parts.append(table(["input", "stage", "detail"], [[x["source_path"], x["stage"], x["detail"]] for x in items]))
    return parts


def _speakers_html(s: dict[str, Any], figures: dict[str, str | None]) -> list[str]:
    spk = list(s["speakers"].items())
    parts = [
        "<h2>Speakers</h2>",
        _img(figures.get("speakers"), "Audio per speaker"),
        table(["speaker", *[f"{n} (h:mm:ss)" for n in SUBSETS]],
              [[k, *[hms(3600 * v[n]) for n in SUBSETS]] for k, v in spk[:SPEAKERS_LISTED]]),
    ]
    if len(spk) > SPEAKERS_LISTED:
        parts.append(f"<p>and {len(spk) - SPEAKERS_LISTED} more speakers (all in summary.json).</p>")
    return parts


def _quality_html(s: dict[str, Any]) -> list[str]:
    q = s["quality"]
    parts = ["<h2>Quality gates</h2>",
             table(["flag", *SUBSETS], [[f, *[v[n] for n in SUBSETS]] for f, v in q["flags"].items()])]
    if q["gates_from_split"]:
        parts.append("<p>Counted by the split stage over every clip, including clips it set aside:</p>")
        parts.append(_value_table(q["gates_from_split"], ["gate", "clips"]))
    parts.append(f"<h3>Near-duplicate pairs ({len(q['near_duplicate_pairs'])})</h3>")
    parts.append(table(["clip", "near-duplicate of", "similarity"],
                       [[*(x.get("clips") or ["", ""])[:2], _num(x.get("similarity"), 3)]
                        for x in q["near_duplicate_pairs"][:100] if isinstance(x, dict)]))
    return parts


def _provenance_html(s: dict[str, Any]) -> list[str]:
    """The last rebuild's changes, the configuration and the versions."""
    parts = ["<h2>Changes in the last rebuild</h2>",
             _value_table(s["changes"], ["change", "clips"]) if s["changes"]
             else '<p class="none">none recorded (no split summary)</p>',
             "<h2>Configuration</h2>"]
    if s["config"] is None:
        parts.append(f'<p class="none">none: {esc(RESOLVED_CONFIG)} is missing or unreadable</p>')
    else:
        parts.append(f"<p>SHA-256 {esc(s['config_sha256'])}</p>")
        parts.append(f"<pre>{esc(json.dumps(s['config'], indent=2, sort_keys=True, ensure_ascii=False))}</pre>")
    parts += ["<h2>Versions</h2>", table(["component", "version"], list(s["versions"].items()))]
    return parts


def render_html(summary: dict[str, Any], clips: pd.DataFrame, figures: dict[str, str | None]) -> str:
    """The report page for ``summary``, one section after another.

    Parameters
    ----------
    summary : dict
        From :func:`build_summary`.
    clips : pandas.DataFrame
        From :func:`load_clips`: the rows behind the sample and outlier tables.
    figures : dict of str to str or None
        Base64 PNG of each plot (``durations``, ``loudness``, ``speaking_rate``, ``phones``,
        ``speakers``); None or absent shows "none" in its place.

    Returns
    -------
    str
        A self-contained HTML page; every value from the inputs is escaped.
    """
    parts = [
        *_head_html(summary),
        *_subsets_html(summary),
        *_parts_html(summary),
        *_tiers_html(summary),
        *_measures_html(summary, clips, figures),
        *_phones_html(summary, clips, figures),
        *_rejects_html(summary),
        *_speakers_html(summary, figures),
        *_quality_html(summary),
        *_provenance_html(summary),
        "</body></html>\n",
    ]
    return "".join(parts)


def write_report(out: Path) -> Path:
    """Write ``OUT/report/index.html``, ``summary.json`` and ``datasheet.md``; returns the page's path.

    Parameters
    ----------
    out : Path
        A folder written by ``loam prepare`` (UsageError otherwise). Missing subsets,
        rejects or summaries show as "none".

    Returns
    -------
    Path
        ``out / "report" / "index.html"``.

    Examples
    --------
    >>> import tempfile
    >>> from pipeline.core.manifest import empty_table, write_manifest
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     _ = write_manifest(Path(tmp, REJECTED), "rejected", empty_table("rejected"), metadata={})
    ...     page = write_report(Path(tmp))
    ...     print(page.relative_to(tmp), "<h2>Subsets</h2>" in page.read_text(encoding="utf-8"))
    report/index.html True
    """
    out = check_out_folder(Path(out))
    clips = load_clips(out)
    summary = build_summary(out, clips=clips)
    figures = {
        "durations": _plot_durations(clips),
        "loudness": _plot_loudness(clips, summary["loudness"]["target_lufs"]),
        "speaking_rate": _plot_speaking_rate(clips),
        "phones": _plot_phones(summary["phones"]["labelled_counts"]),
        "speakers": _plot_speakers(summary["speakers"]),
    }
    page = render_html(summary, clips, figures)
    write_text_atomic(out / REPORT_SUMMARY,
                      json.dumps(summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n")
    write_text_atomic(out / REPORT_PAGE, page)
    from pipeline.commands.datasheet import write_datasheet  # it imports this module

    write_datasheet(out, summary)
    return out / REPORT_PAGE
