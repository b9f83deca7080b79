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
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from pipeline.core import names
from pipeline.core.config import Config, parse_duration_s
from pipeline.core.errors import DataError, UsageError
from pipeline.core.manifest import table_from_rows, validate_table
from pipeline.core.names import (
    FLAGS,
    HELDOUT,
    LABELLED,
    SUBSETS,
    UNLABELLED,
    stage_manifest,
    subset_manifest,
)
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.signal.fingerprint import decode_fingerprint, find_near_duplicates
from pipeline.stages import gates
from pipeline.stages.inventory import INVENTORY, ids_path, subset_phones, write_inventory
from pipeline.stages.ledger import (
    ClipRecord,
    Ledger,
    corpus_id,
    locate_ledger,
    read_ledger,
    shares_corpus,
    source_key,
    write_ledger,
)
from pipeline.stages.review_apply import decisions_file, log_tally, split_exclusions
from pipeline.stages.selection import Candidate, TierOutcome, TierPlan, fill_tiers

NAME = "split"


def extra_inputs(ctx: StageContext) -> list[Path]:
    ledger = locate_ledger(ctx.config, raw=ctx.raw, out=ctx.out)[0]
    return [ledger, ids_path(ledger), decisions_file(ctx)]


def reuse_note(summary: dict[str, Any]) -> str:
    return "split changes: none (audio, text, config and ledger unchanged since the last run)"
SUBSET_PATHS = {s: subset_manifest(s) for s in SUBSETS}
# The audio stage reports the gain it could not apply because of the peak ceiling;
# below 0.05 dB the shortfall is inaudible. Common practice, no source.
PEAK_LIMITED_MIN_DB = 0.05
# The flags counted per gate in the summary: the gates of pipeline.stages.gates, and
# near-duplicates, which bind groups rather than gate clips.
GATES = (*gates.GATES, "near_duplicate")

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

@dataclass(frozen=True)
class Clip:
    """One audio row joined with its transcript, and what the stage found out about it.

    Built once, by :func:`build_clips`, when every measure is known.
    """

    audio: dict[str, Any]
    text: dict[str, Any] | None
    base_group: str
    group: str
    flags: frozenset[str]
    plain_phones: tuple[str, ...]
    speaking_rate: float | None
    rate_z: float | None
    near_duplicate_of: str | None
    eligible: bool

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


@dataclass(frozen=True)
class Joined:
    """Audio rows sorted by clip_id, each with its transcript row (or None) and its
    decoded fingerprint; ``orphans`` counts the text rows whose clip has no audio row
    (their audio was rejected upstream)."""

    audio: list[dict[str, Any]]
    text: list[dict[str, Any] | None]
    fingerprints: list[np.ndarray]
    orphans: int


def join_rows(audio: pa.Table, text: pa.Table) -> Joined:
    """Join the audio and text stages' rows by clip_id; DataError for a clip listed twice."""
    audio = audio.sort_by("clip_id")
    fingerprints = [decode_fingerprint(s) for s in audio.column("fingerprint").to_pylist()]
    rows = audio.drop_columns(["fingerprint"]).to_pylist()
    texts: dict[str, dict[str, Any]] = {}
    for t in text.to_pylist():
        if t["clip_id"] in texts:
            raise DataError(f"{stage_manifest('text')}: clip {t['clip_id']} has two transcript rows; expected one")
        texts[t["clip_id"]] = t
    for prev, row in zip([None, *rows], rows, strict=False):
        if prev is not None and prev["clip_id"] == row["clip_id"]:
            raise DataError(f"{stage_manifest('audio')}: clip {row['clip_id']} has two rows; expected one")
    orphans = len(set(texts) - {row["clip_id"] for row in rows})
    return Joined(rows, [texts.get(row["clip_id"]) for row in rows], fingerprints, orphans)


def plain_phones(text: dict[str, Any] | None, *, word_boundary: str) -> tuple[str, ...]:
    """The transcript's phones without word boundaries (none without a transcript)."""
    if text is None:
        return ()
    return tuple(p for p in text["phones"] if p != word_boundary or not word_boundary)


