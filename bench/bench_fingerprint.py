"""Robustness and cost of the clip fingerprint, against the Haitsma-Kalker original.

Near-duplicate detection must find a recording that arrived twice in different forms
and must not pair different utterances of the same speaker. Both fingerprints below
run on the same clips and the same copies, and the table prints, for each:

- recall: the share of (clip, copy) pairs that ``find_near_duplicates`` reports at the
  configuration default ``quality.near_duplicate_min_similarity`` (0.85), for each
  kind of copy (resampling, Vorbis, MP3, gain, trimmed a few hundred ms later, and
  trimmed later then MP3 coded), with the lowest similarity among the pairs;
- false matches: the pairs of different clips of the same speaker scoring at or above
  0.85 (brute force over every pair, no index), and the highest such score;
- CPU seconds per minute of audio.

``before`` is the Haitsma-Kalker fingerprint as the audio stage computed it until it
was replaced (0.37 s frames every 23.2 ms, see ``haitsma_kalker`` below), compared over
shifts of up to 8 hops as it then was; the middle column is the same fingerprint over
the 16 hops now tried; ``after`` is ``pipeline.signal.fingerprint.fingerprint`` with
the module's defaults. The clips are 3 s stretches of the
demo corpus's speech (seven synthetic voices, committed), read at their own rate;
every version is resampled to 16 kHz, as the audio stage writes clips.

    python bench/bench_fingerprint.py          # prints the table, then one JSON line
"""

from __future__ import annotations

import io
import itertools
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from pipeline.signal import added_search  # noqa: E402
from pipeline.signal import fingerprint as fpmod  # noqa: E402
from pipeline.signal.arrays import periodic_hann  # noqa: E402

RATE = 16000
CLIP_S = 3.0
MIN_SIMILARITY = 0.85  # quality.near_duplicate_min_similarity's default


def haitsma_kalker(samples: np.ndarray, *, sample_rate: int) -> np.ndarray:
    """The audio stage's fingerprint before the change, kept here as the reference.

    J. Haitsma and T. Kalker, "A Highly Robust Audio Fingerprinting System", ISMIR
    2002: 5000 Hz, 0.37 s Hann frames (1850 samples, FFT of 1920) every 116 samples,
    33 log-spaced bands from 300 to 2000 Hz, band energies floored 60 dB below the
    clip's mean, bit m set when the difference of bands m and m + 1 grew.
    """
    import scipy.fft

    x = soxr.resample(np.asarray(samples, dtype=np.float32), sample_rate, 5000)
    frame, hop, size = 1850, 116, 1920
    if x.size < frame + hop:
        return np.zeros(0, dtype=np.uint32)
    frames = np.lib.stride_tricks.sliding_window_view(x, frame)[::hop]
    freqs = scipy.fft.rfftfreq(size, d=1 / 5000)
    starts = np.searchsorted(freqs, np.geomspace(300.0, 2000.0, 34), side="left")
    power = np.abs(scipy.fft.rfft(frames * periodic_hann(frame), n=size, axis=1)) ** 2
    energy = np.add.reduceat(power[:, starts[0]:starts[-1]], starts[:-1] - starts[0], axis=1)
    energy = np.maximum(energy, energy.mean() * 1e-6)
    across = energy[:, :-1] - energy[:, 1:]
    bits = (across[1:] - across[:-1]) > 0
    return np.packbits(bits, axis=1).view(">u4")[:, 0].astype(np.uint32)


def _speech(path: Path) -> tuple[np.ndarray, int]:
    """A file averaged to mono, cut from the first to the last sample within 40 dB of its peak."""
    samples, rate = sf.read(path, dtype="float64", always_2d=True)
    mono = samples.mean(axis=1)
    loud = np.flatnonzero(np.abs(mono) >= np.abs(mono).max() * 10 ** (-40 / 20))
    return mono[loud[0]:loud[-1] + 1], rate


def demo_clips() -> list[tuple[str, np.ndarray, int]]:
    """(speaker, samples, rate) of every whole 3 s stretch of the demo corpus's speech."""
    clips = []
    for path in sorted((REPO / "demo_corpus").glob("*/*")):
        # wren_10.flac is a byte-identical copy of another file: a duplicate, not a clip.
        if path.suffix not in (".wav", ".flac", ".ogg") or path.name == "wren_10.flac":
            continue
        try:
            mono, rate = _speech(path)
        except (RuntimeError, sf.LibsndfileError, IndexError, ValueError):
            continue  # the demo's damaged files
        if not np.isfinite(mono).all() or np.abs(mono).max() >= 0.99:
            continue  # the demo's non-finite and clipped files
        width = int(CLIP_S * rate)
        clips += [(path.parent.name, mono[i:i + width], rate) for i in range(0, len(mono) - width + 1, width)]
    return clips


def _codec(samples: np.ndarray, rate: int, fmt: str, subtype: str) -> np.ndarray:
    buf = io.BytesIO()
    sf.write(buf, samples, rate, format=fmt, subtype=subtype)
    buf.seek(0)
    return sf.read(buf, dtype="float64")[0]


