"""Labelled selection: which transcribed clips fill each nested labelled tier.

Two orders are offered. ``coverage`` is a greedy choice that prefers clips bringing
phones and diphones not yet in the selection, per second of audio, while holding
back speakers that already have their share. ``random`` is a seeded shuffle.
Either way a tier takes clips in order until its total reaches the budget, so the
last clip overshoots it by less than its own duration, and tiers grow one on top
of the other, so every clip of a smaller tier is in each larger one.

:func:`fill_tiers` also grows tiers on top of a kept selection (from the split
ledger): kept clips stay, a shrunk budget drops the clips that the order puts
last, and a tier below its budget is topped up.
"""

from __future__ import annotations

import heapq
import itertools
import math
from collections.abc import Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from pipeline.core.errors import ParameterError

# A new phone counts as much as this many new diphones: there are ~39 phones and
# ~1,500 diphones in English, and a missing phone is the worse gap. A design choice,
# no source.
PHONE_WEIGHT = 10.0
# A speaker with ``share`` times its fair part of the budget has its scores divided
# by (1 + SPEAKER_PENALTY * share): at its fair part, halved. A design choice, no source.
SPEAKER_PENALTY = 1.0
# The same weights as exact rationals, for the exact scores of coverage_order.
_PHONE_WEIGHT = Fraction(PHONE_WEIGHT)
_SPEAKER_PENALTY = Fraction(SPEAKER_PENALTY)
# Float scores within this relative distance of the best are compared exactly. The
# float score takes about ten correctly rounded steps (quotients, an exactly rounded
# fsum, the speaker term), each off by at most 2**-53 relative, so it is within ~1e-15
# of the exact score and a stale heap bound within ~2e-15 of its own; 1e-9 leaves a
# margin of a million, and only true ties or near-ties pay for exact arithmetic.
_NEAR_TIE = 1e-9
METHODS = ("coverage", "random")


@dataclass(frozen=True)
class Candidate:
    """A transcribed clip that may be labelled.

    ``phones`` is the phone sequence without word-boundary symbols.
    """

    clip_id: str
    speaker: str
    duration_s: float
    phones: tuple[str, ...]


def units(phones: Sequence[str]) -> tuple[set[str], set[tuple[str, str]]]:
    """The distinct phones and diphones (adjacent pairs) of a phone sequence.

    Examples
    --------
    >>> units(["HH", "AH", "L", "OW", "L"])[1] == {("HH", "AH"), ("AH", "L"), ("L", "OW"), ("OW", "L")}
    True
    """
    return set(phones), set(itertools.pairwise(phones))


def _unit_keys(c: Candidate) -> list[tuple[str, ...]]:
    phones, diphones = units(c.phones)
    return [("p", p) for p in phones] + [("d", *d) for d in diphones]


def _check_candidates(candidates: Sequence[Candidate], name: str = "candidates") -> list[Candidate]:
    items = sorted(candidates, key=lambda c: c.clip_id)
    for a, b in itertools.pairwise(items):
        if a.clip_id == b.clip_id:
            raise ParameterError(f"{name} holds clip_id {a.clip_id!r} twice")
    for c in items:
        if not (c.duration_s > 0 and math.isfinite(c.duration_s)):
            raise ParameterError(f"{name}: clip {c.clip_id!r} has duration_s={c.duration_s!r}; expected a positive number")
    return items


