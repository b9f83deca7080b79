"""Per-file work on a real dask.distributed cluster gives byte-identical output."""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.config import build_config
from pipeline.runner import Runner

distributed = pytest.importorskip("distributed")

COMPARED = ("stages/ingest.parquet", "stages/audio.parquet", "manifests/rejected.parquet")


@pytest.mark.slow
def test_local_cluster_matches_local_run(small_raw: Path, tmp_path: Path) -> None:
    cfg = build_config({"ingest": {"metadata": "meta.csv"}})
    Runner(small_raw, tmp_path / "local", cfg, workers=2).prepare(("ingest", "audio"))
    # A scheduler and two worker processes on loopback, as `dask scheduler` / `dask worker` would run.
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        Runner(small_raw, tmp_path / "cluster", cfg, scheduler=cluster.scheduler_address).prepare(("ingest", "audio"))
    for rel in COMPARED:
        assert (tmp_path / "local" / rel).read_bytes() == (tmp_path / "cluster" / rel).read_bytes(), rel
    local_audio = sorted(p.relative_to(tmp_path / "local") for p in (tmp_path / "local" / "audio").rglob("*.flac"))
    assert local_audio
    for rel in local_audio:
        assert (tmp_path / "local" / rel).read_bytes() == (tmp_path / "cluster" / rel).read_bytes()
