"""The split stage's columnar helpers against plain per-clip reference code.

The stage computes its per-group and per-clip decisions with arrays (codes per clip,
sums by code) rather than a Python loop per clip; each test here writes the rule the
straightforward way, one clip at a time, and checks that both give the same values
(floats compared exactly: the outputs must not change by a bit) on random clips.
"""

from __future__ import annotations

import itertools
import math
from collections import Counter, defaultdict
from dataclasses import replace
from typing import Any

import numpy as np
import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.names import HELDOUT, LABELLED, SUBSETS, UNLABELLED
from pipeline.stages import split
from pipeline.stages.heldout import GroupFacts, PartTarget
from pipeline.stages.ledger import ClipRecord, Ledger
from pipeline.stages.prompts import prompt_key

SPEAKERS = ("alder", "heron", "otter", "wren")
GROUPS = ("g1", "g2", "g3", "g4", "g5")
# Prompts that differ only in case and spacing share a key (prompt_key).
TEXTS = ("the tide turned", "The  tide turned", "a gull cried", "  ", "wind over the dunes")


@st.composite
def clip_lists(draw: Any) -> list[split.Clip]:
    """Random clips: groups, speakers, durations (with repeats, so sums meet ties),
    transcripts (some blank) and eligibility."""
    count = draw(st.integers(0, 40))
    clips = []
    for k in range(count):
        text = draw(st.sampled_from((None, *TEXTS)))
        eligible = text is not None and draw(st.booleans())
        duration = draw(st.sampled_from((0.1, 0.7, 1.3, 2.0, 0.30000000000000004, 5.25)))
        group = draw(st.sampled_from(GROUPS))
        clips.append(split.Clip(
            row=k, clip_id=f"c{k:03d}", speaker=draw(st.sampled_from(SPEAKERS)), duration_s=duration,
            source_path=f"s{k}.wav", text=None if text is None else {"norm_text": text, "phones": ["AA"]},
            base_group=group, group=group, flags=frozenset(), plain_phones=("AA",) if text else (),
            eligible=eligible))
    return clips


def reference_facts(clips: list[split.Clip], balance: split.Balance) -> dict[str, GroupFacts]:
    """group_facts one clip at a time (the rule as the stage's docstring states it)."""
    groups: dict[str, list[split.Clip]] = defaultdict(list)
    for c in clips:
        groups[c.group].append(c)
    facts = {}
    for g, members in groups.items():
        eligible = [c for c in members if c.eligible]
        prompts: dict[str, float] = defaultdict(float)
        speakers: Counter[str] = Counter()
        for c in eligible:
            key = prompt_key(c.text["norm_text"]) if c.text else None
            if key is not None:
                prompts[key] += c.duration_s
            speakers[c.speaker] += c.duration_s
        main = min(speakers, key=lambda spk: (-speakers[spk], spk)) if speakers else members[0].speaker
        attrs = balance.attributes.get(main, {})
        facts[g] = GroupFacts(math.fsum(c.duration_s for c in eligible), dict(sorted(prompts.items())),
                              {col: attrs.get(col, "") for col in balance.columns})
    return facts


@settings(max_examples=200, deadline=None)
@given(clip_lists())
def test_group_facts_equal_a_loop_over_clips(clips: list[split.Clip]) -> None:
    balance = split.Balance(("gender",), 0.1, {"alder": {"gender": "f"}, "otter": {"gender": "m"}})
    found, expected = split.group_facts(clips, balance), reference_facts(clips, balance)
    # With the group codes and eligibility Past read already, as the stage calls it.
    with_past = split.group_facts(clips, balance, split.Past.of(clips, {}))
    assert [(g, f.seconds, list(f.prompts.items()), f.attributes) for g, f in with_past.items()] == \
        [(g, f.seconds, list(f.prompts.items()), f.attributes) for g, f in found.items()]
    assert list(found) == list(expected)  # the groups in order of first appearance
    for g, want in expected.items():
        got = found[g]
        assert got.seconds == want.seconds
        assert list(got.prompts.items()) == list(want.prompts.items())  # sorted, float for float
        assert got.attributes == want.attributes


