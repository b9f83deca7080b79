"""Split stage: labelled, unlabelled and held-out subsets, split by group, kept stable by a ledger.

Inputs are the audio stage's clips and the text stage's accepted transcripts. The
stage

1. groups clips by ``split.group_by`` (speaker, recording = source file, or clip)
   and binds near-duplicate and byte-identical clips into one group, so copies can
   never straddle held-out and training;
2. applies the quality gates of ``[quality]`` (noisy, narrowband, speaking-rate
   outlier, clipped, see :mod:`pipeline.stages.gates`): each flags its clips, and a gate whose
   action is "demote" (by default noisy and speaking-rate outlier) keeps them out of
   labelled and out of held-out scoring, one whose action is "reject" sets them aside;
3. holds out whole groups, chosen in a seeded hash order (see
   :func:`group_rank_key`) until the held-out target is reached;
4. fills the nested labelled tiers from the training groups
   (:mod:`pipeline.stages.selection`) and puts every other training clip in unlabelled;
5. reads and rewrites the split ledger (:mod:`pipeline.stages.ledger`), so a rebuild keeps
   every earlier assignment: a held-out clip never moves into training, and a
   labelled clip leaves a tier only when its budget shrinks.

Held-out ranking. Group ``g`` (its id as text, UTF-8) under ``seed`` has the key
``hashlib.sha256(f"{seed}\\t{g}".encode("utf-8")).hexdigest()``; groups are taken
in ascending order of that hex digest. ``docs/split.md`` works an example.
"""

from __future__ import annotations

import hashlib
import math
import re
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from pipeline.core import names
from pipeline.core.config import Config, parse_duration_s
from pipeline.core.errors import DataError, UsageError
from pipeline.core.manifest import table_from_rows, validate_table
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.signal.fingerprint import decode_fingerprint, find_near_duplicates
from pipeline.stages import gates
from pipeline.stages.ledger import ClipRecord, Ledger, locate_ledger, read_ledger, write_ledger
from pipeline.stages.selection import Candidate, TierOutcome, TierPlan, fill_tiers

NAME = "split"


def extra_inputs(ctx: StageContext) -> list[Path]:
    return [locate_ledger(ctx.config, raw=ctx.raw, out=ctx.out)[0]]


def reuse_note(summary: dict[str, Any]) -> str:
    return "split changes: none (audio, text, config and ledger unchanged since the last run)"
SUBSETS = ("labelled", "unlabelled", "heldout")
SUBSET_PATHS = {s: f"manifests/{s}.parquet" for s in SUBSETS}
# The audio stage reports the gain it could not apply because of the peak ceiling;
# below 0.05 dB the shortfall is inaudible. Common practice, no source.
PEAK_LIMITED_MIN_DB = 0.05
# Flags in the order of schemas/subset.schema.json.
FLAG_ORDER = ("upsampled", "peak_limited", "noisy", "narrowband", "rate_outlier", "clipped", "near_duplicate",
              "transcript_rejected", "heldout_untranscribed")
GATES = ("noisy", "narrowband", "rate_outlier", "clipped", "near_duplicate")

_SHARE = re.compile(r"^([0-9]+(?:\.[0-9]+)?)%$")


# ---------------------------------------------------------------------------------------
# Small pure helpers
# ---------------------------------------------------------------------------------------

def heldout_target_s(spec: str, *, transcribed_s: float) -> float:
    """The held-out target in seconds: a duration, or a share ("10%") of ``transcribed_s``.

    Examples
    --------
    >>> heldout_target_s("10%", transcribed_s=3600.0), heldout_target_s("2m", transcribed_s=0.0)
    (360.0, 120.0)
    """
    m = _SHARE.match(spec)
    if m:
        return float(m.group(1)) / 100.0 * transcribed_s
    return parse_duration_s(spec)


def group_rank_key(group_id: str, *, seed: int) -> str:
    """Held-out ranking key: hex SHA-256 of ``f"{seed}\\t{group_id}"`` in UTF-8.

    Groups are considered for held-out in ascending order of this key. It depends
    on nothing but the seed and the group's own id, so adding a group never
    reorders the others.

    Examples
    --------
    >>> group_rank_key("wren", seed=7) == hashlib.sha256(b"7\\twren").hexdigest()
    True
    """
    return hashlib.sha256(f"{seed}\t{group_id}".encode()).hexdigest()


def rank_groups(group_ids: Iterable[str], *, seed: int) -> list[str]:
    """``group_ids`` in held-out ranking order (ascending :func:`group_rank_key`)."""
    return sorted(set(group_ids), key=lambda g: (group_rank_key(g, seed=seed), g))


