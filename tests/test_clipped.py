"""Clipped sources from RAW to validate: a transcribed, clipped recording keeps its
transcript by default, flagged; quality.clipped_action demotes or rejects it; audio
clipped past audio.unusable_clipped_fraction is rejected by the audio stage; and
`loam validate` decides as the split stage did."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
import soundfile as sf

from pipeline.commands.validate import format_table, validate_out
from pipeline.core.config import build_config
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from tests.conftest import FIXTURE_SPEECH, FIXTURES, speech_only

SUBSETS = ("labelled", "unlabelled", "heldout")
CLIPPED = "kestrel/salt.wav"  # overdriven by 12 dB: mildly clipped, correctly transcribed
RAILED = "linnet/thistle.wav"  # overdriven by 60 dB: nearly a square wave
# Every clip trains and one tier larger than the corpus takes every eligible clip.
SPLIT = {"split.heldout": "0%", "split.labelled_budgets": ["10m"]}


@pytest.fixture(scope="module")
def raw(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Two speakers reading the three fixture sentences, each file with its sidecar."""
    root = tmp_path_factory.mktemp("raw")
    for speaker in ("kestrel", "linnet"):
        (root / speaker).mkdir()
        for name, text in FIXTURE_SPEECH.items():
            samples, rate = speech_only(FIXTURES / "speech" / f"{name}.flac")
            x = 0.5 * samples / np.abs(samples).max()
            x = np.concatenate([np.zeros(rate // 2), x, np.zeros(rate // 2)])
            rel = f"{speaker}/{name}.wav"
            gain = {CLIPPED: 10 ** (12 / 20) * 2, RAILED: 1000.0}.get(rel, 1.0)  # x2: from 0.5 to full scale
            sf.write(root / rel, np.clip(gain * x, -1.0, 1.0), rate, subtype="PCM_16")
            (root / rel).with_suffix(".txt").write_text(text + "\n", encoding="utf-8")
    return root


def subsets(out: Path) -> dict[str, dict]:
    """Every subset row, by source path (one clip per source here)."""
    return {r["source_path"]: r for name in SUBSETS
            for r in pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist()}


def prepare(raw: Path, out: Path, *, stages: tuple[str, ...] = STAGES.order, **quality: str) -> dict[str, dict]:
    config = build_config({}, overrides={**SPLIT, **{f"quality.{k}": v for k, v in quality.items()}})
    Runner(raw, out, config, stages=STAGES, workers=1, options={"fresh": True}).prepare(stages)
    return subsets(out)


def rejects(out: Path) -> dict[str, dict]:
    return {r["source_path"]: r for r in pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()}


def errors(out: Path, *, warnings: tuple[str, ...] = ("tier_budget",)) -> list:
    result = validate_out(out, audio_files=False)
    # The 10m tier is short of its budget on purpose (a warning); no other warning may show.
    assert all(p.check in warnings for p in result.problems if p.severity == "warning"), format_table(result)
    return [p for p in result.problems if p.severity == "error"]


@pytest.fixture(scope="module")
def default_build(raw: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("default") / "out"
    prepare(raw, out)
    return out


def test_a_clipped_transcribed_source_stays_labelled_and_flagged_by_default(default_build: Path, raw: Path) -> None:
    # Source: issue 14 item 4; quality.clipped_action = "flag" and audio.max_clipped_fraction
    # = 0.001 in schemas/config.schema.json.
    clips = subsets(default_build)
    clip = clips[CLIPPED]
    assert clip["subset"] == "labelled" and clip["tiers"] == ["10m"] and clip["transcript"]
    assert "clipped" in clip["quality_flags"]
    # The share of samples at |x| >= audio.clip_level (0.999), counted by numpy.
    samples, _ = sf.read(raw / CLIPPED, dtype="float32")
    assert clip["clipped_fraction"] == pytest.approx(np.mean(np.abs(samples) >= 0.999), abs=1e-12)
    assert 0.001 < clip["clipped_fraction"] < 0.5
    # Every other usable clip is unclipped, labelled and unflagged.
    assert all(r["subset"] == "labelled" and "clipped" not in r["quality_flags"] and r["clipped_fraction"] == 0
               for p, r in clips.items() if p != CLIPPED)
    # The nearly square wave is unusable audio: the audio stage rejects it.
    (railed,) = [r for p, r in rejects(default_build).items() if p == RAILED]
    assert (railed["reason"], railed["stage"]) == ("clipped", "audio")
    assert "audio.unusable_clipped_fraction" in railed["detail"]
    assert RAILED not in clips
    assert errors(default_build) == []


@pytest.mark.parametrize("action", ["demote", "reject"])
def test_clipped_action_demotes_or_rejects_and_validate_agrees(default_build: Path, raw: Path, tmp_path: Path,
                                                               action: str) -> None:
    # Source: quality.clipped_action in schemas/config.schema.json.
    out = tmp_path / action
    shutil.copytree(default_build, out)
    clips = prepare(raw, out, stages=("split",), clipped_action=action)
    if action == "demote":
        assert clips[CLIPPED]["subset"] == "unlabelled" and clips[CLIPPED]["transcript"] is None
        assert "clipped" in clips[CLIPPED]["quality_flags"]
    else:
        assert CLIPPED not in clips
        reject = rejects(out)[CLIPPED]
        assert (reject["reason"], reject["stage"]) == ("clipped", "split")
    assert errors(out) == []
    # Only the clipped clip moved.
    before = {p: r["subset"] for p, r in subsets(default_build).items() if p != CLIPPED}
    assert {p: r["subset"] for p, r in clips.items() if p != CLIPPED} == before

    # Validate decides as split does: the default build, judged under this action, has
    # exactly that clip wrong, by its flag and by its measured clipped share.
    judged = tmp_path / "judged"
    shutil.copytree(default_build, judged)
    shutil.copy(out / "config.resolved.json", judged / "config.resolved.json")
    found = errors(judged, warnings=("tier_budget", "config_hash"))
    assert {(p.check, p.file, p.column) for p in found} == {
        ("quality_gate", "manifests/labelled.parquet", "quality_flags"),
        ("quality_gate", "manifests/labelled.parquet", "clipped_fraction"),
        # and its scorable mark, which the gate no longer allows
        ("scorable", "manifests/labelled.parquet", "scorable")}
    labelled = pq.read_table(judged / "manifests" / "labelled.parquet").column("source_path").to_pylist()
    assert {labelled[p.row] for p in found} == {CLIPPED}
