"""JSON text laid out exactly as ``json.dumps(value, indent=2, sort_keys=True,
ensure_ascii=False)`` lays it out, built faster when a list holds many like items.

Python's ``json`` uses its C encoder only without ``indent``; with it, every token
passes through the pure-Python generator encoder. The split stage's summary at 100,000
clips (6.7 MB, 45,000 duplicate pairs, each a record holding a list) took 0.17 CPU s
that way. Here the items of each list are encoded as one column: strings by the very
string encoder ``json`` uses (its C function), numbers by the ``repr`` it uses, records
sharing their keys and lists sharing their length through one ``%`` template per
column, so the Python work is per column and per key rather than per token.

Whatever this module does not handle itself (keys that are not strings, subclasses of
the built-in types, types ``json`` rejects) is handed to ``json.dumps`` with the same
arguments and re-indented to its depth: JSON text holds no raw newline inside a string,
so putting the indent after each newline is exact. Errors are ``json``'s own.
"""

from __future__ import annotations

import json
from json.encoder import encode_basestring
from operator import itemgetter
from typing import Any

__all__ = ["dumps_indented"]

_INDENT = "  "
_BOOLS = {True: "true", False: "false"}
# float.__repr__ of the values JSON has no number for, and what json writes instead.
_NON_FINITE = {"nan": "NaN", "inf": "Infinity", "-inf": "-Infinity"}


def dumps_indented(value: Any) -> str:
    """``json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False)``, same text.

    Parameters
    ----------
    value : Any
        What to encode: dicts, lists, tuples, strings, numbers, booleans, None.

    Returns
    -------
    str
        The JSON text, without a trailing newline.

    Raises
    ------
    TypeError, ValueError
        As ``json.dumps`` raises them (a value it cannot encode, a circular reference).

    Examples
    --------
    >>> value = {"pairs": [{"clips": ["a", "b"], "s": 0.5}, {"clips": ["c", "d"], "s": 1.0}], "n": {}}
    >>> text = dumps_indented(value)
    >>> text == json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False)
    True
    >>> print(dumps_indented({"b": [1, None, "é"], "a": []}))
    {
      "a": [],
      "b": [
        1,
        null,
        "é"
      ]
    }
    """
    try:
        return _column([value], 0)[0]
    except RecursionError:
        return _fallback(value, 0)  # json's own error for a circular value, or its text


def _column(values: list[Any], level: int) -> list[str]:
    """The text of each of ``values``, all written at nesting depth ``level``."""
    kinds = set(map(type, values))
    if len(kinds) > 1:
        return [_column([value], level)[0] for value in values]
    encode = _BY_TYPE.get(kinds.pop()) if kinds else _empty
    if encode is None:
        return [_fallback(value, level) for value in values]
    return encode(values, level)


def _empty(values: list[Any], level: int) -> list[str]:
    return []


def _strings(values: list[str], level: int) -> list[str]:
    return list(map(encode_basestring, values))


def _ints(values: list[int], level: int) -> list[str]:
    return list(map(int.__repr__, values))


def _floats(values: list[float], level: int) -> list[str]:
    texts = list(map(float.__repr__, values))
    if not _NON_FINITE.keys().isdisjoint(texts):
        texts = [_NON_FINITE.get(text, text) for text in texts]
    return texts


def _bools(values: list[bool], level: int) -> list[str]:
    return list(map(_BOOLS.__getitem__, values))


def _nones(values: list[None], level: int) -> list[str]:
    return ["null"] * len(values)


def _dicts(values: list[dict[Any, Any]], level: int) -> list[str]:
    """Dicts: those sharing one key order through one template, keys sorted."""
    shapes = set(map(tuple, values))
    if len(shapes) > 1:
        return [_dicts([value], level)[0] for value in values]
    keys = shapes.pop()
    if not keys:
        return ["{}"] * len(values)
    if not all(type(key) is str for key in keys):
        return [_fallback(value, level) for value in values]  # json's key conversions
    order = sorted(keys)
    inner = _INDENT * (level + 1)
    fields = [f"{inner}{encode_basestring(key).replace('%', '%%')}: %s" for key in order]
    template = "{\n" + ",\n".join(fields) + "\n" + _INDENT * level + "}"
    columns = [_column(list(map(itemgetter(key), values)), level + 1) for key in order]
    return list(map(template.__mod__, zip(*columns, strict=True)))


def _lists(values: list[list[Any] | tuple[Any, ...]], level: int) -> list[str]:
    """Lists and tuples: short ones of one length through one template, long ones item by item."""
    lengths = set(map(len, values))
    if len(lengths) > 1:
        return [_lists([value], level)[0] for value in values]
    length = lengths.pop()
    if length == 0:
        return ["[]"] * len(values)
    inner = _INDENT * (level + 1)
    opening, separator, closing = "[\n" + inner, ",\n" + inner, "\n" + _INDENT * level + "]"
    if len(values) == 1 or length > len(values):
        # Each list's items make a column (a single long list, such as the pairs).
        return [opening + separator.join(_column(list(value), level + 1)) + closing for value in values]
    template = opening + separator.join(["%s"] * length) + closing
    columns = [_column(list(items), level + 1) for items in zip(*values, strict=True)]
    return list(map(template.__mod__, zip(*columns, strict=True)))


def _fallback(value: Any, level: int) -> str:
    text = json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False)
    return text.replace("\n", "\n" + _INDENT * level) if level else text


_BY_TYPE = {str: _strings, int: _ints, float: _floats, bool: _bools, type(None): _nones,
            dict: _dicts, list: _lists, tuple: _lists}
