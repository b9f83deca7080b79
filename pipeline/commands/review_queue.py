"""The review queue: the clips of a build that need a person, read from OUT's manifests.

A clip is queued for each of these reasons (its ``why``): a quality flag of its subset
row (``noisy``, ``rate_outlier``, ``near_duplicate``, ...), a gate that set it aside
(``rejected:<reason>``, from the split stage's rejects), out-of-vocabulary words
(``oov``, with the phones they were given from ``lexicon/predicted.tsv``), a transcript
the normalisation rewrote (``verbalised``: digits read out, abbreviations expanded), and
a seeded random sample of ordinary labelled clips (``spot_check``). Names are those of
OUT, pseudonymised when the build is: the queue never reads RAW or the private mapping.
"""

from __future__ import annotations

import json
import random
import re
import unicodedata
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.core.errors import UsageError
from pipeline.core.names import (
    PREDICTED_LEXICON,
    REJECTED,
    SUBSETS,
    stage_manifest,
    stage_summary,
    subset_manifest,
)

SPOT_CHECK = "spot_check"
OOV = "oov"
VERBALISED = "verbalised"
_FIGURES = ("snr_db", "bandwidth_hz", "speaking_rate", "rate_z", "clipped_fraction", "duration_s", "speech_ratio",
            "loudness_in_lufs")
# Flags that describe where a clip is rather than a doubt about it: not queued for them alone.
_NOT_QUEUED = frozenset({"heldout_untranscribed"})
_WORD = re.compile(r"[^\W\d_]+(?:'[^\W\d_]+)*")


@dataclass(frozen=True)
class Queue:
    """The queued items (dicts ready for JSON, in queue order) and every servable clip file."""

    items: list[dict[str, Any]]
    audio: dict[str, Path]  # clip_id -> its file under OUT (the server's allow-list)
    ledger_path: Path | None


def _read(out: Path, rel: str, columns: list[str] | None = None) -> list[dict[str, Any]]:
    import pyarrow.parquet as pq

    path = out / rel
    if not path.is_file():
        return []
    return pq.read_table(path, columns=columns).to_pylist()


def plain_words(text: str) -> list[str]:
    """The letter words of a transcript, lower case and without accents: what normalisation
    leaves when it has nothing to read out.

    Examples
    --------
    >>> plain_words("Café at 5, Dr. Ngozi's")
    ['cafe', 'at', 'dr', "ngozi's"]
    """
    folded = "".join(c for c in unicodedata.normalize("NFKD", text.casefold()) if not unicodedata.combining(c))
    return _WORD.findall(folded)


def verbalised(transcript: str | None, norm_text: str | None) -> bool:
    """Whether normalisation changed the words of a transcript (numbers, abbreviations).

    Examples
    --------
    >>> verbalised("It costs 5 dollars.", "it costs five dollars")
    True
    >>> verbalised("Hello, there!", "hello there")
    False
    """
    if not transcript or not norm_text:
        return False
    return plain_words(transcript) != norm_text.split()


def predicted_phones(out: Path) -> dict[str, tuple[str, str]]:
    """word -> (phones, source) from ``lexicon/predicted.tsv`` (empty when absent)."""
    path = out / PREDICTED_LEXICON
    found: dict[str, tuple[str, str]] = {}
    if not path.is_file():
        return found
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        parts = line.split("\t")
        if line.startswith("#") or len(parts) < 4:
            continue
        found[parts[0]] = (parts[1], parts[3])
    return found


