""":func:`~pipeline.signal.fingerprint.fingerprint_similarity` of many pairs of clips at once.

The near-duplicate search verifies every candidate pair it finds. One call per pair
costs a few dozen small numpy operations whatever the clips' length: on a corpus of
short clips (100,000 clips of 50 sub-fingerprints, 50,766 candidates after 1,000 clips
were added) that was 1.5 of the split stage's 3 CPU s. :func:`pair_similarities` does
the same integer counts for a block of pairs in a few operations on a
``(offsets, positions, pairs)`` array, so the result is the same float for every pair.

Pairs are taken in blocks whose first clips have the same length, with the pairs as the
contiguous last axis: every offset's view of the second clips is then a slice of one
zero-padded ``(positions, pairs)`` array, so the XOR reads it in place, and the sum over
positions adds whole rows. On the rebuild's 50,624 candidates (2.7 million positions of
first clips, 33 offsets) that took 0.11 against 0.30 CPU s for one row per position
and a gathered window of offsets, summed per pair with ``np.add.reduceat`` (best of 5).
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import as_strided, sliding_window_view

from pipeline.core.errors import ParameterError
from pipeline.signal.fingerprint import (
    DEFAULT_MAX_OFFSET_FRAMES,
    DEFAULT_MIN_OVERLAP_FRAMES,
    _popcount,
)

__all__ = ["pair_similarities"]

# Offsets x positions x pairs compared per block: the XOR's uint32 output is 8 MB. On the
# rebuild's 50,624 pairs, 2**18 to 2**22 took 0.141, 0.130, 0.120, 0.116 and 0.115 CPU s
# (best of 5): fewer, longer numpy calls, while the processor's large cache holds the rest.
_BLOCK_ELEMENTS = 1 << 21


def _check(max_offset_frames: int, min_overlap_frames: int) -> None:
    if isinstance(max_offset_frames, bool) or not isinstance(max_offset_frames, (int, np.integer)) or max_offset_frames < 0:
        raise ParameterError(f"max_offset_frames={max_offset_frames!r} must be an integer >= 0")
    if isinstance(min_overlap_frames, bool) or not isinstance(min_overlap_frames, (int, np.integer)) or min_overlap_frames < 1:
        raise ParameterError(f"min_overlap_frames={min_overlap_frames!r} must be an integer >= 1")


def pair_similarities(values: np.ndarray, offsets: np.ndarray, first: np.ndarray, second: np.ndarray, *,
                      max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
                      min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES) -> np.ndarray:
    """The similarity of clips ``first[p]`` and ``second[p]`` for every pair ``p``.

    Equal, float for float, to ``fingerprint_similarity(a, b)`` with ``a`` clip
    ``first[p]`` and ``b`` clip ``second[p]`` (see
    :func:`pipeline.signal.fingerprint.fingerprint_similarity` for the measure).

    Parameters
    ----------
    values, offsets : np.ndarray
        Every clip's ``uint32`` sub-fingerprints one after the other: clip ``k`` is
        ``values[offsets[k]:offsets[k + 1]]``.
    first, second : np.ndarray
        Clip indices of the pairs, one pair per position.
    max_offset_frames : int
        Largest shift tried, in sub-fingerprints.
    min_overlap_frames : int
        Fewest compared positions for an offset to count.

    Returns
    -------
    np.ndarray
        ``float64`` similarity in [0, 1] per pair.

    Examples
    --------
    >>> fp = np.random.default_rng(0).integers(1, 2**32, size=300, dtype=np.uint32)
    >>> values = np.concatenate([fp, fp[3:], fp[::-1]])
    >>> sims = pair_similarities(values, np.array([0, 300, 597, 897]), np.array([0, 0]), np.array([1, 2]))
    >>> sims.round(1).tolist()  # a copy 3 frames in; an unrelated order of the same values
    [1.0, 0.5]
    """
    _check(max_offset_frames, min_overlap_frames)
    values = np.asarray(values, dtype=np.uint32)
    offsets = np.asarray(offsets, dtype=np.int64)
    first = np.asarray(first, dtype=np.int64)
    second = np.asarray(second, dtype=np.int64)
    lengths = np.diff(offsets)
    result = np.zeros(first.size, dtype=np.float64)
    # A pair with an empty clip has no comparable position: 0.0, as for one pair.
    live = np.flatnonzero((lengths[first] > 0) & (lengths[second] > 0))
    if not live.size:
        return result
    # Blocks of pairs whose first clips have one length, in the order of that length.
    order = live[np.argsort(lengths[first[live]], kind="stable")]
    la = lengths[first[order]]
    shifts = 2 * max_offset_frames + 1
    # One buffer for every block's XOR: a new 8 MB array per block comes from fresh
    # pages (on the rebuild's pairs 2,793 page faults per call against none, and 0.116
    # against 0.111 CPU s).
    scratch = np.empty(max(_BLOCK_ELEMENTS, shifts * int(la[-1])), dtype=np.uint32)
    runs = np.flatnonzero(np.r_[True, la[1:] != la[:-1], True])
    for run_start, run_stop in zip(runs[:-1], runs[1:], strict=True):
        step = max(1, _BLOCK_ELEMENTS // (shifts * int(la[run_start])))
        for start in range(run_start, run_stop, step):
            block = order[start:min(start + step, run_stop)]
            result[block] = _block(values, offsets, first[block], second[block], max_offset_frames=max_offset_frames,
                                   min_overlap_frames=min_overlap_frames, scratch=scratch)
    return result


def _columns(values: np.ndarray, starts: np.ndarray, length: int) -> np.ndarray:
    """``(length, starts.size)``: column ``c`` is ``values[starts[c]:starts[c] + length]``,
    reads past the end of ``values`` clipped to its last element (the caller masks them).

    Rows of a sliding window, then transposed: 0.116 against 0.127 CPU s for the whole
    rebuild's 50,624 pairs with ``np.take`` on a 2-D index (best of 5)."""
    if values.size >= length and int(starts.max()) <= values.size - length:
        return sliding_window_view(values, length)[starts].T
    return np.take(values, starts + np.arange(length)[:, None], mode="clip")


