"""pipeline.core.forked: a call computed in a forked child gives what it gives here, and
a child that fails in any way costs only the time to compute the call again here."""

from __future__ import annotations

import os
import signal
import sys

import numpy as np
import pytest

from pipeline.core.forked import begin

FORK = sys.platform.startswith("linux")
PARENT = os.getpid()


def _summed(values: np.ndarray, *, also: int = 0) -> tuple[int, int]:
    return int(values.sum()) + also, os.getpid()


def _fails_in_child(values: np.ndarray) -> int:
    if os.getpid() != PARENT:
        raise RuntimeError("only in the child")
    return int(values.sum())


def _dies_in_child(values: np.ndarray) -> int:
    if os.getpid() != PARENT:
        os.kill(os.getpid(), signal.SIGKILL)
    return int(values.sum())


def _unsendable_in_child(values: np.ndarray) -> object:
    # A value pickle refuses is not sent: the call is made here.
    return (lambda: None) if os.getpid() != PARENT else int(values.sum())


def _raises(values: np.ndarray) -> int:
    raise ValueError(f"bad values: {values.size}")


@pytest.mark.skipif(not FORK, reason="fork is the rule on Linux only; elsewhere begin computes here")
def test_the_child_computes_the_value() -> None:
    total, where = begin(_summed, np.arange(1000)).result()
    assert total == 499500
    assert where != os.getpid()


def test_without_fork_the_value_is_computed_when_asked() -> None:
    begun = begin(_summed, np.arange(10), fork=False)
    total, where = begun.result()
    assert (total, where) == (45, os.getpid())
    with pytest.raises(RuntimeError, match="asked for twice"):
        begun.result()


@pytest.mark.parametrize("func", [_fails_in_child, _dies_in_child, _unsendable_in_child])
def test_a_failed_child_costs_only_a_second_computation(func) -> None:
    assert begin(func, np.arange(10)).result() == 45


def test_an_error_is_raised_here_as_the_call_raises_it() -> None:
    with pytest.raises(ValueError, match="bad values: 3"):
        begin(_raises, np.arange(3)).result()


@pytest.mark.skipif(not FORK, reason="no child elsewhere")
def test_cancel_ends_the_child() -> None:
    begun = begin(_summed, np.arange(10))
    pid = begun._pid
    begun.cancel()
    with pytest.raises(ChildProcessError):
        os.waitpid(pid, os.WNOHANG)
    begun.cancel()  # twice is harmless