def coverage_order(
    candidates: Sequence[Candidate],
    *,
    budget_s: float,
    chosen: Sequence[Candidate] = (),
    stop_s: float | None = None,
    index: UnitIndex | None = None,
) -> list[str]:
    """Greedy phone- and diphone-coverage order of ``candidates``, after ``chosen``.

    Each step takes the candidate with the highest score

        score = sum(w_u / (1 + n_u) for each distinct unit u of the clip) / duration_s
                / (1 + SPEAKER_PENALTY * speaker_s / quota_s)

    where the units are the clip's distinct phones (``w_u = PHONE_WEIGHT``) and
    diphones (``w_u = 1``), ``n_u`` counts the selected clips (``chosen`` included)
    holding the unit, ``speaker_s`` is the selected duration of the clip's speaker
    and ``quota_s = budget_s / speakers`` (speakers among candidates and chosen).
    A unit nobody has yet counts fully, one held by one clip half, and so on: new
    phones and diphones come first, and after that the score keeps spreading the
    selection over rare units and over speakers. Ties go to the smaller clip_id.

    Every term only shrinks as clips are selected, so a lazy greedy (re-scoring a
    candidate only when it reaches the top of the heap) makes exactly the choices of
    the plain greedy at a fraction of the cost. The heap holds float scores, but a
    choice is made on exact rationals: rounded floats can split a true tie
    (``fsum([10/3, 1/3])`` and ``fsum([2/3, 3])`` differ in the last bit, yet both are
    11/3), and the tie would then go to whichever rounded up, not to the smaller
    clip_id. So every candidate whose float score is within :data:`_NEAR_TIE` of the
    best is scored again in :class:`fractions.Fraction`, and the exact best wins.
    Totals are exact too, so the order never depends on the order of the input.

    Parameters
    ----------
    candidates : Sequence[Candidate]
        Clips to order (clip ids unique).
    budget_s : float
        The tier budget in seconds (>= 0); sets the speaker quota.
    chosen : Sequence[Candidate]
        Clips already selected (a smaller tier, or kept from the ledger).
    stop_s : float or None
        Stop once chosen plus selected durations reach this total; None means
        ``budget_s``, ``math.inf`` orders every candidate.
    index : UnitIndex or None
        The units of every candidate and chosen clip, when the caller orders the same
        clips more than once; None builds it.

    Returns
    -------
    list of str
        Clip ids in selection order.

    Examples
    --------
    >>> c = [Candidate("a", "s1", 1.0, ("AA", "B")), Candidate("b", "s1", 1.0, ("AA", "B")),
    ...      Candidate("c", "s2", 1.0, ("IY", "K"))]
    >>> coverage_order(c, budget_s=2.0)
    ['a', 'c']
    """
    if not budget_s >= 0:
        raise ParameterError(f"budget_s={budget_s!r} must be >= 0")
    items = _check_candidates(candidates)
    stop_at = budget_s if stop_s is None else stop_s
    stop = None if stop_at == math.inf else Fraction(stop_at)
    total = _exact_total(c.duration_s for c in chosen)
    if not items or (stop is not None and total >= stop):
        return []
    scorer = _Scorer(items, chosen=chosen, budget_s=budget_s, index=index)
    step = 0
    heap = [(-scorer.rough(i), items[i].clip_id, i, step) for i in range(len(items))]
    heapq.heapify(heap)
    order: list[str] = []
    while heap and (stop is None or total < stop):
        i = _pop_best(heap, scorer, step=step)
        order.append(items[i].clip_id)
        scorer.add(i)
        total += Fraction(items[i].duration_s)
        step += 1
    return order


def _pop_best(heap: list[tuple[float, str, int, int]], scorer: _Scorer, *, step: int) -> int:
    """Pop the candidate :func:`coverage_order` takes at ``step``; its index.

    Heap entries are ``(-float score, clip_id, index, step scored at)``. A stale entry
    (scored at an earlier step) is an upper bound: it is scored again and put back.
    Every fresh entry within :data:`_NEAR_TIE` of the best is scored exactly; the exact
    best wins (ties to the smaller clip_id) and the others go back.
    """
    while True:
        neg, cid, i, stamp = heapq.heappop(heap)
        if stamp == step:
            break
        heapq.heappush(heap, (-scorer.rough(i), cid, i, step))
    near = [(neg, cid, i, stamp)]
    while heap and -heap[0][0] >= -neg * (1.0 - _NEAR_TIE):
        entry = heapq.heappop(heap)
        if entry[3] != step:
            heapq.heappush(heap, (-scorer.rough(entry[2]), entry[1], entry[2], step))
        else:
            near.append(entry)
    if len(near) > 1:
        near.sort(key=lambda e: (-scorer.exact(e[2]), e[1]))
        for entry in near[1:]:
            heapq.heappush(heap, entry)
    return near[0][2]


