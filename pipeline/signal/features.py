"""Frame features for aligning two recordings of the same words: MFCCs, normalised.

Mel-frequency cepstral coefficients (Davis and Mermelstein, 1980) with the mel filter
bank ``librosa.filters.mel`` builds by default (Slaney's mel scale, area-normalised
triangles; rebuilt here in numpy, since importing librosa costs about 90 MB in every
worker, and checked against librosa by tests/test_alignment.py), the
power spectrum from ``numpy.fft`` (in float64) and the first 13 coefficients of the
type-II orthonormal DCT (as ``scipy.fft.dct(type=2, norm="ortho")``, checked against it
by the same tests, taken as sums against a cosine table: importing scipy.fft costs a
worker about 0.16 CPU s), computed frame by frame without centring, so a long recording
can be done in blocks whose features join exactly. No number goes through a BLAS product
(the filter bank and the DCT are applied with ``np.einsum(optimize=False)``), so the
features do not depend on the BLAS library's threads or kernel. Mean and variance normalisation per coefficient (over the
whole recording) removes the level, channel and voice differences that would otherwise
dominate a distance between a synthetic and a real recording.
"""

from __future__ import annotations

import functools

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal.arrays import check_sample_rate, mono_float, periodic_hann

__all__ = ["FeatureFrames", "mfcc", "normalise"]

N_MELS = 40
N_MFCC = 13
WINDOW_MS = 25
# Filters stop below 7.6 kHz (or 200 Hz under Nyquist at low rates), so a 16 kHz and a
# 22.05 kHz recording of the same speech get the same bands.
TOP_HZ = 7600.0
# Power floor before the logarithm (-100 dB re full scale): digital silence then has a
# finite, fixed level.
POWER_FLOOR = 1e-10


class FeatureFrames:
    """The framing of :func:`mfcc` at one rate: hop and window in samples, FFT size.

    Examples
    --------
    >>> f = FeatureFrames(sample_rate=16000, hop_ms=20)
    >>> f.hop, f.window, f.n_fft, f.count(16000)
    (320, 400, 512, 49)
    """

    def __init__(self, *, sample_rate: int, hop_ms: int) -> None:
        check_sample_rate(sample_rate)
        if hop_ms < 1:
            raise ParameterError(f"hop_ms={hop_ms} must be at least 1")
        self.sample_rate = sample_rate
        self.hop = sample_rate * hop_ms // 1000
        self.window = sample_rate * WINDOW_MS // 1000
        self.n_fft = 1 << (self.window - 1).bit_length()
        if self.hop < 1:
            raise ParameterError(f"hop_ms={hop_ms} is shorter than one sample at {sample_rate} Hz")

    def count(self, samples: int) -> int:
        """Frames that fit in ``samples`` samples (a frame needs its whole window)."""
        return 0 if samples < self.window else 1 + (samples - self.window) // self.hop


def _hz_to_mel(hz: np.ndarray) -> np.ndarray:
    """Slaney's mel scale (Auditory Toolbox, 1998): linear to 1 kHz, logarithmic above."""
    hz = np.asarray(hz, dtype=np.float64)
    linear = hz / (200.0 / 3)
    return np.where(hz >= 1000.0, 15.0 + np.log(np.maximum(hz, 1e-10) / 1000.0) / (np.log(6.4) / 27.0), linear)


def _mel_to_hz(mel: np.ndarray) -> np.ndarray:
    mel = np.asarray(mel, dtype=np.float64)
    return np.where(mel >= 15.0, 1000.0 * np.exp((np.log(6.4) / 27.0) * (mel - 15.0)), mel * (200.0 / 3))


