"""Split stage: labelled, unlabelled and held-out subsets, split by group, kept stable by a ledger.

Inputs are the audio stage's clips and the text stage's accepted transcripts. The
stage

1. groups clips by ``split.group_by`` (speaker, recording = source file, or clip)
   and binds near-duplicate and byte-identical clips into one group, so copies can
   never straddle held-out and training;
2. applies the quality gates of ``[quality]`` (noisy, narrowband, speaking-rate
   outlier, clipped, see :mod:`pipeline.stages.gates`): each flags its clips, and a gate whose
   action is "demote" (by default noisy and speaking-rate outlier) keeps them out of
   labelled and out of held-out scoring, one whose action is "reject" sets them aside;
3. holds out whole groups into the held-out parts (``split.parts``: dev and test by
   default), chosen in a seeded hash order (see :func:`group_rank_key`), balanced by
   speaker attributes and keeping shared prompts few (:mod:`pipeline.stages.heldout`),
   until each part reaches its target;
4. fills the nested labelled tiers from the training groups
   (:mod:`pipeline.stages.selection`) and puts every other training clip in unlabelled,
   keeping the prompts of text-disjoint parts apart from labelled as
   ``split.text_overlap`` says (:mod:`pipeline.stages.prompts`);
5. reads and rewrites the split ledger (:mod:`pipeline.stages.ledger`), so a rebuild keeps
   every earlier assignment: a held-out clip never moves into training or to another
   part, and a labelled clip leaves a tier only when its budget shrinks (or it
   loses its transcript, a gate or ``"demote"`` keeps it out).

Held-out ranking. Group ``g`` (its id as text, UTF-8) under ``seed`` has the key
``hashlib.sha256(f"{seed}\\t{g}".encode("utf-8")).hexdigest()``; groups are taken
in ascending order of that hex digest. ``docs/split.md`` works an example.
"""

from __future__ import annotations

import gc
import itertools
import math
import operator
import re
from collections import Counter, defaultdict
from collections.abc import Callable, Collection, Iterable, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from itertools import compress, repeat
from operator import attrgetter, countOf
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.core import checked_tables, names
from pipeline.core.config import Config, parse_duration_s
from pipeline.core.errors import DataError, UsageError
from pipeline.core.forked import Begun, begin
from pipeline.core.manifest import arrow_schema
from pipeline.core.names import (
    FLAGS,
    HELDOUT,
    LABELLED,
    PART,
    SUBSETS,
    UNLABELLED,
    stage_manifest,
    subset_manifest,
)
from pipeline.core.stage import Output, Stage, StageContext, StageResult, reject
from pipeline.core.startup import pandas_left_unloaded
from pipeline.signal.added_search import Pairs
from pipeline.stages import gates
from pipeline.stages.attributes import Attributes, read_attributes
from pipeline.stages.duplicate_cache import (
    cache_keys,
    fingerprint_texts,
    fingerprints,
    plan_search,
    save_search,
    search_fingerprints,
    searched,
    uncached,
    with_cached,
)
from pipeline.stages.heldout import (
    TRAINING,
    GroupFacts,
    PartTarget,
    balance_table,
    choose_parts,
    part_targets_s,
    rank_key,
)
from pipeline.stages.inventory import INVENTORY, ids_path, subset_phones, write_inventory
from pipeline.stages.ledger import (
    ClipRecord,
    Ledger,
    corpus_id,
    locate_ledger,
    read_ledger,
    shares_corpus,
    sorted_source_keys,
    write_ledger,
)
from pipeline.stages.prompts import DEMOTED, UNSCORED, prompt_key, prompt_set
from pipeline.stages.review_apply import decisions_file, excluded_clips, log_tally, split_exclusions
from pipeline.stages.selection import Candidate, TierOutcome, TierPlan, fill_tiers
from pipeline.stages.speakers import speaker_id

NAME = "split"


def extra_inputs(ctx: StageContext) -> list[Path]:
    ledger = locate_ledger(ctx.config, raw=ctx.raw, out=ctx.out)[0]
    table = ctx.config.split.balance_table
    return [ledger, ids_path(ledger), decisions_file(ctx), *([ctx.raw / table] if table else [])]


def read_balance(ctx: StageContext) -> Balance:
    """``split.balance_columns`` with the balance table's attributes by speaker id (as
    ingest writes the speaker: its id, or its pseudonym in a pseudonymised build)."""
    sc, cfg = ctx.config.split, ctx.config
    if not sc.balance_columns:
        return Balance((), sc.balance_tolerance, {})
    key: Any = speaker_id
    if cfg.privacy.pseudonymise:
        from pipeline.stages.privacy import load_key, pseudonym

        secret = load_key(cfg.resolve_path(cfg.privacy.key_file), out=ctx.out)

        def key(name: str) -> str:
            return pseudonym(speaker_id(name), key=secret)

    attributes = read_attributes(ctx.raw, sc.balance_table, speaker_column=sc.balance_speaker_column,
                                 columns=sc.balance_columns, encoding=cfg.ingest.transcript_encoding,
                                 speaker_key=key)
    return Balance(tuple(sc.balance_columns), sc.balance_tolerance, attributes)


def reuse_note(summary: dict[str, Any]) -> str:
    return "split changes: none (audio, text, config and ledger unchanged since the last run)"
SUBSET_PATHS = {s: subset_manifest(s) for s in SUBSETS}
# The audio stage reports the gain it could not apply because of the peak ceiling;
# below 0.05 dB the shortfall is inaudible. Common practice, no source.
PEAK_LIMITED_MIN_DB = 0.05
# The flags counted per gate in the summary: the gates of pipeline.stages.gates, and
# near-duplicates, which bind groups rather than gate clips.
GATES = (*gates.GATES, "near_duplicate")

_SHARE = re.compile(r"^([0-9]+(?:\.[0-9]+)?)%$")


# ---------------------------------------------------------------------------------------
# Small pure helpers
# ---------------------------------------------------------------------------------------

def heldout_target_s(spec: str, *, transcribed_s: float) -> float:
    """The held-out target in seconds: a duration, or a share ("10%") of ``transcribed_s``.

    Examples
    --------
    >>> heldout_target_s("10%", transcribed_s=3600.0), heldout_target_s("2m", transcribed_s=0.0)
    (360.0, 120.0)
    """
    m = _SHARE.match(spec)
    if m:
        return float(m.group(1)) / 100.0 * transcribed_s
    return parse_duration_s(spec)


# Held-out ranking key (see pipeline.stages.heldout.rank_key).
group_rank_key = rank_key


def rank_groups(group_ids: Iterable[str], *, seed: int) -> list[str]:
    """``group_ids`` in held-out ranking order (ascending :func:`group_rank_key`)."""
    return sorted(set(group_ids), key=lambda g: (group_rank_key(g, seed=seed), g))


def merge_groups(base_groups: Sequence[str], pairs: Iterable[tuple[int, int]]) -> list[str]:
    """Bind the groups of paired items together; each merged group takes its smallest id.

    Parameters
    ----------
    base_groups : Sequence[str]
        One group id per item.
    pairs : Iterable[tuple[int, int]]
        Indices of items that must share a group.

    Returns
    -------
    list of str
        The merged group id of every item.

    Examples
    --------
    >>> merge_groups(["b", "c", "a", "d"], [(0, 1), (1, 2)])
    ['a', 'a', 'a', 'd']
    """
    # Union-find with path halving: near-linear, and for a few thousand pairs cheaper
    # than importing scipy.sparse.csgraph for connected_components.
    # Over the distinct groups only (dict.fromkeys runs in C over the items).
    parent = {g: g for g in dict.fromkeys(base_groups)}

    def root(g: str) -> str:
        while parent[g] != g:
            parent[g] = parent[parent[g]]
            g = parent[g]
        return g

    for i, j in pairs:
        a, b = root(base_groups[i]), root(base_groups[j])
        if a != b:
            # The smaller id becomes the root, so every merged group is named by its smallest.
            parent[max(a, b)] = min(a, b)
    # One root per group, not per item: a few distinct groups stand for many items.
    roots = {g: root(g) for g in parent}
    return list(map(roots.__getitem__, base_groups))


class Bound(NamedTuple):
    """Groups bound by pairs (:func:`bound_groups`): each item's merged group, its code
    and the merged groups by code; each item's base group code and the base groups by
    code (both numbered in order of first appearance)."""

    merged: list[str]
    group: np.ndarray
    group_names: list[str]
    base: np.ndarray
    base_names: list[str]


