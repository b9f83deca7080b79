"""Tests of the effective bandwidth in pipeline.signal.bandwidth.

References used: scipy.signal for the Welch PSD and for filtering, scipy.ndimage for the
median smoothing, soxr for resampling, and espeak-ng speech (tests/fixtures/speech/).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import soxr

from pipeline.core.errors import ParameterError
from pipeline.signal import bandwidth
from tests.conftest import FIXTURES, speech_only

# ---------------------------------------------------------------------------------------
# Effective bandwidth
# ---------------------------------------------------------------------------------------


def test_bandwidth_flags_telephone_and_low_passed_audio() -> None:
    # Reference: soxr resampling through 8 kHz (passband ends just below 4 kHz) and a
    # scipy Butterworth low-pass at 4 kHz; the 5000 Hz threshold is the config default.
    speech, rate = speech_only(FIXTURES / "speech/thistle.flac")  # 22.05 kHz, as espeak-ng writes it
    full = soxr.resample(speech, rate, 16000)
    telephone = soxr.resample(soxr.resample(speech, rate, 8000), 8000, 16000)
    low_passed = scipy.signal.sosfiltfilt(scipy.signal.butter(10, 4000, fs=16000, output="sos"), full)
    bw_telephone = bandwidth.effective_bandwidth_hz(telephone, sample_rate=16000)
    assert 3400 <= bw_telephone <= 4200
    assert bandwidth.effective_bandwidth_hz(low_passed, sample_rate=16000) < 5000
    # Full band: espeak-ng speech has energy up to its own Nyquist (11 kHz).
    assert bandwidth.effective_bandwidth_hz(full, sample_rate=16000) > 7000
    assert bandwidth.effective_bandwidth_hz(speech, sample_rate=rate) > 0.9 * rate / 2


def test_bandwidth_of_white_noise_and_analytic_psd() -> None:
    # Analytic: white noise has a flat spectrum up to Nyquist.
    noise = np.random.default_rng(5).normal(size=32000)
    assert bandwidth.effective_bandwidth_hz(noise, sample_rate=16000) >= 7800
    # A step spectrum ends at the step; an isolated strong bin above it is ignored.
    freqs = np.arange(257) * 31.25
    psd = np.where(freqs < 4000, 1.0, 1e-9)
    assert bandwidth.bandwidth_from_psd(freqs, psd) == pytest.approx(3968.75)
    psd[int(7000 / 31.25)] = 10.0
    assert bandwidth.bandwidth_from_psd(freqs, psd) == pytest.approx(3968.75)
    assert bandwidth.bandwidth_from_psd(freqs, psd, smoothing_hz=0) == pytest.approx(7000)


@pytest.mark.parametrize(("sample_rate", "n"), [(16000, 48_123), (44100, 100_000), (8000, 256)])
def test_long_term_psd_equals_scipy_welch(sample_rate: int, n: int) -> None:
    # Reference: scipy.signal.welch with the documented settings (float32 inside the
    # module, so relative tolerance 1e-4).
    x = np.random.default_rng(n).normal(size=n).astype(np.float32)
    freqs, psd = bandwidth.long_term_psd(x, sample_rate=sample_rate)
    segment = 2 * (freqs.size - 1)
    assert segment == {16000: 512, 44100: 1024, 8000: 256}[sample_rate]  # nearest 2**k to 32 ms
    ref_f, ref_p = scipy.signal.welch(x.astype(np.float64), fs=sample_rate, window="hann", nperseg=segment,
                                      noverlap=0, detrend=False)
    np.testing.assert_allclose(freqs, ref_f)
    np.testing.assert_allclose(psd, ref_p, rtol=1e-4)


def test_bandwidth_block_wise_psd_average() -> None:
    # Averaging the PSDs of two halves (Welch is itself an average over segments) gives
    # the whole clip's answer; the grid depends only on the sample rate.
    rng = np.random.default_rng(6)
    x = scipy.signal.sosfilt(scipy.signal.butter(12, 3000, fs=16000, output="sos"), rng.normal(size=64000))
    f1, p1 = bandwidth.long_term_psd(x[:32000], sample_rate=16000)
    f2, p2 = bandwidth.long_term_psd(x[32000:], sample_rate=16000)
    assert np.array_equal(f1, f2)
    whole = bandwidth.effective_bandwidth_hz(x, sample_rate=16000)
    assert bandwidth.bandwidth_from_psd(f1, (p1 + p2) / 2) == pytest.approx(whole, abs=2 * 31.25)
    assert 3000 < whole < 5000  # -50 dB of this 12th-order Butterworth: 3000 * 10 ** (5 / 24) = 4845 Hz


def test_bandwidth_nan_and_bad_parameters() -> None:
    assert np.isnan(bandwidth.effective_bandwidth_hz(np.zeros(16000), sample_rate=16000))
    assert np.isnan(bandwidth.effective_bandwidth_hz(np.ones(100), sample_rate=16000))
    with pytest.raises(ParameterError, match="drop_db"):
        bandwidth.effective_bandwidth_hz(np.ones(16000), sample_rate=16000, drop_db=-3)
    with pytest.raises(ParameterError, match="reference_band_hz"):
        bandwidth.bandwidth_from_psd(np.arange(10.0), np.ones(10), reference_band_hz=(300, 3400))


def test_bandwidth_median_smoothing_matches_scipy_ndimage() -> None:
    # Source: scipy.ndimage.median_filter(mode="nearest"), which the sliding window replaces.
    import scipy.ndimage

    rng = np.random.default_rng(8)
    freqs = np.linspace(0.0, 8000.0, 257)
    level = np.where(freqs < 3500.0, 0.0, -80.0) + rng.normal(0.0, 6.0, freqs.size)
    psd = 10.0 ** (level / 10.0)
    for smoothing_hz in (0.0, 100.0, 250.0, 700.0):
        width = int(round(smoothing_hz / (freqs[1] - freqs[0])))
        width += 1 - width % 2
        smoothed = scipy.ndimage.median_filter(10.0 * np.log10(psd), size=width, mode="nearest")
        above = np.flatnonzero(smoothed >= float(np.median(10.0 * np.log10(psd)[(freqs >= 300) & (freqs <= 3000)])) - 30.0)
        got = bandwidth.bandwidth_from_psd(freqs, psd, smoothing_hz=smoothing_hz, reference_band_hz=(300.0, 3000.0),
                                         drop_db=30.0)
        assert got == float(freqs[above[-1]])


def test_streamed_psd_equals_the_whole_signal_psd() -> None:
    # The audio stage feeds blocks of any size; the segment-count-weighted average must be
    # the PSD of the whole signal (which test_long_term_psd_equals_scipy_welch pins down).
    from pipeline.stages.audio_file import LongTermPsd

    rng = np.random.default_rng(12)
    x = rng.normal(size=16000 * 3).astype(np.float32)
    stream = LongTermPsd(sample_rate=16000)
    cuts = np.sort(rng.integers(0, x.size, size=9))
    for part in np.split(x, cuts):
        stream.push(part)
    freqs, whole = bandwidth.long_term_psd(x, sample_rate=16000)
    assert stream.bandwidth_hz() == bandwidth.bandwidth_from_psd(freqs, whole)
    # The stream sums the same segments in the same groups as the whole signal: the
    # same PSD bit for bit, whatever the cuts (and 300,000 samples span several groups).
    y = rng.normal(size=300_000).astype(np.float32)
    for parts in (np.split(y, np.sort(rng.integers(0, y.size, size=40))), [y[:1], y[1:]], [y]):
        welch = bandwidth.WelchStream(sample_rate=16000)
        for part in parts:
            welch.push(part)
        got_f, got = welch.result()
        ref_f, ref = bandwidth.long_term_psd(y, sample_rate=16000)
        assert got.tobytes() == ref.tobytes() and got_f.tobytes() == ref_f.tobytes()
