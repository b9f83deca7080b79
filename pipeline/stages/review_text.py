"""Applying review decisions in the text stage: fixed transcripts (origin ``review``),
transcripts marked wrong (a ``review_transcript_wrong`` reject; the audio stays,
untranscribed), and accepted or corrected pronunciations added to the override lexicon.

Kept apart from :mod:`pipeline.stages.review_apply` so the split stage's code version
does not follow the modules only the text stage needs (CMUdict's phone set).
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.stage import StageContext, reject
from pipeline.stages.decisions import (
    TEXT_KINDS,
    Decision,
    Tally,
    effective,
    missing_clip,
    read_decisions,
)
from pipeline.stages.review_apply import decisions_file, shown_path

REVIEW_ORIGIN = "review"  # one of names.TRANSCRIPT_ORIGINS
WRONG = "review_transcript_wrong"


@dataclass
class TextPlan:
    """The text stage's share of the decisions."""

    fixes: dict[str, Decision] = field(default_factory=dict)  # source_id -> fix_transcript
    wrong: dict[str, Decision] = field(default_factory=dict)  # source_id -> wrong_transcript
    words: dict[str, dict[str, tuple[str, ...]]] = field(default_factory=dict)  # language -> word -> phones
    word_decisions: list[Decision] = field(default_factory=list)
    tally: Tally = field(default_factory=Tally)
    path: str = ""


def text_decisions(ctx: StageContext) -> tuple[list[Decision], list[Decision]]:
    """The decisions in force that the text stage applies: clip verdicts of its kinds, and
    the pronunciations (sorted by language and word)."""
    verdicts, words, _ = effective(read_decisions(decisions_file(ctx))[0])
    return ([d for _, d in sorted(verdicts.items()) if d.decision in TEXT_KINDS],
            [d for _, d in sorted(words.items())])


def text_digest(ctx: StageContext) -> bytes:
    """The text stage's share of the decisions file (its ``extra_digest``): a keep or an
    exclusion appended to the file leaves it, and the text stage, as they were."""
    verdicts, words = text_decisions(ctx)
    return json.dumps([asdict(d) for d in (*verdicts, *words)], sort_keys=True, ensure_ascii=False).encode()


def plan_text(ctx: StageContext, ingest: Sequence[Mapping[str, Any]] | pa.Table) -> TextPlan:
    """Match the text stage's decisions against the ingest rows (dicts, or a table read
    only when there are clip verdicts): what it will apply, and (counted in its tally)
    what it cannot apply. The split stage counts the lines nobody could read and those a
    later line superseded."""
    verdicts, words = text_decisions(ctx)
    plan = TextPlan(path=shown_path(ctx, decisions_file(ctx)))
    rows = (ingest.to_pylist() if isinstance(ingest, pa.Table) else ingest) if verdicts else []
    by_id = {r["source_id"]: r for r in rows}
    by_path = {r["source_path"]: r["source_id"] for r in rows}
    for d in verdicts:
        row = by_id.get(d.clip_id)
        if row is None:
            segment = d.clip_id.rsplit("_", 1)[0]
            if segment in by_id:
                plan.tally.skip(d, "not_a_whole_file", f"{d.decision} for clip {d.clip_id} not applied: it is a "
                                "segment of a long recording, and transcripts belong to whole files")
            else:
                plan.tally.skip(d, *missing_clip(d, by_path))
        elif d.source_sha256 and d.source_sha256 != row["sha256"]:
            plan.tally.skip(d, "audio_changed", f"{d.decision} for clip {d.clip_id} not applied: its source's "
                            "SHA-256 is not the one reviewed; review it again")
        else:
            (plan.fixes if d.decision == "fix_transcript" else plan.wrong)[d.clip_id] = d
    for d in words:
        plan.words.setdefault(d.language, {})[d.word] = d.phones
        plan.word_decisions.append(d)
    return plan


def review_items(ingest: pa.Table, plan: TextPlan) -> tuple[pa.Table, list[dict[str, Any]]]:
    """The transcripts to process (fixed ones replacing the found ones; ``origin`` is where
    the transcript now comes from, ``review`` for those, while ``transcript_origin`` stays
    ingest's, which says where the file's language cell is) as a table of ``ingest``'s
    columns and ``origin``, and the ``review_transcript_wrong`` rejects, each sorted by
    source id. Without a verdict to apply, all in Arrow."""
    ingest = ingest.sort_by("source_id")
    schema = ingest.schema.append(pa.field("origin", pa.string()))
    if not plan.wrong and not plan.fixes:
        items = ingest.filter(pc.is_valid(ingest.column("transcript")))
        return items.append_column("origin", items.column("transcript_origin").cast(pa.string())), []
    listed, rejects = _reviewed_items(ingest.to_pylist(), plan)
    return pa.Table.from_pylist(listed, schema=schema), rejects


