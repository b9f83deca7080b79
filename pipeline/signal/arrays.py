"""What the signal measures share: checks on their inputs and the periodic Hann window.

:mod:`pipeline.signal.snr`, :mod:`pipeline.signal.fingerprint` and
:mod:`pipeline.signal.bandwidth` take a mono waveform and (most of them) a sample rate,
and refuse the same bad inputs with the same messages.
"""

from __future__ import annotations

import functools

import numpy as np

from pipeline.core.errors import ParameterError

__all__ = ["check_sample_rate", "mono_float", "periodic_hann"]


@functools.cache
def periodic_hann(length: int) -> np.ndarray:
    """The periodic Hann window of ``length`` samples, float32, shared and read-only.

    Equal to ``scipy.signal.get_window("hann", length)`` (periodic, for spectral
    analysis), without importing scipy.signal, whose import costs about a second in
    every process that loads it. Cached, and read-only so that no caller can change
    the shared copy.

    Parameters
    ----------
    length : int
        Window length in samples.

    Returns
    -------
    np.ndarray
        float32 window, ``0.5 - 0.5 cos(2 pi n / length)`` for n = 0 .. length - 1.

    Examples
    --------
    >>> periodic_hann(4).tolist()
    [0.0, 0.5, 1.0, 0.5]
    """
    n = np.arange(length)
    window = (0.5 - 0.5 * np.cos(2.0 * np.pi * n / length)).astype(np.float32)
    window.flags.writeable = False
    return window


def mono_float(samples: np.ndarray, *, name: str = "samples") -> np.ndarray:
    """``samples`` as a 1-D float array; refuses other shapes and non-finite data.

    float32 stays float32 (what the decoder delivers; halving memory traffic matters
    more here than the last digits), everything else becomes float64.

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform of any numeric dtype.
    name : str
        What the caller calls the array, for the error message.

    Returns
    -------
    np.ndarray
        The samples as float32 (when given float32) or float64.

    Raises
    ------
    ParameterError
        When the array is not 1-D, not numeric, or holds NaN or infinity.

    Examples
    --------
    >>> mono_float(np.array([1, -2], dtype=np.int16)).dtype
    dtype('float64')
    >>> mono_float(np.zeros((2, 2)))
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: samples must be a 1-D (mono) array, got shape (2, 2)
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


def check_sample_rate(sample_rate: int) -> None:
    """Refuse a sample rate that is not a positive integer (bool included).

    Parameters
    ----------
    sample_rate : int
        Sample rate in Hz.

    Raises
    ------
    ParameterError
        Naming the value, when it is not a positive integer.

    Examples
    --------
    >>> check_sample_rate(16000)
    >>> check_sample_rate(0)
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: sample_rate=0 must be a positive integer
    """
    if isinstance(sample_rate, bool) or not isinstance(sample_rate, (int, np.integer)) or sample_rate <= 0:
        raise ParameterError(f"sample_rate={sample_rate!r} must be a positive integer")
