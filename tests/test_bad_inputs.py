"""A raw dump full of faults: each input is accepted correctly or rejected with the right
reason, the run never crashes, nothing is lost and the dump is unchanged afterwards."""

from __future__ import annotations

import io
import os
import struct
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.commands.cli import main
from pipeline.core.errors import ConfigError, DataError
from pipeline.core.manifest import check_table
from pipeline.stages.ingest import read_metadata_table
from tests.conftest import examples, speechlike, tree_hash

SR = 16000


def float_wav_with(value: float) -> bytes:
    buf = io.BytesIO()
    x = speechlike(1.5, SR, seed=1).astype(np.float32)
    x[100] = value
    sf.write(buf, x, SR, format="WAV", subtype="FLOAT")
    return buf.getvalue()


@pytest.fixture
def faulty_raw(tmp_path: Path) -> tuple[Path, dict[str, str | None]]:
    """RAW with one of each fault; returns it and the expected reason per input (None = accepted)."""
    raw = tmp_path / "raw"
    s = raw / "spk"
    s.mkdir(parents=True)
    (raw / "voice two").mkdir()
    expect: dict[str, str | None] = {}

    def put(rel: str, data: bytes, reason: str | None) -> None:
        (raw / rel).parent.mkdir(parents=True, exist_ok=True)
        (raw / rel).write_bytes(data)
        expect[rel] = reason

    def audio(x: np.ndarray, rate: int, fmt: str = "WAV", subtype: str = "PCM_16") -> bytes:
        buf = io.BytesIO()
        sf.write(buf, x, rate, format=fmt, subtype=subtype)
        return buf.getvalue()

    good = audio(speechlike(2.0, SR, seed=2), SR)
    put("spk/zero.wav", b"", "empty")
    put("spk/header_cut.wav", good[:20], "undecodable")
    put("spk/text.wav", b"this is not audio\n", "undecodable")
    put("spk/nan.wav", float_wav_with(float("nan")), "non_finite_samples")
    put("spk/inf.wav", float_wav_with(float("inf")), "non_finite_samples")
    put("spk/huge.wav", float_wav_with(9e29), "out_of_range_samples")
    put("spk/u8.wav", audio(speechlike(2.0, SR, seed=3), SR, subtype="PCM_U8"), None)
    put("spk/s24.wav", audio(speechlike(2.0, 48000, seed=4), 48000, subtype="PCM_24"), None)  # kept, untranscribed
    put("spk/f32.wav", audio(speechlike(2.0, 22050, seed=5), 22050, subtype="FLOAT"), None)
    six = np.stack([speechlike(2.0, SR, seed=6)] * 6, axis=1)
    put("spk/six_channels.wav", audio(six, SR), None)
    put("spk/rate4k.wav", audio(speechlike(2.5, 4000, seed=7), 4000), None)  # upsampled: flagged, kept
    put("spk/rate192k.wav", audio(speechlike(2.0, 192000, seed=8), 192000), None)
    put("spk/tenth.wav", audio(speechlike(0.1, SR, seed=9), SR), "too_short")
    put("voice two/with space.wav", audio(speechlike(2.0, SR, seed=10), SR), None)
    put("spk/Ünïcödé.flac", audio(speechlike(2.0, SR, seed=11), SR, fmt="FLAC"), None)
    put("spk/-rf.wav", audio(speechlike(2.0, SR, seed=12), SR), None)
    put("spk/$(touch pwned); rm -rf x `id`.wav", audio(speechlike(2.0, SR, seed=13), SR), None)
    put("spk/dup_a.wav", audio(speechlike(2.0, SR, seed=14), SR), None)
    put("spk/dup_b.wav", (raw / "spk/dup_a.wav").read_bytes(), "duplicate_content")
    # Truncated data: a header that promises more frames than the file holds. libsndfile
    # trusts the file size and would decode what is present; the data chunk says more.
    put("spk/data_cut.wav", good[: len(good) // 2], "truncated")
    (raw / "spk" / "with_html.txt").write_text("<b>bold</b> <script>alert(1)</script> words", encoding="utf-8")
    put("spk/with_html.wav", audio(speechlike(2.0, SR, seed=15), SR), None)
    (raw / "spk" / "emoji.txt").write_text("hello 🎉 there\x07 friend\u200b", encoding="utf-8")
    put("spk/emoji.wav", audio(speechlike(2.0, SR, seed=16), SR), None)
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "o.wav").write_bytes(audio(speechlike(2.0, SR, seed=17), SR))
    os.symlink(outside / "o.wav", raw / "spk" / "link_out.wav")
    expect["spk/link_out.wav"] = "path_outside_root"
    meta = (
        b"path,transcript,speaker,unused column\n"
        b"spk/u8.wav,a plain line,spk,x\n"
        b"spk/u8.wav,a plain line,spk,x\n"                 # duplicate row
        b"spk/s24.wav,one text,spk,x\n"
        b"spk/s24.wav,another text,spk,x\n"                # conflicting
        b"../escape.wav,up and out,spk,x\n"
        b"/etc/passwd,absolute,spk,x\n"
        b"spk/link_out.wav,through a link,spk,x\n"
        b"spk/missing.wav,not there,spk,x\n"
        b"short,row\n"
    ) + b"spk/f32.wav,caf\xe9 latin one,spk,x\n"
    (raw / "meta.csv").write_bytes(meta)
    expect.update({"meta.csv:3": "metadata_duplicate_row", "meta.csv:4": "conflicting_transcripts",
                   "meta.csv:5": "conflicting_transcripts", "meta.csv:6": "path_outside_root",
                   "meta.csv:7": "path_outside_root", "meta.csv:8": "path_outside_root",
                   "meta.csv:9": "metadata_missing_audio", "meta.csv:10": "metadata_parse_error",
                   "meta.csv:11": "transcript_encoding"})
    return raw, expect


def test_every_fault_gets_its_reason_and_nothing_is_lost(faulty_raw, tmp_path: Path) -> None:
    raw, expect = faulty_raw
    before = tree_hash(raw)
    out = tmp_path / "out"
    code = main(["prepare", str(raw), str(out), "--workers", "2", "--no-progress",
                 "--set", 'ingest.metadata="meta.csv"', "--set", 'split.group_by="clip"',
                 "--set", 'split.heldout="0%"', "--set", 'split.labelled_budgets=["2s"]'])
    assert code == 0
    assert tree_hash(raw) == before, "the raw dump changed"
    assert not (Path.cwd() / "pwned").exists() and not (raw / "spk" / "pwned").exists()
    rejects = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    ingest = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    audio_rows = pq.read_table(out / "stages" / "audio.parquet").to_pylist()
    by_source = {}
    for r in rejects:
        by_source.setdefault(r["source_path"], set()).add(r["reason"])
    for rel, reason in expect.items():
        if reason is None:
            assert rel in {r["source_path"] for r in audio_rows}, f"{rel} should be accepted; rejects: {by_source.get(rel)}"
        else:
            assert reason in by_source.get(rel, set()), f"{rel}: expected {reason}, got {by_source.get(rel)}"
    # Conservation: every audio file found is in exactly one place.
    found = {p for p in expect if not p.startswith("meta.csv")}
    ingest_paths = {r["source_path"] for r in ingest}
    ingest_rejects = {r["source_path"] for r in rejects if r["stage"] == "ingest"}
    assert found == ingest_paths | (ingest_rejects & found)
    assert not ingest_paths & ingest_rejects
    audio_done = {r["source_path"] for r in audio_rows} | {r["source_path"] for r in rejects if r["stage"] == "audio"}
    assert audio_done == ingest_paths
    # The upsampled file is kept and flagged, never silently.
    assert next(r for r in audio_rows if r["source_path"] == "spk/rate4k.wav")["upsampled_from"] == 4000
    # Details name the file they are about.
    for r in rejects:
        assert r["detail"].split(":")[0] in (r["source_path"], r["source_path"].split(":")[0]) or r["source_path"] in r["detail"]
    # The subset manifests hold every surviving clip once.
    subsets = [pq.read_table(out / "manifests" / f"{n}.parquet").to_pylist() for n in ("labelled", "unlabelled", "heldout")]
    clip_ids = [r["clip_id"] for rows in subsets for r in rows]
    assert len(clip_ids) == len(set(clip_ids))
    assert set(clip_ids) | {r["clip_id"] for r in rejects if r["stage"] == "split"} == {r["clip_id"] for r in audio_rows}
    assert main(["report", str(out)]) == 0
    html = (out / "report" / "index.html").read_text(encoding="utf-8")
    assert "<script>alert(1)</script>" not in html


def test_missing_metadata_column_is_a_clear_error(faulty_raw, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    raw, _ = faulty_raw
    (raw / "meta.csv").write_text("path,speaker\nspk/u8.wav,spk\n", encoding="utf-8")
    code = main(["prepare", str(raw), str(tmp_path / "out"), "--set", 'ingest.metadata="meta.csv"'])
    assert code == 2  # a configuration error (README, "Exit codes")
    assert ("meta.csv: line 1: the header has no column 'transcript' (ingest.metadata_transcript_column, from "
            "the default); the columns present are 'path', 'speaker'.") in capsys.readouterr().err


cell = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=12)


@settings(max_examples=examples(80), deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.lists(cell, min_size=0, max_size=5), max_size=8), st.binary(max_size=40),
       st.sampled_from([",", "\t"]))
