"""Tests for pipeline.signal.loudness against BS.1770-4, EBU Tech 3341, pyloudnorm and analytic signals."""

from __future__ import annotations

import math

import numpy as np
import pyloudnorm
import pytest
import scipy.signal
import soundfile

from pipeline.core.errors import ParameterError
from pipeline.signal.loudness import (
    integrated_loudness,
    k_weighting_sos,
    normalisation_gain,
    sample_peak_dbfs,
    true_peak_dbfs,
)
from tests.conftest import FIXTURE_SPEECH, FIXTURES

# ITU-R BS.1770-4 (10/2015), Annex 1, Table 1 (stage 1, pre-filter) and Table 2 (stage 2,
# RLB high pass), 48 kHz. Values from memory; test_published_table_is_self_consistent checks
# that they describe the filters the standard's text describes.
BS1770_TABLE_1 = {
    "b0": 1.53512485958697,
    "b1": -2.69169618940638,
    "b2": 1.19839281085285,
    "a1": -1.69065929318241,
    "a2": 0.73248077421585,
}
BS1770_TABLE_2 = {"b0": 1.0, "b1": -2.0, "b2": 1.0, "a1": -1.99004745483398, "a2": 0.99007225036621}


def table_row(table: dict[str, float]) -> list[float]:
    return [table["b0"], table["b1"], table["b2"], 1.0, table["a1"], table["a2"]]


def sine(*, dbfs: float, seconds: float, sample_rate: int, freq_hz: float = 1000.0) -> np.ndarray:
    """A sine whose peak is ``dbfs`` (EBU Tech 3341 states its tone levels as peak dBFS)."""
    t = np.arange(round(seconds * sample_rate)) / sample_rate
    return 10.0 ** (dbfs / 20.0) * np.sin(2.0 * np.pi * freq_hz * t)


def stereo_sequence(parts: list[tuple[float, float]], *, sample_rate: int) -> np.ndarray:
    """Concatenated 1 kHz tone segments (dBFS, seconds), the same in both channels."""
    mono = np.concatenate([sine(dbfs=d, seconds=s, sample_rate=sample_rate) for d, s in parts])
    return np.column_stack([mono, mono])


def faded(signal: np.ndarray, *, fade_frames: int) -> np.ndarray:
    """Linear fade in and out, so a clip's edges do not ring when interpolated."""
    n = np.arange(signal.shape[0])
    return signal * np.clip(np.minimum(n, n[::-1]) / fade_frames, 0.0, 1.0)


# --- K-weighting filter -------------------------------------------------------------------


def test_48k_design_equals_published_coefficients() -> None:
    # Source: ITU-R BS.1770-4 Tables 1 and 2 (from memory, see above).
    sos = k_weighting_sos(sample_rate=48_000)
    assert sos.shape == (2, 6)
    expected = np.array([table_row(BS1770_TABLE_1), table_row(BS1770_TABLE_2)])
    np.testing.assert_allclose(sos, expected, rtol=0.0, atol=1e-12)


def test_published_table_is_self_consistent() -> None:
    # Source: BS.1770-4 Annex 1 text: stage 1 is a high shelf of about +4 dB that leaves low
    # frequencies alone, stage 2 a high pass (zeros at DC). Checked on the remembered table
    # itself, so a mis-remembered digit would show up here.
    b = np.array(table_row(BS1770_TABLE_1)[:3])
    a = np.array(table_row(BS1770_TABLE_1)[3:])
    dc_gain = b.sum() / a.sum()
    nyquist_gain_db = 20 * math.log10(abs((b @ [1, -1, 1]) / (a @ [1, -1, 1])))
    assert dc_gain == pytest.approx(1.0, abs=1e-12)
    assert nyquist_gain_db == pytest.approx(4.0, abs=0.01)
    b2 = np.array(table_row(BS1770_TABLE_2)[:3])
    assert b2.sum() == 0.0
    poles = np.roots(table_row(BS1770_TABLE_2)[3:])
    assert np.all(np.abs(poles) < 1.0)