class UnitIndex:
    """Candidates' distinct units (phones and diphones) as integer ids, and each unit's
    weight (:data:`PHONE_WEIGHT` for a phone, 1 for a diphone).

    Units get ids in sorted order as candidates are added, so nothing depends on the
    input order; a score sums over a clip's units (exactly rounded, or exactly) and so
    depends on no id. :func:`fill_tiers` keeps one index for every tier's orders, so
    each clip's units are worked out once however many tiers order it.

    Examples
    --------
    >>> index = UnitIndex([Candidate("a", "s", 1.0, ("AA", "B", "AA"))])
    >>> index.ids["a"].tolist(), index.weights.tolist()
    ([0, 1, 2, 3], [1.0, 1.0, 10.0, 10.0])
    """

    def __init__(self, candidates: Iterable[Candidate] = ()) -> None:
        self.vocabulary: dict[tuple[str, ...], int] = {}
        self.is_phone = np.zeros(0, dtype=bool)
        self.ids: dict[str, np.ndarray] = {}
        self.phone_ids: dict[str, np.ndarray] = {}
        self.diphone_ids: dict[str, np.ndarray] = {}
        self.add(candidates)

    def add(self, candidates: Iterable[Candidate]) -> None:
        """Index the candidates not indexed yet (by clip_id)."""
        fresh = {c.clip_id: c for c in candidates if c.clip_id not in self.ids}
        unit_lists = {cid: _unit_keys(c) for cid, c in fresh.items()}
        vocabulary = self.vocabulary
        unseen = sorted(set().union(*unit_lists.values()) - vocabulary.keys())
        vocabulary.update(zip(unseen, range(len(vocabulary), len(vocabulary) + len(unseen)), strict=True))
        self.is_phone = np.concatenate([self.is_phone, np.array([u[0] == "p" for u in unseen], dtype=bool)])
        for cid, keys in unit_lists.items():
            ids = self.ids[cid] = np.array(sorted(vocabulary[u] for u in keys), dtype=np.int64)
            self.phone_ids[cid] = ids[self.is_phone[ids]]
            self.diphone_ids[cid] = ids[~self.is_phone[ids]]

    @property
    def weights(self) -> np.ndarray:
        return np.where(self.is_phone, PHONE_WEIGHT, 1.0)


class _Scorer:
    """The score of :func:`coverage_order` for each candidate, as the selection grows.

    ``rough`` is the float score (within a few units in the last place of the exact
    one), ``exact`` the same formula in exact rationals of the float inputs.
    """

    def __init__(self, items: Sequence[Candidate], *, chosen: Sequence[Candidate], budget_s: float,
                 index: UnitIndex | None = None) -> None:
        every = [*items, *chosen]
        if index is None:
            index = UnitIndex(every)
        else:
            index.add(every)
        self.items = items
        self.ids, self.phone_ids, self.diphone_ids = ([found[c.clip_id] for c in every] for found in
                                                      (index.ids, index.phone_ids, index.diphone_ids))
        self.weights = index.weights
        self.counts = np.zeros(len(index.weights), dtype=np.int64)
        self.speaker_s: dict[str, Fraction] = {}
        self.speaker_rough: dict[str, float] = {}
        speakers = {c.speaker for c in items} | {c.speaker for c in chosen}
        # A zero budget selects nothing, but an ordering asked of it has no quota to
        # share (nor has an unbounded one): the speaker term is then 1.
        self.quota_s = Fraction(budget_s) / len(speakers) if 0 < budget_s < math.inf else None
        for k, c in enumerate(chosen):
            self._take(c, self.ids[len(items) + k])

    def _take(self, c: Candidate, unit_ids: np.ndarray) -> None:
        self.counts[unit_ids] += 1  # ids are distinct within a clip
        held = self.speaker_s.get(c.speaker, Fraction(0)) + Fraction(c.duration_s)
        self.speaker_s[c.speaker] = held
        self.speaker_rough[c.speaker] = float(held)  # correctly rounded, however many clips

    def add(self, i: int) -> None:
        self._take(self.items[i], self.ids[i])

    def rough(self, i: int) -> float:
        c = self.items[i]
        gain = math.fsum((self.weights[self.ids[i]] / (1.0 + self.counts[self.ids[i]])).tolist())
        if self.quota_s is None:
            return gain / c.duration_s
        share = self.speaker_rough.get(c.speaker, 0.0) / float(self.quota_s)
        return gain / c.duration_s / (1.0 + SPEAKER_PENALTY * share)

    def exact(self, i: int) -> Fraction:
        c = self.items[i]
        gain = _gain(self.counts[self.phone_ids[i]], self.counts[self.diphone_ids[i]])
        if self.quota_s is None:
            return gain / Fraction(c.duration_s)
        share = self.speaker_s.get(c.speaker, Fraction(0)) / self.quota_s
        return gain / Fraction(c.duration_s) / (1 + _SPEAKER_PENALTY * share)


