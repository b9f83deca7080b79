"""The floor: decode + downmix + resample + encode of the same files, no analysis.

A pipeline cannot be faster than this work it must do anyway, so ``make bench``
reports the pipeline's time as a ratio to it, measured in the same run.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from pipeline.core.parallel import map_ordered


@dataclass(frozen=True)
class FloorJob:
    source: str
    target: str
    sample_rate: int
    quality: str


def floor_one(job: FloorJob) -> float:
    import numpy as np
    import soundfile as sf
    import soxr

    from pipeline.signal.decode import downmix

    audio, rate = sf.read(job.source, dtype="float32", always_2d=True)
    # The pipeline's own downmix: numpy's mean over the channel axis takes several
    # times as long, which would flatter the ratio.
    mono = downmix(audio)
    out = soxr.resample(mono, rate, job.sample_rate, quality=job.quality) if rate != job.sample_rate else mono
    sf.write(job.target, np.clip(out, -1, 1), job.sample_rate, format="FLAC", subtype="PCM_16")
    return len(mono) / rate


def run_floor(raw: Path, scratch: Path, *, workers: int, sample_rate: int = 16000, quality: str = "HQ") -> float:
    """Process every audio file under ``raw``; returns seconds of audio handled."""
    scratch.mkdir(parents=True, exist_ok=True)
    sources = sorted(p for p in raw.rglob("*") if p.suffix.lower() in {".wav", ".flac", ".ogg", ".mp3"})
    jobs = [FloorJob(str(p), str(scratch / f"{i:06d}.flac"), sample_rate, quality) for i, p in enumerate(sources)]
    seconds = sum(map_ordered(floor_one, jobs, workers=workers))
    for job in jobs:
        os.unlink(job.target)
    return seconds


if __name__ == "__main__":
    # Run as its own process, like `loam prepare`, so both include interpreter start-up.
    import sys
    import tempfile

    with tempfile.TemporaryDirectory() as scratch:
        run_floor(Path(sys.argv[1]), Path(scratch), workers=int(sys.argv[2]))
