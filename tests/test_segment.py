"""Segmentation of long recordings (pipeline.signal.segment) on synthetic decision sequences.

Expected cuts are worked out by hand from the rule in the module docstring; the
general properties are checked with hypothesis on random sequences."""

from __future__ import annotations

import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.errors import ParameterError
from pipeline.core.schemas_io import load_schema
from pipeline.signal.segment import segment_id, split_frames
from tests.conftest import examples

FRAME_MS = 100  # 10 frames a second keeps hand-worked examples readable


def sequence(parts: list[tuple[int, float]]) -> np.ndarray:
    """Decisions from (is_speech, seconds) pairs."""
    return np.concatenate([np.full(round(s * 1000 / FRAME_MS), bool(v)) for v, s in parts])


def split(speech: np.ndarray, energy: np.ndarray | None = None, *, pad_ms: int = 0,
          min_s: float = 2.0, max_s: float = 15.0) -> list[tuple[int, int]]:
    energy = np.zeros(len(speech)) if energy is None else energy
    return split_frames(speech, energy, frame_ms=FRAME_MS, segment_min_s=min_s, segment_max_s=max_s, pad_ms=pad_ms)


def test_longest_pauses_are_cut_first():
    # 38 s: pauses of 0.4, 1.5, 0.8 and 0.3 s. By hand: the 1.5 s pause (14.4-15.9 s)
    # goes first; the left 14.4 s fit; the right 22.1 s are cut in their longest
    # pause, 0.8 s at 24.9-25.7 s. A first-fit rule would have cut at 8.0 s instead.
    speech = sequence([(1, 8), (0, 0.4), (1, 6), (0, 1.5), (1, 9), (0, 0.8), (1, 7), (0, 0.3), (1, 5)])
    assert split(speech) == [(0, 144), (159, 249), (257, 380)]


def test_padding_keeps_part_of_each_cut_pause():
    speech = sequence([(0, 1), (1, 8), (0, 0.4), (1, 6), (0, 1.5), (1, 9), (0, 2)])
    # Speech at frames 10-90, 94-154, 169-259. Outer silence is trimmed to 0.2 s
    # (2 frames); the cut pause (frames 154-169) keeps 2 frames on each side.
    assert split(speech, pad_ms=200) == [(8, 156), (167, 261)]


def test_a_pause_shorter_than_two_pads_is_cut_in_its_middle():
    speech = sequence([(1, 10), (0, 0.3), (1, 10)])
    assert split(speech, pad_ms=200) == [(0, 101), (101, 203)]


def test_without_pauses_the_quietest_frame_near_the_longest_length_is_used():
    # 40 s of unbroken speech. Window for the first cut: frames 85..150 (the upper
    # half of [2 s, 15 s]); the dips at 60 (outside) and 120 (inside) decide it.
    speech = np.ones(400, dtype=bool)
    energy = np.full(400, -20.0)
    energy[[60, 120, 250]] = [-60.0, -40.0, -40.0]
    assert split(speech, energy) == [(0, 120), (120, 250), (250, 400)]


def test_a_pause_too_near_an_end_is_not_used():
    # Only pause leaves 1.0 s on its left, below segment_min_s: the quiet-frame rule applies.
    speech = sequence([(1, 1), (0, 0.5), (1, 20)])
    segments = split(speech)
    assert segments[0][0] == 0 and all(b - a >= 20 for a, b in segments)


def test_short_spans_are_kept_whole_and_silence_gives_nothing():
    assert split(sequence([(0, 1), (1, 5), (0, 1)])) == [(10, 60)]
    assert split(np.zeros(200, dtype=bool)) == []


def test_results_and_ids_are_stable():
    speech = sequence([(1, 8), (0, 0.4), (1, 6), (0, 1.5), (1, 9), (0, 0.8), (1, 7)])
    first = split(speech, pad_ms=200)
    assert first == split(speech.copy(), pad_ms=200)
    # By hand: cut in the 1.5 s pause (frames 144-159, 2 frames of pad kept), then
    # the right part (frames 157-327) in the 0.8 s pause (249-257).
    assert first == [(0, 146), (157, 251), (255, 327)]
    ids = [segment_id("harbour-log-0123456789", start_ms=a * FRAME_MS) for a, _ in first]
    assert ids == ["harbour-log-0123456789_00000000", "harbour-log-0123456789_00015700",
                   "harbour-log-0123456789_00025500"]
    # The clip_id column of schemas/audio.schema.json must accept them.
    pattern = re.compile(load_schema("audio")["properties"]["clip_id"]["pattern"])
    assert all(pattern.fullmatch(i) for i in ids)


def test_bad_bounds_are_refused():
    with pytest.raises(ParameterError, match="segment_min_s=5"):
        split(np.ones(10, bool), min_s=5, max_s=5)
    with pytest.raises(ParameterError, match="energy_db"):
        split_frames(np.ones(10, bool), np.zeros(9), frame_ms=30, segment_min_s=1, segment_max_s=2, pad_ms=0)


@settings(max_examples=examples(150), deadline=None)
@given(
    runs=st.lists(st.tuples(st.booleans(), st.integers(1, 60)), min_size=1, max_size=40),
    min_frames=st.integers(5, 40),
    extra=st.integers(1, 120),
    pad_frames=st.integers(0, 4),
    seed=st.integers(0, 2**16),
)
def test_segments_are_ordered_disjoint_bounded_and_cover_all_speech(runs, min_frames, extra, pad_frames, seed):
    speech = np.concatenate([np.full(n, v) for v, n in runs])
    energy = np.random.default_rng(seed).uniform(-60, -10, len(speech))
    max_frames = min_frames + extra
    segments = split(speech, energy, pad_ms=pad_frames * FRAME_MS,
                     min_s=min_frames * FRAME_MS / 1000, max_s=max_frames * FRAME_MS / 1000)
    if not speech.any():
        assert segments == []
        return
    covered = np.zeros(len(speech), dtype=int)
    for a, b in segments:
        assert 0 <= a < b <= len(speech)
        assert b - a <= max_frames
        assert speech[a:b].any()
        covered[a:b] += 1
    assert all(s1[1] <= s2[0] for s1, s2 in zip(segments, segments[1:], strict=False))  # ordered, disjoint
    assert covered.max() == 1
    assert np.all(covered[speech] == 1)  # no speech frame is lost
    if max_frames >= 2 * min_frames:
        # Cuts leave both sides at least min long; a segment can only end up shorter
        # when trimming took silence off it, which leaves an uncovered frame beside it.
        for a, b in segments:
            if b - a < min_frames and len(segments) > 1:
                assert (a > 0 and covered[a - 1] == 0) or (b < len(speech) and covered[b] == 0)
