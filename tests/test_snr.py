"""Tests of the blind SNR estimate in pipeline.signal.snr (WADA-SNR).

References used: the statistical model of Kim and Stern (Interspeech 2008) simulated
directly with numpy, analytic moments of the normal distribution, scipy.special for the
closed forms, and espeak-ng speech (tests/fixtures/speech/).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from pipeline.core.errors import ParameterError
from pipeline.signal import snr
from tests.conftest import FIXTURE_SPEECH, FIXTURES

# Clean espeak-ng speech in plain voices (en-gb, en-us, de), as the synthesiser wrote it.
CLEAN_SPEECH = [FIXTURES / "speech" / f"{name}.flac" for name in FIXTURE_SPEECH]


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
    snr_db, g = snr._wada_table()
    gaussian = 0.5 * np.log(2.0 / np.pi) + 0.5 * (np.euler_gamma + np.log(2.0))
    assert snr_db[0] == snr.WADA_MIN_SNR_DB and snr_db[-1] == snr.WADA_MAX_SNR_DB
    assert g[0] == pytest.approx(gaussian, abs=1e-3)
    assert np.all(np.diff(g) > 0)


@pytest.mark.parametrize("snr_db", [0.0, 10.0, 20.0, 30.0])
def test_wada_table_matches_monte_carlo_of_the_model(snr_db: float) -> None:
    # Reference: direct simulation of the model (Gamma(0.4) speech + Gaussian noise).
    # Tolerance 4e-3 on G: 1e6 samples give a standard error of about 1.5e-3.
    n = 1_000_000
    x = with_noise(gamma_speech(n, seed=11), snr_db, seed=12)
    g_sim = np.log(np.mean(np.abs(x))) - np.mean(np.log(np.abs(x)))
    snr_table, g_table = snr._wada_table()
    assert np.interp(snr_db, snr_table, g_table) == pytest.approx(g_sim, abs=4e-3)


@pytest.mark.parametrize("snr_db", [0.0, 10.0, 20.0, 30.0])
def test_wada_snr_of_model_signal(snr_db: float) -> None:
    # Reference: signals drawn from the paper's own model, so only sampling error remains.
    # Measured error over 5 seeds of 5 s at 16 kHz: at most 0.55 dB (at 0 dB, where G is
    # flattest); tolerance 1 dB.
    x = with_noise(gamma_speech(80_000, seed=int(snr_db) + 1), snr_db, seed=int(snr_db) + 100)
    assert snr.wada_snr_db(x) == pytest.approx(snr_db, abs=1.0)


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
        estimate = snr.wada_snr_db(with_noise(clean, snr_db, seed=k))
        assert estimate == pytest.approx(snr_db, abs=2.5), (source.name, snr_db, estimate)
    estimate = snr.wada_snr_db(with_noise(clean, 30.0, seed=3))
    assert 30.0 - 2.5 <= estimate <= 30.0 + 7.0, (source.name, estimate)


def test_wada_snr_scale_invariant_and_int_input() -> None:
    # Analytic: G is unchanged by scaling, and int16 samples are numbers like any other.
    x = with_noise(gamma_speech(32_000, seed=5), 15.0, seed=6)
    x16 = np.round(x / np.abs(x).max() * 30000).astype(np.int16)
    assert snr.wada_snr_db(x * 1e-3) == pytest.approx(snr.wada_snr_db(x), abs=1e-9)
    assert snr.wada_snr_db(x16) == pytest.approx(snr.wada_snr_db(x16 / 32768.0), abs=1e-9)


def test_wada_snr_clamps_and_nan() -> None:
    # Clean model speech has G = log(0.4) - digamma(0.4) = 1.645 (Gamma moments), above the
    # table's 100 dB end, so the documented clamp applies.
    assert snr.wada_snr_db(gamma_speech(200_000, seed=3)) == snr.WADA_MAX_SNR_DB
    assert np.isnan(snr.wada_snr_db(np.zeros(1000)))
    assert np.isnan(snr.wada_snr_db(np.zeros(0)))


def test_wada_snr_ignores_zero_padding() -> None:
    # Exact zeros are left out by design: padding must not change the estimate.
    x = with_noise(gamma_speech(32_000, seed=8), 10.0, seed=9)
    padded = np.concatenate([np.zeros(8000), x, np.zeros(8000)])
    assert snr.wada_snr_db(padded) == snr.wada_snr_db(x)


def test_wada_snr_rejects_bad_input() -> None:
    with pytest.raises(ParameterError, match="samples"):
        snr.wada_snr_db(np.zeros((100, 2)))
    with pytest.raises(ParameterError, match="NaN"):
        snr.wada_snr_db(np.array([0.1, np.nan]))


def test_wada_table_special_functions_match_scipy_special() -> None:
    # Source: scipy.special, the reference implementation the closed forms replace.
    import math

    from scipy import special

    j = np.arange(500.0)
    np.testing.assert_allclose(snr.digamma_half_integers(500), special.digamma(j + 0.5), rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(np.concatenate([[0.0], np.cumsum(np.log(j[1:]))]), special.gammaln(j + 1.0),
                               rtol=1e-12, atol=1e-12)
    x = np.linspace(0.0, 8.0, 101)
    np.testing.assert_allclose([math.erf(v) for v in x], special.erf(x), rtol=1e-15, atol=1e-16)
