"""The split stage alone at scale: cold CPU seconds and peak memory, and a rebuild's cost
per existing source, on audio and text stage manifests generated directly.

The generated manifests have the shape of a 100,000-source build (by default about
245,000 clips, a third of the sources transcribed with one clip each, the others cut
into one to five clips): every column of ``stages/audio.parquet`` present, the
fingerprints included. Fingerprints are invented, with the features that drive the
duplicate search's cost: about 290 sub-fingerprints per clip (6.7 s at 23.2 ms), a
tenth of them 0 (silence), a twentieth drawn from a vocabulary shared across the
corpus (sounds common to many clips), the rest distinct; 1 % of clips copy another
clip's fingerprint a few frames later with 3 % of its bits flipped (a re-encoded copy)
and 0.3 % are byte-identical copies. Transcripts read two or three words of a
128-word vocabulary, so prompts repeat as in a read-speech corpus.

Each measurement reads the manifests as the runner does (``read_manifest``), runs
``pipeline.stages.split.run`` in a fresh process and reads its
peak memory (``bench.memory.peak_rss_mb``) and CPU seconds (user + system; on a shared machine they move far less
than wall time). The rebuild adds ``--extra-share`` new sources to the same manifests
and runs again with the ledger the cold run wrote; its cost per existing source is its
CPU seconds over the sources that were there before (the split stage has no per-file
work of its own for the new ones: their rows are a few microseconds each).

Usage: ``python bench/bench_split.py FOLDER [--sources N]``; the last line printed is
the figures as JSON.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import logging
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from bench.memory import peak_rss_mb  # noqa: E402

WORDS = 128
FRAMES_PER_S = 5000 / 116  # sub-fingerprints per second (pipeline.signal.fingerprint)
PHONES = ["AA", "AE", "AH", "B", "D", "EH", "F", "G", "IH", "IY", "K", "L", "M", "N", "OW", "P", "R", "S",
          "T", "UW", "V", "W", "Z"]


def _fingerprints(rng: np.random.Generator, frames: np.ndarray) -> list[np.ndarray]:
    """One invented fingerprint per clip (see the module docstring)."""
    shared = rng.integers(1, 2**32, size=500_000, dtype=np.uint32)
    total = int(frames.sum())
    values = rng.integers(1, 2**32, size=total, dtype=np.uint32)
    kind = rng.random(total)
    values[kind < 0.10] = 0
    common = (kind >= 0.10) & (kind < 0.15)
    values[common] = shared[rng.integers(0, shared.size, size=int(common.sum()))]
    bounds = np.r_[0, np.cumsum(frames)]
    return [values[bounds[k]:bounds[k + 1]] for k in range(frames.size)]


def _copy_of(rng: np.random.Generator, fp: np.ndarray) -> np.ndarray:
    """A re-encoded copy: a few frames later, 3 % of the bits flipped."""
    fp = fp[int(rng.integers(0, 4)):].copy()
    flips = rng.random((fp.size, 32)) < 0.03
    fp ^= np.packbits(flips, axis=1, bitorder="little").view("<u4")[:, 0]
    return fp


def make_manifests(folder: Path, *, sources: int, first: int = 0, speakers: int = 500,
                   seed: int = 2027) -> tuple[pa.Table, pa.Table]:
    """Audio and text stage tables for sources ``first .. first + sources - 1``."""
    from pipeline.core.manifest import table_from_columns
    from pipeline.signal.fingerprint import encode_fingerprint

    rng = np.random.default_rng([seed, first])
    words = [f"word{k:03d}" for k in range(WORDS)]
    word_phones = [list(rng.choice(PHONES, size=int(rng.integers(3, 7)))) for _ in range(WORDS)]
    transcribed = (np.arange(first, first + sources) % 3) == 0
    clips_per = np.where(transcribed, 1, rng.integers(1, 6, size=sources))
    n = int(clips_per.sum())
    src = np.repeat(np.arange(first, first + sources), clips_per)
    seg = np.concatenate([np.arange(c) for c in clips_per])
    durations = np.round(rng.uniform(1.5, 12.0, size=n), 3)
    fps = _fingerprints(rng, np.maximum((durations * FRAMES_PER_S).astype(np.int64) - 16, 0))
    shas = [hashlib.sha256(f"{seed}/{s}/{k}".encode()).hexdigest() for s, k in zip(src, seg, strict=True)]
    first_clip = np.r_[0, np.cumsum(clips_per)[:-1]]

    def same_speaker(k: int) -> int:
        """The first clip of another source of clip k's speaker (copies stay with their speaker)."""
        s = int(src[k] - first) % speakers + speakers * int(rng.integers(0, max(1, sources // speakers)))
        return int(first_clip[min(s, sources - 1)])

    for k in rng.choice(n, size=n // 100, replace=False):
        fps[k] = _copy_of(rng, fps[same_speaker(k)])
    for k in rng.choice(n, size=n * 3 // 1000, replace=False):
        other = same_speaker(k)
        fps[k], shas[k], durations[k] = fps[other], shas[other], durations[other]
    spk = [f"spk{s % speakers:03d}" for s in src]
    source_id = [hashlib.sha256(f"{seed}/source/{s}".encode()).hexdigest()[:16] for s in src]
    clip_id = [f"{sid}_{k:03d}" for sid, k in zip(source_id, seg, strict=True)]
    starts = np.round(seg * 13.0, 3)
    audio = table_from_columns("audio", {
        "clip_id": clip_id, "source_id": source_id, "source_path": [f"{p}/{s:06d}.wav" for p, s in zip(spk, src, strict=True)],
        "speaker": spk, "audio_path": [f"audio/{p}/{c}.flac" for p, c in zip(spk, clip_id, strict=True)],
        "audio_sha256": shas, "sample_rate": np.full(n, 16000), "num_samples": np.round(durations * 16000).astype(np.int64),
        "duration_s": durations, "source_start_s": starts, "source_end_s": starts + durations,
        "source_sample_rate": np.full(n, 16000), "upsampled_from": [None] * n, "segment_index": seg,
        "speech_s": np.round(durations * rng.uniform(0.6, 0.95, size=n), 3), "speech_ratio": np.full(n, 0.8),
        "loudness_in_lufs": rng.uniform(-40, -15, size=n), "loudness_lufs": np.full(n, -23.0),
        "gain_db": rng.uniform(-8, 17, size=n), "peak_limited_db": np.where(rng.random(n) < 0.02, 0.5, 0.0),
        "peak_dbfs": rng.uniform(-12, -1, size=n), "clipped_fraction": np.where(rng.random(n) < 0.01, 0.01, 0.0),
        "dc_offset": np.zeros(n), "snr_db": rng.uniform(2, 40, size=n), "bandwidth_hz": rng.uniform(3500, 8000, size=n),
        "fingerprint": [encode_fingerprint(f) for f in fps], "transcribed": np.repeat(transcribed, clips_per),
        "aligned_transcript": [None] * n, "align_confidence": [None] * n,
    })
    texts: dict[str, list[Any]] = {k: [] for k in ("clip_id", "transcript", "norm_text", "words", "phones",
                                                  "word_backends", "oov_words", "language", "transcript_origin")}
    for k in np.flatnonzero(np.repeat(transcribed, clips_per)):
        picks = rng.integers(0, WORDS, size=int(rng.integers(2, 4))).tolist()
        said = [words[p] for p in picks]
        phones: list[str] = []
        for p in picks:
            phones += [*word_phones[p], "|"]
        texts["clip_id"].append(clip_id[k])
        texts["transcript"].append(" ".join(said).capitalize() + ".")
        texts["norm_text"].append(" ".join(said))
        texts["words"].append(said)
        texts["phones"].append(phones[:-1])
        texts["word_backends"].append(["cmudict"] * len(said))
        texts["oov_words"].append([])
        texts["language"].append("en")
        texts["transcript_origin"].append("sidecar")
    return audio, table_from_columns("text", texts)


def prepare(folder: Path, *, sources: int, extra_share: float) -> dict[str, int]:
    """Write base and grown manifests under ``folder`` (kept when already there)."""
    stamp = folder / "manifests.json"
    want = {"sources": sources, "extra_sources": round(sources * extra_share), "generator": 2}
    if stamp.exists() and json.loads(stamp.read_text()) == want:
        return want
    folder.mkdir(parents=True, exist_ok=True)
    audio, text = make_manifests(folder, sources=sources)
    extra_audio, extra_text = make_manifests(folder, sources=want["extra_sources"], first=sources)
    pq.write_table(audio, folder / "audio.parquet")
    pq.write_table(text, folder / "text.parquet")
    pq.write_table(pa.concat_tables([audio, extra_audio]), folder / "audio_grown.parquet")
    pq.write_table(pa.concat_tables([text, extra_text]), folder / "text_grown.parquet")
    stamp.write_text(json.dumps(want))
    return want


def _children_cpu_s() -> float:
    used = resource.getrusage(resource.RUSAGE_CHILDREN)
    return used.ru_utime + used.ru_stime


def _children_peak_mb() -> float:
    """The largest peak resident memory of the processes this one forked and waited for
    (the search's; its pages shared with this process at the fork count in both)."""
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return peak / (1024 * 1024 if sys.platform == "darwin" else 1024)


def run_once(folder: Path, *, grown: bool, fresh: bool, keep: str = "") -> dict[str, float]:
    """Run the split stage in this process on the folder's manifests; CPU seconds and peak RSS."""
    from pipeline.core.config import build_config
    from pipeline.core.manifest import read_manifest
    from pipeline.core.stage import StageContext
    from pipeline.stages import split

    suffix = "_grown" if grown else ""
    inputs = {name: read_manifest(folder / f"{name}{suffix}.parquet") for name in ("audio", "text")}
    cfg = build_config({"split": {"ledger": str(folder / "out" / "ledger.tsv")}})
    (folder / "out").mkdir(exist_ok=True)
    log = logging.getLogger("bench-split")
    ctx = StageContext(raw=folder / "raw", out=folder / "out", config=cfg, inputs=inputs, workers=1, log=log,
                       options={"fresh": fresh})
    cpu0, wall0, helpers0 = time.process_time(), time.perf_counter(), _children_cpu_s()
    result = split.run(ctx)
    # The stage's near-duplicate search runs in a forked process (pipeline.core.forked):
    # its CPU counts, once the stage has waited for it.
    cpu = time.process_time() - cpu0 + _children_cpu_s() - helpers0
    wall = time.perf_counter() - wall0
    if keep:
        for rel, (_schema, table) in result.manifests.items():
            pq.write_table(table, folder / f"{keep}-{Path(rel).name}")
        shutil.copyfile(folder / "out" / "ledger.tsv", folder / f"{keep}-ledger.tsv")
    return {"cpu_s": round(cpu, 2), "wall_s": round(wall, 2),
            "peak_rss_mb": round(peak_rss_mb(), 1), "helper_peak_rss_mb": round(_children_peak_mb(), 1),
            "clips": inputs["audio"].num_rows}


def measure(folder: Path, *, grown: bool, fresh: bool, keep: str = "") -> dict[str, float]:
    """:func:`run_once` in a fresh Python process (its own peak memory)."""
    args = [sys.executable, __file__, str(folder), "--run", "grown" if grown else "base"]
    args += ["--fresh"] * fresh + (["--keep", keep] if keep else [])
    done = subprocess.run(args, capture_output=True, text=True, check=False)
    if done.returncode:
        raise SystemExit(f"bench_split: the split run failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def split_figures(folder: Path, *, sources: int, extra_share: float = 0.01, keep: bool = False) -> dict[str, Any]:
    """Cold run (fresh ledger) and rebuild after ``extra_share`` new sources."""
    facts = prepare(folder, sources=sources, extra_share=extra_share)
    cold = measure(folder, grown=False, fresh=True, keep="cold" if keep else "")
    rebuild = measure(folder, grown=True, fresh=False, keep="rebuild" if keep else "")
    return {**facts, "cold": cold, "rebuild": rebuild,
            "rebuild_us_per_existing_source": round(rebuild["cpu_s"] / sources * 1e6, 1)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("folder", type=Path)
    parser.add_argument("--sources", type=int, default=100_000)
    parser.add_argument("--keep", default="", help=argparse.SUPPRESS)
    parser.add_argument("--run", choices=("base", "grown"), help=argparse.SUPPRESS)
    parser.add_argument("--fresh", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--keep-outputs", action="store_true",
                        help="write the subset manifests of each run beside the inputs (to compare code versions)")
    args = parser.parse_args()
    if args.run:
        print(json.dumps(run_once(args.folder, grown=args.run == "grown", fresh=args.fresh, keep=args.keep)))
        return 0
    print(json.dumps(split_figures(args.folder, sources=args.sources, keep=args.keep_outputs)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