@st.composite
def ledgers(draw: Any, clips: list[split.Clip]) -> Ledger:
    """A random ledger over some of the clips (others are new), with clips the run no
    longer has, group rows for some groups only, and parts configured or not (a part
    of an older config, "", or none)."""
    records: dict[str, ClipRecord] = {}
    for c in clips:
        if draw(st.booleans()):
            subset = draw(st.sampled_from(SUBSETS))
            part = draw(st.sampled_from(PARTS + ("old", ""))) if subset == HELDOUT else ""
            # A moved clip: its ledger group may differ from this run's group.
            group = draw(st.sampled_from((c.group, *GROUPS)))
            records[c.clip_id] = ClipRecord(subset, ("1m",) if subset == LABELLED else (), group, part)
    for k in range(draw(st.integers(0, 3))):  # clips gone since
        records[f"gone{k}"] = ClipRecord(UNLABELLED, (), draw(st.sampled_from(GROUPS)), "")
    groups = {g: draw(st.sampled_from(("heldout", "training"))) for g in GROUPS if draw(st.booleans())}
    parts = {g: draw(st.sampled_from(PARTS + ("old",))) for g, side in groups.items()
             if side == "heldout" and draw(st.booleans())}
    return Ledger({}, groups, records, {}, parts)


PARTS = ("dev", "test")


def bound(clips: list[split.Clip], data: Any) -> list[split.Clip]:
    """The clips with some groups bound together (as near-duplicates bind them): a
    clip's group then differs from its base group."""
    merged = {g: data.draw(st.sampled_from(GROUPS)) for g in GROUPS}
    return [replace(c, group=min(c.base_group, merged[c.base_group])) for c in clips]


def reference_known_sides(clips: list[split.Clip], ledger: Ledger) -> dict[str, set[str]]:
    groups: dict[str, list[split.Clip]] = defaultdict(list)
    for c in clips:
        groups[c.group].append(c)
    fixed = {}
    for g, members in groups.items():
        sides = {"heldout" if ledger.clips[c.clip_id].subset == HELDOUT else "training"
                 for c in members if c.clip_id in ledger.clips}
        if not sides:
            sides = {ledger.groups[i] for i in {g} | {c.base_group for c in members} if i in ledger.groups}
        if sides:
            fixed[g] = sides
    return fixed


def reference_sorted(clips: list[split.Clip], sides: dict[str, str], known: dict[str, ClipRecord]) -> tuple:
    subset, labelled_before, new, reopened, items = {}, [], [], [], {}
    lost = gated = 0
    for c in clips:
        rec = known.get(c.clip_id)
        if (rec.subset if rec is not None else sides[c.group]) == HELDOUT:
            subset[c.clip_id] = HELDOUT
            continue
        subset[c.clip_id] = UNLABELLED
        if c.text is not None:
            items[c.clip_id] = (c.speaker, c.duration_s, c.plain_phones)
        if rec is not None and rec.subset == LABELLED:
            if c.text is None:
                lost += 1
            elif not c.eligible:
                gated += 1
            else:
                labelled_before.append(c.clip_id)
        elif c.eligible:
            (reopened if rec is not None else new).append(c.clip_id)
    return subset, items, labelled_before, new, reopened, gated, lost


def reference_parts(clips: list[split.Clip], subset: dict[str, str], places: dict[str, str],
                    known: dict[str, ClipRecord]) -> dict[str, str]:
    base_parts: dict[str, set[str]] = defaultdict(set)
    for c in clips:
        rec = known.get(c.clip_id)
        if rec is not None and rec.part in PARTS:
            base_parts[c.base_group].add(rec.part)
    parts = {}
    for c in clips:
        if subset[c.clip_id] == HELDOUT:
            rec = known.get(c.clip_id)
            mine = rec.part if rec is not None and rec.part in PARTS else ""
            base = next((p for p in PARTS if p in base_parts.get(c.base_group, ())), "")
            place = places.get(c.group, "training")
            parts[c.clip_id] = mine or base or (place if place != "training" else PARTS[0])
    return parts


