"""The split ledger: every group's side and every clip's subset, as a sorted TSV.

The ledger is what makes a rebuild stable: the split stage reads it before
assigning anything and writes it after. It is meant to be committed beside the
corpus config, so its format is plain text that diffs well::

    # loam split ledger v2<TAB>group_by=speaker<TAB>seed=7<TAB>heldout=10%<TAB>budgets=10m,1h<TAB>selection=coverage<TAB>parts=dev:50%,test:50%
    clip<TAB>alder_01-0123456789<TAB>labelled<TAB>10m,1h<TAB>alder<TAB>-
    clip<TAB>wren_02-abcdef0123<TAB>heldout<TAB>-<TAB>wren<TAB>test
    group<TAB>alder<TAB>training<TAB>-
    group<TAB>wren<TAB>heldout<TAB>test
    source<TAB>0123456789<TAB>present
    source<TAB>abcdef0123<TAB>gone

The header records the settings the assignment was made with (budgets smallest
first). Rows are sorted by kind, then id. A clip row gives its subset
(``labelled``, ``unlabelled`` or ``heldout``), its labelled tiers
(comma-separated, ``-`` for none), its group and its held-out part (``-`` outside
held-out); a group row gives its side (``heldout`` or ``training``) and its part. A group row is kept after the group's clips have
gone, so a speaker who comes back returns to the same side; so is the row of a
clip that has gone, so the clip comes back to its subset even under another
``group_by``.

A source row names a source file by its content (the ten hex digits of its SHA-256
that end its ``source_id``) and says whether it was ``present`` at the last run or
``gone`` since. The source rows are the ledger's corpus identity: a rebuild is
accepted when the corpus shares at least half of the smaller of the two source sets
(see :func:`check_corpus`), whatever the folder is called or where it moved.

Version 1 ledgers (written before held-out parts existed: no ``parts`` setting, clip
rows of five fields, group rows of three) are read as they are, every held-out
group and clip without a part (``""``); the split stage then divides the held-out
groups among the configured parts without moving anything between held-out and
training, and writes version 2. A held-out row may say ``-`` in version 2 too: a
group gone since version 1 whose part is decided when it returns.

This module knows the format and where the file lives; what a rebuild does with
it is in :mod:`pipeline.stages.split`.
"""

from __future__ import annotations

import hashlib
import os
import re
from collections.abc import Iterable, Mapping
from collections.abc import Set as AbstractSet
from dataclasses import dataclass, field
from operator import countOf
from pathlib import Path
from typing import TypeVar

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv

from pipeline.core.config import Config
from pipeline.core.errors import UsageError
from pipeline.core.fsio import write_text_atomic
from pipeline.core.names import LABELLED, LEDGER_IN_OUT, SUBSETS
from pipeline.stages.paths import is_inside

T = TypeVar("T")
MAGIC = "# loam split ledger v2"
MAGIC_V1 = "# loam split ledger v1"
SETTING_KEYS = ("group_by", "seed", "heldout", "budgets", "selection", "parts")
SETTING_KEYS_V1 = SETTING_KEYS[:-1]
_PART = re.compile(r"^[a-z][a-z0-9_]{0,31}$")
SIDES = ("heldout", "training")
SOURCE_STATES = ("present", "gone")
_SOURCE_KEY = re.compile(r"^[0-9a-f]{10}$")
# One whole group row (multi-line mode: "^" starts any line), for the reading of a
# well-formed ledger (_Parser.parse_plain): a group's fields after "group".
_GROUP_ROW = re.compile(r"^group\t([^\n]*)\n", re.M)
NO_TIERS = "-"
_BUDGET = re.compile(r"^[0-9]+(\.[0-9]+)?(s|m|h)$")
_HEADER_EXAMPLE = f"{MAGIC}<TAB>group_by=...<TAB>seed=...<TAB>heldout=...<TAB>budgets=...<TAB>selection=...<TAB>parts=..."


