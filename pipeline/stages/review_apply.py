"""Applying review decisions (:mod:`pipeline.stages.decisions`) in the text and split stages.

The text stage takes fixed transcripts (origin ``review``), turns a transcript marked
wrong into a ``review_transcript_wrong`` reject (the audio stays, untranscribed), and adds
accepted or corrected pronunciations to the override lexicon. The split stage sets
excluded clips aside as ``review_excluded`` rejects carrying the reviewer's reason and note,
and counts the clips kept as they are.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from pipeline.core.stage import StageContext, reject
from pipeline.stages.decisions import (
    SPLIT_KINDS,
    TEXT_KINDS,
    Decision,
    Tally,
    effective,
    locate_decisions,
    missing_clip,
    read_decisions,
)

REVIEW_ORIGIN = "review"  # one of names.TRANSCRIPT_ORIGINS
EXCLUDED = "review_excluded"
WRONG = "review_transcript_wrong"


def decisions_file(ctx: StageContext) -> Path:
    """The build's decisions file (an extra input of the text and split stages)."""
    return locate_decisions(ctx.config, raw=ctx.raw, out=ctx.out)


def shown_path(ctx: StageContext, path: Path) -> str:
    """The path for a summary: from OUT when inside it, so the summary does not depend on where OUT is."""
    return str(path.relative_to(ctx.out)) if path.is_relative_to(ctx.out) else str(path)


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


def plan_text(ctx: StageContext, ingest: Sequence[Mapping[str, Any]]) -> TextPlan:
    """Match the text stage's decisions against the ingest rows: what it will apply, and
    (counted in its tally) what it cannot apply. The split stage counts the lines nobody
    could read and those a later line superseded."""
    verdicts, words = text_decisions(ctx)
    plan = TextPlan(path=shown_path(ctx, decisions_file(ctx)))
    by_id = {r["source_id"]: r for r in ingest}
    by_path = {r["source_path"]: r["source_id"] for r in ingest}
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


def review_items(ingest: Iterable[Mapping[str, Any]], plan: TextPlan) -> tuple[list[dict[str, Any]],
                                                                                list[dict[str, Any]]]:
    """The transcripts to process (fixed ones replacing the found ones; ``origin`` is where
    the transcript now comes from, ``review`` for those, while ``transcript_origin`` stays
    ingest's, which says where the file's language cell is) and the ``review_transcript_wrong`` rejects, each sorted by source id."""
    items, rejects = [], []
    for r in sorted(ingest, key=lambda r: r["source_id"]):
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


def split_exclusions(ctx: StageContext, clips: Sequence[Any]) -> tuple[list[dict[str, Any]], set[str], Tally,
                                                                       str]:
    """The split stage's share: a ``review_excluded`` reject per excluded clip (its
    reason and note in the sentence), the excluded ids, the tally (with the lines that
    could not be read and those superseded), and the file's path.
    ``clips`` have ``clip_id`` and ``audio`` (the audio row)."""
    path = decisions_file(ctx)
    found, bad = read_decisions(path)
    verdicts, _, superseded = effective(found)
    by_id = {c.clip_id: c for c in clips}
    by_path = {c.audio["source_path"]: c.clip_id for c in clips}
    tally, rejects, excluded = Tally(), [], set()
    for line, why in bad:
        tally.skip(None, "unreadable", f"line {line}: not applied: {why}")
    for d in superseded:
        tally.skip(d, "superseded", f"{d.decision} for {d.clip_id or d.word} replaced by a later decision")
    for cid, d in sorted(verdicts.items()):
        if d.decision not in SPLIT_KINDS:
            continue
        c = by_id.get(cid)
        if c is None:
            tally.skip(d, *missing_clip(d, by_path))
            continue
        tally.applied[d.decision] += 1
        if d.decision == "exclude":
            src = c.audio["source_path"]
            why = d.reason or "no reason given"
            note = f"; note: {d.note}" if d.note else ""
            rejects.append(reject("split", src, EXCLUDED, f"{src}: clip {cid} excluded at review ({why}{note}; "
                                  f"decisions file line {d.line})", cid))
            excluded.add(cid)
    return rejects, excluded, tally, shown_path(ctx, path)


def log_tally(ctx: StageContext, stage: str, tally: Tally) -> None:
    """Say how many decisions the stage applied and why the others were not."""
    if not tally.applied and not tally.not_applied:
        return
    applied = ", ".join(f"{n} {k}" for k, n in sorted(tally.applied.items())) or "none"
    ctx.log.info("%s: review decisions applied: %d (%s); not applied: %d", stage, sum(tally.applied.values()),
                 applied, sum(tally.not_applied.values()))
    for sentence in tally.sentences:
        ctx.log.warning("%s: review decision %s", stage, sentence)