@pytest.mark.parametrize("sample_rate", [16_000, 22_050, 44_100])
def test_other_rates_follow_48k_response(sample_rate: int) -> None:
    # Source: the 48 kHz design, which equals BS.1770-4 Tables 1 and 2 (test above). Below
    # 0.4 of the rate the bilinear transform bends the response by under 0.1 dB (common
    # practice, no source, for the tolerance).
    freqs_hz = np.geomspace(20.0, 0.4 * sample_rate, 40)
    _, response = scipy.signal.sosfreqz(
        k_weighting_sos(sample_rate=sample_rate), worN=freqs_hz, fs=sample_rate
    )
    _, reference = scipy.signal.sosfreqz(
        k_weighting_sos(sample_rate=48_000), worN=freqs_hz, fs=48_000
    )
    gap_db = 20 * np.log10(np.abs(response) / np.abs(reference))
    assert np.max(np.abs(gap_db)) < 0.1


@pytest.mark.parametrize("sample_rate", [0, -16_000, 3_000, 16_000.0, True])
def test_bad_sample_rate_is_named(sample_rate: object) -> None:
    with pytest.raises(ParameterError, match="sample_rate="):
        k_weighting_sos(sample_rate=sample_rate)  # type: ignore[arg-type]


# --- EBU Tech 3341 minimum requirements ---------------------------------------------------
# Source: EBU Tech 3341 v3 (2016), Table 1, test cases 1 to 6 (signals, levels and expected
# readings from memory). Tone levels are peak dBFS of a 1 kHz sine, in both stereo channels
# unless said otherwise; the expected integrated loudness is met within +/-0.1 LU.

EBU_STEREO_CASES = {
    "case 1: -23 dBFS 20 s": ([(-23.0, 20.0)], -23.0),
    "case 2: -33 dBFS 20 s": ([(-33.0, 20.0)], -33.0),
    "case 3: relative gate": ([(-36.0, 10.0), (-23.0, 60.0), (-36.0, 10.0)], -23.0),
    "case 4: both gates": (
        [(-72.0, 10.0), (-36.0, 10.0), (-23.0, 60.0), (-36.0, 10.0), (-72.0, 10.0)],
        -23.0,
    ),
    "case 5: above gate": ([(-26.0, 20.0), (-20.0, 20.1), (-26.0, 20.0)], -23.0),
}


@pytest.mark.parametrize("case", list(EBU_STEREO_CASES))
def test_ebu_tech_3341_stereo_cases_at_48k(case: str) -> None:
    parts, expected_lufs = EBU_STEREO_CASES[case]
    clip = stereo_sequence(parts, sample_rate=48_000)
    assert integrated_loudness(clip, sample_rate=48_000) == pytest.approx(expected_lufs, abs=0.1)


def test_ebu_tech_3341_case_6_five_channels() -> None:
    # Source: EBU Tech 3341 v3 case 6 (from memory): L, R at -28 dBFS, C at -24 dBFS,
    # Ls, Rs at -30 dBFS, 20 s, reads -23.0 +/- 0.1 LUFS (uses the 1.41 surround weight).
    levels = [-28.0, -28.0, -24.0, -30.0, -30.0]
    clip = np.column_stack([sine(dbfs=d, seconds=20.0, sample_rate=48_000) for d in levels])
    assert integrated_loudness(clip, sample_rate=48_000) == pytest.approx(-23.0, abs=0.1)


@pytest.mark.parametrize("sample_rate", [44_100, 16_000])
@pytest.mark.parametrize("case", ["case 1: -23 dBFS 20 s", "case 4: both gates"])
def test_ebu_tech_3341_cases_at_other_rates(sample_rate: int, case: str) -> None:
    # Source: EBU Tech 3341 v3 (from memory) specifies 48 kHz; the same signals at other rates
    # must read the same within the same +/-0.1 LU.
    parts, expected_lufs = EBU_STEREO_CASES[case]
    clip = stereo_sequence(parts, sample_rate=sample_rate)
    assert integrated_loudness(clip, sample_rate=sample_rate) == pytest.approx(
        expected_lufs, abs=0.1
    )


