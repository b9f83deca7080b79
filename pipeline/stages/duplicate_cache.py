"""The split stage's near-duplicate search, kept between runs under ``OUT/cache/split/``.

Three cache tables: each clip's id, ``audio_sha256`` and the length of its fingerprint
text (:func:`cache_keys`); the pairs the search found with the keys each pair shares (see
:mod:`pipeline.signal.added_search`); and each clip's fingerprint as decoded, so a
rebuild decodes the texts of its added clips alone (:func:`fingerprints`). When every
clip of the cached search is still there with the same audio and fingerprint length,
only the added clips are searched; otherwise (a clip gone or changed, another code
version or threshold, no cache) the whole corpus is.
Either way the pairs equal a search of the whole corpus, so the manifests do not
depend on the run history. The cache's scope holds the code version of this module and
what it reaches (the decoding of the texts, the search, the cache), not the split
stage's: an edit elsewhere in the stage keeps the pairs. The audio bytes stand for the fingerprint (the audio
stage takes it from the clip as written) under the same audio stage code version, which
is in the cache's scope; the length tells a fingerprint from none (audio quality
measures turned off), since that setting leaves the bytes as they are. The scopes of the
pairs and the decoded fingerprints include a digest of the clips table, so a run
interrupted between the writes leaves a miss, never a mismatch.
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core.cache import TableCache, cache_key
from pipeline.core.codeversion import code_version
from pipeline.core.errors import DataError
from pipeline.core.names import stage_manifest
from pipeline.core.stage import StageContext
from pipeline.signal.added_search import Pairs, search_added, search_pairs
from pipeline.signal.fingerprint import decode_fingerprints

NAMESPACE = "split"
# This module, by its name under pipeline/stages: its code version (codeversion.stage_code)
# covers it and every module it reaches.
SCOPE_MODULE = "duplicate_cache"
# The audio stage's per-file work, which makes the fingerprints, by its name under
# pipeline/stages (``audio_cache.PER_FILE_MODULE``, a test checks they agree). Spelled
# here rather than imported: importing audio_cache would bring the audio stage's cache
# and listing code into this module's code version.
FINGERPRINT_MODULE = "audio_file"
_PAIRS = pa.schema([("first", pa.int64()), ("second", pa.int64()), ("similarity", pa.float64()),
                    ("shared", pa.int64())])


def cache_keys(clip_ids: pa.ChunkedArray, audio_sha256: pa.ChunkedArray, fingerprint_chars: np.ndarray) -> pa.Table:
    """The cache's key of each clip: its id, its audio's SHA-256 and its fingerprint's
    length in characters (no digest of the fingerprint text: the audio stage hashed
    the clip's bytes already).

    Examples
    --------
    >>> cache_keys(pa.chunked_array([["c1"]]), pa.chunked_array([["ab" * 32]]), np.array([8])).num_rows
    1
    """
    return pa.table({"clip_id": clip_ids.cast(pa.string()), "audio_sha256": audio_sha256.cast(pa.string()),
                     "fingerprint_chars": pa.array(np.asarray(fingerprint_chars, dtype=np.int64), pa.int64())})


def decoded(texts: tuple[np.ndarray, np.ndarray], order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The fingerprint texts (:func:`fingerprint_texts`) decoded at once in the row order
    ``order`` (clip ``k`` is text ``order[k]``): the values one after the other and their
    offsets, with no Python string or array per clip (245,725 clips: 16 s and two objects
    each before) and no sorted copy of the texts. Here rather than in the split stage's
    module, so the code that turns the audio manifest's texts into the searched values is
    in the cache's scope.

    Examples
    --------
    >>> from pipeline.signal.fingerprint import encode_fingerprint
    >>> texts = pa.chunked_array([[encode_fingerprint(np.array([7, 8], np.uint32)), encode_fingerprint(np.array([9], np.uint32))]])
    >>> values, offsets = decoded(fingerprint_texts(texts), np.array([1, 0]))
    >>> values.tolist(), offsets.tolist()
    ([9, 7, 8], [0, 1, 3])
    """
    return decode_fingerprints(*texts, order=order)


def fingerprint_texts(column: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    """The fingerprint column's ASCII bytes (a view of its Arrow buffer, no copy) and
    each text's bounds in them (text ``k`` is ``chars[bounds[k]:bounds[k + 1]]``);
    DataError for a clip without one.

    Examples
    --------
    >>> chars, bounds = fingerprint_texts(pa.chunked_array([["AAAA", "BBBBCCCC"]]))
    >>> bytes(chars[bounds[1]:bounds[2]]), bounds.tolist()
    (b'BBBBCCCC', [0, 4, 12])
    """
    # One chunk (a manifest of one row group) is used as it is: combining copies it.
    texts = column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()
    if texts.null_count:
        raise DataError(f"{stage_manifest('audio')}: a clip has no fingerprint; expected one per clip")
    _, offsets, data = texts.buffers()
    width = np.int64 if pa.types.is_large_string(texts.type) else np.int32
    bounds = np.frombuffer(offsets, width)[texts.offset: texts.offset + len(texts) + 1].astype(np.int64)
    chars = np.frombuffer(data, np.uint8) if data is not None else np.zeros(0, np.uint8)
    return chars, bounds


def _clips_digest(keys: pa.Table) -> str:
    """A SHA-256 of the clips table's values, taken from its Arrow buffers (each string
    column as its UTF-8 bytes and its lengths): no Python string per clip, and the same
    digest however the table is chunked or was read."""
    h = hashlib.sha256()
    for name in ("clip_id", "audio_sha256"):
        texts = keys.column(name).combine_chunks().cast(pa.large_string())
        _, offsets, data = texts.buffers()
        bounds = np.frombuffer(offsets, np.int64)[texts.offset: texts.offset + len(texts) + 1] if offsets else \
            np.zeros(1, np.int64)
        chars = memoryview(data)[int(bounds[0]):int(bounds[-1])] if data is not None else b""
        h.update(np.diff(bounds).astype("<i8").tobytes())
        h.update(chars)
        h.update(b"\0")
    h.update(keys.column("fingerprint_chars").to_numpy().astype("<i8").tobytes())
    return h.hexdigest()


def _earlier(clips: pa.Table | None, pairs: pa.Table | None, keys: pa.Table) -> tuple[np.ndarray, Pairs] | None:
    """The clips added since the cached search and its pairs in this run's numbering, or
    None when the cache cannot serve (a cached clip gone or changed)."""
    if clips is None or pairs is None or clips.num_rows > keys.num_rows:
        return None
    where = pc.index_in(clips.column("clip_id"), value_set=keys.column("clip_id").combine_chunks())
    if where.null_count:
        return None
    at = where.to_numpy(zero_copy_only=False).astype(np.int64)
    if at.size > 1 and not (np.diff(at) > 0).all():
        return None  # the clips come in another order: the cached pairs' first < second would not hold
    now = keys.take(at)
    if not all(now.column(name).equals(clips.column(name)) for name in ("audio_sha256", "fingerprint_chars")):
        return None
    added = np.ones(keys.num_rows, dtype=bool)
    added[at] = False
    col = {name: pairs.column(name).to_numpy() for name in _PAIRS.names}
    return added, Pairs(at[col["first"]], at[col["second"]], col["similarity"].astype(np.float64),
                        col["shared"].astype(np.int64))


@dataclass(frozen=True)
class Planned:
    """A near-duplicate search made ready by :func:`plan_search`: the clips' cache keys
    (None: no cache), the clips added since the cached search and its pairs in this
    run's numbering (None: the whole corpus is searched), the threshold, the cache's
    scope, and the cached clips' decoded fingerprints (a ``large_list<uint32>`` column
    as mapped, a row per cached clip; None: every text is decoded)."""

    keys: pa.Table | None
    earlier: tuple[np.ndarray, Pairs] | None
    min_similarity: float
    scope: str = ""
    cached: pa.ChunkedArray | None = None

    @property
    def copies_cached(self) -> np.ndarray | None:
        """The clips added since the cached search (``bool`` per clip) when the others'
        fingerprints are copied from the cache, else None (every text is decoded)."""
        return None if self.earlier is None or self.cached is None else self.earlier[0]


def plan_search(ctx: StageContext, keys: pa.Table | None, *, min_similarity: float) -> Planned:
    """Read the cache and tell what :func:`searched` must search: the clips added since
    the cached search when the cache can serve, else all. ``keys`` (:func:`cache_keys`)
    is None when the cache is disabled."""
    if keys is None:
        return Planned(None, None, min_similarity)
    # The audio stage's per-file code version stands for the fingerprint method: a new
    # method keeps each clip's audio bytes but changes its fingerprint. This module's own stands
    # for what turns the texts into pairs: the decoding, the search (added_search,
    # pair_similarity, fingerprint) and the cache, not the rest of the split stage,
    # whose edits leave the pairs as they are.
    scope = cache_key("near-duplicates", "audio_sha256,fingerprint_chars",
                      code_version(SCOPE_MODULE, cache_dir=ctx.cache_dir),
                      code_version(FINGERPRINT_MODULE, cache_dir=ctx.cache_dir), min_similarity)
    cached_clips = _clip_cache(ctx, scope).load()
    earlier, cached = None, None
    if cached_clips is not None:
        digest = _clips_digest(cached_clips)
        earlier = _earlier(cached_clips, _pairs_cache(ctx, scope, digest).load(), keys)
    if earlier is not None:
        table = _values_cache(ctx, scope, digest).load()
        if table is not None and table.num_rows == cached_clips.num_rows:
            cached = table.column("values")
    return Planned(keys, earlier, min_similarity, scope, cached)


def fingerprints(planned: Planned, texts: tuple[np.ndarray, np.ndarray], order: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Every clip's decoded fingerprint in the row ``order`` (clip ``k`` is text
    ``order[k]`` of ``texts``, :func:`fingerprint_texts`): the values one after the other
    and their offsets, as :func:`decoded` gives them. When the planned search has the
    cached clips' fingerprints, only the added clips' texts are decoded and the others
    copied from the cache, a run of neighbouring clips at a time: at 101,000 clips
    decoding every text took 0.12 s of the rebuild's critical path.

    Examples
    --------
    >>> from pipeline.signal.fingerprint import encode_fingerprint
    >>> texts = pa.chunked_array([[encode_fingerprint(np.array([7, 8], np.uint32))]])
    >>> values, offsets = fingerprints(Planned(None, None, 0.9), fingerprint_texts(texts), np.array([0]))
    >>> values.tolist(), offsets.tolist()
    ([7, 8], [0, 2])
    """
    return with_cached(planned, uncached(planned, texts, order))


def uncached(planned: Planned, texts: tuple[np.ndarray, np.ndarray], order: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
    """The first step of :func:`fingerprints`: the fingerprints the cache does not hold
    decoded (the added clips' when it holds the others', else every clip's), so the
    texts can be let go before :func:`with_cached` makes the whole."""
    if planned.copies_cached is None:
        return decoded(texts, order)
    return decoded(texts, order[planned.copies_cached])


def with_cached(planned: Planned, fresh: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The second step of :func:`fingerprints`: every clip's fingerprint from what
    :func:`uncached` gave for the same plan."""
    if planned.copies_cached is None:
        return fresh
    return _interleaved(planned.cached, fresh, planned.copies_cached)


def _interleaved(cached: pa.ChunkedArray, fresh: tuple[np.ndarray, np.ndarray], added: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The fingerprints of the clips ``~added`` (``cached``: a list per clip, in their
    order, in chunks) and of the clips ``added`` (``fresh``: values and offsets, in their
    order) interleaved in one numbering: one copy per run of clips that neighbour each
    other in both."""
    chunks = cached.chunks
    sources = [(chunk.values.to_numpy(), chunk.offsets.to_numpy()) for chunk in chunks] + [fresh]
    kept = ~added
    # Each clip's source (a chunk of the cache, or the fresh ones) and its row there.
    bounds = np.r_[0, np.cumsum([len(chunk) for chunk in chunks], dtype=np.int64)]
    source, row = np.empty(added.size, dtype=np.int64), np.empty(added.size, dtype=np.int64)
    cached_rows = np.arange(int(kept.sum()))
    source[kept] = np.searchsorted(bounds, cached_rows, side="right") - 1
    row[kept] = cached_rows - bounds[source[kept]]
    source[added], row[added] = len(chunks), np.arange(int(added.sum()))
    lengths = np.empty(added.size, dtype=np.int64)
    lengths[kept] = np.concatenate([np.diff(at) for _, at in sources[:-1]] or [np.zeros(0, np.int64)])
    lengths[added] = np.diff(fresh[1])
    offsets = np.zeros(added.size + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    values = np.empty(int(offsets[-1]), dtype=np.uint32)
    runs = np.flatnonzero(np.r_[True, source[1:] != source[:-1], True]) if added.size else np.zeros(1, np.int64)
    for a, b in zip(runs[:-1].tolist(), runs[1:].tolist(), strict=True):
        data, at = sources[source[a]]
        values[offsets[a]:offsets[b]] = data[at[row[a]]:at[row[b - 1] + 1]]
    return values, offsets


def searched(planned: Planned, texts: tuple[np.ndarray, np.ndarray], order: np.ndarray) -> Pairs:
    """The pairs of the planned search (indices in clip_id order) on the clips'
    fingerprint ``texts`` in the row ``order``, decoded by :func:`fingerprints`: numpy
    work alone, which a forked process can do (:mod:`pipeline.core.forked`)."""
    return search_fingerprints(planned, fingerprints(planned, texts, order))


def search_fingerprints(planned: Planned, decoded_values: tuple[np.ndarray, np.ndarray]) -> Pairs:
    """The pairs of the planned search on the clips' decoded fingerprints
    ``decoded_values`` (values, offsets), in clip_id order."""
    if planned.earlier is None:
        return search_pairs(*decoded_values, min_similarity=planned.min_similarity)
    added, before = planned.earlier
    return search_added(*decoded_values, added, before, min_similarity=planned.min_similarity)


def save_search(ctx: StageContext, planned: Planned, found: Pairs, decoded_values: tuple[np.ndarray, np.ndarray], *,
                log: logging.Logger) -> None:
    """Log what the search covered and rewrite the cache with its clips, its pairs and
    the clips' decoded fingerprints ``decoded_values`` (values, offsets)."""
    if planned.keys is None:
        return
    if planned.earlier is None:
        log.info("split: near-duplicate search over all %d clips: %d pairs", planned.keys.num_rows, len(found.first))
    else:
        log.info("split: near-duplicate search over the %d clips added since the cached search: %d pairs in all",
                 int(planned.earlier[0].sum()), len(found.first))
    _clip_cache(ctx, planned.scope).save(planned.keys)
    digest = _clips_digest(planned.keys)
    _pairs_cache(ctx, planned.scope, digest).save(
        pa.table([pa.array(getattr(found, f.name), f.type) for f in _PAIRS], schema=_PAIRS))
    values, offsets = decoded_values
    _values_cache(ctx, planned.scope, digest).save(pa.table({"values": pa.LargeListArray.from_arrays(
        pa.array(offsets, pa.int64()), pa.array(values, pa.uint32()))}))


# Mapped Arrow files, not Parquet: a rebuild reads and rewrites the tables whole, and
# Parquet's compression cost 0.05 of the 0.08 CPU s this module spends besides the
# search at 101,000 clips (the tables take twice the bytes: 9 against 4.5 MB).
def _clip_cache(ctx: StageContext, scope: str) -> TableCache:
    return TableCache(ctx.cache_dir, NAMESPACE, "fingerprints", scope=scope, enabled=ctx.use_cache, mapped=True)


# Both scoped by the clips table's digest (:func:`_clips_digest`) besides the search's.
def _pairs_cache(ctx: StageContext, scope: str, clips_digest: str) -> TableCache:
    return TableCache(ctx.cache_dir, NAMESPACE, "near-duplicates", scope=cache_key(scope, clips_digest),
                      enabled=ctx.use_cache, mapped=True)


def _values_cache(ctx: StageContext, scope: str, clips_digest: str) -> TableCache:
    return TableCache(ctx.cache_dir, NAMESPACE, "fingerprint-values", scope=cache_key(scope, "values", clips_digest),
                      enabled=ctx.use_cache, mapped=True)


def search_and_save(ctx: StageContext, planned: Planned, decoded_values: tuple[np.ndarray, np.ndarray], *,
                    log: logging.Logger) -> Pairs:
    """:func:`search_fingerprints` in this process, then :func:`save_search`."""
    found = search_fingerprints(planned, decoded_values)
    save_search(ctx, planned, found, decoded_values, log=log)
    return found


def near_duplicates(ctx: StageContext, keys: pa.Table | None, decoded_values: tuple[np.ndarray, np.ndarray], *,
                    min_similarity: float, log: logging.Logger) -> Pairs:
    """The near-duplicate pairs of the clips (indices in clip_id order),
    searching only the added clips when the cache allows; the cache is then rewritten:
    :func:`plan_search`, then :func:`search_and_save` on fingerprints decoded already.

    ``keys`` (:func:`cache_keys`) is None when the cache is disabled."""
    return search_and_save(ctx, plan_search(ctx, keys, min_similarity=min_similarity), decoded_values, log=log)