@dataclass(frozen=True)
class ClipRecord:
    """One clip's assignment: its subset, its labelled tiers (smallest first), its group,
    and its held-out part ("" outside held-out, or not yet decided)."""

    subset: str
    tiers: tuple[str, ...]
    group: str
    part: str = ""


def source_key(source_id: str) -> str:
    """The content part of a ``source_id``: the ten hex digits after its last hyphen
    (ingest writes the start of the file's SHA-256 there). An id of another shape
    (hand-made manifests) is keyed by the start of its own SHA-256 instead.

    Examples
    --------
    >>> source_key("alder_01-0123456789")
    '0123456789'
    >>> len(source_key("no-hash-here"))
    10
    """
    tail = source_id.rsplit("-", 1)[-1]
    if _SOURCE_KEY.match(tail):
        return tail
    return hashlib.sha256(source_id.encode("utf-8", "surrogateescape")).hexdigest()[:10]


def source_keys(source_ids: pa.Array | pa.ChunkedArray) -> set[str]:
    """:func:`source_key` of each id, as a set (see :func:`sorted_source_keys`).

    Examples
    --------
    >>> sorted(source_keys(pa.array(["alder_01-0123456789", "abcdef0123", "alder_01-0123456789"])))
    ['0123456789', 'abcdef0123']
    """
    return set(sorted_source_keys(source_ids))


def sorted_source_keys(source_ids: pa.Array | pa.ChunkedArray) -> list[str]:
    """:func:`source_key` of each id, distinct and sorted: the ids ingest writes are
    keyed and sorted as numbers (ten hex digits are a 40-bit number, in the same order
    as their text), any other id goes through :func:`source_key` itself.

    At 101,000 ids: 0.06 CPU s one :func:`source_key` call each and 0.04 s more to sort
    the strings; in Arrow (a regular expression, then sorting the strings) 0.030 s; as
    numbers 0.009 s.

    Examples
    --------
    >>> sorted_source_keys(pa.array(["alder_01-0123456789", "abcdef0123", "alder_01-0123456789"]))
    ['0123456789', 'abcdef0123']
    """
    ids = source_ids.combine_chunks() if isinstance(source_ids, pa.ChunkedArray) else source_ids
    ids = ids.cast(pa.binary())
    usual = _usual_keys(ids)
    tails = pc.binary_slice(ids.filter(usual), -10)
    # Every usual tail is ten bytes: the data buffer from the first offset holds them one after the other.
    count = len(tails)
    start = int(np.frombuffer(tails.buffers()[1], np.int32, 1, tails.offset * 4)[0]) if count else 0
    digits = np.frombuffer(tails.buffers()[2], np.uint8, 10 * count, start).reshape(count, 10) if count else \
        np.zeros((0, 10), np.uint8)
    values = np.zeros(count, np.uint64)
    for k in range(10):
        values = (values << np.uint64(4)) | _HEX_VALUE[digits[:, k]]
    order = np.argsort(values)
    ordered = values[order]
    # One row of each distinct value (equal values are equal keys).
    at = order[np.concatenate(([True], ordered[1:] != ordered[:-1]))] if count else order
    found = tails.take(pa.array(at)).cast(pa.string()).to_pylist()
    others = ids.filter(pc.invert(usual)).cast(pa.string()).to_pylist()
    if not others:
        return found
    return sorted(set(found).union(map(source_key, others)))


# Each byte's value as a hex digit (lower-case only, as ingest writes them); 16 for any other.
_HEX_VALUE = np.full(256, 16, np.uint64)
_HEX_VALUE[np.frombuffer(b"0123456789abcdef", np.uint8)] = np.arange(16, dtype=np.uint64)


