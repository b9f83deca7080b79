"""Tests of the signal-level quality gates in pipeline.signal.quality.

References used: the statistical model of Kim and Stern (Interspeech 2008) simulated
directly with numpy, analytic moments of the normal distribution, espeak-ng speech (the
committed demo corpus and tests/fixtures/speech/), Python's struct and base64 modules, soxr and
scipy.signal for resampling and filtering, and numpy's median for the modified z-score
formula of Iglewicz and Hoaglin (1993).
"""

from __future__ import annotations

import base64
import io
import struct
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import soundfile as sf
import soxr

from pipeline.core.errors import ParameterError
from pipeline.signal import quality
from tests.conftest import DEMO, FIXTURE_SPEECH, FIXTURES, speech_only

# The default of quality.near_duplicate_min_similarity in schemas/config.schema.json.
CONFIG_MIN_SIMILARITY = 0.85

# Clean espeak-ng speech in plain voices (en-gb, en-us, de), as the synthesiser wrote it.
CLEAN_SPEECH = [FIXTURES / "speech" / f"{name}.flac" for name in FIXTURE_SPEECH]
# Distinct utterances cut from the demo corpus (see distinct_clips).
DISTINCT_CLIPS = 100
DISTINCT_CLIP_S = 2.0


def with_noise(clean: np.ndarray, snr_db: float, *, seed: int) -> np.ndarray:
    """Add white Gaussian noise at ``snr_db`` relative to the power of the whole clip."""
    rng = np.random.default_rng(seed)
    noise_power = np.mean(clean**2) / 10.0 ** (snr_db / 10.0)
    return clean + rng.normal(scale=np.sqrt(noise_power), size=clean.size)


def gamma_speech(n: int, *, seed: int) -> np.ndarray:
    """Samples of the speech model of Kim and Stern: Gamma(0.4) amplitude, random sign."""
    rng = np.random.default_rng(seed)
    return rng.gamma(0.4, size=n) * rng.choice([-1.0, 1.0], size=n)


# ---------------------------------------------------------------------------------------
# WADA-SNR
# ---------------------------------------------------------------------------------------


def test_wada_table_matches_gaussian_limit_at_low_snr() -> None:
    # Analytic: for Gaussian x, log E|x| - E log|x| = log sqrt(2/pi) + (euler_gamma + log 2)/2
    # (E|z| = sqrt(2/pi), E log|z| = -(gamma + log 2)/2). At -20 dB speech barely changes it.
    snr_db, g = quality._wada_table()
    gaussian = 0.5 * np.log(2.0 / np.pi) + 0.5 * (np.euler_gamma + np.log(2.0))
    assert snr_db[0] == quality.WADA_MIN_SNR_DB and snr_db[-1] == quality.WADA_MAX_SNR_DB
    assert g[0] == pytest.approx(gaussian, abs=1e-3)
    assert np.all(np.diff(g) > 0)


@pytest.mark.parametrize("snr_db", [0.0, 10.0, 20.0, 30.0])
def test_wada_table_matches_monte_carlo_of_the_model(snr_db: float) -> None:
    # Reference: direct simulation of the model (Gamma(0.4) speech + Gaussian noise).
    # Tolerance 4e-3 on G: 1e6 samples give a standard error of about 1.5e-3.
    n = 1_000_000
    x = with_noise(gamma_speech(n, seed=11), snr_db, seed=12)
    g_sim = np.log(np.mean(np.abs(x))) - np.mean(np.log(np.abs(x)))
    snr_table, g_table = quality._wada_table()
    assert np.interp(snr_db, snr_table, g_table) == pytest.approx(g_sim, abs=4e-3)


@pytest.mark.parametrize("snr_db", [0.0, 10.0, 20.0, 30.0])
def test_wada_snr_of_model_signal(snr_db: float) -> None:
    # Reference: signals drawn from the paper's own model, so only sampling error remains.
    # Measured error over 5 seeds of 5 s at 16 kHz: at most 0.55 dB (at 0 dB, where G is
    # flattest); tolerance 1 dB.
    x = with_noise(gamma_speech(80_000, seed=int(snr_db) + 1), snr_db, seed=int(snr_db) + 100)
    assert quality.wada_snr_db(x) == pytest.approx(snr_db, abs=1.0)


