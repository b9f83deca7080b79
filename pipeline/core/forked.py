"""One call computed in a forked child process while this process goes on.

:func:`begin` forks (where fork is the rule: Linux, as for the worker pools of
:mod:`pipeline.core.pool`); the child computes ``func(*args)``, sends the result back
through a pipe and ends. :meth:`Begun.result` waits for it. When there is no fork, or
the child fails in any way (an exception, a crash, a result that cannot be sent), the
call runs again in this process, where an exception is raised as usual: the result is
the same whichever process made it, so nothing downstream depends on where it ran.

The child is forked while this process may have other threads (the runner's writer
and encoder, writing Parquet): a lock one of them held is copied held. So the call must
be plain Python and numpy work on data already in memory, with its modules imported
before the fork: no Arrow, no logging, no files. The allocator's locks are safe (the C
library resets them in a forked child), as is the import lock (Python does).
"""

from __future__ import annotations

import contextlib
import os
import signal
from collections.abc import Callable
from typing import Any, Generic, NoReturn, TypeVar

T = TypeVar("T")


class Begun(Generic[T]):
    """A call begun by :func:`begin`; :meth:`result` gives its value."""

    def __init__(self, func: Callable[..., T], args: tuple[Any, ...], *, fork: bool) -> None:
        self._func, self._args = func, args
        self._pid, self._read = 0, -1
        if fork:
            self._start()

    def _start(self) -> None:
        read, write = os.pipe()
        parent = os.getpid()
        pid = os.fork()
        if pid == 0:
            child_sends(read, write, lambda: self._computed(parent))
        os.close(write)
        self._pid, self._read = pid, read

    def _computed(self, parent: int) -> bytes:
        """In the child: the call's value, pickled; the child ends with its parent."""
        import pickle  # here, as below: RawWalk's helper, at every command's start, needs neither

        from pipeline.core.pool import guard_worker

        guard_worker(parent)
        return pickle.dumps(self._func(*self._args), protocol=pickle.HIGHEST_PROTOCOL)

    def result(self) -> T:
        """The call's value: the child's, or computed here when it sent none."""
        if self._pid:
            with open(self._read, "rb", closefd=True) as fh:
                data = fh.read()
            self._read = -1
            _, status = os.waitpid(self._pid, 0)
            self._pid = 0
            if status == 0 and data:
                import pickle

                with contextlib.suppress(Exception):
                    value: T = pickle.loads(data)
                    self._func, self._args = _done, ()  # the arguments are let go
                    return value
        func, args = self._func, self._args
        self._func, self._args = _done, ()
        return func(*args)

    def cancel(self) -> None:
        """End the child without its result (the caller stopped before it needed it)."""
        if self._read >= 0:
            os.close(self._read)
            self._read = -1
        if self._pid:
            with contextlib.suppress(ProcessLookupError):
                os.kill(self._pid, signal.SIGKILL)
            with contextlib.suppress(ChildProcessError):
                os.waitpid(self._pid, 0)
            self._pid = 0


def child_sends(read: int, write: int, data: Callable[[], bytes]) -> NoReturn:
    """In a forked child: close the pipe's read end ``read``, take SIGINT's default action
    back, write what ``data()`` gives to the write end ``write`` and end without cleanup
    (status 1, with nothing written, if ``data`` raised). No example: it ends the process.
    """
    code = 1
    try:
        os.close(read)
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        payload = data()
        with open(write, "wb", closefd=True) as fh:
            fh.write(payload)
        code = 0
    finally:
        os._exit(code)


def _done() -> Any:
    raise RuntimeError("the result of a begun call was asked for twice")


def begin(func: Callable[..., T], *args: Any, fork: bool | None = None) -> Begun[T]:
    """Begin ``func(*args)`` in a forked child process (see the module docstring).

    Parameters
    ----------
    func : callable
        The call: plain Python and numpy work whose modules are imported already.
    *args
        Its arguments: the child sees them as they are at the fork, without a copy.
    fork : bool, optional
        Fork a child; by default where fork is the rule (Linux). False computes the
        call in this process when its result is asked for.

    Returns
    -------
    Begun
        Its :meth:`Begun.result` waits for the value.

    Examples
    --------
    >>> import numpy as np
    >>> begun = begin(np.cumsum, np.arange(5))
    >>> begun.result().tolist()
    [0, 1, 3, 6, 10]
    >>> begin(divmod, 7, 2, fork=False).result()
    (3, 1)
    """
    if fork is None:
        from pipeline.core.pool import start_method

        fork = start_method() == "fork"
    return Begun(func, args, fork=fork)
