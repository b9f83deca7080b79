"""Per-file work on a process pool or a dask.distributed cluster, results in input order.

Results come back in the order of ``items`` whatever the completion order, which is
what keeps manifests byte-identical across worker counts and schedulers.
"""

from __future__ import annotations

import math
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any, TypeVar

from pipeline.core.pool import run_pool

T = TypeVar("T")
R = TypeVar("R")


def default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def resolve_workers(workers: int) -> int:
    return default_workers() if workers <= 0 else workers


class _NoBar:
    """What :func:`_progress` gives when no bar is shown."""

    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def _progress(total: int, desc: str, enabled: bool) -> Any:
    """A progress bar on a terminal, when ``enabled``; otherwise one that shows nothing.

    tqdm is imported only for a bar that shows: its import cost 0.05 CPU seconds of
    every run without one (``--no-progress``, a log file, a batch job).

    Examples
    --------
    >>> bar = _progress(3, "probe", False)
    >>> bar.update(1); bar.close()
    """
    if not (enabled and sys.stderr.isatty()):
        return _NoBar()
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="file", leave=False, dynamic_ncols=True)


def planned_workers(workers: int, items: int, *, costs: Sequence[float] | None = None,
                    cost_per_worker: float | None = None) -> int:
    """How many local workers :func:`each_result` starts for ``items`` items.

    Examples
    --------
    >>> planned_workers(2, 33), planned_workers(4, 3)
    (2, 3)
    >>> planned_workers(2, 33, costs=[0.3e6] * 33, cost_per_worker=64e6)
    1
    >>> planned_workers(2, 538, costs=[0.4e6] * 538, cost_per_worker=64e6)
    2
    """
    n = min(resolve_workers(workers), items)
    if costs is not None and cost_per_worker:
        n = min(n, max(1, math.ceil(sum(costs) / cost_per_worker)))
    return n


def each_result(
    func: Callable[[T], R],
    items: Sequence[T],
    on_result: Callable[[int, R], None],
    *,
    workers: int,
    scheduler: str = "",
    desc: str = "",
    progress: bool = False,
    costs: Sequence[float] | None = None,
    cost_per_worker: float | None = None,
    meanwhile: Callable[[], None] | None = None,
    on_crash: Callable[[int, str], R] | None = None,
    after_batch: Callable[[], None] | None = None,
    on_break: Callable[[], object] | None = None,
) -> None:
    """Apply ``func`` to every item and hand each result to ``on_result(index, result)``.

    Results are handed over in this process as they arrive, in completion order, while
    the workers go on with the rest, and none is kept here: a stage that folds them
    into a manifest builder never holds every result at once. Whatever ``on_result``
    produces must not depend on that order (sort by a key afterwards).

    ``func`` must be a module-level function (it is pickled). With one worker or a
    single item the work runs in this process, in input order, which keeps small runs
    free of pool start-up cost. ``scheduler`` is a dask.distributed address; workers
    there must see the same file paths. ``costs`` (e.g. durations) makes the pool start
    the largest items first, so one long recording does not leave a worker finishing
    alone at the end (longest-processing-time-first scheduling). With ``costs`` and
    ``cost_per_worker``, no more local workers start than the items' summed cost over
    ``cost_per_worker`` (at least one): a worker's start-up (a fork, the first imports,
    the pool's messages) is not repaid by a share of a few small items. On a cluster,
    items travel in batches (:func:`batches`): one task and one message per batch.

    ``meanwhile`` is other work for this process (the runner's next stages that do not
    need these results). When there is a pool or a cluster to wait for, it is called
    once, after every item has been handed over, so it runs while the workers do and
    after the pool's processes have been forked (forking while it ran could copy a lock
    it holds). Without one it is not called: the caller does that work afterwards.

    Local workers end by themselves when this process is killed (``pipeline.core.pool``).
    ``on_crash(index, how)`` gives the result for an item whose worker process died
    outright twice, the second time alone (a decoder's segmentation fault); the other
    items are not affected, whichever shared the pool with it. With ``on_crash`` the work
    always runs in worker processes, even with one worker, so that such a crash never
    takes this process down and results do not depend on the worker count. Without it a
    worker's death raises ``BrokenProcessPool``. ``on_break`` is called in this process
    after a local pool broke, before the work goes on (:func:`pipeline.core.pool.run_pool`).

    ``after_batch`` (module-level, pickled) runs on a cluster worker after each batch,
    before its results are sent: the audio stage flushes the clips that worker wrote
    there, which this process's kernel cannot flush. Local work does not call it.
    """
    if not items:
        return
    if scheduler:
        _each_dask(func, items, on_result, scheduler=scheduler, desc=desc, progress=progress, meanwhile=meanwhile,
                   costs=costs, after_batch=after_batch)
        return
    n = planned_workers(workers, len(items), costs=costs, cost_per_worker=cost_per_worker)
    bar = _progress(len(items), desc, progress)

    def handed(i: int, result: R) -> None:
        on_result(i, result)
        bar.update(1)

    try:
        if n == 1 and on_crash is None:
            for i, item in enumerate(items):
                handed(i, func(item))
            return
        order = range(len(items)) if costs is None else sorted(range(len(items)), key=lambda i: -costs[i])
        run_pool(func, items, handed, workers=n, order=order, meanwhile=meanwhile, on_crash=on_crash,
                 on_break=on_break)
    finally:
        bar.close()


