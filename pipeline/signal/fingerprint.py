"""Near-duplicate audio: a band-energy fingerprint after Haitsma and Kalker, and the
search for copies.

- :func:`fingerprint` gives a clip's sub-fingerprints: the bit rule of J. Haitsma and
  T. Kalker, "A Highly Robust Audio Fingerprinting System" (ISMIR 2002), on band
  energies averaged over short frames in the manner of Welch's method (P. D. Welch,
  IEEE Trans. Audio Electroacoustics 15(2), 1967) instead of the paper's long frames;
  :func:`encode_fingerprint` and :func:`decode_fingerprint` keep them in a string
  column.
- :func:`fingerprint_similarity` compares two fingerprints over small shifts: clips that
  are the same recording after resampling, re-encoding or a gain change agree closely.
- The candidate pairs of a corpus (``_candidate_pairs``: clips sharing keys) and the
  search's parameters. The search itself, which verifies and lists the pairs, is
  :func:`pipeline.signal.added_search.find_near_duplicates`: the audio stage, which
  computes fingerprints, does not reach it, so its code version (which covers every
  module a stage can execute, :mod:`pipeline.core.codeversion`) does not change with it.

Pure functions on numpy arrays. librosa is deliberately not used: its first call in a
process spends seconds on JIT compilation, which a per-file worker pays again and
again, while numpy and soxr do the same work here without start-up cost.
"""

from __future__ import annotations

import base64
import binascii
import functools
from typing import Any

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.signal.arrays import check_sample_rate, mono_float, periodic_hann

__all__ = [
    "decode_fingerprint",
    "encode_fingerprint",
    "fingerprint",
    "fingerprint_similarity",
]

# Bands and bits follow J. Haitsma and T. Kalker, "A Highly Robust Audio Fingerprinting
# System", ISMIR 2002: 33 logarithmically spaced bands between 300 and 2000 Hz giving 32
# bits per frame. The paper works at 5512.5 Hz; 5000 Hz keeps 2000 Hz well inside the
# band and the frames integers.
#
# The paper measures each band in one 0.37 s frame every 11.6 ms, so each sample goes
# through 32 FFTs. Here each band's energy is the Hann-weighted sum of FP_TAPS
# periodograms of short frames (FP_FRAME, 102.4 ms) one hop apart: a Welch average
# spanning 512 + 12 * 116 = 1904 samples (0.38 s), about the paper's frame, for a
# sixteenth of the FFT arithmetic. The finer frequency grid of a long frame is lost, the
# slowly moving band energies that make the bits robust are kept. Measured on the demo
# corpus's speech (bench/bench_fingerprint.py, 60 clips of 3 s, against the paper's
# frames at this hop): lowest similarity after Vorbis 0.924 (0.916), after MP3 0.914
# (0.914), trimmed 150 ms later 0.931 (0.924); highest score of two different clips of
# one speaker 0.605 (0.607). The band energies took 0.0034 CPU s per audio minute
# against 0.0091 with the paper's frames (ten minutes of noise, one process).
#
# The hop is 1/16 of the paper's frame (23.2 ms) where the paper uses 1/32 (11.6 ms): the
# FFTs are nearly all the cost and scale with the number of frames. A coarser hop costs
# robustness when two copies are out of step by a fraction of a hop; measured with the
# paper's frames on espeak-ng speech with a 30 dB noise floor, half a hop out of step
# and then MP3 coded scored 0.92 at this hop, 0.95 at the paper's and 0.87 at twice this
# one, against a configured threshold of 0.85.
FP_SAMPLE_RATE = 5000
FP_FRAME = 512  # 102.4 ms, a power of two for the FFT
FP_HOP = 116  # 23.2 ms
FP_TAPS = 13  # periodograms per band energy
FP_SPAN = FP_FRAME + (FP_TAPS - 1) * FP_HOP  # 1904 samples, 0.38 s
FP_BAND_EDGES_HZ = np.geomspace(300.0, 2000.0, 34)
# Band energies below this level relative to the clip's mean band energy are raised to
# it, so frames of silence give the sub-fingerprint 0 whatever faint codec or
# resampler residue they hold. An addition: the paper does not treat silence.
FP_FLOOR_DB = -60.0
# Frames per block of the short-time FFT: keeps the working set in cache without a
# Python loop per frame (float64 temporaries of 256 KiB; with float32 ones 64 to 256
# were equally fast on ten minutes of noise, 1024 slower; in float64, 128 was slower).
_FP_BLOCK_FRAMES = 64