def test_metadata_reader_fuzz(tmp_path: Path, rows: list[list[str]], junk: bytes, delimiter: str) -> None:
    """Random malformed tables: a DataError, a ConfigError (a column the config names is
    missing) or rejects, never another exception."""
    raw = tmp_path / "fuzzraw"
    raw.mkdir(exist_ok=True)
    name = "t.tsv" if delimiter == "\t" else "t.csv"
    text = "\n".join(delimiter.join(r) for r in rows).encode("utf-8", "surrogatepass") + junk
    (raw / name).write_bytes(text)
    try:
        parsed, rejects = read_metadata_table(raw, name, path_column="path", transcript_column="transcript",
                                              speaker_column="speaker", need_speaker=False)
    except (DataError, ConfigError) as exc:
        assert name in str(exc)
        return
    for r in rejects:
        assert r["source_path"].startswith(f"{name}:") and r["detail"]
    assert all(isinstance(p.line, int) for p in parsed)


@settings(max_examples=examples(60), deadline=None)
@given(st.dictionaries(st.sampled_from(["source_path", "reason", "detail", "stage", "clip_id", "other"]),
                       st.lists(st.one_of(st.none(), st.integers(), st.text(max_size=4), st.floats()), min_size=3, max_size=3),
                       max_size=6))
def test_manifest_check_fuzz(columns: dict[str, list]) -> None:
    """Random malformed tables give problems, never a traceback."""
    try:
        table = pa.table(columns) if columns else pa.table({"x": [1, 2, 3]})
    except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
        return  # not a table at all: nothing to validate
    problems = check_table("rejected", table, where="fuzz.parquet")
    assert all(p.file == "fuzz.parquet" for p in problems)


def test_header_struct_of_truncated_file_is_what_we_think() -> None:
    """Guard for the fixture above: a 20-byte WAV holds RIFF, size, WAVE and part of fmt."""
    buf = io.BytesIO()
    sf.write(buf, np.zeros(10, np.float32), SR, format="WAV", subtype="PCM_16")
    head = buf.getvalue()[:20]
    assert head[:4] == b"RIFF" and head[8:12] == b"WAVE"
    assert struct.unpack("<I", head[4:8])[0] > 20