@settings(max_examples=200, deadline=None)
@given(clip_lists(), st.data())
def test_clip_decisions_equal_a_loop_over_clips(clips: list[split.Clip], data: Any) -> None:
    """The sides the ledger fixes, each clip's subset before the tiers and its pool, and
    each held-out clip's part, on random ledgers: clips new, moved between groups, gone,
    groups bound by near-duplicates."""
    clips = bound(clips, data)
    ledger = data.draw(ledgers(clips))
    past = split.Past.of(clips, ledger.clips)
    fixed, straddling = split._known_sides(past, ledger)
    assert fixed == reference_known_sides(clips, ledger)
    assert straddling == sorted(g for g, s in fixed.items() if len(s) > 1)
    places = {g: data.draw(st.sampled_from(("training", *PARTS))) for g in GROUPS}
    sides = {g: "training" if p == "training" else HELDOUT for g, p in places.items()}
    found = split._sort_clips(clips, past, sides)
    subset, items, labelled_before, new, reopened, gated, lost = reference_sorted(clips, sides, dict(ledger.clips))
    assert list(found.subset.items()) == list(subset.items())
    assert {k: (v.speaker, v.duration_s, v.plain_phones) for k, v in found.items.items()} == items
    assert list(found.items) == list(items)
    assert (found.labelled_before, found.new, found.reopened) == (labelled_before, new, reopened)
    assert (found.gated_out, found.lost_transcript) == (gated, lost)
    assert split._clip_parts(past, found.heldout, places, PARTS) == reference_parts(clips, subset, places,
                                                                                    dict(ledger.clips))


def reference_fixed(clips: list[split.Clip], ledger: Ledger) -> tuple[dict[str, str], list[str], int]:
    """_fixed_places one clip at a time: the parts the ledger fixes, the held-out groups
    it leaves without a part, and the groups with an eligible clip that trains."""
    groups: dict[str, list[split.Clip]] = defaultdict(list)
    for c in clips:
        groups[c.group].append(c)
    known = ledger.clips
    fixed, pending, training_groups = {}, [], 0
    for g, side_set in reference_known_sides(clips, ledger).items():
        side = HELDOUT if HELDOUT in side_set else "training"
        if side == HELDOUT:
            found = {known[c.clip_id].part for c in groups[g] if c.clip_id in known}
            if not found - {""}:
                found = {ledger.parts.get(i, "") for i in {g} | {c.base_group for c in groups[g]}}
            part = next((p for p in PARTS if p in found), "")
            if part:
                fixed[g] = part
            else:
                pending.append(g)
        else:
            fixed[g] = "training"
        training_groups += any((known[c.clip_id].subset if c.clip_id in known else side) != HELDOUT
                               for c in groups[g] if c.eligible)
    return fixed, pending, training_groups


@settings(max_examples=300, deadline=None)
@given(clip_lists(), st.data())
def test_fixed_places_equal_a_loop_over_clips(clips: list[split.Clip], data: Any) -> None:
    clips = bound(clips, data)
    ledger = data.draw(ledgers(clips))
    fixed, pending, training_groups, _ = split._fixed_places(split.Past.of(clips, ledger.clips), ledger, PARTS)
    assert (fixed, pending, training_groups) == reference_fixed(clips, ledger)


def reference_changes(ledger: Ledger, assignment: split.Assignment, present: set[str]) -> dict[str, Any]:
    """The counts of _changes as comprehensions over every clip (no shared records)."""
    old, renamed = ledger.clips, {o: n for n, o in assignment.continues.items()}
    parts, tiers = assignment.parts, assignment.tiers
    kept = [(cid, old[cid], now) for cid, now in assignment.subset.items() if cid in old]
    before = {cid: {renamed.get(t, t) for t in rec.tiers} for cid, rec, _ in kept}
    added = Counter(now for cid, now in assignment.subset.items() if cid not in old)
    removed = Counter(old[cid].subset for cid in old.keys() - present)
    moved = Counter(f"{rec.subset}->{now}" for _, rec, now in kept if rec.subset != now)
    part_moves = Counter(f"{rec.part or '(none)'}->{parts.get(cid, '')}" for cid, rec, _ in kept
                         if rec.subset == HELDOUT and rec.part != parts.get(cid, ""))
    joined = Counter(t for cid, _, _ in kept for t in set(tiers.get(cid, ())) - before[cid])
    left = Counter(t for cid, _, _ in kept for t in before[cid] - set(tiers.get(cid, ())))
    return {"added": {s: added[s] for s in SUBSETS}, "removed": {s: removed[s] for s in SUBSETS},
            "moved": dict(sorted(moved.items())), "parts_moved": dict(sorted(part_moves.items())),
            "tiers_joined": dict(sorted(joined.items())), "tiers_left": dict(sorted(left.items()))}