@pytest.mark.parametrize(("quiet_dbfs", "kept"), [(-32.3, True), (-33.3, False)])
def test_relative_gate_threshold(quiet_dbfs: float, kept: bool) -> None:
    # Source: BS.1770-4 eq. 6, analytic. Two equally long tones of power P and Q: the gate is
    # (P + Q) / 2 / 10, so the quiet one survives exactly when 19 Q > P, i.e. when it is
    # less than 10 * log10(19) = 12.79 dB below the loud one. Survivor: the mean of the two
    # powers (within 0.01 LU); dropped: the loud tone alone (within 0.1 LU, for the few
    # blocks straddling the joint).
    loud = sine(dbfs=-20.0, seconds=10.0, sample_rate=16_000)
    quiet = sine(dbfs=quiet_dbfs, seconds=10.0, sample_rate=16_000)
    loud_lufs = integrated_loudness(loud, sample_rate=16_000)
    quiet_lufs = integrated_loudness(quiet, sample_rate=16_000)
    both = integrated_loudness(np.concatenate([loud, quiet]), sample_rate=16_000)
    if kept:
        mean_lufs = 10 * math.log10((10 ** (loud_lufs / 10) + 10 ** (quiet_lufs / 10)) / 2)
        assert both == pytest.approx(mean_lufs, abs=0.01)
    else:
        assert both == pytest.approx(loud_lufs, abs=0.1)


def test_mono_reads_one_channel() -> None:
    # Source: BS.1770-4 eq. 2 sums weighted channel powers; one channel of a pair carries
    # half the power, 10 * log10(2) = 3.01 dB less (analytic).
    tone = sine(dbfs=-23.0, seconds=5.0, sample_rate=48_000)
    stereo = integrated_loudness(np.column_stack([tone, tone]), sample_rate=48_000)
    mono = integrated_loudness(tone, sample_rate=48_000)
    assert stereo - mono == pytest.approx(10 * math.log10(2), abs=1e-9)


def test_float32_input_reads_like_float64() -> None:
    # Source: analytic; float32 rounding of a -23 dBFS tone is far below 0.001 LU.
    tone = sine(dbfs=-23.0, seconds=3.0, sample_rate=16_000)
    wide = integrated_loudness(tone, sample_rate=16_000)
    narrow = integrated_loudness(tone.astype(np.float32), sample_rate=16_000)
    assert narrow == pytest.approx(wide, abs=1e-3)


# --- -inf cases and bad input -------------------------------------------------------------


def test_shorter_than_one_block_is_minus_inf() -> None:
    # Source: BS.1770-4 measures 400 ms blocks; a shorter clip holds none.
    loud = np.random.default_rng(3).uniform(-0.5, 0.5, size=(6_400, 2))
    assert integrated_loudness(loud[:-1], sample_rate=16_000) == -math.inf
    assert math.isfinite(integrated_loudness(loud, sample_rate=16_000))


def test_exactly_one_block_is_measured() -> None:
    # Source: analytic; one whole 400 ms block of a -20 dBFS 1 kHz tone in mono gives the
    # same reading as a long clip of it.
    long_tone = sine(dbfs=-20.0, seconds=10.0, sample_rate=16_000)
    one_block = integrated_loudness(long_tone[:6_400], sample_rate=16_000)
    assert one_block == pytest.approx(integrated_loudness(long_tone, sample_rate=16_000), abs=0.05)