def _split_summary(out: Path) -> dict[str, Any]:
    try:
        found = json.loads((out / stage_summary("split")).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return found if isinstance(found, dict) else {}


def _ledger_path(summary: Mapping[str, Any], out: Path) -> Path | None:
    try:
        shown = Path(summary["ledger"]["path"])
    except (KeyError, TypeError):
        return None
    return shown if shown.is_absolute() else out / shown


def _similarities(summary: Mapping[str, Any]) -> dict[str, float]:
    """clip_id -> the highest similarity of a near-duplicate pair it is in."""
    found: dict[str, float] = {}
    for pair in summary.get("near_duplicate_pairs") or []:
        for cid in pair.get("clips", []):
            found[cid] = max(found.get(cid, 0.0), float(pair.get("similarity", 0.0)))
    return found


def _item(row: Mapping[str, Any], audio: Mapping[str, Any], sha: Mapping[str, str], text: Mapping[str, Any] | None,
          words: Mapping[str, tuple[str, str]]) -> dict[str, Any]:
    oov = list(text["oov_words"]) if text else []
    return {
        "clip_id": row["clip_id"], "speaker": row["speaker"], "subset": row.get("subset"),
        "part": row.get("part"), "tiers": list(row.get("tiers") or []), "source_path": row["source_path"],
        "audio_sha256": row["audio_sha256"], "source_sha256": sha.get(audio["source_id"], ""),
        "transcript": text["transcript"] if text else row.get("transcript"),
        "transcript_origin": text.get("transcript_origin") if text else None,
        "norm_text": text["norm_text"] if text else row.get("norm_text"),
        "phones": " ".join(text["phones"]) if text else " ".join(row.get("phones") or []),
        "language": text["language"] if text else "",
        "whole_file": row["clip_id"] == audio["source_id"],
        "flags": list(row.get("quality_flags") or []),
        "figures": {k: row.get(k, audio.get(k)) for k in _FIGURES},
        "sample_rate": row["sample_rate"],
        "near_duplicate_of": row.get("near_duplicate_of"),
        "oov": [{"word": w, "phones": words.get(w, ("", ""))[0], "source": words.get(w, ("", ""))[1]} for w in oov],
        "rejected": None, "why": [],
    }


def build_queue(out: Path, *, spot_checks: int, seed: int) -> Queue:
    """The review queue of ``out`` (see the module docstring); UsageError when OUT has no split.

    ``spot_checks`` ordinary labelled clips are drawn with ``random.Random`` seeded by
    ``seed`` (the build's seed), so the same build and size give the same sample.
    """
    audio_rows = {r["clip_id"]: r for r in _read(out, stage_manifest("audio"))}
    if not audio_rows or not (out / subset_manifest(SUBSETS[0])).is_file():
        raise UsageError(f"OUT {str(out)!r} holds no prepared clips: run `loam prepare` first")
    sha = {r["source_id"]: r["sha256"] for r in _read(out, stage_manifest("ingest"), ["source_id", "sha256"])}
    texts = {r["clip_id"]: r for r in _read(out, stage_manifest("text"))}
    words = predicted_phones(out)
    summary = _split_summary(out)
    similarity = _similarities(summary)
    items: dict[str, dict[str, Any]] = {}
    for subset in SUBSETS:
        for row in _read(out, subset_manifest(subset)):
            items[row["clip_id"]] = _item(row, audio_rows[row["clip_id"]], sha, texts.get(row["clip_id"]), words)
    for rej in _read(out, REJECTED):
        cid = rej.get("clip_id")
        if rej["stage"] == "split" and cid in audio_rows and cid not in items:
            items[cid] = _item(audio_rows[cid], audio_rows[cid], sha, texts.get(cid), words)
            items[cid]["rejected"] = rej["reason"]
            items[cid]["why"].append(f"rejected:{rej['reason']}")
    for cid, item in items.items():
        if cid in similarity:
            item["figures"]["duplicate_similarity"] = similarity[cid]
        item["why"] += [f for f in item["flags"] if f not in _NOT_QUEUED]
        if item["oov"]:
            item["why"].append(OOV)
        if verbalised(item["transcript"], item["norm_text"]):
            item["why"].append(VERBALISED)
    ordinary = sorted(cid for cid, it in items.items() if not it["why"] and it["subset"] == SUBSETS[0])
    for cid in random.Random(f"loam review {seed}").sample(ordinary, min(spot_checks, len(ordinary))):
        items[cid]["why"].append(SPOT_CHECK)
    queued = [it for _, it in sorted(items.items()) if it["why"]]
    audio = {cid: out / r["audio_path"] for cid, r in audio_rows.items()}
    return Queue(queued, audio, _ledger_path(summary, out))
