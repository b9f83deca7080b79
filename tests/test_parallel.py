"""map_ordered and each_result: input order whatever the completion order, and the callbacks."""

from __future__ import annotations

import os
import time

import pytest

from pipeline.parallel import map_ordered


def slow_square(x: int) -> tuple[int, int]:
    # Early items sleep longest, so with a pool they complete last.
    time.sleep(0.02 * (5 - x) if x < 5 else 0)
    return x * x, os.getpid()


@pytest.mark.parametrize("workers", [1, 2])
def test_results_in_input_order_and_each_reported_once(workers: int) -> None:
    seen: list[tuple[int, int]] = []
    calls: list[str] = []
    items = list(range(8))
    out = map_ordered(slow_square, items, workers=workers, costs=[float(x) for x in items],
                      meanwhile=lambda: calls.append("meanwhile"),
                      on_result=lambda i, r: seen.append((i, r[0])))
    assert [r[0] for r in out] == [x * x for x in items]
    assert sorted(seen) == [(i, i * i) for i in items]
    pids = {r[1] for r in out}
    if workers == 1:
        # In this process, and the caller does its other work afterwards.
        assert pids == {os.getpid()} and calls == []
        assert seen == sorted(seen)
    else:
        assert os.getpid() not in pids and calls == ["meanwhile"]


def test_no_items_no_calls() -> None:
    calls: list[object] = []
    assert map_ordered(slow_square, [], workers=2, meanwhile=lambda: calls.append(1),
                       on_result=lambda i, r: calls.append(i)) == []
    assert calls == []