def _usual_keys(ids: pa.BinaryArray) -> pa.BooleanArray:
    """Whether each id (as bytes) ends in ten lower-case hex digits, after a hyphen or
    alone: the ids whose :func:`source_key` is their last ten characters. A null is not,
    nor an id ending in a newline (Python's ``$`` matches before it: :func:`source_key`
    decides).

    Examples
    --------
    >>> _usual_keys(pa.array([b"a-0123456789", b"0123456789", b"a0123456789", b"a-012345678g", None])).to_pylist()
    [True, True, False, False, False]
    """
    count = len(ids)
    data = np.frombuffer(ids.buffers()[2], np.uint8) if count and ids.buffers()[2] is not None else None
    if data is None or not data.size:  # no id, or every one empty
        return pa.array(np.zeros(count, bool), pa.bool_())
    offsets = np.frombuffer(ids.buffers()[1], np.int32, count + 1, ids.offset * 4).astype(np.int64)
    ends, lengths = offsets[1:], np.diff(offsets)
    ok = lengths >= 10
    # An id already failed reads byte 0 instead of its own (a short one would read outside itself).
    for back in range(1, 11):
        ok &= _HEX_VALUE[data[np.where(ok, ends - back, 0)]] < 16
    ok &= (lengths == 10) | (data[np.where(lengths >= 11, ends - 11, 0)] == ord("-"))
    if ids.null_count:
        ok &= ids.is_valid().to_numpy(zero_copy_only=False)
    return pa.array(ok, pa.bool_())


def corpus_id(keys: Iterable[str]) -> str:
    """A short name for a set of source keys: the first 12 hex digits of the SHA-256 of
    the sorted keys, one per line.

    Examples
    --------
    >>> corpus_id(["b", "a"]) == corpus_id(["a", "b"])
    True
    """
    return hashlib.sha256("\n".join(sorted(set(keys))).encode("utf-8")).hexdigest()[:12]


def shares_corpus(recorded: Iterable[str], current: Iterable[str]) -> bool:
    """Whether a ledger recording ``recorded`` sources describes a corpus of ``current`` ones.

    Accepted when either set is empty (a ledger written before sources were recorded,
    or a run with no clips) or when the shared sources are at least half of the smaller
    set: audio arriving or going keeps a corpus, another dump shares nothing or little.

    Examples
    --------
    >>> shares_corpus({"a", "b"}, {"a", "b", "c", "d", "e"})
    True
    >>> shares_corpus({"a", "b", "c"}, {"c", "d", "e"})
    False
    >>> shares_corpus({"a": "present", "b": "gone"}, ["b", "b", "c"])
    True
    """
    # A mapping or a set is taken as it is: the shared ones are counted by a lookup each,
    # in C (two sets of 101,000 sources and their intersection took 0.013 CPU s, a
    # lookup each 0.003 s).
    old = recorded if isinstance(recorded, Mapping | AbstractSet) else set(recorded)
    new = current if isinstance(current, Mapping | AbstractSet) else set(current)
    if not old or not new:
        return True
    return 2 * countOf(map(old.__contains__, new), True) >= min(len(old), len(new))


@dataclass(frozen=True)
class Ledger:
    """A whole ledger: the header settings, group sides and clip assignments.

    ``settings`` holds the header's values as text (``budgets`` comma-separated,
    smallest first, or ``-``); ``groups`` maps a group id to ``heldout`` or
    ``training``; ``clips`` maps a clip id to its :class:`ClipRecord`; ``sources``
    maps a source key (:func:`source_key`) to ``present`` or ``gone``; ``parts`` maps
    a held-out group to its part (a group missing there has none decided yet).
    """

    settings: Mapping[str, str]
    groups: Mapping[str, str] = field(default_factory=dict)
    clips: Mapping[str, ClipRecord] = field(default_factory=dict)
    sources: Mapping[str, str] = field(default_factory=dict)
    parts: Mapping[str, str] = field(default_factory=dict)

    @property
    def budgets(self) -> tuple[str, ...]:
        """The labelled budgets the ledger was written with, smallest first."""
        return _split_list(self.settings.get("budgets", NO_TIERS))


