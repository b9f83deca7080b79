"""Near-duplicate search after clips were added to a corpus already searched.

:func:`find_near_duplicates` finds all similar pairs of a corpus (on fingerprints of
:mod:`pipeline.signal.fingerprint`); :func:`search_pairs` is :func:`find_near_duplicates_flat`
that also returns, for each pair found, how many candidate keys its two clips share.
:func:`search_added` gives the same pairs as a search of the whole corpus when clips
were only added since an earlier search whose pairs (and their shared keys) are kept,
touching only the sub-fingerprints equal to a key of a new clip.

Why the earlier pairs need only a count. Candidates share at least ``min_shared_keys``
keys, each held by 2 to ``max_clips_per_key`` clips (see
:func:`find_near_duplicates`). Adding clips only raises
the number of clips holding a key, and only for keys a new clip holds. So a pair of two
earlier clips can never become a candidate (a key that reached two holders through a
new clip has one earlier holder), and it stops being one only when keys it shares go
over the cap; its similarity does not change. Every pair with a new clip shares only
keys of that new clip. Both follow from the keys of the new clips alone.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.signal.fingerprint import (
    DEFAULT_MAX_CLIPS_PER_KEY,
    DEFAULT_MAX_OFFSET_FRAMES,
    DEFAULT_MIN_OVERLAP_FRAMES,
    _candidate_pairs,
    _sorted_distinct,
    check_search_parameters,
)
from pipeline.signal.pair_similarity import pair_similarities

__all__ = ["Pairs", "find_near_duplicates", "find_near_duplicates_flat", "search_added", "search_pairs"]


@dataclass(frozen=True)
class Pairs:
    """Pairs found: clip indices ``first < second``, similarity, and the distinct keys
    (held by 2 to ``max_clips_per_key`` clips) the two clips share; sorted by
    ``(first, second)``."""

    first: np.ndarray
    second: np.ndarray
    similarity: np.ndarray
    shared: np.ndarray

    def as_list(self) -> list[tuple[int, int, float]]:
        return list(zip(self.first.tolist(), self.second.tolist(), self.similarity.tolist(), strict=True))


def _verified(values: np.ndarray, offsets: np.ndarray, codes: np.ndarray, shared: np.ndarray, *,
              min_similarity: float, max_offset_frames: int, min_overlap_frames: int) -> Pairs:
    """The candidate pairs (codes ``i * n + j``) whose similarity reaches ``min_similarity``."""
    n = max(len(offsets) - 1, 1)
    first, second = np.divmod(codes, n)
    # All candidates at once (fingerprint_similarity's result per pair): one call per
    # pair cost 1.42 against 0.17-0.20 CPU s for 50,766 candidates of 50 sub-fingerprints.
    sims = pair_similarities(values, offsets, first, second, max_offset_frames=max_offset_frames,
                             min_overlap_frames=min_overlap_frames)
    keep = sims >= min_similarity if sims.size else np.zeros(0, bool)
    return Pairs(first[keep].astype(np.int64), second[keep].astype(np.int64), sims[keep],
                 shared[keep].astype(np.int64))


def search_pairs(values: np.ndarray, offsets: np.ndarray, *, min_similarity: float,
                 max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
                 min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
                 max_clips_per_key: int = DEFAULT_MAX_CLIPS_PER_KEY, min_shared_keys: int = 2) -> Pairs:
    """:func:`find_near_duplicates_flat` with each pair's shared keys.

    Examples
    --------
    >>> fp = np.random.default_rng(0).integers(1, 2**32, size=200, dtype=np.uint32)
    >>> other = np.random.default_rng(1).integers(1, 2**32, size=200, dtype=np.uint32)
    >>> found = search_pairs(np.concatenate([fp, other, fp]), np.array([0, 200, 400, 600]), min_similarity=0.85)
    >>> found.as_list(), found.shared.tolist()
    ([(0, 2, 1.0)], [200])
    """
    check_search_parameters(min_similarity=min_similarity, max_clips_per_key=max_clips_per_key,
                            min_shared_keys=min_shared_keys)
    values = np.asarray(values, dtype=np.uint32)
    offsets = np.asarray(offsets, dtype=np.int64)
    codes, shared = _candidate_pairs(values, offsets, max_clips_per_key=max_clips_per_key,
                                     min_shared_keys=min_shared_keys, with_shared=True)
    return _verified(values, offsets, codes, shared, min_similarity=min_similarity,
                     max_offset_frames=max_offset_frames, min_overlap_frames=min_overlap_frames)



def find_near_duplicates(
    fingerprints: Sequence[np.ndarray],
    *,
    min_similarity: float,
    max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
    min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
    max_clips_per_key: int = DEFAULT_MAX_CLIPS_PER_KEY,
    min_shared_keys: int = 2,
) -> list[tuple[int, int, float]]:
    """All pairs of clips whose fingerprints agree at or above ``min_similarity``.

    As in Haitsma and Kalker (ISMIR 2002), candidates come from exact matches of
    32-bit sub-fingerprints: every distinct non-zero sub-fingerprint of every clip goes
    into a table keyed by its value, and two clips become a candidate pair when they
    share at least ``min_shared_keys`` keys. Distorted copies keep many bit-exact
    sub-fingerprints (over half of them after Vorbis or MP3 coding in the tests), while
    a single shared key is mostly chance: among 100 unrelated synthetic utterances,
    requiring two cut the candidate pairs from 292 to 66 (of 4950). Keys held by more than
    ``max_clips_per_key`` clips (near-silence and other patterns common to much of a
    corpus) are skipped, which bounds the pairs per key; 0, the silence pattern, is
    never a key. Each candidate is then verified with :func:`~pipeline.signal.fingerprint.fingerprint_similarity`.

    Complexity: building and sorting the table is O(F log F) for F sub-fingerprints in
    total (sorting is the only super-linear step). A key held by k clips yields
    k (k - 1) / 2 pairs with k <= ``max_clips_per_key``, so there are at most
    F * max_clips_per_key / 2 candidate entries: linear in F, and in practice far
    fewer because unrelated clips rarely share a key. Each verification costs
    O((2 * max_offset_frames + 1) * frames). Memory is that of the candidate entries.

    A group of more than ``max_clips_per_key`` copies of one recording has all its keys
    skipped and is not found here; exact copies are cheaper to find by content hash.

    Parameters
    ----------
    fingerprints : Sequence[np.ndarray]
        One fingerprint per clip (empty arrays allowed; they never match).
    min_similarity : float
        Threshold in (0, 1] on :func:`~pipeline.signal.fingerprint.fingerprint_similarity`.
    max_offset_frames, min_overlap_frames : int
        Passed to :func:`~pipeline.signal.fingerprint.fingerprint_similarity`.
    max_clips_per_key : int
        Keys shared by more clips than this generate no candidates.
    min_shared_keys : int
        Distinct shared keys a pair needs to be verified.

    Returns
    -------
    list of (int, int, float)
        ``(i, j, similarity)`` with ``i < j`` indices into ``fingerprints``, sorted by
        ``i`` then ``j``.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> fps = [rng.integers(1, 2**32, size=200, dtype=np.uint32) for _ in range(3)]
    >>> fps.append(fps[0].copy())
    >>> find_near_duplicates(fps, min_similarity=0.85)
    [(0, 3, 1.0)]
    """
    fps = [np.asarray(fp, dtype=np.uint32) for fp in fingerprints]
    offsets = np.zeros(len(fps) + 1, dtype=np.int64)
    np.cumsum([fp.size for fp in fps], out=offsets[1:])
    return find_near_duplicates_flat(np.concatenate(fps) if fps else np.zeros(0, np.uint32), offsets,
                                     min_similarity=min_similarity, max_offset_frames=max_offset_frames,
                                     min_overlap_frames=min_overlap_frames, max_clips_per_key=max_clips_per_key,
                                     min_shared_keys=min_shared_keys)


def find_near_duplicates_flat(
    values: np.ndarray,
    offsets: np.ndarray,
    *,
    min_similarity: float,
    max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
    min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
    max_clips_per_key: int = DEFAULT_MAX_CLIPS_PER_KEY,
    min_shared_keys: int = 2,
) -> list[tuple[int, int, float]]:
    """:func:`find_near_duplicates` on fingerprints held one after the other, as
    :func:`~pipeline.signal.fingerprint.decode_fingerprints` gives them (fingerprint ``k`` is
    ``values[offsets[k]:offsets[k + 1]]``): the same pairs, without one array per clip.

    Examples
    --------
    >>> fp = np.random.default_rng(0).integers(1, 2**32, size=200, dtype=np.uint32)
    >>> other = np.random.default_rng(1).integers(1, 2**32, size=200, dtype=np.uint32)
    >>> find_near_duplicates_flat(np.concatenate([fp, other, fp]), np.array([0, 200, 400, 600]), min_similarity=0.85)
    [(0, 2, 1.0)]
    """
    # One search for both: search_pairs also keeps each pair's shared keys for a
    # rebuild's search of added clips.
    return search_pairs(values, offsets, min_similarity=min_similarity, max_offset_frames=max_offset_frames,
                        min_overlap_frames=min_overlap_frames, max_clips_per_key=max_clips_per_key,
                        min_shared_keys=min_shared_keys).as_list()


# Slots of the filter that finds the sub-fingerprints equal to a new clip's key: about
# 16 per key, from 2**16 to 2**24 (16 MB; a few million keys fill a small share of it). A
# table that fits the processor's cache costs less per value: 42,475 keys over 5 million
# values took 0.043 CPU s at 2**20 slots and 0.073 s at 2**24 (best of 5, under load).
_FILTER_BITS_MIN, _FILTER_BITS_MAX, _SLOTS_PER_KEY_BITS = 16, 24, 4
# Values hashed at a time, into working arrays allocated once (512 kB each, within the
# cache; 2**20 values at a time took 0.051 against 0.043 CPU s there).
_BLOCK_VALUES = 1 << 17
# A slot holds 0 (no key), a key's 7-bit tag plus 1, or _ANY when keys of different
# tags share it: a value passes when its slot holds its tag or _ANY, so about one in
# 128 of the values whose slot holds a key reaches the exact lookup.
_ANY = np.uint8(255)


def _positions_of(values: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """Positions in ``values`` of the values in ``keys`` (sorted, distinct), ascending.

    A Fibonacci-hashing filter over all values, a block at a time (the hash's top
    bits pick a slot, its next 7 bits a tag), then an exact binary search for the
    values that pass it. On 68 million values and 700,000 keys the tag cut the values
    reaching the binary search from 4 % of all to a few hundred thousand: 1.36 to
    0.75 CPU s (blocks of 4 million values, no tag, before). The table has about 16 slots
    per key (see ``_FILTER_BITS_MIN``): its size changes how many values reach the exact
    lookup, never the positions found.

    Examples
    --------
    >>> _positions_of(np.array([5, 9, 5, 7, 0], np.uint32), np.array([5, 7], np.uint32)).tolist()
    [0, 2, 3]
    """
    bits = int(np.clip(int(keys.size).bit_length() + _SLOTS_PER_KEY_BITS, _FILTER_BITS_MIN, _FILTER_BITS_MAX))
    shift, factor = np.uint32(32 - bits), np.uint32(2654435769)
    table = np.zeros(1 << bits, dtype=np.uint8)
    hashed = keys * factor
    slots, tags = hashed >> shift, ((hashed >> np.uint32(32 - bits - 7)) & np.uint32(127)) + 1
    table[slots] = tags.astype(np.uint8)
    clash = np.zeros(table.size, dtype=bool)
    clash[slots[table[slots] != tags]] = True  # a slot two tags wrote: the last one won
    table[clash] = _ANY
    work = np.empty(min(values.size, _BLOCK_VALUES), dtype=np.uint32)
    held, tag = np.empty(work.size, dtype=np.uint8), np.empty(work.size, dtype=np.uint8)
    found = []
    for start in range(0, values.size, _BLOCK_VALUES):
        block = values[start:start + _BLOCK_VALUES]
        h, t, w = held[:block.size], tag[:block.size], work[:block.size]
        np.multiply(block, factor, out=w)
        np.right_shift(w, np.uint32(32 - bits - 7), out=w)
        np.bitwise_and(w, np.uint32(127), out=t, casting="unsafe")
        t += 1
        np.right_shift(w, np.uint32(7), out=w)
        np.take(table, w, out=h)
        maybe = np.flatnonzero((h == t) | (h == _ANY))
        seen = block[maybe]
        at = np.minimum(np.searchsorted(keys, seen), keys.size - 1)
        found.append(maybe[keys[at] == seen] + start)
    return np.concatenate(found) if found else np.zeros(0, np.int64)


def search_added(values: np.ndarray, offsets: np.ndarray, added: np.ndarray, earlier: Pairs, *,
                 min_similarity: float, max_offset_frames: int = DEFAULT_MAX_OFFSET_FRAMES,
                 min_overlap_frames: int = DEFAULT_MIN_OVERLAP_FRAMES,
                 max_clips_per_key: int = DEFAULT_MAX_CLIPS_PER_KEY, min_shared_keys: int = 2) -> Pairs:
    """:func:`search_pairs` of a corpus whose clips ``~added`` were searched before.

    Parameters
    ----------
    values, offsets : np.ndarray
        Every clip's sub-fingerprints one after the other (clip ``k`` is
        ``values[offsets[k]:offsets[k + 1]]``), the earlier clips unchanged.
    added : np.ndarray
        ``bool`` per clip: added since the earlier search.
    earlier : Pairs
        What :func:`search_pairs` found among the earlier clips, with the same
        parameters, as indices into this corpus.
    min_similarity, max_offset_frames, min_overlap_frames, max_clips_per_key, min_shared_keys
        As for :func:`search_pairs`.

    Returns
    -------
    Pairs
        Equal to ``search_pairs(values, offsets, ...)`` (see the module docstring).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> fps = [rng.integers(1, 2**32, size=200, dtype=np.uint32) for _ in range(3)]
    >>> fps.append(fps[0].copy())
    >>> values, offsets = np.concatenate(fps), np.arange(0, 801, 200)
    >>> before = search_pairs(values[:600], offsets[:4], min_similarity=0.85)
    >>> search_added(values, offsets, np.array([False, False, False, True]), before,
    ...              min_similarity=0.85).as_list()
    [(0, 3, 1.0)]
    """
    check_search_parameters(min_similarity=min_similarity, max_clips_per_key=max_clips_per_key,
                            min_shared_keys=min_shared_keys)
    values = np.asarray(values, dtype=np.uint32)
    offsets = np.asarray(offsets, dtype=np.int64)
    added = np.asarray(added, dtype=bool)
    fresh = values[np.repeat(added, np.diff(offsets))]
    keys = _sorted_distinct(fresh[fresh != 0])
    hits = _positions_of(values, keys) if keys.size else np.zeros(0, np.int64)
    clips = np.searchsorted(offsets, hits, side="right") - 1
    codes = _sorted_distinct((values[hits].astype(np.uint64) << np.uint64(32)) | clips.astype(np.uint64))
    key_of, clip_of = codes >> np.uint64(32), (codes & np.uint64(0xFFFFFFFF)).astype(np.int64)
    starts = np.flatnonzero(np.r_[True, key_of[1:] != key_of[:-1]]) if codes.size else np.zeros(0, np.int64)
    holders = np.diff(np.r_[starts, codes.size])
    new_holders = np.add.reduceat(added[clip_of].astype(np.int64), starts) if codes.size else np.zeros(0, np.int64)
    # Pairs with a new clip: from the keys still under the cap.
    n = np.int64(len(offsets) - 1)
    pair_codes = []
    for size in np.unique(holders[(holders >= 2) & (holders <= max_clips_per_key)]):
        members = clip_of[starts[holders == size][:, None] + np.arange(size)]
        left, right = np.triu_indices(int(size), k=1)
        a, b = members[:, left].ravel(), members[:, right].ravel()
        touch = added[a] | added[b]
        pair_codes.append(a[touch] * n + b[touch])
    fresh_codes = np.concatenate(pair_codes) if pair_codes else np.zeros(0, np.int64)
    fresh_codes.sort()
    first = np.flatnonzero(np.r_[True, fresh_codes[1:] != fresh_codes[:-1]]) if fresh_codes.size else fresh_codes
    shared = np.diff(np.r_[first, fresh_codes.size])
    wanted = shared >= min_shared_keys
    found = _verified(values, offsets, fresh_codes[first[wanted]], shared[wanted], min_similarity=min_similarity,
                      max_offset_frames=max_offset_frames, min_overlap_frames=min_overlap_frames)
    kept = _still_candidates(earlier, key_of, clip_of, starts, holders, holders - new_holders,
                             max_clips_per_key=max_clips_per_key, min_shared_keys=min_shared_keys)
    order = np.lexsort((np.r_[kept.second, found.second], np.r_[kept.first, found.first]))
    return Pairs(*(np.r_[getattr(kept, f), getattr(found, f)][order] for f in ("first", "second", "similarity",
                                                                                "shared")))


def _still_candidates(earlier: Pairs, key_of: np.ndarray, clip_of: np.ndarray, starts: np.ndarray,
                      holders: np.ndarray, old_holders: np.ndarray, *, max_clips_per_key: int,
                      min_shared_keys: int) -> Pairs:
    """The earlier pairs that stay candidates: their shared keys less those the new
    clips took over the cap."""
    crossed = (old_holders >= 2) & (old_holders <= max_clips_per_key) & (holders > max_clips_per_key)
    lost: dict[int, set[int]] = {}
    for k in np.flatnonzero(crossed).tolist():
        for clip in clip_of[starts[k]:starts[k] + holders[k]].tolist():
            lost.setdefault(clip, set()).add(k)
    shared = earlier.shared.copy()
    # Only pairs whose two clips both hold a crossed key lose any: found in C (a loop over
    # the 44,995 earlier pairs of the 101,000-clip rebuild took 0.015 CPU s).
    holding = np.fromiter(lost, np.int64, count=len(lost))
    touched = np.flatnonzero(np.isin(earlier.first, holding) & np.isin(earlier.second, holding)) if lost else ()
    for p in touched:
        shared[p] -= len(lost[int(earlier.first[p])] & lost[int(earlier.second[p])])
    keep = shared >= min_shared_keys
    return Pairs(earlier.first[keep], earlier.second[keep], earlier.similarity[keep], shared[keep])