def mel_bank(*, sample_rate: int, n_fft: int, n_mels: int, top_hz: float) -> np.ndarray:
    """Area-normalised triangular mel filters, shape (n_mels, n_fft // 2 + 1), from 0 Hz to ``top_hz``.

    Examples
    --------
    >>> mel_bank(sample_rate=16000, n_fft=512, n_mels=40, top_hz=7600.0).shape
    (40, 257)
    """
    freqs = np.arange(n_fft // 2 + 1) * (sample_rate / n_fft)
    edges = _mel_to_hz(np.linspace(_hz_to_mel(0.0), _hz_to_mel(top_hz), n_mels + 2))
    widths = np.diff(edges)
    ramps = edges[:, None] - freqs[None, :]
    lower = -ramps[:n_mels] / widths[:n_mels, None]
    upper = ramps[2:] / widths[1:, None]
    bank = np.maximum(0.0, np.minimum(lower, upper))
    return bank * (2.0 / (edges[2:] - edges[:n_mels]))[:, None]


@functools.cache
def _filters(sample_rate: int, n_fft: int) -> tuple[tuple[int, int, np.ndarray], ...]:
    """Each mel filter's first bin, stop bin and weights there (the bank is sparse)."""
    top = min(TOP_HZ, sample_rate / 2 - 200.0)
    bank = mel_bank(sample_rate=sample_rate, n_fft=n_fft, n_mels=N_MELS, top_hz=top)
    out = []
    for row in bank:
        nz = np.flatnonzero(row)
        lo, hi = (int(nz[0]), int(nz[-1]) + 1) if nz.size else (0, 1)
        out.append((lo, hi, np.ascontiguousarray(row[lo:hi], dtype=np.float64)))
    return tuple(out)


@functools.cache
def _dct_table(n_in: int, n_out: int) -> np.ndarray:
    """The type-II orthonormal DCT's first ``n_out`` basis vectors over ``n_in`` inputs,
    as columns: out[k] = sum over n of x[n] * table[n, k] (``scipy.fft.dct`` with
    ``type=2, norm="ortho"``)."""
    n = np.arange(n_in)[:, None]
    k = np.arange(n_out)[None, :]
    table = np.cos(np.pi * k * (2 * n + 1) / (2 * n_in)) * np.sqrt(2.0 / n_in)
    table[:, 0] = np.sqrt(1.0 / n_in)
    table.flags.writeable = False
    return table


def mfcc(samples: np.ndarray, *, sample_rate: int, hop_ms: int = 20) -> np.ndarray:
    """MFCCs of every whole frame of ``samples`` (frame t starts at sample t * hop).

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform.
    sample_rate : int
        Its rate in Hz.
    hop_ms : int
        Frame step in ms; windows are 25 ms.

    Returns
    -------
    np.ndarray
        float32 array of shape (frames, 13): c0 (log energy) to c12.

    Examples
    --------
    >>> tone = np.sin(2 * np.pi * 440 * np.arange(16000) / 16000)
    >>> mfcc(tone, sample_rate=16000).shape
    (49, 13)
    """
    x = mono_float(samples)
    frames = FeatureFrames(sample_rate=sample_rate, hop_ms=hop_ms)
    count = frames.count(len(x))
    if count == 0:
        return np.zeros((0, N_MFCC), dtype=np.float32)
    view = np.lib.stride_tricks.sliding_window_view(x, frames.window)[::frames.hop][:count]
    # Windowed in float64: numpy.fft's float64 transform is faster than its float32 one
    # (which gave exactly the float64 result rounded), and the power is summed in float64.
    window = periodic_hann(frames.window).astype(np.float64)
    spectrum = np.fft.rfft(view * window, n=frames.n_fft, axis=1)
    power = spectrum.real**2 + spectrum.imag**2
    mel = np.empty((count, N_MELS), dtype=np.float64)
    for m, (lo, hi, weights) in enumerate(_filters(sample_rate, frames.n_fft)):
        mel[:, m] = np.einsum("fb,b->f", power[:, lo:hi], weights, optimize=False)
    log_mel = np.log(np.maximum(mel, POWER_FLOOR))
    # The DCT a coefficient at a time, like the filter bank: each frame's sums the same
    # whatever the block's length.
    cepstrum = np.empty((count, N_MFCC), dtype=np.float32)
    for k, basis in enumerate(_dct_table(N_MELS, N_MFCC).T):
        cepstrum[:, k] = np.einsum("fm,m->f", log_mel, basis, optimize=False)
    return cepstrum


def normalise(features: np.ndarray) -> np.ndarray:
    """Each column shifted to mean 0 and scaled to variance 1 (a constant column to 0).

    Parameters
    ----------
    features : np.ndarray
        2-D array, one frame per row.

    Returns
    -------
    np.ndarray
        float32 array of the same shape.

    Examples
    --------
    >>> normalise(np.array([[1.0, 5.0], [3.0, 5.0]])).tolist()
    [[-1.0, 0.0], [1.0, 0.0]]
    """
    f = np.asarray(features, dtype=np.float64)
    if f.ndim != 2:
        raise ParameterError(f"features must be 2-D (frames, coefficients), got shape {f.shape}")
    if len(f) == 0:
        return f.astype(np.float32)
    mean = f.mean(axis=0)
    std = f.std(axis=0)
    return ((f - mean) / np.where(std > 0, std, 1.0)).astype(np.float32)
