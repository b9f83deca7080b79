"""Quality gates on the demo corpus: a swapped transcript is caught, true ones are not."""

from __future__ import annotations

import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.commands.validate import format_table, validate_out
from pipeline.core.config import load_config
from pipeline.core.manifest import read_metadata, write_manifest
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from tests.conftest import DEMO

SUBSETS = ("labelled", "unlabelled", "heldout")
NARROW_SOURCE = "alder/alder_03.wav"  # the demo's one transcribed 8 kHz file (demo_corpus/README.md)


def clips_by_id(out: Path) -> dict[str, dict]:
    return {r["clip_id"]: r for name in SUBSETS
            for r in pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist()}


def test_demo_has_no_rate_outlier_and_flags_its_narrowband_files(demo_build: Path) -> None:
    clips = clips_by_id(demo_build)
    assert not [c for c, r in clips.items() if "rate_outlier" in r["quality_flags"]]
    narrow = {c for c, r in clips.items() if "narrowband" in r["quality_flags"]}
    # The 8 kHz telephone-rate files of the demo (demo_corpus/README.md) and nothing else.
    ingest = {r["source_id"]: r for r in pq.read_table(demo_build / "stages" / "ingest.parquet").to_pylist()}
    audio = {r["clip_id"]: r for r in pq.read_table(demo_build / "stages" / "audio.parquet").to_pylist()}
    expected = {c for c, a in audio.items() if ingest[a["source_id"]]["sample_rate"] == 8000}
    assert narrow == expected and expected
    # The demo config only flags them (quality.narrowband_action = "flag"), so the one
    # transcribed 8 kHz file keeps its transcript where its speaker's side puts it.
    transcribed = {c for c in narrow if audio[c]["transcribed"]}
    assert {audio[c]["source_path"] for c in transcribed} == {NARROW_SOURCE}
    assert all(clips[c]["transcript"] is not None for c in transcribed)


def test_swapped_transcript_is_flagged_as_rate_outlier(demo_build: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    shutil.copytree(demo_build, out)
    text_path = out / "stages" / "text.parquet"
    text = pq.read_table(text_path)
    rows = {r["clip_id"]: r for r in text.to_pylist()}
    # The shortest clip takes the transcript of the one with the most phones.
    audio = {r["clip_id"]: r for r in pq.read_table(out / "stages" / "audio.parquet").to_pylist()}
    short = min((c for c in rows if c in audio), key=lambda c: audio[c]["speech_s"])
    long = max((c for c in rows if c in audio), key=lambda c: len(rows[c]["phones"]))
    swapped = dict(rows[long], clip_id=short)
    rows[short] = swapped
    table = pa.Table.from_pylist([rows[c] for c in sorted(rows)], schema=text.schema.remove_metadata())
    meta = read_metadata(text_path)
    write_manifest(text_path, "text", table, metadata={k: v for k, v in meta.items() if k != "schema"})
    Runner(DEMO, out, load_config(DEMO / "corpus.toml"), stages=STAGES, workers=1, options={"fresh": True}).prepare(("split",))
    clips = clips_by_id(out)
    flagged = {c for c, r in clips.items() if "rate_outlier" in r["quality_flags"]}
    assert flagged == {short}
    assert clips[short]["subset"] != "labelled"
    assert abs(clips[short]["rate_z"]) > 3.5  # quality.rate_max_abs_z default


def resplit(demo_build: Path, out: Path, **quality: str) -> dict[str, dict]:
    """The demo's split rerun on a copy with every group training and one large tier,
    so every eligible transcribed clip is labelled; ``quality`` overrides [quality]."""
    shutil.copytree(demo_build, out)
    overrides = {"split.heldout": "0%", "split.labelled_budgets": ["10m"],
                 **{f"quality.{k}": v for k, v in quality.items()}}
    config = load_config(DEMO / "corpus.toml", overrides=overrides)
    Runner(DEMO, out, config, stages=STAGES, workers=1, options={"fresh": True}).prepare(("split",))
    return clips_by_id(out)


def narrow_clip(clips: dict[str, dict]) -> str:
    (cid,) = [c for c, r in clips.items() if r["source_path"] == NARROW_SOURCE]
    return cid


def errors_only(out: Path, *, warnings: tuple[str, ...] = ("tier_budget",)) -> list:
    result = validate_out(out, audio_files=False)
    # The 10m tier is short of its budget on purpose (a warning); no other warning may show.
    assert all(p.check in warnings for p in result.problems if p.severity == "warning"), format_table(result)
    return [p for p in result.problems if p.severity == "error"]


def test_transcribed_narrowband_clip_stays_labelled_unless_demotion_is_on(demo_build: Path, tmp_path: Path) -> None:
    # Source: issue 14 item 4 and quality.narrowband_action in schemas/config.schema.json:
    # a correctly transcribed 8 kHz clip in a 16 kHz corpus is flagged, not demoted, by default.
    kept = resplit(demo_build, tmp_path / "default")
    cid = narrow_clip(kept)
    assert kept[cid]["subset"] == "labelled" and kept[cid]["tiers"] == ["10m"]
    assert {"narrowband", "upsampled"} <= set(kept[cid]["quality_flags"]) and kept[cid]["transcript"]
    assert errors_only(tmp_path / "default") == []

    demoted = resplit(demo_build, tmp_path / "demote", narrowband_action="demote")
    assert demoted[cid]["subset"] == "unlabelled" and demoted[cid]["transcript"] is None
    assert "narrowband" in demoted[cid]["quality_flags"]
    assert errors_only(tmp_path / "demote") == []
    # The other clips do not move: only the narrowband gate changed.
    assert {c: r["subset"] for c, r in kept.items() if c != cid} == {c: r["subset"] for c, r in demoted.items()
                                                                     if c != cid}

    # Validate decides as split does: the default build, judged under demotion, has
    # exactly that clip wrong, by its flag and by its measured bandwidth.
    shutil.copy(tmp_path / "demote" / "config.resolved.json", tmp_path / "default" / "config.resolved.json")
    errors = errors_only(tmp_path / "default", warnings=("tier_budget", "config_hash"))
    assert {(p.check, p.file, p.column) for p in errors} == {
        ("quality_gate", "manifests/labelled.parquet", "quality_flags"),
        ("quality_gate", "manifests/labelled.parquet", "bandwidth_hz"),
        # and its scorable mark, which a demoting gate no longer allows
        ("scorable", "manifests/labelled.parquet", "scorable")}
    labelled = pq.read_table(tmp_path / "default" / "manifests" / "labelled.parquet").column("clip_id").to_pylist()
    assert {labelled[p.row] for p in errors} == {cid}
