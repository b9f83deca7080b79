"""Signal-level quality gates: blind SNR, near-duplicate fingerprints, bandwidth, outliers.

Every function here is pure: numpy arrays in, numbers or arrays out, no files and no
global state beyond cached constant tables. The stages decide what to do with the
numbers (thresholds live in the ``quality`` section of the configuration).

- :func:`wada_snr_db` estimates the SNR of a clip without a clean reference.
- :func:`fingerprint`, :func:`fingerprint_similarity` and :func:`find_near_duplicates`
  find clips that are the same recording after resampling, re-encoding or a gain change.
- :func:`effective_bandwidth_hz` finds where the long-term spectrum ends, which exposes
  telephone or low-rate audio that was upsampled.
- :func:`robust_z_scores` scores a per-clip value (such as speaking rate) against the
  clip's group (such as its speaker), robustly to the outliers it is meant to find.

librosa is deliberately not used: its first call in a process spends seconds on JIT
compilation, which a per-file worker pays again and again, while numpy, scipy and soxr
do the same work here without start-up cost.
"""

from __future__ import annotations

import base64
import functools
import math
from collections.abc import Sequence

import numpy as np
import soxr

from pipeline.core.errors import ParameterError


@functools.cache
def _periodic_hann(length: int) -> np.ndarray:
    """scipy.signal.get_window("hann", length) (periodic), without importing
    scipy.signal, whose import costs about a second in every process that loads it.
    Cached, and read-only so that no caller can change the shared copy."""
    n = np.arange(length)
    window = (0.5 - 0.5 * np.cos(2.0 * np.pi * n / length)).astype(np.float32)
    window.flags.writeable = False
    return window

__all__ = [
    "OUTLIER_ABS_Z",
    "WADA_MAX_SNR_DB",
    "WADA_MIN_SNR_DB",
    "bandwidth_from_psd",
    "decode_fingerprint",
    "effective_bandwidth_hz",
    "encode_fingerprint",
    "find_near_duplicates",
    "fingerprint",
    "fingerprint_similarity",
    "long_term_psd",
    "robust_z_scores",
    "wada_snr_db",
]


def _mono_float(samples: np.ndarray, *, name: str = "samples") -> np.ndarray:
    """``samples`` as a 1-D float array; refuses other shapes and non-finite data.

    float32 stays float32 (what the decoder delivers; halving memory traffic matters
    more here than the last digits), everything else becomes float64.
    """
    x = np.asarray(samples)
    if x.ndim != 1:
        raise ParameterError(f"{name} must be a 1-D (mono) array, got shape {x.shape}")
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
        raise ParameterError(f"{name} must hold numbers, got dtype {x.dtype}")
    if x.dtype != np.float32:
        x = x.astype(np.float64, copy=False)
    if not np.all(np.isfinite(x)):
        raise ParameterError(f"{name} contains NaN or infinite values")
    return x


def _check_sample_rate(sample_rate: int) -> None:
    if isinstance(sample_rate, bool) or not isinstance(sample_rate, (int, np.integer)) or sample_rate <= 0:
        raise ParameterError(f"sample_rate={sample_rate!r} must be a positive integer")


# ---------------------------------------------------------------------------------------
# Blind SNR: WADA
# ---------------------------------------------------------------------------------------

WADA_MIN_SNR_DB = -20.0
WADA_MAX_SNR_DB = 100.0
_WADA_STEP_DB = 0.1
# Shape of the Gamma distribution of clean speech amplitudes (Kim and Stern 2008).
_WADA_GAMMA_SHAPE = 0.4