def choose_heldout(
    eligible_s: Mapping[str, float],
    *,
    seed: int,
    target_s: float,
    heldout_s: float = 0.0,
    training_groups: int = 0,
) -> list[str]:
    """Groups to hold out, taken in ranking order until the held-out target is reached.

    Parameters
    ----------
    eligible_s : Mapping[str, float]
        Undecided groups and their eligible transcribed seconds; groups with none
        are never held out.
    seed : int
        The corpus seed (see :func:`group_rank_key`).
    target_s : float
        Held-out target in eligible transcribed seconds.
    heldout_s : float
        Seconds already held out (groups the ledger fixed).
    training_groups : int
        Groups with eligible transcribed audio already fixed in training. A group is
        never taken when it would leave no such group for training.

    Returns
    -------
    list of str
        The chosen groups, in ranking order.

    Examples
    --------
    >>> choose_heldout({"a": 10.0, "b": 10.0, "c": 10.0}, seed=0, target_s=1000.0)  # never all
    ['c', 'a']
    """
    ranked = [g for g in rank_groups(eligible_s, seed=seed) if eligible_s[g] > 0]
    chosen: list[str] = []
    for k, g in enumerate(ranked):
        if heldout_s >= target_s:
            break
        if training_groups + len(ranked) - k - 1 < 1:
            break
        chosen.append(g)
        heldout_s += eligible_s[g]
    return chosen


def merge_groups(base_groups: Sequence[str], pairs: Iterable[tuple[int, int]]) -> list[str]:
    """Bind the groups of paired items together; each merged group takes its smallest id.

    Parameters
    ----------
    base_groups : Sequence[str]
        One group id per item.
    pairs : Iterable[tuple[int, int]]
        Indices of items that must share a group.

    Returns
    -------
    list of str
        The merged group id of every item.

    Examples
    --------
    >>> merge_groups(["b", "c", "a", "d"], [(0, 1), (1, 2)])
    ['a', 'a', 'a', 'd']
    """
    # Union-find with path halving: near-linear, and for a few thousand pairs cheaper
    # than importing scipy.sparse.csgraph for connected_components.
    parent = {g: g for g in base_groups}

    def root(g: str) -> str:
        while parent[g] != g:
            parent[g] = parent[parent[g]]
            g = parent[g]
        return g

    for i, j in pairs:
        a, b = root(base_groups[i]), root(base_groups[j])
        if a != b:
            # The smaller id becomes the root, so every merged group is named by its smallest.
            parent[max(a, b)] = min(a, b)
    return [root(g) for g in base_groups]


def match_tiers(old: Sequence[str], new: Sequence[str], *, seconds: Mapping[str, float]) -> dict[str, str]:
    """Which ledger tier each configured tier continues: ``{new name: old name}``.

    A budget keeps its tier when its text is unchanged; the budgets whose text
    changed are paired in size order (so "1h" edited to "30m" is a shrink of that
    tier). Configured budgets left over are new tiers.

    Examples
    --------
    >>> s = {"15m": 900.0, "30m": 1800.0, "1h": 3600.0, "4h": 14400.0}
    >>> match_tiers(["15m", "1h", "4h"], ["15m", "30m", "4h"], seconds=s)
    {'15m': '15m', '30m': '1h', '4h': '4h'}
    """
    same = set(old) & set(new)
    mapping = {n: n for n in sorted(same)}
    rest_old = sorted((o for o in old if o not in same), key=lambda t: (seconds[t], t))
    rest_new = sorted((n for n in new if n not in same), key=lambda t: (seconds[t], t))
    mapping.update(zip(rest_new, rest_old, strict=False))  # unpaired leftovers are new or gone
    return dict(sorted(mapping.items()))


# ---------------------------------------------------------------------------------------
# Clips
# ---------------------------------------------------------------------------------------

@dataclass
class Clip:
    """One audio row joined with its transcript, and what the stage finds out about it."""

    audio: dict[str, Any]
    text: dict[str, Any] | None
    base_group: str = ""
    group: str = ""
    flags: set[str] = field(default_factory=set)
    plain_phones: tuple[str, ...] = ()
    speaking_rate: float | None = None
    rate_z: float | None = None
    near_duplicate_of: str | None = None
    eligible: bool = False
    rejected: bool = False

    @property
    def clip_id(self) -> str:
        return self.audio["clip_id"]

    @property
    def speaker(self) -> str:
        return self.audio["speaker"]

    @property
    def duration_s(self) -> float:
        return float(self.audio["duration_s"])

    @property
    def transcribed(self) -> bool:
        return self.text is not None


