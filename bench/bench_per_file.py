"""The per-file work alone, in one process: the pipeline's against the floor's.

End-to-end runs on a shared 2-core machine vary by a second of CPU between identical
runs, which is more than the quality gates cost. Here every file of a prepared OUT is
conditioned three ways in one process, one after another, and its CPU time
(``time.process_time``) is taken for each:

``floor``     ``bench.floor.floor_one``: decode, downmix, resample, encode;
``no gates``  ``audio_file.condition_file`` with ``audio.quality_measures = false``;
``pipeline``  ``audio_file.condition_file`` as configured.

Clips are written as a local run writes them, without an fsync each (the stage
flushes the file system once at its end, which is not per-file work).

Every file is timed ``--repeat`` times in each way, the three ways interleaved, and
the fastest time of each file and way is kept (a slow spell of the machine only adds
time). No driver, no start-up, no manifests: the ratios say what the per-file path
costs over the floor, and what the gates add to it.

    python bench/bench_per_file.py OUT RAW
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from pipeline.core.startup import limit_blas_threads  # noqa: E402

# As `loam` does, before numpy loads: one thread per process.
limit_blas_threads()

from bench.floor import FloorJob, floor_one  # noqa: E402
from pipeline.core.config import load_config  # noqa: E402
from pipeline.core.manifest import read_manifest  # noqa: E402
from pipeline.stages import audio_file  # noqa: E402


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("out", type=Path, help="an OUT that `loam prepare` filled (its ingest manifest is read)")
    parser.add_argument("raw", type=Path)
    parser.add_argument("--config", type=Path, default=REPO / "bench" / "bench.toml")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()

    cfg = load_config(args.config).audio
    plain = dataclasses.replace(cfg, quality_measures=False)
    rows = read_manifest(args.out / "stages" / "ingest.parquet").to_pylist()
    raw = args.raw.resolve()
    audio_file.warm_up(cfg)
    best = {"floor": [float("inf")] * len(rows), "no gates": [float("inf")] * len(rows),
            "pipeline": [float("inf")] * len(rows)}
    with tempfile.TemporaryDirectory() as scratch:
        work = Path(scratch)
        for _ in range(args.repeat):
            for i, row in enumerate(rows):
                source = str(raw / row["source_path"])
                runs = {
                    "floor": (floor_one, FloorJob(source, str(work / "floor.flac"), cfg.sample_rate,
                                                  cfg.resample_quality)),
                    "no gates": (audio_file.condition_file,
                                 audio_file.AudioJob(row, source, str(work / "a"), str(work / "a" / "tmp"), plain,
                                                durable=False)),
                    "pipeline": (audio_file.condition_file,
                                 audio_file.AudioJob(row, source, str(work / "b"), str(work / "b" / "tmp"), cfg,
                                                durable=False)),
                }
                for kind, (func, job) in runs.items():
                    start = time.process_time()
                    func(job)
                    best[kind][i] = min(best[kind][i], time.process_time() - start)
            for folder in ("a", "b"):
                shutil.rmtree(work / folder, ignore_errors=True)
    seconds = {kind: sum(times) for kind, times in best.items()}
    result = {
        "files": len(rows),
        "audio_s": sum(r["duration_s"] for r in rows),
        "cpu_s": {k: round(v, 3) for k, v in seconds.items()},
        "per_file_over_floor": seconds["pipeline"] / seconds["floor"],
        "per_file_over_floor_without_gates": seconds["no gates"] / seconds["floor"],
        "gates_over_per_file_without": seconds["pipeline"] / seconds["no gates"] - 1,
    }
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