@functools.cache
def _fp_bands() -> tuple[int, int, np.ndarray]:
    """First FFT bin, last bin + 1, and each band's first bin relative to the first."""
    freqs = np.fft.rfftfreq(FP_FRAME, d=1.0 / FP_SAMPLE_RATE)
    # Bin k belongs to band m when edge[m] <= f_k < edge[m + 1]; bands are contiguous.
    starts = np.searchsorted(freqs, FP_BAND_EDGES_HZ, side="left")
    return int(starts[0]), int(starts[-1]), starts[:-1] - starts[0]


@functools.cache
def _fp_tap_weights() -> tuple[float, ...]:
    """The Hann weights of the FP_TAPS periodograms, symmetric and all non-zero."""
    return tuple(float(w) for w in periodic_hann(FP_TAPS + 1)[1:])


def _fp_band_energies(x: np.ndarray) -> np.ndarray:
    """Frames x 33 Welch-averaged band energies of a float32 5 kHz signal."""
    first, last, band_starts = _fp_bands()
    frames = np.lib.stride_tricks.sliding_window_view(x, FP_FRAME)[::FP_HOP]
    # numpy.fft in float64 (its float32 transform gave exactly the float64 result
    # rounded to float32, and took longer than the float64 one): the frames are
    # windowed in float64 and the band powers summed in float64, then kept as float32.
    window = periodic_hann(FP_FRAME).astype(np.float64)
    # The spectrum is read as interleaved (re, im) pairs: squaring them in place and
    # summing each band's run of pairs with reduceat gives the band powers without a
    # complex-magnitude temporary or a dense band matrix.
    pair_starts = 2 * band_starts
    periodograms = np.empty((frames.shape[0], band_starts.size), dtype=np.float32)
    for start in range(0, frames.shape[0], _FP_BLOCK_FRAMES):
        block = frames[start : start + _FP_BLOCK_FRAMES] * window
        pairs = np.fft.rfft(block, axis=1).view(np.float64)[:, 2 * first : 2 * last]
        np.square(pairs, out=pairs)
        periodograms[start : start + block.shape[0]] = np.add.reduceat(pairs, pair_starts, axis=1)
    # The weighted sum of FP_TAPS consecutive periodograms, one tap at a time in a fixed
    # order (elementwise float32 products and sums: the same bytes on every CPU).
    count = frames.shape[0] - FP_TAPS + 1
    out = np.zeros((count, band_starts.size), dtype=np.float32)
    for k, weight in enumerate(_fp_tap_weights()):
        out += np.float32(weight) * periodograms[k : k + count]
    return out


def fingerprint(samples: np.ndarray, *, sample_rate: int) -> np.ndarray:
    """Band-energy fingerprint after Haitsma and Kalker: one 32-bit sub-fingerprint every 23.2 ms.

    The bit rule and bands of J. Haitsma and T. Kalker, "A Highly Robust Audio
    Fingerprinting System", ISMIR 2002, on Welch-averaged band energies (P. D. Welch,
    1967). The clip is resampled (soxr) to 5000 Hz and cut into 102.4 ms Hann frames
    every 23.2 ms; the power in 33 log-spaced bands between 300 and 2000 Hz is measured
    in each frame, and each band energy is the Hann-weighted sum of 13 consecutive
    frames' powers (0.38 s of signal, about the paper's single 0.37 s frame; see the
    note on ``FP_FRAME``). Bit m of frame n is 1 when the energy difference between
    bands m and m + 1 grew since frame n - 1. Bit 31 (the most significant) belongs to
    the lowest bands. Band energies are floored at 60 dB below the clip's mean so
    silence gives 0 (an addition to the paper). Resampling, lossy coding and gain
    leave most bits unchanged, which :func:`fingerprint_similarity` measures.

    Parameters
    ----------
    samples : np.ndarray
        Mono waveform.
    sample_rate : int
        Sample rate of ``samples`` in Hz; the result does not depend on it.

    Returns
    -------
    np.ndarray
        ``uint32`` array of sub-fingerprints, one per averaged frame after the first;
        empty when the clip is shorter than 0.38 s and a hop (about 0.40 s).

    Examples
    --------
    >>> t = np.arange(16000 * 2) / 16000
    >>> fingerprint(np.sin(2 * np.pi * 440 * t) * t, sample_rate=16000).shape
    (69,)
    """
    check_sample_rate(sample_rate)
    x = mono_float(samples).astype(np.float32, copy=False)
    if sample_rate != FP_SAMPLE_RATE and x.size:
        # Imported here: the split stage imports this module for its other functions,
        # which need no soxr; the audio stage's warm-up imports it for the workers.
        import soxr

        x = soxr.resample(x, sample_rate, FP_SAMPLE_RATE)
    if x.size < FP_SPAN + FP_HOP:
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


