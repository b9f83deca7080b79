"""Streaming decode, downmix, resample and 16-bit PCM helpers for the audio stage.

Everything here works on one block at a time so that an hour-long recording never
has to sit in memory: ``read_blocks`` decodes with soundfile, ``downmix`` turns a
block into mono, ``StreamResampler`` carries soxr's filter state from block to
block, and ``Spool`` keeps the resampled stream on disk until the clips are cut.
"""

from __future__ import annotations

import contextlib
import io
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, BinaryIO

import numpy as np

from pipeline.core.errors import ParameterError

if TYPE_CHECKING:
    import soundfile

BLOCK_FRAMES = 1 << 16
# Samples per decoded block, all channels together: a header claiming 1,024 channels
# gets blocks of 128 frames rather than 64 MB ones.
BLOCK_SAMPLES = 1 << 17
RESAMPLE_QUALITIES = ("QQ", "LQ", "MQ", "HQ", "VHQ")
# Full scale of signed 16-bit PCM as libsndfile reads it back: int16 / 32768.
PCM16_SCALE = 32768.0


def read_blocks(path: str | os.PathLike[str] | BinaryIO | soundfile.SoundFile, *,
                block_frames: int = BLOCK_FRAMES) -> Iterator[np.ndarray]:
    """Decode a sound file as float32 blocks of shape (frames, channels).

    Reading stops at the first short block: the end of what the decoder can give,
    which for a damaged file can come before the frame count its header declares
    (compare the frames yielded with ``soundfile.info(path).frames`` to tell). A
    block never holds more than ``BLOCK_SAMPLES`` samples, whatever the channel count
    the header claims, so memory stays bounded by the block, not by the header.

    Parameters
    ----------
    path : the file to read (never written), or a ``soundfile.SoundFile`` open for
        reading, read from its current position and left open.
    block_frames : at most this many frames per block; the last block may be shorter.

    Returns
    -------
    An iterator of 2-D float32 arrays.

    Example
    -------
    >>> import io, soundfile as sf
    >>> buf = io.BytesIO()
    >>> sf.write(buf, np.zeros((1000, 2), np.float32), 8000, format="WAV")
    >>> _ = buf.seek(0)
    >>> [b.shape for b in read_blocks(buf, block_frames=600)]
    [(600, 2), (400, 2)]
    """
    import soundfile as sf

    if block_frames < 1:
        raise ParameterError(f"block_frames={block_frames} must be at least 1")
    if isinstance(path, sf.SoundFile):
        # Already open (the caller read its header): read on from where it stands.
        yield from _blocks(path, block_frames)
        return
    source = path if hasattr(path, "read") else os.fspath(path)
    with sf.SoundFile(source) as fh:
        yield from _blocks(fh, block_frames)


