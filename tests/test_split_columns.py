"""The split stage's columnar helpers against plain per-clip reference code.

The stage computes its per-group and per-clip decisions with arrays (codes per clip,
sums by code) rather than a Python loop per clip; each test here writes the rule the
straightforward way, one clip at a time, and checks that both give the same values
(floats compared exactly: the outputs must not change by a bit) on random clips.
"""

from __future__ import annotations

import math
from collections import Counter, defaultdict
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.stages import split
from pipeline.stages.heldout import GroupFacts
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
            speaking_rate=None, rate_z=None, near_duplicate_of=None, eligible=eligible))
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
    assert list(found) == list(expected)  # the groups in order of first appearance
    for g, want in expected.items():
        got = found[g]
        assert got.seconds == want.seconds
        assert list(got.prompts.items()) == list(want.prompts.items())  # sorted, float for float
        assert got.attributes == want.attributes
