"""Shared fixtures: small raw dumps generated in the test, never committed binaries."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_corpus"


def tone(seconds: float, sample_rate: int, *, freq_hz: float = 220.0, level: float = 0.3, channels: int = 1) -> np.ndarray:
    t = np.arange(int(seconds * sample_rate)) / sample_rate
    x = (level * np.sin(2 * np.pi * freq_hz * t)).astype(np.float32)
    return np.stack([x] * channels, axis=1) if channels > 1 else x


def tree_hash(root: Path) -> dict[str, str]:
    """Path -> SHA-256 of every file and link under ``root`` (links by their target text)."""
    out = {}
    for folder, _dirs, files in os.walk(root, followlinks=False):
        for name in files:
            p = Path(folder) / name
            rel = str(p.relative_to(root))
            out[rel] = ("link:" + os.readlink(p)) if p.is_symlink() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture
def small_raw(tmp_path: Path) -> Path:
    """Two speakers, a sidecar transcript, a metadata table and three kinds of fault."""
    import soundfile as sf

    raw = tmp_path / "raw"
    (raw / "spk_a").mkdir(parents=True)
    (raw / "spk_b").mkdir()
    sf.write(raw / "spk_a" / "a1.wav", tone(1.0, 16000), 16000, subtype="PCM_16")
    sf.write(raw / "spk_a" / "a2.flac", tone(1.5, 22050, freq_hz=330), 22050)
    (raw / "spk_a" / "a1.txt").write_text("the first line\n", encoding="utf-8")
    sf.write(raw / "spk_b" / "b1.wav", tone(2.0, 44100, channels=2), 44100, subtype="PCM_24")
    sf.write(raw / "spk_b" / "b2.ogg", tone(1.0, 48000, freq_hz=440), 48000)
    (raw / "spk_b" / "broken.wav").write_bytes(b"")
    (raw / "spk_b" / "copy.wav").write_bytes((raw / "spk_a" / "a1.wav").read_bytes())
    (raw / "meta.csv").write_text(
        "path,transcript,speaker\n"
        "spk_b/b1.wav,a second line,spk_b\n"
        "spk_b/missing.wav,nothing here,spk_b\n"
        "../outside.wav,escape,spk_b\n",
        encoding="utf-8",
    )
    return raw