@pytest.mark.parametrize("source", CLEAN_SPEECH, ids=lambda p: p.stem)
def test_wada_snr_of_synthetic_speech(source: Path) -> None:
    # Reference: espeak-ng speech plus white Gaussian noise at a known SNR (power of the
    # whole clip). Tolerances measured, not from the paper: over these three lines with
    # 5 noise draws each, the largest error was 2.44 dB at 0-20 dB SNR; at 30 dB the
    # estimate ran from 0.5 dB low to 6.3 dB high (the lines' pauses and final silence
    # count as noise-free, and G flattens at high SNR), so there only "clearly clean" is
    # asserted. The gates work at 0-20 dB (quality.min_snr_db).
    clean, _ = sf.read(source, dtype="float64")
    for k, snr_db in enumerate([0.0, 10.0, 20.0]):
        estimate = quality.wada_snr_db(with_noise(clean, snr_db, seed=k))
        assert estimate == pytest.approx(snr_db, abs=2.5), (source.name, snr_db, estimate)
    estimate = quality.wada_snr_db(with_noise(clean, 30.0, seed=3))
    assert 30.0 - 2.5 <= estimate <= 30.0 + 7.0, (source.name, estimate)


def test_wada_snr_scale_invariant_and_int_input() -> None:
    # Analytic: G is unchanged by scaling, and int16 samples are numbers like any other.
    x = with_noise(gamma_speech(32_000, seed=5), 15.0, seed=6)
    x16 = np.round(x / np.abs(x).max() * 30000).astype(np.int16)
    assert quality.wada_snr_db(x * 1e-3) == pytest.approx(quality.wada_snr_db(x), abs=1e-9)
    assert quality.wada_snr_db(x16) == pytest.approx(quality.wada_snr_db(x16 / 32768.0), abs=1e-9)


def test_wada_snr_clamps_and_nan() -> None:
    # Clean model speech has G = log(0.4) - digamma(0.4) = 1.645 (Gamma moments), above the
    # table's 100 dB end, so the documented clamp applies.
    assert quality.wada_snr_db(gamma_speech(200_000, seed=3)) == quality.WADA_MAX_SNR_DB
    assert np.isnan(quality.wada_snr_db(np.zeros(1000)))
    assert np.isnan(quality.wada_snr_db(np.zeros(0)))


def test_wada_snr_ignores_zero_padding() -> None:
    # Exact zeros are left out by design: padding must not change the estimate.
    x = with_noise(gamma_speech(32_000, seed=8), 10.0, seed=9)
    padded = np.concatenate([np.zeros(8000), x, np.zeros(8000)])
    assert quality.wada_snr_db(padded) == quality.wada_snr_db(x)


def test_wada_snr_rejects_bad_input() -> None:
    with pytest.raises(ParameterError, match="samples"):
        quality.wada_snr_db(np.zeros((100, 2)))
    with pytest.raises(ParameterError, match="NaN"):
        quality.wada_snr_db(np.array([0.1, np.nan]))


# ---------------------------------------------------------------------------------------
# Fingerprints
# ---------------------------------------------------------------------------------------


def test_fingerprint_length_dtype_and_short_input() -> None:
    # Analytic frame count: at 5000 Hz, frames of 1850 samples every 116 (the module's
    # documented hop, 23.2 ms) give 1 + (n - 1850) // 116 frames, and one sub-fingerprint
    # per frame after the first.
    rng = np.random.default_rng(0)
    x = rng.normal(size=5000 * 3)
    fp = quality.fingerprint(x, sample_rate=5000)
    assert fp.dtype == np.uint32
    assert fp.size == (5000 * 3 - 1850) // 116
    assert quality.fingerprint(x[:1850], sample_rate=5000).size == 0
    assert quality.fingerprint(np.zeros(0), sample_rate=16000).size == 0
    with pytest.raises(ParameterError, match="sample_rate"):
        quality.fingerprint(x, sample_rate=0)


