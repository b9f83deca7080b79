"""Small spectrogram pictures of clips for the review page, written under ``OUT/review/pictures``."""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.core.fsio import write_bytes_atomic

PICTURES = "review/pictures"
_LOCK = threading.Lock()  # matplotlib's pyplot state is not thread-safe


def log_spectrogram(samples: np.ndarray, *, sample_rate: int, frame_ms: float = 25.0,
                    hop_ms: float = 10.0) -> np.ndarray:
    """Power spectrogram in dB (frequency rows, frame columns) with a periodic Hann window.

    Parameters
    ----------
    samples : np.ndarray
        Mono signal, float.
    sample_rate : int
        Hz.
    frame_ms, hop_ms : float
        Frame length and hop, milliseconds.

    Returns
    -------
    np.ndarray
        ``(frame // 2 + 1, frames)`` dB values, at most 0 (relative to the loudest bin).

    Examples
    --------
    >>> t = np.arange(16000) / 16000
    >>> spec = log_spectrogram(np.sin(2 * np.pi * 1000 * t), sample_rate=16000)
    >>> spec.shape[0], int(spec[:, 10].argmax()) * 16000 // 400
    (201, 1000)
    """
    if sample_rate <= 0 or frame_ms <= 0 or hop_ms <= 0:
        raise ParameterError(f"sample_rate={sample_rate}, frame_ms={frame_ms}, hop_ms={hop_ms}: expected positive values")
    frame = max(2, int(round(sample_rate * frame_ms / 1000)))
    hop = max(1, int(round(sample_rate * hop_ms / 1000)))
    x = np.asarray(samples, dtype=np.float64)
    if x.size < frame:
        x = np.pad(x, (0, frame - x.size))
    starts = np.arange(0, x.size - frame + 1, hop)
    window = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(frame) / frame)
    power = np.abs(np.fft.rfft(x[starts[:, None] + np.arange(frame)] * window, axis=1)) ** 2
    db = 10 * np.log10(power.T + 1e-12)
    return db - db.max()


def picture(clip: Path, folder: Path, *, name: str) -> Path:
    """The spectrogram PNG of ``clip`` as ``folder/<name>.png``, drawn once (name it by the
    clip's content hash so a changed clip gets a new picture)."""
    target = folder / f"{name}.png"
    if target.is_file():
        return target
    import io

    import soundfile as sf

    data, rate = sf.read(str(clip), dtype="float32", always_2d=True)
    spec = log_spectrogram(data.mean(axis=1), sample_rate=rate)
    with _LOCK:
        import matplotlib

        matplotlib.use("Agg")
        from matplotlib.figure import Figure

        fig = Figure(figsize=(6.4, 1.6), dpi=100)
        ax = fig.add_axes((0, 0, 1, 1))
        ax.imshow(spec, origin="lower", aspect="auto", cmap="magma", vmin=-80, vmax=0,
                  extent=(0, data.shape[0] / rate, 0, rate / 2000))
        ax.set_axis_off()
        buf = io.BytesIO()
        fig.savefig(buf, format="png")
    folder.mkdir(parents=True, exist_ok=True)
    write_bytes_atomic(target, buf.getvalue())
    return target
