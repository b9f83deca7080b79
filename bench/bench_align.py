"""Speed and peak memory of aligning a long transcribed recording to its transcript.

Builds (in a temporary folder) a ``--minutes``-minute reading of known sentences with
``tests/fixtures/long_reading.py`` (espeak-ng en-us voice, 150 words per minute, pauses
of 0.15 to 1.5 s, -55 dBFS noise, 16 kHz FLAC) and its whole text, then, in a fresh child
process pinned to one core, runs the audio stage's per-file work
(``pipeline.stages.audio_file.condition_file``) on it, timing the alignment itself
(``pipeline.stages.alignment.align``) apart. Reports the alignment's times real time, the
whole file's, the child's peak resident memory (``bench.memory.peak_rss_mb``) and the boundary errors
against the true pause centres. Prints a table, then the figures as one JSON line.

    python bench/bench_align.py                # 30 minutes, as in the issue
    python bench/bench_align.py --minutes 5
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent

CHILD = r"""
import json, os, sys, time

os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
sys.path.insert(0, sys.argv[3])
from bench.memory import peak_rss_mb
import numpy as np
from pipeline.core.config import load_config
from pipeline.stages import alignment
from pipeline.stages.audio_file import AudioJob, condition_file, warm_up

folder, transcript = sys.argv[1], open(sys.argv[2], encoding="utf-8").read()
cfg = load_config(None).audio
warm_up(cfg)
seconds = []
real_align = alignment.align
cpu = []
def timed(*args, **kwargs):
    t, c = time.perf_counter(), time.process_time()
    out = real_align(*args, **kwargs)
    seconds.append(time.perf_counter() - t); cpu.append(time.process_time() - c)
    timed.offset = kwargs["start"] / kwargs["sample_rate"]  # places are from the aligned span's start
    timed.places = out
    return out
alignment.align = timed
row = {"source_path": "reader/reading.flac", "source_id": "reading-0a1b2c3d4e", "speaker": "reader",
       "transcript": transcript}
t = time.perf_counter()
outcome = condition_file(AudioJob(row, folder + "/reading.flac", folder, folder, cfg, "en", ""))
total = time.perf_counter() - t
print(json.dumps({"align_s": seconds[0], "align_cpu_s": cpu[0], "file_s": total, "peak_mb": peak_rss_mb(),
                  "rejects": [r["reason"] for r in outcome.rejects],
                  "clips": len(outcome.rows), "transcribed_clips": sum(r["transcribed"] for r in outcome.rows),
                  "ends": [timed.offset + p.end_s for p in timed.places],
                  "starts": [timed.offset + p.start_s for p in timed.places]}))
"""


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=30.0)
    args = parser.parse_args()
    sys.path.insert(0, str(REPO / "tests" / "fixtures"))
    sys.path.insert(0, str(REPO))
    import long_reading
    import numpy as np
    import soundfile as sf

    seed = 0
    with tempfile.TemporaryDirectory() as folder:
        count = int(args.minutes * 60 / 4.6)  # about 4.6 s per sentence with its pause
        texts = long_reading.sentences(count, seed=seed)
        reading = long_reading.build(texts, seed=seed)
        sf.write(f"{folder}/reading.flac", reading.samples, reading.sample_rate)
        Path(f"{folder}/reading.txt").write_text("\n".join(texts), encoding="utf-8")
        duration = len(reading.samples) / reading.sample_rate
        truth = reading.boundaries()
        del reading
        done = subprocess.run([sys.executable, "-c", CHILD, folder, f"{folder}/reading.txt", str(REPO)],
                              capture_output=True, text=True, check=True, cwd=REPO)
        r = json.loads(done.stdout.strip().splitlines()[-1])
        errors = np.abs(np.concatenate([np.array(r["ends"][:-1]) - truth, np.array(r["starts"][1:]) - truth]))
    result = {"minutes": duration / 60, "sentences": len(texts), "align_s": r["align_s"],
              "align_x_real_time": duration / r["align_s"], "align_cpu_s": r["align_cpu_s"],
              "align_x_real_time_cpu": duration / r["align_cpu_s"], "file_s": r["file_s"],
              "file_x_real_time": duration / r["file_s"], "peak_mb": r["peak_mb"], "rejects": r["rejects"],
              "clips": r["clips"], "transcribed_clips": r["transcribed_clips"],
              "boundary_error_s": {f"p{q}": float(np.percentile(errors, q)) for q in (50, 90, 95, 99, 100)},
              "within_0_1_s": float(np.mean(errors <= 0.1))}
    for key in ("minutes", "sentences", "align_x_real_time", "align_x_real_time_cpu", "file_x_real_time", "peak_mb", "within_0_1_s"):
        value = result[key]
        print(f"{key:20s} {value:10.3f}" if isinstance(value, float) else f"{key:20s} {value:10d}")
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