def row_flags(audio: dict[str, Any], text: dict[str, Any] | None) -> set[str]:
    """The flags a clip's own rows decide: upsampled, peak limited, transcript rejected."""
    flags = set()
    if text is None and audio["transcribed"]:
        flags.add("transcript_rejected")
    if audio["upsampled_from"] is not None:
        flags.add("upsampled")
    if audio["peak_limited_db"] > PEAK_LIMITED_MIN_DB:
        flags.add("peak_limited")
    return flags


@dataclass(frozen=True)
class DuplicatePair:
    first: int
    second: int
    similarity: float
    identical: bool


def find_duplicates(rows: Sequence[Mapping[str, Any]], fingerprints: Sequence[np.ndarray], *,
                    min_similarity: float) -> tuple[list[DuplicatePair], dict[int, str]]:
    """Near-duplicate pairs by fingerprint plus byte-identical pairs by audio_sha256.

    Identical clips are paired with the first (smallest id) of their kind, which is
    enough to bind them and to name the best match of each. Also returns, for every
    clip in a pair, its best partner's clip_id (highest similarity, ties to the smaller
    clip id): the clips to flag ``near_duplicate``.
    """
    best: dict[tuple[int, int], DuplicatePair] = {}
    for i, j, sim in find_near_duplicates(fingerprints, min_similarity=min_similarity):
        best[(i, j)] = DuplicatePair(i, j, float(sim), False)
    by_hash: dict[str, list[int]] = defaultdict(list)
    for k, row in enumerate(rows):
        by_hash[row["audio_sha256"]].append(k)
    for members in by_hash.values():
        for j in members[1:]:
            best[(members[0], j)] = DuplicatePair(members[0], j, 1.0, True)
    pairs = [best[k] for k in sorted(best)]
    partner: dict[int, tuple[float, str]] = {}
    for p in pairs:
        for me, other in ((p.first, p.second), (p.second, p.first)):
            mine = (-p.similarity, rows[other]["clip_id"])
            if me not in partner or mine < partner[me]:
                partner[me] = mine
    return pairs, {k: other_id for k, (_neg, other_id) in partner.items()}


@dataclass(frozen=True)
class GateMeasures:
    """Per clip: speaking rate, its robust z-score, the gates that flagged it, and
    whether it is eligible for labelled and held-out scoring."""

    speaking_rate: list[float | None]
    rate_z: list[float | None]
    flags: list[set[str]]
    eligible: list[bool]


def measure_gates(rows: Sequence[Mapping[str, Any]], phones: Sequence[tuple[str, ...]],
                  transcribed: Sequence[bool], *, min_snr_db: float, min_bandwidth_hz: float,
                  rate_max_abs_z: float, rate_min_clips: int, actions: Mapping[str, str],
                  rate_min_spread: float = 0.0, max_clipped_fraction: float = 1.0) -> GateMeasures:
    """Speaking rate and its robust z-score per speaker, the gate flags, and eligibility.

    ``speaking_rate`` is phones (word boundaries left out) per second of speech;
    ``rate_z`` is :func:`pipeline.stages.gates.robust_z_scores` of it within the speaker
    (speakers with fewer than ``rate_min_clips`` transcribed clips are scored
    against all of them). The flags and what they do come from
    :mod:`pipeline.stages.gates`, which ``loam validate`` checks with too: a clip is eligible
    for labelled and held-out scoring when it has a transcript and no gate whose
    action (``actions``, gate to "flag", "demote" or "reject") holds it back flagged it.
    """
    speaking = [len(p) / float(r["speech_s"]) if t and float(r["speech_s"]) > 0 else None
                for r, p, t in zip(rows, phones, transcribed, strict=True)]
    rates = np.array([np.nan if s is None else s for s in speaking], dtype=np.float64)
    speakers = np.array([r["speaker"] for r in rows], dtype=object)
    z = (gates.robust_z_scores(rates, speakers, min_group_size=rate_min_clips, min_mad_fraction=rate_min_spread)
         if rows else np.zeros(0))
    flags = gates.gate_flags(
        snr_db=[np.nan if r["snr_db"] is None else r["snr_db"] for r in rows],
        bandwidth_hz=[np.nan if r["bandwidth_hz"] is None else r["bandwidth_hz"] for r in rows],
        rate_z=z, clipped_fraction=[r["clipped_fraction"] for r in rows], min_snr_db=min_snr_db,
        min_bandwidth_hz=min_bandwidth_hz, rate_max_abs_z=rate_max_abs_z, max_clipped_fraction=max_clipped_fraction)
    held = gates.held_back(flags, actions=actions)
    return GateMeasures(
        speaking_rate=speaking,
        rate_z=[_finite(z[k]) for k in range(len(rows))],
        flags=[{g for g in gates.GATES if flags[g][k]} for k in range(len(rows))],
        eligible=[bool(t and not held[k]) for k, t in enumerate(transcribed)])