# About 0.37 s: codec delay and copies trimmed differently at the start. Measured on the
# demo corpus's speech (bench/bench_fingerprint.py): a copy trimmed 300 ms later, MP3
# coded, was found in 0 of 60 clips at 8 frames, 56 at 12 and 60 at 16, while the
# highest score of two different clips of one speaker rose from 0.605 to 0.621.
DEFAULT_MAX_OFFSET_FRAMES = 16
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
    from memory). Measured here (bench/bench_fingerprint.py, tests/test_fingerprint.py):
    copies after resampling, Vorbis or MP3 coding, or trimmed 300 ms later and MP3
    coded, score above 0.9; unrelated synthetic utterances 0.5 to 0.66, different clips
    of one synthetic voice at most 0.62. (With the paper's frames, utterances that
    share their last words, spoken by the same voice at the same time offset, scored up
    to 0.77; not measured again.)

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

# Sub-fingerprints are grouped by key in shards of their top bits, one shard at a time, so
# the working arrays hold a sixteenth of a corpus's sub-fingerprints at once.
_SHARD_BITS = 4


def _candidate_pairs(values: np.ndarray, offsets: np.ndarray, *, max_clips_per_key: int,
                     min_shared_keys: int, with_shared: bool = False) -> Any:
    """Pair codes ``i * n + j`` (``i < j``) of clips sharing at least ``min_shared_keys``
    distinct non-zero keys, each held by 2 to ``max_clips_per_key`` clips; sorted. With
    ``with_shared``, also the number of such keys each pair shares.

    ``values`` holds every clip's sub-fingerprints one after the other, clip ``c`` at
    ``values[offsets[c]:offsets[c + 1]]``. Each distinct (key, clip) counts once, as
    ``np.unique`` per clip would count it, but all clips are sorted together, one key
    shard at a time: 245,725 clips cost one pass per shard instead of 245,725 sorts, and
    memory a few bytes per sub-fingerprint instead of tens.
    """
    n_clips = np.int64(len(offsets) - 1)
    pair_codes = []
    # Each value's shard as one byte, a block at a time: a quarter of the memory of the
    # shifted uint32 values (64 MB instead of 256 MB for 64 million sub-fingerprints).
    top = np.empty(values.size, dtype=np.uint8)
    for start in range(0, values.size, 1 << 22):
        np.right_shift(values[start:start + (1 << 22)], np.uint32(32 - _SHARD_BITS), out=top[start:start + (1 << 22)],
                       casting="unsafe")
    for shard in range(1 << _SHARD_BITS):
        where = np.flatnonzero(top == shard)
        keys = values[where]
        live = keys != 0  # 0, the silence pattern, is never a key
        where, keys = where[live], keys[live]
        clips = np.searchsorted(offsets, where, side="right") - 1
        # One sortable integer per (key, clip): key in the high half, clip in the low.
        codes = _sorted_distinct((keys.astype(np.uint64) << np.uint64(32)) | clips.astype(np.uint64))
        del where, keys, clips
        keys, clips = codes >> np.uint64(32), (codes & np.uint64(0xFFFFFFFF)).astype(np.int64)
        starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]]) if keys.size else np.zeros(0, np.int64)
        counts = np.diff(np.r_[starts, keys.size])
        for size in np.unique(counts[(counts >= 2) & (counts <= max_clips_per_key)]):
            # All groups of this size at once: rows of clip indices, ascending in each row.
            group_starts = starts[counts == size]
            members = clips[group_starts[:, None] + np.arange(size)]
            left, right = np.triu_indices(int(size), k=1)
            pair_codes.append((members[:, left] * n_clips + members[:, right]).ravel())
    codes = np.concatenate(pair_codes) if pair_codes else np.zeros(0, np.int64)
    codes.sort()
    starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if codes.size else codes
    shared = np.diff(np.r_[starts, codes.size])
    wanted = shared >= min_shared_keys
    return (codes[starts[wanted]], shared[wanted]) if with_shared else codes[starts[wanted]]


def _sorted_distinct(values: np.ndarray) -> np.ndarray:
    """``np.unique(values)`` by a sort in place: numpy 2.4's ``unique`` hashes first, and
    took 24 s on 5 million ``uint64`` values that sort in 0.07 s."""
    values.sort()
    return values[np.r_[True, values[1:] != values[:-1]]] if values.size else values