@settings(max_examples=200, deadline=None)
@given(clip_lists(), st.data())
def test_changes_equal_a_loop_over_clips(clips: list[split.Clip], data: Any) -> None:
    """The changes against the ledger (added, moved, parts and tiers joined and left,
    under a renamed budget too) on random ledgers and assignments."""
    ledger = data.draw(ledgers(clips))
    subset, tiers, parts = {}, {}, {}
    for c in clips:
        subset[c.clip_id] = data.draw(st.sampled_from(SUBSETS))
        if subset[c.clip_id] == LABELLED:
            tiers[c.clip_id] = data.draw(st.sampled_from((("1m",), ("2m",), ("1m", "2m"))))
        elif subset[c.clip_id] == HELDOUT:
            parts[c.clip_id] = data.draw(st.sampled_from(PARTS))
    continues = data.draw(st.sampled_from(({"1m": "1m"}, {"2m": "1m"}, {})))
    assignment = split.Assignment(subset, tiers, {}, [], [], continues, 0, 0, 0, parts=parts)
    present = set(subset)
    expected = reference_changes(ledger, assignment, present)
    found = split._changes(ledger, assignment)
    assert {k: found[k] for k in expected} == expected
    # With the clips' ledger records as arrays, visiting the clips that may have changed.
    past = split.Past.of(clips, ledger.clips)
    found = split._changes(ledger, replace(assignment, past=past))
    assert past.ids == list(subset) or len(set(past.ids)) < len(past.ids)
    assert {k: found[k] for k in expected} == expected


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from("abcdefg"), max_size=30), st.data())
def test_bound_groups_equal_merging_pair_by_pair(base: list[str], data: Any) -> None:
    """Groups bound by the distinct pairs of groups equal merge_groups over every pair
    (one clip pair at a time), and their codes equal numbering the merged groups in
    order of first appearance."""
    count = len(base)
    pairs = data.draw(st.lists(st.tuples(st.integers(0, max(count - 1, 0)), st.integers(0, max(count - 1, 0))),
                               max_size=40)) if count else []
    unbound = np.array(data.draw(st.lists(st.booleans(), min_size=count, max_size=count)), dtype=bool)
    first = np.array([i for i, _ in pairs], np.int64)
    second = np.array([j for _, j in pairs], np.int64)
    found = split.bound_groups(base, first, second, unbound=unbound)
    expected = split.merge_groups(base, [(i, j) for i, j in pairs if not unbound[i] and not unbound[j]])
    assert found.merged == expected
    want_codes, want_names = split._codes(expected)
    assert found.group.tolist() == want_codes.tolist() and found.group_names == want_names
    base_codes, base_names = split._codes(base)
    assert found.base.tolist() == base_codes.tolist() and found.base_names == base_names
    assert split.bound_groups(base, first, second).merged == split.merge_groups(base, pairs)


