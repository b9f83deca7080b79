"""Tests of the robust z-scores in pipeline.stages.gates (the rate_outlier gate's measure).

References used: numpy's median for the modified z-score formula of Iglewicz and
Hoaglin (1993), and pandas.factorize for the group codes.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.errors import ParameterError
from pipeline.stages import gates

# ---------------------------------------------------------------------------------------
# Robust z-scores
# ---------------------------------------------------------------------------------------


def direct_modified_z(x: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Iglewicz and Hoaglin (1993): M = 0.6745 (x - median) / MAD, with numpy's median."""
    med = np.median(ref)
    return 0.6745 * (x - med) / np.median(np.abs(ref - med))


def test_robust_z_hand_case_and_outlier() -> None:
    # Hand case: median 12, MAD median(|[-2,-1,0,1,28]|) = 1, so z = 0.6745 * (x - 12).
    values = np.array([10.0, 11.0, 12.0, 13.0, 40.0])
    z = gates.robust_z_scores(values, np.array(["a"] * 5), min_group_size=3)
    np.testing.assert_allclose(z, 0.6745 * (values - 12.0))
    np.testing.assert_allclose(z, direct_modified_z(values, values))
    # Iglewicz and Hoaglin's cut-off |z| > 3.5: only the outlier is flagged.
    assert (np.abs(z) > gates.OUTLIER_ABS_Z).tolist() == [False, False, False, False, True]


def test_robust_z_per_group_and_small_groups() -> None:
    rng = np.random.default_rng(7)
    fast = rng.normal(16.0, 1.0, size=30)  # phones per second of one speaker
    slow = rng.normal(10.0, 1.0, size=30)
    slow[4] = 16.5  # normal for the fast speaker, an outlier for this one
    lone = np.array([12.0, 13.0])
    values = np.concatenate([fast, slow, lone])
    groups = np.array(["fast"] * 30 + ["slow"] * 30 + ["new"] * 2, dtype=object)
    z = gates.robust_z_scores(values, groups, min_group_size=5)
    np.testing.assert_allclose(z[:30], direct_modified_z(fast, fast))
    np.testing.assert_allclose(z[30:60], direct_modified_z(slow, slow))
    # The small group is scored against every value.
    np.testing.assert_allclose(z[60:], direct_modified_z(lone, values))
    flagged = np.flatnonzero(np.abs(z) > gates.OUTLIER_ABS_Z)
    assert flagged.tolist() == [34]


def test_robust_z_zero_mad_missing_values_and_labels() -> None:
    # MAD = 0 fallback (documented): (x - median) / (1.253314 * mean absolute deviation).
    values = np.array([5.0, 5.0, 5.0, 5.0, 6.0])
    z = gates.robust_z_scores(values, np.zeros(5), min_group_size=2)
    np.testing.assert_allclose(z, (values - 5.0) / (1.253314 * 0.2))
    assert gates.robust_z_scores(np.full(4, 3.0), np.zeros(4), min_group_size=2).tolist() == [0.0] * 4
    # NaN values get NaN and count in no statistic; None labels use the whole set.
    values = np.array([1.0, 2.0, np.nan, 3.0, 4.0, 100.0])
    groups = np.array(["a", "a", "a", None, None, "a"], dtype=object)
    z = gates.robust_z_scores(values, groups, min_group_size=3)
    finite = values[~np.isnan(values)]
    assert np.isnan(z[2])
    np.testing.assert_allclose(z[[0, 1, 5]], direct_modified_z(values[[0, 1, 5]], values[[0, 1, 5]]))
    np.testing.assert_allclose(z[[3, 4]], direct_modified_z(values[[3, 4]], finite))
    with pytest.raises(ParameterError, match="min_group_size"):
        gates.robust_z_scores(values, groups, min_group_size=1)
    with pytest.raises(ParameterError, match="groups"):
        gates.robust_z_scores(values, groups[:3], min_group_size=3)


