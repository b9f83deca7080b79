"""Quality gates on the demo corpus: a swapped transcript is caught, true ones are not."""

from __future__ import annotations

import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from pipeline.config import load_config
from pipeline.manifest import read_metadata, write_manifest
from pipeline.runner import Runner
from tests.conftest import DEMO

SUBSETS = ("labelled", "unlabelled", "heldout")


def clips_by_id(out: Path) -> dict[str, dict]:
    return {r["clip_id"]: r for name in SUBSETS
            for r in pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist()}


def test_demo_has_no_rate_outlier_and_flags_its_narrowband_files(demo_build: Path) -> None:
    clips = clips_by_id(demo_build)
    assert not [c for c, r in clips.items() if "rate_outlier" in r["flags"]]
    narrow = {c for c, r in clips.items() if "narrowband" in r["flags"]}
    # The 8 kHz telephone-rate files of the demo (demo_corpus/README.md) and nothing else.
    ingest = {r["source_id"]: r for r in pq.read_table(demo_build / "stages" / "ingest.parquet").to_pylist()}
    audio = {r["clip_id"]: r for r in pq.read_table(demo_build / "stages" / "audio.parquet").to_pylist()}
    expected = {c for c, a in audio.items() if ingest[a["source_id"]]["sample_rate"] == 8000}
    assert narrow == expected and expected
    for c in narrow:
        assert clips[c]["subset"] != "labelled"


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
    Runner(DEMO, out, load_config(DEMO / "corpus.toml"), workers=1, options={"fresh": True}).prepare(("split",))
    clips = clips_by_id(out)
    flagged = {c for c, r in clips.items() if "rate_outlier" in r["flags"]}
    assert flagged == {short}
    assert clips[short]["subset"] != "labelled"
    assert abs(clips[short]["rate_z"]) > 3.5  # quality.rate_max_abs_z default