def _finite(value: Any) -> float | None:
    return None if value is None or not math.isfinite(value) else float(value)


def load_clips(audio: pa.Table, text: pa.Table, *, word_boundary: str) -> tuple[list[Clip], list[np.ndarray], int]:
    """Audio rows joined with text rows, sorted by clip_id; also the decoded fingerprints.

    Returns the clips, one fingerprint per clip, and the number of text rows whose
    clip has no audio row (their audio was rejected upstream).
    """
    audio = audio.sort_by("clip_id")
    fingerprints = [decode_fingerprint(s) for s in audio.column("fingerprint").to_pylist()]
    rows = audio.drop_columns(["fingerprint"]).to_pylist()
    texts: dict[str, dict[str, Any]] = {}
    for t in text.to_pylist():
        if t["clip_id"] in texts:
            raise DataError(f"stages/text.parquet: clip {t['clip_id']} has two transcript rows; expected one")
        texts[t["clip_id"]] = t
    clips = []
    for prev, row in zip([None, *rows], rows, strict=False):
        if prev is not None and prev["clip_id"] == row["clip_id"]:
            raise DataError(f"stages/audio.parquet: clip {row['clip_id']} has two rows; expected one")
        clip = Clip(audio=row, text=texts.get(row["clip_id"]))
        if clip.text is not None:
            clip.plain_phones = tuple(p for p in clip.text["phones"] if p != word_boundary or not word_boundary)
        elif row["transcribed"]:
            clip.flags.add("transcript_rejected")
        if row["upsampled_from"] is not None:
            clip.flags.add("upsampled")
        if row["peak_limited_db"] > PEAK_LIMITED_MIN_DB:
            clip.flags.add("peak_limited")
        clips.append(clip)
    orphans = len(set(texts) - {c.clip_id for c in clips})
    return clips, fingerprints, orphans


@dataclass(frozen=True)
class DuplicatePair:
    first: int
    second: int
    similarity: float
    identical: bool


def find_duplicates(clips: Sequence[Clip], fingerprints: Sequence[np.ndarray], *, min_similarity: float) -> list[DuplicatePair]:
    """Near-duplicate pairs by fingerprint plus byte-identical pairs by audio_sha256.

    Identical clips are paired with the first (smallest id) of their kind, which is
    enough to bind them and to name the best match of each. Sets ``near_duplicate``
    flags and ``near_duplicate_of`` (the partner with the highest similarity, ties
    to the smaller clip id).
    """
    best: dict[tuple[int, int], DuplicatePair] = {}
    for i, j, sim in find_near_duplicates(fingerprints, min_similarity=min_similarity):
        best[(i, j)] = DuplicatePair(i, j, float(sim), False)
    by_hash: dict[str, list[int]] = defaultdict(list)
    for k, c in enumerate(clips):
        by_hash[c.audio["audio_sha256"]].append(k)
    for members in by_hash.values():
        for j in members[1:]:
            best[(members[0], j)] = DuplicatePair(members[0], j, 1.0, True)
    pairs = [best[k] for k in sorted(best)]
    partner: dict[int, tuple[float, str]] = {}
    for p in pairs:
        for me, other in ((p.first, p.second), (p.second, p.first)):
            mine = (-p.similarity, clips[other].clip_id)
            if me not in partner or mine < partner[me]:
                partner[me] = mine
    for k, (_neg, other_id) in partner.items():
        clips[k].flags.add("near_duplicate")
        clips[k].near_duplicate_of = other_id
    return pairs


def apply_gates(clips: Sequence[Clip], *, min_snr_db: float, min_bandwidth_hz: float, rate_max_abs_z: float,
                rate_min_clips: int, actions: Mapping[str, str], rate_min_spread: float = 0.0,
                max_clipped_fraction: float = 1.0) -> None:
    """Speaking rate and its robust z-score per speaker, the gate flags, and eligibility.

    ``speaking_rate`` is phones (word boundaries left out) per second of speech;
    ``rate_z`` is :func:`pipeline.stages.gates.robust_z_scores` of it within the speaker
    (speakers with fewer than ``rate_min_clips`` transcribed clips are scored
    against all of them). The flags and what they do come from
    :mod:`pipeline.stages.gates`, which ``loam validate`` checks with too: a clip is eligible
    for labelled and held-out scoring when it has a transcript and no gate whose
    action (``actions``, gate to "flag", "demote" or "reject") holds it back flagged it.
    """
    for c in clips:
        speech_s = float(c.audio["speech_s"])
        if c.transcribed and speech_s > 0:
            c.speaking_rate = len(c.plain_phones) / speech_s
    rates = np.array([np.nan if c.speaking_rate is None else c.speaking_rate for c in clips], dtype=np.float64)
    speakers = np.array([c.speaker for c in clips], dtype=object)
    z = (gates.robust_z_scores(rates, speakers, min_group_size=rate_min_clips, min_mad_fraction=rate_min_spread)
         if clips else np.zeros(0))
    flags = gates.gate_flags(
        snr_db=[np.nan if c.audio["snr_db"] is None else c.audio["snr_db"] for c in clips],
        bandwidth_hz=[np.nan if c.audio["bandwidth_hz"] is None else c.audio["bandwidth_hz"] for c in clips],
        rate_z=z, clipped_fraction=[c.audio["clipped_fraction"] for c in clips], min_snr_db=min_snr_db,
        min_bandwidth_hz=min_bandwidth_hz, rate_max_abs_z=rate_max_abs_z, max_clipped_fraction=max_clipped_fraction)
    held = gates.held_back(flags, actions=actions)
    for k, c in enumerate(clips):
        c.rate_z = _finite(z[k])
        c.flags.update(g for g in gates.GATES if flags[g][k])
        c.eligible = c.transcribed and not held[k]


