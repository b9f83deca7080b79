"""Speed and peak memory of the audio stage's per-file work on one long recording.

Generates (in a temporary folder) a recording of ``--minutes`` minutes at 48 kHz
stereo, 16-bit WAV: espeak-ng sentences in several voices, looped with pauses of
0.2 to 2.5 s over a -60 dBFS noise floor. Then runs ``pipeline.stages.audio_file.condition_file``
on it in a fresh child process and reports wall time, times real time, and the
child's peak resident memory (``bench.memory.peak_rss_mb``), next to the same child doing only its
imports. Prints a table, then the same figures as one JSON line.

    python bench/bench_long_file.py            # 60 minutes, as in the issue
    python bench/bench_long_file.py --minutes 5 --json out.json
"""

from __future__ import annotations

import argparse
import hashlib
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

REPO = Path(__file__).resolve().parent.parent
RATE = 48000
LINES = [
    "the ferry leaves the harbour at seven and comes back before the evening tide",
    "nets are mended on the quay while the gulls wait on the warm stones",
    "a lamp is lit in the tower when the fog rolls in from the open sea",
    "the baker sends bread to the island every morning on the first boat",
    "children count the buoys that bob along the channel near the point",
    "when the wind turns north the small boats stay inside the breakwater",
]
VOICES = ["en-us", "en", "en-us+f3", "en+m3"]

CHILD = r"""
import json, sys, time
from bench.memory import peak_rss_mb
t0 = time.perf_counter()
from pipeline.stages import audio_file
from pipeline.core.config import build_config
if sys.argv[1] == "imports-only":
    import pipeline.signal.bandwidth, pipeline.signal.fingerprint, pipeline.signal.loudness, pipeline.signal.snr, soundfile, soxr, _webrtcvad  # what the work imports
    print(json.dumps({"rss_mb": peak_rss_mb()}))
    raise SystemExit
row, source, out = json.loads(sys.argv[2]), sys.argv[3], sys.argv[4]
cfg = build_config({}).audio
job = audio_file.AudioJob(row, source, out, out + "/tmp", cfg)
t1 = time.perf_counter()
outcome = audio_file.condition_file(job)
t2 = time.perf_counter()
print(json.dumps({
    "seconds": t2 - t1, "import_seconds": t1 - t0,
    "clips": len(outcome.rows), "rejects": [r["reason"] for r in outcome.rejects],
    "details": [r["detail"] for r in outcome.rejects][:3],
    "clip_seconds": sum(r["duration_s"] for r in outcome.rows),
    "rss_mb": peak_rss_mb(),
}))
"""


def voices(folder: Path) -> list[np.ndarray]:
    """Each line in each voice, at 48 kHz."""
    out = []
    for v, voice in enumerate(VOICES):
        for i, line in enumerate(LINES):
            path = folder / f"v{v}_{i}.wav"
            subprocess.run(["espeak-ng", "-v", voice, "-w", str(path), line], check=True, capture_output=True)
            samples, rate = sf.read(path, dtype="float64")
            out.append(soxr.resample(samples, rate, RATE))
            path.unlink()
    return out


def make_recording(path: Path, *, minutes: float, seed: int = 2026) -> float:
    """Write the long recording chunk by chunk (never whole in memory); returns seconds."""
    rng = np.random.default_rng(seed)
    with tempfile.TemporaryDirectory() as tmp:
        takes = voices(Path(tmp))
    total = int(minutes * 60 * RATE)
    written = 0
    with sf.SoundFile(path, "w", samplerate=RATE, channels=2, format="WAV", subtype="PCM_16") as fh:
        while written < total:
            take = takes[int(rng.integers(len(takes)))] * rng.uniform(0.3, 0.8)
            pause = np.zeros(int(rng.uniform(0.2, 2.5) * RATE))
            mono = np.concatenate([take, pause])[: total - written]
            floor = rng.standard_normal((len(mono), 2)) * 10 ** (-60 / 20)
            fh.write(np.stack([mono, 0.8 * mono], axis=1) + floor)
            written += len(mono)
    return written / RATE


def run_child(*args: str) -> tuple[dict, float]:
    """Run the child; its JSON and wall seconds."""
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", CHILD, *args], capture_output=True, text=True, cwd=REPO)
    wall = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"bench child failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1]), wall


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--minutes", type=float, default=60.0)
    parser.add_argument("--json", type=Path, help="also write the figures to this file")
    parser.add_argument("--keep", type=Path, help="build in this folder and keep it (default: a temporary one)")
    args = parser.parse_args()

    folder = args.keep or Path(tempfile.mkdtemp(prefix="loam-bench-long-"))
    folder.mkdir(parents=True, exist_ok=True)
    try:
        raw = folder / "raw" / "harbour"
        raw.mkdir(parents=True, exist_ok=True)
        source = raw / "night-shift.wav"
        t = time.perf_counter()
        seconds = make_recording(source, minutes=args.minutes)
        generate_s = time.perf_counter() - t
        digest = hashlib.sha256(source.read_bytes()).hexdigest() if args.minutes <= 10 else _sha256(source)
        row = {"source_id": f"night-shift-{digest[:10]}", "source_path": "harbour/night-shift.wav",
               "speaker": "harbour", "sha256": digest, "transcript": None}

        base, _ = run_child("imports-only")
        res, wall = run_child("work", json.dumps(row), str(source), str(folder / "out"))
        figures = {
            "audio_minutes": seconds / 60,
            "source": "48 kHz stereo PCM_16 WAV",
            "source_mb": source.stat().st_size / 2**20,
            "generate_s": generate_s,
            "condition_file_s": res["seconds"],
            "child_wall_s": wall,
            "x_real_time": seconds / res["seconds"],
            "clips": res["clips"],
            "clip_minutes": res["clip_seconds"] / 60,
            "rejected_segments": len(res["rejects"]),
            "peak_rss_mb": res["rss_mb"],
            "imports_only_rss_mb": base["rss_mb"],
            "limit_mb": 500,
        }
        rows = [
            ("audio", f"{figures['audio_minutes']:.1f} min, {figures['source']}, {figures['source_mb']:.0f} MB"),
            ("condition_file", f"{figures['condition_file_s']:.1f} s ({figures['x_real_time']:.0f}x real time)"),
            ("clips written", f"{figures['clips']} ({figures['clip_minutes']:.1f} min); {figures['rejected_segments']} segments rejected"),
            ("peak RSS (child)", f"{figures['peak_rss_mb']:.0f} MB (VmHWM; imports alone {figures['imports_only_rss_mb']:.0f} MB)"),
            ("limit", f"{figures['limit_mb']} MB: {'ok' if figures['peak_rss_mb'] < 500 else 'EXCEEDED'}"),
        ]
        width = max(len(k) for k, _ in rows)
        for key, value in rows:
            print(f"{key:<{width}}  {value}")
        if res["rejects"]:
            print("first rejects:", *res["details"], sep="\n  ")
        print(json.dumps(figures, sort_keys=True))
        if args.json:
            args.json.write_text(json.dumps(figures, indent=2, sort_keys=True) + "\n")
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


def _sha256(path: Path) -> str:
    sys.path.insert(0, str(REPO))
    from pipeline.core.fsio import sha256_file

    return sha256_file(path)


if __name__ == "__main__":
    main()