def digamma_half_integers(count: int) -> np.ndarray:
    """digamma(j + 1/2) for j = 0 .. count - 1, from the closed form
    psi(1/2) = -gamma - 2 ln 2 and psi(x + 1) = psi(x) + 1/x (DLMF 5.4.15, 5.5.2)."""
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
    sampling error (about 1e-3). Computing takes about 0.1 s, once per process.

    Returns (snr_db, g), both increasing.
    """
    k = _WADA_GAMMA_SHAPE
    steps = round((WADA_MAX_SNR_DB - WADA_MIN_SNR_DB) / _WADA_STEP_DB)
    snr_db = np.linspace(WADA_MIN_SNR_DB, WADA_MAX_SNR_DB, steps + 1)
    theta = np.sqrt(10.0 ** (snr_db / 10.0) / (k * (k + 1.0)))

    log_a = np.linspace(np.log(1e-6), np.log(60.0 * theta.max()), 2000)
    a = np.exp(log_a)
    step = log_a[1] - log_a[0]

    # The special functions come from math and closed forms rather than scipy.special,
    # whose import would cost more than the table: erf from math.erf; log j! as a
    # cumulative sum; digamma at half-integers, psi(j + 1/2) = -gamma - 2 ln 2 +
    # sum_{i=1..j} 2 / (2i - 1) (DLMF 5.4.15 with 5.5.2). tests/test_quality.py checks
    # each against scipy.special.
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
    mean_abs_0 = np.sqrt(2.0 / np.pi)
    mean_log_0 = -0.5 * (np.euler_gamma + np.log(2.0))

    # Gamma density of a, times da = a d(log a).
    log_weight = (
        k * (log_a[None, :] - np.log(theta[:, None]))
        - a[None, :] / theta[:, None]
        - math.lgamma(k)
    )
    weight = np.exp(log_weight) * step
    weight[:, [0, -1]] *= 0.5
    expected_abs = mean_abs_0 + np.einsum("sa,a->s", weight, mean_abs - mean_abs_0, optimize=False)
    expected_log = mean_log_0 + np.einsum("sa,a->s", weight, mean_log - mean_log_0, optimize=False)
    g = np.log(expected_abs) - expected_log
    return snr_db, g


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
    x = np.abs(_mono_float(samples))
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


# ---------------------------------------------------------------------------------------
# Near-duplicate fingerprints: Haitsma-Kalker
# ---------------------------------------------------------------------------------------

# Parameters follow J. Haitsma and T. Kalker, "A Highly Robust Audio Fingerprinting
# System", ISMIR 2002: 0.37 s Hann frames and 33 logarithmically spaced bands between
# 300 and 2000 Hz giving 32 bits per frame. The paper works at 5512.5 Hz; 5000 Hz keeps
# 2000 Hz well inside the band and the frame an integer.
#
# The hop is 1/16 of a frame (23.2 ms) where the paper uses 1/32 (11.6 ms). The short-time
# FFT is nearly all the cost and scales with the number of frames, and these gates must
# stay a small fraction of decode + resample + encode. A coarser hop costs robustness
# when two copies are out of step by a fraction of a hop (different trimming, say):
# measured on espeak-ng speech with a 30 dB noise floor, half a hop out of step and then
# MP3 coded scored 0.92 at this hop, 0.95 at the paper's and 0.87 at twice this one,
# against a configured threshold of 0.85.
FP_SAMPLE_RATE = 5000
FP_FRAME = 1850  # 0.37 s
FP_HOP = 116  # 23.2 ms
# Each frame is zero-padded to 1920 = 2^7 * 3 * 5 samples for its FFT: 1850 has the prime
# factor 37, which made pocketfft 1.7 times slower per frame. Padding only samples the
# same windowed spectrum on a finer grid; the bands keep their edges. Measured with the
# test above on three sentences (30 dB noise floor, half a hop out of step, MP3): 0.923 to
# 0.926 padded, 0.922 to 0.927 unpadded.
FP_FFT = 1920
FP_BAND_EDGES_HZ = np.geomspace(300.0, 2000.0, 34)
# Band energies below this level relative to the clip's mean band energy are raised to
# it, so frames of silence give the sub-fingerprint 0 whatever faint codec or
# resampler residue they hold. An addition: the paper does not treat silence.
FP_FLOOR_DB = -60.0
# Frames per block of the short-time FFT: keeps the working set in cache without a
# Python loop per frame (32, 64 and 128 were equally fast on 15 s clips, 256 slower).
_FP_BLOCK_FRAMES = 64


@functools.cache
def _fp_bands() -> tuple[int, int, np.ndarray]:
    """First FFT bin, last bin + 1, and each band's first bin relative to the first."""
    import scipy.fft
    freqs = scipy.fft.rfftfreq(FP_FFT, d=1.0 / FP_SAMPLE_RATE)
    # Bin k belongs to band m when edge[m] <= f_k < edge[m + 1]; bands are contiguous.
    starts = np.searchsorted(freqs, FP_BAND_EDGES_HZ, side="left")
    return int(starts[0]), int(starts[-1]), starts[:-1] - starts[0]


def _fp_band_energies(x: np.ndarray) -> np.ndarray:
    """Frames x 33 band energies of a float32 5 kHz signal, computed block by block."""
    import scipy.fft
    first, last, band_starts = _fp_bands()
    frames = np.lib.stride_tricks.sliding_window_view(x, FP_FRAME)[::FP_HOP]
    window = _periodic_hann(FP_FRAME)
    # The spectrum is read as interleaved (re, im) float32 pairs: squaring them in place
    # and summing each band's run of pairs with reduceat gives the band powers without a
    # complex-magnitude temporary or a dense band matrix.
    pair_starts = 2 * band_starts
    out = np.empty((frames.shape[0], band_starts.size), dtype=np.float32)
    # Windowed frames are written into one zero-padded buffer, which the FFT reads as
    # is: no temporary per block and no padding copy inside the transform (a third of
    # the cost, same numbers).
    padded = np.zeros((_FP_BLOCK_FRAMES, FP_FFT), dtype=np.float32)
    for start in range(0, frames.shape[0], _FP_BLOCK_FRAMES):
        block = frames[start : start + _FP_BLOCK_FRAMES]
        count = block.shape[0]
        np.multiply(block, window, out=padded[:count, :FP_FRAME])
        pairs = scipy.fft.rfft(padded[:count], axis=1).view(np.float32)[:, 2 * first : 2 * last]
        np.square(pairs, out=pairs)
        out[start : start + count] = np.add.reduceat(pairs, pair_starts, axis=1)
    return out


