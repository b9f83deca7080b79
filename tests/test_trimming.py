"""Trimming follows the speech: a test set with known speech edges through the audio stage.

Speech material: the demo corpus's six clean recordings (``*_08``, espeak-ng speech with
digitally silent edges) and the three fixtures in tests/fixtures/speech/ (espeak-ng lines
with weak /h/, /f/, /th/ onsets). The true speech edges are found on the clean
source, before anything is added: the first and last sample within 60 dB of the peak
(the silence around them is exact zeros, so any threshold far below speech gives the same
edges to within a few samples).

Each case puts 0.3-2 s of silence before and after the speech, sets the speech peak
40-55 dB above a white-noise floor of -70 to -50 dBFS RMS (or digital silence), and is
written as 16-bit WAV at one of the input rates the stage supports. It then goes through
the real per-file path, ``pipeline.stages.audio_file.condition_file``, with the default settings.

Target (the project's requirement for trimming): every edge within ``pad_ms`` + 0.25 s of
the true speech edge, and no speech cut by more than 30 ms.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
import soxr

from pipeline.core.config import build_config
from pipeline.stages import audio_file
from tests.conftest import DEMO, DEMO_CLEAN, FIXTURE_SPEECH, FIXTURES, speech_only

RATES = (8000, 11025, 16000, 22050, 44100, 48000)
NOISE_DBFS = (None, -70.0, -65.0, -60.0, -55.0, -50.0)  # None: digital silence
LEVELS_PER_SOURCE_AND_RATE = 3
SILENCE_S = (0.3, 2.0)
PEAK_ABOVE_NOISE_DB = (40.0, 55.0)
EDGE_THRESHOLD_DB = -60.0  # below the peak: "far below speech level"
MAX_CUT_S = 0.03
SLACK_S = 0.25
SOURCES = [DEMO / rel for rel in DEMO_CLEAN] + [FIXTURES / "speech" / f"{name}.flac" for name in FIXTURE_SPEECH]


@dataclass(frozen=True)
class Case:
    name: str
    rate: int
    noise_dbfs: float | None
    true_start_s: float
    true_end_s: float
    kept_start_s: float
    kept_end_s: float

    @property
    def lead_error_s(self) -> float:
        """Silence kept before the speech (negative: speech cut)."""
        return self.true_start_s - self.kept_start_s

    @property
    def trail_error_s(self) -> float:
        return self.kept_end_s - self.true_end_s


def run_case(tmp: Path, name: str, speech: np.ndarray, *, rate: int, noise_dbfs: float | None,
             rng: np.random.Generator) -> Case:
    lead_s, trail_s = rng.uniform(*SILENCE_S, size=2)
    if noise_dbfs is None:
        peak_dbfs = rng.uniform(-30.0, -1.0)
    else:
        peak_dbfs = min(-1.0, noise_dbfs + rng.uniform(*PEAK_ABOVE_NOISE_DB))
    speech = speech * 10 ** (peak_dbfs / 20) / np.abs(speech).max()
    lead, trail = int(lead_s * rate), int(trail_s * rate)
    signal = np.concatenate([np.zeros(lead), speech, np.zeros(trail)])
    if noise_dbfs is not None:
        signal += rng.standard_normal(len(signal)) * 10 ** (noise_dbfs / 20)
    path = tmp / f"{name}.wav"
    sf.write(path, signal, rate, subtype="PCM_16")
    row = {"source_path": path.name, "source_id": name, "speaker": "spk", "transcript": None}
    cfg = build_config({}).audio
    outcome = audio_file.condition_file(audio_file.AudioJob(row, str(path), str(tmp / "out"), str(tmp), cfg))
    assert len(outcome.rows) == 1 and not outcome.rejects, (name, outcome.rejects)
    kept = outcome.rows[0]
    return Case(name, rate, noise_dbfs, lead / rate, (lead + len(speech)) / rate,
                kept["source_start_s"], kept["source_end_s"])


@pytest.fixture(scope="module")
def cases(tmp_path_factory: pytest.TempPathFactory) -> list[Case]:
    tmp = tmp_path_factory.mktemp("trimming")
    rng = np.random.default_rng(14)
    out = []
    for i, source in enumerate(SOURCES):
        speech, source_rate = speech_only(source, threshold_db=EDGE_THRESHOLD_DB)
        for j, rate in enumerate(RATES):
            at_rate = speech if rate == source_rate else soxr.resample(speech, source_rate, rate)
            # Three of the six floors per source and rate, in turn, so that every source
            # and every rate meets every floor.
            for k in range(LEVELS_PER_SOURCE_AND_RATE):
                noise = NOISE_DBFS[(i + j + 2 * k) % len(NOISE_DBFS)]
                name = f"{source.stem}-{rate}-{'silent' if noise is None else int(-noise)}"
                out.append(run_case(tmp, name, at_rate, rate=rate, noise_dbfs=noise, rng=rng))
    return out


def distribution(errors: np.ndarray) -> str:
    return (f"median {np.median(errors):.3f} s, 95th percentile {np.percentile(errors, 95):.3f} s, "
            f"max {errors.max():.3f} s, min {errors.min():.3f} s")


def test_the_set_covers_every_rate_and_floor(cases: list[Case]) -> None:
    assert {(c.rate, c.noise_dbfs) for c in cases} == {(r, n) for r in RATES for n in NOISE_DBFS}
    assert len(cases) == len(SOURCES) * len(RATES) * LEVELS_PER_SOURCE_AND_RATE
    assert min(c.true_start_s for c in cases) < 0.35 and max(c.true_start_s for c in cases) > 1.9


def test_every_edge_follows_the_speech(cases: list[Case]) -> None:
    pad_s = build_config({}).audio.pad_ms / 1000
    lead = np.array([c.lead_error_s for c in cases])
    trail = np.array([c.trail_error_s for c in cases])
    # Printed for the record (pytest -s): silence kept beyond the true edge, in seconds.
    print(f"\n{len(cases)} cases, pad_ms {pad_s * 1000:.0f}\nleading edge:  {distribution(lead)}"
          f"\ntrailing edge: {distribution(trail)}")
    for c in cases:
        assert -MAX_CUT_S <= c.lead_error_s <= pad_s + SLACK_S, (c.name, c.lead_error_s)
        assert -MAX_CUT_S <= c.trail_error_s <= pad_s + SLACK_S, (c.name, c.trail_error_s)
