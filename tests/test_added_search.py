"""The search after clips were added equals a search of the whole corpus.

The reference is a search of the whole corpus, :func:`search_pairs` (which
:func:`find_near_duplicates_flat` returns as a list; its
candidate search is checked against a per-clip search, its results against analytic
cases and brute force, in tests/test_fingerprint.py). Small alphabets make
keys shared by many clips, so adding clips takes keys over the cap and unmakes
earlier candidates, the case the shared-key counts are kept for.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.signal.added_search import (
    Pairs,
    find_near_duplicates_flat,
    search_added,
    search_pairs,
)


def _corpus(rng: np.random.Generator, clips: int, alphabet: int) -> list[np.ndarray]:
    symbols = np.concatenate([[0], rng.integers(1, 2**32, size=alphabet, dtype=np.uint32)])
    fps = [symbols[rng.integers(0, symbols.size, size=int(rng.integers(0, 40)))] for _ in range(clips)]
    for k in rng.choice(clips, size=clips // 4, replace=False):  # copies with a few bits flipped
        copy = fps[int(rng.integers(0, clips))].copy()
        flip = rng.random(copy.size) < 0.3
        copy[flip] ^= np.uint32(1) << rng.integers(0, 32, size=int(flip.sum())).astype(np.uint32)
        fps[k] = copy
    return fps


def _flat(fps: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    offsets = np.r_[0, np.cumsum([fp.size for fp in fps])].astype(np.int64)
    return (np.concatenate(fps) if fps else np.zeros(0, np.uint32)).astype(np.uint32), offsets


def _in(earlier: Pairs, index: np.ndarray) -> Pairs:
    """Earlier pairs renumbered into the grown corpus."""
    return Pairs(index[earlier.first], index[earlier.second], earlier.similarity, earlier.shared)


@pytest.mark.parametrize("seed", range(12))
def test_search_after_adding_equals_searching_everything(seed: int) -> None:
    rng = np.random.default_rng(seed)
    alphabet = int(rng.choice([6, 20, 200]))
    cap = int(rng.choice([2, 3, 5, 64]))
    shared = int(rng.choice([1, 2, 3]))
    similarity = float(rng.choice([0.55, 0.7, 0.9]))
    fps = _corpus(rng, int(rng.integers(2, 60)), alphabet)
    added = rng.random(len(fps)) < rng.choice([0.05, 0.3, 0.9])
    params = {"min_similarity": similarity, "max_clips_per_key": cap, "min_shared_keys": shared}
    old_values, old_offsets = _flat([fp for fp, new in zip(fps, added, strict=True) if not new])
    earlier = search_pairs(old_values, old_offsets, **params)
    values, offsets = _flat(fps)
    got = search_added(values, offsets, added, _in(earlier, np.flatnonzero(~added)), **params)
    full = search_pairs(values, offsets, **params)
    assert got.as_list() == full.as_list() == find_near_duplicates_flat(values, offsets, **params)
    assert got.shared.tolist() == full.shared.tolist()


def test_keys_taken_over_the_cap_unmake_earlier_pairs() -> None:
    """Two clips share exactly two keys; a new clip holding one of them takes it over a
    cap of 2, so the pair has one key left and is no candidate any more."""
    a, b, c = np.uint32(0x12345678), np.uint32(0x9ABCDEF0), np.uint32(0x0F0F0F0F)
    old = [np.array([a, b, c], np.uint32), np.array([a, b, c], np.uint32)]
    params = {"min_similarity": 0.5, "max_clips_per_key": 2, "min_shared_keys": 2}
    earlier = search_pairs(*_flat(old), **params)
    assert earlier.as_list() == [(0, 1, 1.0)] and earlier.shared.tolist() == [3]
    grown = [*old, np.array([a, b, np.uint32(7)], np.uint32)]
    got = search_added(*_flat(grown), np.array([False, False, True]), earlier, **params)
    assert got.as_list() == search_pairs(*_flat(grown), **params).as_list() == []


def test_cache_serves_an_added_clip_and_misses_a_changed_one(tmp_path, caplog) -> None:
    """The split stage's cache (pipeline.stages.duplicate_cache): keyed by clip id, audio
    SHA-256 and fingerprint length, it searches only added clips while those keys hold,
    and searches everything when a clip's audio or fingerprint length changed."""
    import logging
    from types import SimpleNamespace

    import pyarrow as pa

    from pipeline.stages.duplicate_cache import cache_keys, near_duplicates

    fps = _corpus(np.random.default_rng(5), 30, 12)
    ctx = SimpleNamespace(cache_dir=tmp_path, use_cache=True)
    log = logging.getLogger("test-duplicate-cache")

    def run(count: int, sha: list[str], chars: list[int]) -> str:
        caplog.clear()
        keys = cache_keys(pa.chunked_array([[f"c{k:02d}" for k in range(count)]]), pa.chunked_array([sha[:count]]),
                          np.array(chars[:count]))
        with caplog.at_level(logging.INFO, logger=log.name):
            found = near_duplicates(ctx, keys, _flat(fps[:count]), min_similarity=0.6, log=log)
        assert found.as_list() == search_pairs(*_flat(fps[:count]), min_similarity=0.6).as_list()
        return "added since" if "added since" in caplog.text else "all"

    sha = [f"{k:064x}" for k in range(30)]
    chars = [fp.size for fp in fps]
    assert run(25, sha, chars) == "all"
    assert run(30, sha, chars) == "added since"
    assert run(30, sha[:3] + ["f" * 64] + sha[4:], chars) == "all"  # audio changed
    assert run(30, sha[:3] + ["f" * 64] + sha[4:], chars) == "added since"  # nothing added
    assert run(30, sha[:3] + ["f" * 64] + sha[4:], [0] + chars[1:]) == "all"  # fingerprint now empty