def test_mad_floor_keeps_ordinary_variation_unflagged() -> None:
    """Twelve clips spread like ordinary reading (about +-8 %, values invented) whose MAD
    happens to be tiny: without a floor a clip 12 % off scores past Iglewicz and
    Hoaglin's 3.5; with a 5 % floor it does not, while a doubled rate still does."""
    rates = np.array([10.0, 10.02, 9.98, 10.01, 9.99, 10.0, 10.03, 9.97, 10.0, 9.2, 10.8, 11.2])
    groups = np.zeros(len(rates))
    plain = gates.robust_z_scores(rates, groups, min_group_size=5)
    floored = gates.robust_z_scores(rates, groups, min_group_size=5, min_mad_fraction=0.05)
    assert abs(plain[-1]) > 3.5 and abs(floored[-1]) < 3.5
    # The floor never raises a score, and leaves a gross mismatch flagged.
    assert np.all(np.abs(floored) <= np.abs(plain) + 1e-12)
    doubled = gates.robust_z_scores(np.append(rates, 20.0), np.zeros(13), min_group_size=5, min_mad_fraction=0.05)
    assert doubled[-1] > 3.5
    # With the floor in force the score is 0.6745 * (x - median) / (0.05 * median).
    med = np.median(rates)
    assert floored[-1] == pytest.approx(0.6745 * (rates[-1] - med) / (0.05 * med))


def test_robust_z_labels_factorised_like_pandas() -> None:
    import pandas as pd

    labels = np.array(["b", None, "a", "b", float("nan"), "a", 3, 3], dtype=object)
    want, _ = pd.factorize(labels, use_na_sentinel=True)
    np.testing.assert_array_equal(gates._factorize(labels), want)


def test_integer_labels_factorised_like_pandas_and_scored_as_their_text() -> None:
    # The split stage passes the speakers as integer codes: the same groups as the names.
    import pandas as pd

    rng = np.random.default_rng(3)
    codes = rng.integers(0, 7, size=400) * 5 + 2
    want, _ = pd.factorize(codes)
    np.testing.assert_array_equal(gates._factorize(codes), want)
    rates = rng.normal(12.0, 2.0, size=400)
    rates[::17] = np.nan
    names = np.array([f"speaker {c}" for c in codes], dtype=object)
    np.testing.assert_array_equal(gates.robust_z_scores(rates, codes, min_group_size=60),
                                  gates.robust_z_scores(rates, names, min_group_size=60))


def _one_group_at_a_time(x: np.ndarray, codes: np.ndarray, min_mad_fraction: float) -> np.ndarray:
    """Each group's modified z-scores by _modified_z, one group at a time (the plain rule)."""
    out = np.empty(x.shape)
    for g in np.unique(codes).tolist():
        mine = np.flatnonzero(codes == g)
        out[mine] = gates._modified_z(x[mine], x[mine], min_mad_fraction)
    return out


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 4), st.sampled_from([0.0, 1.0, 2.5, 3.0, 7.25, 11.0, 0.1, 0.3, 0.7, 1.3, 2.0])),
                max_size=60), st.sampled_from([0.0, 0.05, 0.5]))
def test_grouped_scores_equal_one_group_at_a_time(items: list[tuple[int, float]], min_mad_fraction: float) -> None:
    """All groups at once give every score as the same float as _modified_z per group
    (repeated values, groups whose MAD is 0, odd and even sizes, a MAD floor)."""
    codes = np.array([g for g, _ in items], np.int64)
    x = np.array([v for _, v in items], np.float64)
    found = gates.grouped_modified_z(x, codes, min_mad_fraction=min_mad_fraction)
    assert found.tolist() == _one_group_at_a_time(x, codes, min_mad_fraction).tolist()
    # Through robust_z_scores: labels that are codes already score as labels it numbers.
    numbered = gates.robust_z_scores(x, codes.astype(object), min_group_size=2, min_mad_fraction=min_mad_fraction)
    for labels in (codes, codes * 1000 + 7):
        assert gates.robust_z_scores(x, labels, min_group_size=2, min_mad_fraction=min_mad_fraction).tolist() == \
            numbered.tolist()


def test_grouped_scores_equal_one_group_at_a_time_on_larger_groups() -> None:
    """Larger groups of few distinct values (invented), where groups whose MAD is 0 add
    their deviations in an order that changes the last bit of the mean."""
    rng = np.random.default_rng(7)
    for _ in range(300):
        count = int(rng.integers(0, 80))
        x = rng.choice([1.0, 2.0, 2.5, 7.0, 0.3, 0.1, 1.3], count)
        codes = rng.integers(0, 5, count)
        assert gates.grouped_modified_z(x, codes).tolist() == _one_group_at_a_time(x, codes, 0.0).tolist()
