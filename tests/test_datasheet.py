"""``report/datasheet.md``: the seven sections of Gebru et al., "Datasheets for Datasets"
(2018/2021), filled from the demo build and its ``[datasheet]`` answers; questions left
unanswered are marked; hostile names and answers stay text; the file is the same on
every rerun and wherever OUT lies.

Markdown is checked as GitHub renders it, with cmark-gfm (``cmarkgfm``).
"""

from __future__ import annotations

import html
import importlib.metadata
import json
import re
import shutil
from collections import Counter
from pathlib import Path

import cmarkgfm
import pyarrow.parquet as pq
import pytest
from cmarkgfm.cmark import Options

from pipeline.commands.cli import main
from pipeline.commands.datasheet_sheet import QUESTIONS, TO_BE_ANSWERED
from pipeline.commands.markdown import md_paragraphs
from pipeline.commands.reasons import MEANINGS
from pipeline.commands.report import write_report
from pipeline.core.config import build_config, load_config
from pipeline.core.errors import ConfigError
from pipeline.core.names import REASONS, REPORT_DATASHEET, stage_manifest
from pipeline.core.schemas_io import load_schema
from tests.conftest import DEMO

SECTIONS = ["1. Motivation", "2. Composition", "3. Collection process", "4. Preprocessing, cleaning and labelling",
            "5. Uses", "6. Distribution", "7. Maintenance"]


def render(markdown: str) -> str:
    return cmarkgfm.github_flavored_markdown_to_html(markdown, options=Options.CMARK_OPT_UNSAFE)


def sections(markdown: str) -> dict[str, str]:
    """Each level-2 section's Markdown, by its title."""
    parts = re.split(r"^## (.+)$", markdown, flags=re.M)
    return dict(zip(parts[1::2], parts[2::2], strict=True))


def built_paragraphs(section: str, answers: list[str]) -> list[str]:
    """A section's paragraphs and tables that are neither a question, nor a mark, nor an answer."""
    blocks = [b.strip() for b in section.split("\n\n") if b.strip()]
    return [b for b in blocks if not b.startswith(("**", "#", "---")) and b not in answers]


@pytest.fixture(scope="module")
def sheet(demo_build: Path) -> str:
    return (demo_build / REPORT_DATASHEET).read_text(encoding="utf-8")


def test_seven_sections_in_order_each_filled_from_the_build(sheet: str, demo_build: Path) -> None:
    found = sections(sheet)
    assert list(found) == SECTIONS
    summary = json.loads((demo_build / "report/summary.json").read_text(encoding="utf-8"))
    config = load_config(DEMO / "corpus.toml")
    answers = [p for value in config.section("datasheet").values() for p in md_paragraphs(value)]
    assert f"{summary['totals']['clips']} clips" in found["2. Composition"]
    for speaker in ("heron", "otter", "sedge", "alder", "plover", "wren", "egret"):
        assert f"| `{speaker}` |" in found["2. Composition"]
    # Transcribed clips per language, counted in the text manifest the build wrote.
    languages = Counter(pq.read_table(demo_build / stage_manifest("text")).column("language").to_pylist())
    assert set(languages) == {"en", "sw"}  # the demo's English speakers and its Swahili one
    for tag, clips in languages.items():
        assert f"| `{tag}` | {clips} |" in found["2. Composition"]
    # The demo's rates and containers (demo_corpus/README.md: 8 kHz telephone WAV, 44.1 kHz stereo, Vorbis).
    assert "| `WAV` | `PCM_16` | 1 | 8000 |" in found["3. Collection process"]
    assert "| `OGG` | `VORBIS` | 2 | 44100 |" in found["3. Collection process"]
    prep = found["4. Preprocessing, cleaning and labelling"]
    # The demo's one long reading (heron_storm_log), aligned as the audio stage's summary records.
    aligned = json.loads((demo_build / "stages/audio.summary.json").read_text(encoding="utf-8"))["aligned_sources"]
    assert list(aligned) == ["heron/heron_storm_log.ogg"]
    assert "Here: 1 recording aligned." in prep
    for key, value in config.section("audio").items():
        assert f"| `audio.{key}` | `{json.dumps(value)}` |" in prep
    assert f"seed of every ranked or random choice is {config.seed}" in prep
    # Library versions as the installed distributions record them.
    for dist in ("numpy", "soxr", "pyarrow", "panphon"):
        assert f"{dist} {importlib.metadata.version(dist)}" in prep
    for reason, n in summary["rejects"]["by_reason"].items():
        assert f"| `{reason}` | {MEANINGS[reason]} | `ingest` | {n} |" in prep
    assert "no review decisions file exists for this build" in prep
    assert "No: `privacy.pseudonymise` is false" in prep
    held = summary["subsets"]["heldout"]
    assert (f"({held['scored_clips']} scored clips from {held['speakers']} speakers no training subset holds) "
            "for evaluation, in parts `dev`, `test`.") in found["5. Uses"]
    for part, v in summary["parts"].items():
        assert f"| `{part}` | {v['clips']} |" in found["2. Composition"]
    for title in SECTIONS:
        assert built_paragraphs(found[title], answers), title
    assert "In fact it is Loam's demonstration dump" in found["1. Motivation"]