def test_cache_misses_clips_in_another_order(tmp_path, caplog) -> None:
    """Cached pairs hold indices with first < second: clips given in another order than
    the cached search's (the stage gives them by clip_id) mean a whole search."""
    import logging
    from types import SimpleNamespace

    import pyarrow as pa

    from pipeline.stages.duplicate_cache import cache_keys, near_duplicates

    fps = _corpus(np.random.default_rng(7), 30, 12)
    ctx = SimpleNamespace(cache_dir=tmp_path, use_cache=True)
    log = logging.getLogger("test-duplicate-cache-order")
    ids = [f"c{k:02d}" for k in range(30)]

    def run(order: list[int]) -> str:
        caplog.clear()
        keys = cache_keys(pa.chunked_array([[ids[k] for k in order]]), pa.chunked_array([[f"{k:064x}" for k in order]]),
                          np.array([fps[k].size for k in order]))
        chosen = [fps[k] for k in order]
        with caplog.at_level(logging.INFO, logger=log.name):
            found = near_duplicates(ctx, keys, _flat(chosen), min_similarity=0.6, log=log)
        assert found.as_list() == search_pairs(*_flat(chosen), min_similarity=0.6).as_list()
        return "added since" if "added since" in caplog.text else "all"

    assert run(list(range(30))) == "all"
    assert run(list(range(30))) == "added since"
    assert search_pairs(*_flat(fps), min_similarity=0.6).as_list()  # pairs to renumber
    assert run(list(range(29, -1, -1))) == "all"