def test_fingerprint_bits_follow_haitsma_kalker_rule() -> None:
    # Reference: the bit rule of Haitsma and Kalker (ISMIR 2002), recomputed here with an
    # independent plain loop over frames and bands from numpy band energies.
    rng = np.random.default_rng(1)
    x = rng.normal(size=5000) * np.linspace(0.2, 1.0, 5000)
    fp = quality.fingerprint(x, sample_rate=5000)
    # 0.37 s Hann frames, each zero-padded to 1920 samples for the FFT (quality.FP_FFT).
    window = scipy.signal.get_window("hann", 1850)
    freqs = np.fft.rfftfreq(1920, d=1 / 5000)
    edges = np.geomspace(300.0, 2000.0, 34)
    energies = []
    for start in range(0, x.size - 1850 + 1, 116):
        power = np.abs(np.fft.rfft(x[start : start + 1850] * window, n=1920)) ** 2
        energies.append([power[(freqs >= lo) & (freqs < hi)].sum() for lo, hi in zip(edges[:-1], edges[1:], strict=True)])
    e = np.array(energies)
    for n in range(1, e.shape[0]):
        expected = 0
        for m in range(32):
            bit = (e[n, m] - e[n, m + 1]) - (e[n - 1, m] - e[n - 1, m + 1]) > 0
            expected = (expected << 1) | int(bit)
        # float32 inside the module may flip a bit whose difference is near zero.
        assert bin(int(fp[n - 1]) ^ expected).count("1") <= 1


def test_fingerprint_of_silence_is_zero() -> None:
    # Documented: band energies are floored, so digital silence gives the code 0.
    assert not quality.fingerprint(np.zeros(16000), sample_rate=16000).any()


def test_encode_decode_round_trip_against_struct_and_base64() -> None:
    # Reference: Python's struct ("<I", little-endian uint32) and base64 modules.
    fp = np.array([0, 1, 0xDEADBEEF, 0xFFFFFFFF, 12345], dtype=np.uint32)
    text = quality.encode_fingerprint(fp)
    assert text == base64.b64encode(struct.pack("<5I", *fp.tolist())).decode("ascii")
    back = quality.decode_fingerprint(text)
    assert back.dtype == np.uint32 and back.tolist() == fp.tolist()
    assert quality.decode_fingerprint(quality.encode_fingerprint(np.zeros(0, np.uint32))).size == 0
    with pytest.raises(ParameterError):
        quality.decode_fingerprint("not base64!")
    with pytest.raises(ParameterError):
        quality.decode_fingerprint(base64.b64encode(b"abc").decode())


def test_similarity_analytic_cases() -> None:
    # Analytic: bit error rate of known flips; the complement disagrees in every bit.
    rng = np.random.default_rng(2)
    fp = rng.integers(1, 2**32, size=400, dtype=np.uint32)
    assert quality.fingerprint_similarity(fp, fp) == 1.0
    assert quality.fingerprint_similarity(fp, ~fp, max_offset_frames=0) == 0.0
    flipped = fp.copy()
    flipped[:100] ^= np.uint32(0b111)  # 300 of 12800 bits
    assert quality.fingerprint_similarity(fp, flipped, max_offset_frames=0) == pytest.approx(1 - 300 / 12800)
    # A shift within max_offset_frames is found, one beyond it is not.
    assert quality.fingerprint_similarity(fp, fp[5:], max_offset_frames=5) == 1.0
    assert quality.fingerprint_similarity(fp[5:], fp, max_offset_frames=5) == 1.0
    assert quality.fingerprint_similarity(fp, fp[6:], max_offset_frames=5) < 0.6


def _similarity_one_offset_at_a_time(a: np.ndarray, b: np.ndarray, max_offset_frames: int,
                                     min_overlap_frames: int) -> float:
    """The definition in fingerprint_similarity's docstring, as a plain loop over offsets."""
    need = min(min_overlap_frames, a.size, b.size)
    best = 0.0
    for offset in range(-max_offset_frames, max_offset_frames + 1):
        pairs = [(int(a[i]), int(b[i + offset])) for i in range(a.size) if 0 <= i + offset < b.size]
        informative = [(x, y) for x, y in pairs if x | y]
        if need == 0 or len(pairs) < need or len(informative) < need:
            continue
        errors = sum(bin(x ^ y).count("1") for x, y in informative)
        best = max(best, 1.0 - errors / (32.0 * len(informative)))
    return best