@settings(max_examples=200, deadline=None)
@given(clip_lists(), st.data())
def test_past_from_the_clips_columns_equals_past_from_the_clips(clips: list[split.Clip], data: Any) -> None:
    """Past given build_clips' columns (group and base codes, eligibility, transcripts)
    equals Past read from the clips one by one; columns of other clips are not used."""
    clips = bound(clips, data)
    ledger = data.draw(ledgers(clips))
    group, group_names = split._codes([c.group for c in clips])
    base, base_names = split._codes([c.base_group for c in clips])
    none = np.zeros(len(clips))
    columns = split.Columns(group, pa.array(group_names, pa.string()), none, none.astype(bool), none,
                            none.astype(bool), none.astype(np.int64), none.astype(np.int64), [frozenset()],
                            np.array([c.eligible for c in clips], bool), none.astype(bool), base, base_names,
                            group_names, np.array([c.text is not None for c in clips], bool))
    plain = split.Past.of(clips, ledger.clips)
    for past in (split.Past.of(clips, ledger.clips, columns), split.Past.of(clips, ledger.clips, replace(
            columns, group=group[:-1]) if clips else columns)):
        for name in ("ids", "group_names", "base_names", "records", "part_names"):
            assert getattr(past, name) == getattr(plain, name), name
        for name in ("group", "base", "known", "held", "labelled", "part", "eligible", "transcribed"):
            assert getattr(past, name).tolist() == getattr(plain, name).tolist(), name


def columns_of(clips: list[split.Clip], flags: list[frozenset[str]] | None = None) -> split.Columns:
    """build_clips' columns of the clips (clip ``k`` at row ``k``), with each clip's flags."""
    group, group_names = split._codes([c.group for c in clips])
    base, base_names = split._codes([c.base_group for c in clips])
    speaker, speaker_names = split._codes([c.speaker for c in clips])
    flag_code, flag_sets = split._codes(flags if flags is not None else [c.flags for c in clips])
    none = np.zeros(len(clips))
    return split.Columns(group, pa.array(group_names, pa.string()), none, none.astype(bool), none, none.astype(bool),
                         none.astype(np.int64), flag_code, flag_sets, np.array([c.eligible for c in clips], bool),
                         np.array([bool(c.plain_phones) for c in clips], bool), base, base_names, group_names,
                         np.array([c.text is not None for c in clips], bool),
                         np.array([c.duration_s for c in clips], np.float64), speaker, len(speaker_names),
                         [c.plain_phones for c in clips])


def reference_describe(clips: list[split.Clip], inventory: set[str]) -> dict[str, Any]:
    """A subset's or tier's description read one clip at a time."""
    phones = set().union(*(c.plain_phones for c in clips))
    return {"clips": len(clips), "hours": round(math.fsum(c.duration_s for c in clips) / 3600.0, 4),
            "speakers": len({c.speaker for c in clips}), "groups": len({c.group for c in clips}),
            "transcribed_clips": sum(c.text is not None for c in clips), "phones": len(phones),
            "phone_share": round(len(phones) / len(inventory), 4) if inventory else 0.0}


def reference_sizes(clips: list[split.Clip], scorable: set[str]) -> dict[str, Any]:
    """A subset's or part's sizes read one clip at a time."""
    seconds = math.fsum(c.duration_s for c in clips)
    scored = [c.duration_s for c in clips if c.clip_id in scorable]
    untranscribed = [c.duration_s for c in clips if c.text is None]
    return {"clips": len(clips), "seconds": round(seconds, 3), "hours": round(seconds / 3600.0, 4),
            "scorable_clips": len(scored), "scorable_seconds": round(math.fsum(scored), 3),
            "scorable_hours": round(math.fsum(scored) / 3600.0, 4), "speakers": len({c.speaker for c in clips}),
            "groups": len({c.group for c in clips}), "untranscribed_clips": len(untranscribed),
            "untranscribed_seconds": round(math.fsum(untranscribed), 3)}


PHONE_SETS = ((), ("AA",), ("AA", "B"), ("K", "AA", "K"), ("SH",))