@pytest.mark.parametrize(
    "clip",
    [
        np.zeros(48_000 * 3),
        np.zeros((48_000 * 3, 2)),
        sine(dbfs=-80.0, seconds=3.0, sample_rate=48_000),
    ],
    ids=["silent mono", "silent stereo", "-80 dBFS tone"],
)
def test_everything_below_absolute_gate_is_minus_inf(clip: np.ndarray) -> None:
    # Source: BS.1770-4 absolute gate at -70 LUFS; a -80 dBFS tone is about -83 LUFS.
    assert integrated_loudness(clip, sample_rate=48_000) == -math.inf


@pytest.mark.parametrize(
    ("clip", "fragment"),
    [
        (np.zeros((10, 2, 2)), "samples.ndim=3"),
        (np.zeros((16_000, 4)), "4 channels"),
        (np.zeros((16_000, 6)), "6 channels"),
        (np.zeros((16_000, 0)), "no channels"),
        (np.zeros(16_000, dtype=np.int16), "samples.dtype=int16"),
        (np.full(16_000, np.nan), "NaN"),
        ([0.0] * 16_000, "not a numpy array"),
    ],
)
def test_bad_samples_are_named(clip: object, fragment: str) -> None:
    with pytest.raises(ParameterError, match=fragment):
        integrated_loudness(clip, sample_rate=16_000)  # type: ignore[arg-type]


def test_integrated_loudness_rejects_bad_rate() -> None:
    with pytest.raises(ParameterError, match="sample_rate=0"):
        integrated_loudness(np.zeros(16_000), sample_rate=0)


# --- pyloudnorm cross-check ---------------------------------------------------------------
# pyloudnorm's default meter approximates K-weighting with cookbook biquads (shelf at
# 1500 Hz, high pass of unit gain), so it reads about 0.04 LU lower than the published
# filter; the brief allows 0.1 LU. Its "DeMan" filter class uses the same analog prototype
# as ours but writes the high pass numerator as (1, -2, 1) at every rate, which differs from
# ours by exactly the constant gain sos[1, 0]; after that correction the two must agree to
# within block-boundary rounding.


def compare_with_pyloudnorm(clip: np.ndarray, sample_rate: int) -> None:
    ours = integrated_loudness(clip, sample_rate=sample_rate)
    # pyloudnorm filters a 2-D input in place, so it gets copies.
    default = pyloudnorm.Meter(sample_rate).integrated_loudness(clip.copy())
    prototype = pyloudnorm.Meter(sample_rate, filter_class="DeMan").integrated_loudness(clip.copy())
    assert ours == pytest.approx(default, abs=0.1)
    highpass_gain_db = 20 * math.log10(k_weighting_sos(sample_rate=sample_rate)[1, 0])
    assert ours - prototype == pytest.approx(highpass_gain_db, abs=0.01)


@pytest.mark.parametrize(
    ("sample_rate", "seconds", "channels"),
    [(16_000, 0.45, 1), (16_000, 6.0, 2), (22_050, 3.3, 1), (44_100, 2.0, 2), (48_000, 4.7, 5)],
)
def test_noise_matches_pyloudnorm(sample_rate: int, seconds: float, channels: int) -> None:
    # Source: pyloudnorm 0.2 (reference implementation of BS.1770-4).
    rng = np.random.default_rng(sample_rate + channels)
    clip = 0.1 * rng.standard_normal((round(seconds * sample_rate), channels))
    compare_with_pyloudnorm(clip[:, 0] if channels == 1 else clip, sample_rate)


def test_gated_noise_matches_pyloudnorm() -> None:
    # Source: pyloudnorm 0.2. Noise bursts at levels spread across both gates, so the
    # relative and absolute gates each drop some blocks.
    rng = np.random.default_rng(7)
    levels_db = [-20.0, -45.0, -80.0, -26.0, -33.0, -60.0, -18.0]
    clip = np.concatenate(
        [10 ** (db / 20) * rng.standard_normal((16_000 * 2, 2)) for db in levels_db]
    )
    compare_with_pyloudnorm(clip, 16_000)