def map_ordered(
    func: Callable[[T], R],
    items: Sequence[T],
    *,
    on_result: Callable[[int, R], None] | None = None,
    **options: Any,
) -> list[R]:
    """:func:`each_result` (the same keyword options), with the results also returned
    in input order.

    ``on_result``, when given, still sees each result as it arrives (storing results
    in the cache, say).
    """
    results: list[Any] = [None] * len(items)

    def keep(i: int, result: R) -> None:
        results[i] = result
        if on_result is not None:
            on_result(i, result)

    each_result(func, items, keep, **options)
    return results


# Per-file results travel from dask workers in batches: one task (and one message, one
# future in this process, one entry in the scheduler) per batch rather than per file. A
# batch is small enough to keep every worker busy to the end (at least BATCHES_PER_THREAD
# batches per worker thread) and at most MAX_BATCH items, so the results in flight stay
# small. Measured at 100,000 short sources: see README's benchmarks.
MAX_BATCH = 64
BATCHES_PER_THREAD = 8


def batches(order: Sequence[int], *, threads: int) -> list[list[int]]:
    """``order`` cut into consecutive batches of item indices (see ``MAX_BATCH``).

    Examples
    --------
    >>> batches(range(20), threads=1)
    [[0, 1], [2, 3], [4, 5], [6, 7], [8, 9], [10, 11], [12, 13], [14, 15], [16, 17], [18, 19]]
    >>> [len(b) for b in batches(range(10_000), threads=2)] == [64] * 156 + [16]
    True
    """
    n = len(order)
    size = max(1, min(MAX_BATCH, n // max(1, threads * BATCHES_PER_THREAD)))
    return [list(order[i : i + size]) for i in range(0, n, size)]


def _run_batch(func: Callable[[T], R], items: list[T], after: Callable[[], None] | None = None) -> list[R]:
    """Run on a dask worker: ``func`` over one batch of items, in order, then ``after``;
    with glibc's malloc thresholds where its own adaptation takes them
    (:mod:`pipeline.core.allocator`: dask starts its workers with them fixed low)."""
    from pipeline.core.allocator import adapted

    with adapted():
        results = [func(item) for item in items]
        if after is not None:
            after()
    return results


def _each_dask(func: Callable[[T], R], items: Sequence[T], on_result: Callable[[int, R], None], *,
               scheduler: str, desc: str, progress: bool, meanwhile: Callable[[], None] | None = None,
               costs: Sequence[float] | None = None, after_batch: Callable[[], None] | None = None) -> None:
    try:
        from distributed import Client
    except ImportError as exc:
        from pipeline.core.errors import UsageError

        raise UsageError("--scheduler needs dask.distributed, which is not installed: run pip install '.[cluster]' "
                         "in a Loam checkout (or pip install 'dask[distributed]>=2024.1')") from exc
    from distributed import as_completed

    bar = _progress(len(items), desc, progress)
    with Client(scheduler, set_as_default=False) as client:
        order = range(len(items)) if costs is None else sorted(range(len(items)), key=lambda i: -costs[i])
        groups = batches(order, threads=max(1, sum(client.nthreads().values())))
        futures = client.map(_run_batch, [func] * len(groups), [[items[i] for i in g] for g in groups],
                             [after_batch] * len(groups), pure=False)
        if meanwhile is not None:
            meanwhile()
        index = {f.key: g for f, g in zip(futures, groups, strict=True)}
        # The client is not the default one, so as_completed must be told which to use.
        for fut in as_completed(futures, loop=client.loop):
            for i, result in zip(index.pop(fut.key), fut.result(), strict=True):
                on_result(i, result)
                bar.update(1)
            fut.release()
    bar.close()


# Seconds to wait for a first worker to join the scheduler before the paths check.
WORKER_WAIT_S = 60.0


def _what_a_worker_sees(raw: str, raw_file: str | None, raw_file_size: int | None, out: str) -> dict[str, Any]:
    """Run on a worker: its host and working folder, and what it cannot see of RAW
    (a folder, and one file of the size the driver sees) and OUT (a writable folder).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     _what_a_worker_sees(folder, None, None, folder)["problems"]
    []
    >>> _what_a_worker_sees("/nowhere/raw", None, None, "/nowhere/out")["problems"]
    ['RAW /nowhere/raw is not a folder there', 'OUT /nowhere/out is not a folder there']
    """
    import socket

    problems = []
    if not os.path.isdir(raw):
        problems.append(f"RAW {raw} is not a folder there")
    elif raw_file is not None:
        try:
            size = os.stat(raw_file).st_size
        except OSError as exc:
            problems.append(f"cannot stat {raw_file} ({exc.strerror})")
        else:
            if size != raw_file_size:
                problems.append(f"{raw_file} holds {size} bytes there and {raw_file_size} on the driver")
            elif not os.access(raw_file, os.R_OK):
                problems.append(f"cannot read {raw_file}")
    if not os.path.isdir(out):
        problems.append(f"OUT {out} is not a folder there")
    elif not os.access(out, os.W_OK | os.X_OK):
        problems.append(f"cannot write into OUT {out}")
    return {"host": socket.gethostname(), "cwd": os.getcwd(), "problems": problems}


def check_cluster_paths(scheduler: str, *, raw: str, raw_file: str | None, out: str) -> dict[str, dict[str, Any]]:
    """Before any per-file work on a cluster: make sure every worker sees RAW and OUT
    at the paths this process sees them (absolute paths, a shared file system).

    Runs :func:`_what_a_worker_sees` once on every worker connected to ``scheduler``
    (waiting up to ``WORKER_WAIT_S`` for a first one). tests/test_cluster.py runs it on
    a real scheduler and workers.

    Parameters
    ----------
    scheduler : str
        The dask.distributed scheduler's address, e.g. ``tcp://10.0.0.5:8786``.
    raw, out : str
        Absolute paths of RAW and OUT as this process sees them.
    raw_file : str or None
        An absolute path of one file in RAW (None when RAW holds none).

    Returns
    -------
    dict
        By worker address: its ``host``, working folder (``cwd``) and ``problems`` (empty).

    Raises
    ------
    UsageError
        When a worker cannot see RAW or the file, or cannot write into OUT (naming the
        worker, its host, its working folder and the path), when a path is relative,
        or when the scheduler cannot be reached or no worker joins it. The run then
        stops before it would have rejected every file as unreadable.
    """
    import asyncio

    from pipeline.core.errors import UsageError

    try:
        from distributed import Client
    except ImportError as exc:
        raise UsageError("--scheduler needs dask.distributed, which is not installed: run pip install '.[cluster]' "
                         "in a Loam checkout (or pip install 'dask[distributed]>=2024.1')") from exc
    for path in (raw, out, raw_file or raw):
        if not os.path.isabs(path):
            raise UsageError(f"{path!r} is a relative path; a worker would read it from its own working folder")
    size = os.stat(raw_file).st_size if raw_file is not None else None
    try:
        client = Client(scheduler, set_as_default=False)
    except OSError as exc:
        raise UsageError(f"cannot reach the dask scheduler at {scheduler}: {exc}") from exc
    with client:
        try:
            client.wait_for_workers(1, timeout=WORKER_WAIT_S)
        except (TimeoutError, asyncio.TimeoutError) as exc:
            raise UsageError(f"no worker joined the scheduler {scheduler} within {WORKER_WAIT_S:.0f} s") from exc
        seen = client.run(_what_a_worker_sees, raw, raw_file, size, out)
    for address, report in sorted(seen.items()):
        if report["problems"]:
            raise UsageError(
                f"dask worker {address} (host {report['host']}, working folder {report['cwd']}) does not see "
                f"this run's files: {'; '.join(report['problems'])}. Every worker must see RAW and OUT at the "
                "same absolute paths as the machine running loam (a shared file system), RAW readable and "
                "OUT writable")
    return seen
