"""The phone inventory: ``OUT/lexicon/inventory.tsv``, with ids that never change.

One row per symbol used in the labelled and held-out phones (and the word-boundary
symbol when configured): ``symbol``, ``id``, ``count`` (occurrences), ``seconds`` (each
clip's duration shared equally among its phones, summed; 0 for the boundary) and
``class`` (``vowel`` or ``consonant`` from panphon's feature table for an IPA segment,
``boundary`` for the word boundary, empty for other symbol sets such as ARPAbet, and
for the graphemes backend's letters, which are not phones).

Models bind their output layer to the ids, so a rebuild keeps every id it has seen: the
ids are recorded beside the split ledger (``<ledger stem>.inventory.tsv``, the same
table), read back on the next run, and new symbols get the next free ids in code-point
order. A symbol no clip uses any more keeps its row and id with count 0, so an id is
never given to another symbol.
"""

from __future__ import annotations

import math
import re
from collections import Counter
from itertools import chain, pairwise
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.core.errors import UsageError
from pipeline.core.fsio import write_text_atomic
from pipeline.core.names import HELDOUT, LABELLED, subset_manifest

__all__ = ["INVENTORY", "build_inventory", "format_inventory", "ids_path", "read_ids", "write_inventory"]

INVENTORY = "lexicon/inventory.tsv"
COLUMNS = ("symbol", "id", "count", "seconds", "class")


def ids_path(ledger_path: Path) -> Path:
    """Where the ids are recorded: beside the ledger (``ledger.tsv`` -> ``ledger.inventory.tsv``)."""
    return ledger_path.with_name(f"{ledger_path.stem}.inventory.tsv")


def read_ids(path: Path) -> dict[str, int]:
    """Symbol -> id from a recorded inventory; ``{}`` when there is none (UsageError if malformed)."""
    if not path.exists():
        return {}
    ids: dict[str, int] = {}
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        if number == 1 or not line.strip():
            continue
        fields = line.split("\t")
        if len(fields) != len(COLUMNS) or not fields[1].isdigit() or fields[0] in ids:
            raise UsageError(f"{path}: line {number}: expected {len(COLUMNS)} tab-separated fields "
                             f"({', '.join(COLUMNS)}) with a whole-number id and a symbol not listed before")
        ids[fields[0]] = int(fields[1])
    if len(set(ids.values())) != len(ids):
        raise UsageError(f"{path}: two symbols share an id; expected one id per symbol")
    return ids


# Upper-case ASCII letters and digits (ARPAbet's symbols, stress digits and all) make
# no segment of panphon's table, whose ASCII segments are lower-case letters (a test
# checks): such a symbol has no class, and the table is not loaded for it (0.024 CPU s,
# once per process).
_NOT_IPA = re.compile(r"[A-Z][A-Z0-9]*")


def _class(symbol: str, boundary: str, classify: bool) -> str:
    if boundary and symbol == boundary:
        return "boundary"
    if not classify or _NOT_IPA.fullmatch(symbol):
        return ""
    from pipeline.text.ipa import feature_table, phone_class, table_units

    return phone_class(symbol) if table_units(symbol) in feature_table() else ""


def build_inventory(clips: list[tuple[list[str], float]], *, boundary: str,
                    known: dict[str, int], classify: bool = True) -> list[dict[str, Any]]:
    """Rows of the inventory for clips given as (phones, duration_s).

    Examples
    --------
    >>> rows = build_inventory([(["a", "|", "b"], 1.0)], boundary="|", known={"b": 0})
    >>> [(r["symbol"], r["id"], r["count"], r["seconds"], r["class"]) for r in rows]
    [('b', 0, 1, 0.5, 'consonant'), ('a', 1, 1, 0.5, 'vowel'), ('|', 2, 1, 0.0, 'boundary')]
    """
    counts, seconds = _tally(clips, boundary=boundary)
    ids = dict(known)
    for symbol in sorted(set(counts) - set(ids)):
        ids[symbol] = max(ids.values(), default=-1) + 1
    return [{"symbol": s, "id": i, "count": counts.get(s, 0), "seconds": round(seconds.get(s, 0.0), 3),
             "class": _class(s, boundary, classify)} for s, i in sorted(ids.items(), key=lambda kv: kv[1])]