def test_config_answers_appear_and_unanswered_questions_are_marked(sheet: str) -> None:
    answers = load_config(DEMO / "corpus.toml").datasheet
    assert sheet.startswith("# Datasheet: Tidewell Reach tide-book (Loam demo corpus)\n")
    unanswered = [k for k in QUESTIONS if not getattr(answers, k).strip()]
    assert 0 < len(unanswered) < len(QUESTIONS)  # the demo answers some and leaves some
    assert sheet.count(TO_BE_ANSWERED) == len(unanswered) + 1  # and once in the introduction
    for key, question in QUESTIONS.items():
        after = sheet.split(f"**{question}** (`datasheet.{key}`)\n\n", 1)[1]
        if key in unanswered:
            assert after.startswith(TO_BE_ANSWERED + "\n"), key
        else:
            assert after.startswith(md_paragraphs(getattr(answers, key))[0] + "\n"), key
    assert "`ethical_review`" in sheet.rsplit("---", 1)[1]
    # The e-mail address is a code span, never a mailto link.
    assert "`tide-book@tidewell-reach.example`" in sheet and "<a " not in render(sheet)


def test_the_schema_asks_every_question_and_every_reason_has_a_meaning() -> None:
    assert list(load_schema("config")["properties"]["datasheet"]["properties"]) == ["name", *QUESTIONS]
    assert set(REASONS) <= set(MEANINGS)


def test_datasheet_answers_change_no_manifest_hash_and_are_validated() -> None:
    assert build_config({"datasheet": {"purpose": "x"}}).sha256() == build_config({}).sha256()
    with pytest.raises(ConfigError, match=r"key 'datasheet.licence' has value 3; allowed: string"):
        build_config({"datasheet": {"licence": 3}})
    with pytest.raises(ConfigError, match=r"unknown key 'datasheet.licence_url'"):
        build_config({"datasheet": {"licence_url": "x"}})


def test_byte_identical_on_rerun_and_wherever_out_lies(sheet: str, demo_build: Path, tmp_path: Path) -> None:
    write_report(demo_build)
    assert (demo_build / REPORT_DATASHEET).read_text(encoding="utf-8") == sheet
    moved = tmp_path / "elsewhere"
    shutil.copytree(demo_build, moved, ignore=shutil.ignore_patterns("audio", "cache"))
    write_report(moved)
    assert (moved / REPORT_DATASHEET).read_bytes() == sheet.encode("utf-8")
    assert str(demo_build) not in sheet and str(tmp_path) not in sheet and str(DEMO) not in sheet


# Sorted after spk_a, so spk_a/a1.wav, not the evil folder's copy of it, is the one kept.
EVIL_SPEAKER = "z<img src=x onerror=alert(1)>[x](https:evil.example)"
EVIL_FILE = "**bold** `tick` www.evil.example.wav"
EVIL_ANSWER = "# Heading\n\n<script>alert(2)</script> [click](https://evil.example) ed@evil.example\n- item"