# ---------------------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------------------

def _budgets(budgets: Sequence[str]) -> list[tuple[str, float]]:
    counts = Counter(budgets)
    twice = sorted(b for b, n in counts.items() if n > 1)
    if twice:
        raise UsageError(f"key 'split.labelled_budgets' has value {list(budgets)}; allowed: each budget once "
                         f"({', '.join(twice)} appears twice)")
    return sorted(((b, parse_duration_s(b)) for b in budgets), key=lambda bs: (bs[1], bs[0]))


def _too_few_groups(group_by: str, eligible_groups: list[str]) -> DataError:
    found = (f"only {len(eligible_groups)} group ({eligible_groups[0]})" if eligible_groups
             else "no group")
    advice = {
        "speaker": 'For a corpus with one speaker, set split.group_by = "recording" (each source file '
                   'stays whole on one side) or "clip".',
        "recording": 'Set split.group_by = "clip" to split the recordings\' clips apart.',
        "clip": "Add transcribed audio, or set split.heldout = \"0%\" for no held-out subset.",
    }[group_by]
    return DataError(
        f"split: {found} has eligible transcribed audio when grouping by {group_by} (after binding "
        f"near-duplicates); a held-out subset needs at least two groups, one for held-out and one for "
        f"training, so that no {group_by} is on both sides. {advice}"
    )


@dataclass
class Assignment:
    """The outcome of the split before it becomes tables."""

    subset: dict[str, str]
    tiers: dict[str, tuple[str, ...]]
    sides: dict[str, str]
    outcomes: list[TierOutcome]
    straddling: list[str]
    continues: dict[str, str]
    gated_out: int
    waiting: int
    lost_transcript: int


def _known_sides(groups: Mapping[str, list[Clip]], ledger: Ledger | None) -> tuple[dict[str, set[str]], list[str]]:
    """Sides the ledger fixes per group: from its clips, else from its group rows."""
    if ledger is None:
        return {}, []
    fixed: dict[str, set[str]] = {}
    for g, members in groups.items():
        sides = {"heldout" if ledger.clips[c.clip_id].subset == "heldout" else "training"
                 for c in members if c.clip_id in ledger.clips}
        if not sides:
            ids = {g} | {c.base_group for c in members}
            sides = {ledger.groups[i] for i in ids if i in ledger.groups}
        if sides:
            fixed[g] = sides
    straddling = sorted(g for g, s in fixed.items() if len(s) > 1)
    return fixed, straddling


