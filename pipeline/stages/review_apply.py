"""Applying review decisions (:mod:`pipeline.stages.decisions`): what the text and split
stages share, and the split stage's part. The split stage sets excluded clips aside as
``review_excluded`` rejects carrying the reviewer's reason and note, and counts the clips
kept as they are; the text stage's part is :mod:`pipeline.stages.review_text`.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pipeline.core.stage import StageContext, reject
from pipeline.stages.decisions import (
    SPLIT_KINDS,
    Tally,
    effective,
    locate_decisions,
    missing_clip,
    read_decisions,
)

EXCLUDED = "review_excluded"


def decisions_file(ctx: StageContext) -> Path:
    """The build's decisions file (an extra input of the split stage; the text stage hashes its share)."""
    return locate_decisions(ctx.config, raw=ctx.raw, out=ctx.out)


def shown_path(ctx: StageContext, path: Path) -> str:
    """The path for a summary: from OUT when inside it, so the summary does not depend on where OUT is."""
    return str(path.relative_to(ctx.out)) if path.is_relative_to(ctx.out) else str(path)


def excluded_clips(ctx: StageContext) -> set[str]:
    """The clips whose last verdict is an exclusion. The split stage leaves them out of
    the pairs that bind groups: an excluded clip is no longer in the corpus, so a copy
    that a reviewer set aside no longer ties the groups of its near-duplicates together
    (keeping one copy of a near-duplicate that bound two held-out parts parts them again)."""
    found, _ = read_decisions(decisions_file(ctx))
    return {cid for cid, d in effective(found)[0].items() if d.decision == "exclude"}


def split_exclusions(ctx: StageContext, clips: Sequence[Any]) -> tuple[list[dict[str, Any]], set[str], Tally,
                                                                       str]:
    """The split stage's share: a ``review_excluded`` reject per excluded clip (its
    reason and note in the sentence), the excluded ids, the tally (with the lines that
    could not be read and those superseded), and the file's path.
    ``clips`` have ``clip_id`` and ``source_path``."""
    path = decisions_file(ctx)
    found, bad = read_decisions(path)
    verdicts, _, superseded = effective(found)
    # Built only when the file holds a decision: two dicts over every clip cost 0.015
    # CPU s of a rebuild at 101,000 clips that has none.
    by_id = {c.clip_id: c for c in clips} if verdicts else {}
    by_path = {c.source_path: c.clip_id for c in clips} if verdicts else {}
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
            src = c.source_path
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