def _split_list(text: str) -> tuple[str, ...]:
    return () if text == NO_TIERS else tuple(text.split(","))


def _join_list(items: tuple[str, ...] | list[str]) -> str:
    return ",".join(items) if items else NO_TIERS


def format_ledger(ledger: Ledger) -> str:
    """The ledger as TSV text: the header line, then rows sorted by kind and id.

    Parameters
    ----------
    ledger : Ledger
        Settings must hold every key of ``SETTING_KEYS``.

    Returns
    -------
    str
        UTF-8-ready text ending in a newline.

    Examples
    --------
    >>> led = Ledger({"group_by": "speaker", "seed": "7", "heldout": "10%", "budgets": "1m",
    ...               "selection": "coverage", "parts": "dev:50%,test:50%"}, {"wren": "heldout"},
    ...              {"wren_01-0123456789": ClipRecord("heldout", (), "wren", "test")}, parts={"wren": "test"})
    >>> print(format_ledger(led), end="")  # doctest: +NORMALIZE_WHITESPACE
    # loam split ledger v2	group_by=speaker	seed=7	heldout=10%	budgets=1m	selection=coverage	parts=dev:50%,test:50%
    clip	wren_01-0123456789	heldout	-	wren	test
    group	wren	heldout	test
    """
    missing = [k for k in SETTING_KEYS if k not in ledger.settings]
    if missing:
        raise ValueError(f"ledger settings lack {', '.join(missing)}")
    header = "\t".join([MAGIC] + [f"{k}={ledger.settings[k]}" for k in SETTING_KEYS])
    # Rows sorted by kind ("clip" < "group" < "source") and then id: each kind's ids
    # sorted on their own. Records are shared (one per distinct row text), so each
    # one's fields are formatted once (at 235,438 clips: 0.34 against 0.13 CPU s).
    clips, tails = ledger.clips, {}
    for rec in {id(rec): rec for rec in clips.values()}.values():
        tails[id(rec)] = f"{rec.subset}\t{_join_list(rec.tiers)}\t{rec.group}\t{rec.part or NO_TIERS}"
    rows = [header]
    rows += [f"clip\t{cid}\t{tails[id(rec)]}" for cid, rec in _sorted_items(clips)]
    rows += [f"group\t{gid}\t{side}\t{ledger.parts.get(gid) or NO_TIERS}" for gid, side in _sorted_items(ledger.groups)]
    rows += [f"source\t{key}\t{state}" for key, state in _sorted_items(ledger.sources)]
    return "\n".join(rows) + "\n"


def _sorted_items(mapping: Mapping[str, T]) -> Iterable[tuple[str, T]]:
    """The items of ``mapping`` sorted by key. A mapping that holds them in that order
    already (a ledger read from its file; the split stage writes its next one in clip
    order) gives its own items, with no lookup per key: at 101,000 clips and sources the
    whole text took 0.044 against 0.069 CPU s.

    Examples
    --------
    >>> list(_sorted_items({"b": 1, "a": 2})), list(_sorted_items({"a": 2, "b": 1}))
    ([('a', 2), ('b', 1)], [('a', 2), ('b', 1)])
    """
    keys = sorted(mapping)
    return mapping.items() if keys == list(mapping) else zip(keys, map(mapping.__getitem__, keys), strict=True)