def _blocks(fh: soundfile.SoundFile, block_frames: int) -> Iterator[np.ndarray]:
    frames = max(1, min(block_frames, BLOCK_SAMPLES // max(1, fh.channels)))
    # Not SoundFile.blocks: it counts down the header's frame count and, when the
    # decoder ends early, goes on yielding its previous buffer until that count is
    # reached (2**35 frames for a damaged FLAC header).
    while True:
        block = fh.read(frames, dtype="float32", always_2d=True)
        if len(block):
            yield block
        if len(block) < frames:
            return


def check_channel(*, channel: str | int, channels: int) -> None:
    """Raise ParameterError unless ``channel`` can be taken from audio with ``channels``."""
    if channel == "average":
        return
    if isinstance(channel, bool) or not isinstance(channel, int) or channel < 0:
        raise ParameterError(f'channel={channel!r} must be "average" or a channel index >= 0')
    if channel >= channels:
        raise ParameterError(
            f"channel={channel} does not exist: the audio has {channels} channel"
            f"{'s' if channels != 1 else ''} (indices 0 to {channels - 1})"
        )


def downmix(block: np.ndarray, *, channel: str | int = "average") -> np.ndarray:
    """Mono float32 from a (frames, channels) block: the channel mean, or one channel.

    Parameters
    ----------
    block : 2-D array, one column per channel (a 1-D array is taken as mono).
    channel : ``"average"`` or the index of the channel to keep.

    Returns
    -------
    1-D float32 array of the block's length.

    Example
    -------
    >>> downmix(np.array([[1.0, 0.0], [0.5, 0.5]], dtype=np.float32)).tolist()
    [0.5, 0.5]
    """
    samples = np.asarray(block, dtype=np.float32)
    if samples.ndim == 1:
        samples = samples[:, None]
    if samples.ndim != 2:
        raise ParameterError(f"block has {samples.ndim} dimensions; expected (frames, channels)")
    check_channel(channel=channel, channels=samples.shape[1])
    if channel == "average":
        if samples.shape[1] == 1:
            return samples[:, 0].copy()
        # A channel-by-channel sum: numpy's mean over a short, strided axis is several
        # times slower than these contiguous passes over whole columns.
        mono = samples[:, 0].copy()
        for c in range(1, samples.shape[1]):
            mono += samples[:, c]
        mono *= np.float32(1.0 / samples.shape[1])
        return mono
    return samples[:, int(channel)].copy()


def resample(samples: np.ndarray, *, in_rate: int, out_rate: int, quality: str = "HQ") -> np.ndarray:
    """One-shot mono resampling with soxr (returns float32; a copy when the rates agree).

    Parameters
    ----------
    samples : 1-D float array.
    in_rate, out_rate : sample rates in Hz.
    quality : soxr preset, one of QQ, LQ, MQ, HQ, VHQ.

    Returns
    -------
    1-D float32 array of about ``len(samples) * out_rate / in_rate`` samples.

    Example
    -------
    >>> len(resample(np.zeros(44100, np.float32), in_rate=44100, out_rate=16000))
    16000
    """
    stream = StreamResampler(in_rate=in_rate, out_rate=out_rate, quality=quality)
    return stream.process(samples, last=True)


class StreamResampler:
    """Block-by-block mono resampling whose output equals the one-shot result.

    soxr keeps the filter history between calls, so cutting the input into blocks
    does not change a sample of the output. Equal rates pass samples through.

    Example
    -------
    >>> rs = StreamResampler(in_rate=48000, out_rate=16000)
    >>> n = len(rs.process(np.zeros(4800, np.float32))) + len(rs.process(np.zeros(0, np.float32), last=True))
    >>> n
    1600
    """

    def __init__(self, *, in_rate: int, out_rate: int, quality: str = "HQ") -> None:
        for name, rate in (("in_rate", in_rate), ("out_rate", out_rate)):
            if not isinstance(rate, (int, np.integer)) or rate < 1:
                raise ParameterError(f"{name}={rate!r} must be a positive whole number of Hz")
        if quality not in RESAMPLE_QUALITIES:
            raise ParameterError(f"quality={quality!r} is not one of {', '.join(RESAMPLE_QUALITIES)}")
        self.in_rate = int(in_rate)
        self.out_rate = int(out_rate)
        self._stream = None
        if self.in_rate != self.out_rate:
            import soxr

            self._stream = soxr.ResampleStream(self.in_rate, self.out_rate, 1, dtype="float32", quality=quality)

    def process(self, samples: np.ndarray, *, last: bool = False) -> np.ndarray:
        """Resample the next block; ``last=True`` flushes the filter tail."""
        block = np.ascontiguousarray(samples, dtype=np.float32)
        if block.ndim != 1:
            raise ParameterError(f"samples has {block.ndim} dimensions; expected mono (1-D)")
        if self._stream is None:
            return block.copy()
        return np.asarray(self._stream.resample_chunk(block, last=last), dtype=np.float32)


def float_to_pcm16(samples: np.ndarray, *, peak_limit: float = 1.0, gain_db: float = 0.0) -> np.ndarray:
    """Round float samples, gained by ``gain_db``, to int16, never beyond ``peak_limit`` of full scale.

    Rounding can lift a sample that sits at a peak ceiling by half a step; limiting
    the integers to ``floor(peak_limit * 32768)`` keeps a sample-peak ceiling exact.

    Parameters
    ----------
    samples : float array in [-1, 1) once gained.
    peak_limit : largest magnitude allowed, as a fraction of full scale (0, 1].
    gain_db : gain applied first, in float64 whatever the samples' type (a gain of
        0 dB leaves float32 samples in float32, where scaling to 16 bits is exact).

    Returns
    -------
    int16 array; reading it back as ``x / 32768`` is what libsndfile does.

    Example
    -------
    >>> float_to_pcm16(np.array([0.5, -1.0, 2.0])).tolist()
    [16384, -32768, 32767]
    >>> float_to_pcm16(np.array([0.25, -0.25], np.float32), gain_db=20 * np.log10(2)).tolist()
    [16384, -16384]
    """
    if not 0 < peak_limit <= 1:
        raise ParameterError(f"peak_limit={peak_limit} must be in (0, 1]")
    top = min(32767.0, np.floor(peak_limit * PCM16_SCALE))
    bottom = -32768.0 if peak_limit >= 1 else -top
    x = np.asarray(samples)
    # float32 input stays float32: scaling by 2**15 is exact in it, and every integer up
    # to 2**24 is representable, so the result equals the float64 computation. A gain
    # is applied in float64, in the one copy that is then worked in place.
    gained = gain_db != 0.0
    scaled = x.astype(np.float32 if x.dtype == np.float32 and not gained else np.float64)
    if gained:
        scaled *= 10 ** (gain_db / 20)
    scaled *= PCM16_SCALE
    np.rint(scaled, out=scaled)
    np.clip(scaled, bottom, top, out=scaled)
    return scaled.astype(np.int16)


# A stream up to this size stays in memory; a longer one goes to a file on disk. 32 MiB
# is 8.7 minutes at 16 kHz, longer than nearly every file of a corpus, and small
# beside the 500 MB a 60-minute recording may take. Creating, writing, reading and
# deleting a file per source cost 0.32 to 0.36 s of CPU (0.8 to 1.8 s of wall time on
# a busy disk) for the 538 files of an hour of the bench workload, in one process.
SPOOL_MEMORY_BYTES = 32 << 20


class Spool:
    """A mono float32 stream: held in memory while short, in a temporary raw file once long.

    Append blocks while decoding, then ``read`` any span back. Past ``memory_bytes``
    the stream moves to a file named ``.loam-*.tmp`` in ``folder`` (the runner clears
    such debris after a crash), deleted on ``close`` or when the ``with`` block ends;
    ``path`` is that file, or None while the stream is in memory. Either way ``read``
    returns the same samples.

    Parameters
    ----------
    folder : str or os.PathLike
        Where the file is made (created when needed).
    label : str
        Part of the file name, for a reader of the folder.
    memory_bytes : int
        Largest stream kept in memory, in bytes (4 per sample).

    Examples
    --------
    >>> with tempfile.TemporaryDirectory() as folder, Spool(folder=folder, memory_bytes=16) as spool:
    ...     spool.append(np.arange(10, dtype=np.float32))
    ...     spool.path is not None, spool.read(start=2, stop=5).tolist()
    (True, [2.0, 3.0, 4.0])
    """

    _ITEM = np.dtype("<f4")

    def __init__(self, *, folder: str | os.PathLike[str], label: str = "stream",
                 memory_bytes: int = SPOOL_MEMORY_BYTES) -> None:
        if memory_bytes < 0:
            raise ParameterError(f"memory_bytes={memory_bytes} must be >= 0")
        self._folder, self._label, self._memory_bytes = folder, label, memory_bytes
        self._blocks: list[np.ndarray] = []
        self._fh: io.BufferedRandom | None = None
        self.path: Path | None = None
        self.length = 0

    def append(self, samples: np.ndarray) -> None:
        # A copy: the caller may reuse its buffer.
        block = np.array(samples, dtype=self._ITEM)
        self.length += len(block)
        if self._fh is not None:
            self._fh.seek(0, os.SEEK_END)
            self._fh.write(block.tobytes())
            return
        self._blocks.append(block)
        if self.length * self._ITEM.itemsize > self._memory_bytes:
            self._fh = self._spill()

    def _spill(self) -> io.BufferedRandom:
        """Move the blocks held so far into a new temporary file; its handle."""
        Path(self._folder).mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(prefix=f".loam-{self._label}.", suffix=".spool.tmp", dir=self._folder)
        self.path = Path(name)
        fh = os.fdopen(fd, "w+b")
        for block in self._blocks:
            fh.write(block.tobytes())
        self._blocks = []
        return fh

    def read(self, *, start: int, stop: int) -> np.ndarray:
        """Samples ``[start, stop)`` as float32 (clamped to what was appended)."""
        start = max(0, min(start, self.length))
        stop = max(start, min(stop, self.length))
        if self._fh is None:
            if len(self._blocks) > 1:
                self._blocks = [np.concatenate(self._blocks)]
            return self._blocks[0][start:stop].copy() if self._blocks else np.zeros(0, dtype=np.float32)
        self._fh.flush()
        self._fh.seek(start * self._ITEM.itemsize)
        return np.fromfile(self._fh, dtype=self._ITEM, count=stop - start).astype(np.float32)

    def close(self) -> None:
        self._blocks = []
        if self._fh is None or self.path is None:
            return
        self._fh.close()
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()

    def __enter__(self) -> Spool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
