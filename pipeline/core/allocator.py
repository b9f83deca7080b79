"""glibc's malloc thresholds, put back where its own adaptation takes them when the
environment fixed them.

glibc maps every block above a threshold with mmap and gives free memory at the top of
the heap back above another. It raises both by itself as a program frees large blocks,
up to 32 MiB for mapping and twice that for giving back (mallopt(3), "M_MMAP_THRESHOLD":
the dynamic threshold; "DEFAULT_MMAP_THRESHOLD_MAX" is 4 * 1024 * 1024 * sizeof(long);
these values are the manual page's as remembered, and tests/test_allocator.py checks
the behaviour they describe, not the numbers).
Setting any of these parameters, in the environment (``MALLOC_TRIM_THRESHOLD_``,
``MALLOC_MMAP_THRESHOLD_``, ``MALLOC_TOP_PAD_``, ``MALLOC_MMAP_MAX_``, or the same as
``GLIBC_TUNABLES``) or by ``mallopt``, turns that adaptation off for the process.

dask's nanny starts every worker with ``MALLOC_TRIM_THRESHOLD_=65536`` (its
``distributed.nanny.pre-spawn-environ`` default). There every array above 128 KiB that
the per-file work allocates (a decoded block, a spectrum, a clip) is a fresh mapping whose
pages fault in again, and every free unmaps it. Measured on 10,000 of the scale
benchmark's sources, a two-worker LocalCluster: the audio stage took 20.1 and 20.3 s
with the variable, 16.8 s without it, and 16.4 s in a local pool of two workers; the
split stage in a driver started with it took 2.42 s against 1.46 s
(docs/performance.md). So Loam sets the two thresholds to the ceiling of glibc's own
adaptation while its work runs: in its own processes for the whole run, and on a
cluster's workers for each batch, after which the environment's values are set again
(the workers are the cluster's, and may run other work between batches).

Nothing is done where the environment fixes none of them (glibc adapts by itself), or
where the C library is not glibc.
"""

from __future__ import annotations

import contextlib
import functools
import os
import threading
from collections.abc import Iterator, Mapping
from typing import Any

# mallopt(3) parameter numbers (glibc's malloc.h).
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
# The ceiling of glibc's own adaptation on 64-bit systems (mallopt(3)): blocks up to
# 32 MiB come from the heap, and free memory above 64 MiB at its top is given back.
ADAPTED = {M_MMAP_THRESHOLD: 32 << 20, M_TRIM_THRESHOLD: 64 << 20}
# glibc's starting values, which stay in force once the adaptation is off (mallopt(3)).
GLIBC_DEFAULTS = {M_MMAP_THRESHOLD: 128 << 10, M_TRIM_THRESHOLD: 128 << 10}

_VARIABLES = {"MALLOC_TRIM_THRESHOLD_": M_TRIM_THRESHOLD, "MALLOC_MMAP_THRESHOLD_": M_MMAP_THRESHOLD,
              "MALLOC_TOP_PAD_": None, "MALLOC_MMAP_MAX_": None}
_TUNABLES = {"glibc.malloc.trim_threshold": M_TRIM_THRESHOLD, "glibc.malloc.mmap_threshold": M_MMAP_THRESHOLD,
             "glibc.malloc.top_pad": None, "glibc.malloc.mmap_max": None}


def fixed_thresholds(environ: Mapping[str, str]) -> dict[int, int] | None:
    """The two thresholds as a process started with ``environ`` has them, when the
    environment turned glibc's adaptation off; None when it did not.

    Examples
    --------
    >>> fixed_thresholds({"PATH": "/usr/bin"}) is None
    True
    >>> fixed_thresholds({"MALLOC_TRIM_THRESHOLD_": "65536"}) == {M_MMAP_THRESHOLD: 131072, M_TRIM_THRESHOLD: 65536}
    True
    >>> fixed_thresholds({"GLIBC_TUNABLES": "glibc.malloc.top_pad=0"}) == GLIBC_DEFAULTS
    True
    """
    settings: list[tuple[int | None, str]] = [
        (param, environ[name]) for name, param in _VARIABLES.items() if name in environ]
    for item in environ.get("GLIBC_TUNABLES", "").split(":"):
        name, _, value = item.partition("=")
        if name in _TUNABLES:
            settings.append((_TUNABLES[name], value))
    if not settings:
        return None
    values = dict(GLIBC_DEFAULTS)
    for param, value in settings:
        if param is not None:
            try:
                values[param] = int(value, 0)
            except ValueError:
                return None  # a value glibc would read its own way: left as it is
    return values


@functools.cache
def _mallopt() -> Any:
    """glibc's mallopt, or None where the C library is another (looked up once)."""
    try:
        if not os.confstr("CS_GNU_LIBC_VERSION").startswith("glibc"):
            return None
        import ctypes

        return ctypes.CDLL(None).mallopt
    except (ValueError, OSError, AttributeError):  # no such confstr name here, or no mallopt
        return None


def _set(values: Mapping[int, int]) -> bool:
    mallopt = _mallopt()
    if mallopt is None:
        return False
    return all(mallopt(param, value) == 1 for param, value in values.items())


_lock = threading.Lock()
_holders = 0
_whole_process = False  # adapt_process has set them for good: adapted() leaves them so


def adapt_process(environ: Mapping[str, str] = os.environ) -> bool:
    """For the rest of this process (and the processes it forks), the thresholds at the
    ceiling of glibc's adaptation, when the environment fixed them; whether it did so."""
    global _whole_process
    done = fixed_thresholds(environ) is not None and _set(ADAPTED)
    _whole_process = _whole_process or done
    return done


@contextlib.contextmanager
def adapted(environ: Mapping[str, str] = os.environ) -> Iterator[None]:
    """Within the block, the thresholds at the ceiling of glibc's adaptation when the
    environment fixed them; after the last of the blocks that overlap in this process
    (a worker may run several threads), the environment's values again; nothing in a
    process that :func:`adapt_process` set for good (``loam`` itself, whose batches run
    in the same process on a cluster of threads)."""
    global _holders
    fixed = fixed_thresholds(environ)
    if fixed is None or _whole_process:
        yield
        return
    with _lock:
        if _holders == 0:
            _set(ADAPTED)
        _holders += 1
    try:
        yield
    finally:
        with _lock:
            _holders -= 1
            if _holders == 0:
                _set(fixed)