def build_clips(joined: Joined, cfg: Config) -> tuple[list[Clip], list[DuplicatePair]]:
    """Every joined row as a Clip: groups bound by duplicates, gate measures and flags.

    Returns the clips in clip_id order and the duplicate pairs (indices into them).
    """
    qc, group_by = cfg.quality, cfg.split.group_by
    rows, texts = joined.audio, joined.text
    phones = [plain_phones(t, word_boundary=cfg.text.word_boundary) for t in texts]
    pairs, partners = find_duplicates(rows, joined.fingerprints, min_similarity=qc.near_duplicate_min_similarity)
    base = [{"speaker": r["speaker"], "recording": r["source_id"], "clip": r["clip_id"]}[group_by] for r in rows]
    merged = merge_groups(base, [(p.first, p.second) for p in pairs])
    measured = measure_gates(rows, phones, [t is not None for t in texts], min_snr_db=qc.min_snr_db,
                             min_bandwidth_hz=qc.min_bandwidth_hz, rate_max_abs_z=qc.rate_max_abs_z,
                             rate_min_clips=qc.rate_min_clips, rate_min_spread=qc.rate_min_spread,
                             actions=qc.gate_actions, max_clipped_fraction=cfg.audio.max_clipped_fraction)
    clips = []
    for k, (row, text) in enumerate(zip(rows, texts, strict=True)):
        flags = row_flags(row, text) | measured.flags[k] | ({"near_duplicate"} if k in partners else set())
        clips.append(Clip(audio=row, text=text, base_group=base[k], group=merged[k], flags=frozenset(flags),
                          plain_phones=phones[k], speaking_rate=measured.speaking_rate[k],
                          rate_z=measured.rate_z[k], near_duplicate_of=partners.get(k),
                          eligible=measured.eligible[k]))
    return clips, pairs


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
        sides = {"heldout" if ledger.clips[c.clip_id].subset == HELDOUT else "training"
                 for c in members if c.clip_id in ledger.clips}
        if not sides:
            ids = {g} | {c.base_group for c in members}
            sides = {ledger.groups[i] for i in ids if i in ledger.groups}
        if sides:
            fixed[g] = sides
    straddling = sorted(g for g, s in fixed.items() if len(s) > 1)
    return fixed, straddling


def _goes_heldout(c: Clip, side: str, known: Mapping[str, ClipRecord]) -> bool:
    """Whether a clip is held out: as the ledger recorded it, else as its group's side."""
    rec = known.get(c.clip_id)
    return rec.subset == HELDOUT if rec is not None else side == HELDOUT


def _choose_sides(groups: Mapping[str, list[Clip]], ledger: Ledger | None, *, seed: int,
                  target_s: float) -> tuple[dict[str, str], list[str]]:
    """Each group's side ("heldout" or "training"): the ledger's where it fixes one, else
    chosen in ranking order until the held-out target is met; also the straddling groups."""
    known = ledger.clips if ledger is not None else {}
    fixed, straddling = _known_sides(groups, ledger)
    heldout_s = 0.0
    training_groups = 0
    sides: dict[str, str] = {}
    for g, side_set in fixed.items():
        # A group whose known clips sit on both sides takes its new clips to held-out:
        # a copy of a held-out clip must not be trained on.
        side = HELDOUT if HELDOUT in side_set else "training"
        sides[g] = side
        eligible = [c for c in groups[g] if c.eligible]
        heldout_s += math.fsum(c.duration_s for c in eligible if _goes_heldout(c, side, known))
        training_groups += any(not _goes_heldout(c, side, known) for c in eligible)
    undecided = {g: math.fsum(c.duration_s for c in members if c.eligible)
                 for g, members in groups.items() if g not in fixed}
    chosen = set(choose_heldout(undecided, seed=seed, target_s=target_s, heldout_s=heldout_s,
                                training_groups=training_groups))
    for g in undecided:
        sides[g] = HELDOUT if g in chosen else "training"
    return sides, straddling