def assign(clips: Sequence[Clip], *, ledger: Ledger | None, seed: int, target_s: float,
           budgets: list[tuple[str, float]], method: str) -> Assignment:
    """Sides for groups, subsets for clips, tiers for labelled clips (see the module docstring)."""
    groups: dict[str, list[Clip]] = defaultdict(list)
    for c in clips:
        groups[c.group].append(c)
    known = ledger.clips if ledger is not None else {}
    fixed, straddling = _known_sides(groups, ledger)

    def goes_heldout(c: Clip, side: str) -> bool:
        rec = known.get(c.clip_id)
        return rec.subset == "heldout" if rec is not None else side == "heldout"

    heldout_s = 0.0
    training_groups = 0
    sides: dict[str, str] = {}
    for g, side_set in fixed.items():
        # A group whose known clips sit on both sides takes its new clips to held-out:
        # a copy of a held-out clip must not be trained on.
        side = "heldout" if "heldout" in side_set else "training"
        sides[g] = side
        eligible = [c for c in groups[g] if c.eligible]
        heldout_s += math.fsum(c.duration_s for c in eligible if goes_heldout(c, side))
        training_groups += any(not goes_heldout(c, side) for c in eligible)
    undecided = {g: math.fsum(c.duration_s for c in members if c.eligible)
                 for g, members in groups.items() if g not in fixed}
    chosen = set(choose_heldout(undecided, seed=seed, target_s=target_s, heldout_s=heldout_s,
                                training_groups=training_groups))
    for g in undecided:
        sides[g] = "heldout" if g in chosen else "training"

    subset: dict[str, str] = {}
    labelled_before: list[str] = []
    new: list[str] = []
    reopened: list[str] = []
    items: dict[str, Candidate] = {}
    lost_transcript = gated_out = 0
    for c in clips:
        rec = known.get(c.clip_id)
        if goes_heldout(c, sides[c.group]):
            subset[c.clip_id] = "heldout"
            continue
        subset[c.clip_id] = "unlabelled"
        if c.transcribed:
            items[c.clip_id] = Candidate(c.clip_id, c.speaker, c.duration_s, c.plain_phones)
        if rec is not None and rec.subset == "labelled":
            # A labelled clip needs a transcript and must pass the gates (loam validate
            # checks both), so one that lost either moves to unlabelled.
            if not c.transcribed:
                lost_transcript += 1
            elif not c.eligible:
                gated_out += 1
            else:
                labelled_before.append(c.clip_id)
        elif c.eligible:
            (reopened if rec is not None else new).append(c.clip_id)

    old_budgets = ledger.budgets if ledger is not None else ()
    seconds = {b: parse_duration_s(b) for b in old_budgets} | dict(budgets)
    continues = match_tiers(old_budgets, [b for b, _ in budgets], seconds=seconds)
    plans = []
    for name, budget_s in budgets:
        old = continues.get(name)
        kept = frozenset(cid for cid in labelled_before if old is not None and old in known[cid].tiers)
        plans.append(TierPlan(name, budget_s, kept,
                              may_drop=old is not None and budget_s < seconds[old],
                              may_reopen=old is None or budget_s > seconds[old]))
    outcomes = fill_tiers(plans, items=items, labelled_before=labelled_before, new=new, reopened=reopened,
                          method=method, seed=seed)
    tiers: dict[str, tuple[str, ...]] = {}
    for outcome in outcomes:
        for cid in outcome.clips:
            tiers[cid] = tiers.get(cid, ()) + (outcome.name,)
    for cid in tiers:
        subset[cid] = "labelled"
    labelled = set(tiers)
    short = any(o.shortfall_s > 0 for o in outcomes)
    waiting = sum(1 for cid in reopened if cid not in labelled) if short else 0
    return Assignment(subset, tiers, sides, outcomes, straddling, continues, gated_out, waiting, lost_transcript)


def _subset_row(c: Clip, subset: str, tiers: tuple[str, ...], *, keep_text: bool) -> dict[str, Any]:
    a = c.audio
    text = c.text if keep_text else None
    flags = set(c.flags)
    if subset == "heldout" and not c.transcribed:
        flags.add("heldout_untranscribed")
    return {
        **{k: a[k] for k in ("clip_id", "speaker", "audio_path", "audio_sha256", "sample_rate", "num_samples",
                             "duration_s", "source_path", "source_start_s", "source_end_s", "loudness_lufs",
                             "loudness_in_lufs", "speech_ratio")},
        "group": c.group,
        "snr_db": _finite(a["snr_db"]),
        "bandwidth_hz": _finite(a["bandwidth_hz"]),
        "transcript": text["transcript"] if text else None,
        "norm_text": text["norm_text"] if text else None,
        "phones": list(text["phones"]) if text else None,
        "subset": subset,
        "tiers": list(tiers),
        "speaking_rate": c.speaking_rate,
        "rate_z": c.rate_z,
        "near_duplicate_of": c.near_duplicate_of,
        "clipped_fraction": float(a["clipped_fraction"]),
        "quality_flags": [f for f in FLAG_ORDER if f in flags],
    }


def _hours(seconds: float) -> float:
    return round(seconds / 3600.0, 4)


def _describe(clips: Sequence[Clip], inventory: set[str]) -> dict[str, Any]:
    phones = set().union(*(set(c.plain_phones) for c in clips)) if clips else set()
    seconds = math.fsum(c.duration_s for c in clips)
    return {
        "clips": len(clips),
        "hours": _hours(seconds),
        "speakers": len({c.speaker for c in clips}),
        "groups": len({c.group for c in clips}),
        "transcribed_clips": sum(c.transcribed for c in clips),
        "phones": len(phones),
        "phone_share": round(len(phones) / len(inventory), 4) if inventory else 0.0,
    }


