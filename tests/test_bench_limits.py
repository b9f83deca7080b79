"""``make bench``'s limits: what the wall-time targets leave, from the run's own rounds.

The figures are arithmetic on the rounds' timings; checked here on timings whose
answers are worked by hand, so a later edit of the benchmark cannot turn a limit into
a figure that always looks met.
"""

from __future__ import annotations

import doctest

import pytest

from bench import run


def test_the_examples_in_the_docstring_hold() -> None:
    assert doctest.testmod(run, verbose=False).failed == 0


def test_each_limit_is_taken_within_a_round_and_the_room_from_the_fastest_runs() -> None:
    timings = {"cold": [4.0, 3.8, 5.0], "floor": [2.0, 2.0, 2.5], "handwritten": [7.5, 7.8, 9.0],
               "rebuild": [0.70, 0.60, 0.90], "imports": [0.20, 0.15, 0.25]}
    stages = [{"ingest": 0.3, "audio": 2.8}, {"ingest": 0.3, "audio": 2.6}, {"ingest": 0.4, "audio": 3.5}]
    got = run.limits(timings, stages, new_share=0.05)
    # audio / floor per round: 1.4, 1.3, 1.4 -> median 1.4
    assert got["audio_over_floor"] == pytest.approx(1.4)
    assert got["cold_for_handwritten_s"] == pytest.approx(2.5)
    assert got["audio_s"] == pytest.approx(2.6)
    # imports + 5 % of the audio stage: 0.34, 0.28, 0.425 s; over cold: 0.085, 0.0737, 0.085
    assert got["rebuild_unavoidable_over_cold"] == pytest.approx(0.085)
    # 10 % of the fastest cold run (0.38 s) less the least unavoidable part (0.28 s)
    assert got["rebuild_room_s"] == pytest.approx(0.10)
    # the fastest rebuild (0.60 s) less the same 0.28 s
    assert got["rebuild_rest_s"] == pytest.approx(0.32)


def test_rounds_that_do_not_pair_up_are_refused() -> None:
    timings = {"cold": [4.0, 3.8], "floor": [2.0], "handwritten": [7.5, 7.8], "rebuild": [0.7, 0.6],
               "imports": [0.2, 0.15]}
    with pytest.raises(ValueError):
        run.limits(timings, [{"audio": 2.8}, {"audio": 2.6}], new_share=0.05)
