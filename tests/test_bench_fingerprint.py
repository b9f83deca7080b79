"""``bench/bench_fingerprint.py`` runs against the library as it is now.

The robustness table it prints is what the README quotes for the fingerprint; a
change of the search's module once left the script calling a function that had
moved, and only ``make bench`` noticed. Here its ``measure`` runs on two short
synthetic clips (invented signals: amplitude-modulated noise of two seeds), with the
fingerprint the audio stage uses.
"""

from __future__ import annotations

import numpy as np

from bench.bench_fingerprint import COLUMNS, RATE, copies, measure


def _clip(seed: int) -> np.ndarray:
    """3 s of noise under a 4 Hz syllable-like envelope, at 16 kHz."""
    rng = np.random.default_rng(seed)
    t = np.arange(3 * RATE) / RATE
    envelope = 0.5 * (1 + np.sin(2 * np.pi * 4 * t + seed))
    return (0.2 * envelope * rng.standard_normal(t.size)).astype(np.float64)


def test_measure_reports_every_kind_of_copy_for_each_column() -> None:
    versions = [copies(_clip(seed), RATE) for seed in (1, 2)]
    for func, shift in COLUMNS.values():
        result = measure(func, versions, ["a", "a"], max_offset_frames=shift)
        kinds = [kind for kind in versions[0] if kind != "original"]
        assert all(0.0 <= result[kind]["recall"] <= 1.0 for kind in kinds)
        assert result["same_speaker_pairs"] == 1
        assert result["cpu_s_per_audio_minute"] > 0


def test_the_audio_stage_fingerprint_finds_a_quieter_copy_and_not_other_noise() -> None:
    # A gain change moves every band energy by the same factor, so the sign of each
    # energy difference, the fingerprint's bits, stays (Haitsma and Kalker 2002).
    versions = [copies(_clip(seed), RATE) for seed in (1, 2)]
    func, shift = COLUMNS["after"]
    result = measure(func, versions, ["a", "a"], max_offset_frames=shift)
    assert result["-12 dB"]["recall"] == 1.0
    assert result["false_matches"] == 0
    assert result["pairs_reported_among_originals"] == 0
