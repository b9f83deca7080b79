"""map_ordered and each_result: input order whatever the completion order, and the callbacks."""

from __future__ import annotations

import functools
import os
import time
from pathlib import Path

import distributed
import pytest

from pipeline.core import parallel
from pipeline.core.parallel import map_ordered


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


def test_small_items_start_fewer_workers_than_asked() -> None:
    items = list(range(8))
    costs = [1.0] * len(items)
    # Costing 8 units at 100 a worker: one worker, in this process when no crash is guarded against,
    out = map_ordered(slow_square, items, workers=2, costs=costs, cost_per_worker=100.0)
    assert {r[1] for r in out} == {os.getpid()}
    # in one worker process when it is.
    out = map_ordered(slow_square, items, workers=2, costs=costs, cost_per_worker=100.0,
                      on_crash=lambda i, how: (-1, -1))
    assert len({r[1] for r in out}) == 1 and os.getpid() not in {r[1] for r in out}
    assert [r[0] for r in out] == [x * x for x in items]


def test_no_items_no_calls() -> None:
    calls: list[object] = []
    assert map_ordered(slow_square, [], workers=2, meanwhile=lambda: calls.append(1),
                       on_result=lambda i, r: calls.append(i)) == []
    assert calls == []


CRASH_ON = 3


def crash_on_three(x: int) -> int:
    """x * 10, except that the process dies of a segmentation fault on x == CRASH_ON."""
    if x == CRASH_ON:
        import faulthandler
        import resource
        import signal

        faulthandler.disable()  # no traceback dump on the test's terminal
        resource.setrlimit(resource.RLIMIT_CORE, (0, 0))  # and no core file
        os.kill(os.getpid(), signal.SIGSEGV)
    time.sleep(0.05 if x % 2 else 0.0)  # neighbours still running when the crash comes
    return x * 10


def fail_on_three(x: int) -> int:
    if x == CRASH_ON:
        raise ValueError("three")
    return x


@pytest.mark.parametrize("workers", [1, 2, 3])
def test_a_crashing_item_costs_only_itself_whatever_the_worker_count(workers: int) -> None:
    seen: list[int] = []
    crashes: list[tuple[int, str]] = []

    def on_crash(i: int, how: str) -> int:
        crashes.append((i, how))
        return -1

    items = list(range(10))
    out = map_ordered(crash_on_three, items, workers=workers, on_crash=on_crash,
                      on_result=lambda i, r: seen.append(i))
    assert out == [-1 if x == CRASH_ON else x * 10 for x in items]
    assert sorted(seen) == items  # each handed over exactly once
    assert crashes == [(CRASH_ON, "killed by signal SIGSEGV")]


def test_without_on_crash_a_worker_death_stops_the_run() -> None:
    from concurrent.futures.process import BrokenProcessPool

    with pytest.raises(BrokenProcessPool, match=rf"item\(s\) \[.*{CRASH_ON}.*\]"):
        map_ordered(crash_on_three, list(range(6)), workers=2)


@pytest.mark.parametrize("workers", [1, 2])
def test_an_ordinary_exception_still_reaches_the_caller(workers: int) -> None:
    # Only a dead process is a crash; an exception is the function's own business.
    with pytest.raises(ValueError, match="three"):
        map_ordered(fail_on_three, list(range(6)), workers=workers, on_crash=lambda i, how: -1)


def _write_slowly_or_crash(job: tuple[str, int]) -> int:
    """Item 0 dies once item 1 is halfway through an atomic write (its temporary made,
    not yet renamed); item 1 finishes its write after half a second."""
    folder, x = job
    partial = Path(folder) / f".loam-item{x}.{os.getpid()}.tmp"
    if x == 0:
        first = not (Path(folder) / "crashed-before").exists()
        (Path(folder) / "crashed-before").touch()
        deadline = time.monotonic() + 30
        while first and not any(Path(folder).glob(".loam-item1.*.tmp")) and time.monotonic() < deadline:
            time.sleep(0.01)
        crash_on_three(CRASH_ON)
    partial.write_bytes(b"")
    time.sleep(0.5)
    partial.rename(Path(folder) / f"item{x}")
    return x


def test_on_break_clears_what_a_stopped_neighbour_left(tmp_path: Path) -> None:
    # When one worker dies the pool stops the others mid-item; their items run again,
    # so a temporary they left is debris that on_break removes before the work goes on.
    from pipeline.core.fsio import remove_stale_temporaries

    breaks: list[int] = []

    def on_break() -> None:
        breaks.append(remove_stale_temporaries(tmp_path))

    out = map_ordered(_write_slowly_or_crash, [(str(tmp_path), 0), (str(tmp_path), 1)], workers=2,
                      on_crash=lambda i, how: -1, on_break=on_break)
    assert out == [-1, 1]
    assert breaks[0] == 1  # item 1's temporary, left when its worker was stopped
    assert sorted(p.name for p in tmp_path.iterdir()) == ["crashed-before", "item1"]


def test_on_break_is_not_called_when_no_worker_died() -> None:
    # It clears a broken pool's debris (the audio stage walks OUT/audio for it): a pool
    # that finished its work left none.
    breaks: list[int] = []
    assert map_ordered(abs, [-1, 2, -3], workers=2, on_crash=lambda i, how: 0,
                       on_break=lambda: breaks.append(1)) == [1, 2, 3]
    assert breaks == []


def _mark_after_batch(folder: str) -> None:
    """Runs on the worker after each batch: one file per call, named by the files the
    batch's items wrote so far (so the test sees that it ran after them)."""
    done = sorted(p.name for p in Path(folder).glob("item-*"))
    (Path(folder) / f"after-{len(list(Path(folder).glob('after-*')))}-{len(done)}").touch()


def _write_item(job: tuple[str, int]) -> int:
    folder, n = job
    (Path(folder) / f"item-{n:03d}").touch()
    return n


def test_after_batch_runs_on_the_cluster_worker_after_each_batch(tmp_path: Path) -> None:
    # The audio stage flushes a worker's clips this way before their rows travel
    # (pipeline.stages.audio.run); an in-process cluster with one thread runs the
    # batches one after another, so each call sees every item of the batches before it.
    items = [(str(tmp_path), n) for n in range(20)]
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        seen: list[int] = []
        parallel.each_result(_write_item, items, lambda i, r: seen.append(r), workers=1,
                             scheduler=cluster.scheduler_address,
                             after_batch=functools.partial(_mark_after_batch, str(tmp_path)))
    assert sorted(seen) == list(range(20))
    groups = parallel.batches(range(20), threads=1)
    marks = sorted((int(a), int(b)) for _, a, b in (p.name.split("-") for p in tmp_path.glob("after-*")))
    assert [done for _, done in marks] == [len(g) * (k + 1) for k, g in enumerate(groups)]


def test_after_batch_is_not_called_on_local_work(tmp_path: Path) -> None:
    calls: list[int] = []
    parallel.each_result(_write_item, [(str(tmp_path), n) for n in range(6)], lambda i, r: None, workers=2,
                         after_batch=lambda: calls.append(1))
    assert calls == []