@pytest.fixture(scope="module")
def speech() -> tuple[np.ndarray, int]:
    """espeak-ng speech (tests/fixtures/speech/, 22.05 kHz), its lines joined with the
    synthesiser's own pauses between them."""
    parts = [soundfile.read(FIXTURES / "speech" / f"{name}.flac", dtype="float64") for name in FIXTURE_SPEECH]
    assert {rate for _, rate in parts} == {22050}
    return np.concatenate([samples for samples, _ in parts]), 22050


@pytest.mark.parametrize("sample_rate", [16_000, 48_000, None])
def test_speech_matches_pyloudnorm(speech: tuple[np.ndarray, int], sample_rate: int | None) -> None:
    # Source: pyloudnorm 0.2, on espeak-ng speech at its own rate (None) and resampled.
    samples, native_rate = speech
    if sample_rate is None:
        sample_rate = native_rate
    else:
        divisor = math.gcd(sample_rate, native_rate)
        samples = scipy.signal.resample_poly(
            samples, sample_rate // divisor, native_rate // divisor
        )
    compare_with_pyloudnorm(samples, sample_rate)
    compare_with_pyloudnorm(np.column_stack([samples, 0.5 * samples]), sample_rate)


# --- peaks --------------------------------------------------------------------------------


def test_sample_peak_of_known_arrays() -> None:
    # Source: analytic, 20 * log10(|x|max).
    assert sample_peak_dbfs(np.array([0.25, -0.5, 0.1])) == pytest.approx(20 * math.log10(0.5))
    stereo = np.array([[0.1, -0.2], [0.05, 0.9], [-0.3, 0.0]], dtype=np.float32)
    assert sample_peak_dbfs(stereo) == pytest.approx(20 * math.log10(0.9), abs=1e-6)
    assert sample_peak_dbfs(np.array([-1.0, 0.5])) == 0.0
    assert sample_peak_dbfs(np.zeros(100)) == -math.inf
    assert sample_peak_dbfs(np.zeros(0)) == -math.inf