class _Parser:
    """Line-by-line reader that names the file and line of the first problem."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.v1 = False

    def fail(self, line_no: int, found: str, expected: str) -> UsageError:
        shown = found if len(found) <= 80 else found[:77] + "..."
        return UsageError(
            f"{self.source}: line {line_no}: found {shown!r}; expected {expected} "
            "(fix the line, or run with --fresh to ignore the ledger and assign every clip anew)"
        )

    def header(self, line: str) -> dict[str, str]:
        fields = line.split("\t")
        if fields[0] not in (MAGIC, MAGIC_V1):
            raise self.fail(1, line, f"the header line {_HEADER_EXAMPLE!r}")
        self.v1 = fields[0] == MAGIC_V1
        keys = SETTING_KEYS_V1 if self.v1 else SETTING_KEYS
        settings: dict[str, str] = {}
        for item in fields[1:]:
            key, sep, value = item.partition("=")
            if not sep or key not in keys or key in settings or not value:
                raise self.fail(1, item, f"one of each setting {', '.join(k + '=VALUE' for k in keys)}")
            settings[key] = value
        missing = [k for k in keys if k not in settings]
        if missing:
            raise self.fail(1, line, f"a header with {', '.join(k + '=VALUE' for k in missing)}")
        for budget in _split_list(settings["budgets"]):
            if not _BUDGET.match(budget):
                raise self.fail(1, settings["budgets"], "budgets=- or comma-separated durations such as 10m,1h")
        settings.setdefault("parts", NO_TIERS)  # version 1: written before held-out parts
        return settings

    def part(self, line_no: int, text: str, side: str) -> str:
        """A row's part field: a part name for a held-out row (or ``-``, not yet decided),
        ``-`` for any other."""
        if text == NO_TIERS:
            return ""
        if side != "heldout":
            raise self.fail(line_no, text, f"'-' as the part of a {side} row (only held-out rows have parts)")
        if not _PART.match(text):
            raise self.fail(line_no, text, "a part name (lower-case letters, digits, '_') or '-'")
        return text

    def parse(self, text: str) -> Ledger:
        if not text:
            raise self.fail(1, "", f"the header line {_HEADER_EXAMPLE!r}")
        first, _, body = text.partition("\n")
        settings = self.header(first.rstrip("\r"))
        fast = self.parse_plain(body, settings) if "\r" not in text else None
        if fast is not None:
            return fast
        lines = text.split("\n")
        if lines[-1] == "":
            lines.pop()
        budgets = _split_list(settings["budgets"])
        groups: dict[str, str] = {}
        parts: dict[str, str] = {}
        clips: dict[str, ClipRecord] = {}
        extra = 0 if self.v1 else 1  # version 2 adds the part to clip and group rows
        clip_lines: dict[str, int] = {}
        sources: dict[str, str] = {}
        # One record per distinct (subset, tiers, group, part) text, checked once and
        # shared: a corpus has few groups and tiers, and a record is immutable.
        records: dict[tuple[str, ...], ClipRecord] = {}
        for line_no, raw_line in enumerate(lines[1:], start=2):
            line = raw_line.rstrip("\r")
            if not line.strip():
                continue
            fields = line.split("\t")
            kind = fields[0]
            if kind == "group":
                if len(fields) != 3 + extra or not fields[1]:
                    raise self.fail(line_no, line, "'group<TAB>id<TAB>side<TAB>part' (4 tab-separated fields)"
                                    if extra else "'group<TAB>id<TAB>side' (3 tab-separated fields)")
                if fields[2] not in SIDES:
                    raise self.fail(line_no, fields[2], "a side: heldout or training")
                if fields[1] in groups:
                    raise self.fail(line_no, fields[1], "each group id once")
                groups[fields[1]] = fields[2]
                part = self.part(line_no, fields[3], fields[2]) if extra else ""
                if part:
                    parts[fields[1]] = part
            elif kind == "clip":
                if len(fields) != 5 + extra or not fields[1] or not fields[4]:
                    raise self.fail(line_no, line, "'clip<TAB>clip_id<TAB>subset<TAB>tiers<TAB>group<TAB>part' "
                                    "(6 tab-separated fields)" if extra else
                                    "'clip<TAB>clip_id<TAB>subset<TAB>tiers<TAB>group' (5 tab-separated fields)")
                cid, subset, tier_text, group = fields[1:5]
                if subset not in SUBSETS:
                    raise self.fail(line_no, subset, "a subset: labelled, unlabelled or heldout")
                if cid in clips:
                    raise self.fail(line_no, cid, "each clip id once")
                key = tuple(fields[2:])
                rec = records.get(key)
                if rec is None:
                    tiers = self.tiers(line_no, tier_text, subset, budgets)
                    part = self.part(line_no, fields[5], subset) if extra else ""
                    rec = records[key] = ClipRecord(subset, tiers, group, part)
                clips[cid] = rec
                clip_lines[cid] = line_no
            elif kind == "source":
                if len(fields) != 3 or not _SOURCE_KEY.match(fields[1]) or fields[2] not in SOURCE_STATES:
                    raise self.fail(line_no, line, "'source<TAB>ten hex digits<TAB>present or gone'")
                if fields[1] in sources:
                    raise self.fail(line_no, fields[1], "each source once")
                sources[fields[1]] = fields[2]
            else:
                raise self.fail(line_no, kind, "a row starting with 'clip', 'group' or 'source'")
        for cid, rec in clips.items():
            if rec.group not in groups:
                raise self.fail(clip_lines[cid], rec.group, "a group that has its own 'group' row")
        return Ledger(settings, groups, clips, sources, parts)

    def parse_plain(self, body: str, settings: dict[str, str]) -> Ledger | None:
        """The rows of a well-formed ledger (``body``: the text after the header line)
        read a kind of row at a time, or None at anything unusual (a blank line, a row
        that fails a check, no final newline), which :meth:`parse` then reads line by
        line to name the first problem.

        The clip and source rows (all but a few of them) are read as tab-separated
        columns by Arrow's reader, the group rows by a regular expression. Each check of
        :meth:`parse` holds here too: the fields of a clip row after its id are checked
        once per distinct text (a corpus has few groups and tiers). Every row read is one
        whole line, so the rows of the three kinds cover the body when they add up to
        its lines. At 100,000 clips and sources: 0.03 against 0.10 CPU s with a regular
        expression per kind (best of 7, load 3.5)."""
        if body and not body.endswith("\n"):
            return None
        # The rows come sorted by kind (format_ledger): each kind is read from its own
        # section only. A row out of that order fails its section's checks.
        source_at = _first_row(body, "source\t")
        group_at = min(_first_row(body, "group\t"), source_at)
        extra = 0 if self.v1 else 1
        clip_rows = _columns(body[:group_at], "clip", 5 + extra)
        group_rows = _GROUP_ROW.findall(body, group_at, source_at)
        source_rows = _columns(body[source_at:], "source", 3)
        if clip_rows is None or source_rows is None:
            return None
        if clip_rows.num_rows + len(group_rows) + source_rows.num_rows != body.count("\n"):
            return None
        groups = self.plain_groups(group_rows)
        if groups is None:
            return None
        groups, parts = groups
        budgets = _split_list(settings["budgets"])
        ids = clip_rows.column(1)
        # Each row's fields after its id as one text, numbered by distinct text.
        tails = pc.binary_join_element_wise(*clip_rows.columns[2:], "\t").dictionary_encode().combine_chunks() \
            if clip_rows.num_rows else pa.array([], pa.dictionary(pa.int32(), pa.string()))
        records = []
        for tail in tails.dictionary.to_pylist():
            rec = self.plain_record(tail, extra, budgets)
            if rec is None or rec.group not in groups:
                return None
            records.append(rec)
        if pc.any(pc.equal(pc.utf8_length(ids), 0)).as_py():
            return None
        clips = dict(zip(ids.to_pylist(), map(records.__getitem__, tails.indices.to_numpy().tolist()), strict=True))
        keys, states = source_rows.column(1), source_rows.column(2).combine_chunks().dictionary_encode()
        if source_rows.num_rows and not (pc.all(pc.match_substring_regex(keys, _SOURCE_KEY.pattern)).as_py()
                                         and set(states.dictionary.to_pylist()) <= set(SOURCE_STATES)):
            return None
        # A state per distinct text (two at most), not a Python string per row.
        sources = dict(zip(keys.to_pylist(), map(states.dictionary.to_pylist().__getitem__,
                                                 states.indices.to_numpy().tolist()), strict=True))
        if len(clips) != clip_rows.num_rows or len(sources) != source_rows.num_rows:
            return None
        return Ledger(settings, groups, clips, sources, parts)

    def plain_groups(self, rows: list[str]) -> tuple[dict[str, str], dict[str, str]] | None:
        """The sides and parts of the group rows' fields after ``group``, or None when
        one fails a check or a group id comes twice."""
        extra = 0 if self.v1 else 1
        groups: dict[str, str] = {}
        parts: dict[str, str] = {}
        for row in rows:
            fields = row.split("\t")
            if len(fields) != 2 + extra or not fields[0] or fields[1] not in SIDES:
                return None
            part = fields[2] if extra else NO_TIERS
            if part != NO_TIERS and (fields[1] != "heldout" or not _PART.match(part)):
                return None
            groups[fields[0]] = fields[1]
            if part != NO_TIERS:
                parts[fields[0]] = part
        return (groups, parts) if len(groups) == len(rows) else None

    def plain_record(self, tail: str, extra: int, budgets: tuple[str, ...]) -> ClipRecord | None:
        """The record of a clip row's fields after its id, or None when they fail a check."""
        fields = tail.split("\t")  # subset, tiers, group and (version 2) part
        if len(fields) != 3 + extra or not fields[2] or fields[0] not in SUBSETS:
            return None
        subset, tier_text, group = fields[:3]
        try:
            tiers = self.tiers(0, tier_text, subset, budgets)
            part = self.part(0, fields[3], subset) if extra else ""
        except UsageError:
            return None
        return ClipRecord(subset, tiers, group, part)

    def tiers(self, line_no: int, text: str, subset: str, budgets: tuple[str, ...]) -> tuple[str, ...]:
        tiers = _split_list(text)
        if subset != LABELLED:
            if tiers:
                raise self.fail(line_no, text, f"'-' for a {subset} clip (only labelled clips have tiers)")
            return ()
        if not tiers:
            raise self.fail(line_no, text, "the tiers of a labelled clip, such as 10m,1h")
        # Tiers are nested, so a labelled clip belongs to a run of the largest budgets.
        if tiers != budgets[len(budgets) - len(tiers):]:
            raise self.fail(line_no, text, f"the largest budgets of the header ({_join_list(budgets)}), "
                                           "smallest first, as tiers are nested")
        return tiers