def _gain(phone_counts: np.ndarray, diphone_counts: np.ndarray) -> Fraction:
    """Exact ``sum(PHONE_WEIGHT / (1 + n_p)) + sum(1 / (1 + n_d))`` over the given counts.

    Units held by the same number of clips share a denominator, so the sum has one
    term per distinct count (a handful) rather than one per unit.

    Examples
    --------
    >>> _gain(np.array([0, 2]), np.array([1, 1, 3]))  # 10 + 10/3 + 1/2 + 1/2 + 1/4
    Fraction(175, 12)
    """
    weight: dict[int, Fraction] = {}
    for unit_counts, unit_weight in ((phone_counts, _PHONE_WEIGHT), (diphone_counts, Fraction(1))):
        held, units_held = np.unique(unit_counts, return_counts=True)
        for n, k in zip(held.tolist(), units_held.tolist(), strict=True):
            weight[n] = weight.get(n, Fraction(0)) + k * unit_weight
    return sum((w / (1 + n) for n, w in weight.items()), Fraction(0))


def _exact_total(durations: Iterable[float]) -> Fraction:
    """The exact sum of float durations (no rounding, so no order dependence)."""
    return sum((Fraction(d) for d in durations), Fraction(0))


def random_order(candidates: Sequence[Candidate], *, seed: int) -> list[str]:
    """A seeded shuffle: ``numpy.random.default_rng(seed).permutation`` of the clip ids sorted.

    Parameters
    ----------
    candidates : Sequence[Candidate]
    seed : int
        The corpus seed.

    Returns
    -------
    list of str
        Every clip id once, in shuffled order (independent of the input order).

    Examples
    --------
    >>> c = [Candidate(x, "s", 1.0, ("AA",)) for x in "abcd"]
    >>> sorted(random_order(c, seed=3)) == list("abcd")
    True
    """
    items = _check_candidates(candidates)
    perm = np.random.default_rng(seed).permutation(len(items))
    return [items[int(i)].clip_id for i in perm]


def selection_order(
    candidates: Sequence[Candidate],
    *,
    method: str,
    budget_s: float,
    chosen: Sequence[Candidate] = (),
    seed: int = 0,
    stop_s: float | None = None,
    index: UnitIndex | None = None,
) -> list[str]:
    """The order of ``method`` ("coverage" or "random"); see :func:`coverage_order`."""
    if method == "coverage":
        return coverage_order(candidates, budget_s=budget_s, chosen=chosen, stop_s=stop_s, index=index)
    if method == "random":
        return random_order(candidates, seed=seed)
    raise ParameterError(f"method={method!r} is not one of {', '.join(METHODS)}")


def take_until(order: Sequence[str], *, durations: Mapping[str, float], start_s: float | Fraction,
               budget_s: float) -> list[str]:
    """The prefix of ``order`` that brings a total of ``start_s`` up to ``budget_s``.

    Clips are taken until the total reaches the budget, so the last one overshoots
    it by less than its own duration; with too few clips all are taken. The total is
    kept exactly, as in :func:`coverage_order`, so both stop at the same clip.

    Examples
    --------
    >>> take_until(["a", "b", "c"], durations={"a": 4.0, "b": 4.0, "c": 4.0}, start_s=0.0, budget_s=6.0)
    ['a', 'b']
    """
    taken: list[str] = []
    total, budget = Fraction(start_s), Fraction(budget_s)
    for cid in order:
        if total >= budget:
            break
        taken.append(cid)
        total += Fraction(durations[cid])
    return taken


@dataclass(frozen=True)
class TierPlan:
    """One configured tier and what the ledger says about it.

    ``kept``: clips the ledger has in this tier (matched across a renamed budget).
    ``may_drop``: the budget shrank, so kept clips that the order puts last may leave.
    ``may_reopen``: the budget grew or is new, so clips the ledger left unlabelled
    may join.
    """

    name: str
    budget_s: float
    kept: frozenset[str] = frozenset()
    may_drop: bool = False
    may_reopen: bool = False


@dataclass(frozen=True)
class TierOutcome:
    name: str
    budget_s: float
    clips: tuple[str, ...]
    total_s: float
    dropped: tuple[str, ...]
    shortfall_s: float