def _changes(ledger: Ledger | None, assignment: Assignment, present: set[str]) -> dict[str, Any]:
    old = ledger.clips if ledger is not None else {}
    # Tier changes are counted against the tier a ledger tier continues as, so a
    # renamed budget is not reported as every clip leaving and joining.
    renamed = {o: n for n, o in assignment.continues.items()}
    added: Counter[str] = Counter()
    removed: Counter[str] = Counter()
    moved: Counter[str] = Counter()
    joined: Counter[str] = Counter()
    left: Counter[str] = Counter()
    for cid, subset in assignment.subset.items():
        rec = old.get(cid)
        if rec is None:
            added[subset] += 1
            continue
        if rec.subset != subset:
            moved[f"{rec.subset}->{subset}"] += 1
        now = set(assignment.tiers.get(cid, ()))
        before = {renamed.get(t, t) for t in rec.tiers}
        for t in now - before:
            joined[t] += 1
        for t in before - now:
            left[t] += 1
    for cid, rec in old.items():
        if cid not in present:
            removed[rec.subset] += 1
    return {
        "added": {s: added[s] for s in SUBSETS},
        "removed": {s: removed[s] for s in SUBSETS},
        "moved": dict(sorted(moved.items())),
        "tiers_joined": dict(sorted(joined.items())),
        "tiers_left": dict(sorted(left.items())),
        "renamed_tiers": {n: o for n, o in sorted(assignment.continues.items()) if n != o},
        "straddling_groups": assignment.straddling,
        "gated_out": assignment.gated_out,
        "waiting_unlabelled": assignment.waiting,
        "lost_transcript": assignment.lost_transcript,
    }


def _log_changes(ctx: StageContext, changes: dict[str, Any], ledger_path: str, used: bool) -> None:
    def fmt(d: Mapping[str, int]) -> str:
        return ", ".join(f"{k} {v}" for k, v in d.items()) or "none"

    ctx.log.info("split changes against %s: added (%s); removed (%s); moved (%s)",
                 ledger_path if used else "no ledger", fmt(changes["added"]), fmt(changes["removed"]),
                 fmt(changes["moved"]))
    if changes["straddling_groups"]:
        ctx.log.warning("split: %d groups have ledger clips on both sides since new near-duplicates bound them "
                        "(%s); earlier clips keep their subsets and new ones go to held-out; --fresh regroups",
                        len(changes["straddling_groups"]), ", ".join(changes["straddling_groups"][:5]))
    if changes["gated_out"]:
        ctx.log.warning("split: %d labelled clips of the ledger now fail a quality gate and moved to "
                        "unlabelled (see their flags)", changes["gated_out"])
    if changes["waiting_unlabelled"]:
        ctx.log.warning("split: %d eligible transcribed clips stay unlabelled as the ledger assigned them, "
                        "while a tier is short of its budget; --fresh or a larger budget takes them",
                        changes["waiting_unlabelled"])
    if changes["lost_transcript"]:
        ctx.log.warning("split: %d labelled clips lost their transcript (rejected by the text stage) and "
                        "moved to unlabelled", changes["lost_transcript"])


def _gate_rejects(clips: Sequence[Clip], cfg: Config) -> list[dict[str, Any]]:
    """Set aside the clips that a gate whose action is "reject" flagged (the first such
    gate names the reason), marking them ``rejected``; their reject rows."""
    qc = cfg.quality
    why = {
        "noisy": lambda c: (f"has an estimated SNR (WADA-SNR) of {c.audio['snr_db']:.1f} dB, below "
                            f"quality.min_snr_db = {qc.min_snr_db:g}"),
        "clipped": lambda c: (f"comes from a source with {100 * c.audio['clipped_fraction']:.3f}% of its samples at "
                              f"audio.clip_level, above audio.max_clipped_fraction = "
                              f"{100 * cfg.audio.max_clipped_fraction:g}%"),
    }
    rejects = []
    for gate in gates.rejecting_gates(qc.gate_actions):
        for c in clips:
            if gate in c.flags and not c.rejected:
                c.rejected = True
                path = c.audio["source_path"]
                rejects.append(reject(NAME, path, gate, f"{path}: clip {c.clip_id} {why[gate](c)}; with "
                                      f'quality.{gate}_action = "reject" {gate} clips are set aside', c.clip_id))
    return rejects


