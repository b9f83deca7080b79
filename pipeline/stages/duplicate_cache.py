"""The split stage's near-duplicate search, kept between runs under ``OUT/cache/split/``.

Two cache tables: each clip's id and the digest of its fingerprint text (SHA-256,
first 16 bytes), and the pairs the search found with the keys each pair shares (see
:mod:`pipeline.signal.added_search`). When every clip of the cached search is still
there with the same fingerprint, only the added clips are searched; otherwise (a clip
gone or changed, another code version or threshold, no cache) the whole corpus is.
Either way the pairs equal a search of the whole corpus, so the manifests do not
depend on the run history. The pairs table's scope includes a digest of the clips
table, so a run interrupted between the two writes leaves a miss, never a mismatch.
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.cache import TableCache, cache_key
from pipeline.core.codeversion import code_version
from pipeline.core.stage import StageContext
from pipeline.signal.added_search import Pairs, search_added, search_pairs

NAMESPACE = "split"
_PAIRS = pa.schema([("first", pa.int64()), ("second", pa.int64()), ("similarity", pa.float64()),
                    ("shared", pa.int64())])


def text_digests(chars: memoryview, starts: Sequence[int], ends: Sequence[int]) -> list[bytes]:
    """SHA-256 (first 16 bytes) of each text ``chars[starts[k]:ends[k]]``.

    Examples
    --------
    >>> [d.hex() for d in text_digests(memoryview(b"abc"), [0], [3])]
    ['ba7816bf8f01cfea414140de5dae2223']
    """
    return [hashlib.sha256(chars[a:b]).digest()[:16] for a, b in zip(starts, ends, strict=True)]


def _clips_digest(ids: Sequence[str], digests: Sequence[bytes]) -> str:
    h = hashlib.sha256()
    h.update("\n".join(ids).encode("utf-8"))
    h.update(b"".join(digests))
    return h.hexdigest()


def _earlier(clips: pa.Table | None, pairs: pa.Table | None, ids: pa.ChunkedArray,
             digests: list[bytes]) -> tuple[np.ndarray, Pairs] | None:
    """The clips added since the cached search and its pairs in this run's numbering, or
    None when the cache cannot serve (a cached clip gone or changed)."""
    if clips is None or pairs is None or clips.num_rows > len(ids):
        return None
    where = pc.index_in(clips.column("clip_id"), value_set=ids.combine_chunks())
    if where.null_count:
        return None
    at = where.to_numpy(zero_copy_only=False).astype(np.int64)
    if clips.column("digest").to_pylist() != [digests[k] for k in at.tolist()]:
        return None
    added = np.ones(len(ids), dtype=bool)
    added[at] = False
    col = {name: pairs.column(name).to_numpy() for name in _PAIRS.names}
    return added, Pairs(at[col["first"]], at[col["second"]], col["similarity"].astype(np.float64),
                        col["shared"].astype(np.int64))


def near_duplicates(ctx: StageContext, ids: pa.ChunkedArray, digests: list[bytes] | None,
                    fingerprints: tuple[np.ndarray, np.ndarray], *, min_similarity: float,
                    log: logging.Logger) -> list[tuple[int, int, float]]:
    """The near-duplicate pairs ``(i, j, similarity)`` of the clips ``ids`` (sorted),
    searching only the added clips when the cache allows; the cache is then rewritten.

    ``digests`` (see :func:`text_digests`) is None when the cache is disabled."""
    if digests is None:
        return search_pairs(*fingerprints, min_similarity=min_similarity).as_list()
    scope = cache_key("near-duplicates", code_version("split", cache_dir=ctx.cache_dir), min_similarity)
    clip_cache = TableCache(ctx.cache_dir, NAMESPACE, "fingerprints", scope=scope, enabled=ctx.use_cache)
    cached_clips = clip_cache.load()
    cached_pairs = None
    if cached_clips is not None:
        pairs_scope = cache_key(scope, _clips_digest(cached_clips.column("clip_id").to_pylist(),
                                                     cached_clips.column("digest").to_pylist()))
        cached_pairs = TableCache(ctx.cache_dir, NAMESPACE, "near-duplicates", scope=pairs_scope,
                                  enabled=ctx.use_cache).load()
    earlier = _earlier(cached_clips, cached_pairs, ids, digests)
    if earlier is None:
        found = search_pairs(*fingerprints, min_similarity=min_similarity)
        log.info("split: near-duplicate search over all %d clips: %d pairs", len(ids), len(found.first))
    else:
        added, before = earlier
        found = search_added(*fingerprints, added, before, min_similarity=min_similarity)
        log.info("split: near-duplicate search over the %d clips added since the cached search: %d pairs in all",
                 int(added.sum()), len(found.first))
    id_list = ids.to_pylist()
    clip_cache.save(pa.table({"clip_id": pa.array(id_list, pa.string()), "digest": pa.array(digests, pa.binary())}))
    pairs_scope = cache_key(scope, _clips_digest(id_list, digests))
    TableCache(ctx.cache_dir, NAMESPACE, "near-duplicates", scope=pairs_scope, enabled=ctx.use_cache).save(
        pa.table([pa.array(getattr(found, f.name), f.type) for f in _PAIRS], schema=_PAIRS))
    return found.as_list()
