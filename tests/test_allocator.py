"""glibc's malloc thresholds while Loam works (``pipeline/core/allocator.py``).

The behaviour checked is glibc's own, as mallopt(3) documents it: once the environment
fixes a threshold (dask starts its workers with ``MALLOC_TRIM_THRESHOLD_=65536``), every
block above 128 KiB is a fresh mapping whose pages fault in again; at the ceiling of
glibc's own adaptation (32 MiB), such a block comes from the heap and its pages are
reused. Each case runs in a child process started with that environment, which counts
the minor page faults of allocating, filling and freeing a 1 MiB array 200 times.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.core import allocator

REPO = Path(__file__).resolve().parent.parent
ROUNDS = 200
PAGES = (1 << 20) // 4096  # of one 1 MiB array

CHILD = f"""
import json, resource, sys
import numpy as np
from pipeline.core import allocator, parallel
from pipeline.commands import cli

def faults(_=None):
    np.ones(1 << 18, dtype=np.float32)  # a first block, so the heap has grown past it once
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range({ROUNDS}):
        np.ones(1 << 18, dtype=np.float32)
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before

out = {{"as_started": faults()}}
with allocator.adapted():
    out["within_adapted"] = faults()
out["after_adapted"] = faults()
out["in_a_batch"] = parallel._run_batch(faults, [None])[0]
out["after_the_batch"] = faults()
cli.main(["validate", "/nonexistent/out"])
out["after_loam_started"] = faults()
out["in_a_batch_run_by_loam"] = parallel._run_batch(faults, [None])[0]
out["after_that_batch"] = faults()
print(json.dumps(out))
"""


def _child(env: dict[str, str]) -> dict[str, int]:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_") and k != "GLIBC_TUNABLES"}
    done = subprocess.run([sys.executable, "-c", CHILD], capture_output=True, text=True, check=True,
                          env={**environ, **env, "PYTHONPATH": str(REPO)}, cwd=REPO)
    return json.loads(done.stdout.strip().splitlines()[-1])


glibc = pytest.mark.skipif(allocator._mallopt() is None, reason="the C library is not glibc")


@glibc
@pytest.mark.parametrize("env", [{"MALLOC_TRIM_THRESHOLD_": "65536"},
                                 {"GLIBC_TUNABLES": "glibc.malloc.trim_threshold=65536"}])
def test_with_the_threshold_dask_sets_loams_work_reuses_its_pages_and_the_worker_gets_it_back(
        env: dict[str, str]) -> None:
    got = _child(env)
    fresh, reused = ROUNDS * PAGES * 0.8, ROUNDS * PAGES * 0.05
    assert got["as_started"] > fresh  # every round maps the block anew
    assert got["within_adapted"] < reused
    assert got["after_adapted"] > fresh  # the environment's value set again
    assert got["in_a_batch"] < reused  # a cluster worker's batch
    assert got["after_the_batch"] > fresh
    assert got["after_loam_started"] < reused  # `loam` itself, for the rest of its run
    # A batch in loam's own process (a cluster of threads) does not set them back.
    assert got["in_a_batch_run_by_loam"] < reused
    assert got["after_that_batch"] < reused


@glibc
def test_without_such_a_variable_nothing_is_touched() -> None:
    got = _child({})
    reused = ROUNDS * PAGES * 0.05
    assert all(value < reused for value in got.values()), got


def test_the_environment_is_read_as_glibc_reads_it() -> None:
    assert allocator.fixed_thresholds({"HOME": "/root"}) is None
    both = {"MALLOC_TRIM_THRESHOLD_": "65536", "MALLOC_MMAP_THRESHOLD_": "1048576"}
    assert allocator.fixed_thresholds(both) == {allocator.M_TRIM_THRESHOLD: 65536,
                                                allocator.M_MMAP_THRESHOLD: 1048576}
    tunables = {"GLIBC_TUNABLES": "glibc.malloc.mmap_threshold=262144:glibc.elision.enable=1"}
    assert allocator.fixed_thresholds(tunables) == {allocator.M_TRIM_THRESHOLD: 128 << 10,
                                                    allocator.M_MMAP_THRESHOLD: 262144}
    # Other parameters of the same family turn the adaptation off as well.
    assert allocator.fixed_thresholds({"MALLOC_MMAP_MAX_": "0"}) == allocator.GLIBC_DEFAULTS
    # A value Python does not read as glibc would: left to glibc.
    assert allocator.fixed_thresholds({"MALLOC_TRIM_THRESHOLD_": "64k"}) is None
    assert allocator.adapt_process({"HOME": "/root"}) is False