def run(ctx: StageContext) -> StageResult:
    cfg = ctx.config
    sc, qc = cfg.split, cfg.quality
    budgets = _budgets(sc.labelled_budgets)
    clips, fingerprints, orphans = load_clips(ctx.inputs["audio"], ctx.inputs["text"],
                                              word_boundary=cfg.text.word_boundary)

    pairs = find_duplicates(clips, fingerprints, min_similarity=qc.near_duplicate_min_similarity)
    del fingerprints
    for c in clips:
        c.base_group = {"speaker": c.speaker, "recording": c.audio["source_id"], "clip": c.clip_id}[sc.group_by]
    merged = merge_groups([c.base_group for c in clips], [(p.first, p.second) for p in pairs])
    for c, g in zip(clips, merged, strict=True):
        c.group = g
    apply_gates(clips, min_snr_db=qc.min_snr_db, min_bandwidth_hz=qc.min_bandwidth_hz,
                rate_max_abs_z=qc.rate_max_abs_z, rate_min_clips=qc.rate_min_clips,
                rate_min_spread=qc.rate_min_spread, actions=qc.gate_actions,
                max_clipped_fraction=cfg.audio.max_clipped_fraction)
    rejects = _gate_rejects(clips, cfg)
    kept = [c for c in clips if not c.rejected]

    eligible_s = math.fsum(c.duration_s for c in kept if c.eligible)
    target_s = heldout_target_s(sc.heldout, transcribed_s=eligible_s)
    eligible_groups = sorted({c.group for c in kept if c.eligible})
    if target_s > 0 and len(eligible_groups) < 2:
        raise _too_few_groups(sc.group_by, eligible_groups)
    if not eligible_groups:
        ctx.log.warning("split: no clip has an eligible transcript; labelled and held-out are empty")

    ledger_path, where = locate_ledger(cfg, raw=ctx.raw, out=ctx.out)
    if where not in ("split.ledger", "beside the config file"):
        ctx.log.info("split ledger: %s (%s)", ledger_path, where)
    fresh = bool(ctx.options.get("fresh"))
    ledger = None if fresh else read_ledger(ledger_path)
    if fresh:
        ctx.log.info("split: --fresh: ignoring the ledger %s and assigning every clip anew", ledger_path)
    if ledger is not None:
        for key, now in (("group_by", sc.group_by), ("seed", str(cfg.seed))):
            if ledger.settings[key] != now:
                ctx.log.warning("split: the ledger was written with %s=%s, the config says %s; earlier "
                                "assignments are kept (--fresh assigns every clip anew)",
                                key, ledger.settings[key], now)

    assignment = assign(kept, ledger=ledger, seed=cfg.seed, target_s=target_s, budgets=budgets,
                        method=sc.selection)

    by_subset: dict[str, list[Clip]] = {s: [] for s in SUBSETS}
    for c in kept:
        by_subset[assignment.subset[c.clip_id]].append(c)
    tables = {}
    for s in SUBSETS:
        rows = [_subset_row(c, s, assignment.tiers.get(c.clip_id, ()),
                            keep_text=s != "unlabelled" or sc.keep_transcripts) for c in by_subset[s]]
        tables[SUBSET_PATHS[s]] = ("subset", table_from_rows("subset", rows))
    # Check the tables before the ledger records them; the runner writes them later.
    for rel, (schema, table) in tables.items():
        validate_table(schema, table, where=str(ctx.out / rel))

    durations = {c.clip_id: c.duration_s for c in kept}
    for outcome in assignment.outcomes:
        if outcome.dropped:
            ctx.log.info("split: budget %s is smaller than the ledger's %s: %d clips (%.1f s) left tier %s, "
                         "the last added first", outcome.name, assignment.continues[outcome.name],
                         len(outcome.dropped), math.fsum(durations[c] for c in outcome.dropped), outcome.name)
    shortfalls = []
    for outcome in assignment.outcomes:
        if outcome.shortfall_s > 0:
            shortfalls.append({"tier": outcome.name, "budget_s": round(outcome.budget_s, 3),
                               "selected_s": round(outcome.total_s, 3), "shortfall_s": round(outcome.shortfall_s, 3)})
            ctx.log.warning("split: tier %s holds %.1f s, %.1f s short of its budget: the training groups "
                            "have no more eligible transcribed clips", outcome.name, outcome.total_s,
                            outcome.shortfall_s)

    present = {c.clip_id for c in kept}
    new_ledger = _next_ledger(ledger, assignment, kept, cfg_settings={
        "group_by": sc.group_by, "seed": str(cfg.seed), "heldout": sc.heldout,
        "budgets": ",".join(b for b, _ in budgets) or "-", "selection": sc.selection})
    write_ledger(ledger_path, new_ledger)
    changes = _changes(ledger, assignment, present)
    _log_changes(ctx, changes, str(ledger_path), ledger is not None)

    summary = _summary(kept, clips, assignment, pairs, by_subset, target_s=target_s, eligible_s=eligible_s,
                       group_by=sc.group_by, orphans=orphans,
                       rejected={f"rejected_{g}": sum(r["reason"] == g for r in rejects) for g in ("noisy", "clipped")})
    summary["changes"] = changes
    summary["shortfalls"] = shortfalls
    # Inside OUT the path is given from OUT, so the summary does not change with where OUT is.
    shown = ledger_path.relative_to(ctx.out) if ledger_path.is_relative_to(ctx.out) else ledger_path
    summary["ledger"] = {"path": str(shown), "where": where, "read": ledger is not None, "fresh": fresh}
    return StageResult(manifests=tables, rejects=rejects, summary=summary)