def _first_row(body: str, prefix: str) -> int:
    """Where the first line of ``body`` starting with ``prefix`` starts; ``len(body)`` when none.

    Examples
    --------
    >>> _first_row("clip\\ta\\ngroup\\tg\\n", "group\\t"), _first_row("clip\\ta\\n", "group\\t")
    (7, 7)
    """
    if body.startswith(prefix):
        return 0
    at = body.find("\n" + prefix)
    return at + 1 if at >= 0 else len(body)


def _columns(text: str, kind: str, count: int) -> pa.Table | None:
    """The tab-separated rows of ``text`` as ``count`` string columns (none quoted,
    escaped or null), or None when a row has another number of fields or does not
    start with ``kind``.

    Examples
    --------
    >>> _columns('clip\\ta"b\\tx\\n', "clip", 3).column(1).to_pylist()
    ['a"b']
    >>> _columns("clip\\ta\\n", "clip", 3) is None
    True
    """
    names = [f"f{k}" for k in range(count)]
    if not text:
        return pa.table({name: pa.array([], pa.string()) for name in names})
    try:
        table = pa_csv.read_csv(
            pa.py_buffer(text.encode("utf-8")),
            read_options=pa_csv.ReadOptions(column_names=names, use_threads=False),
            parse_options=pa_csv.ParseOptions(delimiter="\t", quote_char=False, double_quote=False,
                                              escape_char=False, newlines_in_values=False),
            convert_options=pa_csv.ConvertOptions(column_types=dict.fromkeys(names, pa.string()),
                                                  strings_can_be_null=False, quoted_strings_can_be_null=False))
    except pa.ArrowInvalid:
        return None
    table = table.combine_chunks()
    return table if pc.all(pc.equal(table.column(0), kind)).as_py() else None