@dataclass(frozen=True)
class Sorted:
    """Clips sorted by their past: the subset each gets before tiers are filled, the
    transcribed training candidates, and the eligible ones by what the ledger says."""

    subset: dict[str, str]
    items: dict[str, Candidate]
    labelled_before: list[str]
    new: list[str]
    reopened: list[str]
    gated_out: int
    lost_transcript: int


def _sort_clips(clips: Sequence[Clip], sides: Mapping[str, str], known: Mapping[str, ClipRecord]) -> Sorted:
    subset: dict[str, str] = {}
    labelled_before: list[str] = []
    new: list[str] = []
    reopened: list[str] = []
    items: dict[str, Candidate] = {}
    lost_transcript = gated_out = 0
    for c in clips:
        rec = known.get(c.clip_id)
        if _goes_heldout(c, sides[c.group], known):
            subset[c.clip_id] = HELDOUT
            continue
        subset[c.clip_id] = UNLABELLED
        if c.transcribed:
            items[c.clip_id] = Candidate(c.clip_id, c.speaker, c.duration_s, c.plain_phones)
        if rec is not None and rec.subset == LABELLED:
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
    return Sorted(subset, items, labelled_before, new, reopened, gated_out, lost_transcript)


def _tier_plans(budgets: list[tuple[str, float]], ledger: Ledger | None,
                labelled_before: Sequence[str]) -> tuple[list[TierPlan], dict[str, str]]:
    """One plan per configured budget, continuing the ledger tier it matches; also
    which ledger tier each budget continues."""
    known = ledger.clips if ledger is not None else {}
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
    return plans, continues


def assign(clips: Sequence[Clip], *, ledger: Ledger | None, seed: int, target_s: float,
           budgets: list[tuple[str, float]], method: str) -> Assignment:
    """Sides for groups, subsets for clips, tiers for labelled clips (see the module docstring)."""
    groups: dict[str, list[Clip]] = defaultdict(list)
    for c in clips:
        groups[c.group].append(c)
    sides, straddling = _choose_sides(groups, ledger, seed=seed, target_s=target_s)
    found = _sort_clips(clips, sides, ledger.clips if ledger is not None else {})
    plans, continues = _tier_plans(budgets, ledger, found.labelled_before)
    outcomes = fill_tiers(plans, items=found.items, labelled_before=found.labelled_before, new=found.new,
                          reopened=found.reopened, method=method, seed=seed)
    tiers: dict[str, tuple[str, ...]] = {}
    for outcome in outcomes:
        for cid in outcome.clips:
            tiers[cid] = tiers.get(cid, ()) + (outcome.name,)
    subset = dict(found.subset)
    for cid in tiers:
        subset[cid] = LABELLED
    short = any(o.shortfall_s > 0 for o in outcomes)
    waiting = sum(1 for cid in found.reopened if cid not in tiers) if short else 0
    return Assignment(subset, tiers, sides, outcomes, straddling, continues, found.gated_out, waiting,
                      found.lost_transcript)