def _next_ledger(ledger: Ledger | None, assignment: Assignment, kept: Sequence[Clip],
                 *, cfg_settings: dict[str, str]) -> Ledger:
    groups = dict(assignment.sides)
    if ledger is not None:
        # Keep the side of a group whose clips are all gone, so it returns to the same side.
        current = set(groups) | {c.base_group for c in kept}
        groups.update({g: side for g, side in ledger.groups.items() if g not in current})
    clips = {c.clip_id: ClipRecord(assignment.subset[c.clip_id], assignment.tiers.get(c.clip_id, ()), c.group)
             for c in kept}
    return Ledger(cfg_settings, groups, clips)


def _summary(kept: Sequence[Clip], clips: Sequence[Clip], assignment: Assignment, pairs: Sequence[DuplicatePair],
             by_subset: Mapping[str, list[Clip]], *, target_s: float, eligible_s: float, group_by: str,
             orphans: int, rejected: dict[str, int]) -> dict[str, Any]:
    inventory = set().union(*(set(c.plain_phones) for c in kept if c.transcribed)) if kept else set()
    subsets = {s: _describe(by_subset[s], inventory) for s in SUBSETS}
    scored = [c for c in by_subset["heldout"] if c.eligible]
    subsets["heldout"]["scored_clips"] = len(scored)
    subsets["heldout"]["scored_hours"] = _hours(math.fsum(c.duration_s for c in scored))
    by_id = {c.clip_id: c for c in kept}
    tiers = {}
    for outcome in assignment.outcomes:
        row = _describe([by_id[cid] for cid in sorted(outcome.clips)], inventory)
        row.update({"budget_s": round(outcome.budget_s, 3), "selected_s": round(outcome.total_s, 3),
                    "shortfall_s": round(outcome.shortfall_s, 3)})
        tiers[outcome.name] = row
    gate_counts = {g: sum(g in c.flags for c in clips) for g in GATES}
    gate_counts.update(rejected)
    notes = {f: sum(f in c.flags for c in kept) for f in ("upsampled", "peak_limited", "transcript_rejected")}
    notes["heldout_untranscribed"] = sum(not c.transcribed for c in by_subset["heldout"])
    notes["orphan_transcripts"] = orphans
    sides = Counter(assignment.sides[g] for g in {c.group for c in kept})
    return {
        "clips": len(kept),
        "hours": _hours(math.fsum(c.duration_s for c in kept)),
        "group_by": group_by,
        "groups": len({c.group for c in kept}),
        "heldout_groups": sides["heldout"],
        "training_groups": sides["training"],
        "eligible_hours": _hours(eligible_s),
        "heldout_target_s": round(target_s, 3),
        "heldout_scored_s": round(math.fsum(c.duration_s for c in scored), 3),
        "phone_inventory": len(inventory),
        "subsets": subsets,
        "tiers": tiers,
        "gates": gate_counts,
        "notes": notes,
        "near_duplicate_pairs": [
            {"clips": [clips[p.first].clip_id, clips[p.second].clip_id], "similarity": round(p.similarity, 4),
             "identical": p.identical} for p in pairs],
    }


STAGE = Stage(
    name=NAME,
    inputs=("audio", "text"),
    # The labelled manifest is the main one: its metadata marks the stage up to date.
    outputs=tuple(Output(names.subset_manifest(subset), schema="subset") for subset in names.SUBSETS),
    # audio for audio.max_clipped_fraction, the threshold of the clipped gate.
    config_sections=("split", "quality", "audio"),
    run=run,
    # The ledger is an input the stage rewrites itself: the runner hashes it after the
    # run, so a rerun with nothing changed is reused, and --fresh always runs the stage.
    inputs_after_run=True,
    run_when_options=("fresh",),
    extra_inputs=extra_inputs,
    reuse_note=reuse_note,
)