def test_similarity_equals_the_loop_over_offsets() -> None:
    # Random fixtures: lengths from 0 to 60, a third of them sharing a run of frames,
    # a third of the sub-fingerprints 0 (silence), offsets and overlaps small and large.
    rng = np.random.default_rng(11)
    for trial in range(400):
        la, lb = (int(n) for n in rng.integers(0, 60, 2))
        a = rng.integers(0, 2**32, la, dtype=np.uint32)
        b = rng.integers(0, 2**32, lb, dtype=np.uint32)
        a[rng.random(la) < 0.3] = 0
        b[rng.random(lb) < 0.3] = 0
        if trial % 3 == 0 and la:
            b = np.concatenate([a[int(rng.integers(0, la)):], b])[:lb]
        for k, m in [(8, 32), (0, 1), (3, 5), (20, 10)]:
            expected = _similarity_one_offset_at_a_time(a, b, k, m)
            assert quality.fingerprint_similarity(a, b, max_offset_frames=k, min_overlap_frames=m) == expected


def test_similarity_short_overlaps_and_silence() -> None:
    rng = np.random.default_rng(3)
    fp = rng.integers(1, 2**32, size=30, dtype=np.uint32)
    # Shorter than min_overlap_frames: compared over the full overlap only.
    assert quality.fingerprint_similarity(fp, fp) == 1.0
    assert quality.fingerprint_similarity(fp, fp[:10]) == 1.0
    assert quality.fingerprint_similarity(fp, np.zeros(0, np.uint32)) == 0.0
    # Positions where both are silence (0) carry no evidence and are skipped.
    silent = np.zeros(200, dtype=np.uint32)
    assert quality.fingerprint_similarity(silent, silent) == 0.0
    other = rng.integers(1, 2**32, size=100, dtype=np.uint32)
    a = np.concatenate([silent, fp, other])
    b = np.concatenate([silent, fp, ~other])
    assert quality.fingerprint_similarity(a, b, max_offset_frames=0) == pytest.approx(30 / 130)
    with pytest.raises(ParameterError, match="max_offset_frames"):
        quality.fingerprint_similarity(fp, fp, max_offset_frames=-1)


def encode_mp3(samples: np.ndarray, sample_rate: int) -> np.ndarray:
    """MP3 round trip through libsndfile (MP3 since 1.1.0; the soundfile wheels bundle it)."""
    assert "MP3" in sf.available_formats(), (
        f"libsndfile {sf.__libsndfile_version__} cannot write MP3; soundfile's wheels bundle a libsndfile "
        "that can (>= 1.1.0)")
    buf = io.BytesIO()
    sf.write(buf, samples, sample_rate, format="MP3", subtype="MPEG_LAYER_III")
    buf.seek(0)
    return sf.read(buf, dtype="float64")[0]


@pytest.fixture(scope="module")
def distinct_clips() -> list[tuple[np.ndarray, int]]:
    """100 different stretches of speech: consecutive 2 s windows of the demo corpus's
    recordings (six voices, 8 to 48 kHz, each file once: the byte-identical copy
    wren_10.flac is left out), within each file's loud part."""
    clips: list[tuple[np.ndarray, int]] = []
    for path in sorted(DEMO.glob("*/*")):
        if path.suffix not in (".wav", ".flac", ".ogg") or path.name == "wren_10.flac" or path.stat().st_size < 1000:
            continue
        mono, rate = speech_only(path, threshold_db=-40.0)
        width = int(DISTINCT_CLIP_S * rate)
        clips += [(mono[i:i + width], rate) for i in range(0, len(mono) - width + 1, width)]
    assert len(clips) >= DISTINCT_CLIPS
    return clips[:DISTINCT_CLIPS]


