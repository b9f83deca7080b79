"""pipeline.signal.iir against the reference library: scipy.signal.sosfilt and scipy.signal.bilinear."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from pipeline.core.errors import ParameterError
from pipeline.signal import iir, loudness

# float32 products, float64 state: the block form rounds like float32 arithmetic.
RELATIVE_TOLERANCE = 1e-5


def _relative_error(got: np.ndarray, want: np.ndarray) -> float:
    return float(np.max(np.abs(got - want)) / np.max(np.abs(want)))


@pytest.mark.parametrize("sample_rate", [8000, 16000, 22050, 44100, 48000])
def test_k_weighting_matches_sosfilt(sample_rate: int) -> None:
    sos = loudness.k_weighting_sos(sample_rate=sample_rate)
    x = np.random.default_rng(sample_rate).standard_normal(sample_rate * 7).astype(np.float32) * 0.3
    assert _relative_error(iir.sosfilt(sos, x), scipy.signal.sosfilt(sos, x.astype(np.float64))) < RELATIVE_TOLERANCE


def test_no_drift_over_ten_minutes() -> None:
    # 150,000 blocks: the states are carried in float64, so the error does not grow.
    sos = loudness.k_weighting_sos(sample_rate=16000)
    x = np.random.default_rng(5).standard_normal(16000 * 600).astype(np.float32)
    want = scipy.signal.sosfilt(sos, x.astype(np.float64))
    got = iir.sosfilt(sos, x)
    tail = slice(-16000, None)
    assert _relative_error(got[tail], want[tail]) < RELATIVE_TOLERANCE


def test_other_filters_lengths_and_block_sizes() -> None:
    # A stable 6th-order Butterworth band pass (three sections) and a resonant peak.
    peak_b, peak_a = scipy.signal.iirpeak(1000, 30, fs=16000)
    sos = np.vstack([scipy.signal.butter(3, [300, 3400], btype="bandpass", fs=16000, output="sos"),
                     np.concatenate([peak_b, peak_a])])
    rng = np.random.default_rng(2)
    for n in (1, 2, 63, 64, 65, 1000, 48_001):
        x = rng.standard_normal(n)
        want = scipy.signal.sosfilt(sos, x)
        for block in (2, 17, 64, 256):
            got = iir.sosfilt(sos, x, block_frames=block)
            assert got.shape == (n,) and got.dtype == np.float32
            np.testing.assert_allclose(got, want, rtol=0, atol=RELATIVE_TOLERANCE * max(1.0, np.abs(want).max()))


def test_impulse_response_and_empty_input() -> None:
    sos = np.array([[0.5, 0.5, 0.0, 1.0, -0.2, 0.0]])
    impulse = np.zeros(200)
    impulse[0] = 1.0
    np.testing.assert_allclose(iir.sosfilt(sos, impulse), scipy.signal.sosfilt(sos, impulse), atol=1e-7)
    assert iir.sosfilt(sos, np.zeros(0)).shape == (0,)


def test_state_space_reproduces_the_transfer_function() -> None:
    sos = loudness.k_weighting_sos(sample_rate=48000)
    a, b, c, d = iir.state_space(sos)
    z = np.exp(1j * np.linspace(0.01, np.pi - 0.01, 50))
    got = np.array([c @ np.linalg.solve(zk * np.eye(4) - a, b) + d for zk in z])
    _, want = scipy.signal.sosfreqz(sos, worN=np.angle(z))
    np.testing.assert_allclose(got, want, rtol=1e-9)


@pytest.mark.parametrize("sample_rate", [8000, 11025, 16000, 22050, 32000, 44100, 48000, 96000])
def test_bilinear_matches_scipy(sample_rate: int) -> None:
    sos = loudness.k_weighting_sos(sample_rate=sample_rate)
    for row, (f0, q, num) in zip(sos, [
        (loudness.SHELF_F0_HZ, loudness.SHELF_Q, (loudness.SHELF_HF_GAIN, loudness.SHELF_MID_COEF, 1.0)),
        (loudness.HIGHPASS_F0_HZ, loudness.HIGHPASS_Q, (loudness.HIGHPASS_GAIN, 0.0, 0.0)),
    ], strict=True):
        w0 = 2.0 * sample_rate * np.tan(np.pi * f0 / sample_rate)
        b, a = scipy.signal.bilinear([num[0], num[1] * w0, num[2] * w0 * w0], [1.0, w0 / q, w0 * w0], fs=sample_rate)
        np.testing.assert_allclose(row, np.concatenate([b, a]), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("bad", [
    {"sos": np.zeros((1, 5))},
    {"sos": np.array([[1.0, 0, 0, 2.0, 0, 0]])},
    {"samples": np.zeros((4, 2))},
    {"samples": np.arange(4)},
    {"block_frames": 1},
    {"block_frames": True},
])
def test_bad_parameters_name_the_value(bad: dict) -> None:
    args = {"sos": np.array([[1.0, 0, 0, 1.0, 0, 0]]), "samples": np.zeros(8), **bad}
    block = args.pop("block_frames", iir.BLOCK_FRAMES)
    with pytest.raises(ParameterError):
        iir.sosfilt(args["sos"], args["samples"], block_frames=block)