def _block(values: np.ndarray, offsets: np.ndarray, first: np.ndarray, second: np.ndarray, *,
           max_offset_frames: int, min_overlap_frames: int, scratch: np.ndarray) -> np.ndarray:
    """:func:`pair_similarities` of pairs of non-empty clips whose first clips ``a`` all
    have one length ``la``.

    ``a`` is ``(la, pairs)`` and the second clips ``b``, padded with ``k`` zeros on both
    sides, ``(la + 2k, pairs)``: row ``i + r`` of the padded ``b`` is ``b[i + r - k]``,
    so rows ``r`` to ``r + la`` are offset ``r - k``, and all offsets are one strided
    view. As in ``fingerprint_similarity``, a padding zero pairs ``a[i]`` with no frame
    of ``b``: the bits of ``a[i]`` it adds are taken off with prefix sums over ``a``."""
    k = max_offset_frames
    la = int(offsets[first[0] + 1] - offsets[first[0]])
    lb = offsets[second + 1] - offsets[second]
    pairs = first.size
    a = np.ascontiguousarray(_columns(values, offsets[first], la))
    b = np.empty((la + 2 * k, pairs), dtype=np.uint32)
    b[:k] = 0
    np.multiply(_columns(values, offsets[second], la + k), np.arange(la + k)[:, None] < lb, out=b[k:])
    windows = as_strided(b, (2 * k + 1, la, pairs), (b.strides[0], b.strides[0], b.strides[1]), writeable=False)
    bits = _bit_counts(windows, a, scratch)
    # Bits of a before each row: a row at a time over the pairs, as np.cumsum along
    # axis 0 took 0.011 against 0.005 CPU s for 170 blocks of 53 x 600.
    a_bits = np.zeros((la + 1, pairs), dtype=np.int64)
    a_pc = _popcount(a)
    for i in range(la):
        np.add(a_bits[i], a_pc[i], out=a_bits[i + 1])
    shift = np.arange(-k, k + 1)[:, None]
    lo = np.minimum(np.maximum(0, -shift), la)
    hi = np.maximum(lo, np.minimum(la, lb - shift))  # (offsets, pairs): a[lo:hi] meets b
    errors = bits + (a_bits.ravel()[hi * pairs + np.arange(pairs)] - a_bits[lo[:, 0]] - a_bits[la])
    n = hi - lo - _both_silent(a, windows, lb, k)
    # n <= hi - lo, so n >= need is the one-pair test (hi - lo >= need) & (n >= need).
    usable = n >= np.minimum(np.minimum(min_overlap_frames, la), lb)
    # The one-pair score is max(1.0 - errors / (32.0 * n)); rounding is monotonic, so it
    # is 1.0 minus the least quotient, the same float.
    ratio = np.full(n.shape, np.inf)
    np.divide(errors, 32.0 * n, out=ratio, where=usable)
    best = 1.0 - ratio.min(axis=0)
    return np.where(np.isfinite(best), np.maximum(0.0, best), 0.0)


def _bit_counts(windows: np.ndarray, a: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """``(offsets, pairs)``: the bits that differ between ``a`` and each offset's
    ``windows``, summed over positions.

    XOR and popcount in ``scratch``; the sum adds a row of pairs at a time into 16-bit
    counts when they fit, as a cast to 64 bits took 0.031 against 0.008 CPU s for 90
    million popcounts."""
    x = np.bitwise_xor(windows, a, out=scratch[:windows.size].reshape(windows.shape))
    counts = _popcount(x)
    count_type = np.uint16 if 32 * a.shape[0] < 1 << 16 else np.int64
    return np.add.reduce(counts, axis=1, dtype=count_type)


def _both_silent(a: np.ndarray, windows: np.ndarray, lb: np.ndarray, k: int) -> np.ndarray | int:
    """``(offsets, pairs)``: positions of the overlap where ``a`` and ``b`` are both 0.

    Read at a's zeros alone (silence: few, often none), not over the whole window."""
    if np.count_nonzero(a) == a.size:
        return 0
    at, pair = np.nonzero(a == 0)
    shifted = at + np.arange(-k, k + 1)[:, None]  # the position in b
    hit = (windows[:, at, pair] == 0) & (shifted >= 0) & (shifted < lb[pair])
    cells = np.arange(2 * k + 1)[:, None] * a.shape[1] + pair
    return np.bincount(cells[hit], minlength=windows.shape[0] * a.shape[1]).reshape(windows.shape[0], a.shape[1])
