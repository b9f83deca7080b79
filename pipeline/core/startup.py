"""Start-up and shut-down machinery: what a ``loam`` process does only to start and end
fast, kept here so the modules that use it read as what they are about.

Each piece says what it saves, as measured on the project's two-core development machine
(shared with other work, so the figures are approximate). None changes an output: the
tests that compare outputs across worker counts, BLAS settings and reruns run with them.
This module imports only the standard library, so that importing it costs nothing and
can happen before numpy is imported.
"""

from __future__ import annotations

import contextlib
import logging
import os
import sys
import threading
from collections.abc import Iterator
from typing import Any, NoReturn

# One BLAS thread per process. Parallelism is one process per core (pipeline.core.parallel);
# a BLAS thread pool in each of them only spins for the same cores: the per-file audio work
# of the bench workload took 10.2 CPU seconds with the pools and 6.4 without, on an idle
# machine. Measured again on a busy one, a cold prepare of six of its speakers (86 files)
# took 3.4 to 3.5 CPU seconds with one thread per process and 3.6 to 3.7 with two (2 runs
# each). No output depends on it (no written number goes through a BLAS product,
# DEVELOPERS.md; tests/test_blas_independence.py).
BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def limit_blas_threads() -> None:
    """Default each variable of ``BLAS_THREAD_VARIABLES`` to 1; a value already set wins.

    Takes effect only in a process that has not imported numpy yet (and in the processes
    it starts), so ``loam`` calls it first thing.

    Returns
    -------
    None
        The variables are set in ``os.environ``.

    Examples
    --------
    A user's own setting stays (``patch.dict`` restores the environment afterwards):

    >>> from unittest import mock
    >>> with mock.patch.dict(os.environ, {"OMP_NUM_THREADS": "4"}):
    ...     _ = os.environ.pop("OPENBLAS_NUM_THREADS", None)
    ...     limit_blas_threads()
    ...     os.environ["OPENBLAS_NUM_THREADS"], os.environ["OMP_NUM_THREADS"]
    ('1', '4')
    """
    for variable in BLAS_THREAD_VARIABLES:
        os.environ.setdefault(variable, "1")


class _RefusePandas:
    """A meta-path finder that makes ``import pandas`` fail in one thread."""

    def __init__(self) -> None:
        self.thread = threading.get_ident()

    def find_spec(self, name: str, path: Any = None, target: Any = None) -> None:
        if threading.get_ident() == self.thread and name.partition(".")[0] == "pandas":
            raise ModuleNotFoundError(f"{name} is not imported while loam converts to Arrow", name=name)


@contextlib.contextmanager
def pandas_left_unloaded() -> Iterator[None]:
    """Convert Python values to Arrow without pyarrow importing pandas for it.

    The first conversion of a Python object (``pa.array``, ``pa.table``, a scalar in a
    compute call) imports pandas, only to ask whether the object is a pandas one. The
    first ``pa.table`` of a fresh process took 0.32 to 0.86 s with that import and 0.003
    to 0.037 s without it (5 processes each, on a busy two-core machine; 0.15 to 0.3 s
    on an idle one, a fifth of a small rebuild). No pandas object can exist while pandas is not imported, so refusing the
    import for the conversion changes no result. pyarrow does not count a refused import
    against later calls that need pandas (``to_pandas``, ``Table.from_pandas``): they
    import it then, and once pandas is loaded the refusal is bypassed
    (tests/test_manifest.py checks both).

    Returns
    -------
    contextlib.AbstractContextManager
        A context in which this thread cannot import pandas (a no-op when pandas is
        already loaded).

    Examples
    --------
    >>> import pyarrow as pa
    >>> with pandas_left_unloaded():
    ...     pa.array([1, 2]).to_pylist()
    [1, 2]
    """
    if "pandas" in sys.modules:
        yield
        return
    finder = _RefusePandas()
    sys.meta_path.insert(0, finder)
    try:
        yield
    finally:
        sys.meta_path.remove(finder)


def exit_without_teardown(code: int) -> NoReturn:
    """End the process with ``code`` once logs and standard streams are flushed, without
    tearing the interpreter down.

    Freeing every object of a finished run (CMUdict's index, the imported libraries)
    costs time for nothing, as the process ends anyway: after a cold ``loam prepare`` of
    the demo corpus, the process was gone 0.70 to 1.15 s after ``main`` returned with the
    teardown and 0.03 to 0.10 s without it (3 runs each, on a busy two-core machine;
    about 0.25 s on an idle one, a tenth of a small rebuild).
    Call it only when every output file is closed and renamed into place (the ``loam``
    command's last step); tests/test_runner.py checks that logs, console and exit code
    are complete.

    Parameters
    ----------
    code : int
        The process's exit status.

    Returns
    -------
    NoReturn
        The process ends here. (No example: it would end the test run.)
    """
    logging.shutdown()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
