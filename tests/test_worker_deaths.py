"""Worker processes that die, and a driver that dies: what `loam prepare` leaves behind.

A decoder that crashes its worker costs that one file (a ``decoder_crashed`` reject),
and a driver killed with SIGKILL leaves no worker running (pipeline/core/pool.py describes
the mechanisms).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline.commands.cli import main
from pipeline.core.config import build_config
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from pipeline.stages.audio_file import AudioJob, FileOutcome, condition_file
from pipeline.stages.ingest_probe import ProbeJob, probe_file
from tests.conftest import REPO, speechlike, tree_hash

CRASHING = "spk1/take04.wav"



def _segfault() -> None:
    """Die as a C library's invalid memory access would make this process die."""
    import faulthandler
    import resource

    faulthandler.disable()  # no traceback dump on the test's terminal
    resource.setrlimit(resource.RLIMIT_CORE, (0, 0))  # and no core file
    os.kill(os.getpid(), signal.SIGSEGV)


# Stand-ins for the stages' per-file functions, with a decoder that crashes on one
# file. Module-level, so that a spawned worker finds them too (it imports this module).
def condition_crashing_on_one_file(job: AudioJob) -> FileOutcome:
    if job.row["source_path"] == CRASHING:
        _segfault()
    return condition_file(job)


def probe_crashing_on_one_file(job: ProbeJob) -> dict[str, object]:
    if job.rel == CRASHING:
        _segfault()
    return probe_file(job)


def _write_raw(raw: Path, *, files: int, seconds: float) -> None:
    import soundfile as sf

    for i in range(files):
        folder = raw / f"spk{i % 3}"
        folder.mkdir(parents=True, exist_ok=True)
        sf.write(folder / f"take{i:02d}.wav", speechlike(seconds, 16000, seed=i), 16000, subtype="PCM_16")