def _tally(clips: list[tuple[list[str], float]], *, boundary: str) -> tuple[Counter[str], dict[str, float]]:
    """Each symbol's occurrences, and its seconds: each clip's duration shared equally
    among its phones (the boundary symbol takes no share), summed by ``math.fsum``.

    By codes and arrays, a Python call per distinct symbol: fsum's sum is correctly
    rounded whatever the order, so summing a symbol's shares together gives the float
    of a sum clip by clip (0.009 CPU s for the 3,700 clips, 52,000 phones of the
    100,000-source rebuild; 0.002 s so).

    Examples
    --------
    >>> _tally([(["a", "|", "b"], 1.0), (["a"], 0.3)], boundary="|")
    (Counter({'a': 2, '|': 1, 'b': 1}), {'a': 0.8, 'b': 0.5})
    """
    phones = [p for p, _ in clips]
    flat = list(chain.from_iterable(phones))
    counts = Counter(flat)
    if not flat:
        return counts, {}
    index = {p: k for k, p in enumerate(counts)}
    codes = np.fromiter(map(index.__getitem__, flat), np.int64, count=len(flat))
    sizes = np.fromiter(map(len, phones), np.int64, count=len(phones))
    sounds = sizes - (np.fromiter((p.count(boundary) for p in phones), np.int64, count=len(phones)) if boundary
                      else 0)
    durations = np.fromiter((d for _, d in clips), np.float64, count=len(clips))
    share = np.repeat(np.divide(durations, sounds, out=np.zeros(len(clips)), where=sounds > 0), sizes)
    keep = codes != index[boundary] if boundary and boundary in index else np.ones(len(flat), bool)
    order = np.argsort(codes[keep], kind="stable")
    ordered_codes, ordered = codes[keep][order], share[keep][order].tolist()
    cuts = np.searchsorted(ordered_codes, np.arange(len(index) + 1)).tolist()
    names = list(index)
    seconds = {names[k]: math.fsum(ordered[a:b]) for k, (a, b) in enumerate(pairwise(cuts)) if b > a}
    return counts, seconds


def format_inventory(rows: list[dict[str, Any]]) -> str:
    lines = ["\t".join(COLUMNS)]
    lines += ["\t".join(str(r[c]) for c in COLUMNS) for r in rows]
    return "\n".join(lines) + "\n"


def write_inventory(out: Path, ledger_path: Path, clips: list[tuple[list[str], float]], *,
                    boundary: str, classify: bool = True) -> list[dict[str, Any]]:
    """Write ``OUT/lexicon/inventory.tsv`` and its record beside the ledger; return the rows.

    ``classify=False`` (the graphemes backend, whose letters are not phones) leaves
    ``class`` empty but for the boundary.
    """
    record = ids_path(ledger_path)
    rows = build_inventory(clips, boundary=boundary, known=read_ids(record), classify=classify)
    text = format_inventory(rows)
    write_text_atomic(out / INVENTORY, text)
    write_text_atomic(record, text)
    return rows


def subset_phones(tables: dict[str, tuple[str, Any]]) -> list[tuple[list[str], float]]:
    """(phones, duration_s) of every labelled and held-out clip that has phones, in file order."""
    clips = []
    for rel in (subset_manifest(LABELLED), subset_manifest(HELDOUT)):
        if rel in tables:
            table = tables[rel][1]
            for phones, duration_s in zip(table.column("phones").to_pylist(), table.column("duration_s").to_pylist(),
                                          strict=True):
                if phones:
                    clips.append((phones, duration_s))
    return clips