def test_near_duplicates_survive_resampling_codecs_and_gain(distinct_clips: list[tuple[np.ndarray, int]]) -> None:
    # Reference: the transformations themselves (soxr resampling, libsndfile Vorbis and
    # MP3, a -6 dB gain); the threshold is the configuration default.
    speech, rate = speech_only(FIXTURES / "speech/salt.flac")  # not in the demo corpus
    original = soxr.resample(speech, rate, 44100)
    at_16k = soxr.resample(soxr.resample(original, 44100, 22050), 22050, 16000)
    buf = io.BytesIO()
    sf.write(buf, at_16k, 16000, format="OGG", subtype="VORBIS")
    buf.seek(0)
    vorbis = sf.read(buf, dtype="float64")[0]
    variants = {
        "resampled 44.1 -> 22.05 -> 16 kHz": (at_16k, 16000),
        "Vorbis at 16 kHz": (vorbis, 16000),
        "MP3 at 16 kHz": (encode_mp3(at_16k, 16000), 16000),
        "-6 dB": (original * 10 ** (-6 / 20), 44100),
    }
    reference = quality.fingerprint(original, sample_rate=44100)
    corpus = [reference] + [quality.fingerprint(x, sample_rate=r) for x, r in variants.values()]
    corpus += [quality.fingerprint(x, sample_rate=r) for x, r in distinct_clips[:20]]
    for name, fp in zip(variants, corpus[1:5], strict=True):
        assert quality.fingerprint_similarity(reference, fp) >= 0.95, name
    pairs = quality.find_near_duplicates(corpus, min_similarity=CONFIG_MIN_SIMILARITY)
    # Exactly the five versions of the clip pair up with each other, nothing else.
    assert [(i, j) for i, j, _ in pairs] == [(i, j) for i in range(5) for j in range(i + 1, 5)]
    assert all(sim >= CONFIG_MIN_SIMILARITY for _, _, sim in pairs)


def test_distinct_clips_give_no_pair(distinct_clips: list[tuple[np.ndarray, int]]) -> None:
    # Reference: 100 different utterances (random word strings, 5 voices); any pair found
    # is false. Measured over all 4950 pairs: highest similarity 0.65, median 0.54.
    fps = [quality.fingerprint(x, sample_rate=r) for x, r in distinct_clips]
    assert quality.find_near_duplicates(fps, min_similarity=CONFIG_MIN_SIMILARITY) == []
    # The empty result must not come from the index skipping pairs: brute force over
    # about 700 of the pairs, without the index, stays below the threshold as well.
    best = max(
        quality.fingerprint_similarity(fps[i], fps[j]) for i in range(0, 100, 7) for j in range(i + 1, 100)
    )
    assert best < CONFIG_MIN_SIMILARITY


def test_near_duplicate_pairs_sorted_and_key_cap() -> None:
    # Analytic cases on random sub-fingerprints (uniform bits, so unrelated pairs score ~0.5).
    rng = np.random.default_rng(4)
    base = [rng.integers(1, 2**32, size=150, dtype=np.uint32) for _ in range(6)]
    corpus = [base[0], base[1], base[2], base[1].copy(), base[0][3:], base[3]]
    pairs = quality.find_near_duplicates(corpus, min_similarity=0.9)
    assert pairs == [(0, 4, 1.0), (1, 3, 1.0)]
    # Documented cap: a key held by more than max_clips_per_key clips yields no candidates.
    copies = [base[5]] * 10
    assert quality.find_near_duplicates(copies, min_similarity=0.9, max_clips_per_key=9) == []
    assert len(quality.find_near_duplicates(copies, min_similarity=0.9, max_clips_per_key=10)) == 45
    assert quality.find_near_duplicates([np.zeros(0, np.uint32)] * 3, min_similarity=0.9) == []
    with pytest.raises(ParameterError, match="min_similarity"):
        quality.find_near_duplicates(corpus, min_similarity=0.0)


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
    bw_telephone = quality.effective_bandwidth_hz(telephone, sample_rate=16000)
    assert 3400 <= bw_telephone <= 4200
    assert quality.effective_bandwidth_hz(low_passed, sample_rate=16000) < 5000
    # Full band: espeak-ng speech has energy up to its own Nyquist (11 kHz).
    assert quality.effective_bandwidth_hz(full, sample_rate=16000) > 7000
    assert quality.effective_bandwidth_hz(speech, sample_rate=rate) > 0.9 * rate / 2


def test_bandwidth_of_white_noise_and_analytic_psd() -> None:
    # Analytic: white noise has a flat spectrum up to Nyquist.
    noise = np.random.default_rng(5).normal(size=32000)
    assert quality.effective_bandwidth_hz(noise, sample_rate=16000) >= 7800
    # A step spectrum ends at the step; an isolated strong bin above it is ignored.
    freqs = np.arange(257) * 31.25
    psd = np.where(freqs < 4000, 1.0, 1e-9)
    assert quality.bandwidth_from_psd(freqs, psd) == pytest.approx(3968.75)
    psd[int(7000 / 31.25)] = 10.0
    assert quality.bandwidth_from_psd(freqs, psd) == pytest.approx(3968.75)
    assert quality.bandwidth_from_psd(freqs, psd, smoothing_hz=0) == pytest.approx(7000)