def _subset_row(c: Clip, subset: str, tiers: tuple[str, ...], *, keep_text: bool) -> dict[str, Any]:
    a = c.audio
    text = c.text if keep_text else None
    flags = set(c.flags)
    if subset == HELDOUT and not c.transcribed:
        flags.add("heldout_untranscribed")
    return {
        **{k: a[k] for k in ("clip_id", "speaker", "audio_path", "audio_sha256", "sample_rate", "num_samples",
                             "duration_s", "source_path", "source_start_s", "source_end_s", "loudness_lufs",
                             "loudness_in_lufs", "speech_ratio")},
        "group": c.group,
        "snr_db": _finite(a["snr_db"]),
        "bandwidth_hz": _finite(a["bandwidth_hz"]),
        "transcript": text["transcript"] if text else None,
        "transcript_origin": text["transcript_origin"] if text else None,
        "norm_text": text["norm_text"] if text else None,
        "phones": list(text["phones"]) if text else None,
        "subset": subset,
        "tiers": list(tiers),
        "speaking_rate": c.speaking_rate,
        "rate_z": c.rate_z,
        "near_duplicate_of": c.near_duplicate_of,
        "clipped_fraction": float(a["clipped_fraction"]),
        "quality_flags": [f for f in FLAGS if f in flags],
        # Eligible means transcribed and not held back by a gate; the row must also
        # carry its transcript and phones (unlabelled rows may drop them).
        "scorable": bool(c.eligible and text is not None and c.plain_phones),
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

    ctx.log.info("split changes against %s: added (%s); gone, kept in the ledger (%s); moved (%s); "
                 "sources gone %d, returned %d",
                 ledger_path if used else "no ledger", fmt(changes["added"]), fmt(changes["removed"]),
                 fmt(changes["moved"]), changes["gone_sources"], changes["returned_sources"])
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


def _gate_rejects(clips: Sequence[Clip], cfg: Config) -> tuple[list[dict[str, Any]], list[Clip]]:
    """Set aside the clips that a gate whose action is "reject" flagged (the first such
    gate names the reason); their reject rows, and the clips kept."""
    qc = cfg.quality
    why = {
        "noisy": lambda c: (f"has an estimated SNR (WADA-SNR) of {c.audio['snr_db']:.1f} dB, below "
                            f"quality.min_snr_db = {qc.min_snr_db:g}"),
        "clipped": lambda c: (f"comes from a source with {100 * c.audio['clipped_fraction']:.3f}% of its samples at "
                              f"audio.clip_level, above audio.max_clipped_fraction = "
                              f"{100 * cfg.audio.max_clipped_fraction:g}%"),
    }
    rejects = []
    rejected: set[str] = set()
    for gate in gates.rejecting_gates(qc.gate_actions):
        for c in clips:
            if gate in c.flags and c.clip_id not in rejected:
                rejected.add(c.clip_id)
                path = c.audio["source_path"]
                rejects.append(reject(NAME, path, gate, f"{path}: clip {c.clip_id} {why[gate](c)}; with "
                                      f'quality.{gate}_action = "reject" {gate} clips are set aside', c.clip_id))
    return rejects, [c for c in clips if c.clip_id not in rejected]


def _heldout_target(ctx: StageContext, kept: Sequence[Clip]) -> tuple[float, float]:
    """The eligible transcribed seconds and the held-out target; DataError when a
    held-out subset is wanted but fewer than two groups could share the audio."""
    sc = ctx.config.split
    eligible_s = math.fsum(c.duration_s for c in kept if c.eligible)
    target_s = heldout_target_s(sc.heldout, transcribed_s=eligible_s)
    eligible_groups = sorted({c.group for c in kept if c.eligible})
    if target_s > 0 and len(eligible_groups) < 2:
        raise _too_few_groups(sc.group_by, eligible_groups)
    if not eligible_groups:
        ctx.log.warning("split: no clip has an eligible transcript; labelled and held-out are empty")
    return eligible_s, target_s


@dataclass(frozen=True)
class LedgerUse:
    """Where the ledger is, how it was found, whether --fresh ignores it, and what it holds."""

    path: Path
    where: str
    fresh: bool
    ledger: Ledger | None


def _check_corpus(ctx: StageContext, ledger: Ledger, path: Path, sources: set[str]) -> None:
    """UsageError (exit 2) when the ledger describes another corpus (see
    :func:`pipeline.stages.ledger.shares_corpus`); the ledger is left as it is."""
    if shares_corpus(ledger.sources, sources):
        return
    shared = len(set(ledger.sources) & sources)
    raise UsageError(
        f"{path}: this split ledger describes corpus {corpus_id(ledger.sources)} ({len(ledger.sources)} sources), "
        f"but RAW {ctx.raw} is corpus {corpus_id(sources)} ({len(sources)} sources), sharing {shared}; "
        "expected at least half of the smaller set shared. The ledger is unchanged: set split.ledger to "
        "another path for this corpus, or run with --fresh to assign every clip anew and overwrite it"
    )


def _open_ledger(ctx: StageContext, sources: set[str]) -> LedgerUse:
    """Find and read the split ledger (unless --fresh), refusing one of another corpus
    and warning when its settings differ."""
    cfg = ctx.config
    ledger_path, where = locate_ledger(cfg, raw=ctx.raw, out=ctx.out)
    if where not in ("split.ledger", "beside the config file"):
        ctx.log.info("split ledger: %s (%s)", ledger_path, where)
    fresh = bool(ctx.options.get("fresh"))
    ledger = None if fresh else read_ledger(ledger_path)
    if fresh:
        ctx.log.info("split: --fresh: ignoring the ledger %s and assigning every clip anew", ledger_path)
    if ledger is not None:
        _check_corpus(ctx, ledger, ledger_path, sources)
        for key, now in (("group_by", cfg.split.group_by), ("seed", str(cfg.seed))):
            if ledger.settings[key] != now:
                ctx.log.warning("split: the ledger was written with %s=%s, the config says %s; earlier "
                                "assignments are kept (--fresh assigns every clip anew)",
                                key, ledger.settings[key], now)
    return LedgerUse(ledger_path, where, fresh, ledger)


def _subset_tables(ctx: StageContext, by_subset: Mapping[str, list[Clip]],
                   assignment: Assignment) -> dict[str, tuple[str, pa.Table]]:
    """The subset manifests, checked against their schema before the ledger records them
    (the runner writes them later)."""
    tables = {}
    for s in SUBSETS:
        rows = [_subset_row(c, s, assignment.tiers.get(c.clip_id, ()),
                            keep_text=s != UNLABELLED or ctx.config.split.keep_transcripts) for c in by_subset[s]]
        tables[subset_manifest(s)] = ("subset", table_from_rows("subset", rows))
    for rel, (schema, table) in tables.items():
        validate_table(schema, table, where=str(ctx.out / rel))
    return tables


def _log_tiers(ctx: StageContext, assignment: Assignment, kept: Sequence[Clip]) -> list[dict[str, Any]]:
    """Log the clips shrunk budgets dropped and the tiers short of their budget; the shortfalls."""
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
    return shortfalls


def run(ctx: StageContext) -> StageResult:
    """Group, gate, hold out, fill the tiers and record the ledger (see the module docstring)."""
    cfg = ctx.config
    sc = cfg.split
    budgets = _budgets(sc.labelled_budgets)
    joined = join_rows(ctx.inputs["audio"], ctx.inputs["text"])
    clips, pairs = build_clips(joined, cfg)
    orphans = joined.orphans
    del joined
    # Clips excluded at review are set aside first: the reviewer's reason is the one recorded.
    rejects, excluded, review, review_path = split_exclusions(ctx, clips)
    gate_rejects, kept = _gate_rejects([c for c in clips if c.clip_id not in excluded], cfg)
    rejects += gate_rejects
    eligible_s, target_s = _heldout_target(ctx, kept)
    sources = {source_key(c.audio["source_id"]) for c in clips}
    use = _open_ledger(ctx, sources)
    ledger = use.ledger
    assignment = assign(kept, ledger=ledger, seed=cfg.seed, target_s=target_s, budgets=budgets,
                        method=sc.selection)

    by_subset: dict[str, list[Clip]] = {s: [] for s in SUBSETS}
    for c in kept:
        by_subset[assignment.subset[c.clip_id]].append(c)
    tables = _subset_tables(ctx, by_subset, assignment)
    shortfalls = _log_tiers(ctx, assignment, kept)

    present = {c.clip_id for c in kept}
    new_ledger = _next_ledger(ledger, assignment, kept, sources, cfg_settings={
        "group_by": sc.group_by, "seed": str(cfg.seed), "heldout": sc.heldout,
        "budgets": ",".join(b for b, _ in budgets) or "-", "selection": sc.selection})
    write_ledger(use.path, new_ledger)
    write_inventory(ctx.out, use.path, subset_phones(tables), boundary=cfg.text.word_boundary,
                    classify=cfg.text.backend != "graphemes")
    changes = _changes(ledger, assignment, present)
    changes["gone_sources"] = sum(state == "gone" for state in new_ledger.sources.values())
    changes["returned_sources"] = sum(ledger.sources.get(k) == "gone" for k in sources) if ledger else 0
    _log_changes(ctx, changes, str(use.path), ledger is not None)

    summary = _summary(kept, clips, assignment, pairs, by_subset, target_s=target_s, eligible_s=eligible_s,
                       group_by=sc.group_by, orphans=orphans,
                       rejected={f"rejected_{g}": sum(r["reason"] == g for r in rejects)
                                 for g in gates.GATES if "reject" in gates.ACTIONS[g]})
    summary["changes"] = changes
    summary["shortfalls"] = shortfalls
    summary["review"] = review.summary(review_path)
    log_tally(ctx, NAME, review)
    # Inside OUT the path is given from OUT, so the summary does not change with where OUT is.
    shown = use.path.relative_to(ctx.out) if use.path.is_relative_to(ctx.out) else use.path
    summary["ledger"] = {"path": str(shown), "where": use.where, "read": ledger is not None, "fresh": use.fresh}
    return StageResult(manifests=tables, rejects=rejects, summary=summary)


def _next_ledger(ledger: Ledger | None, assignment: Assignment, kept: Sequence[Clip], sources: set[str],
                 *, cfg_settings: dict[str, str]) -> Ledger:
    """The ledger to write: this run's assignment and sources, and every row of the old
    ledger whose clip, group or source is gone.

    A clip can leave the input for a run (its file removed, the audio stage rejecting
    it, a gate whose action is "reject" setting it aside) and come back later. Its
    group row alone cannot bring it back to its subset: after a ``split.group_by``
    change its new group has no row. So its clip row stays, and the returning clip
    keeps its subset like any clip of the ledger; its source stays as ``gone``.
    """
    groups = dict(assignment.sides)
    clips = {c.clip_id: ClipRecord(assignment.subset[c.clip_id], assignment.tiers.get(c.clip_id, ()), c.group)
             for c in kept}
    known = dict.fromkeys(sorted(sources), "present")
    budgets = _budget_names(cfg_settings["budgets"])
    if ledger is not None:
        # Keep the side of a group whose clips are all gone, so it returns to the same side.
        current = set(groups) | {c.base_group for c in kept}
        groups.update({g: side for g, side in ledger.groups.items() if g not in current})
        for cid, rec in ledger.clips.items():
            if cid not in clips:
                clips[cid] = _gone_record(rec, budgets, assignment.continues)
                # Every clip row names a group that has a row (the parser checks).
                groups.setdefault(rec.group, ledger.groups[rec.group])
        known.update({k: "gone" for k in ledger.sources if k not in known})
    return Ledger(cfg_settings, groups, clips, dict(sorted(known.items())))


def _budget_names(text: str) -> tuple[str, ...]:
    return () if text == "-" else tuple(text.split(","))


def _gone_record(rec: ClipRecord, budgets: tuple[str, ...], continues: Mapping[str, str]) -> ClipRecord:
    """A gone clip's row in this run's budget names: its tiers as the tiers that continue
    them (nested, so from the smallest on); a labelled clip no tier continues becomes
    unlabelled, and comes back as a candidate."""
    if rec.subset != LABELLED:
        return rec
    kept = [i for i, b in enumerate(budgets) if continues.get(b) in rec.tiers]
    if not kept:
        return ClipRecord(UNLABELLED, (), rec.group)
    return ClipRecord(LABELLED, budgets[kept[0]:], rec.group)


def _summary(kept: Sequence[Clip], clips: Sequence[Clip], assignment: Assignment, pairs: Sequence[DuplicatePair],
             by_subset: Mapping[str, list[Clip]], *, target_s: float, eligible_s: float, group_by: str,
             orphans: int, rejected: dict[str, int]) -> dict[str, Any]:
    inventory = set().union(*(set(c.plain_phones) for c in kept if c.transcribed)) if kept else set()
    subsets = {s: _describe(by_subset[s], inventory) for s in SUBSETS}
    scored = [c for c in by_subset[HELDOUT] if c.eligible]
    subsets[HELDOUT]["scored_clips"] = len(scored)
    subsets[HELDOUT]["scored_hours"] = _hours(math.fsum(c.duration_s for c in scored))
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
    notes["heldout_untranscribed"] = sum(not c.transcribed for c in by_subset[HELDOUT])
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
    written_files=lambda out, table: [INVENTORY],
    reuse_note=reuse_note,
)
