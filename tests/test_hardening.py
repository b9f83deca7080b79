"""Crashes, concurrent runs and disk errors never leave a corrupt or half-written output."""

from __future__ import annotations

import errno
import io
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path
from unittest import mock

import pyarrow.parquet as pq
import pytest

from pipeline.commands.cli import main
from pipeline.core.names import LOCK as LOCK_NAME


def loam(*args: str, timeout: float | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "pipeline", *args], capture_output=True, text=True, timeout=timeout)


def outputs(out: Path) -> dict[str, bytes]:
    """Every manifest, summary, audio file and the ledger by relative path. Logs and
    caches are excluded, and so is the part of the split summary that describes the
    ledger as it was read (its change report and whether one existed), which rightly
    differs when an earlier (killed) run had already written a ledger."""
    files = {"ledger.tsv": (out / "ledger.tsv").read_bytes()} if (out / "ledger.tsv").exists() else {}
    for sub in ("stages", "manifests", "audio", "lexicon"):
        for p in sorted((out / sub).rglob("*")) if (out / sub).exists() else []:
            if p.is_file():
                files[str(p.relative_to(out))] = p.read_bytes()
    split_summary = files.get("stages/split.summary.json")
    if split_summary is not None:
        summary = json.loads(split_summary)
        summary.pop("changes", None)
        summary.get("ledger", {}).pop("read", None)
        files["stages/split.summary.json"] = json.dumps(summary, sort_keys=True).encode()
    return files


def test_second_run_exits_at_once_while_one_holds_the_lock(small_raw: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / LOCK_NAME).write_text(f"{holder.pid}\n")
        # A hang guard, not a timing check: waiting for the holder would take its full minute.
        result = loam("prepare", str(small_raw), str(out), timeout=50)
        assert result.returncode == 2
        assert f"in use by another loam run (pid {holder.pid}" in result.stderr
        assert not (out / "stages").exists()
    finally:
        holder.kill()
        holder.wait()


def test_stale_lock_is_taken_over(small_raw: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (out / LOCK_NAME).write_text(f"{dead.pid}\n")
    assert main(["stage", "ingest", str(small_raw), str(out), "--set", 'ingest.metadata="meta.csv"']) == 0
    assert not (out / LOCK_NAME).exists()
    assert (out / "stages" / "ingest.parquet").exists()


def test_full_disk_midway_leaves_old_manifest_intact(small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    args = ["stage", "ingest", str(small_raw), str(out), "--set", 'ingest.metadata="meta.csv"']
    assert main(args) == 0
    before = (out / "stages" / "ingest.parquet").read_bytes()
    # A new transcript: the manifest's bytes change (a file that would keep its bytes is
    # not written at all).
    (small_raw / "spk_a" / "a1.txt").write_text("a transcript that changed")
    # The manifest's bytes are made in memory, then written to a temporary beside it
    # (pipeline.core.fsio.write_bytes_atomic; the runner writes a main manifest under a
    # hidden name first, renamed once the stage's other files are in place): the
    # temporary of ingest.parquet takes half of them, then the disk is full.
    from pipeline.core import fsio

    real_create, real_open = fsio._create_temporary, open
    failing: set[int] = set()
    calls = {"n": 0}

    def create(target: str) -> tuple[str, int]:
        tmp, fd = real_create(target)
        if os.path.basename(target).startswith((".loam-ingest.parquet.", "ingest.parquet")):
            failing.add(fd)
        return tmp, fd

    class HalfWriter(io.FileIO):
        def write(self, data):  # type: ignore[no-untyped-def]
            calls["n"] += 1
            super().write(bytes(data)[: len(data) // 2])
            raise OSError(errno.ENOSPC, "No space left on device")

    def fake_open(file, *a, **k):  # type: ignore[no-untyped-def]
        return HalfWriter(file, "wb") if isinstance(file, int) and file in failing else real_open(file, *a, **k)

    with mock.patch.object(fsio, "_create_temporary", create), \
            mock.patch("pipeline.core.fsio.open", fake_open, create=True):
        code = main(args)
    assert code == 1 and calls["n"] == 1
    assert "No space left on device" in capsys.readouterr().err
    assert (out / "stages" / "ingest.parquet").read_bytes() == before
    assert not list(out.rglob(".loam-*.tmp"))
    pq.read_table(out / "stages" / "ingest.parquet")


def test_unwritable_out_is_a_clear_error(small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    assert main(["prepare", str(small_raw), str(blocker / "out")]) == 2
    assert "cannot create the folder" in capsys.readouterr().err

    out = tmp_path / "out"
    with mock.patch("pipeline.core.fsio.tempfile.mkstemp", side_effect=PermissionError(errno.EACCES, "Permission denied", str(out))):
        assert main(["stage", "ingest", str(small_raw), str(out)]) == 1
    assert "Permission denied" in capsys.readouterr().err
    assert not (out / "stages" / "ingest.parquet").exists()


def test_out_inside_raw_is_refused(small_raw: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["prepare", str(small_raw), str(small_raw / "out")]) == 2
    assert "must not be inside RAW" in capsys.readouterr().err
    assert not (small_raw / "out").exists()


@pytest.mark.slow
def test_sigkill_at_random_points_then_rerun_is_byte_identical(small_raw: Path, tmp_path: Path) -> None:
    args = ["--set", 'ingest.metadata="meta.csv"', "--set", 'split.labelled_budgets=["1s"]',
            "--set", 'split.heldout="0%"', "--set", 'split.group_by="clip"', "--workers", "2"]
    clean = tmp_path / "clean"
    done = loam("prepare", str(small_raw), str(clean), *args)
    assert done.returncode == 0, done.stderr
    expected = outputs(clean)
    rng = random.Random(8)  # fixed seed: the kill points are reproducible
    out = tmp_path / "killed"
    for _ in range(4):
        proc = subprocess.Popen([sys.executable, "-m", "pipeline", "prepare", str(small_raw), str(out), *args],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        time.sleep(rng.uniform(0.2, 3.0))
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        # Whatever is visible under a final name is complete: every Parquet file reads.
        for rel in outputs(out):
            if rel.endswith(".parquet"):
                pq.read_table(out / rel)
    final = loam("prepare", str(small_raw), str(out), *args)
    assert final.returncode == 0, final.stderr
    assert outputs(out) == expected
    assert not list(out.rglob(".loam-*.tmp"))
