"""Loudness and peak measurement after ITU-R BS.1770-4, and the gain that normalises a clip.

Every function takes an in-memory clip: a floating-point numpy array of shape ``(n,)`` (mono)
or ``(n, channels)``, with full scale at 1.0.

The K-weighting filter is built from an analog prototype and the bilinear transform, so it
works at any sample rate and reproduces the coefficients published in BS.1770-4 (Tables 1
and 2) at 48 kHz. Block energies for the gated measurement come from one cumulative sum of
the filtered, squared signal (per 100 ms step when the rate is a multiple of 10 Hz), so the
cost is linear in the clip length. The filter runs in
``pipeline.signal.iir`` (numpy alone), so measuring loudness never imports scipy.signal; only the
true-peak interpolator does.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal import iir

# Analog prototypes of the two K-weighting stages, derived by inverting the bilinear transform
# (pre-warped at each stage's natural frequency) on the 48 kHz coefficients of BS.1770-4
# Tables 1 and 2: the denominator fixes f0 and Q, the numerator the remaining terms. With
# p = s / (2 pi f0):
#   stage 1 (high shelf):  H(p) = (hf_gain p^2 + mid_coef p + 1) / (p^2 + p / Q + 1)
#   stage 2 (high pass):   H(p) = gain p^2 / (p^2 + p / Q + 1)
# The shelf's DC gain is exactly 1 in the published table; the high pass is published with
# b = (1, -2, 1), i.e. its pass-band gain is slightly above 1 (about +0.043 dB). That gain is
# part of the standard's weighting (the -0.691 dB offset assumes it), so it is kept as a
# constant of the prototype rather than re-normalised at each rate.
SHELF_F0_HZ = 1681.9744509555323
SHELF_Q = 0.707175236955419
SHELF_HF_GAIN = 1.5848647011308554  # +3.9998 dB above the shelf
SHELF_MID_COEF = 1.7799278940417864
HIGHPASS_F0_HZ = 38.13547087611305
HIGHPASS_Q = 0.5003270373250335
HIGHPASS_GAIN = 1.0049948987146884

BLOCK_S = 0.4
# Blocks start every 100 ms (75 % overlap); kept as an integer divisor of one second so block
# starts are exact integers, (j * sample_rate) // 10, at every rate.
BLOCKS_PER_S = 10
LOUDNESS_OFFSET_DB = -0.691
ABSOLUTE_GATE_LUFS = -70.0
RELATIVE_GATE_LU = -10.0
# BS.1770-4 Table 3: L, R, C weigh 1.0, the surround pair Ls, Rs 1.41.
CHANNEL_WEIGHTS = {1: (1.0,), 2: (1.0, 1.0), 3: (1.0, 1.0, 1.0), 5: (1.0, 1.0, 1.0, 1.41, 1.41)}

# BS.1770-4 Annex 2 oversamples 48 kHz input by 4, i.e. it looks at the waveform at 192 kHz.
# Other rates are oversampled to at least the same 192 kHz, which keeps the worst-case
# under-read of a tone near the top of the band no larger than Annex 2's.
TRUE_PEAK_MIN_RATE_HZ = 192_000
# Interpolation filter: windowed sinc, 24 input samples either side of each output point.
# Flat within 0.001 dB up to 0.8 of the input Nyquist, -0.02 dB at 0.9, images below
# -100 dB from 1.3 of Nyquist up. Longer than Annex 2's 48-tap example, which ripples more.
TRUE_PEAK_HALF_TAPS = 24
TRUE_PEAK_KAISER_BETA = 9.0
# Input frames interpolated per call, so a long clip never needs its whole oversampled copy
# in memory at once.
TRUE_PEAK_CHUNK_FRAMES = 1 << 16


def _check_sample_rate(sample_rate: int) -> None:
    if isinstance(sample_rate, bool) or not isinstance(sample_rate, (int, np.integer)):
        raise ParameterError(f"sample_rate={sample_rate!r} is not an integer")
    if sample_rate <= 0:
        raise ParameterError(f"sample_rate={sample_rate} must be > 0")


def _as_frames(samples: np.ndarray, *, as_float64: bool = True) -> np.ndarray:
    """Return ``samples`` as an array of shape (n, channels) (float64 unless
    ``as_float64`` is False, when the floating type is kept), checking it first."""
    if not isinstance(samples, np.ndarray):
        raise ParameterError(f"samples is a {type(samples).__name__}, not a numpy array")
    if not np.issubdtype(samples.dtype, np.floating):
        raise ParameterError(f"samples.dtype={samples.dtype} is not a floating-point type")
    if samples.ndim not in (1, 2):
        raise ParameterError(
            f"samples.ndim={samples.ndim} with shape {samples.shape}; "
            "expected (n,) or (n, channels)"
        )
    frames = samples.reshape(-1, 1) if samples.ndim == 1 else samples
    if frames.shape[1] == 0:
        raise ParameterError(f"samples.shape={samples.shape} has no channels")
    if not np.isfinite(frames).all():
        raise ParameterError("samples contain NaN or infinite values")
    return frames.astype(np.float64, copy=False) if as_float64 else frames


def _peak_to_dbfs(peak: float) -> float:
    return 20.0 * math.log10(peak) if peak > 0.0 else -math.inf


def k_weighting_sos(*, sample_rate: int) -> np.ndarray:
    """K-weighting second-order sections for ``sample_rate`` (see ``_k_weighting_sos``).

    Designed once per rate and cached: the design costs more than filtering a clip.
    """
    _check_sample_rate(sample_rate)  # before the cache, which would take 16000.0 for 16000
    return _k_weighting_sos(sample_rate).copy()


@functools.cache
def _k_weighting_sos(sample_rate: int) -> np.ndarray:
    """K-weighting pre-filter of ITU-R BS.1770-4 as second-order sections.

    Parameters
    ----------
    sample_rate : int
        Sample rate in Hz, > 0. Each stage's natural frequency must lie below Nyquist, so
        rates from 3364 Hz up are accepted.

    Returns
    -------
    np.ndarray
        Shape (2, 6), rows ``(b0, b1, b2, 1, a1, a2)`` for the high shelf (stage 1) and the
        high pass (stage 2), ready for ``pipeline.signal.iir.sosfilt`` (or ``scipy.signal.sosfilt``). At 48 kHz the rows equal
        the coefficients of BS.1770-4 Tables 1 and 2.

    Notes
    -----
    The bilinear transform bends the response as frequencies approach Nyquist, so readings
    at low rates drift from those at 48 kHz. On a 1 kHz tone the drift is -0.001 LU at
    44.1 kHz, -0.02 LU at 22.05 kHz, -0.05 LU at 16 kHz and -0.2 LU at 8 kHz.

    The high pass keeps the pass-band gain it has at 48 kHz (b = 1, -2, 1 there) at every
    rate. Implementations that write b = 1, -2, 1 at every rate instead read higher at low
    rates: +0.09 LU at 16 kHz.

    Examples
    --------
    >>> sos = k_weighting_sos(sample_rate=48_000)
    >>> round(float(sos[1, 4]), 8)
    -1.99004745
    """
    _check_sample_rate(sample_rate)
    if sample_rate <= 2 * SHELF_F0_HZ:
        raise ParameterError(
            f"sample_rate={sample_rate} puts the K-weighting shelf frequency "
            f"({SHELF_F0_HZ:.1f} Hz) above Nyquist"
        )
    rows = []
    for numerator, f0_hz, q in (
        ((SHELF_HF_GAIN, SHELF_MID_COEF, 1.0), SHELF_F0_HZ, SHELF_Q),
        ((HIGHPASS_GAIN, 0.0, 0.0), HIGHPASS_F0_HZ, HIGHPASS_Q),
    ):
        # Pre-warp so the stage's natural frequency lands exactly where the prototype has it.
        w0 = 2.0 * sample_rate * math.tan(math.pi * f0_hz / sample_rate)
        b_analog = [numerator[0], numerator[1] * w0, numerator[2] * w0 * w0]
        a_analog = [1.0, w0 / q, w0 * w0]
        rows.append(_bilinear_biquad(b_analog, a_analog, sample_rate=sample_rate))
    return np.vstack(rows)


def _bilinear_biquad(b_analog: list[float], a_analog: list[float], *, sample_rate: int) -> np.ndarray:
    """Digital section (b0, b1, b2, 1, a1, a2) of the analog second-order section
    (b[0] s^2 + b[1] s + b[2]) / (a[0] s^2 + a[1] s + a[2]) by the bilinear transform
    s = 2 fs (1 - 1/z) / (1 + 1/z), the mapping ``scipy.signal.bilinear`` uses; written
    out because second order is three lines, and scipy.signal costs a second to import."""
    k = 2.0 * sample_rate

    def digital(c: list[float]) -> tuple[float, float, float]:
        return (c[0] * k * k + c[1] * k + c[2], 2.0 * (c[2] - c[0] * k * k), c[0] * k * k - c[1] * k + c[2])

    b, a = digital(b_analog), digital(a_analog)
    return np.array([b[0] / a[0], b[1] / a[0], b[2] / a[0], 1.0, a[1] / a[0], a[2] / a[0]])


def integrated_loudness(samples: np.ndarray, *, sample_rate: int) -> float:
    """Gated integrated loudness of a clip after ITU-R BS.1770-4, in LUFS.

    The clip is K-weighted, cut into 400 ms blocks that start every 100 ms, and each block's
    mean square is summed over channels with the weights of BS.1770-4 Table 3: 1.0 for L, R
    and C, 1.41 for the surround pair (channels 4 and 5 of a five-channel clip). A mono clip
    is one channel of weight 1.0, so a mono signal reads about 3 LU below the same signal
    played on both channels of a stereo clip. Blocks below -70 LUFS (absolute gate) and then
    blocks more than 10 LU below the loudness of the remaining ones (relative gate) are
    dropped; the loudness of what is left is the result.

    Parameters
    ----------
    samples : np.ndarray
        Floating-point samples, shape (n,) or (n, channels) with 1, 2, 3 or 5 channels in
        the order L, R, C, Ls, Rs. Any other channel count raises ParameterError, because
        the standard gives no weights for it.
    sample_rate : int
        Sample rate in Hz (see :func:`k_weighting_sos` for the accepted range).

    Returns
    -------
    float
        Loudness in LUFS; ``-inf`` when the clip is shorter than one 400 ms block or every
        block falls below the absolute gate (silence). Callers treat ``-inf`` as
        "not measurable".

    Examples
    --------
    >>> t = np.arange(48_000 * 5) / 48_000
    >>> tone = 10 ** (-23 / 20) * np.sin(2 * np.pi * 1000 * t)
    >>> round(integrated_loudness(np.column_stack([tone, tone]), sample_rate=48_000), 1)
    -23.0
    """
    sos = k_weighting_sos(sample_rate=sample_rate)
    # The filter computes in float32 whatever it is given (pipeline.signal.iir).
    frames = _as_frames(samples, as_float64=False)
    channels = frames.shape[1]
    if channels not in CHANNEL_WEIGHTS:
        raise ParameterError(
            f"samples has {channels} channels; BS.1770-4 weights are defined for 1, 2, 3 or 5"
        )
    n_frames = frames.shape[0]
    block_frames = round(BLOCK_S * sample_rate)
    if n_frames < block_frames:
        return -math.inf

    # Block j starts at floor(j * rate / 10); the last block is the last that fits whole.
    n_blocks = (BLOCKS_PER_S * (n_frames - block_frames) + BLOCKS_PER_S - 1) // sample_rate + 1
    mean_square = np.zeros((n_blocks, channels))
    step = sample_rate // BLOCKS_PER_S
    whole_steps = sample_rate % BLOCKS_PER_S == 0 and block_frames == 4 * step
    if not whole_steps:
        starts = (np.arange(n_blocks, dtype=np.int64) * sample_rate) // BLOCKS_PER_S
    for channel in range(channels):
        squared = iir.sosfilt(sos, frames[:, channel])
        np.square(squared, out=squared)
        if whole_steps:
            # Blocks are four whole 100 ms steps: sum each step once (float64
            # accumulation), then each block is four consecutive step sums.
            steps = squared[: (n_blocks + 3) * step].reshape(n_blocks + 3, step).sum(axis=1, dtype=np.float64)
            running = np.concatenate([[0.0], np.cumsum(steps)])
            mean_square[:, channel] = (running[4:] - running[:-4]) / block_frames
        else:
            running = np.concatenate([[0.0], np.cumsum(squared, dtype=np.float64)])
            mean_square[:, channel] = (running[starts + block_frames] - running[starts]) / block_frames
    # Rounding in the running sum can leave a digitally silent block a hair below zero.
    np.maximum(mean_square, 0.0, out=mean_square)
    # Weighted sum over channels, one channel after another: a fixed order of
    # additions, where a BLAS product (``@``) would follow its threads and CPU kernel.
    block_power = np.zeros(n_blocks)
    for channel, weight in enumerate(CHANNEL_WEIGHTS[channels]):
        block_power += weight * mean_square[:, channel]

    # Gate in the power domain, where no block needs a logarithm:
    # l_j > gate  <=>  power_j > 10 ** ((gate + 0.691) / 10).
    absolute_gate = 10.0 ** ((ABSOLUTE_GATE_LUFS - LOUDNESS_OFFSET_DB) / 10.0)
    kept = block_power[block_power > absolute_gate]
    if kept.size == 0:
        return -math.inf
    relative_gate = kept.mean() * 10.0 ** (RELATIVE_GATE_LU / 10.0)
    kept = kept[kept > relative_gate]
    return LOUDNESS_OFFSET_DB + 10.0 * math.log10(float(kept.mean()))


def sample_peak_dbfs(samples: np.ndarray) -> float:
    """Largest absolute sample value over all channels, in dBFS (1.0 = 0 dBFS).

    Parameters
    ----------
    samples : np.ndarray
        Floating-point samples, shape (n,) or (n, channels).

    Returns
    -------
    float
        Peak in dBFS; ``-inf`` for an empty or all-zero clip.

    Examples
    --------
    >>> sample_peak_dbfs(np.array([0.25, -0.5, 0.1]))
    -6.020599913279624
    """
    # In the samples' own floating type: the largest magnitude is exact in any of them.
    frames = _as_frames(samples, as_float64=False)
    if frames.size == 0:
        return -math.inf
    return _peak_to_dbfs(float(np.abs(frames).max()))


def true_peak_dbfs(samples: np.ndarray, *, sample_rate: int) -> float:
    """Peak of the band-limited waveform between samples (true peak, BS.1770-4 Annex 2), in dBTP.

    The clip is oversampled with a polyphase windowed-sinc interpolator and the largest
    absolute value is taken. Annex 2 oversamples 48 kHz input by 4; here the factor is the
    smallest integer that brings the rate to at least 192 kHz: 4 at 48 kHz, 5 at 44.1 kHz,
    12 at 16 kHz, 2 at 96 kHz, 1 (the sample peak) from 192 kHz up. No attenuation is applied
    before interpolation, since the arithmetic is floating point and cannot overflow. The
    result is never below the sample peak. The clip edges are interpolated as if the
    signal were zero outside it.

    Parameters
    ----------
    samples : np.ndarray
        Floating-point samples, shape (n,) or (n, channels).
    sample_rate : int
        Sample rate in Hz, > 0.

    Returns
    -------
    float
        True peak in dBTP (dB relative to full scale); ``-inf`` for an empty or all-zero
        clip.

    Examples
    --------
    A tone at a quarter of the rate, 45 degrees out of phase with the sampling, faded in
    and out over 10 ms so the clip edges do not ring:

    >>> n = np.arange(48_000)
    >>> fade = np.clip(np.minimum(n, n[::-1]) / 480, 0.0, 1.0)
    >>> tone = 0.5 * fade * np.sin(np.pi / 2 * n + np.pi / 4)
    >>> round(sample_peak_dbfs(tone), 2), round(true_peak_dbfs(tone, sample_rate=48_000), 2)
    (-9.03, -6.02)
    """
    _check_sample_rate(sample_rate)
    frames = _as_frames(samples)
    if frames.size == 0:
        return -math.inf
    sample_peak = float(np.abs(frames).max())
    factor = -(-TRUE_PEAK_MIN_RATE_HZ // sample_rate)
    if factor <= 1 or sample_peak == 0.0:
        return _peak_to_dbfs(sample_peak)

    import scipy.signal  # only here: the import costs about a second

    taps = scipy.signal.firwin(
        2 * TRUE_PEAK_HALF_TAPS * factor + 1,
        1.0 / factor,
        window=("kaiser", TRUE_PEAK_KAISER_BETA),
    )
    # Each chunk carries enough neighbouring input on both sides that the filter sees the
    # same samples it would see on the whole clip, so the seams are exact.
    context = TRUE_PEAK_HALF_TAPS + 1
    n_frames = frames.shape[0]
    peak = sample_peak
    for start in range(0, n_frames, TRUE_PEAK_CHUNK_FRAMES):
        stop = min(start + TRUE_PEAK_CHUNK_FRAMES, n_frames)
        lo, hi = max(start - context, 0), min(stop + context, n_frames)
        upsampled = scipy.signal.resample_poly(frames[lo:hi], factor, 1, axis=0, window=taps)
        inner = upsampled[(start - lo) * factor : (stop - lo) * factor]
        peak = max(peak, float(np.abs(inner).max()))
    return _peak_to_dbfs(peak)


def normalisation_gain(
    *, loudness_lufs: float, peak_dbfs: float, target_lufs: float, ceiling_dbfs: float
) -> tuple[float, float]:
    """Gain that brings a clip to a loudness target without its peak passing a ceiling.

    The gain is ``target_lufs - loudness_lufs``, lowered to ``ceiling_dbfs - peak_dbfs``
    when that is smaller (a peak already above the ceiling makes that a cut). Gain shifts
    loudness and peak by the same number of dB, so the shortfall is simply the part of the
    wanted gain that the ceiling took away.

    Parameters
    ----------
    loudness_lufs : float
        Measured integrated loudness of the clip, LUFS; must be finite.
    peak_dbfs : float
        Measured peak of the clip (sample or true peak), dBFS; must be finite.
    target_lufs : float
        Wanted loudness, LUFS; must be finite.
    ceiling_dbfs : float
        Highest peak allowed after the gain, dBFS; must be finite.

    Returns
    -------
    tuple[float, float]
        ``(gain_db, shortfall_db)``; ``shortfall_db >= 0`` is how far the gained clip stays
        below ``target_lufs``.

    Examples
    --------
    >>> normalisation_gain(loudness_lufs=-30.0, peak_dbfs=-4.0, target_lufs=-23.0,
    ...                    ceiling_dbfs=-1.0)
    (3.0, 4.0)
    """
    for name, value in (
        ("loudness_lufs", loudness_lufs),
        ("peak_dbfs", peak_dbfs),
        ("target_lufs", target_lufs),
        ("ceiling_dbfs", ceiling_dbfs),
    ):
        if not math.isfinite(value):
            raise ParameterError(f"{name}={value} must be a finite number")
    wanted_db = target_lufs - loudness_lufs
    gain_db = min(wanted_db, ceiling_dbfs - peak_dbfs)
    return gain_db, wanted_db - gain_db