@pytest.mark.parametrize("damaged", ["fingerprints.arrow", "near-duplicates.arrow"])
def test_a_damaged_cache_table_is_a_miss(tmp_path, caplog, damaged: str) -> None:
    """The cache tables are mapped Arrow files checked against the SHA-256 kept beside
    them: a changed byte in either means a whole search, with the same pairs."""
    import logging
    from types import SimpleNamespace

    import pyarrow as pa

    from pipeline.stages.duplicate_cache import NAMESPACE, cache_keys, near_duplicates

    fps = _corpus(np.random.default_rng(11), 30, 12)
    ctx = SimpleNamespace(cache_dir=tmp_path, use_cache=True)
    log = logging.getLogger("test-duplicate-cache-damaged")

    def run(count: int) -> str:
        caplog.clear()
        keys = cache_keys(pa.chunked_array([[f"c{k:02d}" for k in range(count)]]),
                          pa.chunked_array([[f"{k:064x}" for k in range(count)]]), np.array([fp.size for fp in fps[:count]]))
        with caplog.at_level(logging.INFO, logger=log.name):
            found = near_duplicates(ctx, keys, _flat(fps[:count]), min_similarity=0.6, log=log)
        assert found.as_list() == search_pairs(*_flat(fps[:count]), min_similarity=0.6).as_list()
        return "added since" if "added since" in caplog.text else "all"

    assert run(25) == "all"
    path = tmp_path / NAMESPACE / damaged
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    assert run(30) == "all"
    assert run(30) == "added since"  # the whole search rewrote both tables