def fingerprint(samples: np.ndarray, *, sample_rate: int) -> np.ndarray:
    """Haitsma-Kalker audio fingerprint: one 32-bit sub-fingerprint every 23.2 ms.

    After J. Haitsma and T. Kalker, "A Highly Robust Audio Fingerprinting System",
    ISMIR 2002. The clip is resampled (soxr) to 5000 Hz, cut into 0.37 s Hann frames
    every 23.2 ms (the paper: 11.6 ms; see the note on ``FP_HOP``), and the energy of
    33 log-spaced bands between 300 and 2000 Hz is measured in each. Bit m of frame n is 1 when the energy difference between bands m
    and m + 1 grew since frame n - 1. Bit 31 (the most significant) belongs to the
    lowest bands. Band energies are floored at 60 dB below the clip's mean so silence
    gives 0 (an addition to the paper). Resampling, lossy coding and gain leave most
    bits unchanged, which :func:`fingerprint_similarity` measures.

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform.
    sample_rate : int
        Sample rate of ``samples`` in Hz; the result does not depend on it.

    Returns
    -------
    np.ndarray
        ``uint32`` array of sub-fingerprints, one per frame after the first; empty when
        the clip is shorter than a frame and a hop (about 0.39 s).

    Examples
    --------
    >>> t = np.arange(16000 * 2) / 16000
    >>> fingerprint(np.sin(2 * np.pi * 440 * t) * t, sample_rate=16000).shape
    (70,)
    """
    _check_sample_rate(sample_rate)
    x = _mono_float(samples).astype(np.float32, copy=False)
    if sample_rate != FP_SAMPLE_RATE and x.size:
        x = soxr.resample(x, sample_rate, FP_SAMPLE_RATE)
    if x.size < FP_FRAME + FP_HOP:
        return np.zeros(0, dtype=np.uint32)
    energy = _fp_band_energies(x)
    mean = float(energy.mean(dtype=np.float64))
    if mean > 0.0:
        np.maximum(energy, np.float32(mean * 10.0 ** (FP_FLOOR_DB / 10.0)), out=energy)
    across = energy[:, :-1] - energy[:, 1:]
    bits = (across[1:] - across[:-1]) > 0.0
    # Band 0's bit first, most significant first: four big-endian bytes per frame.
    return np.packbits(bits, axis=1).view(">u4")[:, 0].astype(np.uint32)


def encode_fingerprint(fp: np.ndarray) -> str:
    """Fingerprint as base64 text of its little-endian uint32 bytes (for a string column).

    Parameters
    ----------
    fp : np.ndarray
        Sub-fingerprints as returned by :func:`fingerprint`.

    Returns
    -------
    str
        ASCII text, 4/3 of the byte size (about 230 characters per second of audio).

    Examples
    --------
    >>> encode_fingerprint(np.array([1, 2**32 - 1], dtype=np.uint32))
    'AQAAAP////8='
    """
    arr = np.asarray(fp)
    if arr.ndim != 1 or (arr.size and not np.issubdtype(arr.dtype, np.integer)):
        raise ParameterError(f"fp must be a 1-D integer array, got {arr.dtype} shape {arr.shape}")
    if arr.size and (arr.min() < 0 or arr.max() > 0xFFFFFFFF):
        raise ParameterError("fp holds values outside the uint32 range")
    return base64.b64encode(arr.astype("<u4").tobytes()).decode("ascii")


def decode_fingerprint(s: str) -> np.ndarray:
    """Inverse of :func:`encode_fingerprint`: base64 text back to a ``uint32`` array.

    Parameters
    ----------
    s : str
        Text made by :func:`encode_fingerprint`.

    Returns
    -------
    np.ndarray
        ``uint32`` sub-fingerprints in native byte order.

    Examples
    --------
    >>> decode_fingerprint('AQAAAP////8=').tolist()
    [1, 4294967295]
    """
    try:
        raw = base64.b64decode(s.encode("ascii"), validate=True)
    except (ValueError, AttributeError, UnicodeEncodeError) as exc:
        raise ParameterError(f"s={str(s)[:40]!r} is not base64 text: {exc}") from None
    if len(raw) % 4:
        raise ParameterError(f"s decodes to {len(raw)} bytes, not a multiple of 4")
    return np.frombuffer(raw, dtype="<u4").astype(np.uint32)