def _reviewed_items(ingest: Iterable[Mapping[str, Any]], plan: TextPlan) -> tuple[list[dict[str, Any]],
                                                                                    list[dict[str, Any]]]:
    """:func:`review_items` row by row, for the verdicts to apply."""
    items, rejects = [], []
    for r in ingest:
        sid = r["source_id"]
        if sid in plan.wrong:
            d = plan.wrong[sid]
            rejects.append(reject("text", r["source_path"], WRONG, f"{r['source_path']}: transcript of clip {sid} "
                                  f"marked wrong for this audio at review (decisions file line {d.line}); the "
                                  "audio stays, untranscribed", clip_id=sid))
            plan.tally.applied["wrong_transcript"] += 1
        elif sid in plan.fixes:
            items.append({**r, "transcript": plan.fixes[sid].transcript, "origin": REVIEW_ORIGIN})
        elif r["transcript"] is not None:
            items.append({**r, "origin": r["transcript_origin"]})
    return items, rejects


def count_fixes(plan: TextPlan, rejected: Mapping[str, str]) -> None:
    """Count each fix applied, or not applied when the text stage rejected the new transcript
    (``rejected``: source id -> reason)."""
    for sid, d in sorted(plan.fixes.items()):
        if sid in rejected:
            plan.tally.skip(d, "transcript_rejected", f"fix_transcript for clip {sid} not applied: the new "
                            f"transcript was rejected ({rejected[sid]}); see rejected.parquet")
        else:
            plan.tally.applied["fix_transcript"] += 1


def phones_problem(phones: Sequence[str], *, backend: str) -> str:
    """Why reviewed phones do not suit the backend ('' when they do): the english backend
    writes ARPAbet, CMUdict's 39 phones with an optional stress digit.

    Examples
    --------
    >>> phones_problem(["S", "L", "IH1", "P"], backend="english")
    ''
    >>> phones_problem(["s", "l", "ɪ"], backend="english")
    'not ARPAbet phones: s l ɪ'
    """
    if backend != "english":
        return ""
    from pipeline.text.cmudict_index import arpabet_phones

    known = set(arpabet_phones())
    bad = [p for p in phones if p.rstrip("012") not in known]
    return f"not ARPAbet phones: {' '.join(bad)}" if bad else ""


def merged_override(plan: TextPlan, language: str, override: Mapping[str, tuple[str, ...]], *,
                    backend: str) -> dict[str, tuple[str, ...]]:
    """The override lexicon for ``language``: the file's entries, then the reviewed words
    whose phones suit ``backend``. A file entry that differs from a reviewed one wins
    (the file is the explicit choice)."""
    merged = dict(override)
    for word, phones in plan.words.get(language, {}).items():
        if not phones_problem(phones, backend=backend):
            merged.setdefault(word, phones)
    return merged


def count_words(plan: TextPlan, overrides: Mapping[str, tuple[str, Mapping[str, tuple[str, ...]]]]) -> None:
    """Count the pronunciation decisions: applied when the language's override lexicon in
    force holds the reviewed phones (``overrides``: language -> (backend, override lexicon))."""
    for d in plan.word_decisions:
        backend, lexicon = overrides.get(d.language, ("", None))
        if lexicon is None:
            plan.tally.skip(d, "clip_gone", f"pronunciation of {d.word!r} not applied: no transcript in "
                            f"language {d.language!r} in this build")
        elif problem := phones_problem(d.phones, backend=backend):
            plan.tally.skip(d, "invalid_phones", f"pronunciation of {d.word!r} not applied: {problem}")
        elif tuple(lexicon.get(d.word, ())) != d.phones:
            plan.tally.skip(d, "override_conflict", f"pronunciation of {d.word!r} not applied: "
                            f"text.override_lexicon gives {' '.join(lexicon[d.word])!r}")
        else:
            plan.tally.applied["pronunciation"] += 1
