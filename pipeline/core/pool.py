"""Local worker processes: they exit with the driver, and a crash costs one item.

Two promises :func:`pipeline.core.parallel.each_result` keeps for its local pool.

**Workers die with the driver.** When the driver is killed outright (``kill -9``, the
kernel's out-of-memory killer, a batch scheduler's pre-emption) nothing in it runs, so
the workers must notice by themselves. Each worker, as it starts (:func:`guard_worker`):

- on Linux asks the kernel, with ``prctl(PR_SET_PDEATHSIG, SIGKILL)``, to kill it when
  its parent goes. That needs no cooperation from the worker, so it also ends a worker
  stuck in C code holding the GIL. The signal follows the *thread* that forked the
  worker, not the process; every pool here is created and shut down inside one call of
  the driver's thread, which therefore outlives its workers.
- on every platform starts a daemon thread that compares ``os.getppid()`` with the
  driver's pid every :data:`PARENT_POLL_S` seconds and ends the process when they
  differ (an orphan is re-parented to init or to a sub-reaper). This is what works on
  macOS, and it covers a libc whose ``prctl`` cannot be reached.

A pipe whose end-of-file would announce the driver's death was the third way, and the
one not taken: with fork, every worker inherits the write ends the driver holds,
including those of the pipes to its siblings, so no pipe reaches end-of-file while any
sibling lives. The pool's own call queue is such a pipe, which is why orphaned workers
used to wait on it forever.

**A crash costs one item.** When a worker dies (a segmentation fault inside a decoding
library, say), :class:`concurrent.futures.ProcessPoolExecutor` fails every future still
waiting, the crashed item's and its neighbours' alike. Workers mark in shared memory the
item they start and finish (:func:`run_pool`), so after such a break the driver knows the
items that were running when it happened. Each of those runs again alone, in a process of
its own (:func:`run_alone`); the one that crashes again is handed to ``on_crash``, the
others give their ordinary results, and the items that never started go on in a fresh
pool. Which items shared a pool with the crash therefore changes nothing in the results.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from typing import Any

#: Seconds between two checks of the parent pid in a worker (the portable guard; on
#: Linux the kernel's parent-death signal ends the worker at once).
PARENT_POLL_S = 0.5

# Per-item state in the shared array: not started, started, finished.
_IDLE, _STARTED, _FINISHED = 0, 1, 2
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>

_marks: Any = None  # the pool's shared array of item states, set in each worker


def start_method() -> str:
    """The start method of worker processes: fork on Linux, spawn elsewhere.

    fork shares the already-imported modules with the children; the stages import
    their heavy libraries lazily, inside the per-file functions. macOS makes fork
    unsafe (system libraries may abort in a forked child), and Windows has none.

    Examples
    --------
    >>> start_method() in ("fork", "spawn")
    True
    """
    return "fork" if sys.platform.startswith("linux") else "spawn"


def _set_parent_death_signal() -> bool:
    """Ask the Linux kernel to SIGKILL this process when its parent thread ends."""
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):  # no libc handle or no prctl: the thread covers it
        return False


def _watch_parent(parent_pid: int) -> None:
    while os.getppid() == parent_pid:
        time.sleep(PARENT_POLL_S)
    os._exit(1)  # from this thread: the main one may be busy in C code


def guard_worker(parent_pid: int) -> None:
    """Make this worker process end when the process ``parent_pid`` is gone.

    Called first thing in every worker. See the module docstring for why both ways.

    Parameters
    ----------
    parent_pid : int
        The driver's pid, recorded by the driver itself (in the worker, the parent may
        already be gone).
    """
    if sys.platform.startswith("linux"):
        _set_parent_death_signal()
    # The parent may have died before the signal was asked for (or the thread started).
    if os.getppid() != parent_pid:
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(parent_pid,), name="loam-parent-watch", daemon=True).start()


def _init_pool_worker(parent_pid: int, marks: Any) -> None:
    global _marks
    guard_worker(parent_pid)
    _marks = marks


def _marked(func: Callable[[Any], Any], index: int, item: Any) -> Any:
    _marks[index] = _STARTED
    result = func(item)
    _marks[index] = _FINISHED
    return result


def describe_exit(exitcode: int | None) -> str:
    """A phrase for how a worker process ended, from its exit code.

    Only the signal's name: it goes into reject details, which must read the same on
    every platform (``signal.strsignal`` words differ between Linux and macOS).

    Examples
    --------
    >>> describe_exit(-11)
    'killed by signal SIGSEGV'
    >>> describe_exit(3)
    'exited with status 3'
    """
    if exitcode is not None and exitcode < 0:
        try:
            return f"killed by signal {signal.Signals(-exitcode).name}"
        except ValueError:
            return f"killed by signal {-exitcode}"
    return f"exited with status {exitcode}"


def _alone_main(conn: Any, func: Callable[[Any], Any], item: Any, parent_pid: int) -> None:
    guard_worker(parent_pid)
    try:
        outcome: tuple[str, Any] = ("ok", func(item))
    except BaseException as exc:  # handed to the driver, which raises it as the pool would
        outcome = ("raised", exc)
    try:
        conn.send(outcome)
    except Exception as exc:  # a result or an exception that cannot be pickled
        conn.send(("raised", RuntimeError(f"the worker could not send its result back: {exc!r}")))
    conn.close()


def run_alone(func: Callable[[Any], Any], item: Any) -> tuple[bool, Any]:
    """Run ``func(item)`` in a process of its own; ``(True, result)``, or ``(False, how)``
    when the process died before it sent a result (``how`` from :func:`describe_exit`).

    An exception ``func`` raises is raised here, as a pool's future would.

    Examples
    --------
    >>> run_alone(abs, -3)
    (True, 3)
    """
    context = multiprocessing.get_context(start_method())
    reader, writer = context.Pipe(duplex=False)
    process = context.Process(target=_alone_main, args=(writer, func, item, os.getpid()), name="loam-alone")
    process.start()
    writer.close()  # so that the child's death is end-of-file here
    try:
        kind, value = reader.recv()
    except EOFError:
        kind, value = "died", None
    finally:
        reader.close()
    process.join()
    if kind == "ok":
        return True, value
    if kind == "raised":
        raise value
    return False, describe_exit(process.exitcode)


def _one_pool(func: Callable[[Any], Any], items: Sequence[Any], order: Sequence[int],
              on_result: Callable[[int, Any], None], *, workers: int,
              meanwhile: Callable[[], None] | None) -> tuple[list[int], list[int]]:
    """One pool over ``items[i] for i in order``; after a break, the items not handed
    over: those a worker had started and not finished, and the others."""
    context = multiprocessing.get_context(start_method())
    marks = context.RawArray("b", len(items))
    handed: set[int] = set()
    broken = False
    with ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_init_pool_worker,
                             initargs=(os.getpid(), marks)) as pool:
        futures = {}
        try:
            for i in order:
                futures[pool.submit(_marked, func, i, items[i])] = i
        except BrokenProcessPool:  # a worker died already; the rest never started
            broken = True
        if meanwhile is not None:
            meanwhile()
        for fut in as_completed(futures):
            i = futures.pop(fut)
            try:
                result = fut.result()
            except BrokenProcessPool:
                broken = True
                continue
            on_result(i, result)
            handed.add(i)
    if not broken:
        return [], []
    left = [i for i in order if i not in handed]
    return [i for i in left if marks[i] == _STARTED], [i for i in left if marks[i] != _STARTED]


def run_pool(
    func: Callable[[Any], Any],
    items: Sequence[Any],
    on_result: Callable[[int, Any], None],
    *,
    workers: int,
    order: Sequence[int],
    meanwhile: Callable[[], None] | None = None,
    on_crash: Callable[[int, str], Any] | None = None,
    on_break: Callable[[], object] | None = None,
) -> None:
    """``on_result(i, func(items[i]))`` for each ``i`` in ``order``, on ``workers`` processes.

    Items are submitted in ``order``; results are handed over as they arrive.
    ``meanwhile`` is called once, after the first submissions. A worker's death breaks
    the pool: the items it and its neighbours were running run again, each alone; one
    that kills its process again gets ``on_result(i, on_crash(i, how))``, ``how`` saying
    how the process ended (:func:`describe_exit`). The items that had not started go on
    in a fresh pool. ``on_break`` is called after a pool broke, once its processes are
    gone and before anything runs again: a neighbour stopped mid-item may have left
    partial work (a temporary file) for the caller to clear. Without ``on_crash`` a worker's death raises
    :class:`~concurrent.futures.process.BrokenProcessPool`, as it does as well when a
    worker died while running nothing (killed from outside).

    Parameters
    ----------
    func : a module-level function (it is pickled by name).
    items : the work.
    on_result : called in this process for each item, in completion order.
    workers : the number of worker processes.
    order : the indices of ``items`` to run, first submitted first.
    meanwhile : other work for this process while the workers run.
    on_crash : the result for an item whose process died twice, the second time alone.
    on_break : called in this process after each broken pool.

    Examples
    --------
    >>> got = {}
    >>> run_pool(abs, [-1, 2, -3], got.__setitem__, workers=2, order=[2, 1, 0])
    >>> sorted(got.items())
    [(0, 1), (1, 2), (2, 3)]
    """
    pending = list(order)
    while pending:
        suspects, rest = _one_pool(func, items, pending, on_result, workers=min(workers, len(pending)),
                                   meanwhile=meanwhile)
        meanwhile = None
        if not suspects and rest:
            raise BrokenProcessPool("a worker process died while running no item (was it killed from outside?)")
        if suspects and on_crash is None:
            raise BrokenProcessPool(f"a worker process died while running item(s) {sorted(suspects)}")
        if suspects and on_break is not None:  # a pool that did not break left nothing half done
            on_break()
        for i in sorted(suspects):
            ok, value = run_alone(func, items[i])
            on_result(i, value if ok else on_crash(i, value))  # type: ignore[misc]
        pending = rest