@pytest.mark.parametrize("sample_rate", [48_000, 44_100, 16_000])
def test_true_peak_finds_inter_sample_peak(sample_rate: int) -> None:
    # Source: analytic. A tone at a quarter of the rate, 45 degrees from the sampling grid,
    # is sampled only at +/-sin(45 deg) of its crest: the sample peak sits 3.01 dB below the
    # true peak, which is the tone's amplitude. (EBU Tech 3341 v3 true-peak cases use
    # such tones with a +0.2/-0.4 dB tolerance, from memory; the interpolator here does far
    # better, so the bound is tighter.) Two seconds at 48 kHz spans a chunk seam.
    amplitude_db = -4.0
    n = np.arange(2 * sample_rate)
    tone = 10 ** (amplitude_db / 20) * np.sin(np.pi / 2 * n + np.pi / 4)
    tone = faded(tone, fade_frames=sample_rate // 100)
    assert sample_peak_dbfs(tone) == pytest.approx(amplitude_db - 20 * math.log10(2) / 2, abs=1e-6)
    # The crests lie half-way between samples. The oversampled grid (1/4 sample at 48 kHz,
    # 1/12 at 16 kHz, 1/5 at 44.1 kHz) holds that point except at 44.1 kHz, where it misses
    # by 0.1 sample = 0.025 of a period: cos(2 pi 0.025) reads 0.107 dB low.
    factor = math.ceil(192_000 / sample_rate)
    miss_samples = abs(0.5 - round(0.5 * factor) / factor)
    expected_db = amplitude_db + 20 * math.log10(math.cos(2 * math.pi * 0.25 * miss_samples))
    assert true_peak_dbfs(tone, sample_rate=sample_rate) == pytest.approx(expected_db, abs=0.01)


@pytest.mark.parametrize("freq_ratio", [0.1, 0.31, 0.4])
def test_true_peak_of_tones_with_random_phase(freq_ratio: float) -> None:
    # Source: analytic; the band-limited waveform of a sine peaks at its amplitude. Looking at
    # it on a 192 kHz grid can under-read by at most 20 * log10(cos(pi * f / 192 kHz)).
    sample_rate = 48_000
    bound_db = 20 * math.log10(math.cos(math.pi * freq_ratio * sample_rate / 192_000))
    rng = np.random.default_rng(11)
    n = np.arange(sample_rate // 2)
    for phase in rng.uniform(0.0, 2 * math.pi, size=4):
        tone = 0.5 * np.sin(2 * math.pi * freq_ratio * n + phase)
        tone = faded(tone, fade_frames=480)
        measured = true_peak_dbfs(np.column_stack([0.5 * tone, tone]), sample_rate=sample_rate)
        assert 20 * math.log10(0.5) + bound_db - 0.02 <= measured <= 20 * math.log10(0.5) + 0.02


def test_true_peak_of_multitone_matches_fft_interpolation() -> None:
    # Source: scipy.signal.resample (FFT interpolation, exact for a periodic band-limited
    # signal; the clip is padded with silence so the periodic and zero extensions agree).
    sample_rate = 16_000
    rng = np.random.default_rng(5)
    n = np.arange(sample_rate)
    freqs = rng.uniform(0.02, 0.25, size=6)
    mix = sum(
        np.sin(2 * math.pi * f * n + p) for f, p in zip(freqs, rng.uniform(0, 6.3, 6), strict=True)
    )
    clip = np.pad(faded(0.1 * mix, fade_frames=800), 400)
    reference = 20 * math.log10(np.abs(scipy.signal.resample(clip, 64 * clip.size)).max())
    # Content below a quarter of the rate, seen on a 192 kHz grid, under-reads < 0.04 dB.
    assert reference - 0.04 <= true_peak_dbfs(clip, sample_rate=sample_rate) <= reference + 0.01


def test_true_peak_is_never_below_sample_peak() -> None:
    # Source: analytic; the interpolated waveform passes through (or above) every sample.
    clip = np.random.default_rng(2).uniform(-1.0, 1.0, size=(8_000, 2))
    assert true_peak_dbfs(clip, sample_rate=8_000) >= sample_peak_dbfs(clip)
    assert true_peak_dbfs(clip, sample_rate=192_000) == sample_peak_dbfs(clip)


def test_true_peak_of_silence_and_bad_rate() -> None:
    assert true_peak_dbfs(np.zeros((1_000, 2)), sample_rate=48_000) == -math.inf
    assert true_peak_dbfs(np.zeros(0), sample_rate=48_000) == -math.inf
    with pytest.raises(ParameterError, match="sample_rate=-1"):
        true_peak_dbfs(np.zeros(10), sample_rate=-1)


# --- normalisation gain -------------------------------------------------------------------


def test_gain_reaches_target_when_unconstrained() -> None:
    # Source: analytic (gain in dB adds to loudness in LUFS).
    assert normalisation_gain(
        loudness_lufs=-30.0, peak_dbfs=-10.0, target_lufs=-23.0, ceiling_dbfs=-1.0
    ) == (7.0, 0.0)
    # A loud clip is turned down to the target even when its peak is over the ceiling,
    # because the cut clears the ceiling too.
    assert normalisation_gain(
        loudness_lufs=-18.0, peak_dbfs=0.5, target_lufs=-23.0, ceiling_dbfs=-1.0
    ) == (-5.0, 0.0)


def test_gain_respects_ceiling_with_shortfall() -> None:
    # Source: analytic; peak + gain must stay at or below the ceiling.
    gain_db, shortfall_db = normalisation_gain(
        loudness_lufs=-30.0, peak_dbfs=-4.0, target_lufs=-23.0, ceiling_dbfs=-1.0
    )
    assert (gain_db, shortfall_db) == pytest.approx((3.0, 4.0))
    gain_db, shortfall_db = normalisation_gain(
        loudness_lufs=-25.0, peak_dbfs=0.0, target_lufs=-23.0, ceiling_dbfs=-1.0
    )
    assert (gain_db, shortfall_db) == pytest.approx((-1.0, 3.0))


@pytest.mark.parametrize("peak_ratio_db", [-20.0, -9.0])
def test_gain_applied_to_a_clip(peak_ratio_db: float) -> None:
    # Source: BS.1770-4 loudness and true peak both scale with the signal: a gain of g dB
    # moves each by g dB (analytic). Noise whose peak is raised by a few loud clicks.
    rng = np.random.default_rng(13)
    clip = 0.02 * rng.standard_normal(16_000 * 5)
    clip[::4_000] = 10 ** (peak_ratio_db / 20)
    loudness = integrated_loudness(clip, sample_rate=16_000)
    peak = true_peak_dbfs(clip, sample_rate=16_000)
    gain_db, shortfall_db = normalisation_gain(
        loudness_lufs=loudness, peak_dbfs=peak, target_lufs=-16.0, ceiling_dbfs=-1.0
    )
    gained = clip * 10 ** (gain_db / 20)
    assert shortfall_db >= 0.0
    # The K-weighting runs in float32 (pipeline.signal.iir): homogeneous to ~1e-7 LU, not 1e-12.
    assert integrated_loudness(gained, sample_rate=16_000) == pytest.approx(
        -16.0 - shortfall_db, abs=1e-5
    )
    assert true_peak_dbfs(gained, sample_rate=16_000) <= -1.0 + 1e-9
    if shortfall_db > 0.0:
        assert true_peak_dbfs(gained, sample_rate=16_000) == pytest.approx(-1.0, abs=1e-9)


@pytest.mark.parametrize("name", ["loudness_lufs", "peak_dbfs", "target_lufs", "ceiling_dbfs"])
@pytest.mark.parametrize("bad", [-math.inf, math.nan])
def test_gain_rejects_non_finite(name: str, bad: float) -> None:
    values = {"loudness_lufs": -30.0, "peak_dbfs": -3.0, "target_lufs": -23.0, "ceiling_dbfs": -1.0}
    values[name] = bad
    with pytest.raises(ParameterError, match=f"{name}="):
        normalisation_gain(**values)


@pytest.mark.parametrize("sample_rate", [11025, 16000, 22050, 44100])
def test_block_sums_equal_a_direct_float64_gating(sample_rate: int) -> None:
    # Reference: BS.1770-4 section 2 written out directly: scipy.signal.sosfilt in float64,
    # 400 ms blocks every 100 ms from a cumulative sum, the -70 LUFS and -10 LU gates. The
    # module sums whole 100 ms steps where the rate allows (16 and 44.1 kHz) and cumulates
    # otherwise (11.025 kHz); both must agree with this to float32 filtering precision.
    rng = np.random.default_rng(sample_rate)
    x = (rng.standard_normal(sample_rate * 7) * np.repeat(rng.uniform(0.001, 0.3, 70), sample_rate // 10 + 1)[
        : sample_rate * 7]).astype(np.float32)
    y = scipy.signal.sosfilt(k_weighting_sos(sample_rate=sample_rate), x.astype(np.float64))
    energy = np.concatenate([[0.0], np.cumsum(y * y)])
    block = round(0.4 * sample_rate)
    starts = np.arange(0, 10 * (x.size - block) // sample_rate + 1) * sample_rate // 10
    power = (energy[starts + block] - energy[starts]) / block
    kept = power[power > 10 ** ((-70 + 0.691) / 10)]
    kept = kept[kept > kept.mean() / 10]
    want = -0.691 + 10 * np.log10(kept.mean())
    assert integrated_loudness(x, sample_rate=sample_rate) == pytest.approx(want, abs=1e-4)