@pytest.mark.parametrize(("sample_rate", "n"), [(16000, 48_123), (44100, 100_000), (8000, 256)])
def test_long_term_psd_equals_scipy_welch(sample_rate: int, n: int) -> None:
    # Reference: scipy.signal.welch with the documented settings (float32 inside the
    # module, so relative tolerance 1e-4).
    x = np.random.default_rng(n).normal(size=n).astype(np.float32)
    freqs, psd = quality.long_term_psd(x, sample_rate=sample_rate)
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
    f1, p1 = quality.long_term_psd(x[:32000], sample_rate=16000)
    f2, p2 = quality.long_term_psd(x[32000:], sample_rate=16000)
    assert np.array_equal(f1, f2)
    whole = quality.effective_bandwidth_hz(x, sample_rate=16000)
    assert quality.bandwidth_from_psd(f1, (p1 + p2) / 2) == pytest.approx(whole, abs=2 * 31.25)
    assert 3000 < whole < 5000  # -50 dB of this 12th-order Butterworth: 3000 * 10 ** (5 / 24) = 4845 Hz


def test_bandwidth_nan_and_bad_parameters() -> None:
    assert np.isnan(quality.effective_bandwidth_hz(np.zeros(16000), sample_rate=16000))
    assert np.isnan(quality.effective_bandwidth_hz(np.ones(100), sample_rate=16000))
    with pytest.raises(ParameterError, match="drop_db"):
        quality.effective_bandwidth_hz(np.ones(16000), sample_rate=16000, drop_db=-3)
    with pytest.raises(ParameterError, match="reference_band_hz"):
        quality.bandwidth_from_psd(np.arange(10.0), np.ones(10), reference_band_hz=(300, 3400))


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
    z = quality.robust_z_scores(values, np.array(["a"] * 5), min_group_size=3)
    np.testing.assert_allclose(z, 0.6745 * (values - 12.0))
    np.testing.assert_allclose(z, direct_modified_z(values, values))
    # Iglewicz and Hoaglin's cut-off |z| > 3.5: only the outlier is flagged.
    assert (np.abs(z) > quality.OUTLIER_ABS_Z).tolist() == [False, False, False, False, True]


def test_robust_z_per_group_and_small_groups() -> None:
    rng = np.random.default_rng(7)
    fast = rng.normal(16.0, 1.0, size=30)  # phones per second of one speaker
    slow = rng.normal(10.0, 1.0, size=30)
    slow[4] = 16.5  # normal for the fast speaker, an outlier for this one
    lone = np.array([12.0, 13.0])
    values = np.concatenate([fast, slow, lone])
    groups = np.array(["fast"] * 30 + ["slow"] * 30 + ["new"] * 2, dtype=object)
    z = quality.robust_z_scores(values, groups, min_group_size=5)
    np.testing.assert_allclose(z[:30], direct_modified_z(fast, fast))
    np.testing.assert_allclose(z[30:60], direct_modified_z(slow, slow))
    # The small group is scored against every value.
    np.testing.assert_allclose(z[60:], direct_modified_z(lone, values))
    flagged = np.flatnonzero(np.abs(z) > quality.OUTLIER_ABS_Z)
    assert flagged.tolist() == [34]


def test_robust_z_zero_mad_missing_values_and_labels() -> None:
    # MAD = 0 fallback (documented): (x - median) / (1.253314 * mean absolute deviation).
    values = np.array([5.0, 5.0, 5.0, 5.0, 6.0])
    z = quality.robust_z_scores(values, np.zeros(5), min_group_size=2)
    np.testing.assert_allclose(z, (values - 5.0) / (1.253314 * 0.2))
    assert quality.robust_z_scores(np.full(4, 3.0), np.zeros(4), min_group_size=2).tolist() == [0.0] * 4
    # NaN values get NaN and count in no statistic; None labels use the whole set.
    values = np.array([1.0, 2.0, np.nan, 3.0, 4.0, 100.0])
    groups = np.array(["a", "a", "a", None, None, "a"], dtype=object)
    z = quality.robust_z_scores(values, groups, min_group_size=3)
    finite = values[~np.isnan(values)]
    assert np.isnan(z[2])
    np.testing.assert_allclose(z[[0, 1, 5]], direct_modified_z(values[[0, 1, 5]], values[[0, 1, 5]]))
    np.testing.assert_allclose(z[[3, 4]], direct_modified_z(values[[3, 4]], finite))
    with pytest.raises(ParameterError, match="min_group_size"):
        quality.robust_z_scores(values, groups, min_group_size=1)
    with pytest.raises(ParameterError, match="groups"):
        quality.robust_z_scores(values, groups[:3], min_group_size=3)