def parse_ledger(text: str, *, source: str) -> Ledger:
    """Parse ledger text; a malformed line is a ``UsageError`` naming ``source`` and the line.

    Parameters
    ----------
    text : str
        The file's contents. Blank lines are ignored; CRLF line ends are accepted.
    source : str
        Where the text came from, for messages.

    Returns
    -------
    Ledger

    Examples
    --------
    >>> text = ("# loam split ledger v2\\tgroup_by=clip\\tseed=0\\theldout=1m\\tbudgets=-\\t"
    ...         "selection=random\\tparts=test:1m\\ngroup\\tg\\ttraining\\t-\\ngroup\\th\\theldout\\ttest\\n")
    >>> led = parse_ledger(text, source="x.tsv")
    >>> led.groups, led.parts
    ({'g': 'training', 'h': 'heldout'}, {'h': 'test'})
    """
    return _Parser(source).parse(text)


def read_ledger(path: Path) -> Ledger | None:
    """The ledger at ``path``, or None when there is no file."""
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise UsageError(f"{path}: cannot read the split ledger: {exc.strerror}") from exc
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise UsageError(f"{path}: line {line}: found bytes that are not UTF-8; expected UTF-8 text") from exc
    return parse_ledger(text, source=str(path))


def write_ledger(path: Path, ledger: Ledger) -> None:
    """Write the ledger atomically (a reader sees the old file or the whole new one)."""
    write_text_atomic(path, format_ledger(ledger))