if hasattr(np, "bitwise_count"):
    def _popcount(x: np.ndarray) -> np.ndarray:
        return np.bitwise_count(x)
else:  # numpy < 2.0
    _BYTE_BITS = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint8)

    def _popcount(x: np.ndarray) -> np.ndarray:
        b = np.ascontiguousarray(x, dtype=np.uint32).view(np.uint8).reshape(-1, 4)
        return _BYTE_BITS[b].sum(axis=1, dtype=np.uint32).reshape(x.shape)


DEFAULT_MAX_OFFSET_FRAMES = 8  # about 0.19 s: codec delay and edge trimming
DEFAULT_MIN_OVERLAP_FRAMES = 32  # about 0.74 s of hops, two frame lengths


def fingerprint_similarity(
    a: np.ndarray,
    b: np.ndarray,
    *,
    max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
    min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
) -> float:
    """Best bit agreement (1 - bit error rate) of two fingerprints over small shifts.

    ``b`` is shifted against ``a`` by every offset from ``-max_offset_frames`` to
    ``+max_offset_frames`` (one frame is 23.2 ms) and the share of equal bits is taken
    over the overlapping sub-fingerprints; the best offset wins. Positions where both
    sub-fingerprints are 0 (silence in both, see :func:`fingerprint`) are left out:
    shared silence is no evidence of shared content. Haitsma and Kalker (ISMIR 2002)
    declare a match at a bit error rate below 0.35 over 256 sub-fingerprints (quoted
    from memory). Measured here: copies after resampling, Vorbis or MP3 coding score
    above 0.9; unrelated synthetic utterances 0.5 to 0.65; utterances that share their
    last words, spoken by the same synthetic voice at the same time offset, up to 0.77.

    Short overlaps: an offset counts only if it leaves at least
    ``min(min_overlap_frames, len(a), len(b))`` comparable positions, so fingerprints
    shorter than ``min_overlap_frames`` are compared where they overlap fully. When no
    offset qualifies (for example an empty fingerprint) the result is 0.0. A clip that
    is the start of a longer one scores as a duplicate; compare durations if that
    matters.

    Parameters
    ----------
    a, b : np.ndarray
        ``uint32`` fingerprints from :func:`fingerprint`.
    max_offset_frames : int
        Largest shift tried, in sub-fingerprints.
    min_overlap_frames : int
        Fewest compared positions for an offset to count.

    Returns
    -------
    float
        Similarity in [0, 1]; 1.0 for identical fingerprints.

    Examples
    --------
    >>> fp = np.random.default_rng(0).integers(1, 2**32, size=300, dtype=np.uint32)
    >>> fingerprint_similarity(fp, fp[3:])  # b starts 3 frames into a
    1.0
    >>> round(fingerprint_similarity(fp, fp[::-1]), 1)  # unrelated bits agree half the time
    0.5
    """
    if isinstance(max_offset_frames, bool) or not isinstance(max_offset_frames, (int, np.integer)) or max_offset_frames < 0:
        raise ParameterError(f"max_offset_frames={max_offset_frames!r} must be an integer >= 0")
    if isinstance(min_overlap_frames, bool) or not isinstance(min_overlap_frames, (int, np.integer)) or min_overlap_frames < 1:
        raise ParameterError(f"min_overlap_frames={min_overlap_frames!r} must be an integer >= 1")
    a = np.asarray(a, dtype=np.uint32)
    b = np.asarray(b, dtype=np.uint32)
    need = min(min_overlap_frames, a.size, b.size)
    if need == 0:
        return 0.0
    # Every offset at once: row r pairs a[i] with b[i + r - max_offset_frames], read
    # from b padded with zeros (a strided view, no copy). Padding pairs with a[i] where
    # b has no frame; their share of the row sums (the bits of a[i], and a[i] != 0) is
    # taken off again with prefix sums over a. One pass over a (2 K + 1) x len(a)
    # matrix instead of a loop of small array operations per offset: well under half the
    # time when the split stage verifies hundreds of candidate pairs. Integer counts, so
    # the result equals the loop's exactly (a test keeps the loop as the reference).
    k = max_offset_frames
    padded = np.zeros(k + max(b.size, a.size) + k, np.uint32)
    padded[k : k + b.size] = b
    shifted = np.ndarray((2 * k + 1, a.size), dtype=np.uint32, buffer=padded, strides=(4, 4))
    offsets = np.arange(-k, k + 1)
    lo = np.minimum(np.maximum(0, -offsets), a.size)
    hi = np.maximum(lo, np.minimum(a.size, b.size - offsets))
    a_bits = np.concatenate([[0], np.cumsum(_popcount(a), dtype=np.int64)])
    a_live = np.concatenate([[0], np.cumsum(a != 0, dtype=np.int64)])
    errors = _popcount(shifted ^ a).sum(axis=1, dtype=np.int64) - (a_bits[-1] - (a_bits[hi] - a_bits[lo]))
    n = np.count_nonzero(shifted | a, axis=1) - (a_live[-1] - (a_live[hi] - a_live[lo]))
    usable = (hi - lo >= need) & (n >= need)
    if not usable.any():
        return 0.0
    return max(0.0, float((1.0 - errors[usable] / (32.0 * n[usable])).max()))