def test_mad_floor_keeps_ordinary_variation_unflagged() -> None:
    """Twelve clips spread like ordinary reading (about +-8 %, values invented) whose MAD
    happens to be tiny: without a floor a clip 12 % off scores past Iglewicz and
    Hoaglin's 3.5; with a 5 % floor it does not, while a doubled rate still does."""
    rates = np.array([10.0, 10.02, 9.98, 10.01, 9.99, 10.0, 10.03, 9.97, 10.0, 9.2, 10.8, 11.2])
    groups = np.zeros(len(rates))
    plain = quality.robust_z_scores(rates, groups, min_group_size=5)
    floored = quality.robust_z_scores(rates, groups, min_group_size=5, min_mad_fraction=0.05)
    assert abs(plain[-1]) > 3.5 and abs(floored[-1]) < 3.5
    # The floor never raises a score, and leaves a gross mismatch flagged.
    assert np.all(np.abs(floored) <= np.abs(plain) + 1e-12)
    doubled = quality.robust_z_scores(np.append(rates, 20.0), np.zeros(13), min_group_size=5, min_mad_fraction=0.05)
    assert doubled[-1] > 3.5
    # With the floor in force the score is 0.6745 * (x - median) / (0.05 * median).
    med = np.median(rates)
    assert floored[-1] == pytest.approx(0.6745 * (rates[-1] - med) / (0.05 * med))


def test_wada_table_special_functions_match_scipy_special() -> None:
    # Source: scipy.special, the reference implementation the closed forms replace.
    import math

    from scipy import special

    j = np.arange(500.0)
    np.testing.assert_allclose(quality.digamma_half_integers(500), special.digamma(j + 0.5), rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(np.concatenate([[0.0], np.cumsum(np.log(j[1:]))]), special.gammaln(j + 1.0),
                               rtol=1e-12, atol=1e-12)
    x = np.linspace(0.0, 8.0, 101)
    np.testing.assert_allclose([math.erf(v) for v in x], special.erf(x), rtol=1e-15, atol=1e-16)


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
        got = quality.bandwidth_from_psd(freqs, psd, smoothing_hz=smoothing_hz, reference_band_hz=(300.0, 3000.0),
                                         drop_db=30.0)
        assert got == float(freqs[above[-1]])


def test_robust_z_labels_factorised_like_pandas() -> None:
    import pandas as pd

    labels = np.array(["b", None, "a", "b", float("nan"), "a", 3, 3], dtype=object)
    want, _ = pd.factorize(labels, use_na_sentinel=True)
    np.testing.assert_array_equal(quality._factorize(labels), want)


def test_streamed_psd_equals_the_whole_signal_psd() -> None:
    # The audio stage feeds blocks of any size; the segment-count-weighted average must be
    # the PSD of the whole signal (which test_long_term_psd_equals_scipy_welch pins down).
    from pipeline.stages.audio import LongTermPsd

    rng = np.random.default_rng(12)
    x = rng.normal(size=16000 * 3).astype(np.float32)
    stream = LongTermPsd(sample_rate=16000)
    cuts = np.sort(rng.integers(0, x.size, size=9))
    for part in np.split(x, cuts):
        stream.push(part)
    freqs, whole = quality.long_term_psd(x[: (x.size // 512) * 512], sample_rate=16000)
    assert stream._freqs is not None and stream._sum is not None
    np.testing.assert_allclose(stream._sum / stream._segments, whole, rtol=1e-5)
    assert stream.bandwidth_hz() == quality.bandwidth_from_psd(freqs, whole)
