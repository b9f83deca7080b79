"""Single-speaker corpora: the speaker from ``ingest.speaker``, from a metadata column or
from a flat layout (never from the folder that merely holds the files), and a split made
with the settings Loam itself suggests for one speaker that ``loam validate --strict``
passes.

The fixture is committed speech (the demo corpus's clean recordings and
tests/fixtures/speech), copied into one folder as a one-voice dump with a metadata table;
nothing is synthesised at test time.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline.commands.cli import main
from pipeline.core.config import build_config
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from pipeline.stages.ingest import speaker_id
from pipeline.stages.speaker_source import FLAT_SPEAKER
from tests.conftest import DEMO, DEMO_CLEAN, FIXTURE_SPEECH, FIXTURES

# Small budgets and a fifth held out: the fixture holds under a minute of speech.
SMALL = ["--set", 'split.labelled_budgets=["8s", "16s"]', "--set", 'split.heldout="20%"',
         "--set", "ingest.metadata=metadata.csv"]


def one_voice_raw(raw: Path, *, folder: str = "wavs", speaker_column: str = "",
                  read_twice: bool = False) -> dict[str, str]:
    """Nine transcribed recordings in ``raw/folder`` and ``raw/metadata.csv`` (path,
    transcript and, when ``speaker_column`` is given, that column saying "narrator");
    returns the transcript of each path. With ``read_twice`` every prompt has a second,
    slower reading (``<stem>_again.flac``), as in a prompted synthesis corpus."""
    sources = {DEMO / rel: text for rel, text in DEMO_CLEAN.items()}
    sources.update({FIXTURES / "speech" / f"{stem}.flac": text for stem, text in FIXTURE_SPEECH.items()})
    (raw / folder).mkdir(parents=True, exist_ok=True)
    texts = {}
    for source, text in sources.items():
        rel = f"{folder}/{source.name}" if folder else source.name
        shutil.copyfile(source, raw / rel)
        texts[rel] = text
        if read_twice:
            again = f"{folder}/{source.stem}_again.flac" if folder else f"{source.stem}_again.flac"
            texts[again] = text
            slower_reading(source, raw / again)
    with open(raw / "metadata.csv", "w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f)
        writer.writerow(["path", "transcript", *([speaker_column] if speaker_column else [])])
        for rel, text in sorted(texts.items()):
            writer.writerow([rel, text, *(["narrator"] if speaker_column else [])])
    return texts


def slower_reading(source: Path, path: Path) -> None:
    """The same samples declared at 0.9 times their rate: the prompt read 10 % slower and
    lower, different enough that the fingerprints do not bind the two readings
    (pipeline.signal.fingerprint), whose speaking rates stay within the rate gate."""
    import soundfile as sf

    samples, rate = sf.read(source, dtype="int16")
    sf.write(path, samples, int(rate * 0.9), format="FLAC", subtype="PCM_16")


def ingest_rows(raw: Path, out: Path, ingest: dict[str, object]) -> tuple[list[dict], dict]:
    config = build_config({"ingest": {"metadata": "metadata.csv", **ingest}})
    Runner(raw, out, config, stages=STAGES, workers=1).prepare(("ingest",))
    summary = json.loads((out / "stages" / "ingest.summary.json").read_text(encoding="utf-8"))
    return pq.read_table(out / "stages" / "ingest.parquet").to_pylist(), summary


@pytest.mark.parametrize("folder", ["wavs", "", "corpus/audio"])
def test_a_flat_dump_is_one_speaker_not_its_folder(tmp_path: Path, folder: str) -> None:
    # A flat layout (every audio file in one folder, RAW itself included) names no speaker.
    texts = one_voice_raw(tmp_path / "raw", folder=folder)
    rows, summary = ingest_rows(tmp_path / "raw", tmp_path / "out", {})
    assert sorted(r["source_path"] for r in rows) == sorted(texts)
    assert {r["speaker"] for r in rows} == {FLAT_SPEAKER}
    assert summary["speaker_from"] == "flat layout" and summary["speakers"] == 1


def test_ingest_speaker_names_the_whole_dump_whatever_the_layout(tmp_path: Path) -> None:
    raw = tmp_path / "raw"
    texts = one_voice_raw(raw)
    (raw / "more").mkdir()
    shutil.move(raw / "wavs" / "salt.flac", raw / "more" / "salt.flac")  # no longer flat
    rows, summary = ingest_rows(raw, tmp_path / "out", {"speaker": "Tide Reader"})
    assert len(rows) == len(texts)
    assert {r["speaker"] for r in rows} == {speaker_id("Tide Reader")}
    assert summary["speaker_from"] == "ingest.speaker"


def test_speaker_from_a_metadata_column(tmp_path: Path) -> None:
    texts = one_voice_raw(tmp_path / "raw", speaker_column="voice")
    rows, summary = ingest_rows(tmp_path / "raw", tmp_path / "out",
                                {"speaker_from": "metadata", "metadata_speaker_column": "voice"})
    assert len(rows) == len(texts) and {r["speaker"] for r in rows} == {"narrator"}
    assert summary["speaker_from"] == "metadata"


def test_speaker_folders_still_name_their_speakers(tmp_path: Path) -> None:
    raw = tmp_path / "raw"
    one_voice_raw(raw)
    (raw / "ana").mkdir()
    shutil.move(raw / "wavs" / "salt.flac", raw / "ana" / "salt.flac")
    rows, summary = ingest_rows(raw, tmp_path / "out", {})
    assert {r["speaker"] for r in rows} == {"wavs", "ana"}
    assert summary["speaker_from"] == "path"


def suggested_settings(message: str) -> list[str]:
    """The ``--set`` options a stop message suggests, as command-line arguments."""
    return [arg for option in re.findall(r"--set (\S+?)[:)]", message) for arg in ("--set", option)]


def test_the_suggested_single_speaker_split_passes_validate_strict(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    raw = tmp_path / "raw"
    one_voice_raw(raw)
    base = ["prepare", str(raw), str(tmp_path / "stopped"), "--workers", "1", "--no-progress", *SMALL]
    assert main(base) == 1
    message = capsys.readouterr().err
    assert f"only 1 group ({FLAT_SPEAKER})" in message
    suggestions = [suggested_settings(line) for line in message.splitlines() if "--set" in line][0]
    assert suggestions == ["--set", "split.group_by=recording", "--set", "split.group_by=clip"]
    for unit, option in zip(("recording", "clip"), suggestions[1::2], strict=True):
        out = tmp_path / unit
        assert main(["prepare", str(raw), str(out), "--workers", "1", "--no-progress", *SMALL, "--set", option]) == 0
        capsys.readouterr()
        assert main(["validate", str(out), "--strict", "--json"]) == 0, capsys.readouterr().out
        verdict = json.loads(capsys.readouterr().out)
        assert verdict["problems"] == []
        assert verdict["disjointness"] == {"disjoint_by": unit, "heldout_clips": verdict["disjointness"]["heldout_clips"],
                                      "speakers_on_both_sides": 1, "recordings_on_both_sides": 0,
                                      "clips_on_both_sides": 0}
        assert verdict["disjointness"]["heldout_clips"] > 0
        tables = {name: pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist()
                  for name in ("labelled", "unlabelled", "heldout")}
        held = {r["source_path"] for r in tables["heldout"]}
        training = {r["source_path"] for name in ("labelled", "unlabelled") for r in tables[name]}
        assert held and tables["labelled"] and not held & training
        assert main(["report", str(out)]) == 0
        summary = json.loads((out / "report" / "summary.json").read_text(encoding="utf-8"))
        assert summary["disjointness"]["disjoint_by"] == unit
        page = (out / "report" / "index.html").read_text(encoding="utf-8")
        assert f"Held-out is disjoint from training by {unit} (split.group_by)" in page


def test_a_single_speaker_test_part_holds_no_prompt_of_labelled_training(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Every prompt is read twice, in two recordings: grouping by recording, a test clip's
    # other reading could land in labelled. With the default split.text_overlap
    # ("unscore") no scorable test clip's prompt is in labelled training (issue 17, checks).
    raw, out = tmp_path / "raw", tmp_path / "out"
    texts = one_voice_raw(raw, read_twice=True)
    assert len(texts) == 2 * len(set(texts.values()))
    assert main(["prepare", str(raw), str(out), "--workers", "1", "--no-progress", *SMALL,
                 "--set", "split.group_by=recording"]) == 0
    capsys.readouterr()
    assert main(["validate", str(out), "--strict"]) == 0, capsys.readouterr().out
    tables = {name: pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist()
              for name in ("labelled", "unlabelled", "heldout")}
    assert not [r for name in ("labelled", "unlabelled", "heldout") for r in tables[name]
                if "near_duplicate" in r["quality_flags"]], "the two readings must stay separate groups"
    labelled_prompts = {r["norm_text"] for r in tables["labelled"]}
    test = [r for r in tables["heldout"] if r["part"] == "test"]
    assert [r for r in test if r["scorable"]], "the test part has clips to score"
    assert not [r["clip_id"] for r in test if r["scorable"] and r["norm_text"] in labelled_prompts]