def decode_fingerprints(chars: np.ndarray, offsets: np.ndarray, *,
                        order: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Many :func:`encode_fingerprint` texts at once: ``uint32`` values one after the other.

    Parameters
    ----------
    chars : np.ndarray
        The texts' ASCII bytes (``uint8``) one after the other, as a string column of an
        Arrow table holds them.
    offsets : np.ndarray
        Text ``k`` is ``chars[offsets[k]:offsets[k + 1]]``.
    order : np.ndarray, optional
        The texts to decode, in the order wanted (fingerprint ``k`` is text
        ``order[k]``); all in their order by default. Decoding in a table's sort order
        this way needs no sorted copy of its texts.

    Returns
    -------
    tuple of (np.ndarray, np.ndarray)
        The sub-fingerprints of every text one after the other, and their offsets:
        fingerprint ``k`` is ``values[out[k]:out[k + 1]]``, equal to
        ``decode_fingerprint(text k)``. Each text is decoded by the standard library's C
        decoder straight into one array allocated once; a text that is not base64 of
        whole ``uint32`` values is decoded again by :func:`decode_fingerprint`, which
        raises ParameterError naming it.

    Examples
    --------
    >>> texts = [encode_fingerprint(np.array([1, 2], np.uint32)), encode_fingerprint(np.array([7], np.uint32))]
    >>> chars = np.frombuffer("".join(texts).encode(), np.uint8)
    >>> values, out = decode_fingerprints(chars, np.array([0, len(texts[0]), len(texts[0]) + len(texts[1])]))
    >>> values.tolist(), out.tolist()
    ([1, 2, 7], [0, 2, 3])
    """
    chars = np.ascontiguousarray(chars, dtype=np.uint8)
    offsets = np.asarray(offsets, dtype=np.int64)
    starts, ends = offsets[:-1], offsets[1:]
    if order is not None:
        starts, ends = starts[order], ends[order]
    lengths = ends - starts
    if (lengths % 4).any():
        _raise_for_first_bad(chars, offsets)
    last = np.maximum(ends - 1, 0)
    pad = np.zeros(len(lengths), dtype=np.int64)
    if chars.size:  # '=' pads only the last one or two characters of a text
        pad += (lengths > 0) & (chars[last] == ord("="))
        pad += (lengths > 1) & (chars[np.maximum(last - 1, 0)] == ord("="))
    n_bytes = lengths // 4 * 3 - pad
    if (n_bytes % 4).any():
        _raise_for_first_bad(chars, offsets)
    out = np.zeros(len(lengths) + 1, dtype=np.int64)
    np.cumsum(n_bytes // 4, out=out[1:])
    values = np.empty(int(out[-1]), dtype="<u4")
    # One C call per text into the final array, no working arrays: the 245,725 texts
    # (340 MB) of bench/bench_split.py decode in 0.84 to 1.3 CPU s where a numpy table
    # lookup over every character, a 16 MB block at a time, took 1.45 to 2.25 s.
    source, target = memoryview(chars), memoryview(values).cast("B")
    spans = zip(starts.tolist(), ends.tolist(), (4 * out[:-1]).tolist(), (4 * out[1:]).tolist(), strict=True)
    try:
        for a, b, at, end in spans:
            target[at:end] = binascii.a2b_base64(source[a:b], strict_mode=True)
    except (binascii.Error, ValueError):  # ValueError: a text decoding to another length
        _raise_for_first_bad(chars, offsets)
    return values.astype(np.uint32, copy=False), out


def _raise_for_first_bad(chars: np.ndarray, offsets: np.ndarray) -> None:
    """ParameterError from :func:`decode_fingerprint` for the first text that is not base64
    of whole ``uint32`` values."""
    for k in range(len(offsets) - 1):
        decode_fingerprint(bytes(chars[offsets[k]:offsets[k + 1]]).decode("latin-1"))
    raise ParameterError("a fingerprint text is not base64 of uint32 values")


def check_search_parameters(*, min_similarity: float, max_clips_per_key: int, min_shared_keys: int) -> None:
    """ParameterError naming the first search parameter out of its range.

    Examples
    --------
    >>> check_search_parameters(min_similarity=0.85, max_clips_per_key=64, min_shared_keys=2)
    >>> check_search_parameters(min_similarity=1.5, max_clips_per_key=64, min_shared_keys=2)
    Traceback (most recent call last):
    ...
    pipeline.core.errors.ParameterError: min_similarity=1.5 must be in (0, 1]
    """
    if not (isinstance(min_similarity, (int, float, np.floating)) and 0.0 < min_similarity <= 1.0):
        raise ParameterError(f"min_similarity={min_similarity!r} must be in (0, 1]")
    if isinstance(max_clips_per_key, bool) or not isinstance(max_clips_per_key, (int, np.integer)) or max_clips_per_key < 2:
        raise ParameterError(f"max_clips_per_key={max_clips_per_key!r} must be an integer >= 2")
    if isinstance(min_shared_keys, bool) or not isinstance(min_shared_keys, (int, np.integer)) or min_shared_keys < 1:
        raise ParameterError(f"min_shared_keys={min_shared_keys!r} must be an integer >= 1")
