"""Blind SNR of a speech clip: WADA-SNR (Kim and Stern, Interspeech 2008).

:func:`wada_snr_db` estimates the SNR of a clip without a clean reference, from the
shape of its amplitude distribution. The table it reads is computed here from the
method's model (``_wada_table``), not copied. Pure functions on numpy arrays.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from pipeline.signal.arrays import mono_float

__all__ = ["WADA_MAX_SNR_DB", "WADA_MIN_SNR_DB", "digamma_half_integers", "wada_snr_db"]

WADA_MIN_SNR_DB = -20.0
WADA_MAX_SNR_DB = 100.0
_WADA_STEP_DB = 0.1
# Shape of the Gamma distribution of clean speech amplitudes (Kim and Stern 2008).
_WADA_GAMMA_SHAPE = 0.4
# SNRs of the table computed together (see _wada_table).
_WADA_ROWS = 64


def digamma_half_integers(count: int) -> np.ndarray:
    """digamma(j + 1/2) for j = 0 .. count - 1, in closed form.

    psi(1/2) = -gamma - 2 ln 2 and psi(x + 1) = psi(x) + 1/x (DLMF 5.4.15, 5.5.2), so
    no scipy.special import is needed (tests/test_snr.py checks it against it).

    Parameters
    ----------
    count : int
        How many values, >= 1.

    Returns
    -------
    np.ndarray
        float64 values digamma(1/2), digamma(3/2), ...

    Examples
    --------
    >>> [round(float(v), 6) for v in digamma_half_integers(2)]
    [-1.96351, 0.03649]
    """
    steps = 2.0 / (2.0 * np.arange(1, count) - 1.0)
    return -np.euler_gamma - 2.0 * math.log(2.0) + np.concatenate([[0.0], np.cumsum(steps)])


@functools.cache
def _wada_table() -> tuple[np.ndarray, np.ndarray]:
    """G(SNR) for Gamma-amplitude speech plus Gaussian noise, on a 0.1 dB grid.

    The model: x = s + n, with |s| ~ Gamma(k=0.4, scale theta) and a random sign, and
    n ~ N(0, 1) (G does not depend on scale, so the noise is fixed at unit variance).
    E[s^2] = k (k + 1) theta^2, so theta follows from the SNR. Then

        G = log E|x| - E log|x|

    Both expectations are taken over the speech amplitude a = |s| of an expectation
    over the noise that is known in closed form for each a:

    - E|a + n| is the mean of a folded normal: sqrt(2/pi) exp(-a^2/2) + a erf(a/sqrt 2).
    - (a + n)^2 is non-central chi-square with one degree of freedom and non-centrality
      a^2, a Poisson(a^2/2) mixture of central chi-squares with 1 + 2j degrees of
      freedom, and E log chi2_nu = log 2 + digamma(nu/2). So
      E log|a + n| = (log 2 + sum_j Poisson(j; a^2/2) digamma(j + 1/2)) / 2.
      For a > 20 the series needs hundreds of terms, and the expansion
      log a - 1/(2a^2) - 3/(4a^4) is already exact to 1e-7.

    The outer integral over a uses the trapezoid rule on a grid uniform in log a, where
    the Gamma density is smooth at both ends. It integrates h(a) - h(0) rather than
    h(a): that difference vanishes like a^2 at a -> 0, so cutting the grid at
    a = 1e-6 loses nothing, while the Gamma mass below the cut (up to 1 % at -20 dB)
    is carried exactly by h(0). Doubling the grid changes G by < 1e-10, and a
    4-million-sample Monte Carlo simulation of the same model agrees to its own
    sampling error (about 1e-3). Computing takes about 0.02 s, once per process.

    Returns (snr_db, g), both increasing.
    """
    k = _WADA_GAMMA_SHAPE
    steps = round((WADA_MAX_SNR_DB - WADA_MIN_SNR_DB) / _WADA_STEP_DB)
    snr_db = np.linspace(WADA_MIN_SNR_DB, WADA_MAX_SNR_DB, steps + 1)
    theta = np.sqrt(10.0 ** (snr_db / 10.0) / (k * (k + 1.0)))

    log_a = np.linspace(np.log(1e-6), np.log(60.0 * theta.max()), 2000)
    a = np.exp(log_a)
    step = log_a[1] - log_a[0]

    mean_abs, mean_log = _noise_expectations(a)
    mean_abs_0 = np.sqrt(2.0 / np.pi)
    mean_log_0 = -0.5 * (np.euler_gamma + np.log(2.0))

    # Gamma density of a, times da = a d(log a), for a few SNRs at a time: the whole
    # (SNR x a) matrix is 19 MB, and a new process spends most of the table's time
    # faulting in its pages (0.13 s in one piece, 0.03 s in pieces of 64 rows).
    abs_change, log_change = mean_abs - mean_abs_0, mean_log - mean_log_0
    expected_abs, expected_log = np.empty(snr_db.size), np.empty(snr_db.size)
    for lo in range(0, snr_db.size, _WADA_ROWS):
        rows = slice(lo, lo + _WADA_ROWS)
        log_weight = (
            k * (log_a[None, :] - np.log(theta[rows, None]))
            - a[None, :] / theta[rows, None]
            - math.lgamma(k)
        )
        weight = np.exp(log_weight) * step
        weight[:, [0, -1]] *= 0.5
        expected_abs[rows] = mean_abs_0 + np.einsum("sa,a->s", weight, abs_change, optimize=False)
        expected_log[rows] = mean_log_0 + np.einsum("sa,a->s", weight, log_change, optimize=False)
    g = np.log(expected_abs) - expected_log
    return snr_db, g



def _noise_expectations(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """E|a + n| and E log|a + n| for n ~ N(0, 1), at each speech amplitude ``a`` > 0.

    The closed forms are those of ``_wada_table``'s docstring. The special functions
    come from math and closed forms rather than scipy.special, whose import would cost
    more than the table: erf from math.erf; log j! as a cumulative sum; digamma at
    half-integers from :func:`digamma_half_integers`. tests/test_snr.py checks
    each against scipy.special.
    """
    erf = np.frompyfunc(math.erf, 1, 1)
    mean_abs = np.sqrt(2.0 / np.pi) * np.exp(-0.5 * a * a) + a * erf(a / np.sqrt(2.0)).astype(np.float64)
    mean_log = np.empty_like(a)
    far = a > 20.0
    mean_log[far] = np.log(a[far]) - 0.5 / a[far] ** 2 - 0.75 / a[far] ** 4
    near = ~far
    j = np.arange(500.0)
    rate = 0.5 * a[near, None] ** 2
    log_factorial = np.concatenate([[0.0], np.cumsum(np.log(j[1:]))])
    poisson = np.exp(j * np.log(rate) - rate - log_factorial)  # rate > 0 on this grid
    # Products by np.einsum (numpy's own loops), never ``@``: a BLAS product's order of
    # summation follows its threads and CPU kernel, and the table sets every SNR written.
    mean_log[near] = 0.5 * (np.log(2.0) + np.einsum("aj,j->a", poisson, digamma_half_integers(j.size),
                                                    optimize=False))
    return mean_abs, mean_log


def wada_snr_db(samples: np.ndarray) -> float:
    """Blind SNR estimate of a speech clip by Waveform Amplitude Distribution Analysis.

    Method of C. Kim and R. M. Stern, "Robust signal-to-noise ratio estimation based on
    waveform amplitude distribution analysis", Interspeech 2008: clean speech amplitude
    is modelled as Gamma-distributed (shape 0.4) and the noise as Gaussian; the
    statistic ``G = log(mean|x|) - mean(log|x|)`` grows monotonically with the SNR of
    such a mixture, so the SNR is read off a table of G against SNR. The table is
    computed here from the model (see ``_wada_table``), not copied.

    The SNR is the ratio of the speech power to the noise power over the whole clip,
    pauses included. Exact zeros are left out of the statistic: they are digital
    silence or padding, say nothing about the noise, and have no logarithm. So padding
    does not change the estimate, but clean synthetic speech whose pauses are exact
    zeros is judged by its other samples alone (espeak-ng output reads 17 to 19 dB).

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform, any sample rate (G depends only on the amplitude distribution),
        any scale (G is scale invariant).

    Returns
    -------
    float
        Estimated SNR in dB, clamped to ``[WADA_MIN_SNR_DB, WADA_MAX_SNR_DB]``
        (-20..100 dB), the range of the table. G changes little per dB below about
        -5 dB and above about 50 dB, so estimates there are coarse. NaN when the clip
        is empty or all zeros.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> speech = rng.gamma(0.4, size=160_000) * rng.choice([-1.0, 1.0], size=160_000)
    >>> noise = rng.normal(scale=np.sqrt(np.mean(speech**2)) / 10.0, size=160_000)
    >>> round(wada_snr_db(speech + noise))
    20
    """
    x = np.abs(mono_float(samples))
    x = x[x > 0.0]
    if x.size == 0:
        return float("nan")
    # Scale first so tiny or huge values cannot under- or overflow; sums in float64.
    x *= 1.0 / x.max()
    if not x.all():
        # Subnormal float32 samples (a damaged MP3 decodes to some) can round to zero
        # when scaled; log(0) would warn and drive the statistic to infinity.
        x = x[x > 0.0]
    g = np.log(np.mean(x, dtype=np.float64)) - np.mean(np.log(x), dtype=np.float64)
    snr_db, g_table = _wada_table()
    # np.interp clamps to the end values outside the table, which is the documented clamp.
    return float(np.interp(g, g_table, snr_db))