def test_hostile_names_and_answers_stay_text(small_raw: Path, tmp_path: Path) -> None:
    """A speaker folder, a file name and config answers full of markup render as themselves."""
    (small_raw / "spk_b").rename(small_raw / EVIL_SPEAKER)
    (small_raw / EVIL_SPEAKER / "broken.wav").rename(small_raw / EVIL_SPEAKER / EVIL_FILE)
    config = tmp_path / "corpus.toml"
    config.write_text('[datasheet]\n'
                      f"name = {json.dumps(EVIL_ANSWER)}\npurpose = {json.dumps(EVIL_ANSWER)}\n", encoding="utf-8")
    out = tmp_path / "out"
    assert main(["prepare", str(small_raw), str(out), "--config", str(config), "--no-progress"]) == 0
    assert main(["report", str(out)]) == 0
    rendered = render((out / REPORT_DATASHEET).read_text(encoding="utf-8"))
    assert set(re.findall(r"<([a-z0-9]+)", rendered)) <= {"h1", "h2", "h3", "p", "strong", "code", "blockquote",
                                                          "table", "thead", "tbody", "tr", "th", "td", "hr"}
    assert len(re.findall(r"<h1>", rendered)) == 1 and len(re.findall(r"<h2>", rendered)) == 7
    text = html.unescape(re.sub(r"<[^>]+>", "", rendered))
    assert f"Datasheet: {' '.join(EVIL_ANSWER.split())}" in text
    # Speaker ids are made safe by ingest; the raw paths, in reject sentences, are not.
    assert f"{EVIL_SPEAKER}/{EVIL_FILE}: the file is empty" in text


def test_heldout_parts_are_listed_with_their_sizes() -> None:
    from pipeline.commands.datasheet_sections import _parts

    assert _parts(None) == ["The held-out subset is not divided into parts (the report's summary records none)."]
    table = _parts({"dev": {"clips": 4, "seconds": 61.2, "speakers": 1, "scorable_clips": 3, "target_s": 60.0,
                            "text_disjoint": True},
                    "test": {"clips": 5, "seconds": 3725.0, "speakers": 2, "scorable_clips": 5, "target_s": None,
                             "text_disjoint": None}})[1]
    assert table.splitlines()[2:] == ["| `dev` | 4 | 0:01:01 | 1 | 3 | 0:01:00 | yes |",
                                      "| `test` | 5 | 1:02:05 | 2 | 5 | none | not configured |"]


def test_review_decisions_are_counted_from_the_stage_summaries(demo_build: Path) -> None:
    import dataclasses

    from pipeline.commands.datasheet import build_facts, render_datasheet

    summary = json.loads((demo_build / "report/summary.json").read_text(encoding="utf-8"))
    b = build_facts(demo_build, summary)
    # The demo build has none: its stages name the file beside the ledger, which does not exist.
    assert {s: e["file_exists"] for s, e in b.review.items()} == {"text": False, "split": False}
    assert "None: no review decisions file exists for this build (`ledger.decisions.jsonl` in the corpus folder)" \
        in render_datasheet(b)
    entry = {"decisions_file": "/elsewhere/corpus.ledger.decisions.jsonl", "file_exists": True}
    b = dataclasses.replace(b, review={
        "text": {**entry, "applied": {"fix_transcript": 2, "pronunciation": 1}, "applied_total": 3,
                 "not_applied": {"audio_changed": 1}, "not_applied_total": 1},
        "split": {**entry, "applied": {"exclude": 1}, "applied_total": 1, "not_applied": {}, "not_applied_total": 0}})
    text = render_datasheet(b)
    assert "The decisions file (`corpus.ledger.decisions.jsonl` beside the split ledger, outside the corpus " \
           "folder)" in text and "/elsewhere" not in text
    assert "| `split` | 1 | `exclude` 1 | 0 | none |" in text
    assert "| `text` | 3 | `fix_transcript` 2, `pronunciation` 1 | 1 | `audio_changed` 1 |" in text
    dropped = dataclasses.replace(b, review={})
    assert "no stage summary of this build records review decisions" in render_datasheet(dropped)
