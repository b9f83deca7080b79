"""``bench/bench_scale.py``'s rebuild rounds start each round from the same OUT.

The rounds keep OUT as hard links and put it back after each round; that holds only
while the runs replace files by renames. Here a stand-in for ``loam prepare`` writes
as Loam does (a new file, a replaced file, the run log), or changes a file in place,
which the benchmark must refuse to time.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import pytest

from bench import bench_scale


def _out(tmp_path: Path) -> Path:
    out = tmp_path / "out"
    (out / "audio").mkdir(parents=True)
    (out / "logs").mkdir()
    (out / "audio" / "a.flac").write_bytes(b"old clip")
    (out / "ledger.tsv").write_text("old ledger\n")
    return out


def _replace(path: Path, data: str) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(data)
    os.replace(tmp, path)


def _runs(walls: list[float], *, in_place: bool = False) -> Any:
    calls = iter(walls)

    def prepare(raw: Path, out: Path, workers: int, *extra: str) -> dict[str, Any]:
        wall = next(calls)
        assert (out / "ledger.tsv").read_text() == "old ledger\n"  # every round starts from the same state
        assert not (out / "audio" / "new.flac").exists()
        (out / "audio" / "new.flac").write_bytes(b"new clip")
        if in_place:
            with open(out / "ledger.tsv", "a") as f:
                f.write("appended\n")
        else:
            _replace(out / "ledger.tsv", "new ledger\n")
        _replace(out / "logs" / "last-run.json", json.dumps({"stages": [{"name": "audio", "run_stats": {"n": 1}}]}))
        return {"wall_s": wall}

    return prepare


def test_rounds_restart_from_the_same_state_and_the_fastest_counts(tmp_path: Path, monkeypatch: Any) -> None:
    out = _out(tmp_path)
    inode = (out / "audio" / "a.flac").stat().st_ino
    monkeypatch.setattr(bench_scale, "prepare", _runs([7.5, 6.9, 7.2]))
    best = bench_scale.rebuild_rounds(tmp_path / "raw", out, 2, 3)
    assert best["wall_s"] == 6.9 and best["all_wall_s"] == [7.5, 6.9, 7.2]
    # OUT is left as the last round made it; the kept copy is gone; old files keep their inodes.
    assert (out / "ledger.tsv").read_text() == "new ledger\n"
    assert (out / "audio" / "a.flac").stat().st_ino == inode
    assert not out.with_name("out.before-rebuild").exists()


def test_a_file_changed_in_place_stops_the_rounds(tmp_path: Path, monkeypatch: Any) -> None:
    out = _out(tmp_path)
    monkeypatch.setattr(bench_scale, "prepare", _runs([7.0, 7.0], in_place=True))
    with pytest.raises(SystemExit, match="in place"):
        bench_scale.rebuild_rounds(tmp_path / "raw", out, 2, 2)


def test_an_exit_status_named_as_a_result_is_timed_and_another_stops_the_benchmark() -> None:
    # loam validate exits 1 when the build it checked has errors: a verdict, still timed.
    import sys

    from bench.run import measured

    verdict = [sys.executable, "-c", "raise SystemExit(1)"]
    wall, rss = measured(verdict, exit_codes=(0, 1))
    assert wall > 0 and rss > 0
    with pytest.raises(SystemExit, match="exit code 1"):
        measured(verdict)


def test_the_cluster_leaves_no_variable_in_the_environment_of_the_runs(tmp_path: Path,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    """A LocalCluster sets variables for its workers in the starting process's
    environment (MALLOC_TRIM_THRESHOLD_ among them) and leaves them; neither the cold
    run's driver nor any later run may inherit them."""
    import distributed

    seen: list[dict[str, str]] = []

    class Cluster:  # a stand-in that changes the environment as starting one does
        scheduler_address = "tcp://127.0.0.1:1"

        def __enter__(self) -> Cluster:
            os.environ["MALLOC_TRIM_THRESHOLD_"] = "65536"
            os.environ["OMP_NUM_THREADS"] = "1"
            return self

        def __exit__(self, *exc: object) -> None:
            os.environ["PYTHONHASHSEED"] = "6640"

    def prepare(raw: Path, out: Path, workers: int, *extra: str) -> dict[str, Any]:
        seen.append(dict(os.environ))
        return {"wall_s": 1.0}

    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_", raising=False)
    monkeypatch.delenv("OMP_NUM_THREADS", raising=False)
    monkeypatch.delenv("PYTHONHASHSEED", raising=False)
    monkeypatch.setattr(distributed, "LocalCluster", lambda **kwargs: Cluster())
    monkeypatch.setattr(bench_scale, "prepare", prepare)
    before = dict(os.environ)
    assert bench_scale.cluster_cold(tmp_path / "raw", tmp_path / "out", 2) == {"wall_s": 1.0}
    assert seen == [before]
    assert dict(os.environ) == before