DEFAULT_MAX_CLIPS_PER_KEY = 64


def find_near_duplicates(
    fingerprints: Sequence[np.ndarray],
    *,
    min_similarity: float,
    max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
    min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
    max_clips_per_key: int = DEFAULT_MAX_CLIPS_PER_KEY,
    min_shared_keys: int = 2,
) -> list[tuple[int, int, float]]:
    """All pairs of clips whose fingerprints agree at or above ``min_similarity``.

    As in Haitsma and Kalker (ISMIR 2002), candidates come from exact matches of
    32-bit sub-fingerprints: every distinct non-zero sub-fingerprint of every clip goes
    into a table keyed by its value, and two clips become a candidate pair when they
    share at least ``min_shared_keys`` keys. Distorted copies keep many bit-exact
    sub-fingerprints (over half of them after Vorbis or MP3 coding in the tests), while
    a single shared key is mostly chance: among 100 unrelated synthetic utterances,
    requiring two cut the candidate pairs from 292 to 66 (of 4950). Keys held by more than
    ``max_clips_per_key`` clips (near-silence and other patterns common to much of a
    corpus) are skipped, which bounds the pairs per key; 0, the silence pattern, is
    never a key. Each candidate is then verified with :func:`fingerprint_similarity`.

    Complexity: building and sorting the table is O(F log F) for F sub-fingerprints in
    total (sorting is the only super-linear step). A key held by k clips yields
    k (k - 1) / 2 pairs with k <= ``max_clips_per_key``, so there are at most
    F * max_clips_per_key / 2 candidate entries: linear in F, and in practice far
    fewer because unrelated clips rarely share a key. Each verification costs
    O((2 * max_offset_frames + 1) * frames). Memory is that of the candidate entries.

    A group of more than ``max_clips_per_key`` copies of one recording has all its keys
    skipped and is not found here; exact copies are cheaper to find by content hash.

    Parameters
    ----------
    fingerprints : Sequence[np.ndarray]
        One fingerprint per clip (empty arrays allowed; they never match).
    min_similarity : float
        Threshold in (0, 1] on :func:`fingerprint_similarity`.
    max_offset_frames, min_overlap_frames : int
        Passed to :func:`fingerprint_similarity`.
    max_clips_per_key : int
        Keys shared by more clips than this generate no candidates.
    min_shared_keys : int
        Distinct shared keys a pair needs to be verified.

    Returns
    -------
    list of (int, int, float)
        ``(i, j, similarity)`` with ``i < j`` indices into ``fingerprints``, sorted by
        ``i`` then ``j``.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> fps = [rng.integers(1, 2**32, size=200, dtype=np.uint32) for _ in range(3)]
    >>> fps.append(fps[0].copy())
    >>> find_near_duplicates(fps, min_similarity=0.85)
    [(0, 3, 1.0)]
    """
    if not (isinstance(min_similarity, (int, float, np.floating)) and 0.0 < min_similarity <= 1.0):
        raise ParameterError(f"min_similarity={min_similarity!r} must be in (0, 1]")
    if isinstance(max_clips_per_key, bool) or not isinstance(max_clips_per_key, (int, np.integer)) or max_clips_per_key < 2:
        raise ParameterError(f"max_clips_per_key={max_clips_per_key!r} must be an integer >= 2")
    if isinstance(min_shared_keys, bool) or not isinstance(min_shared_keys, (int, np.integer)) or min_shared_keys < 1:
        raise ParameterError(f"min_shared_keys={min_shared_keys!r} must be an integer >= 1")
    fps = [np.asarray(fp, dtype=np.uint32) for fp in fingerprints]

    keys_per_clip = [np.unique(fp[fp != 0]) for fp in fps]
    sizes = np.array([k.size for k in keys_per_clip], dtype=np.int64)
    if sizes.sum() == 0:
        return []
    keys = np.concatenate(keys_per_clip).astype(np.int64)
    clips = np.repeat(np.arange(len(fps), dtype=np.int64), sizes)
    order = np.lexsort((clips, keys))
    keys, clips = keys[order], clips[order]
    starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
    counts = np.diff(np.r_[starts, keys.size])

    pair_codes = []
    n_clips = np.int64(len(fps))
    for size in np.unique(counts[(counts >= 2) & (counts <= max_clips_per_key)]):
        # All groups of this size at once: rows of clip indices, ascending in each row.
        group_starts = starts[counts == size]
        members = clips[group_starts[:, None] + np.arange(size)]
        left, right = np.triu_indices(int(size), k=1)
        pair_codes.append((members[:, left] * n_clips + members[:, right]).ravel())
    if not pair_codes:
        return []
    codes, shared = np.unique(np.concatenate(pair_codes), return_counts=True)
    candidates = codes[shared >= min_shared_keys]

    found = []
    for code in candidates.tolist():
        i, j = divmod(code, int(n_clips))
        sim = fingerprint_similarity(
            fps[i], fps[j], max_offset_frames=max_offset_frames, min_overlap_frames=min_overlap_frames
        )
        if sim >= min_similarity:
            found.append((i, j, sim))
    return found


