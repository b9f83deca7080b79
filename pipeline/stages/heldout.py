"""Held-out parts: which groups go to which part (dev, test, ...) and which stay for training.

Pure functions of per-group facts; the split stage (:mod:`pipeline.stages.split`) builds
the facts, reads the ledger and applies the result. Groups are considered in the
seeded ranking order of :func:`rank_key`. The part furthest below its target (by
the share of it already filled; ties to the order of ``split.parts``) takes the
next group, chosen among the first :data:`WINDOW` undecided groups of the ranking by,
in this order:

1. balance: the smallest excess, summed over the balance columns and their values,
   of ``abs(share in the part - share in the corpus) - tolerance`` (0 when within);
2. prompt overlap: the smallest change, per second the group brings, in the seconds
   of text-disjoint parts weighted by the share of each prompt's readers (groups
   reading it) still in training. A prompt whose every other reader is held out
   costs nothing; the weighting makes groups that read the same prompts gather in
   held-out one by one, where counting only prompts left with no training reader
   would see no gain until the last reader left;
3. the ranking.

Without balance columns and without shared prompts every candidate ties on 1 and 2,
so groups are taken in ranking order, as a single held-out subset took them. Parts
are filled until each reaches its target (the last group overshoots by less than its
own duration); one group with eligible transcribed audio always stays for training.
A group the ledger fixes keeps its side and part; a held-out group the ledger gives
no part (a version 1 ledger, or a part no longer configured) goes to the part
furthest below its target, never to training.
"""

from __future__ import annotations

import hashlib
import math
from collections import defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from pipeline.core.config import parse_duration_s

TRAINING = "training"
# Candidates weighed per pick: the first WINDOW undecided groups of the ranking. It
# bounds a pick's cost on corpora of thousands of groups (group_by = "clip") while
# leaving balance and overlap a choice among many groups. This project's choice.
WINDOW = 64


@dataclass(frozen=True)
class PartTarget:
    """A held-out part: its name, its target in eligible transcribed seconds, and
    whether its prompts are to be kept out of labelled training."""

    name: str
    target_s: float
    text_disjoint: bool = True


@dataclass(frozen=True)
class GroupFacts:
    """What choosing a group's part weighs: its eligible transcribed seconds, the
    seconds of each prompt (normalised transcript) it reads, and its attribute values
    (balance column -> value)."""

    seconds: float
    prompts: Mapping[str, float] = field(default_factory=dict)
    attributes: Mapping[str, str] = field(default_factory=dict)


def rank_key(group_id: str, *, seed: int) -> str:
    """Ranking key: hex SHA-256 of ``f"{seed}\\t{group_id}"`` in UTF-8.

    Examples
    --------
    >>> rank_key("wren", seed=7) == hashlib.sha256(b"7\\twren").hexdigest()
    True
    """
    return hashlib.sha256(f"{seed}\t{group_id}".encode()).hexdigest()


def part_targets_s(specs: Sequence[tuple[str, str, bool]], *, heldout_s: float) -> list[PartTarget]:
    """Each part's target in seconds: a share of ``heldout_s`` ("50%") or a duration.

    Examples
    --------
    >>> [t.target_s for t in part_targets_s([("dev", "40%", True), ("test", "60%", True)], heldout_s=100.0)]
    [40.0, 60.0]
    >>> [t.target_s for t in part_targets_s([("test", "2m", True)], heldout_s=0.0)]
    [120.0]
    """
    out = []
    for name, target, disjoint in specs:
        if target.endswith("%"):
            seconds = float(target[:-1]) / 100.0 * heldout_s
        else:
            seconds = parse_duration_s(target)
        out.append(PartTarget(name, seconds, disjoint))
    return out