def fill_tiers(
    plans: Sequence[TierPlan],
    *,
    items: Mapping[str, Candidate],
    labelled_before: Collection[str] = (),
    new: Collection[str] = (),
    reopened: Collection[str] = (),
    method: str,
    seed: int = 0,
) -> list[TierOutcome]:
    """Grow nested tiers, smallest first, on top of what the ledger kept.

    For each tier: start from the smaller tier's clips plus this tier's ``kept``
    clips (ordered by ``method`` after the smaller tier). If the budget shrank,
    drop the last of the kept clips while the tier stays at or above its budget
    without them. If the tier is below budget, top it up by ``method``, first from
    ``labelled_before`` (clips already labelled in a larger tier, so no clip changes
    subset needlessly), then from ``new`` plus, when the budget grew, ``reopened``.

    Parameters
    ----------
    plans : Sequence[TierPlan]
        Tiers ascending by budget.
    items : Mapping[str, Candidate]
        Every clip named anywhere in the arguments.
    labelled_before, new, reopened : Collection[str]
        The candidate pools described above; clips in them must be eligible.
    method : str
        "coverage" or "random".
    seed : int
        For "random".

    Returns
    -------
    list of TierOutcome
        One per plan, in order; ``clips`` starts with the previous tier's clips,
        then the kept ones, then those added in selection order.

    Examples
    --------
    >>> items = {x: Candidate(x, "s", 5.0, ("AA", x.upper())) for x in "abcd"}
    >>> out = fill_tiers([TierPlan("10s", 10.0), TierPlan("20s", 20.0)], items=items, new="abcd",
    ...                  method="coverage")
    >>> [len(t.clips) for t in out]
    [2, 4]
    """
    if method not in METHODS:
        raise ParameterError(f"method={method!r} is not one of {', '.join(METHODS)}")
    for a, b in itertools.pairwise(plans):
        if b.budget_s < a.budget_s:
            raise ParameterError(f"plans must ascend by budget_s; {b.name} ({b.budget_s}) follows {a.name} ({a.budget_s})")
    durations = {cid: c.duration_s for cid, c in items.items()}
    # One index of units for every tier's orders (see UnitIndex).
    index = UnitIndex() if method == "coverage" else None
    pools = _Pools(labelled_before=sorted(set(labelled_before)), new=set(new), reopened=set(reopened),
                   index=index)
    members: tuple[str, ...] = ()
    outcomes: list[TierOutcome] = []
    for plan in plans:
        outcome = _fill_tier(plan, members, items=items, durations=durations, pools=pools, method=method, seed=seed)
        members = outcome.clips
        outcomes.append(outcome)
    return outcomes


@dataclass(frozen=True)
class _Pools:
    """The candidate pools of :func:`fill_tiers`."""

    labelled_before: list[str]
    new: set[str]
    reopened: set[str]
    index: UnitIndex | None = None


def _fill_tier(plan: TierPlan, smaller: Sequence[str], *, items: Mapping[str, Candidate],
               durations: Mapping[str, float], pools: _Pools, method: str, seed: int) -> TierOutcome:
    """One tier of :func:`fill_tiers` on top of the smaller tier's clips ``smaller``."""
    prev = list(smaller)
    inside = set(prev)
    budget = Fraction(plan.budget_s)  # totals are exact, as in coverage_order
    kept = [items[c] for c in sorted(plan.kept) if c not in inside]
    if plan.may_drop:  # only a drop needs to know which kept clips came last
        kept_ids = selection_order(kept, method=method, budget_s=plan.budget_s,
                                   chosen=[items[c] for c in prev], seed=seed, stop_s=math.inf,
                                   index=pools.index)
    else:
        kept_ids = [c.clip_id for c in kept]
    base = prev + kept_ids
    dropped: list[str] = []
    if plan.may_drop:
        total = _exact_total(durations[c] for c in base)
        while len(base) > len(prev) and total - Fraction(durations[base[-1]]) >= budget:
            total -= Fraction(durations[base[-1]])
            dropped.append(base.pop())
    inside = set(base) | set(dropped)
    total = _exact_total(durations[c] for c in base)
    for pool in (sorted(set(pools.labelled_before) - inside),
                 sorted((pools.new | (pools.reopened if plan.may_reopen else set())) - inside)):
        if total >= budget or not pool:
            continue
        order = selection_order([items[c] for c in pool], method=method, budget_s=plan.budget_s,
                                chosen=[items[c] for c in base], seed=seed, index=pools.index)
        taken = take_until(order, durations=durations, start_s=total, budget_s=plan.budget_s)
        base += taken
        inside.update(taken)
        total = _exact_total(durations[c] for c in base)
    return TierOutcome(plan.name, plan.budget_s, tuple(base), float(total), tuple(dropped),
                       float(max(Fraction(0), budget - total)))
