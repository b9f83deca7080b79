"""Many pairs at once equal one pair at a time.

The reference is :func:`pipeline.signal.fingerprint.fingerprint_similarity`, itself
checked against a loop over offsets and analytic cases in tests/test_fingerprint.py.
Small alphabets with 0 (silence) among the symbols make positions where both clips are
0, which the measure leaves out; lengths from 0 to past ``min_overlap_frames`` cover
empty clips, short overlaps and offsets no pair can use.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.core.errors import ParameterError
from pipeline.signal import pair_similarity
from pipeline.signal.fingerprint import fingerprint_similarity
from pipeline.signal.pair_similarity import pair_similarities


def _corpus(rng: np.random.Generator) -> list[np.ndarray]:
    symbols = np.concatenate([[0, 0], rng.integers(1, 2**32, size=int(rng.integers(1, 40)), dtype=np.uint32)])
    fps = [symbols[rng.integers(0, symbols.size, size=int(rng.integers(0, 90)))].astype(np.uint32)
           for _ in range(int(rng.integers(1, 25)))]
    for k in range(len(fps) // 3):  # shifted copies with bits flipped: scores near 1 as well as near 0.5
        copy = fps[int(rng.integers(0, len(fps)))].copy()
        copy ^= (rng.random(copy.size) < 0.2).astype(np.uint32) << np.uint32(int(rng.integers(0, 32)))
        fps[k] = copy[int(rng.integers(0, 5)):]
    return fps


@pytest.mark.parametrize("seed", range(40))
def test_equals_one_pair_at_a_time(seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(seed)
    # Small blocks too, so a block boundary falls between pairs.
    monkeypatch.setattr(pair_similarity, "_BLOCK_ELEMENTS", int(rng.choice([1, 200 * 33, 1 << 21])))
    fps = _corpus(rng)
    offsets = np.r_[0, np.cumsum([fp.size for fp in fps])].astype(np.int64)
    values = np.concatenate(fps).astype(np.uint32)
    first, second = rng.integers(0, len(fps), size=(2, int(rng.integers(0, 60))))
    shift = {"max_offset_frames": int(rng.choice([0, 1, 4, 16])), "min_overlap_frames": int(rng.choice([1, 6, 32]))}
    got = pair_similarities(values, offsets, first, second, **shift)
    want = [fingerprint_similarity(fps[i], fps[j], **shift) for i, j in zip(first, second, strict=True)]
    assert got.dtype == np.float64
    assert got.tolist() == want  # exactly: the same integer counts and the same division


@pytest.mark.parametrize("seed", range(3))
def test_long_clips_and_clips_at_the_ends_of_values(seed: int) -> None:
    # Clips of 2,100 frames count more than 16 bits of errors; the first clip starts at
    # values[0] and the last is shorter than the offsets, so its window runs past the end.
    rng = np.random.default_rng(seed)
    long = rng.integers(0, 2**32, size=2100, dtype=np.uint32)
    long[rng.integers(0, long.size, size=300)] = 0
    fps = [long[5:], rng.integers(0, 2**32, size=40, dtype=np.uint32), long, long[::-1].copy(), long[:9].copy()]
    offsets = np.r_[0, np.cumsum([fp.size for fp in fps])].astype(np.int64)
    values = np.concatenate(fps)
    first, second = np.array([(i, j) for i in range(len(fps)) for j in range(len(fps))]).T
    for shift in ({}, {"max_offset_frames": 3, "min_overlap_frames": 8}):
        got = pair_similarities(values, offsets, first, second, **shift)
        assert got.tolist() == [fingerprint_similarity(fps[i], fps[j], **shift) for i, j in zip(first, second, strict=True)]
    alone = pair_similarities(fps[4], np.array([0, 9]), np.array([0]), np.array([0]))  # values shorter than 9 + 16
    assert alone.tolist() == [fingerprint_similarity(fps[4], fps[4])]


def test_empty_clips_and_no_pairs_score_zero() -> None:
    fp = np.arange(1, 50, dtype=np.uint32)
    values, offsets = fp, np.array([0, 0, 49])
    assert pair_similarities(values, offsets, np.array([0, 1, 1]), np.array([1, 0, 1])).tolist() == [0.0, 0.0, 1.0]
    assert pair_similarities(values, offsets, np.zeros(0, int), np.zeros(0, int)).size == 0


@pytest.mark.parametrize("bad", [{"max_offset_frames": -1}, {"max_offset_frames": True}, {"min_overlap_frames": 0},
                                 {"min_overlap_frames": 1.5}])
def test_bad_parameters_name_the_value(bad: dict[str, object]) -> None:
    name, value = next(iter(bad.items()))
    with pytest.raises(ParameterError, match=f"{name}={value!r}"):
        pair_similarities(np.zeros(3, np.uint32), np.array([0, 3]), np.array([0]), np.array([0]), **bad)