def _prepare(raw: Path, out: Path, *, workers: int) -> subprocess.Popen[bytes]:
    """`loam prepare` in a process of its own."""
    return subprocess.Popen([sys.executable, "-m", "pipeline", "prepare", str(raw), str(out),
                             "--workers", str(workers), "--no-progress"],
                            cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def _compared(out: Path) -> dict[str, object]:
    """The outputs a file rejected in the audio stage leaves unchanged: every file's
    bytes but those of logs, caches, the config record, ingest's outputs (the file is in
    its manifest) and the rejects and summaries that count it. A Parquet file is compared
    by its rows and schema without ``loam.inputs_sha256``, the hash of the stage's input
    manifests, which names ingest's."""
    skipped = ("logs", "cache", "stages/ingest.", "stages/audio.rejects", "stages/audio.summary")
    compared: dict[str, object] = {}
    for rel, digest in tree_hash(out).items():
        if rel.startswith(skipped) or rel in ("config.resolved.json", "manifests/rejected.parquet"):
            continue
        if rel.endswith(".parquet"):
            table = pq.read_table(out / rel)
            metadata = {k: v for k, v in (table.schema.metadata or {}).items() if k != b"loam.inputs_sha256"}
            compared[rel] = (table.schema.with_metadata(metadata), table.to_pylist())
        else:
            compared[rel] = digest
    return compared


@pytest.mark.parametrize("workers", [1, 2])
def test_a_file_that_crashes_its_decoder_is_rejected_and_the_run_goes_on(
        tmp_path: Path, workers: int, monkeypatch: pytest.MonkeyPatch) -> None:
    raw = tmp_path / "raw"
    _write_raw(raw, files=6, seconds=2.5)
    out = tmp_path / "out"  # the same path for both runs: the summaries name it
    argv = ["prepare", str(raw), str(out), "--workers", str(workers), "--no-progress"]
    with monkeypatch.context() as patch:
        patch.setattr("pipeline.stages.audio.condition_file", condition_crashing_on_one_file)
        assert main(argv) == 0

    rejected = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    (row,) = [r for r in rejected if r["source_path"] == CRASHING]
    assert row["reason"] == "decoder_crashed" and row["stage"] == "audio"
    assert row["detail"].startswith(f"{CRASHING}: the worker process conditioning it died (killed by signal SIGSEGV), "
                                  "also when it ran alone; expected a file")
    audio = pq.read_table(out / "stages" / "audio.parquet").column("source_path").to_pylist()
    assert CRASHING not in audio and len(set(audio)) == 5
    crashed = _compared(out)

    # The same dump without that file, and no crash: the same outputs.
    shutil.rmtree(out)
    (raw / CRASHING).unlink()
    assert main(argv) == 0
    assert crashed == _compared(out)
    others = [r for r in rejected if r["source_path"] != CRASHING]
    assert others == pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()


def test_a_file_that_crashes_the_probe_is_rejected_at_ingest_and_not_remembered(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    raw, out = tmp_path / "raw", tmp_path / "out"
    _write_raw(raw, files=6, seconds=1.0)
    cfg = build_config({})
    with monkeypatch.context() as patch:
        patch.setattr("pipeline.stages.ingest_probe.probe_file", probe_crashing_on_one_file)
        Runner(raw, out, cfg, stages=STAGES, workers=2).prepare(("ingest",))
    (row,) = pq.read_table(out / "stages" / "ingest.rejects.parquet").to_pylist()
    assert row["source_path"] == CRASHING and row["reason"] == "decoder_crashed"
    assert row["detail"].startswith(f"{CRASHING}: the worker process probing it died (killed by signal SIGSEGV), "
                                  "also when it ran alone; expected a file")
    assert CRASHING not in pq.read_table(out / "stages" / "ingest.parquet").column("source_path").to_pylist()
    # The crash may have been the library's fault: the next run probes the file again.
    Runner(raw, out, cfg, stages=STAGES, workers=2).prepare(("ingest",))
    assert CRASHING in pq.read_table(out / "stages" / "ingest.parquet").column("source_path").to_pylist()


def _children(pid: int) -> set[int]:
    """The live child processes of ``pid`` (Linux: /proc; elsewhere psutil, which the
    cluster extra in the dev dependencies brings)."""
    tasks = Path(f"/proc/{pid}/task")
    if tasks.is_dir():
        found: set[int] = set()
        for task in tasks.iterdir():
            with contextlib.suppress(OSError):  # the task ended meanwhile
                found.update(int(c) for c in (task / "children").read_text().split())
        return found
    import psutil

    try:
        return {c.pid for c in psutil.Process(pid).children()}
    except psutil.NoSuchProcess:
        return set()


def _descendants(pid: int) -> set[int]:
    found, todo = set(), [pid]
    while todo:
        for child in _children(todo.pop()) - found:
            found.add(child)
            todo.append(child)
    return found


def _start_time(pid: int) -> str | None:
    """The process's start time (tells a pid apart from a later one that reuses it),
    or None when it has ended: gone, or a zombie waiting for init to reap it."""
    stat = Path(f"/proc/{pid}/stat")
    if Path("/proc/self/stat").is_file():
        try:
            fields = stat.read_text().rpartition(")")[2].split()
        except OSError:
            return None
        return None if fields[0] in ("Z", "X") else fields[19]
    import psutil

    try:
        process = psutil.Process(pid)
        return None if process.status() == psutil.STATUS_ZOMBIE else str(process.create_time())
    except psutil.NoSuchProcess:
        return None


def test_a_killed_run_leaves_no_worker_behind(tmp_path: Path) -> None:
    # What the out-of-memory killer or a batch scheduler's pre-emption does to `loam`.
    raw, out = tmp_path / "raw", tmp_path / "out"
    _write_raw(raw, files=16, seconds=60)  # several seconds of audio-stage work on 2 workers
    driver = _prepare(raw, out, workers=2)
    workers: dict[int, str | None] = {}
    try:
        # Mid audio stage: a first clip is written and the pool's workers are running.
        deadline = time.monotonic() + 120
        while not (any((out / "audio").rglob("*.*")) and _descendants(driver.pid)):
            assert driver.poll() is None and time.monotonic() < deadline, "the run ended before its audio stage"
            time.sleep(0.02)
        workers = {pid: _start_time(pid) for pid in _descendants(driver.pid)}
        driver.send_signal(signal.SIGKILL)
        driver.wait()
        killed_at = time.monotonic()
        assert workers and driver.returncode == -signal.SIGKILL

        # A short, bounded wait for the orphans to notice (no claim about speed).
        left = dict(workers)
        while left and time.monotonic() - killed_at < 10:
            left = {pid: start for pid, start in left.items() if start is not None and _start_time(pid) == start}
            time.sleep(0.05)
        assert not left, f"{len(left)} of the run's {len(workers)} worker processes outlived it"
    finally:
        if driver.poll() is None:
            driver.kill()
            driver.wait()
        for pid, start in workers.items():  # only when the test failed
            if start is not None and _start_time(pid) == start:
                os.kill(pid, signal.SIGKILL)
