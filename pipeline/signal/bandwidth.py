"""Effective bandwidth: where a clip's long-term spectrum ends.

Telephone or low-rate audio upsampled into a wider corpus keeps an empty top band;
:func:`effective_bandwidth_hz` finds it, from :func:`long_term_psd` (a Welch power
spectral density) and :func:`bandwidth_from_psd`. The two steps are public so that a
stream can be measured block by block and its PSDs averaged. Pure functions on numpy
arrays.
"""

from __future__ import annotations

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal.arrays import check_sample_rate, mono_float, periodic_hann

__all__ = ["WelchStream", "bandwidth_from_psd", "effective_bandwidth_hz", "long_term_psd"]

DEFAULT_REFERENCE_BAND_HZ = (300.0, 3400.0)  # the telephone band, present in any speech channel
DEFAULT_DROP_DB = 50.0
DEFAULT_SMOOTHING_HZ = 300.0
_WELCH_SEGMENT_S = 0.032
_WELCH_BLOCK_SEGMENTS = 256
# Samples per FFT call (float64 temporaries of 256 KiB, which stay in cache: 256
# segments of 512 at once took three times as long); a power of two, so a block of
# whole segments divides a group.
_FFT_BLOCK_SAMPLES = 1 << 15


def long_term_psd(samples: np.ndarray, *, sample_rate: int) -> tuple[np.ndarray, np.ndarray]:
    """Welch power spectral density of a clip (32 ms Hann segments, side by side).

    The same estimate as ``scipy.signal.welch(x, fs=sample_rate, window="hann",
    nperseg=segment, noverlap=0, detrend=False)`` (one-sided density, mean over
    segments). Welch's usual half overlap only lowers the variance of each bin, and a
    long-term spectrum averages hundreds of segments (312 in ten seconds), so it would
    double the cost for no visible change in a bandwidth reading. Computed
    here in blocks of segments with ``numpy.fft``: scipy.signal.welch took 11 times as
    long as the blocks (then float32, with scipy.fft) on a minute of 16 kHz audio, which
    alone would have cost most of the time budget of these gates.
    The segment length in samples is the power of two nearest to 32 ms, so PSDs of
    blocks or files at one sample rate share their frequency grid and can be averaged
    (weighted by their segment counts) before :func:`bandwidth_from_psd`.
    :class:`WelchStream` gives the same result, bit for bit, fed block by block.

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
    stream = WelchStream(sample_rate=sample_rate)
    stream.push(samples)
    return stream.result()


class WelchStream:
    """:func:`long_term_psd` of a stream fed in blocks of any length.

    Segments are cut across block edges and transformed in groups of
    ``_WELCH_BLOCK_SEGMENTS``, the groups :func:`long_term_psd` takes from a whole
    signal, so the float64 sums see the same numbers in the same order: the result
    equals ``long_term_psd`` of the concatenated blocks bit for bit, whatever the
    block sizes. Held back between blocks: less than one group (131,072 samples at
    16 kHz).

    Parameters
    ----------
    sample_rate : int
        Sample rate in Hz.

    Examples
    --------
    >>> x = np.random.default_rng(0).normal(size=40_000).astype(np.float32)
    >>> stream = WelchStream(sample_rate=16000)
    >>> for part in np.split(x, [7_000, 7_100, 30_000]):
    ...     stream.push(part)
    >>> bool((stream.result()[1] == long_term_psd(x, sample_rate=16000)[1]).all())
    True
    """

    def __init__(self, *, sample_rate: int) -> None:
        check_sample_rate(sample_rate)
        self.sample_rate = int(sample_rate)
        self.segment = 1 << max(4, round(np.log2(_WELCH_SEGMENT_S * sample_rate)))
        self._power = np.zeros(self.segment // 2 + 1)
        self._count = 0
        # Blocks not yet summed, fewer samples than a group until the last one came:
        # joined once a group is complete, so each sample is copied once or twice.
        self._pending: list[np.ndarray] = []
        self._held = 0

    def push(self, samples: np.ndarray) -> None:
        """Add the next block of the stream (mono; float32 is used as it is)."""
        # A copy: the caller may reuse its buffer.
        self._pending.append(np.array(mono_float(samples), dtype=np.float32))
        self._held += self._pending[-1].size
        group = _WELCH_BLOCK_SEGMENTS * self.segment
        if self._held < group:
            return
        data = np.concatenate(self._pending) if len(self._pending) > 1 else self._pending[0]
        whole = data.size // group * group
        self._add(data[:whole])
        self._pending = [data[whole:]] if whole < data.size else []
        self._held = data.size - whole

    def _add(self, data: np.ndarray) -> None:
        """Sum the power spectra of the whole segments of ``data`` (whole groups but for
        the stream's last), a block of segments at a time."""
        count = data.size // self.segment
        frames = data[: count * self.segment].reshape(count, self.segment)
        # numpy.fft in float64 (its float32 transform gave exactly the float64 result
        # rounded to float32, and took longer than the float64 one): the segments are
        # windowed in float64, a block at a time. The blocks start at fixed places in each
        # group, so the sums meet the same numbers in the same order however the stream
        # was fed.
        block = min(_WELCH_BLOCK_SEGMENTS, max(1, _FFT_BLOCK_SAMPLES // self.segment))
        window = periodic_hann(self.segment).astype(np.float64)
        for start in range(0, count, block):
            windowed = frames[start : start + block] * window
            # The spectrum as interleaved (re, im) pairs, squared in place: no
            # complex-magnitude temporaries.
            pairs = np.fft.rfft(windowed, axis=1).view(np.float64)
            np.square(pairs, out=pairs)
            self._power += pairs.sum(axis=0).reshape(-1, 2).sum(axis=1)
        self._count += count

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        """Frequencies (Hz) and PSD of everything pushed, as :func:`long_term_psd` returns
        them; both empty when the stream is shorter than one segment. Ends the stream."""
        if self._held >= self.segment:
            self._add(np.concatenate(self._pending))
        self._pending, self._held = [], 0
        if self._count == 0:
            return np.zeros(0), np.zeros(0)
        window = periodic_hann(self.segment)
        power = self._power.copy()
        # One-sided density: every bin but DC and Nyquist also carries its negative twin.
        power *= 2.0 / (self._count * self.sample_rate * float(np.sum(window.astype(np.float64) ** 2)))
        power[0] /= 2.0
        power[-1] /= 2.0
        return np.fft.rfftfreq(self.segment, d=1.0 / self.sample_rate), power


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
        # The window is odd, so its median is the middle of its sorted values, which a
        # sort picks out at a fifth of np.median's cost on these short rows.
        half = width // 2
        padded = np.concatenate([np.full(half, level_db[0]), level_db, np.full(half, level_db[-1])])
        level_db = np.sort(np.lib.stride_tricks.sliding_window_view(padded, width), axis=1)[:, half]
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

