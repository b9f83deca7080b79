"""Per-file work on a real dask.distributed cluster gives byte-identical output, and a
cluster whose workers cannot see the run's files stops the run before any work.

The cluster is what a user starts by hand: ``dask scheduler`` and ``dask worker
--nworkers 2`` processes, started in another working folder than ``loam``, with the
BLAS settings a worker gets by default (not the one thread ``loam`` asks for in its
own pool: dask's nanny would set one thread too, so that setting is unset here).
``loam prepare`` is given relative paths, as a user typing in the repository would.
"""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.conftest import DEMO, REPO, tree_hash

distributed = pytest.importorskip("distributed")

BLAS_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_CORETYPE")
WORKERS = 2
# Everything a run writes that a trainer, a comparison or a hash would read.
COMPARED = ("stages", "manifests", "audio", "lexicon")


@contextlib.contextmanager
def dask_cluster(folder: Path) -> Iterator[str]:
    """A scheduler and WORKERS worker processes started in ``folder``; yields the address."""
    folder.mkdir(parents=True, exist_ok=True)
    # dask's nanny sets the BLAS thread variables to 1 in every worker it spawns; None
    # in a config file unsets an entry (distributed.nanny._get_env_variables).
    (folder / "dask.yaml").write_text(
        "distributed:\n  nanny:\n    pre-spawn-environ:\n"
        + "".join(f"      {v}: null\n" for v in BLAS_VARIABLES[:3]), encoding="utf-8")
    env = {k: v for k, v in os.environ.items() if k not in BLAS_VARIABLES}
    env["DASK_CONFIG"] = str(folder / "dask.yaml")
    scheduler_file = folder / "scheduler.json"
    common = ["--no-dashboard", "--scheduler-file", str(scheduler_file)]
    log = (folder / "cluster.log").open("wb")
    procs = [subprocess.Popen([sys.executable, "-m", "dask", "scheduler", "--host", "127.0.0.1", "--port", "0",
                               *common], cwd=folder, env=env, stdout=log, stderr=log)]
    try:
        procs.append(subprocess.Popen([sys.executable, "-m", "dask", "worker", "--nworkers", str(WORKERS),
                                       "--nthreads", "1", "--host", "127.0.0.1", *common],
                                      cwd=folder, env=env, stdout=log, stderr=log))
        deadline = time.monotonic() + 60
        address = _scheduler_address(scheduler_file)
        while address is None and time.monotonic() < deadline:
            time.sleep(0.2)
            address = _scheduler_address(scheduler_file)
        assert address is not None, f"no scheduler address in {scheduler_file} after 60 s"
        with distributed.Client(address, set_as_default=False) as client:
            client.wait_for_workers(WORKERS, timeout=120)
        yield address
    finally:
        for proc in reversed(procs):
            proc.terminate()
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        log.close()


def _scheduler_address(scheduler_file: Path) -> str | None:
    """The address the scheduler wrote, or None while the file is missing or not yet
    whole JSON (the scheduler writes it in place: it was once read empty)."""
    try:
        return json.loads(scheduler_file.read_text(encoding="utf-8"))["address"]
    except (OSError, ValueError, KeyError):
        return None


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[str, Path]]:
    folder = tmp_path_factory.mktemp("elsewhere")
    with dask_cluster(folder) as address:
        yield address, folder


def loam(*args: str) -> subprocess.CompletedProcess:
    """``loam`` run from the repository folder, as a user would type it there."""
    return subprocess.run([sys.executable, "-m", "pipeline", *args, "--no-progress"], cwd=REPO,
                          capture_output=True, text=True, check=False)


def compared(out: Path) -> dict[str, str]:
    hashes = tree_hash(out)
    return {rel: h for rel, h in hashes.items() if rel.split(os.sep)[0] in COMPARED or rel == "ledger.tsv"}


@pytest.mark.slow
def test_cluster_with_relative_paths_matches_a_one_worker_local_run(cluster: tuple[str, Path],
                                                                     tmp_path: Path) -> None:
    address, elsewhere = cluster
    config = os.path.relpath(DEMO / "corpus.toml", REPO)
    raw = os.path.relpath(DEMO, REPO)
    local = loam("prepare", raw, str(tmp_path / "local"), "--config", config, "--workers", "1")
    assert local.returncode == 0, local.stderr
    out = os.path.relpath(tmp_path / "cluster", REPO)
    on_cluster = loam("prepare", raw, out, "--config", config, "--scheduler", address)
    assert on_cluster.returncode == 0, on_cluster.stderr
    assert "see RAW and OUT" in on_cluster.stderr

    with distributed.Client(address, set_as_default=False) as client:
        # The premise: the workers did run elsewhere, with their own BLAS settings.
        assert set(client.run(os.getcwd).values()) == {str(elsewhere)}
        import threadpoolctl

        threads = {i["num_threads"] for info in client.run(threadpoolctl.threadpool_info).values()
                   for i in info if i["internal_api"] == "openblas"}
        assert threads, "the workers never loaded numpy's BLAS"
        if (os.cpu_count() or 1) >= 2:
            assert 1 not in threads, threads  # the local run's pool used one BLAS thread
        blas_env = client.run(os.getenv, "OPENBLAS_NUM_THREADS")  # a function, not os.environ pickled here
        assert not any(blas_env.values()), blas_env

    expected = compared(tmp_path / "local")
    assert any(rel.startswith("audio") for rel in expected)
    assert compared(tmp_path / "cluster") == expected


@pytest.mark.slow
def test_workers_that_cannot_see_raw_stop_the_run_with_exit_2(cluster: tuple[str, Path], tmp_path: Path) -> None:
    # /proc/self/cwd/... is an absolute path that each process resolves from its own
    # working folder: the driver's (the repository) holds demo_corpus, the workers'
    # does not, as a share mounted on the driver's machine only would look.
    address, elsewhere = cluster
    raw = "/proc/self/cwd/" + os.path.relpath(DEMO, REPO)
    done = loam("prepare", raw, str(tmp_path / "out"), "--scheduler", address)
    assert done.returncode == 2, done.stderr
    assert f"working folder {elsewhere}" in done.stderr and f"RAW {raw} is not a folder there" in done.stderr
    assert "same absolute paths" in done.stderr
    # Stopped before any per-file work: no stage wrote anything.
    assert not (tmp_path / "out" / "stages").exists()


def test_every_audio_file_unreadable_ends_with_exit_1_naming_the_environment(tmp_path: Path) -> None:
    # Links to files that are not there: every open fails as it would on a share that
    # is not mounted (a permission cannot be used: the tests may run as root).
    raw = tmp_path / "raw"
    (raw / "spk").mkdir(parents=True)
    for name in ("a.wav", "b.flac"):
        (raw / "spk" / name).symlink_to(raw / "spk" / f"gone-{name}")
    done = loam("prepare", str(raw), str(tmp_path / "out"))
    assert done.returncode == 1, done.stderr
    assert "every one of the 2 audio files was rejected as unreadable" in done.stderr
    assert "the environment is the likely cause" in done.stderr
    # The rejects are written, so the user can see every file and its reason.
    import pyarrow.parquet as pq

    rejected = pq.read_table(tmp_path / "out" / "manifests" / "rejected.parquet").to_pylist()
    assert sorted(r["source_path"] for r in rejected) == ["spk/a.wav", "spk/b.flac"]
    assert {r["reason"] for r in rejected} == {"unreadable"}