class _State:
    """Running totals: seconds per part, per part and attribute value, and per prompt
    in text-disjoint parts; training readers per prompt."""

    def __init__(self, facts: Mapping[str, GroupFacts], parts: Sequence[PartTarget],
                 columns: Sequence[str]) -> None:
        self.facts = facts
        self.parts = {p.name: p for p in parts}
        self.columns = columns
        self.part_s: dict[str, float] = {p.name: 0.0 for p in parts}
        self.attr_s: dict[tuple[str, str, str], float] = defaultdict(float)
        self.disjoint_s: dict[str, float] = defaultdict(float)
        self.readers: dict[str, int] = defaultdict(int)
        self.all_readers: dict[str, int] = defaultdict(int)
        total = math.fsum(f.seconds for f in facts.values())
        corpus: dict[tuple[str, str], float] = defaultdict(float)
        for f in facts.values():
            for p in f.prompts:
                self.readers[p] += 1  # every group reads for training until it is held out
                self.all_readers[p] += 1
            for c in columns:
                corpus[(c, f.attributes.get(c, ""))] += f.seconds
        self.corpus_share = {k: (v / total if total > 0 else 0.0) for k, v in corpus.items()}

    def add(self, group: str, part: str) -> None:
        f = self.facts[group]
        self.part_s[part] += f.seconds
        for c in self.columns:
            self.attr_s[(part, c, f.attributes.get(c, ""))] += f.seconds
        for p, s in f.prompts.items():
            self.readers[p] -= 1
            if self.parts[part].text_disjoint:
                self.disjoint_s[p] += s

    def fill(self, part: str) -> float:
        target = self.parts[part].target_s
        return self.part_s[part] / target if target > 0 else math.inf

    def excess(self, group: str, part: str, *, tolerance: float) -> float:
        """Balance excess of ``part`` once ``group`` joins it."""
        if not self.columns:
            return 0.0
        f = self.facts[group]
        total = self.part_s[part] + f.seconds
        if total <= 0:
            return 0.0
        out = 0.0
        for (c, v), corpus in self.corpus_share.items():
            s = self.attr_s.get((part, c, v), 0.0) + (f.seconds if f.attributes.get(c, "") == v else 0.0)
            out += max(0.0, abs(s / total - corpus) - tolerance)
        return out

    def overlap_delta(self, group: str, part: str) -> float:
        """Change in the text-disjoint seconds weighted by the share of their prompt's
        readers in training, once ``group`` leaves training for ``part``."""
        f = self.facts[group]
        disjoint = self.parts[part].text_disjoint
        delta = 0.0
        for p, s in f.prompts.items():
            n = self.all_readers[p]
            before = self.disjoint_s[p] * self.readers[p] / n
            after = (self.disjoint_s[p] + (s if disjoint else 0.0)) * (self.readers[p] - 1) / n
            delta += after - before
        return delta


