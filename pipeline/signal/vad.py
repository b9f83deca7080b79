"""Voice activity: webrtcvad frame decisions, smoothing, and trimming to the speech.

The chain is three pure steps on arrays, plus a streaming front end:

1. ``VoiceActivityStream`` / ``frame_decisions``: one boolean per frame of
   ``frame_ms`` from webrtcvad, and each frame's energy (for choosing quiet cuts);
2. ``smooth_decisions``: outvote lone frames, bridge short pauses, drop short
   bursts, add hangover, so a single frame can never move a boundary;
3. ``trim_frames`` / ``trim_span``: the first to last speech frame, padded.

webrtcvad only accepts 16-bit mono PCM at 8, 16, 32 or 48 kHz in frames of 10, 20
or 30 ms; ``frame_length`` enforces exactly that.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal.decode import float_to_pcm16

VAD_SAMPLE_RATES = (8000, 16000, 32000, 48000)
VAD_FRAME_MS = (10, 20, 30)
# The rate the stage analyses at whatever its output rate, so decisions never
# depend on the output format.
ANALYSIS_SAMPLE_RATE = 16000
# Spectral flatness of white noise: periodogram bins of Gaussian noise are
# exponentially distributed, and for that distribution geometric mean over arithmetic
# mean is exp(-Euler's gamma) = 0.56. webrtcvad takes loud stationary broadband noise
# for speech, so frames at least 0.8 times as flat as white noise are overruled as
# non-speech. The 0.8 is a rule of thumb (no source): fricatives in synthetic speech
# stayed below 0.43 in our measurements, and single frames are bridged anyway.
NOISE_FLATNESS = 0.8 * math.exp(-0.5772156649015329)
SILENT_FRAME_DB = -120.0
# Lead-in that primes webrtcvad before a stream (see VoiceActivityStream). Its
# start-up run lasted at most 180 ms in our measurements (30 ms frames, mode 0);
# 300 ms leaves a margin and is still short next to any recording.
LEAD_IN_MS = 300
# Samples a stream holds before analysing its whole frames (32.8 s at 16 kHz, 2 MiB).
_BATCH_SAMPLES = 1 << 19


def frame_length(*, sample_rate: int, frame_ms: int) -> int:
    """Samples per webrtcvad frame, after checking the rate and frame size it accepts.

    Parameters
    ----------
    sample_rate : Hz, one of 8000, 16000, 32000, 48000.
    frame_ms : 10, 20 or 30.

    Returns
    -------
    ``sample_rate * frame_ms / 1000``.

    Example
    -------
    >>> frame_length(sample_rate=16000, frame_ms=30)
    480
    """
    if sample_rate not in VAD_SAMPLE_RATES:
        raise ParameterError(
            f"sample_rate={sample_rate} is not one of {', '.join(map(str, VAD_SAMPLE_RATES))}")
    if frame_ms not in VAD_FRAME_MS:
        raise ParameterError(f"frame_ms={frame_ms} is not one of {', '.join(map(str, VAD_FRAME_MS))}")
    return sample_rate * frame_ms // 1000


# Frames per block of the spectral flatness's FFT (its float64 temporaries fit in cache).
_FLATNESS_BLOCK_FRAMES = 128


@functools.cache
def _hann64(length: int) -> np.ndarray:
    return np.hanning(length)


def spectral_flatness(frames: np.ndarray) -> np.ndarray:
    """Geometric over arithmetic mean of each frame's Hann-windowed power spectrum.

    Parameters
    ----------
    frames : 2-D float array, one frame per row.

    Returns
    -------
    1-D array in [0, 1]; 0 for an all-zero frame (nothing to call flat).

    Example
    -------
    >>> rng = np.random.default_rng(0)
    >>> bool(spectral_flatness(rng.standard_normal((1, 480)))[0] > 0.45)
    True
    """
    frames = np.atleast_2d(np.asarray(frames, dtype=np.float32))
    window = _hann64(frames.shape[1])
    # numpy.fft in float64 (its float32 transform gave exactly the float64 result
    # rounded to float32, and took longer than the float64 one): frames are windowed in
    # float64 a block at a time, the float64 temporaries staying in cache, and each
    # bin's power re**2 + im**2 is rounded to float32, whose logarithm costs a tenth of
    # float64's. On six minutes of the bench speech the ratio stays within 2e-6 of an
    # all-float64 computation (float32 spectra from scipy.fft were off by up to 0.03 on
    # frames whose weakest bins fell below their rounding error).
    power = np.empty((len(frames), frames.shape[1] // 2), dtype=np.float32)  # bins 1 and up: no DC
    for start in range(0, len(frames), _FLATNESS_BLOCK_FRAMES):
        # The spectrum as interleaved (re, im) pairs, squared in place, then each bin's
        # pair added: no complex-magnitude temporaries.
        pairs = np.fft.rfft(frames[start : start + _FLATNESS_BLOCK_FRAMES] * window, axis=1).view(np.float64)
        np.square(pairs, out=pairs)
        np.add(pairs[:, 2::2], pairs[:, 3::2], out=power[start : start + _FLATNESS_BLOCK_FRAMES])
    mean = power.mean(axis=1, dtype=np.float64)
    out = np.zeros(len(frames))
    live = mean > 0
    if live.any():
        tiny = np.finfo(np.float32).tiny
        # In place when every frame is live (nearly always): power is not needed again.
        logs = np.maximum(power, tiny, out=power) if live.all() else np.maximum(power[live], tiny)
        np.log(logs, out=logs)
        out[live] = np.exp(logs.mean(axis=1, dtype=np.float64)) / mean[live]
    return out


@dataclass(frozen=True)
class FrameAnalysis:
    """Per-frame results: webrtcvad decisions (after the noise veto) and energy."""

    decisions: np.ndarray  # bool, one per whole frame
    energy_db: np.ndarray  # float64 mean-square level, dBFS
    frame_ms: int


class VoiceActivityStream:
    """Feed mono float blocks of any length; frames are cut across block edges.

    One webrtcvad instance sees every frame in order, so its adaptive noise model
    behaves exactly as on the whole signal. A trailing partial frame is ignored.

    webrtcvad calls the first frames of a stream speech while its noise model
    settles: on band-limited noise at -75 to -45 dBFS we measured a run of 3 to 6
    such frames of 30 ms (7 to 11 of 10 ms), enough to survive ``min_speech_ms`` and
    keep all the leading silence of a recording. So the detector is first primed
    with a lead-in, the signal's first ``lead_in_ms`` played backwards, whose
    decisions are thrown away: its start-up happens there, and the mirror joins the
    signal without a jump, so speech right at the start is still speech.

    Example
    -------
    >>> vad = VoiceActivityStream(sample_rate=16000, frame_ms=30, aggressiveness=2)
    >>> vad.push(np.zeros(16000, np.float32))
    >>> int(vad.result().decisions.sum())
    0
    """

    def __init__(self, *, sample_rate: int, frame_ms: int, aggressiveness: int,
                 max_flatness: float = NOISE_FLATNESS, lead_in_ms: int = LEAD_IN_MS) -> None:
        # webrtcvad's extension, not its Python module: importing that module looks up
        # its distribution's version in the installed packages' metadata, which took
        # 26-80 ms (load about 3), once per run, for a string never read. Its Vad class
        # is these three calls.
        import _webrtcvad

        self.frame_samples = frame_length(sample_rate=sample_rate, frame_ms=frame_ms)
        if aggressiveness not in (0, 1, 2, 3):
            raise ParameterError(f"aggressiveness={aggressiveness} is not one of 0, 1, 2, 3")
        if not 0 < max_flatness <= 1:
            raise ParameterError(f"max_flatness={max_flatness} must be in (0, 1]")
        if lead_in_ms < 0:
            raise ParameterError(f"lead_in_ms={lead_in_ms} must be >= 0")
        self.sample_rate = sample_rate
        self.frame_ms = frame_ms
        self.max_flatness = max_flatness
        self._handle = _webrtcvad.create()
        _webrtcvad.init(self._handle)
        _webrtcvad.set_mode(self._handle, aggressiveness)
        self._process = _webrtcvad.process
        # Whole frames of lead-in; the stream holds its input back until it has them.
        self._lead_in = ms_to_frames(lead_in_ms, frame_ms=frame_ms) * self.frame_samples
        self._primed = self._lead_in == 0
        # Blocks not yet analysed: held until a batch of frames is complete (or the
        # stream ends), since every numpy call costs the same for 50 frames as for 1,000.
        self._pending: list[np.ndarray] = []
        self._held = 0
        self._decisions: list[np.ndarray] = []
        self._energy: list[np.ndarray] = []

    def push(self, samples: np.ndarray) -> None:
        block = np.array(samples, dtype=np.float32, ndmin=1)  # a copy: the caller may reuse its buffer
        if block.ndim != 1:
            raise ParameterError(f"samples has shape {block.shape}; expected mono (1-D)")
        self._pending.append(block)
        self._held += block.size
        if not self._primed:
            if self._held < self._lead_in:
                return
            self._prime(self._joined()[: self._lead_in])
        if self._held >= _BATCH_SAMPLES:
            self._analyse_held()

    def _joined(self) -> np.ndarray:
        """Everything held, as one array (held as that from then on)."""
        if len(self._pending) != 1:
            self._pending = [np.concatenate(self._pending) if self._pending else np.zeros(0, dtype=np.float32)]
        return self._pending[0]

    def _analyse_held(self) -> None:
        """Analyse the whole frames held; keep the partial frame after them."""
        data = self._joined()
        whole = len(data) // self.frame_samples
        if whole:
            self._analyse(data[: whole * self.frame_samples].reshape(whole, self.frame_samples))
        rest = data[whole * self.frame_samples:].copy()
        self._pending, self._held = [rest], rest.size

    def _prime(self, head: np.ndarray) -> None:
        whole = len(head) // self.frame_samples
        self._is_speech(float_to_pcm16(head[: whole * self.frame_samples][::-1]))
        self._primed = True

    def _is_speech(self, pcm: np.ndarray) -> np.ndarray:
        """webrtcvad's decision on each whole frame of 16-bit samples, in order.

        The extension's own ``process`` on slices of one memoryview: no bytes object
        per frame and no call through ``Vad.is_speech``, whose argument checks cost
        as much again as the call itself (2.55 against 2.2 us a frame, measured).
        """
        view = memoryview(np.ascontiguousarray(pcm, dtype="<i2")).cast("B")
        step = 2 * self.frame_samples
        process, handle, rate, length = self._process, self._handle, self.sample_rate, self.frame_samples
        return np.array([process(handle, rate, view[i:i + step], length)
                         for i in range(0, len(view) - step + 1, step)], dtype=bool)

    def _analyse(self, frames: np.ndarray) -> None:
        whole = len(frames)
        vad_says = self._is_speech(float_to_pcm16(frames))
        # The veto can only remove speech, so the spectra are needed on speech frames only.
        noise_like = np.zeros(whole, dtype=bool)
        if vad_says.any():
            noise_like[vad_says] = spectral_flatness(frames[vad_says]) >= self.max_flatness
        mean_square = np.einsum("ij,ij->i", frames, frames, dtype=np.float64) / self.frame_samples
        with np.errstate(divide="ignore"):
            energy = np.maximum(10 * np.log10(mean_square), SILENT_FRAME_DB)
        self._decisions.append(vad_says & ~noise_like)
        self._energy.append(energy)

    def result(self) -> FrameAnalysis:
        if not self._primed:
            # A signal shorter than the lead-in: it is its own lead-in.
            self._prime(self._joined())
        self._analyse_held()
        decisions = np.concatenate(self._decisions) if self._decisions else np.zeros(0, dtype=bool)
        energy = np.concatenate(self._energy) if self._energy else np.zeros(0)
        return FrameAnalysis(decisions, energy, self.frame_ms)


def frame_decisions(samples: np.ndarray, *, sample_rate: int, frame_ms: int, aggressiveness: int,
                    max_flatness: float = NOISE_FLATNESS) -> FrameAnalysis:
    """Voice activity of a whole mono signal (the streaming analyser in one call).

    Parameters
    ----------
    samples : 1-D float array in [-1, 1).
    sample_rate : 8000, 16000, 32000 or 48000 Hz.
    frame_ms : 10, 20 or 30.
    aggressiveness : webrtcvad mode 0 (least) to 3 (most eager to call non-speech).
    max_flatness : frames at least this spectrally flat are non-speech.

    Returns
    -------
    FrameAnalysis with ``len(samples) // frame_length`` frames.

    Example
    -------
    >>> frame_decisions(np.zeros(8000), sample_rate=8000, frame_ms=10, aggressiveness=3).decisions.shape
    (100,)
    """
    stream = VoiceActivityStream(sample_rate=sample_rate, frame_ms=frame_ms,
                                 aggressiveness=aggressiveness, max_flatness=max_flatness)
    stream.push(samples)
    return stream.result()


def runs(mask: np.ndarray) -> np.ndarray:
    """Start and stop (exclusive) of every run of True values, shape (k, 2).

    Example
    -------
    >>> runs(np.array([0, 1, 1, 0, 1], dtype=bool)).tolist()
    [[1, 3], [4, 5]]
    """
    mask = np.asarray(mask, dtype=bool)
    edges = np.diff(np.concatenate([[False], mask, [False]]).astype(np.int8))
    return np.stack([np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)], axis=1)


def ms_to_frames(ms: float, *, frame_ms: int) -> int:
    """Whole frames covering at least ``ms`` milliseconds."""
    return math.ceil(ms / frame_ms - 1e-9) if ms > 0 else 0


def majority3(decisions: np.ndarray) -> np.ndarray:
    """Each frame takes the majority of itself and its two neighbours (edges repeat).

    This is what stops one stray frame from opening or closing a run: a lone flip
    is outvoted by the frames on either side.

    Example
    -------
    >>> majority3(np.array([1, 1, 0, 1, 0, 0, 1, 0], dtype=bool)).astype(int).tolist()
    [1, 1, 1, 0, 0, 0, 0, 0]
    """
    d = np.asarray(decisions, dtype=bool)
    if len(d) < 3:
        return d.copy()
    padded = np.concatenate([d[:1], d, d[-1:]]).astype(np.int8)
    return (padded[:-2] + padded[1:-1] + padded[2:]) >= 2


def smooth_decisions(decisions: np.ndarray, *, frame_ms: int, min_speech_ms: int,
                     min_pause_ms: int, hangover_ms: int) -> np.ndarray:
    """Clean frame decisions: outvote lone frames, bridge short pauses, drop short
    bursts, extend by hangover.

    A three-frame majority vote comes first, so flipping any single frame two or
    more frames away from a boundary changes nothing at all, whatever the other
    settings. Pauses are then bridged before short bursts are dropped, so speech
    broken by brief dropouts is judged as one run; last, each run is extended by
    ``hangover_ms``.

    Parameters
    ----------
    decisions : 1-D bool array, one per frame.
    frame_ms : frame length in ms.
    min_speech_ms : speech runs shorter than this become non-speech.
    min_pause_ms : pauses between speech runs shorter than this become speech.
    hangover_ms : speech is extended by this much after each run.

    Returns
    -------
    1-D bool array of the same length.

    Example
    -------
    >>> d = np.array([0, 1, 1, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0], dtype=bool)
    >>> smooth_decisions(d, frame_ms=10, min_speech_ms=30, min_pause_ms=30, hangover_ms=10).astype(int).tolist()
    [0, 1, 1, 1, 1, 1, 1, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0]
    """
    for name, value in (("min_speech_ms", min_speech_ms), ("min_pause_ms", min_pause_ms),
                        ("hangover_ms", hangover_ms)):
        if value < 0:
            raise ParameterError(f"{name}={value} must be >= 0")
    speech = majority3(decisions)
    n = len(speech)
    min_pause = ms_to_frames(min_pause_ms, frame_ms=frame_ms)
    for start, stop in runs(~speech):
        if start > 0 and stop < n and stop - start < min_pause:
            speech[start:stop] = True
    min_speech = ms_to_frames(min_speech_ms, frame_ms=frame_ms)
    for start, stop in runs(speech):
        if stop - start < min_speech:
            speech[start:stop] = False
    hangover = ms_to_frames(hangover_ms, frame_ms=frame_ms)
    if hangover:
        for _, stop in runs(speech):
            speech[stop:stop + hangover] = True
    return speech


def trim_frames(speech: np.ndarray, *, pad_frames: int, start: int = 0,
                stop: int | None = None) -> tuple[int, int] | None:
    """Frames from the first to the last speech frame in ``[start, stop)``, padded.

    The padding never reaches outside ``[start, stop)``. Returns None when there is
    no speech there.

    Example
    -------
    >>> trim_frames(np.array([0, 0, 0, 1, 1, 0, 0, 0], dtype=bool), pad_frames=2)
    (1, 7)
    """
    if pad_frames < 0:
        raise ParameterError(f"pad_frames={pad_frames} must be >= 0")
    stop = len(speech) if stop is None else stop
    hits = np.flatnonzero(np.asarray(speech[start:stop], dtype=bool))
    if len(hits) == 0:
        return None
    return max(start, start + int(hits[0]) - pad_frames), min(stop, start + int(hits[-1]) + 1 + pad_frames)


def trim_span(speech: np.ndarray, *, frame_ms: int, pad_ms: int, duration_s: float) -> tuple[float, float] | None:
    """Start and end (seconds) of the speech in a signal, padded by ``pad_ms``.

    A pad that reaches the last whole frame also keeps the partial frame after it,
    so the span can end at ``duration_s`` but never beyond, and never start before 0.

    Parameters
    ----------
    speech : smoothed decisions, one per whole frame.
    frame_ms : frame length in ms.
    pad_ms : silence kept before and after the speech.
    duration_s : length of the signal.

    Returns
    -------
    ``(start_s, end_s)``, or None when no frame is speech.

    Example
    -------
    >>> trim_span(np.array([0, 0, 1, 0], dtype=bool), frame_ms=30, pad_ms=30, duration_s=0.125)
    (0.03, 0.125)
    """
    span = trim_frames(speech, pad_frames=ms_to_frames(pad_ms, frame_ms=frame_ms))
    if span is None:
        return None
    return frames_to_seconds(span, frame_ms=frame_ms, n_frames=len(speech), duration_s=duration_s)


def frames_to_seconds(span: tuple[int, int], *, frame_ms: int, n_frames: int,
                      duration_s: float) -> tuple[float, float]:
    """A frame span in seconds; a span reaching the last frame ends at ``duration_s``."""
    start, stop = span
    end_s = duration_s if stop >= n_frames else min(duration_s, stop * frame_ms / 1000)
    return start * frame_ms / 1000, end_s


def speech_seconds(speech: np.ndarray, *, frame_ms: int, start: int = 0, stop: int | None = None) -> float:
    """Seconds of speech frames in ``[start, stop)``.

    Example
    -------
    >>> speech_seconds(np.array([1, 1, 0, 1], dtype=bool), frame_ms=20)
    0.06
    """
    stop = len(speech) if stop is None else stop
    return int(np.count_nonzero(speech[start:stop])) * frame_ms / 1000