def bound_groups(base_groups: list[str], first: np.ndarray, second: np.ndarray, *,
                 unbound: np.ndarray | None = None) -> Bound:
    """:func:`merge_groups` of the items paired ``first[p]``, ``second[p]`` (but those
    ``unbound``), and the merged groups numbered in order of first appearance: each
    item's merged group, its code, and the groups by code (see :class:`Bound`).

    A pair within one group binds nothing (most pairs, when grouping by speaker): the
    pairs that bind are picked by codes, and bind the distinct pairs of groups they
    join (at 101,000 clips, 37,000 pairs joining speakers took 0.05 CPU s one at a time,
    item by item). The codes follow from the base groups' own: those are numbered in
    order of first appearance, and a merged group first appears with the first base
    group merged into it.

    Examples
    --------
    >>> found = bound_groups(["b", "c", "a", "d", "c"], np.array([0, 1, 3]), np.array([1, 2, 4]),
    ...                      unbound=np.array([False, False, False, True, False]))
    >>> found.merged, found.group.tolist(), found.group_names
    (['a', 'a', 'a', 'd', 'a'], [0, 0, 0, 1, 0], ['a', 'd'])
    """
    base_code, base_names = _codes(base_groups)
    first, second = np.asarray(first, np.int64), np.asarray(second, np.int64)
    binds = base_code[first] != base_code[second]
    if unbound is not None:
        binds &= ~unbound[first] & ~unbound[second]
    width = np.int64(max(len(base_names), 1))
    joined = np.unique(base_code[first[binds]] * width + base_code[second[binds]])
    merged_names = merge_groups(base_names, zip((joined // width).tolist(), (joined % width).tolist(), strict=True))
    merged_code, names = _codes(merged_names)
    return Bound(list(map(merged_names.__getitem__, base_code.tolist())),
                 np.asarray(merged_code, np.int64)[base_code] if base_names else np.zeros(0, np.int64), names,
                 base_code, base_names)


def match_tiers(old: Sequence[str], new: Sequence[str], *, seconds: Mapping[str, float]) -> dict[str, str]:
    """Which ledger tier each configured tier continues: ``{new name: old name}``.

    A budget keeps its tier when its text is unchanged; the budgets whose text
    changed are paired in size order (so "1h" edited to "30m" is a shrink of that
    tier). Configured budgets left over are new tiers.

    Examples
    --------
    >>> s = {"15m": 900.0, "30m": 1800.0, "1h": 3600.0, "4h": 14400.0}
    >>> match_tiers(["15m", "1h", "4h"], ["15m", "30m", "4h"], seconds=s)
    {'15m': '15m', '30m': '1h', '4h': '4h'}
    """
    same = set(old) & set(new)
    mapping = {n: n for n in sorted(same)}
    rest_old = sorted((o for o in old if o not in same), key=lambda t: (seconds[t], t))
    rest_new = sorted((n for n in new if n not in same), key=lambda t: (seconds[t], t))
    mapping.update(zip(rest_new, rest_old, strict=False))  # unpaired leftovers are new or gone
    return dict(sorted(mapping.items()))


# ---------------------------------------------------------------------------------------
# Clips
# ---------------------------------------------------------------------------------------

@dataclass(slots=True, eq=False)
class Clip:
    """One audio row joined with its transcript, and what the stage found out about it.

    Built once, by :func:`build_clips`, when every measure is known, and never changed
    after (not frozen only because a frozen dataclass sets each field through
    ``object.__setattr__``: 0.60 against 0.26 CPU s for 235,000 clips). The audio row
    itself stays in the stage's Arrow table (row ``row`` of :attr:`Joined.audio`); a
    clip carries the few values the assignment reads. The values only the subset
    manifests read (speaking rate, its z-score, the best near-duplicate) are in
    :class:`Columns` alone.
    """

    row: int
    clip_id: str
    speaker: str
    duration_s: float
    source_path: str
    text: dict[str, Any] | None
    base_group: str
    group: str
    flags: frozenset[str]
    plain_phones: tuple[str, ...]
    eligible: bool

    @property
    def transcribed(self) -> bool:
        return self.text is not None


# Clip fields read over every clip, by attrgetter: map() then runs in C.
_ID, _ROW, _GROUP, _SPEAKER, _TEXT, _FLAGS, _DURATION, _PHONES, _BASE, _ELIGIBLE = map(
    attrgetter, ("clip_id", "row", "group", "speaker", "text", "flags", "duration_s", "plain_phones", "base_group",
                 "eligible"))


@dataclass(frozen=True)
class Joined:
    """The audio stage's table sorted by clip_id without its fingerprints, and for each
    of its rows the transcript's norm_text (``texts``, None without one) and its
    row in the text table (``text_rows``, -1 without); ``orphans`` counts the text rows
    whose clip has no audio row (their audio was rejected upstream)."""

    audio: pa.Table
    text: pa.Table
    texts: list[dict[str, Any] | None]
    text_rows: np.ndarray
    orphans: int

    def numbers(self, column: str) -> np.ndarray:
        """A numeric audio column as float64, NaN where null."""
        return self.audio.column(column).to_numpy().astype(np.float64, copy=False)


def _first_repeat(ids: pa.ChunkedArray) -> str | None:
    """The first id equal to the one before it in ``ids`` (sorted), or None."""
    if len(ids) < 2:
        return None
    same = pc.equal(ids.slice(1), ids.slice(0, len(ids) - 1)).to_numpy(zero_copy_only=False)
    hits = np.flatnonzero(same)
    return ids[int(hits[0]) + 1].as_py() if hits.size else None


# The transcript values the stage reads per clip (Clip.text).
_TEXT_READ = ("norm_text",)


def clip_order(audio: pa.Table) -> pa.Array:
    """The audio table's rows in clip_id order (:func:`join_rows` takes them so)."""
    return pc.sort_indices(audio, sort_keys=[("clip_id", "ascending")])


def join_rows(audio: pa.Table, text: pa.Table, *, order: pa.Array | None = None) -> Joined:
    """Join the audio and text stages' rows by clip_id; DataError for a clip listed twice.

    Columnar: the audio rows stay an Arrow table, without the fingerprints (the
    near-duplicate search decodes them from the input's own buffers); only the
    transcripts (a fraction of the clips) become Python rows. ``order`` is
    :func:`clip_order` of ``audio`` when the caller has it."""
    order = clip_order(audio) if order is None else order
    # Taken even when the rows are already in order: the copy lets the manifest read's
    # buffers go (without it the split stage alone peaked at 1.93 against 1.42 GB on
    # 233,161 generated clips, bench/bench_split.py).
    audio = (audio.drop_columns(["fingerprint"]) if "fingerprint" in audio.column_names else audio).take(order)
    twice = _first_repeat(text.column("clip_id").sort())
    if twice is not None:
        raise DataError(f"{stage_manifest('text')}: clip {twice} has two transcript rows; expected one")
    ids = audio.column("clip_id")
    twice = _first_repeat(ids)
    if twice is not None:
        raise DataError(f"{stage_manifest('audio')}: clip {twice} has two rows; expected one")
    rows = pc.index_in(ids, value_set=text.column("clip_id").combine_chunks())
    text_rows = rows.to_numpy(zero_copy_only=False)
    text_rows = np.where(np.isnan(text_rows), -1, text_rows).astype(np.int64) if rows.null_count else \
        text_rows.astype(np.int64)
    # The stage reads this one of a transcript's values per clip (the subset manifests take
    # the others from the Arrow table by row, build_clips the phones from their column):
    # all nine took 0.062 against 0.021 s for 33,667 rows, norm_text and phones 0.025 against
    # norm_text alone 0.004.
    by_row = text.select(list(_TEXT_READ)).to_pylist()
    orphans = len(by_row) - int(np.count_nonzero(text_rows >= 0))
    # Row -1 (no transcript) reads the None put last, in C: no Python call per clip.
    texts = list(map([*by_row, None].__getitem__, text_rows.tolist()))
    return Joined(audio, text, texts, text_rows, orphans)


def _string_codes(column: pa.ChunkedArray) -> tuple[np.ndarray, list[Any]]:
    """A column's values as codes and the distinct values by code, numbered in order of
    first appearance as :func:`_codes` gives them, from one hash pass in Arrow: a
    speaker's name, repeated over its clips, becomes one Python string (fewer objects
    to make and free, each hashed once where sets and dicts take it).

    Examples
    --------
    >>> codes, names = _string_codes(pa.chunked_array([["wren", "alder", "wren"]]))
    >>> codes.tolist(), names
    ([0, 1, 0], ['wren', 'alder'])
    """
    encoded = column.combine_chunks().dictionary_encode() if len(column) else None
    if encoded is None or encoded.null_count:
        return _codes(column.to_pylist())
    return encoded.indices.to_numpy().astype(np.int64), encoded.dictionary.to_pylist()


def plain_phones(column: pa.ChunkedArray, *, word_boundary: str) -> list[tuple[str, ...]]:
    """Each row's phones (a list column) without word boundaries, as a tuple.

    A few dozen distinct phones make up hundreds of thousands: they are numbered in one
    hash pass in Arrow, the boundaries dropped by their number, and every row takes
    its slice of one list of shared Python strings (33,667 transcripts: 0.016 against
    0.040 CPU s converting and filtering each row's list).

    Examples
    --------
    >>> plain_phones(pa.chunked_array([[["K", "|", "AE"], [], ["T"]]]), word_boundary="|")
    [('K', 'AE'), (), ('T',)]
    """
    lists = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    flat = lists.flatten()  # the values of the rows in view, from the first row's
    if flat.null_count or lists.null_count:  # not in a text manifest: the plain reading
        return [tuple(filter(word_boundary.__ne__, p)) if word_boundary else tuple(p)
                for p in map(lambda p: p or [], lists.to_pylist())]
    encoded = flat.dictionary_encode()
    names = encoded.dictionary.to_pylist()
    codes = encoded.indices.to_numpy().astype(np.int64)
    offsets = lists.offsets.to_numpy().astype(np.int64)
    offsets -= offsets[0]
    if word_boundary and word_boundary in names:
        keep = codes != names.index(word_boundary)
        codes, offsets = codes[keep], np.r_[0, np.cumsum(keep)][offsets]
    values = np.array(names, dtype=object)[codes].tolist() if names else []
    return list(map(tuple, map(values.__getitem__, map(slice, offsets[:-1].tolist(), offsets[1:].tolist()))))


def row_flags(joined: Joined) -> dict[str, np.ndarray]:
    """The flags a clip's own rows decide, as a mask per flag: upsampled, peak limited,
    transcript rejected."""
    audio = joined.audio
    transcribed = audio.column("transcribed").to_numpy(zero_copy_only=False).astype(bool)
    return {
        "transcript_rejected": transcribed & (joined.text_rows < 0),
        "upsampled": audio.column("upsampled_from").is_valid().to_numpy(zero_copy_only=False).astype(bool),
        "peak_limited": joined.numbers("peak_limited_db") > PEAK_LIMITED_MIN_DB,
    }


@dataclass(frozen=True)
class DuplicatePairs:
    """Duplicate pairs as arrays, sorted by ``(first, second)``: clip indices
    ``first < second``, similarity, and whether the audio bytes are identical."""

    first: np.ndarray
    second: np.ndarray
    similarity: np.ndarray
    identical: np.ndarray

    def __len__(self) -> int:
        return int(self.first.size)


def find_duplicates(clip_ids: Sequence[str], audio_sha256: pa.ChunkedArray | pa.Array,
                    near: Pairs) -> tuple[DuplicatePairs, np.ndarray]:
    """Near-duplicate pairs by fingerprint (``near``, as
    :func:`pipeline.signal.added_search.search_pairs` gives them) plus byte-identical
    pairs by audio_sha256.

    Identical clips are paired with the first (smallest id) of their kind, which is
    enough to bind them and to name the best match of each; an identical pair the
    fingerprints found too counts as identical. Also returns, for every clip, its best
    partner's index (highest similarity, ties to the smaller clip id; the clips are
    in clip_id order), -1 for a clip in no pair: the clips to flag ``near_duplicate``.
    Arrays throughout: 45,869 pairs cost 0.10 CPU s as one Python object each.
    """
    count = len(clip_ids)
    # Each clip whose audio_sha256 an earlier clip has pairs with the first of them.
    # One hash pass (dictionary_encode) rather than two (unique, then index_in): 0.007
    # against 0.015 CPU s for 101,000 digests.
    encoded = pc.dictionary_encode(audio_sha256)
    if isinstance(encoded, pa.ChunkedArray):
        encoded = encoded.combine_chunks() if encoded.num_chunks else pa.array([], pa.dictionary(pa.int32(), pa.string()))
    kinds = encoded.indices.to_numpy(zero_copy_only=False)
    _, first_of_kind = np.unique(kinds, return_index=True)
    firsts = first_of_kind[kinds].astype(np.int64)
    copies = np.flatnonzero(firsts != np.arange(count))
    first = np.r_[np.asarray(near.first, np.int64), firsts[copies]]
    second = np.r_[np.asarray(near.second, np.int64), copies]
    similarity = np.r_[np.asarray(near.similarity, np.float64), np.ones(copies.size)]
    identical = np.r_[np.zeros(len(near.first), bool), np.ones(copies.size, bool)]
    if copies.size or not _strictly_sorted(first, second):
        # Sorted by pair, the identical entry after the fingerprint's: the last of each pair wins.
        order = np.lexsort((identical, second, first))
        first, second = first[order], second[order]
        last = np.r_[(first[1:] != first[:-1]) | (second[1:] != second[:-1]), True] if order.size else \
            order.astype(bool)
        pairs = DuplicatePairs(first[last], second[last], similarity[order][last], identical[order][last])
    else:  # the search's pairs alone, sorted and distinct already (no sort: 5 ms at 45,869 pairs)
        pairs = DuplicatePairs(first, second, similarity, identical)
    return pairs, best_partners(np.r_[pairs.first, pairs.second], np.r_[pairs.second, pairs.first],
                                np.r_[pairs.similarity, pairs.similarity], count=count)


def _strictly_sorted(first: np.ndarray, second: np.ndarray) -> bool:
    """Whether the pairs ``(first[p], second[p])`` ascend strictly (sorted, none twice)."""
    ahead, same = first[1:] > first[:-1], first[1:] == first[:-1]
    return bool(np.all(ahead | (same & (second[1:] > second[:-1]))))


def best_partners(me: np.ndarray, other: np.ndarray, similarity: np.ndarray, *, count: int) -> np.ndarray:
    """For each of ``count`` items, its partner of highest similarity among the pairs
    ``me[p]``, ``other[p]``, ties to the smaller partner; -1 for an item in no pair.

    Two passes of per-item maxima and minima (``ufunc.at``), not a sort of the pairs
    (1.5 against 13 ms for 91,738 entries).

    Examples
    --------
    >>> best_partners(np.array([0, 0, 0, 2]), np.array([2, 1, 3, 0]), np.array([0.9, 0.9, 0.5, 0.9]),
    ...               count=4).tolist()
    [1, -1, 0, -1]
    """
    top = np.full(count, -np.inf)
    np.maximum.at(top, me, similarity)
    best = similarity == top[me]
    none = np.iinfo(np.int64).max
    partners = np.full(count, none, np.int64)
    np.minimum.at(partners, me[best], other[best])
    partners[partners == none] = -1
    return partners


@dataclass(frozen=True)
class GateMeasures:
    """Per clip: speaking rate and whether there is one (``rated``), its robust z-score
    and whether it is finite (``scored``), the gates that flagged it (a mask per gate),
    and whether it is eligible for labelled and held-out scoring."""

    rates: np.ndarray
    rated: np.ndarray
    z: np.ndarray
    scored: np.ndarray
    flags: dict[str, np.ndarray]
    eligible: np.ndarray


def measure_gates(joined: Joined, phones: Sequence[tuple[str, ...]], *, min_snr_db: float,
                  min_bandwidth_hz: float, rate_max_abs_z: float, rate_min_clips: int,
                  actions: Mapping[str, str], rate_min_spread: float = 0.0,
                  max_clipped_fraction: float = 1.0, speakers: np.ndarray | None = None) -> GateMeasures:
    """Speaking rate and its robust z-score per speaker, the gate flags, and eligibility.

    ``speaking_rate`` is phones (word boundaries left out) per second of speech;
    ``rate_z`` is :func:`pipeline.stages.gates.robust_z_scores` of it within the speaker
    (speakers with fewer than ``rate_min_clips`` transcribed clips are scored
    against all of them). The flags and what they do come from
    :mod:`pipeline.stages.gates`, which ``loam validate`` checks with too: a clip is eligible
    for labelled and held-out scoring when it has a transcript and no gate whose
    action (``actions``, gate to "flag", "demote" or "reject") holds it back flagged it.
    ``speakers``, the speaker column as integer codes, spares reading it again.
    """
    transcribed = joined.text_rows >= 0
    speech_s = joined.numbers("speech_s")
    n_phones = np.array([len(p) for p in phones], dtype=np.float64)
    rated = transcribed & (speech_s > 0)
    rates = np.full(len(phones), np.nan)
    rates[rated] = n_phones[rated] / speech_s[rated]
    # The speakers as integer codes (the schema allows no missing speaker): a Python
    # string per clip and their factorizing cost 0.07 CPU s at 101,000 clips.
    if speakers is None:
        column = joined.audio.column("speaker")
        speakers = (pc.index_in(column, value_set=pc.unique(column)).to_numpy(zero_copy_only=False).astype(np.int64)
                    if not column.null_count else np.array(column.to_pylist(), dtype=object))
    z = (gates.robust_z_scores(rates, speakers, min_group_size=rate_min_clips, min_mad_fraction=rate_min_spread)
         if len(phones) else np.zeros(0))
    flags = gates.gate_flags(
        snr_db=joined.numbers("snr_db"), bandwidth_hz=joined.numbers("bandwidth_hz"), rate_z=z,
        clipped_fraction=joined.numbers("clipped_fraction"), min_snr_db=min_snr_db,
        min_bandwidth_hz=min_bandwidth_hz, rate_max_abs_z=rate_max_abs_z, max_clipped_fraction=max_clipped_fraction)
    held = np.asarray(gates.held_back(flags, actions=actions), dtype=bool)
    return GateMeasures(
        rates=rates, rated=rated, z=np.asarray(z, dtype=np.float64), scored=np.isfinite(z),
        flags={g: np.asarray(flags[g], dtype=bool) for g in gates.GATES},
        eligible=transcribed & ~held)


def _flag_sets(masks: Mapping[str, np.ndarray], count: int) -> tuple[np.ndarray, list[frozenset[str]]]:
    """Each clip's flags as a code into the distinct combinations, and those as frozensets."""
    names = sorted(masks)
    code = np.zeros(count, dtype=np.int64)
    for bit, name in enumerate(names):
        code |= masks[name].astype(np.int64) << bit
    distinct, at = np.unique(code, return_inverse=True)
    return at.ravel().astype(np.int64), [frozenset(n for b, n in enumerate(names) if c >> b & 1)
                                         for c in distinct.tolist()]


@dataclass(frozen=True)
class Columns:
    """What :func:`build_clips` found, per row of :attr:`Joined.audio` (clip ``k`` is row
    ``k``), as arrays the subset manifests take rows from: the merged group (codes into
    ``group_names``), the speaking rate and its z-score (``rated``, ``scored``: False
    where the manifest says null), the best near-duplicate partner's row (-1 for none),
    the flags (codes into ``flag_sets``), eligibility and whether the clip has phones;
    the base group (codes into ``base_names``), the merged groups' names as a list,
    whether the clip has a transcript, its duration, its speaker (codes, ``speaker_count``
    of them) and its phones without word boundaries (as :attr:`Clip.plain_phones`): the
    summary reads these by row. Groups and speakers are numbered in order of first
    appearance."""

    group: np.ndarray
    group_names: pa.Array
    speaking_rate: np.ndarray
    rated: np.ndarray
    rate_z: np.ndarray
    scored: np.ndarray
    partner: np.ndarray
    flags: np.ndarray
    flag_sets: list[frozenset[str]]
    eligible: np.ndarray
    phoned: np.ndarray
    base: np.ndarray
    base_names: list[str]
    group_list: list[str]
    transcribed: np.ndarray
    duration_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    speaker: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    speaker_count: int = 0
    plain_phones: list[tuple[str, ...]] = field(default_factory=list)


def build_clips(joined: Joined, cfg: Config, *, near: Pairs | Callable[[], Pairs], unbound: Collection[str] = ()
                ) -> tuple[list[Clip], DuplicatePairs, Columns]:
    """Every joined row as a Clip: groups bound by duplicates, gate measures and flags.

    ``near`` holds the near-duplicate pairs (:mod:`pipeline.stages.duplicate_cache`), or
    gives them when called: only once the measures that need none are taken, so a
    search in another process goes on meanwhile. A clip of ``unbound`` (excluded
    at review) binds no groups; it keeps its pairs and flag. Returns the clips in
    clip_id order, the duplicate pairs (indices into them) and the same values as
    :class:`Columns`.
    """
    qc, group_by = cfg.quality, cfg.split.group_by
    audio, texts = joined.audio, joined.texts
    clip_ids = audio.column("clip_id").to_pylist()
    speaker_codes, speaker_names = _string_codes(audio.column("speaker"))
    speakers = list(map(speaker_names.__getitem__, speaker_codes.tolist()))
    boundary = cfg.text.word_boundary
    # Each transcript's phones, and () for a clip without one (row -1 reads the () put last).
    phones = list(map([*plain_phones(joined.text.column("phones"), word_boundary=boundary), ()].__getitem__,
                      joined.text_rows.tolist()))
    base = {"speaker": speakers, "clip": clip_ids}.get(group_by) or audio.column("source_id").to_pylist()
    out = np.fromiter(map(set(unbound).__contains__, clip_ids), bool, count=len(clip_ids)) if unbound else None
    measured = measure_gates(joined, phones, min_snr_db=qc.min_snr_db,
                             min_bandwidth_hz=qc.min_bandwidth_hz, rate_max_abs_z=qc.rate_max_abs_z,
                             rate_min_clips=qc.rate_min_clips, rate_min_spread=qc.rate_min_spread,
                             actions=qc.gate_actions, max_clipped_fraction=cfg.audio.max_clipped_fraction,
                             speakers=speaker_codes)
    flags = row_flags(joined)
    pairs, partner = find_duplicates(clip_ids, audio.column("audio_sha256"), near() if callable(near) else near)
    bound = bound_groups(base, pairs.first, pairs.second, unbound=out)
    merged = bound.merged
    paired = np.zeros(len(clip_ids), dtype=bool)
    paired[pairs.first] = paired[pairs.second] = True
    flag_codes, flag_sets = _flag_sets({**flags, **measured.flags, "near_duplicate": paired}, len(clip_ids))
    # Positional, in the order of Clip's fields (keywords took 0.14 against 0.05 s per
    # 235,000), and called by map() from C over the columns (one list each, of equal length).
    durations = joined.numbers("duration_s")
    clips = list(map(Clip, range(len(clip_ids)), clip_ids, speakers, durations.tolist(),
                     audio.column("source_path").to_pylist(), texts, base, merged,
                     map(flag_sets.__getitem__, flag_codes.tolist()), phones, measured.eligible.tolist()))
    columns = Columns(bound.group, pa.array(bound.group_names, pa.string()), measured.rates, measured.rated,
                      measured.z, measured.scored, partner, flag_codes, flag_sets, measured.eligible,
                      np.fromiter(map(bool, phones), bool, count=len(phones)), bound.base, bound.base_names,
                      bound.group_names, joined.text_rows >= 0, durations, speaker_codes, len(speaker_names), phones)
    return clips, pairs, columns


# ---------------------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------------------

def _budgets(budgets: Sequence[str]) -> list[tuple[str, float]]:
    counts = Counter(budgets)
    twice = sorted(b for b, n in counts.items() if n > 1)
    if twice:
        raise UsageError(f"key 'split.labelled_budgets' has value {list(budgets)}; allowed: each budget once "
                         f"({', '.join(twice)} appears twice)")
    return sorted(((b, parse_duration_s(b)) for b in budgets), key=lambda bs: (bs[1], bs[0]))


def _too_few_groups(group_by: str, eligible_groups: list[str]) -> DataError:
    found = (f"only {len(eligible_groups)} group ({eligible_groups[0]})" if eligible_groups
             else "no group")
    advice = {
        "speaker": 'For a corpus with one speaker, set split.group_by = "recording" (--set '
                   'split.group_by=recording: each source file stays whole on one side, and held-out is '
                   'disjoint from training by recording) or "clip" (--set split.group_by=clip).',
        "recording": 'Set split.group_by = "clip" to split the recordings\' clips apart.',
        "clip": "Add transcribed audio, or set split.heldout = \"0%\" for no held-out subset.",
    }[group_by]
    return DataError(
        f"split: {found} has eligible transcribed audio when grouping by {group_by} (after binding "
        f"near-duplicates); a held-out subset needs at least two groups, one for held-out and one for "
        f"training, so that no {group_by} is on both sides. {advice}"
    )


@dataclass
class Assignment:
    """The outcome of the split before it becomes tables.

    ``sides`` holds each group's side (held-out or training) and ``places`` its part or
    ``"training"``; ``parts`` each held-out clip's part; ``unscored`` and ``demoted`` the
    clips ``split.text_overlap`` took off scoring or out of labelled; ``facts`` the group
    facts the places were chosen by (their prompts empty when no group needed them:
    see :func:`_choose_places`); ``past`` the clips as :class:`Past` read them (the
    order of ``subset``), for :func:`_changes`."""

    subset: dict[str, str]
    tiers: dict[str, tuple[str, ...]]
    sides: dict[str, str]
    outcomes: list[TierOutcome]
    straddling: list[str]
    continues: dict[str, str]
    gated_out: int
    waiting: int
    lost_transcript: int
    places: dict[str, str] = field(default_factory=dict)
    parts: dict[str, str] = field(default_factory=dict)
    unscored: frozenset[str] = frozenset()
    demoted: frozenset[str] = frozenset()
    demoted_labelled: int = 0
    facts: Mapping[str, GroupFacts] = field(default_factory=dict)
    straddling_parts: list[str] = field(default_factory=list)
    past: Past | None = None


# A clip the ledger has no row for reads this record: no subset, no part.
_UNKNOWN = ClipRecord("", (), "", "")
_SUBSET_OF, _PART_OF = attrgetter("subset"), attrgetter("part")


@dataclass(frozen=True)
class Past:
    """The clips as arrays for the assignment (one entry per clip, in the clips' order):
    group codes (groups numbered in order of first appearance, as :func:`group_facts`
    lists them), base group codes, and what the ledger says of each clip.

    The per-clip decisions of a rebuild (the sides the ledger fixes, the subset before
    the tiers, each held-out clip's part) are masks and sums over these arrays: at
    101,000 clips a Python loop per clip for each cost 0.15 CPU s in all."""

    ids: list[str]
    group: np.ndarray
    group_names: list[str]
    base: np.ndarray
    base_names: list[str]
    records: list[ClipRecord]
    known: np.ndarray
    held: np.ndarray
    labelled: np.ndarray
    part: np.ndarray
    part_names: list[str]
    eligible: np.ndarray
    transcribed: np.ndarray

    @classmethod
    def of(cls, clips: Sequence[Clip], known: Mapping[str, ClipRecord], columns: Columns | None = None) -> Past:
        """``columns``, :func:`build_clips`'s of the same clips (every clip of it, in its
        order), gives the group and base codes, eligibility and transcripts already read."""
        ids = list(map(_ID, clips))
        whole = columns is not None and columns.group.size == len(clips) and columns.transcribed.size == len(clips)
        if whole:
            group, group_names, base, base_names = columns.group, columns.group_list, columns.base, columns.base_names
        else:
            group, group_names = _codes(list(map(_GROUP, clips)))
            base, base_names = _codes(list(map(_BASE, clips)))
        # map() over the dict's get with a default record runs in C: no None to test per clip.
        records = list(map(known.get, ids, repeat(_UNKNOWN)))
        # Records are shared (one per distinct ledger row text): each clip's subset and
        # part are its record's, read once per record.
        identities = list(map(id, records))
        record_code, record_ids = _codes(identities)
        distinct = dict(zip(identities, records, strict=True))
        subset_of, subset_names = _codes([distinct[r].subset for r in record_ids])
        part_of, part_names = _codes([distinct[r].part for r in record_ids])
        subsets, part = subset_of[record_code], part_of[record_code]
        code = {name: k for k, name in enumerate(subset_names)}
        if whole:
            eligible, transcribed = columns.eligible, columns.transcribed
        else:
            eligible = np.fromiter(map(_ELIGIBLE, clips), bool, count=len(clips))
            transcribed = np.fromiter(map(operator.is_not, map(_TEXT, clips), repeat(None)), bool, count=len(clips))
        return cls(ids, group, group_names, base, base_names, records,
                   known=subsets != code.get("", -1), held=subsets == code.get(HELDOUT, -1),
                   labelled=subsets == code.get(LABELLED, -1), part=part, part_names=part_names,
                   eligible=eligible, transcribed=transcribed)

    def any_by_group(self, mask: np.ndarray) -> np.ndarray:
        """Per group, whether any of its clips is in ``mask``."""
        return np.bincount(self.group[mask], minlength=len(self.group_names)) > 0

    def bases_by_group(self) -> list[set[str]]:
        """Each group's distinct base groups."""
        found: list[set[str]] = [set() for _ in self.group_names]
        width = max(len(self.base_names), 1)
        for pair in np.unique(self.group * width + self.base).tolist():
            found[pair // width].add(self.base_names[pair % width])
        return found


def _known_sides(past: Past, ledger: Ledger | None) -> tuple[dict[str, set[str]], list[str]]:
    """Sides the ledger fixes per group: from its clips, else from its group rows."""
    if ledger is None:
        return {}, []
    fixed: dict[str, set[str]] = {}
    held, trains = past.any_by_group(past.known & past.held), past.any_by_group(past.known & ~past.held)
    bases = None
    for g, name in enumerate(past.group_names):
        sides = {side for side, on in ((HELDOUT, held[g]), ("training", trains[g])) if on}
        if not sides:
            bases = bases if bases is not None else past.bases_by_group()
            sides = {ledger.groups[i] for i in {name} | bases[g] if i in ledger.groups}
        if sides:
            fixed[name] = sides
    straddling = sorted(g for g, s in fixed.items() if len(s) > 1)
    return fixed, straddling


def _known_part(past: Past, group: int, ids: set[str], ledger: Ledger, configured: Sequence[str]) -> str:
    """The configured part the ledger gives a held-out group: its clips' part, else the
    group row's; the first in config order when they differ; "" when none."""
    mine = past.known & (past.group == group)
    found = {past.part_names[k] for k in np.unique(past.part[mine]).tolist()}
    if not found - {""}:
        found = {ledger.parts.get(i, "") for i in ids}
    return next((p for p in configured if p in found), "")


def _fixed_places(past: Past, ledger: Ledger | None, configured: Sequence[str]
                  ) -> tuple[dict[str, str], list[str], int, list[str]]:
    """What the ledger fixes: each group's part or "training" where it fixes one, the
    held-out groups whose part it leaves open, how many groups have an eligible clip
    that trains, and the straddling groups."""
    fixed_sides, straddling = _known_sides(past, ledger)
    code = {name: g for g, name in enumerate(past.group_names)}
    # Whether a group has an eligible clip that trains, if the group is held out and if
    # it trains: a clip is held out as the ledger recorded it, else as its group's side.
    trains = {HELDOUT: past.any_by_group(past.eligible & past.known & ~past.held),
              "training": past.any_by_group(past.eligible & ~(past.known & past.held))}
    bases: list[set[str]] | None = None
    fixed: dict[str, str] = {}
    pending: list[str] = []
    training_groups = 0
    for g, side_set in fixed_sides.items():
        # A group whose known clips sit on both sides takes its new clips to held-out:
        # a copy of a held-out clip must not be trained on.
        side = HELDOUT if HELDOUT in side_set else "training"
        if side == HELDOUT and ledger is not None:
            bases = bases if bases is not None else past.bases_by_group()
            part = _known_part(past, code[g], {g} | bases[code[g]], ledger, configured)
            if part:
                fixed[g] = part
            else:
                pending.append(g)
        else:
            fixed[g] = TRAINING
        training_groups += bool(trains[side][code[g]])
    return fixed, pending, training_groups, straddling


def _choose_places(past: Past, ledger: Ledger | None, facts: Mapping[str, GroupFacts], *,
                   seed: int, targets: Sequence[PartTarget], balance: Balance,
                   with_prompts: Callable[[], Mapping[str, GroupFacts]] | None = None
                   ) -> tuple[dict[str, str], list[str], Mapping[str, GroupFacts]]:
    """Each group's part or "training": the ledger's where it fixes one, else chosen by
    :func:`pipeline.stages.heldout.choose_parts`; also the straddling groups and the
    facts the choice read.

    ``facts`` may leave out the prompts (``group_facts(..., prompts=False)``), with
    ``with_prompts`` giving them in full: choose_parts weighs prompts only when it
    ranks a group, one neither fixed nor pending with eligible seconds. A rebuild
    whose ledger places every group reads no prompt (27,000 distinct transcripts keyed
    for nothing took 0.04 CPU s at 101,000 clips)."""
    fixed, pending, training_groups, straddling = _fixed_places(past, ledger, [t.name for t in targets])
    if not targets:  # no held-out subset wanted: every undecided group trains
        return {g: fixed.get(g, TRAINING) for g in past.group_names}, straddling, facts
    waiting = set(pending)
    if with_prompts is not None and any(f.seconds > 0 and g not in fixed and g not in waiting
                                        for g, f in facts.items()):
        facts = with_prompts()
    places = choose_parts(facts, parts=targets, seed=seed, fixed=fixed, pending=pending,
                          training_groups=training_groups, tolerance=balance.tolerance, columns=balance.columns)
    return places, straddling, facts


@dataclass(frozen=True)
class Sorted:
    """Clips sorted by their past: the subset each gets before tiers are filled, the
    transcribed training candidates, and the eligible ones by what the ledger says."""

    subset: dict[str, str]
    items: dict[str, Clip]
    labelled_before: list[str]
    new: list[str]
    reopened: list[str]
    gated_out: int
    lost_transcript: int
    heldout: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))


def _sort_clips(clips: Sequence[Clip], past: Past, sides: Mapping[str, str]) -> Sorted:
    """Each clip's subset before the tiers, and the training candidates by their past."""
    ids = past.ids
    # Held out as the ledger recorded the clip, else as its group's side.
    side_held = np.array([sides[name] == HELDOUT for name in past.group_names], bool)
    heldout = np.where(past.known, past.held, side_held[past.group])
    subset = dict(zip(ids, map((UNLABELLED, HELDOUT).__getitem__, heldout.tolist()), strict=True))
    training = ~heldout
    chosen = list(map(clips.__getitem__, np.flatnonzero(training & past.transcribed).tolist()))
    items = dict(zip(map(_ID, chosen), chosen, strict=True))
    # A labelled clip needs a transcript and must pass the gates (loam validate checks
    # both), so one that lost either moves to unlabelled.
    was_labelled = training & past.labelled
    lost_transcript = int(np.count_nonzero(was_labelled & ~past.transcribed))
    gated_out = int(np.count_nonzero(was_labelled & past.transcribed & ~past.eligible))
    candidate = training & ~past.labelled & past.eligible

    def at(mask: np.ndarray) -> list[str]:
        return list(map(ids.__getitem__, np.flatnonzero(mask).tolist()))

    return Sorted(subset, items, at(was_labelled & past.eligible), at(candidate & ~past.known),
                  at(candidate & past.known), gated_out, lost_transcript, heldout)


def _tier_plans(budgets: list[tuple[str, float]], ledger: Ledger | None,
                labelled_before: Sequence[str]) -> tuple[list[TierPlan], dict[str, str]]:
    """One plan per configured budget, continuing the ledger tier it matches; also
    which ledger tier each budget continues."""
    known = ledger.clips if ledger is not None else {}
    old_budgets = ledger.budgets if ledger is not None else ()
    seconds = {b: parse_duration_s(b) for b in old_budgets} | dict(budgets)
    continues = match_tiers(old_budgets, [b for b, _ in budgets], seconds=seconds)
    plans = []
    for name, budget_s in budgets:
        old = continues.get(name)
        kept = frozenset(cid for cid in labelled_before if old is not None and old in known[cid].tiers)
        plans.append(TierPlan(name, budget_s, kept,
                              may_drop=old is not None and budget_s < seconds[old],
                              may_reopen=old is None or budget_s > seconds[old]))
    return plans, continues


@dataclass(frozen=True)
class Balance:
    """``split.balance_columns``, ``split.balance_tolerance`` and the attributes by speaker id."""

    columns: tuple[str, ...] = ()
    tolerance: float = 0.1
    attributes: Attributes = field(default_factory=dict)


def _codes(values: Sequence[Any]) -> tuple[np.ndarray, list[Any]]:
    """Each value's code, the distinct values numbered in order of first appearance.

    Examples
    --------
    >>> codes, names = _codes(["b", "a", "b"])
    >>> codes.tolist(), names
    ([0, 1, 0], ['b', 'a'])
    """
    # dict.fromkeys and map run in C: no Python call per value.
    index = {v: k for k, v in enumerate(dict.fromkeys(values))}
    return np.fromiter(map(index.__getitem__, values), np.int64, count=len(values)), list(index)


def _sums_by_pair(outer: np.ndarray, inner: np.ndarray, weights: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The sums of ``weights`` by distinct ``(outer, inner)`` code pair: the pairs'
    codes (sorted) and their sums. np.bincount adds each pair's weights one after the
    other in the order given, so a sum is the same float as Python's ``+=`` over them."""
    if not outer.size:
        empty = np.zeros(0, np.int64)
        return empty, empty, np.zeros(0)
    width = int(inner.max()) + 1
    pairs, at = np.unique(outer * width + inner, return_inverse=True)
    sums = np.bincount(at.ravel(), weights=weights, minlength=pairs.size)
    return pairs // width, pairs % width, sums


def group_facts(clips: Sequence[Clip], balance: Balance, past: Past | None = None, *,
                prompts: bool = True) -> dict[str, GroupFacts]:
    """Per group: eligible transcribed seconds, seconds per prompt, and the balance
    attributes of its speaker (the one with the most eligible seconds in the group,
    ties to the smaller id); the groups in order of first appearance in ``clips``.

    Columnar: codes per clip and sums by code, a Python call per distinct prompt text
    only (at 101,000 clips: 0.10 CPU s with a loop over every clip before). ``past``,
    :class:`Past` of the same clips, gives the group codes and eligibility already read.
    Without ``prompts`` every group's prompts are left empty (see :func:`_choose_places`)."""
    if past is not None:
        group, names, eligible = past.group, past.group_names, past.eligible
    else:
        group, names = _codes(list(map(_GROUP, clips)))
        eligible = np.fromiter(map(_ELIGIBLE, clips), bool, count=len(clips))
    picked = np.flatnonzero(eligible)
    chosen = [clips[k] for k in picked.tolist()]
    durations = np.fromiter(map(_DURATION, chosen), np.float64, count=len(chosen))
    where = group[picked]
    # Prompts repeat in a read-speech corpus: each distinct text is keyed once.
    texts, text_names = _codes([c.text["norm_text"] if c.text else None for c in chosen]) if prompts else \
        (np.zeros(len(chosen), np.int64), [None])
    keys = [prompt_key(t) if t is not None else None for t in text_names]
    prompt_names = sorted({k for k in keys if k is not None})
    rank = {k: i for i, k in enumerate(prompt_names)}
    prompt_of = np.array([rank[k] if k is not None else -1 for k in keys], np.int64)[texts] if keys else \
        np.zeros(0, np.int64)
    has = prompt_of >= 0
    prompt_groups, prompt_codes, prompt_sums = _sums_by_pair(where[has], prompt_of[has], durations[has])
    speakers, speaker_names = _codes(list(map(_SPEAKER, chosen)))
    speaker_groups, speaker_codes, speaker_sums = _sums_by_pair(where, speakers, durations)
    order = np.argsort(where, kind="stable")
    cuts = np.searchsorted(where[order], np.arange(len(names) + 1))
    seconds = [math.fsum(durations[order[a:b]].tolist()) for a, b in itertools.pairwise(cuts.tolist())]
    prompts: list[dict[str, float]] = [{} for _ in names]
    # The pairs come sorted by group, then prompt: each group's prompts in sorted order.
    for g, p, s in zip(prompt_groups.tolist(), prompt_codes.tolist(), prompt_sums.tolist(), strict=True):
        prompts[g][prompt_names[p]] = s
    # The main speaker: most eligible seconds, ties to the smaller id; a group without an
    # eligible clip takes its first clip's speaker.
    best: dict[int, tuple[float, str]] = {}
    for g, spk, s in zip(speaker_groups.tolist(), speaker_codes.tolist(), speaker_sums.tolist(), strict=True):
        key = (-s, speaker_names[spk])
        if g not in best or key < best[g]:
            best[g] = key
    firsts = np.unique(group, return_index=True)[1].tolist()
    facts = {}
    for g, name in enumerate(names):
        speaker = best[g][1] if g in best else clips[firsts[g]].speaker
        attrs = balance.attributes.get(speaker, {})
        facts[name] = GroupFacts(seconds[g], prompts[g], {col: attrs.get(col, "") for col in balance.columns})
    return facts


def _clip_parts(past: Past, heldout: np.ndarray, places: Mapping[str, str], configured: Sequence[str]
                ) -> dict[str, str]:
    """Each held-out clip's part: the ledger's when it names a configured one, else the
    part the ledger gives the clip's own base group (its speaker, say), else its group's.

    A new near-duplicate can bind groups the ledger holds in two parts; their earlier
    clips keep their parts, and a new clip follows its own base group, so a speaker
    never gains a second part (the bound group is reported as straddling parts)."""
    rank = {p: k for k, p in enumerate(configured)}
    # Each clip's ledger part as its place in configured, -1 for none or one not configured.
    mine = np.array([rank.get(p, -1) for p in past.part_names], np.int64)[past.part] if past.part_names else \
        np.zeros(0, np.int64)
    # A base group's part: the first in config order that the ledger gives one of its clips.
    base_part = np.full(len(past.base_names), len(configured), np.int64)
    np.minimum.at(base_part, past.base[mine >= 0], mine[mine >= 0])
    base_part[base_part == len(configured)] = -1
    held = np.flatnonzero(heldout)
    pick = np.where(mine[held] >= 0, mine[held], base_part[past.base[held]])
    parts = {}
    for k, p in zip(held.tolist(), pick.tolist(), strict=True):
        if p >= 0:
            parts[past.ids[k]] = configured[p]
        else:
            group_place = places.get(past.group_names[past.group[k]], TRAINING)
            parts[past.ids[k]] = group_place if group_place != TRAINING else configured[0]
    return parts


def _straddling_parts(clips: Sequence[Clip], parts: Mapping[str, str]) -> list[str]:
    """Groups whose held-out clips sit in more than one part (see :func:`_clip_parts`)."""
    spans: dict[str, set[str]] = defaultdict(set)
    for c in clips:
        if c.clip_id in parts:
            spans[c.group].add(parts[c.clip_id])
    return sorted(g for g, found in spans.items() if len(found) > 1)


def _demote(found: Sorted, clips: Sequence[Clip], parts: Mapping[str, str],
            disjoint: set[str]) -> tuple[Sorted, frozenset[str], int]:
    """``split.text_overlap = "demote"``: training candidates reading a prompt that a
    text-disjoint part scores on leave the candidates; also how many were labelled."""
    protected = prompt_set(c.text["norm_text"] for c in clips
                           if c.eligible and c.text and parts.get(c.clip_id) in disjoint)
    by_id = {c.clip_id: c for c in clips}
    demoted = frozenset(cid for cid in found.items
                        if by_id[cid].text and prompt_key(by_id[cid].text["norm_text"]) in protected)
    if not demoted:
        return found, demoted, 0
    kept = [cid for cid in found.labelled_before if cid not in demoted]
    return (replace(found, items={k: v for k, v in found.items.items() if k not in demoted}, labelled_before=kept,
                    new=[cid for cid in found.new if cid not in demoted],
                    reopened=[cid for cid in found.reopened if cid not in demoted]),
            demoted, len(found.labelled_before) - len(kept))


def _unscore(held: Sequence[Clip], labelled: Iterable[Clip], parts: Mapping[str, str],
             disjoint: set[str]) -> frozenset[str]:
    """``split.text_overlap = "unscore"``: the held-out clips of text-disjoint parts whose
    prompt a labelled clip reads."""
    prompts = prompt_set(c.text["norm_text"] for c in labelled if c.text)
    return frozenset(c.clip_id for c in held if parts.get(c.clip_id) in disjoint and c.eligible and c.text
                     and prompt_key(c.text["norm_text"]) in prompts)


def assign(clips: Sequence[Clip], *, ledger: Ledger | None, seed: int, targets: Sequence[PartTarget],
           budgets: list[tuple[str, float]], method: str, text_overlap: str = "unscore",
           balance: Balance | None = None, columns: Columns | None = None) -> Assignment:
    """Places for groups, subsets and parts for clips, tiers for labelled clips (see the
    module docstring). ``columns``: see :meth:`Past.of`."""
    balance = balance or Balance()
    past = Past.of(clips, ledger.clips if ledger is not None else {}, columns)
    facts: Mapping[str, GroupFacts] = group_facts(clips, balance, past, prompts=False)
    places, straddling, facts = _choose_places(past, ledger, facts, seed=seed, targets=targets, balance=balance,
                                               with_prompts=lambda: group_facts(clips, balance, past))
    sides = {g: "training" if place == TRAINING else HELDOUT for g, place in places.items()}
    found = _sort_clips(clips, past, sides)
    parts = _clip_parts(past, found.heldout, places, [t.name for t in targets])
    disjoint = {t.name for t in targets if t.text_disjoint}
    demoted, demoted_labelled = frozenset(), 0
    if text_overlap == "demote":
        found, demoted, demoted_labelled = _demote(found, clips, parts, disjoint)
    plans, continues = _tier_plans(budgets, ledger, found.labelled_before)
    # The clips the tiers may take, as candidates: the unlabelled clips of the ledger
    # only when a budget grew or is new (at 101,000 clips, 30,000 candidates built for
    # nothing cost 0.03 CPU s).
    reopened = found.reopened if any(p.may_reopen for p in plans) else []
    items = {cid: Candidate(cid, c.speaker, c.duration_s, c.plain_phones)
             for cid in (*found.labelled_before, *found.new, *reopened) for c in (found.items[cid],)}
    outcomes = fill_tiers(plans, items=items, labelled_before=found.labelled_before, new=found.new,
                          reopened=reopened, method=method, seed=seed)
    tiers: dict[str, tuple[str, ...]] = {}
    for outcome in outcomes:
        for cid in outcome.clips:
            tiers[cid] = tiers.get(cid, ()) + (outcome.name,)
    subset = dict(found.subset)
    for cid in tiers:
        subset[cid] = LABELLED
    short = any(o.shortfall_s > 0 for o in outcomes)
    waiting = sum(1 for cid in found.reopened if cid not in tiers) if short else 0
    # The held-out clips (each has a part) and the labelled ones (all training candidates)
    # alone, not a pass over every clip.
    held = list(map(clips.__getitem__, np.flatnonzero(found.heldout).tolist()))
    unscored = (_unscore(held, map(found.items.__getitem__, tiers), parts, disjoint) if text_overlap == "unscore"
                else frozenset())
    return Assignment(subset, tiers, sides, outcomes, straddling, continues, found.gated_out, waiting,
                      found.lost_transcript, places=places, parts=parts, unscored=unscored, demoted=demoted,
                      demoted_labelled=demoted_labelled, facts=facts,
                      straddling_parts=_straddling_parts(held, parts), past=past)


# The subset columns copied from the audio row as they are.
_AUDIO_COLUMNS = ("clip_id", "speaker", "audio_path", "audio_sha256", "sample_rate", "num_samples", "duration_s",
                  "source_path", "source_start_s", "source_end_s", "loudness_lufs", "loudness_in_lufs",
                  "speech_ratio", "clipped_fraction")
# The subset columns copied from the transcript row, when the row keeps its transcript.
_TEXT_COLUMNS = ("transcript", "transcript_origin", "norm_text", "phones")


def _finite_column(column: pa.ChunkedArray) -> pa.ChunkedArray:
    """The column with NaN and infinities as nulls (a measure that could not be taken)."""
    return pc.if_else(pc.is_finite(column), column, pa.scalar(None, column.type))


def _subset_table(joined: Joined, columns: Columns, rows: np.ndarray, subset: str, assignment: Assignment, *,
                  keep_text: bool) -> pa.Table:
    """One subset's manifest: the audio and transcript columns taken from the stage's
    Arrow tables by row, the stage's own columns from :class:`Columns` by row (a
    Python value per clip for each took 0.15 against 0.05 CPU s for the three
    manifests of 101,000 clips). A demoted clip (``split.text_overlap = "demote"``)
    loses its transcript whatever ``split.keep_transcripts`` says; an unscored one
    keeps it but is not scorable. ``rows``: the subset's clips, rows of :attr:`Joined.audio`."""
    schema = arrow_schema("subset")
    audio = joined.audio.select([*_AUDIO_COLUMNS, "snr_db", "bandwidth_hz"]).take(rows)
    ids = audio.column("clip_id")
    demoted = _members(ids, assignment.demoted if subset == UNLABELLED else frozenset())
    unscored = _members(ids, assignment.unscored)
    # A row has a transcript row exactly when its clip has a transcript (join_rows).
    found = joined.text_rows[rows]
    carried = (found >= 0) & keep_text & ~demoted
    text = joined.text.select(list(_TEXT_COLUMNS)).take(pa.array(found, pa.int64(), mask=~carried))
    out: dict[str, Any] = {name: audio.column(name) for name in _AUDIO_COLUMNS}
    out.update({name: text.column(name) for name in _TEXT_COLUMNS})
    out.update({name: _finite_column(audio.column(name)) for name in ("snr_db", "bandwidth_hz")})
    partner = columns.partner[rows]
    heldout_untranscribed = np.full(rows.size, subset == HELDOUT) & (found < 0)
    out.update({
        "group": columns.group_names.take(pa.array(columns.group[rows], pa.int64())),
        # One value repeated in C (a Python string per row to convert took 4 of the 18 ms
        # of the unlabelled manifest of the 100,000-source rebuild).
        "subset": pa.repeat(pa.scalar(subset, pa.string()), rows.size),
        "tiers": _shared_lists(list(map(assignment.tiers.get, ids.to_pylist(), repeat(()))),
                               schema.field("tiers").type) if assignment.tiers and subset == LABELLED else
        _empty_lists(rows.size, schema.field("tiers").type),
        "speaking_rate": pa.array(columns.speaking_rate[rows], pa.float64(), mask=~columns.rated[rows]),
        "rate_z": pa.array(columns.rate_z[rows], pa.float64(), mask=~columns.scored[rows]),
        "near_duplicate_of": joined.audio.column("clip_id").take(
            pa.array(np.maximum(partner, 0), pa.int64(), mask=partner < 0)),
        "quality_flags": _row_flags(columns, rows, heldout_untranscribed, unscored, demoted,
                                    schema.field("quality_flags").type),
        # Eligible means transcribed and not held back by a gate; the row must also
        # carry its transcript and phones (unlabelled rows may drop them).
        "scorable": pa.array(carried & columns.eligible[rows] & columns.phoned[rows] & ~unscored, pa.bool_()),
        PART: (pa.array(list(map(assignment.parts.get, ids.to_pylist())), pa.string()) if subset == HELDOUT
               else pa.nulls(rows.size, pa.string())),
    })
    arrays = {f.name: out[f.name].cast(f.type) for f in schema}
    return pa.table(arrays, schema=schema).combine_chunks()


def _members(ids: pa.ChunkedArray, chosen: Collection[str]) -> np.ndarray:
    """Whether each id is one of ``chosen`` (a few clips, often none)."""
    if not chosen:
        return np.zeros(len(ids), bool)
    found = pc.is_in(ids, value_set=pa.array(sorted(chosen), pa.string()))
    return found.to_numpy(zero_copy_only=False).astype(bool)


def _row_flags(columns: Columns, rows: np.ndarray, heldout_untranscribed: np.ndarray, unscored: np.ndarray,
               demoted: np.ndarray, kind: pa.DataType) -> pa.Array:
    """Each row's quality flags in FLAGS order: its clip's own, and those its subset adds.

    A few combinations recur: each is listed once, and the rows take it by index."""
    added = (heldout_untranscribed, unscored, demoted)
    code = columns.flags[rows] * 8
    for bit, mask in enumerate(added):
        code |= mask.astype(np.int64) << bit
    distinct, at = _small_unique(code)
    listed = []
    for c in distinct.tolist():
        mine = set(columns.flag_sets[c >> 3]) | {f for bit, f in enumerate(("heldout_untranscribed", UNSCORED, DEMOTED))
                                                  if c >> bit & 1}
        listed.append([f for f in FLAGS if f in mine])
    return pa.array(listed, kind).take(pa.array(at, pa.int64()))


def _small_unique(codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(codes, return_inverse=True)`` of small non-negative integer codes (a
    few hundred at most), by a count per code rather than a sort.

    Examples
    --------
    >>> distinct, at = _small_unique(np.array([5, 0, 5, 2]))
    >>> distinct.tolist(), at.tolist()
    ([0, 2, 5], [2, 0, 2, 1])
    """
    present = np.bincount(codes) > 0 if codes.size else np.zeros(0, bool)
    rank = np.cumsum(present) - 1
    return np.flatnonzero(present), rank[codes].astype(np.int64, copy=False)


def _empty_lists(count: int, kind: pa.ListType) -> pa.Array:
    """A list column of ``count`` empty lists, from offsets alone.

    Examples
    --------
    >>> _empty_lists(2, pa.list_(pa.string())).to_pylist()
    [[], []]
    """
    return pa.ListArray.from_arrays(pa.array(np.zeros(count + 1, np.int32)), pa.array([], kind.value_type), type=kind)


def _shared_lists(values: list[tuple[str, ...]], kind: pa.DataType) -> pa.Array:
    """A list column of ``values``, of which few are distinct: each distinct tuple is
    converted once and the rows take it by index (converting a Python list per row
    took 0.040 against 0.012 CPU s for the tiers and flags of 101,000 clips)."""
    # dict.fromkeys and map run in C: a generator calling setdefault per row cost twice as much.
    index = {v: k for k, v in enumerate(dict.fromkeys(values))}
    at = np.fromiter(map(index.__getitem__, values), np.int64, count=len(values))
    return pa.array([list(v) for v in index], kind).take(pa.array(at, pa.int64()))


def _hours(seconds: float) -> float:
    return round(seconds / 3600.0, 4)


@dataclass(frozen=True)
class ClipFacts:
    """What the summary counts of some clips (rows of :attr:`Joined.audio`), read from
    :class:`Columns` by row: their durations, the speakers and groups among them (a mask
    over the codes of each), their phones, and which of them have no transcript.

    The summary describes each subset twice (its ``subsets`` and ``sizes`` sections) and
    the corpus as their union: each subset's facts are read once. Arrays by row rather
    than a Python value per clip: for the 101,000 clips of the 100,000-source rebuild the
    three subsets' facts took 0.028 CPU s from Clip records, the summary sections read
    from them and the subsets' clips 0.08 s in all."""

    durations: np.ndarray
    speakers: np.ndarray
    groups: np.ndarray
    phones: frozenset[str]
    untranscribed: np.ndarray

    @classmethod
    def of(cls, columns: Columns, rows: np.ndarray) -> ClipFacts:
        """The facts of the clips at ``rows`` (indices into ``columns``' arrays)."""
        transcribed = columns.transcribed[rows]
        # Only transcribed clips have phones: a third or so of them.
        phones = frozenset().union(*map(columns.plain_phones.__getitem__, rows[transcribed].tolist()))
        return cls(columns.duration_s[rows], _present(columns.speaker[rows], columns.speaker_count),
                   _present(columns.group[rows], len(columns.group_list)), phones, ~transcribed)

    @property
    def seconds(self) -> float:
        # fsum is exact: the same sum whatever the order of the clips.
        return math.fsum(self.durations.tolist())


def _present(codes: np.ndarray, count: int) -> np.ndarray:
    """Which of ``count`` codes occur in ``codes``, a mask (a count per code, in C)."""
    return np.bincount(codes, minlength=count) > 0


def _describe(facts: ClipFacts, inventory: Collection[str]) -> dict[str, Any]:
    phones = facts.phones
    return {
        "clips": int(facts.durations.size),
        "hours": _hours(facts.seconds),
        "speakers": int(np.count_nonzero(facts.speakers)),
        "groups": int(np.count_nonzero(facts.groups)),
        "transcribed_clips": int(facts.durations.size - np.count_nonzero(facts.untranscribed)),
        "phones": len(phones),
        "phone_share": round(len(phones) / len(inventory), 4) if inventory else 0.0,
    }


def _changes(ledger: Ledger | None, assignment: Assignment) -> dict[str, Any]:
    """What moved against the ledger. Every clip of ``assignment.subset`` is present; a
    ledger clip missing there is counted as removed.

    A clip the ledger holds as unlabelled (no tiers) that is unlabelled now changed in
    nothing: with :attr:`Assignment.past` (the clips' ledger records as arrays) only the
    others are visited, those that are new, were held out or labelled, or are now (at
    101,000 clips 0.024 CPU s for a loop over every clip and 0.007 s more for a set of
    the present ids, against 0.005 s)."""
    old = ledger.clips if ledger is not None else {}
    # Tier changes are counted against the tier a ledger tier continues as, so a
    # renamed budget is not reported as every clip leaving and joining.
    renamed = {o: n for n, o in assignment.continues.items()}
    added: Counter[str] = Counter()
    removed: Counter[str] = Counter()
    moved: Counter[str] = Counter()
    joined: Counter[str] = Counter()
    left: Counter[str] = Counter()
    part_moves: Counter[str] = Counter()
    tiers, parts, subset = assignment.tiers, assignment.parts, assignment.subset
    past = assignment.past
    if past is not None and past.ids == list(subset):
        # The clips that may have changed: not unlabelled in the ledger, or not now.
        quiet = past.known & ~past.held & ~past.labelled
        visit = [past.ids[k] for k in np.flatnonzero(~quiet).tolist()]
        visit += [cid for cid in (*tiers, *parts) if (rec := old.get(cid)) is not None and rec.subset == UNLABELLED]
        known = int(np.count_nonzero(past.known))
    else:
        visit, known = list(subset), -1
    # Ledger records are shared (one per distinct row text): each one's tiers in this
    # run's names are worked out once.
    renamed_tiers: dict[int, set[str]] = {}
    for cid in dict.fromkeys(visit):
        now_subset = subset[cid]
        rec = old.get(cid)
        if rec is None:
            added[now_subset] += 1
            continue
        if rec.subset != now_subset:
            moved[f"{rec.subset}->{now_subset}"] += 1
        if rec.subset == HELDOUT:
            part = parts.get(cid, "")
            if rec.part != part:
                # From no part: a version 1 ledger's held-out clip divided among the parts.
                part_moves[f"{rec.part or '(none)'}->{part}"] += 1
        mine = tiers.get(cid, ())
        if not mine and not rec.tiers:  # most clips: in no tier, before or now
            continue
        now = set(mine)
        before = renamed_tiers.get(id(rec))
        if before is None:
            before = renamed_tiers[id(rec)] = {renamed.get(t, t) for t in rec.tiers}
        for t in now - before:
            joined[t] += 1
        for t in before - now:
            left[t] += 1
    if known != len(old):  # some ledger clip is not present (the present ones are distinct)
        for cid in old.keys() - subset.keys():
            removed[old[cid].subset] += 1
    return {
        "added": {s: added[s] for s in SUBSETS},
        "removed": {s: removed[s] for s in SUBSETS},
        "moved": dict(sorted(moved.items())),
        "parts_moved": dict(sorted(part_moves.items())),
        "prompt_demoted": assignment.demoted_labelled,
        "tiers_joined": dict(sorted(joined.items())),
        "tiers_left": dict(sorted(left.items())),
        "renamed_tiers": {n: o for n, o in sorted(assignment.continues.items()) if n != o},
        "straddling_groups": assignment.straddling,
        "straddling_parts_groups": assignment.straddling_parts,
        "gated_out": assignment.gated_out,
        "waiting_unlabelled": assignment.waiting,
        "lost_transcript": assignment.lost_transcript,
    }


def _log_changes(ctx: StageContext, changes: dict[str, Any], ledger_path: str, used: bool) -> None:
    def fmt(d: Mapping[str, int]) -> str:
        return ", ".join(f"{k} {v}" for k, v in d.items()) or "none"

    ctx.log.info("split changes against %s: added (%s); gone, kept in the ledger (%s); moved (%s); "
                 "sources gone %d, returned %d",
                 ledger_path if used else "no ledger", fmt(changes["added"]), fmt(changes["removed"]),
                 fmt(changes["moved"]), changes["gone_sources"], changes["returned_sources"])
    if changes["straddling_groups"]:
        ctx.log.warning("split: %d groups have ledger clips on both sides since new near-duplicates bound them "
                        "(%s); earlier clips keep their subsets and new ones go to held-out; excluding the new copy at "
                        "review (loam review) unbinds them, --fresh regroups",
                        len(changes["straddling_groups"]), ", ".join(changes["straddling_groups"][:5]))
    if changes["straddling_parts_groups"]:
        ctx.log.warning("split: %d held-out groups have clips in two parts since new near-duplicates bound them "
                        "(%s); earlier clips keep their parts and new ones follow their own %s; excluding the new copy "
                        "at review (loam review) unbinds them, --fresh regroups",
                        len(changes["straddling_parts_groups"]), ", ".join(changes["straddling_parts_groups"][:5]),
                        ctx.config.split.group_by)
    if changes["parts_moved"]:
        ctx.log.warning("split: held-out clips given a part (from a version 1 ledger, or a part no longer in "
                        "split.parts): %s", fmt(changes["parts_moved"]))
    if changes["gated_out"]:
        ctx.log.warning("split: %d labelled clips of the ledger now fail a quality gate and moved to "
                        "unlabelled (see their flags)", changes["gated_out"])
    if changes["waiting_unlabelled"]:
        ctx.log.warning("split: %d eligible transcribed clips stay unlabelled as the ledger assigned them, "
                        "while a tier is short of its budget; --fresh or a larger budget takes them",
                        changes["waiting_unlabelled"])
    if changes["lost_transcript"]:
        ctx.log.warning("split: %d labelled clips lost their transcript (rejected by the text stage) and "
                        "moved to unlabelled", changes["lost_transcript"])


def _gate_rejects(clips: Sequence[Clip], cfg: Config, joined: Joined) -> tuple[list[dict[str, Any]], list[Clip]]:
    """Set aside the clips that a gate whose action is "reject" flagged (the first such
    gate names the reason); their reject rows, and the clips kept."""
    qc = cfg.quality
    snr_db, clipped = joined.numbers("snr_db"), joined.numbers("clipped_fraction")
    why = {
        "noisy": lambda c: (f"has an estimated SNR (WADA-SNR) of {float(snr_db[c.row]):.1f} dB, below "
                            f"quality.min_snr_db = {qc.min_snr_db:g}"),
        "clipped": lambda c: (f"comes from a source with {100 * float(clipped[c.row]):.3f}% of its samples at "
                              f"audio.clip_level, above audio.max_clipped_fraction = "
                              f"{100 * cfg.audio.max_clipped_fraction:g}%"),
    }
    rejects = []
    rejected: set[str] = set()
    for gate in gates.rejecting_gates(qc.gate_actions):
        for c in clips:
            if gate in c.flags and c.clip_id not in rejected:
                rejected.add(c.clip_id)
                path = c.source_path
                rejects.append(reject(NAME, path, gate, f"{path}: clip {c.clip_id} {why[gate](c)}; with "
                                      f'quality.{gate}_action = "reject" {gate} clips are set aside', c.clip_id))
    return rejects, [c for c in clips if c.clip_id not in rejected] if rejected else list(clips)


def _heldout_target(ctx: StageContext, kept: Sequence[Clip]) -> tuple[float, float, list[PartTarget]]:
    """The eligible transcribed seconds, the held-out target and each part's; DataError
    when a held-out subset is wanted but fewer than two groups could share the audio."""
    sc = ctx.config.split
    # compress() and map() pick and read the eligible clips in C (no Python call per clip).
    eligible = list(compress(kept, map(_ELIGIBLE, kept)))
    eligible_s = math.fsum(map(_DURATION, eligible))
    specs = [(p.name, p.target, p.text_disjoint) for p in sc.parts]
    if all(p.target.endswith("%") for p in sc.parts):
        targets = part_targets_s(specs, heldout_s=heldout_target_s(sc.heldout, transcribed_s=eligible_s))
    else:  # every part a duration (the config checks): the held-out target is their sum
        targets = part_targets_s(specs, heldout_s=0.0)
    target_s = math.fsum(t.target_s for t in targets)
    eligible_groups = sorted(set(map(_GROUP, eligible)))
    if target_s > 0 and len(eligible_groups) < 2:
        raise _too_few_groups(sc.group_by, eligible_groups)
    if not eligible_groups:
        ctx.log.warning("split: no clip has an eligible transcript; labelled and held-out are empty")
    return eligible_s, target_s, targets


@dataclass(frozen=True)
class LedgerUse:
    """Where the ledger is, how it was found, whether --fresh ignores it, and what it holds."""

    path: Path
    where: str
    fresh: bool
    ledger: Ledger | None


def _check_corpus(ctx: StageContext, ledger: Ledger, path: Path, sources: Collection[str]) -> None:
    """UsageError (exit 2) when the ledger describes another corpus (see
    :func:`pipeline.stages.ledger.shares_corpus`); the ledger is left as it is."""
    if shares_corpus(ledger.sources, sources):
        return
    shared = len(set(ledger.sources) & set(sources))
    raise UsageError(
        f"{path}: this split ledger describes corpus {corpus_id(ledger.sources)} ({len(ledger.sources)} sources), "
        f"but RAW {ctx.raw} is corpus {corpus_id(sources)} ({len(sources)} sources), sharing {shared}; "
        "expected at least half of the smaller set shared. The ledger is unchanged: set split.ledger to "
        "another path for this corpus, or run with --fresh to assign every clip anew and overwrite it"
    )


def _open_ledger(ctx: StageContext, sources: Collection[str]) -> LedgerUse:
    """Find and read the split ledger (unless --fresh), refusing one of another corpus
    and warning when its settings differ."""
    cfg = ctx.config
    ledger_path, where = locate_ledger(cfg, raw=ctx.raw, out=ctx.out)
    if where not in ("split.ledger", "beside the config file"):
        ctx.log.info("split ledger: %s (%s)", ledger_path, where)
    fresh = bool(ctx.options.get("fresh"))
    ledger = None if fresh else read_ledger(ledger_path)
    if fresh:
        ctx.log.info("split: --fresh: ignoring the ledger %s and assigning every clip anew", ledger_path)
    if ledger is not None:
        _check_corpus(ctx, ledger, ledger_path, sources)
        for key, now in (("group_by", cfg.split.group_by), ("seed", str(cfg.seed))):
            if ledger.settings[key] != now:
                ctx.log.warning("split: the ledger was written with %s=%s, the config says %s; earlier "
                                "assignments are kept (--fresh assigns every clip anew)",
                                key, ledger.settings[key], now)
    return LedgerUse(ledger_path, where, fresh, ledger)


def _subset_tables(ctx: StageContext, by_subset: Mapping[str, np.ndarray], assignment: Assignment,
                   joined: Joined, columns: Columns) -> dict[str, tuple[str, pa.Table]]:
    """The subset manifests, checked against their schema before the ledger records them
    (the runner writes them later)."""
    tables = {}
    for s in SUBSETS:
        keep = s != UNLABELLED or ctx.config.split.keep_transcripts
        tables[subset_manifest(s)] = ("subset", _subset_table(joined, columns, by_subset[s], s, assignment,
                                                              keep_text=keep))
    for rel, (schema, table) in tables.items():
        checked_tables.check(schema, table, where=str(ctx.out / rel))  # the runner does not check them again
    return tables


def _log_tiers(ctx: StageContext, assignment: Assignment, kept: Sequence[Clip]) -> list[dict[str, Any]]:
    """Log the clips shrunk budgets dropped and the tiers short of their budget; the shortfalls."""
    # Only a shrunk budget reads the durations (a dict over every clip: 0.01 CPU s at 101,000).
    durations = {c.clip_id: c.duration_s for c in kept} if any(o.dropped for o in assignment.outcomes) else {}
    for outcome in assignment.outcomes:
        if outcome.dropped:
            ctx.log.info("split: budget %s is smaller than the ledger's %s: %d clips (%.1f s) left tier %s, "
                         "the last added first", outcome.name, assignment.continues[outcome.name],
                         len(outcome.dropped), math.fsum(durations[c] for c in outcome.dropped), outcome.name)
    shortfalls = []
    for outcome in assignment.outcomes:
        if outcome.shortfall_s > 0:
            shortfalls.append({"tier": outcome.name, "budget_s": round(outcome.budget_s, 3),
                               "selected_s": round(outcome.total_s, 3), "shortfall_s": round(outcome.shortfall_s, 3)})
            ctx.log.warning("split: tier %s holds %.1f s, %.1f s short of its budget: the training groups "
                            "have no more eligible transcribed clips", outcome.name, outcome.total_s,
                            outcome.shortfall_s)
    return shortfalls


def run(ctx: StageContext) -> StageResult:
    """Group, gate, hold out, fill the tiers and record the ledger (see the module docstring)."""
    # The stage builds a few Python objects per clip (transcript rows, Clip records, the
    # ledger's rows), freed by reference counting; with the cyclic collector on, its
    # passes walk all of them again and again (2.4 of 9.4 CPU s of a rebuild at 233,161
    # clips). Whatever cycles the stage leaves are collected once it has returned.
    collecting = gc.isenabled()
    gc.disable()
    try:
        # The stage's first conversion of Python values to Arrow would import pandas
        # (0.25 CPU s of a rebuild at 233,161 clips) only to ask whether they are pandas ones.
        # The near-duplicate cache is written on a thread of its own (see _run); leaving
        # this block waits for it.
        with pandas_left_unloaded(), ThreadPoolExecutor(1, thread_name_prefix="loam-split-cache") as background:
            return _run(ctx, background)
    finally:
        if collecting:
            gc.enable()


def _run(ctx: StageContext, background: ThreadPoolExecutor) -> StageResult:
    cfg = ctx.config
    sc = cfg.split
    budgets = _budgets(sc.labelled_budgets)
    audio = ctx.inputs["audio"]
    order = clip_order(audio)
    texts = fingerprint_texts(audio.column("fingerprint"))
    keys = cache_keys(audio.column("clip_id").take(order), audio.column("audio_sha256").take(order),
                      np.diff(texts[1])[order.to_numpy()]) if ctx.use_cache else None
    planned = plan_search(ctx, keys, min_similarity=cfg.quality.near_duplicate_min_similarity)
    # The input table keeps the other columns only, so the fingerprint texts' buffers
    # (342 MB at 233,161 clips) are freed once the search no longer needs them.
    ctx.inputs["audio"] = audio = audio.drop_columns(["fingerprint"])
    # The near-duplicate cache is written on a thread, while this one builds the clips
    # and assigns them (0.07 s at 101,000 clips, mostly in Arrow and hashlib, which let
    # go of the interpreter); the stage waits for it before it returns.
    saved: list[Future[None]] = []
    near: Pairs | Callable[[], Pairs]
    search: Begun[Pairs] | None = None
    if planned.earlier is None:
        # A whole search (no cache, or one that cannot serve) runs here, first: in a
        # forked process its working memory came on top of this one's (at 233,161 clips,
        # cold, the machine's peak rose from 1.40 to 1.64-1.86 GB) for 0.1-0.4 s of 10.
        decoded = fingerprints(planned, texts, order.to_numpy())
        del texts
        # Arrow's allocator keeps freed pages (the Parquet read's working buffers among
        # them, 0.8 GB at 233,161 clips); the search allocates through numpy, so hand them back.
        pa.default_memory_pool().release_unused()
        near = search_fingerprints(planned, decoded)
        saved.append(background.submit(save_search, ctx, planned, near, decoded, log=ctx.log))
    else:
        # A search of the clips added since the cached one (with the decoding of their
        # fingerprints) goes on in a forked process while this one joins the rows and
        # reads the ledger: 0.28 s of a rebuild at 101,000 clips, the other core idle
        # meanwhile. For the cache, this one then decodes the added clips' texts again
        # (a few ms), lets the texts go, and the writer joins them to the cached ones.
        held = [texts]
        del texts
        search = begun = begin(searched, planned, held[0], order.to_numpy())

        def near() -> Pairs:
            found = begun.result()
            fresh = uncached(planned, held.pop(), order.to_numpy())
            pa.default_memory_pool().release_unused()  # as above
            saved.append(background.submit(
                lambda: save_search(ctx, planned, found, with_cached(planned, fresh), log=ctx.log)))
            return found
    try:
        joined = join_rows(audio, ctx.inputs["text"], order=order)
        # The present sources, sorted: the next ledger's source rows (a mapping: the
        # ledger's corpus check looks each of its sources up there).
        sources = dict.fromkeys(sorted_source_keys(joined.audio.column("source_id")), "present")
        use = _open_ledger(ctx, sources)
        balance = read_balance(ctx)
        clips, pairs, columns = build_clips(joined, cfg, near=near, unbound=excluded_clips(ctx))
    finally:
        if search is not None:
            search.cancel()
    orphans = joined.orphans
    # Clips excluded at review are set aside first: the reviewer's reason is the one recorded.
    rejects, excluded, review, review_path = split_exclusions(ctx, clips)
    gate_rejects, kept = _gate_rejects([c for c in clips if c.clip_id not in excluded] if excluded else clips, cfg,
                                       joined)
    rejects += gate_rejects
    eligible_s, target_s, targets = _heldout_target(ctx, kept)
    ledger = use.ledger
    # Kept clips are all the clips unless some were set aside: then Past reads its own codes.
    assignment = assign(kept, ledger=ledger, seed=cfg.seed, targets=targets, budgets=budgets,
                        method=sc.selection, text_overlap=sc.text_overlap, balance=balance, columns=columns)

    by_subset = _by_subset(kept, assignment.subset, count=len(clips))
    tables = _subset_tables(ctx, by_subset, assignment, joined, columns)
    shortfalls = _log_tiers(ctx, assignment, kept)

    new_ledger = _next_ledger(ledger, assignment, kept, sources, cfg_settings={
        "group_by": sc.group_by, "seed": str(cfg.seed), "heldout": sc.heldout,
        "budgets": ",".join(b for b, _ in budgets) or "-", "selection": sc.selection,
        "parts": ",".join(f"{p.name}:{p.target}" for p in sc.parts)})
    write_ledger(use.path, new_ledger)
    write_inventory(ctx.out, use.path, subset_phones(tables), boundary=cfg.text.word_boundary,
                    classify=cfg.text.backend != "graphemes")
    changes = _changes(ledger, assignment)
    changes["gone_sources"] = countOf(new_ledger.sources.values(), "gone")
    # A source returns from "gone": none can when the ledger holds none.
    changes["returned_sources"] = countOf(map(ledger.sources.get, sources), "gone") \
        if ledger and "gone" in ledger.sources.values() else 0
    _log_changes(ctx, changes, str(use.path), ledger is not None)

    facts = {s: ClipFacts.of(columns, by_subset[s]) for s in SUBSETS}
    made = {s: tables[SUBSET_PATHS[s]][1] for s in SUBSETS}
    summary = _summary(clips, columns, assignment, pairs, by_subset, made, target_s=target_s,
                       eligible_s=eligible_s, group_by=sc.group_by, orphans=orphans, facts=facts,
                       rejected={f"rejected_{g}": sum(r["reason"] == g for r in rejects)
                                 for g in gates.GATES if "reject" in gates.ACTIONS[g]})
    summary.update(parts_summary(columns, by_subset, made, assignment, targets, balance,
                                 text_overlap=sc.text_overlap, facts=facts))
    _log_parts(ctx, summary)
    summary["changes"] = changes
    summary["shortfalls"] = shortfalls
    summary["review"] = review.summary(review_path)
    log_tally(ctx, NAME, review)
    # Inside OUT the path is given from OUT, so the summary does not change with where OUT is.
    shown = use.path.relative_to(ctx.out) if use.path.is_relative_to(ctx.out) else use.path
    summary["ledger"] = {"path": str(shown), "where": use.where, "read": ledger is not None, "fresh": use.fresh}
    for writing in saved:
        writing.result()  # its error, if any, is the stage's
    return StageResult(manifests=tables, rejects=rejects, summary=summary)


def _subsets_of(subset: Mapping[str, str], ids: list[str]) -> list[str]:
    """``subset[cid]`` for each of ``ids``: the mapping's own values when it lists the
    same ids in the same order (assign lists the kept clips in their order), with no
    lookup per clip.

    Examples
    --------
    >>> _subsets_of({"a": "heldout", "b": "labelled"}, ["a", "b"]), _subsets_of({"b": "x", "a": "y"}, ["a", "b"])
    (['heldout', 'labelled'], ['y', 'x'])
    """
    if isinstance(subset, dict) and len(subset) == len(ids) and list(subset) == ids:
        return list(subset.values())
    return list(map(subset.__getitem__, ids))


def _by_subset(kept: Sequence[Clip], subset: Mapping[str, str], *, count: int) -> dict[str, np.ndarray]:
    """The rows (of :attr:`Joined.audio`, ``count`` of them) of the kept clips of each
    subset, in clip order (as codes and masks: a Python loop appending each clip took
    0.025 CPU s at 101,000 clips). Kept clips are every clip unless some were set aside:
    then their rows are read from them."""
    codes, names = _codes(_subsets_of(subset, list(map(_ID, kept))))
    rows = np.arange(count, dtype=np.int64) if len(kept) == count else \
        np.fromiter(map(_ROW, kept), np.int64, count=len(kept))
    return {s: rows[codes == names.index(s)] if s in names else np.zeros(0, np.int64) for s in SUBSETS}


def _log_parts(ctx: StageContext, summary: Mapping[str, Any]) -> None:
    """Each part's size, what text-disjointness cost, and a part short of its target."""
    for name, p in summary["parts"].items():
        ctx.log.info("split: part %s: %d clips, %.1f s (%.1f s scorable), %d speakers; target %.1f s",
                     name, p["clips"], p["seconds"], p["scorable_seconds"], p["speakers"], p["target_s"])
        if p["target_s"] > 0 and not p["scorable_clips"]:
            ctx.log.warning("split: part %s has no scorable clip (too few groups, or every prompt of it is in "
                            "labelled: see text_overlap in the report)", name)
    cost = summary["text_overlap"]
    if cost["unscored_clips"] or cost["demoted_clips"]:
        ctx.log.info("split: text_overlap = %s: %d held-out clips (%.4f h) not scorable, %d training clips "
                     "(%.4f h) kept out of labelled", cost["mode"], cost["unscored_clips"], cost["unscored_hours"],
                     cost["demoted_clips"], cost["demoted_hours"])
    if not summary["balance"]["met"]:
        ctx.log.warning("split: the held-out parts could not all be balanced within %g of the corpus shares "
                        "(see balance in the report)", summary["balance"]["tolerance"])


def _next_ledger(ledger: Ledger | None, assignment: Assignment, kept: Sequence[Clip], sources: Mapping[str, str],
                 *, cfg_settings: dict[str, str]) -> Ledger:
    """The ledger to write: this run's assignment and sources (``sources``: the present
    ones, each ``present``), and every row of the old ledger whose clip, group or
    source is gone.

    A clip can leave the input for a run (its file removed, the audio stage rejecting
    it, a gate whose action is "reject" setting it aside) and come back later. Its
    group row alone cannot bring it back to its subset: after a ``split.group_by``
    change its new group has no row. So its clip row stays, and the returning clip
    keeps its subset like any clip of the ledger; its source stays as ``gone``.
    """
    groups = dict(assignment.sides)
    parts = {g: place for g, place in assignment.places.items() if place != TRAINING}
    # Records are immutable: one per distinct (subset, tiers, group, part), shared.
    records: dict[tuple[str, tuple[str, ...], str, str], ClipRecord] = {}
    subset, tiers, clip_parts = assignment.subset, assignment.tiers, assignment.parts

    def record(cid: str, g: str, mine: str) -> ClipRecord:
        key = (mine, tiers.get(cid, ()), g, clip_parts.get(cid, ""))
        rec = records.get(key)
        return rec if rec is not None else records.setdefault(key, ClipRecord(*key))

    # An unlabelled clip (most of them) has no tiers and no part: its record depends on
    # its group alone (a call per clip took 0.08 against 0.05 CPU s at 101,000 clips).
    # The clips come in clip_id order, so format_ledger finds its rows in order.
    ids, groups_of = list(map(_ID, kept)), list(map(_GROUP, kept))
    subsets = _subsets_of(subset, ids)
    unlabelled = {g: ClipRecord(UNLABELLED, (), g, "") for g in set(groups_of)}
    # Every clip takes its group's unlabelled record in C; the others are replaced after.
    records_of = list(map(unlabelled.__getitem__, groups_of))
    for k in compress(range(len(ids)), map(UNLABELLED.__ne__, subsets)):
        records_of[k] = record(ids[k], groups_of[k], subsets[k])
    clips = dict(zip(ids, records_of, strict=True))
    known = dict(sources)
    budgets = _budget_names(cfg_settings["budgets"])
    past = assignment.past if assignment.past is not None and assignment.past.ids == ids else None
    if ledger is not None:
        # Keep the side of a group whose clips are all gone, so it returns to the same side.
        current = set(groups) | set(past.base_names if past is not None else map(_BASE, kept))
        groups.update({g: side for g, side in ledger.groups.items() if g not in current})
        parts.update({g: part for g, part in ledger.parts.items() if g not in current})
        # No clip is gone when every ledger clip is among the (distinct) present ones.
        every = past is not None and len(clips) == len(ids) and np.count_nonzero(past.known) == len(ledger.clips)
        for cid in () if every else sorted(ledger.clips.keys() - clips.keys()):  # a set difference in C
            rec = ledger.clips[cid]
            clips[cid] = _gone_record(rec, budgets, assignment.continues)
            # Every clip row names a group that has a row (the parser checks).
            groups.setdefault(rec.group, ledger.groups[rec.group])
            if rec.group in ledger.parts:
                parts.setdefault(rec.group, ledger.parts[rec.group])
        gone = dict.fromkeys(ledger.sources.keys() - known.keys(), "gone")  # a set difference in C
        if gone:  # sorted again only when gone sources joined the sorted present ones
            known = dict(sorted({**known, **gone}.items()))
    return Ledger(cfg_settings, groups, clips, known, parts)


def _budget_names(text: str) -> tuple[str, ...]:
    return () if text == "-" else tuple(text.split(","))


def _gone_record(rec: ClipRecord, budgets: tuple[str, ...], continues: Mapping[str, str]) -> ClipRecord:
    """A gone clip's row in this run's budget names: its tiers as the tiers that continue
    them (nested, so from the smallest on); a labelled clip no tier continues becomes
    unlabelled, and comes back as a candidate."""
    if rec.subset != LABELLED:
        return rec
    kept = [i for i, b in enumerate(budgets) if continues.get(b) in rec.tiers]
    if not kept:
        return ClipRecord(UNLABELLED, (), rec.group)
    return ClipRecord(LABELLED, budgets[kept[0]:], rec.group)


def _flag_counts(columns: Columns, rows: np.ndarray | None, flags: Iterable[str]) -> dict[str, int]:
    """How many of the clips at ``rows`` (None: every clip) carry each of ``flags``: clips
    share one flag set per combination, so the combinations are counted, then the flags."""
    codes = columns.flags if rows is None else columns.flags[rows]
    counts = np.bincount(codes, minlength=len(columns.flag_sets)).tolist()
    return {f: sum(n for found, n in zip(columns.flag_sets, counts, strict=True) if f in found) for f in flags}


def _summary(clips: Sequence[Clip], columns: Columns, assignment: Assignment, pairs: DuplicatePairs,
             by_subset: Mapping[str, np.ndarray], tables: Mapping[str, pa.Table], *, target_s: float,
             eligible_s: float, group_by: str, orphans: int, rejected: dict[str, int],
             facts: Mapping[str, ClipFacts] | None = None) -> dict[str, Any]:
    """The summary's corpus, subset, tier, gate and pair sections. ``clips``: every clip
    (set aside or kept), whose flags the gates count; ``by_subset``: the kept clips'
    rows by subset, whose manifests are ``tables`` (by subset)."""
    # The subsets hold every kept clip once: the corpus's phones, groups and seconds are
    # those of the subsets together.
    facts = facts or {s: ClipFacts.of(columns, by_subset[s]) for s in SUBSETS}
    inventory = frozenset().union(*(facts[s].phones for s in SUBSETS))
    subsets = {s: _describe(facts[s], inventory) for s in SUBSETS}
    held = by_subset[HELDOUT]
    scored = columns.duration_s[held[columns.eligible[held] & ~_members(tables[HELDOUT].column("clip_id"),
                                                                         assignment.unscored)]]
    scored_s = math.fsum(scored.tolist())
    subsets[HELDOUT]["scored_clips"] = int(scored.size)
    subsets[HELDOUT]["scored_hours"] = _hours(scored_s)
    # Every clip of a tier is labelled: look them up among the labelled clips alone.
    labelled = by_subset[LABELLED]
    at = {cid: k for k, cid in enumerate(tables[LABELLED].column("clip_id").to_pylist())} if assignment.outcomes \
        else {}
    tiers = {}
    for outcome in assignment.outcomes:
        mine = labelled[np.fromiter(map(at.__getitem__, outcome.clips), np.int64, count=len(outcome.clips))]
        row = _describe(ClipFacts.of(columns, mine), inventory)
        row.update({"budget_s": round(outcome.budget_s, 3), "selected_s": round(outcome.total_s, 3),
                    "shortfall_s": round(outcome.shortfall_s, 3)})
        tiers[outcome.name] = row
    gate_counts = _flag_counts(columns, None if len(clips) == columns.flags.size else
                               np.fromiter(map(_ROW, clips), np.int64, count=len(clips)), GATES)
    gate_counts.update(rejected)
    notes: dict[str, int] = _flag_counts(columns, np.concatenate([by_subset[s] for s in SUBSETS]),
                                         ("upsampled", "peak_limited", "transcript_rejected"))
    notes["heldout_untranscribed"] = int(np.count_nonzero(facts[HELDOUT].untranscribed))
    notes["orphan_transcripts"] = orphans
    groups = np.logical_or.reduce([facts[s].groups for s in SUBSETS])
    sides = Counter(map(assignment.sides.__getitem__, map(columns.group_list.__getitem__,
                                                         np.flatnonzero(groups).tolist())))
    kept = sum(facts[s].durations.size for s in SUBSETS)
    return {
        "clips": kept,
        # fsum is exact: the subsets' durations one after the other give the same sum.
        "hours": _hours(math.fsum(itertools.chain.from_iterable(facts[s].durations.tolist() for s in SUBSETS))),
        "group_by": group_by,
        "groups": int(np.count_nonzero(groups)),
        "heldout_groups": sides["heldout"],
        "training_groups": sides["training"],
        "eligible_hours": _hours(eligible_s),
        "heldout_target_s": round(target_s, 3),
        "heldout_scored_s": round(scored_s, 3),
        "phone_inventory": len(inventory),
        "subsets": subsets,
        "tiers": tiers,
        "gates": gate_counts,
        "notes": notes,
        "near_duplicate_pairs": _pair_rows(clips, pairs),
    }


def _pair_rows(clips: Sequence[Clip], pairs: DuplicatePairs) -> list[dict[str, Any]]:
    """The summary's row of each duplicate pair. Pairs share few similarities (counts
    of bits over counts of positions): each distinct one is rounded once (45,869 pairs
    took 0.03 CPU s rounding each)."""
    ids = list(map(_ID, clips))
    distinct, at = np.unique(pairs.similarity, return_inverse=True)
    # Similarities are positive (the search keeps those above a positive threshold;
    # identical audio is 1.0), so np.unique merges no 0.0 with a -0.0.
    rounded = [round(sim, 4) for sim in distinct.tolist()]
    return [{"clips": [first, second], "similarity": sim, "identical": same}
            for first, second, sim, same in zip(map(ids.__getitem__, pairs.first.tolist()),
                                                map(ids.__getitem__, pairs.second.tolist()),
                                                map(rounded.__getitem__, at.ravel().tolist()),
                                                pairs.identical.tolist(), strict=True)]


def sizes(facts: ClipFacts, scorable: np.ndarray) -> dict[str, Any]:
    """Clips, hours, scorable clips and hours, speakers and groups, and the untranscribed
    audio among the clips of ``facts`` (in held-out: audio of held-out speakers withheld
    from training); ``scorable`` says which of them are (a mask, in their order)."""
    durations = facts.durations
    seconds = facts.seconds
    scored = math.fsum(durations[scorable].tolist())
    return {
        "clips": int(durations.size), "seconds": round(seconds, 3), "hours": _hours(seconds),
        "scorable_clips": int(np.count_nonzero(scorable)), "scorable_seconds": round(scored, 3),
        "scorable_hours": _hours(scored), "speakers": int(np.count_nonzero(facts.speakers)),
        "groups": int(np.count_nonzero(facts.groups)),
        "untranscribed_clips": int(np.count_nonzero(facts.untranscribed)),
        "untranscribed_seconds": round(math.fsum(durations[facts.untranscribed].tolist()), 3),
    }


def _scorable(table: pa.Table) -> np.ndarray:
    """A subset manifest's scorable column as a mask."""
    return table.column("scorable").to_numpy().astype(bool, copy=False)


def parts_summary(columns: Columns, by_subset: Mapping[str, np.ndarray], tables: Mapping[str, pa.Table],
                  assignment: Assignment, targets: Sequence[PartTarget], balance: Balance, *, text_overlap: str,
                  facts: Mapping[str, ClipFacts] | None = None) -> dict[str, Any]:
    """The summary's ``sizes`` (per subset), ``parts`` (per held-out part, with its target),
    ``text_overlap`` (what keeping test prompts apart cost) and ``balance`` sections, from
    the kept clips' rows by subset and the subset manifests (``tables``, by subset), which
    say which clips are scorable and each held-out clip's part."""
    facts = facts or {s: ClipFacts.of(columns, by_subset[s]) for s in SUBSETS}
    held, held_table = by_subset[HELDOUT], tables[HELDOUT]
    scorable = {s: _scorable(tables[s]) for s in SUBSETS}
    part = held_table.column(PART).to_numpy(zero_copy_only=False) if targets else None
    parts = {}
    for t in targets:
        mine = part == t.name
        parts[t.name] = {**sizes(ClipFacts.of(columns, held[mine]), scorable[HELDOUT][mine]),
                         "target_s": round(t.target_s, 3), "text_disjoint": t.text_disjoint}
    # Most runs unscore and demote nothing: no pass over the clips then.
    unscored = columns.duration_s[held[_members(held_table.column("clip_id"), assignment.unscored)]]
    unlabelled = by_subset[UNLABELLED]
    demoted = columns.duration_s[unlabelled[_members(tables[UNLABELLED].column("clip_id"), assignment.demoted)]]
    cost = {
        "mode": text_overlap,
        "parts": [t.name for t in targets if t.text_disjoint],
        "unscored_clips": int(unscored.size),
        "unscored_hours": _hours(math.fsum(unscored.tolist())),
        "demoted_clips": int(demoted.size),
        "demoted_hours": _hours(math.fsum(demoted.tolist())),
        "demoted_were_labelled": assignment.demoted_labelled,
    }
    rows = balance_table(assignment.facts, assignment.places, parts=[t.name for t in targets],
                         columns=balance.columns, tolerance=balance.tolerance)
    return {
        "sizes": {s: sizes(facts[s], scorable[s]) for s in SUBSETS},
        "parts": parts,
        "text_overlap": cost,
        "balance": {"columns": list(balance.columns), "tolerance": balance.tolerance, "rows": rows,
                    "met": all(r["within"] for r in rows)},
    }


STAGE = Stage(
    name=NAME,
    inputs=("audio", "text"),
    # The labelled manifest is the main one: its metadata marks the stage up to date.
    outputs=tuple(Output(names.subset_manifest(subset), schema="subset") for subset in names.SUBSETS),
    # audio for audio.max_clipped_fraction, the threshold of the clipped gate.
    config_sections=("split", "quality", "audio"),
    run=run,
    # The ledger is an input the stage rewrites itself: the runner hashes it after the
    # run, so a rerun with nothing changed is reused, and --fresh always runs the stage.
    inputs_after_run=True,
    run_when_options=("fresh",),
    extra_inputs=extra_inputs,
    written_files=lambda out, table: [INVENTORY],
    reuse_note=reuse_note,
)