def _texts(fps: list[np.ndarray], order: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """The fingerprint texts of ``fps`` in ``order``, as the split stage reads them."""
    import pyarrow as pa

    from pipeline.signal.fingerprint import encode_fingerprint
    from pipeline.stages.duplicate_cache import fingerprint_texts

    return fingerprint_texts(pa.chunked_array([[encode_fingerprint(fps[k]) for k in order]]))


def test_cached_fingerprints_interleaved_with_the_added_equal_every_text_decoded(tmp_path) -> None:
    """A rebuild decodes only the added clips' texts and copies the others from the cache
    (pipeline.stages.duplicate_cache.fingerprints): the values and offsets equal every
    text decoded, whatever the rows' order in the manifest and wherever the added clips
    fall, and the search on them equals a whole one."""
    import logging
    from types import SimpleNamespace

    import pyarrow as pa

    from pipeline.stages.duplicate_cache import (
        cache_keys,
        decoded,
        fingerprints,
        plan_search,
        search_and_save,
    )

    rng = np.random.default_rng(13)
    fps = _corpus(rng, 60, 12)
    ctx = SimpleNamespace(cache_dir=tmp_path, use_cache=True)
    log = logging.getLogger("test-duplicate-cache-values")
    ids = [f"c{k:02d}" for k in range(60)]
    earlier = sorted(rng.choice(60, size=45, replace=False).tolist())  # the added fall anywhere, ends included
    # A whole search, then one of the added clips, then one with none added (another input changed).
    for clips in (earlier, list(range(60)), list(range(60))):
        rows = rng.permutation(len(clips))  # the manifest's rows, in no order: ``order`` sorts them
        texts = _texts(fps, [clips[r] for r in rows])
        order = np.argsort(rows)
        keys = cache_keys(pa.chunked_array([[ids[k] for k in clips]]), pa.chunked_array([[f"{k:064x}" for k in clips]]),
                          np.diff(texts[1])[order])
        planned = plan_search(ctx, keys, min_similarity=0.6)
        got = fingerprints(planned, texts, order)
        assert (planned.cached is not None) == (clips != earlier)
        want = decoded(texts, order)
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_array_equal(got[1], want[1])
        found = search_and_save(ctx, planned, got, log=log)
        assert found.as_list() == search_pairs(*_flat([fps[k] for k in clips]), min_similarity=0.6).as_list()


def test_cached_fingerprints_in_many_chunks_and_sliced_ones() -> None:
    """The cached column as a mapped file gives it (chunks of 65,536 rows), and chunks
    that are slices of a larger list array: each clip's values come from its own row."""
    import pyarrow as pa

    from pipeline.signal.added_search import Pairs
    from pipeline.stages.duplicate_cache import Planned, decoded, fingerprints

    rng = np.random.default_rng(17)
    fps = _corpus(rng, 40, 50)
    added = np.zeros(40, dtype=bool)
    added[[0, 5, 6, 7, 20, 39]] = True
    kept = [fps[k] for k in np.flatnonzero(~added)]
    whole = pa.array([fp.tolist() for fp in [fps[0], *kept, fps[1]]], pa.large_list(pa.uint32()))
    cached = pa.chunked_array([whole.slice(1, 10), whole.slice(11, 0), whole.slice(11, len(kept) - 10)])
    none = np.zeros(0, np.int64)
    planned = Planned(None, (added, Pairs(none, none, none.astype(float), none)), 0.6, "", cached)
    texts = _texts(fps, list(range(40)))
    got, want = fingerprints(planned, texts, np.arange(40)), decoded(texts, np.arange(40))
    np.testing.assert_array_equal(got[0], want[0])
    np.testing.assert_array_equal(got[1], want[1])


def test_a_damaged_values_table_means_decoding_every_text(tmp_path) -> None:
    """The decoded fingerprints are a mapped table checked like the others: a changed byte
    means every text is decoded again; the search still covers only the added clips."""
    import logging
    from types import SimpleNamespace

    import pyarrow as pa

    from pipeline.stages.duplicate_cache import (
        NAMESPACE,
        cache_keys,
        fingerprints,
        plan_search,
        search_and_save,
    )

    fps = _corpus(np.random.default_rng(19), 30, 12)
    ctx = SimpleNamespace(cache_dir=tmp_path, use_cache=True)
    log = logging.getLogger("test-duplicate-cache-values-damaged")

    def plan(count: int) -> tuple[object, tuple[np.ndarray, np.ndarray]]:
        texts = _texts(fps, list(range(count)))
        keys = cache_keys(pa.chunked_array([[f"c{k:02d}" for k in range(count)]]),
                          pa.chunked_array([[f"{k:064x}" for k in range(count)]]), np.diff(texts[1]))
        planned = plan_search(ctx, keys, min_similarity=0.6)
        return planned, fingerprints(planned, texts, np.arange(count))

    planned, got = plan(25)
    search_and_save(ctx, planned, got, log=log)
    path = tmp_path / NAMESPACE / "fingerprint-values.arrow"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    planned, got = plan(30)
    assert planned.earlier is not None and planned.cached is None
    assert search_and_save(ctx, planned, got, log=log).as_list() == search_pairs(*_flat(fps), min_similarity=0.6).as_list()
    assert plan(30)[0].cached is not None  # written again whole


def test_positions_of_equals_isin_when_keys_share_filter_slots() -> None:
    """The filter's slots and tags only narrow the exact lookup: with 3 million keys in
    its 16 million slots many slots hold two keys of different tags (and some of the
    same tag), and the positions found are still exactly numpy's ``isin``."""
    from pipeline.signal.added_search import _positions_of

    rng = np.random.default_rng(7)
    keys = np.unique(rng.integers(0, 2**32, size=3_000_000, dtype=np.uint32))
    values = rng.integers(0, 2**32, size=2_500_000, dtype=np.uint32)
    values[rng.integers(0, values.size, size=50_000)] = keys[rng.integers(0, keys.size, size=50_000)]
    np.testing.assert_array_equal(_positions_of(values, keys), np.flatnonzero(np.isin(values, keys)))
    np.testing.assert_array_equal(_positions_of(values[:0], keys), np.zeros(0, np.int64))


@pytest.mark.parametrize("count", [1, 3, 5_000, 70_000])
def test_positions_of_equals_isin_for_tables_of_every_size(count: int) -> None:
    """The filter's table is sized to the keys (16 slots each, 2**16 to 2**24): small and
    crowded tables, and values over several blocks, still give exactly numpy's ``isin``."""
    from pipeline.signal.added_search import _positions_of

    rng = np.random.default_rng(count)
    keys = np.unique(rng.integers(0, 2**32, size=count, dtype=np.uint32))
    values = rng.integers(0, 2**32, size=600_000, dtype=np.uint32)
    values[rng.integers(0, values.size, size=20_000)] = keys[rng.integers(0, keys.size, size=20_000)]
    np.testing.assert_array_equal(_positions_of(values, keys), np.flatnonzero(np.isin(values, keys)))