def _has_config_file(config: Config) -> bool:
    # build_config and load_config name a missing file "<defaults>", "<config>" or "".
    source = config.source
    return bool(source) and not (source.startswith("<") and source.endswith(">"))


def locate_ledger(config: Config, *, raw: Path, out: Path) -> tuple[Path, str]:
    """Where the ledger lives, and a short phrase saying why.

    ``split.ledger`` when set (relative to the config file's folder). Otherwise
    ``<config stem>.ledger.tsv`` beside the config file when the config sits with the
    corpus project (its folder holds RAW or OUT), so the ledger is committed with the
    config; else ``OUT/ledger.tsv``, so a config shared by several dumps never hands
    one corpus's ledger to another. RAW is never written to: when the place beside
    the config is inside RAW the ledger goes to ``OUT/ledger.tsv``, and a configured
    path inside RAW is a ``UsageError``.

    Parameters
    ----------
    config : Config
    raw, out : Path
        The run's raw dump and output folder.

    Returns
    -------
    (Path, str)
        The ledger path and the reason for it (for the log).
    """
    if config.split.ledger:
        path = config.resolve_path(config.split.ledger)
        if is_inside(path, folder=raw):
            raise UsageError(
                f"{config.source or '<config>'}: key 'split.ledger' has value {config.split.ledger!r}, "
                f"which resolves to {path}, inside RAW ({raw}); allowed: a path outside RAW, "
                "as the raw dump is never written to"
            )
        return path, "split.ledger"
    if not _has_config_file(config):
        return out / LEDGER_IN_OUT, "no config file"
    source = Path(os.path.abspath(config.source))
    beside = source.parent / f"{source.stem}.ledger.tsv"
    if is_inside(beside, folder=raw):
        return out / LEDGER_IN_OUT, "the default place beside the config file is inside RAW, which is never written to"
    if not (is_inside(raw, folder=source.parent) or is_inside(out, folder=source.parent)):
        return out / LEDGER_IN_OUT, "the config file's folder holds neither RAW nor OUT, so it may serve other corpora"
    return beside, "beside the config file"