def choose_parts(facts: Mapping[str, GroupFacts], *, parts: Sequence[PartTarget], seed: int,
                 fixed: Mapping[str, str] | None = None, pending: Iterable[str] = (),
                 training_groups: int = 0, tolerance: float = 0.1,
                 columns: Sequence[str] = ()) -> dict[str, str]:
    """Every group's place: a part name or ``"training"`` (see the module docstring).

    Parameters
    ----------
    facts : Mapping[str, GroupFacts]
        Every group of the run.
    parts : Sequence[PartTarget]
        The held-out parts, in the config's order.
    seed : int
        The corpus seed (see :func:`rank_key`).
    fixed : Mapping[str, str], optional
        Groups the ledger decides: a part name or ``"training"``.
    pending : Iterable[str]
        Groups the ledger holds out without a (configured) part.
    training_groups : int
        Fixed groups with eligible transcribed audio that stay for training.
    tolerance : float
        Balance tolerance, as a share.
    columns : Sequence[str]
        Balance columns (keys of :attr:`GroupFacts.attributes`).

    Returns
    -------
    dict of str to str
        Each group of ``facts`` and its part or ``"training"``.

    Examples
    --------
    >>> facts = {g: GroupFacts(10.0) for g in "abcd"}
    >>> choose_parts(facts, parts=[PartTarget("dev", 10.0), PartTarget("test", 10.0)], seed=0)
    {'a': 'training', 'b': 'training', 'c': 'dev', 'd': 'test'}
    """
    fixed = dict(fixed or {})
    pending = [g for g in sorted(set(pending), key=lambda g: (rank_key(g, seed=seed), g)) if g not in fixed]
    state = _State(facts, parts, columns)
    for g, place in fixed.items():
        if place != TRAINING and g in facts:
            state.add(g, place)
    out = dict(fixed)
    for g in pending:
        part = min(state.part_s, key=lambda p: (state.fill(p), [q.name for q in parts].index(p)))
        state.add(g, part)
        out[g] = part
    ranked = [g for g in sorted(facts, key=lambda g: (rank_key(g, seed=seed), g))
              if g not in out and facts[g].seconds > 0]
    order = [p.name for p in parts]
    # Without balance columns or a prompt read by two groups every candidate ties: the
    # ranking decides alone, and no candidate needs weighing.
    weigh = bool(columns) or any(n > 1 for n in state.all_readers.values())
    taken: set[str] = set()
    start, left = 0, len(ranked)
    while left and training_groups + left > 1:
        open_parts = [p for p in order if state.fill(p) < 1.0]
        if not open_parts:
            break
        part = min(open_parts, key=lambda p: (state.fill(p), order.index(p)))
        while ranked[start] in taken:
            start += 1
        window = _window(ranked, taken, start) if weigh else [ranked[start]]

        def score(k: int, part: str = part, window: list[str] = window) -> tuple[float, float, int]:
            g = window[k]
            return (round(state.excess(g, part, tolerance=tolerance), 9),
                    round(state.overlap_delta(g, part) / facts[g].seconds, 9), k)

        best = window[min(range(len(window)), key=score)]
        state.add(best, part)
        out[best] = part
        taken.add(best)
        left -= 1
    for g in facts:
        out.setdefault(g, TRAINING)
    return dict(sorted(out.items()))


def _window(ranked: Sequence[str], taken: set[str], start: int) -> list[str]:
    """The first :data:`WINDOW` groups of ``ranked`` from ``start`` that are not taken."""
    window: list[str] = []
    k = start
    while k < len(ranked) and len(window) < WINDOW:
        if ranked[k] not in taken:
            window.append(ranked[k])
        k += 1
    return window


def balance_table(facts: Mapping[str, GroupFacts], places: Mapping[str, str], *, parts: Sequence[str],
                  columns: Sequence[str], tolerance: float) -> list[dict[str, object]]:
    """Each balance column's values with their share of eligible transcribed seconds in
    the corpus and in each part, and whether every part is within ``tolerance``.

    Examples
    --------
    >>> facts = {"a": GroupFacts(10.0, attributes={"gender": "f"}), "b": GroupFacts(10.0, attributes={"gender": "m"}),
    ...          "c": GroupFacts(10.0, attributes={"gender": "f"})}
    >>> rows = balance_table(facts, {"a": "test", "b": "training", "c": "training"}, parts=["test"],
    ...                      columns=["gender"], tolerance=0.1)
    >>> [(r["value"], r["corpus"], r["parts"]["test"], r["within"]) for r in rows]
    [('f', 0.6667, 1.0, False), ('m', 0.3333, 0.0, False)]
    """
    rows = []
    total = math.fsum(f.seconds for f in facts.values())
    for c in columns:
        values = sorted({f.attributes.get(c, "") for f in facts.values()})
        for v in values:
            corpus = math.fsum(f.seconds for f in facts.values() if f.attributes.get(c, "") == v)
            shares = {}
            for p in parts:
                members = [f for g, f in facts.items() if places.get(g) == p]
                part_s = math.fsum(f.seconds for f in members)
                mine = math.fsum(f.seconds for f in members if f.attributes.get(c, "") == v)
                shares[p] = round(mine / part_s, 4) if part_s > 0 else None
            corpus_share = round(corpus / total, 4) if total > 0 else 0.0
            within = all(s is not None and abs(s - corpus_share) <= tolerance + 1e-9 for s in shares.values())
            rows.append({"column": c, "value": v or "(unknown)", "corpus": corpus_share, "parts": shares,
                         "within": within})
    return rows
