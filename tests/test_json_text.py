"""dumps_indented gives exactly the text of json.dumps(indent=2, sort_keys=True,
ensure_ascii=False), the call the runner made for every stage summary, as the reference."""

from __future__ import annotations

import collections
import enum
import json
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.json_text import dumps_indented


def reference(value: object) -> str:
    # The reference is the standard library's encoder (Python's json module, RFC 8259 text).
    return json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False)


class Level(enum.IntEnum):
    LOW = 1


class Ratio(float):
    def __repr__(self) -> str:
        return "ratio"


class Name(str):
    pass


CASES = [
    {},
    [],
    (),
    "",
    0,
    -0.0,
    None,
    True,
    [[], {}, [[]], [{}], {"a": {}}, {"a": []}],
    {"é": "naïve 日本語 \u2028 \x00 \x1f \" \\ /", "%s": "%d %%", "\ud800": "lone surrogate"},
    [math.nan, math.inf, -math.inf, 1e300, 5e-324, 0.1, 1.0, 2.5e-7, 123456789.125],
    [10**30, -(10**30), 0, -1, True, False, None],
    # records sharing their keys, in different insertion orders and with other shapes
    [{"clips": ["a", "b"], "identical": False, "similarity": 0.85} for _ in range(3)]
    + [{"similarity": 1.0, "identical": True, "clips": ["c", "é"]}, {"clips": []}, {}],
    [{"x": [1, 2]}, {"x": [3]}, {"x": [4, 5.5]}, {"x": ["6", None]}, {"x": [[], {}]}],
    [[1, 2], [3, 4], [5, 6], (7, 8)],
    [[1, 2, 3, 4, 5, 6], [7, 8, 9, 10, 11, 12]],
    [[1, "a"], [2.0, None], [True, [1]]],
    # keys that are not strings: json converts them, and sorts before converting
    {1: "a", 2: "b"},
    {1.5: "x", 0.5: "y"},
    {True: 1},
    {None: 0},
    [{1: "a"}, {1: "b"}],
    # subclasses of the built-in types
    [Level.LOW, Level.LOW],
    {"level": Level.LOW, "ratio": Ratio(0.25), "name": Name("n")},
    [Ratio(0.5), Ratio(math.nan)],
    collections.OrderedDict([("b", 1), ("a", [collections.OrderedDict(z=1)])]),
    {"deep": [[[[{"a": [[{"b": [1]}]]}]]]]},
]


@pytest.mark.parametrize("value", CASES, ids=range(len(CASES)))
def test_same_text_as_json_dumps(value: object) -> None:
    assert dumps_indented(value) == reference(value)


json_leaves = st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8)
json_values = st.recursive(
    json_leaves,
    lambda inner: (st.lists(inner, max_size=5) | st.tuples(inner, inner)
                   | st.dictionaries(st.text(max_size=4), inner, max_size=4)),
    max_leaves=40,
)
# Lists of records sharing keys: the case laid out through one template per column.
records = st.lists(st.fixed_dictionaries({"clips": st.lists(st.text(max_size=6), min_size=2, max_size=2),
                                          "identical": st.booleans(),
                                          "similarity": st.floats(),
                                          "extra": json_values}), max_size=8)


@settings(max_examples=300, deadline=None)
@given(json_values)
def test_same_text_on_any_value(value: object) -> None:
    assert dumps_indented(value) == reference(value)


@settings(max_examples=100, deadline=None)
@given(records, json_values)
def test_same_text_on_records(rows: list[dict[str, object]], other: object) -> None:
    value = {"pairs": rows, "other": other, "empty": {"rows": [], "moved": {}}}
    assert dumps_indented(value) == reference(value)


def test_same_errors_as_json_dumps() -> None:
    loop: list[object] = []
    loop.append(loop)
    with pytest.raises(ValueError, match="Circular reference"):
        dumps_indented({"a": loop})
    with pytest.raises(TypeError, match="set is not JSON serializable"):
        dumps_indented({"a": [1, {2}]})
    with pytest.raises(TypeError):
        dumps_indented({1: "a", "b": 2})  # json cannot sort these keys either