# ---------------------------------------------------------------------------------------
# Effective bandwidth
# ---------------------------------------------------------------------------------------

DEFAULT_REFERENCE_BAND_HZ = (300.0, 3400.0)  # the telephone band, present in any speech channel
DEFAULT_DROP_DB = 50.0
DEFAULT_SMOOTHING_HZ = 300.0
_WELCH_SEGMENT_S = 0.032
_WELCH_BLOCK_SEGMENTS = 256


def long_term_psd(samples: np.ndarray, *, sample_rate: int) -> tuple[np.ndarray, np.ndarray]:
    """Welch power spectral density of a clip (32 ms Hann segments, side by side).

    The same estimate as ``scipy.signal.welch(x, fs=sample_rate, window="hann",
    nperseg=segment, noverlap=0, detrend=False)`` (one-sided density, mean over
    segments). Welch's usual half overlap only lowers the variance of each bin, and a
    long-term spectrum averages hundreds of segments (312 in ten seconds), so it would
    double the cost for no visible change in a bandwidth reading. Computed
    here in float32 blocks: scipy's float64 path took 11 times as long on a minute of
    16 kHz audio, which alone would have cost most of the time budget of these gates.
    The segment length in samples is the power of two nearest to 32 ms, so PSDs of
    blocks or files at one sample rate share their frequency grid and can be averaged
    (weighted by their segment counts) before :func:`bandwidth_from_psd`.

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform.
    sample_rate : int
        Sample rate in Hz.

    Returns
    -------
    (np.ndarray, np.ndarray)
        Frequencies in Hz and the PSD in units of samples squared per Hz, both float64.
        Both are empty when the clip is shorter than one segment.

    Examples
    --------
    >>> freqs, psd = long_term_psd(np.ones(16000), sample_rate=16000)
    >>> freqs.size, float(freqs[1])
    (257, 31.25)
    """
    import scipy.fft
    _check_sample_rate(sample_rate)
    x = _mono_float(samples)
    segment = 1 << max(4, round(np.log2(_WELCH_SEGMENT_S * sample_rate)))
    if x.size < segment:
        return np.zeros(0), np.zeros(0)
    window = _periodic_hann(segment)
    count = x.size // segment
    frames = x.astype(np.float32, copy=False)[: count * segment].reshape(count, segment)
    power = np.zeros(segment // 2 + 1)
    for start in range(0, count, _WELCH_BLOCK_SEGMENTS):
        windowed = frames[start : start + _WELCH_BLOCK_SEGMENTS] * window
        # The spectrum as interleaved (re, im) float32 pairs, squared in place: no
        # complex-magnitude temporaries.
        pairs = scipy.fft.rfft(windowed, axis=1, overwrite_x=True).view(np.float32)
        np.square(pairs, out=pairs)
        power += pairs.sum(axis=0, dtype=np.float64).reshape(-1, 2).sum(axis=1)
    # One-sided density: every bin but DC and Nyquist also carries its negative twin.
    power *= 2.0 / (count * sample_rate * float(np.sum(window.astype(np.float64) ** 2)))
    power[0] /= 2.0
    power[-1] /= 2.0
    return scipy.fft.rfftfreq(segment, d=1.0 / sample_rate), power


def bandwidth_from_psd(
    freqs: np.ndarray,
    psd: np.ndarray,
    *,
    drop_db: float = DEFAULT_DROP_DB,
    reference_band_hz: tuple[float, float] = DEFAULT_REFERENCE_BAND_HZ,
    smoothing_hz: float = DEFAULT_SMOOTHING_HZ,
) -> float:
    """Highest frequency where a long-term spectrum is still within ``drop_db`` of speech.

    The reference level is the median level (dB) of the PSD inside
    ``reference_band_hz``. The level curve is median-filtered over ``smoothing_hz`` so
    isolated bins (a whistle, a hum harmonic, a single noisy bin) neither extend nor
    cut the band, and the result is the highest frequency whose smoothed level is at
    least ``reference - drop_db``. Why 50 dB: measured, soxr's stop band after
    resampling through 8 kHz lies 70 dB and more below the reference, while espeak-ng
    speech at 5 to 7.5 kHz lies 15 to 25 dB below it; natural speech falls by a
    similar 20 to 30 dB towards 8 kHz (long-term speech spectra, from memory). The
    margin itself is common practice, no source.

    Parameters
    ----------
    freqs : np.ndarray
        Increasing, evenly spaced frequencies in Hz starting at 0 (as from
        :func:`long_term_psd` or ``scipy.signal.welch``).
    psd : np.ndarray
        Power at ``freqs``, any linear unit.
    drop_db : float
        How far below the reference a frequency may be and still count as in band.
    reference_band_hz : (float, float)
        Band whose median level is the reference.
    smoothing_hz : float
        Width of the median filter.

    Returns
    -------
    float
        Bandwidth in Hz; NaN when the PSD is empty or silent in the reference band.

    Examples
    --------
    >>> freqs = np.linspace(0, 8000, 257)
    >>> round(bandwidth_from_psd(freqs, np.where(freqs < 4000, 1.0, 1e-9)))
    3969
    """
    f = np.asarray(freqs, dtype=np.float64)
    p = np.asarray(psd, dtype=np.float64)
    if f.shape != p.shape or f.ndim != 1:
        raise ParameterError(f"freqs and psd must be 1-D of one length, got {f.shape} and {p.shape}")
    if not drop_db > 0:
        raise ParameterError(f"drop_db={drop_db!r} must be > 0")
    low, high = reference_band_hz
    if not 0 <= low < high:
        raise ParameterError(f"reference_band_hz={reference_band_hz!r} must be (low, high) with 0 <= low < high")
    if not smoothing_hz >= 0:
        raise ParameterError(f"smoothing_hz={smoothing_hz!r} must be >= 0")
    if f.size < 2:
        return float("nan")
    in_ref = (f >= low) & (f <= high)
    if not in_ref.any():
        raise ParameterError(f"reference_band_hz={reference_band_hz!r} holds no frequency of freqs")
    tiny = np.finfo(np.float64).tiny
    level_db = 10.0 * np.log10(np.maximum(p, tiny))
    reference = float(np.median(level_db[in_ref]))
    if not np.any(p[in_ref] > 0):
        return float("nan")
    width = int(round(smoothing_hz / (f[1] - f[0])))
    width += 1 - width % 2  # odd, so the window is centred on its bin
    if width > 1:
        # Edges repeat the end values: zero padding would drag the top bins towards 0 dB.
        # (scipy.ndimage.median_filter with mode="nearest" gives the same; a sliding window
        # over a few hundred bins does not need its import.)
        half = width // 2
        padded = np.concatenate([np.full(half, level_db[0]), level_db, np.full(half, level_db[-1])])
        level_db = np.median(np.lib.stride_tricks.sliding_window_view(padded, width), axis=1)
    above = np.flatnonzero(level_db >= reference - drop_db)
    return float(f[above[-1]]) if above.size else float("nan")


def effective_bandwidth_hz(
    samples: np.ndarray,
    *,
    sample_rate: int,
    drop_db: float = DEFAULT_DROP_DB,
    reference_band_hz: tuple[float, float] = DEFAULT_REFERENCE_BAND_HZ,
    smoothing_hz: float = DEFAULT_SMOOTHING_HZ,
) -> float:
    """Effective audio bandwidth of a clip: where its long-term spectrum falls off.

    :func:`long_term_psd` followed by :func:`bandwidth_from_psd`. Telephone audio
    upsampled to 16 kHz comes out near 4 kHz; full-band audio near ``sample_rate / 2``.

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform.
    sample_rate : int
        Sample rate in Hz.
    drop_db, reference_band_hz, smoothing_hz
        See :func:`bandwidth_from_psd`.

    Returns
    -------
    float
        Bandwidth in Hz; NaN for clips shorter than 32 ms or silent.

    Examples
    --------
    >>> noise = np.random.default_rng(0).normal(size=16000)
    >>> effective_bandwidth_hz(noise, sample_rate=16000) > 7500
    True
    """
    freqs, psd = long_term_psd(samples, sample_rate=sample_rate)
    if freqs.size == 0:
        return float("nan")
    return bandwidth_from_psd(
        freqs, psd, drop_db=drop_db, reference_band_hz=reference_band_hz, smoothing_hz=smoothing_hz
    )


# ---------------------------------------------------------------------------------------
# Robust z-scores
# ---------------------------------------------------------------------------------------

# Iglewicz and Hoaglin (1993) recommend labelling |modified z| > 3.5 as potential outliers.
OUTLIER_ABS_Z = 3.5
_MAD_TO_Z = 0.6745  # the 0.75 quantile of the standard normal, as in Iglewicz and Hoaglin
_MEAN_AD_TO_Z = 1.253314  # sqrt(pi/2): mean absolute deviation to sigma for a normal


def _modified_z(x: np.ndarray, ref: np.ndarray, min_mad_fraction: float = 0.0) -> np.ndarray:
    med = np.median(ref)
    dev = x - med
    mad = max(float(np.median(np.abs(ref - med))), min_mad_fraction * abs(float(med)))
    if mad > 0:
        return _MAD_TO_Z * dev / mad
    mean_ad = np.mean(np.abs(ref - med))
    if mean_ad > 0:
        return dev / (_MEAN_AD_TO_Z * mean_ad)
    return np.zeros_like(dev)  # every reference value equals the median, and so does x


def _factorize(labels: np.ndarray) -> np.ndarray:
    """Integer codes in order of first appearance; -1 for None and NaN (what
    ``pandas.factorize`` gives, without importing pandas for it)."""
    codes = np.full(labels.shape, -1, dtype=np.int64)
    seen: dict[object, int] = {}
    for i, label in enumerate(labels.tolist()):
        if label is None or (isinstance(label, float) and math.isnan(label)):
            continue
        codes[i] = seen.setdefault(label, len(seen))
    return codes


def robust_z_scores(values: np.ndarray, groups: np.ndarray, *, min_group_size: int,
                    min_mad_fraction: float = 0.0) -> np.ndarray:
    """Per-group modified z-scores, ``0.6745 * (x - median) / MAD``.

    The modified z-score of B. Iglewicz and D. C. Hoaglin, "How to Detect and Handle
    Outliers", ASQC Quality Press, 1993, who suggest |z| > 3.5 (``OUTLIER_ABS_Z``) as
    the mark of a potential outlier. Median and MAD (median absolute deviation from
    the median) are taken within each group, so one speaker's fast or slow speech is
    judged against that speaker; groups with fewer than ``min_group_size`` finite
    values are scored against all finite values instead.

    When the MAD is 0 (more than half the reference values are equal) the score falls
    back to ``(x - median) / (1.253314 * mean absolute deviation)``, the same scale for
    normal data (a common convention, given from memory, not from the book); when that
    is 0 too, every reference value equals the median and the scores are 0. The result
    is therefore always finite for finite input.

    Parameters
    ----------
    values : np.ndarray
        One number per item, such as phones per second; NaN marks a missing value,
        which gets a NaN score and counts in no statistic.
    groups : np.ndarray
        One hashable label per item, such as a speaker; None or NaN labels are scored
        against the whole set.
    min_group_size : int
        Smallest group (finite values) with its own median and MAD; >= 2.
    min_mad_fraction : float
        Smallest MAD used, as a share of the median (0 for none). A small group can have
        a MAD far below the natural spread of what is measured, and then flags ordinary
        values; a floor keeps the score on a realistic scale (common practice, no source).

    Returns
    -------
    np.ndarray
        float64 scores, same length as ``values``.

    Examples
    --------
    >>> robust_z_scores(np.array([10.0, 11, 12, 13, 40]), np.zeros(5), min_group_size=3)
    array([-1.349 , -0.6745,  0.    ,  0.6745, 18.886 ])
    """
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1:
        raise ParameterError(f"values must be 1-D, got shape {x.shape}")
    labels = np.asarray(groups, dtype=object) if not isinstance(groups, np.ndarray) else groups
    if labels.shape != x.shape:
        raise ParameterError(f"groups must have the shape of values {x.shape}, got {labels.shape}")
    if isinstance(min_group_size, bool) or not isinstance(min_group_size, (int, np.integer)) or min_group_size < 2:
        raise ParameterError(f"min_group_size={min_group_size!r} must be an integer >= 2")
    if np.isinf(x).any():
        raise ParameterError("values contains infinite entries (use NaN for missing)")
    if not 0.0 <= min_mad_fraction < 1.0:
        raise ParameterError(f"min_mad_fraction={min_mad_fraction!r} must be in [0, 1)")

    out = np.full(x.shape, np.nan)
    finite = ~np.isnan(x)
    if not finite.any():
        return out
    codes = _factorize(labels)
    sizes = np.bincount(codes[finite & (codes >= 0)], minlength=max(int(codes.max()) + 1, 1))
    own = finite & (codes >= 0) & (sizes[np.maximum(codes, 0)] >= min_group_size)

    # Sort once and cut into groups: a mask per group would cost groups x items.
    index = np.flatnonzero(own)
    index = index[np.argsort(codes[index], kind="stable")]
    cuts = np.flatnonzero(np.diff(codes[index])) + 1
    for members in np.split(index, cuts):
        if members.size:
            out[members] = _modified_z(x[members], x[members], min_mad_fraction)
    rest = finite & ~own
    if rest.any():
        out[rest] = _modified_z(x[rest], x[finite], min_mad_fraction)
    return out