@settings(max_examples=200, deadline=None)
@given(clip_lists(), st.data())
def test_subset_facts_from_columns_equal_a_loop_over_clips(clips: list[split.Clip], data: Any) -> None:
    """The summary reads each subset's facts from build_clips' columns by row, and the
    corpus's as their union: the rows of each subset (some clips set aside), the
    descriptions and sizes equal those read one clip at a time, and the union's phones,
    groups and seconds (fsum over the subsets' durations one after the other) those of
    every kept clip."""
    clips = [replace(c, plain_phones=data.draw(st.sampled_from(PHONE_SETS)) if c.text else ()) for c in clips]
    columns = columns_of(clips)
    kept = [c for c in clips if data.draw(st.booleans())] if data.draw(st.booleans()) else list(clips)
    subset = {c.clip_id: data.draw(st.sampled_from(SUBSETS)) for c in kept}
    by_subset = split._by_subset(kept, subset, count=len(clips))
    facts = {s: split.ClipFacts.of(columns, by_subset[s]) for s in SUBSETS}
    assert frozenset().union(*(facts[s].phones for s in SUBSETS)) == set().union(*(c.plain_phones for c in kept))
    groups = np.logical_or.reduce([facts[s].groups for s in SUBSETS])
    assert {columns.group_list[g] for g in np.flatnonzero(groups).tolist()} == {c.group for c in kept}
    chained = [d for s in SUBSETS for d in facts[s].durations.tolist()]
    assert math.fsum(chained) == math.fsum(c.duration_s for c in kept)
    inventory = {"AA", "B", "K", "SH"}
    for s in SUBSETS:
        members = [c for c in kept if subset[c.clip_id] == s]
        assert by_subset[s].tolist() == [c.row for c in members]
        scorable = np.array([data.draw(st.booleans()) for _ in members], bool)
        named = {c.clip_id for c, on in zip(members, scorable.tolist(), strict=True) if on}
        assert split._describe(facts[s], inventory) == reference_describe(members, inventory)
        assert split.sizes(facts[s], scorable) == reference_sizes(members, named)


FLAG_NAMES = ("noisy", "upsampled", "near_duplicate", "peak_limited")


@settings(max_examples=200, deadline=None)
@given(st.lists(st.frozensets(st.sampled_from(FLAG_NAMES)), max_size=30), st.data())
def test_flag_counts_equal_a_count_per_clip(flags: list[frozenset[str]], data: Any) -> None:
    """The clips carrying each flag, counted by flag combination, equal a count clip by
    clip, over every clip and over some rows."""
    clips = [split.Clip(k, f"c{k:03d}", "alder", 1.0, "s.wav", None, "g", "g", f, (), False)
             for k, f in enumerate(flags)]
    columns = columns_of(clips, flags)
    rows = np.array([k for k in range(len(flags)) if data.draw(st.booleans())], np.int64)
    assert split._flag_counts(columns, None, FLAG_NAMES) == {f: sum(f in c for c in flags) for f in FLAG_NAMES}
    assert split._flag_counts(columns, rows, FLAG_NAMES) == \
        {f: sum(f in flags[k] for k in rows.tolist()) for f in FLAG_NAMES}


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.sampled_from([0.85, 0.8531249999999999, 0.86, 0.921875, 1.0, 0.99995, 0.98765, 0.91235]),
                          st.booleans()), max_size=30))
def test_pair_rows_equal_one_row_per_pair(rows: list[tuple[float, bool]]) -> None:
    """The summary's pair rows, each distinct similarity rounded once, equal rounding
    each pair's (repeats included, values that round half way)."""
    clips = [split.Clip(k, f"c{k:03d}", "alder", 1.0, "s.wav", None, "g", "g", frozenset(), (), False)
             for k in range(len(rows) + 1)]
    pairs = split.DuplicatePairs(np.arange(len(rows), dtype=np.int64), np.arange(1, len(rows) + 1, dtype=np.int64),
                                 np.array([r[0] for r in rows], np.float64), np.array([r[1] for r in rows], bool))
    expected = [{"clips": [f"c{k:03d}", f"c{k + 1:03d}"], "similarity": round(sim, 4), "identical": same}
                for k, (sim, same) in enumerate(rows)]
    assert split._pair_rows(clips, pairs) == expected


@settings(max_examples=100, deadline=None)
@given(st.lists(st.lists(st.one_of(st.none(), st.sampled_from(["wren", "alder", "", "héron"])), max_size=8),
                min_size=1, max_size=3))
def test_string_codes_equal_the_codes_of_the_column_values(chunks: list[list[str | None]]) -> None:
    column = pa.chunked_array(chunks, pa.string())
    codes, names = split._string_codes(column)
    want_codes, want_names = split._codes(column.to_pylist())
    assert codes.dtype == np.int64 and codes.tolist() == want_codes.tolist() and names == want_names


