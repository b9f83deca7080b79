""":func:`~pipeline.signal.fingerprint.fingerprint_similarity` of many pairs of clips at once.

The near-duplicate search verifies every candidate pair it finds. One call per pair
costs a few dozen small numpy operations whatever the clips' length: on a corpus of
short clips (100,000 clips of 50 sub-fingerprints, 50,766 candidates after 1,000 clips
were added) that was 1.5 of the split stage's 3 CPU s. :func:`pair_similarities` does
the same integer counts for a block of pairs in a few operations on a
``(positions, offsets)`` matrix, so the result is the same float for every pair.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from pipeline.core.errors import ParameterError
from pipeline.signal.fingerprint import (
    DEFAULT_MAX_OFFSET_FRAMES,
    DEFAULT_MIN_OVERLAP_FRAMES,
    _popcount,
)

__all__ = ["pair_similarities"]

# Sub-fingerprints of the first clips compared per block: the block's matrices
# (positions x offsets) stay a few MB, within the processor's cache.
_BLOCK_POSITIONS = 1 << 13


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
    ends = np.cumsum(lengths[first[live]])
    start = 0
    while start < live.size:
        stop = max(int(np.searchsorted(ends, (ends[start - 1] if start else 0) + _BLOCK_POSITIONS, "right")),
                   start + 1)
        block = live[start:stop]
        result[block] = _block(values, offsets, first[block], second[block], max_offset_frames=max_offset_frames,
                               min_overlap_frames=min_overlap_frames)
        start = stop
    return result


def _block(values: np.ndarray, offsets: np.ndarray, first: np.ndarray, second: np.ndarray, *,
           max_offset_frames: int, min_overlap_frames: int) -> np.ndarray:
    """:func:`pair_similarities` of pairs of non-empty clips.

    One row per position ``i`` of each pair's first clip ``a`` and one column per
    offset: row ``i`` column ``r`` pairs ``a[i]`` with ``b[i + r - max_offset_frames]``,
    read from ``b`` padded with zeros on both sides. As in ``fingerprint_similarity``,
    a padding zero pairs ``a[i]`` with no frame of ``b``: its share of the column sums
    (the bits of ``a[i]``, and ``a[i] != 0``) is taken off with prefix sums over ``a``."""
    k = max_offset_frames
    la = offsets[first + 1] - offsets[first]
    lb = offsets[second + 1] - offsets[second]
    pairs, rows = la.size, int(la.sum())
    row_start = np.r_[0, np.cumsum(la)[:-1]]
    pair_of_row = np.repeat(np.arange(pairs), la)
    at = np.arange(rows) - row_start[pair_of_row]  # i: the row's position in its a
    a = values[offsets[first][pair_of_row] + at]
    # Each pair's b padded: k zeros, b, zeros up to max(la, lb) + 2k, one pair after the other.
    width = np.maximum(la, lb) + 2 * k
    pad_start = np.r_[0, np.cumsum(width)[:-1]]
    padded = np.zeros(int(width.sum()) + 1, dtype=np.uint32)
    b_pair = np.repeat(np.arange(pairs), lb)
    b_at = np.arange(int(lb.sum())) - np.r_[0, np.cumsum(lb)[:-1]][b_pair]
    padded[pad_start[b_pair] + k + b_at] = values[offsets[second][b_pair] + b_at]
    windows = sliding_window_view(padded, 2 * k + 1)[pad_start[pair_of_row] + at]  # rows x offsets, a copy
    # XOR in place: a new rows x offsets array per block (a MB or so) can come from fresh
    # pages each time, and 50,766 pairs then cost 1.3 against 0.29 CPU s (380,000 page
    # faults). A row where a is 0 keeps its window's values, which the count below reads.
    np.bitwise_xor(windows, a[:, None], out=windows)
    bits = np.add.reduceat(_popcount(windows), row_start, axis=0, dtype=np.int64)
    # Positions where a and b are both 0 are few (silence): count them on a's zeros alone.
    # Summed per pair by reduceat over each pair's run of silent rows (rows come in pair
    # order), not np.add.at: with a tenth of the values 0, 50,766 pairs of short clips
    # took 0.34 of 0.65 CPU s in add.at, against 0.32 s for the whole call this way.
    silent = np.flatnonzero(a == 0)
    both_zero = np.zeros((pairs, 2 * k + 1), dtype=np.int64)
    if silent.size:
        owner = pair_of_row[silent]
        runs = np.flatnonzero(np.r_[True, owner[1:] != owner[:-1]])
        both_zero[owner[runs]] = np.add.reduceat(windows[silent] == 0, runs, axis=0, dtype=np.int64)
    live = la[:, None] - both_zero
    # Prefix sums over a: a position's bits and whether it is live, by pair.
    a_bits = np.r_[0, np.cumsum(_popcount(a), dtype=np.int64)]
    a_live = np.r_[0, np.cumsum(a != 0, dtype=np.int64)]
    shift = np.arange(-k, k + 1)
    lo = np.minimum(np.maximum(0, -shift)[None, :], la[:, None])
    hi = np.maximum(lo, np.minimum(la[:, None], lb[:, None] - shift[None, :]))
    base, end = row_start[:, None], (row_start + la)[:, None]
    errors = bits - ((a_bits[end] - a_bits[base]) - (a_bits[base + hi] - a_bits[base + lo]))
    n = live - ((a_live[end] - a_live[base]) - (a_live[base + hi] - a_live[base + lo]))
    need = np.minimum(np.minimum(min_overlap_frames, la), lb)[:, None]
    usable = (hi - lo >= need) & (n >= need)
    score = np.full(errors.shape, -np.inf)
    np.subtract(1.0, errors / (32.0 * np.where(usable, n, 1)), out=score, where=usable)
    best = score.max(axis=1)
    return np.where(np.isfinite(best), np.maximum(0.0, best), 0.0)
