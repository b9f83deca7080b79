"""The phone inventory's tallies and classes against the simple loops they replace."""

from __future__ import annotations

import math
import re
from collections import Counter

from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.stages.inventory import _class, _tally
from pipeline.text.ipa import feature_table, phone_class, table_units


def reference_tally(clips: list[tuple[list[str], float]], *, boundary: str) -> tuple[Counter[str], dict[str, float]]:
    """Clip by clip: each sound takes an equal share of its clip's duration."""
    counts: Counter[str] = Counter()
    shares: dict[str, list[float]] = {}
    for phones, duration_s in clips:
        sounds = [p for p in phones if not (boundary and p == boundary)]
        counts.update(phones)
        for p in sounds:
            shares.setdefault(p, []).append(duration_s / len(sounds))
    return counts, {p: math.fsum(s) for p, s in shares.items()}


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.lists(st.sampled_from(["a", "b", "ŋ", "|", "", "AA1"]), max_size=8),
                          st.floats(0, 1e4, allow_nan=False)), max_size=12),
       st.sampled_from(["|", "", "a"]))
def test_tally_equals_a_loop_over_clips(clips: list[tuple[list[str], float]], boundary: str) -> None:
    counts, seconds = _tally(clips, boundary=boundary)
    want_counts, want_seconds = reference_tally(clips, boundary=boundary)
    assert counts == want_counts
    assert seconds == want_seconds  # the same floats, not merely close


def test_upper_case_symbols_are_no_segment_of_the_feature_table() -> None:
    # panphon's ipa_all.csv: its ASCII segments are lower-case letters, so an ARPAbet
    # symbol (upper-case letters, a stress digit) is classed "" without the table.
    table = feature_table()
    assert not [k for k in table if re.fullmatch(r"[A-Z][A-Z0-9]*", k)]
    for symbol in ("AA", "AA1", "ZH", "T", "ER0", "a", "ŋ", "t͡ʃ", "X", "q"):
        want = phone_class(symbol) if table_units(symbol) in table else ""
        assert _class(symbol, "|", True) == want