@settings(max_examples=200, deadline=None)
@given(clip_lists(), st.data())
def test_places_read_prompts_only_when_a_group_is_ranked(clips: list[split.Clip], data: Any) -> None:
    """Group facts without prompts equal the full ones but for the prompts, and the
    places chosen from them (prompts read only when a group is ranked) equal the places
    chosen from the full facts, with and without a ledger."""
    clips = bound(clips, data)
    ledger = data.draw(st.one_of(st.none(), ledgers(clips)))
    past = split.Past.of(clips, ledger.clips if ledger is not None else {})
    balance = split.Balance()
    full = split.group_facts(clips, balance, past)
    lean = split.group_facts(clips, balance, past, prompts=False)
    assert {g: replace(f, prompts={}) for g, f in full.items()} == lean
    targets = [PartTarget("dev", data.draw(st.sampled_from([0.0, 1.0, 3.0])), text_disjoint=data.draw(st.booleans())),
               PartTarget("test", data.draw(st.sampled_from([0.5, 2.0, 8.0])))]
    want = split._choose_places(past, ledger, full, seed=3, targets=targets, balance=balance)
    got = split._choose_places(past, ledger, lean, seed=3, targets=targets, balance=balance, with_prompts=lambda: full)
    assert got[:2] == want[:2]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 300), max_size=60))
def test_small_unique_equals_numpy_unique(values: list[int]) -> None:
    codes = np.array(values, np.int64)
    distinct, at = split._small_unique(codes)
    want, want_at = np.unique(codes, return_inverse=True)
    assert distinct.tolist() == want.tolist() and at.tolist() == want_at.ravel().tolist()


@settings(max_examples=50, deadline=None)
@given(st.integers(0, 40))
def test_empty_lists_equal_converted_empty_lists(count: int) -> None:
    kind = pa.list_(pa.string())
    assert split._empty_lists(count, kind).equals(pa.array([[] for _ in range(count)], kind))


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(st.lists(st.sampled_from(["K", "AE", "T", "|", "ʃ", ""]), max_size=6), max_size=6),
                min_size=1, max_size=3), st.sampled_from(["", "|", "T"]), st.integers(0, 3), st.data())
def test_plain_phones_equal_each_row_filtered(chunks: list[list[list[str]]], boundary: str, start: int,
                                              data: Any) -> None:
    """Each row's phones without word boundaries, from codes and slices of one list, equal
    each row's list filtered one phone at a time; chunked and sliced columns too."""
    column = pa.chunked_array(chunks, pa.list_(pa.string()))
    column = column.slice(min(start, len(column)), data.draw(st.integers(0, len(column))))
    expected = [tuple(p for p in row if not boundary or p != boundary) for row in column.to_pylist()]
    assert split.plain_phones(column, word_boundary=boundary) == expected


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 7), st.integers(0, 7), st.sampled_from([0.5, 0.75, 0.9, 1.0])),
                max_size=30))
def test_best_partners_equal_a_sort_of_the_pairs(entries: list[tuple[int, int, float]]) -> None:
    """Each item's partner of highest similarity, ties to the smaller partner, equals the
    first entry per item of the entries sorted by item, descending similarity, partner."""
    me = np.array([e[0] for e in entries], np.int64)
    other = np.array([e[1] for e in entries], np.int64)
    similarity = np.array([e[2] for e in entries], np.float64)
    expected = [-1] * 8
    for item, partner, _ in sorted(entries, key=lambda e: (e[0], -e[2], e[1])):
        if expected[item] == -1:
            expected[item] = partner
    assert split.best_partners(me, other, similarity, count=8).tolist() == expected


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 5), st.integers(0, 5)), max_size=12))
def test_strictly_sorted_equals_comparing_the_pairs(pairs: list[tuple[int, int]]) -> None:
    first = np.array([p[0] for p in pairs], np.int64)
    second = np.array([p[1] for p in pairs], np.int64)
    assert split._strictly_sorted(first, second) == all(a < b for a, b in itertools.pairwise(pairs))