def copies(x: np.ndarray, rate: int) -> dict[str, np.ndarray]:
    """The original at 16 kHz and each kind of copy of it, at 16 kHz."""
    at16 = soxr.resample(x, rate, RATE)
    later = {ms: at16[RATE * ms // 1000:] for ms in (150, 300)}
    return {
        "original": at16,
        "resampled via 22.05 kHz": soxr.resample(soxr.resample(x, rate, 22050), 22050, RATE),
        "Vorbis": _codec(at16, RATE, "OGG", "VORBIS"),
        "MP3": _codec(at16, RATE, "MP3", "MPEG_LAYER_III"),
        "-12 dB": at16 * 10 ** (-12 / 20),
        "trimmed 150 ms later": later[150],
        "trimmed 300 ms later": later[300],
        "trimmed 300 ms later, MP3": _codec(later[300], RATE, "MP3", "MPEG_LAYER_III"),
    }


def measure(func: Callable[..., np.ndarray], versions: list[dict[str, np.ndarray]],
            speakers: list[str], *, max_offset_frames: int) -> dict[str, object]:
    """Recall per kind of copy, false matches between same-speaker clips, CPU per minute."""
    shift = {"max_offset_frames": max_offset_frames}
    start = time.process_time()
    fps = [{kind: func(x, sample_rate=RATE) for kind, x in v.items()} for v in versions]
    cpu = time.process_time() - start
    minutes = sum(len(x) for v in versions for x in v.values()) / RATE / 60
    out: dict[str, object] = {"cpu_s_per_audio_minute": cpu / minutes}
    for kind in versions[0]:
        if kind == "original":
            continue
        found = [bool(added_search.find_near_duplicates([f["original"], f[kind]], min_similarity=MIN_SIMILARITY, **shift))
                 for f in fps]
        sims = [fpmod.fingerprint_similarity(f["original"], f[kind], **shift) for f in fps]
        out[kind] = {"recall": float(np.mean(found)), "lowest_similarity": float(min(sims))}
    originals = [f["original"] for f in fps]
    same = [(i, j) for i, j in itertools.combinations(range(len(originals)), 2) if speakers[i] == speakers[j]]
    sims = [fpmod.fingerprint_similarity(originals[i], originals[j], **shift) for i, j in same]
    indexed = added_search.find_near_duplicates(originals, min_similarity=MIN_SIMILARITY, **shift)
    out["same_speaker_pairs"] = len(same)
    out["false_matches"] = int(sum(s >= MIN_SIMILARITY for s in sims))
    out["highest_unrelated_similarity"] = float(max(sims))
    out["pairs_reported_among_originals"] = len(indexed)
    return out


# Each column: a fingerprint and the largest shift (in 23.2 ms hops) the comparison tries.
COLUMNS = {
    "before": (haitsma_kalker, 8),
    "Haitsma-Kalker, 16 hops": (haitsma_kalker, 16),
    "after": (fpmod.fingerprint, fpmod.DEFAULT_MAX_OFFSET_FRAMES),
}


def main() -> None:
    clips = demo_clips()
    versions = [copies(x, rate) for _, x, rate in clips]
    speakers = [s for s, _, _ in clips]
    results: dict[str, object] = {"clips": len(clips), "speakers": len(set(speakers)), "clip_s": CLIP_S,
                                  "min_similarity": MIN_SIMILARITY}
    for name, (func, shift) in COLUMNS.items():
        results[name] = {"max_offset_frames": shift, **measure(func, versions, speakers, max_offset_frames=shift)}
    cols = [results[name] for name in COLUMNS]
    print(f"{len(clips)} clips of {CLIP_S:g} s, {results['speakers']} speakers; threshold {MIN_SIMILARITY}")
    print(f"{'':<28}" + "".join(f"{name:>26}" for name in COLUMNS))
    print(f"{'  shifts tried (hops)':<28}" + "".join(f"{'+-' + str(r['max_offset_frames']):>26}" for r in cols))
    for kind in versions[0]:
        if kind != "original":
            cells = [f"{r[kind]['recall']:.3f} (low {r[kind]['lowest_similarity']:.3f})" for r in cols]
            print(f"{'recall, ' + kind:<28}" + "".join(f"{c:>26}" for c in cells))
    rows = [("same-speaker false matches", lambda r: f"{r['false_matches']} of {r['same_speaker_pairs']}"),
            ("highest unrelated score", lambda r: f"{r['highest_unrelated_similarity']:.3f}"),
            ("pairs among originals", lambda r: f"{r['pairs_reported_among_originals']}"),
            ("CPU s per audio minute", lambda r: f"{r['cpu_s_per_audio_minute']:.4f}")]
    for label, cell in rows:
        print(f"{label:<28}" + "".join(f"{cell(r):>26}" for r in cols))
    print(json.dumps(results))


if __name__ == "__main__":
    main()
