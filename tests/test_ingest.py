"""Ingest: probing, pairing, quarantine, conservation, order independence, path safety."""

from __future__ import annotations

import hashlib
import logging
import os
import re
import wave
from pathlib import Path
from unittest import mock

import pyarrow.parquet as pq
import pytest

from pipeline.core.config import build_config
from pipeline.core.runner import Runner
from pipeline.stages import STAGES, ingest
from tests.conftest import cache_table

META = {"ingest": {"metadata": "meta.csv"}}


def run_ingest(raw: Path, out: Path, data: dict | None = None, workers: int = 1) -> tuple[list[dict], list[dict]]:
    runner = Runner(raw, out, build_config(data if data is not None else META), stages=STAGES, workers=workers)
    runner.prepare(("ingest",))
    rows = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    rejects = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    return rows, rejects


def test_small_raw_counts_reasons_and_conservation(small_raw: Path, tmp_path: Path) -> None:
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    by_path = {r["source_path"]: r for r in rows}
    assert sorted(by_path) == ["spk_a/a1.wav", "spk_a/a2.flac", "spk_b/b1.wav", "spk_b/b2.ogg"]
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert reasons == {
        "spk_b/broken.wav": "empty",
        "spk_b/copy.wav": "duplicate_content",
        "meta.csv:3": "metadata_missing_audio",
        "meta.csv:4": "path_outside_root",
    }
    assert by_path["spk_a/a1.wav"]["transcript"] == "the first line"
    assert by_path["spk_a/a1.wav"]["transcript_origin"] == "sidecar"
    assert by_path["spk_b/b1.wav"]["transcript"] == "a second line"
    assert by_path["spk_b/b1.wav"]["metadata_line"] == 2
    assert by_path["spk_a/a2.flac"]["transcript"] is None
    # Conservation: every audio file found and every metadata row is accounted for once.
    audio_found = {str(p.relative_to(small_raw)) for p in small_raw.rglob("*") if p.suffix in {".wav", ".flac", ".ogg"}}
    assert audio_found == set(by_path) | {r["source_path"] for r in rejects if not r["source_path"].startswith("meta.csv")}
    assert len(audio_found) == len(rows) + sum(1 for r in rejects if not r["source_path"].startswith("meta.csv"))
    meta_lines = {2, 3, 4}
    accounted = {r["metadata_line"] for r in rows if r["metadata_line"]} | {
        int(r["source_path"].split(":")[1]) for r in rejects if r["source_path"].startswith("meta.csv:")}
    assert accounted == meta_lines
    for r in rejects:
        assert r["detail"].startswith(r["source_path"].split(":")[0]), r["detail"]


def test_header_facts_match_stdlib_wave(small_raw: Path, tmp_path: Path) -> None:
    """Cross-check against Python's standard-library ``wave`` module (an outside reader)."""
    import soundfile as sf

    sf.write(small_raw / "spk_a" / "w8.wav", (ingest_tone := __import__("tests.conftest", fromlist=["tone"]).tone)(0.7, 8000), 8000, subtype="PCM_16")
    del ingest_tone
    rows, _ = run_ingest(small_raw, tmp_path / "out")
    checked = 0
    for row in rows:
        if row["format"] != "WAV" or row["subtype"] != "PCM_16":
            continue  # ``wave`` reads integer PCM only
        with wave.open(str(small_raw / row["source_path"]), "rb") as w:
            assert w.getframerate() == row["sample_rate"]
            assert w.getnchannels() == row["channels"]
            assert w.getnframes() == row["num_frames"]
            assert w.getsampwidth() == 2
        checked += 1
    assert checked >= 2
    for row in rows:
        # hashlib directly on the bytes (an independent read of the file)
        assert row["sha256"] == hashlib.sha256((small_raw / row["source_path"]).read_bytes()).hexdigest()
        assert row["size_bytes"] == (small_raw / row["source_path"]).stat().st_size


def test_walk_order_does_not_matter(small_raw: Path, tmp_path: Path) -> None:
    first = run_ingest(small_raw, tmp_path / "a")
    real_scandir = os.scandir
    listed = []

    class Reversed:  # os.scandir, the entries in the opposite of the order the file system gives
        def __init__(self, path="."):  # type: ignore[no-untyped-def]
            with real_scandir(path) as it:
                self.entries = iter(list(it)[::-1])
            listed.append(path)

        def __iter__(self):  # type: ignore[no-untyped-def]
            return self

        def __next__(self):  # type: ignore[no-untyped-def]
            return next(self.entries)

        def close(self) -> None:
            pass

        def __enter__(self):  # type: ignore[no-untyped-def]
            return self

        def __exit__(self, *exc):  # type: ignore[no-untyped-def]
            return False

    with mock.patch("pipeline.stages.ingest.os.scandir", Reversed):
        second = run_ingest(small_raw, tmp_path / "b")
    assert str(small_raw) in map(str, listed)  # the scan did list through the patched call
    assert first == second
    assert (tmp_path / "a/stages/ingest.parquet").read_bytes() == (tmp_path / "b/stages/ingest.parquet").read_bytes()


def test_worker_count_does_not_matter(small_raw: Path, tmp_path: Path) -> None:
    run_ingest(small_raw, tmp_path / "a", workers=1)
    run_ingest(small_raw, tmp_path / "b", workers=2)
    for rel in ("stages/ingest.parquet", "manifests/rejected.parquet"):
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes()


@pytest.mark.parametrize("bad", ["../x.wav", "/etc/passwd", "spk_a/../../x.wav", "link_out/x.wav", "C:\\\\x.wav"])
def test_metadata_paths_leaving_raw_are_rejected_unopened(small_raw: Path, tmp_path: Path, bad: str) -> None:
    outside = tmp_path / "outside"
    outside.mkdir()
    (outside / "x.wav").write_bytes((small_raw / "spk_a" / "a1.wav").read_bytes())
    (small_raw / "link_out").symlink_to(outside, target_is_directory=True)
    (small_raw / "meta.csv").write_text(f"path,transcript,speaker\n{bad},secret,spk_a\n", encoding="utf-8")
    opened: list[str] = []
    real_open = open

    def spy_open(file, *a, **k):  # type: ignore[no-untyped-def]
        opened.append(str(file))
        return real_open(file, *a, **k)

    with mock.patch("builtins.open", spy_open):
        rows, rejects = run_ingest(small_raw, tmp_path / "out")
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert reasons["meta.csv:2"] == "path_outside_root"
    assert reasons["link_out"] == "path_outside_root"
    assert not any(str(outside) in p for p in opened)
    assert all(r["transcript"] != "secret" for r in rows)


def test_symlinked_audio_file_out_of_root_is_rejected(small_raw: Path, tmp_path: Path) -> None:
    outside = tmp_path / "elsewhere.wav"
    outside.write_bytes((small_raw / "spk_a" / "a1.wav").read_bytes() + b"\0")
    (small_raw / "spk_a" / "linked.wav").symlink_to(outside)
    _, rejects = run_ingest(small_raw, tmp_path / "out")
    assert {r["source_path"]: r["reason"] for r in rejects}["spk_a/linked.wav"] == "path_outside_root"


def test_conflicting_transcripts_cost_the_transcripts_not_the_audio(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_text("path,transcript,speaker\nspk_a/a1.wav,another text,spk_a\n", encoding="utf-8")
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert reasons == {"spk_a/a1.txt": "conflicting_transcripts", "meta.csv:2": "conflicting_transcripts",
                       "spk_b/broken.wav": "empty", "spk_b/copy.wav": "duplicate_content"}
    row = {r["source_path"]: r for r in rows}["spk_a/a1.wav"]
    assert (row["transcript"], row["transcript_origin"], row["metadata_line"]) == (None, None, None)
    detail = {r["source_path"]: r["detail"] for r in rejects}
    # Each sentence names its source, the other transcript and what became of the audio.
    assert detail["spk_a/a1.txt"].startswith("spk_a/a1.txt: transcript 'the first line' for 'spk_a/a1.wav' "
                                             "differs from line 2 of meta.csv: 'another text'")
    assert detail["meta.csv:2"].startswith("meta.csv: line 2: transcript 'another text'")
    assert "'spk_a/a1.wav' is kept as untranscribed audio" in detail["meta.csv:2"]


def test_agreeing_sources_give_one_transcript(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_text("path,transcript,speaker\nspk_a/a1.wav,  the first line ,spk_a\n",
                                        encoding="utf-8")
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    row = {r["source_path"]: r for r in rows}["spk_a/a1.wav"]
    assert (row["transcript"], row["transcript_origin"], row["metadata_line"]) == ("the first line", "metadata", 2)
    assert not [r for r in rejects if r["source_path"] in ("spk_a/a1.txt", "meta.csv:2")]


def test_metadata_table_faults(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_bytes(
        b"\xef\xbb\xbfpath,transcript,speaker,extra\n"
        b"spk_b/b1.wav,a line,spk_b,x\n"
        b"spk_b/b1.wav,a line,spk_b,x\n"
        b"spk_b/b2.ogg,caf\xe9,spk_b,x\n"
        b"spk_a/a2.flac,too,many,fields,here\n"
    )
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert reasons["meta.csv:3"] == "metadata_duplicate_row"
    assert reasons["meta.csv:4"] == "transcript_encoding"
    assert reasons["meta.csv:5"] == "metadata_parse_error"
    assert "line 5: found 5 fields; expected 4" in next(r["detail"] for r in rejects if r["source_path"] == "meta.csv:5")
    assert {r["source_path"]: r["transcript"] for r in rows}["spk_b/b1.wav"] == "a line"


def test_missing_metadata_column_is_a_configuration_error(small_raw: Path, tmp_path: Path) -> None:
    from pipeline.core.errors import ConfigError

    (small_raw / "meta.csv").write_text("file,text\nspk_b/b1.wav,x\n", encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        run_ingest(small_raw, tmp_path / "out")
    assert err.value.exit_code == 2
    assert str(err.value).startswith(
        "meta.csv: line 1: the header has no column 'path' (ingest.metadata_path_column, from the default); "
        "column 'transcript' (ingest.metadata_transcript_column, from the default); "
        "the columns present are 'file', 'text'.")


def test_metadata_table_named_wrongly_is_a_configuration_error(small_raw: Path, tmp_path: Path) -> None:
    from pipeline.core.errors import ConfigError

    with pytest.raises(ConfigError, match=r"key 'ingest.metadata' has value 'nowhere.csv': cannot read the "
                                          r"metadata table \(No such file or directory\)"):
        run_ingest(small_raw, tmp_path / "out", {"ingest": {"metadata": "nowhere.csv"}})
    with pytest.raises(ConfigError, match=r"key 'ingest.metadata' has value '../meta.csv': the path '../meta.csv' "
                                          r"leaves the raw folder"):
        run_ingest(small_raw, tmp_path / "out", {"ingest": {"metadata": "../meta.csv"}})


def test_empty_metadata_table_stops_with_message(small_raw: Path, tmp_path: Path) -> None:
    from pipeline.core.errors import DataError

    (small_raw / "meta.csv").write_bytes(b"")
    with pytest.raises(DataError, match=r"meta.csv: the metadata table is empty; expected a header line"):
        run_ingest(small_raw, tmp_path / "out")


def test_latin1_sidecar_costs_its_transcript_not_its_audio(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "spk_a" / "a2.txt").write_bytes("the na\u00efve caf\u00e9".encode("latin-1"))
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    row = {r["source_path"]: r for r in rows}["spk_a/a2.flac"]
    assert (row["transcript"], row["transcript_origin"]) == (None, None)
    assert "spk_a/a2.flac" not in {r["source_path"] for r in rejects}
    r = next(r for r in rejects if r["source_path"] == "spk_a/a2.txt")
    assert (r["reason"], r["stage"], r["clip_id"]) == ("transcript_encoding", "ingest", None)
    # 0xEF is 'ï' in ISO 8859-1, and a UTF-8 lead byte that 'v' (0x76) cannot follow (RFC 3629, section 3).
    assert r["detail"] == (
        "spk_a/a2.txt: byte 6 (0xef, after 'the na') is not valid utf-8; the transcript is set aside and "
        "'spk_a/a2.flac' is kept as untranscribed audio; save the file as utf-8, or set "
        "ingest.transcript_encoding to the encoding it was written in (for example \"cp1252\" for Windows "
        "Western European text), then run again")


@pytest.mark.parametrize("encoding", ["latin-1", "cp1252", "iso8859_15"])
def test_transcript_encoding_reads_sidecars_and_the_table(small_raw: Path, tmp_path: Path, encoding: str) -> None:
    (small_raw / "spk_a" / "a2.txt").write_bytes("the na\u00efve caf\u00e9".encode(encoding))
    (small_raw / "meta.csv").write_bytes("path,transcript,speaker\nspk_b/b1.wav,cr\u00e8me br\u00fbl\u00e9e,spk_b\n"
                                         .encode(encoding))
    # A UTF-8 byte-order mark declares UTF-8 whatever the setting (Unicode Standard, section 23.8, cited from memory).
    (small_raw / "spk_b" / "b2.txt").write_bytes(b"\xef\xbb\xbf" + "\u00e0 bient\u00f4t".encode("utf-8"))
    rows, rejects = run_ingest(small_raw, tmp_path / "out", {"ingest": {"metadata": "meta.csv",
                                                                         "transcript_encoding": encoding}})
    transcripts = {r["source_path"]: r["transcript"] for r in rows}
    assert transcripts["spk_a/a2.flac"] == "the na\u00efve caf\u00e9"
    assert transcripts["spk_b/b1.wav"] == "cr\u00e8me br\u00fbl\u00e9e"
    assert transcripts["spk_b/b2.ogg"] == "\u00e0 bient\u00f4t"
    assert not [r for r in rejects if r["reason"] == "transcript_encoding"]


def test_metadata_transcript_in_the_wrong_encoding_keeps_row_speaker_and_audio(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_bytes(b"path,transcript,speaker\n"
                                         b"spk_b/b1.wav,a second line,reed\n"
                                         b"spk_b/b2.ogg,caf\xe9 au lait,heron\n")
    rows, rejects = run_ingest(small_raw, tmp_path / "out", {"ingest": {"metadata": "meta.csv",
                                                                         "speaker_from": "metadata"}})
    by_path = {r["source_path"]: r for r in rows}
    # The row still names the speaker, so the audio keeps it; only the transcript goes.
    assert (by_path["spk_b/b2.ogg"]["speaker"], by_path["spk_b/b2.ogg"]["transcript"]) == ("heron", None)
    assert by_path["spk_b/b2.ogg"]["metadata_line"] == 3
    r = next(r for r in rejects if r["source_path"] == "meta.csv:3")
    assert r["reason"] == "transcript_encoding"
    assert r["detail"].startswith("meta.csv: line 3: column 'transcript': byte 3 of the field (0xe9, after 'caf') "
                                  "is not valid utf-8; the transcript is set aside and 'spk_b/b2.ogg' is kept as "
                                  "untranscribed audio; save the table as utf-8")
    assert "spk_b/b2.ogg" not in {r["source_path"] for r in rejects}


def test_metadata_path_in_the_wrong_encoding_rejects_the_row_only(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_bytes(b"path,transcript,speaker\nspk_b/b\xe91.wav,some words,spk_b\n")
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    r = next(r for r in rejects if r["source_path"] == "meta.csv:2")
    assert r["reason"] == "metadata_parse_error"
    assert r["detail"].startswith("meta.csv: line 2: column 'path': byte 7 of the field (0xe9, after 'spk_b/b') "
                                  "is not valid utf-8")
    assert {"spk_b/b1.wav", "spk_b/b2.ogg"} <= {r["source_path"] for r in rows}


def test_empty_transcripts_mean_none_and_keep_the_audio(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "spk_a" / "a2.txt").write_text(" \n\t\n", encoding="utf-8")
    (small_raw / "meta.csv").write_text("path,transcript,speaker\nspk_b/b1.wav,,spk_b\nspk_b/b2.ogg,  ,spk_b\n",
                                        encoding="utf-8")
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    by_path = {r["source_path"]: r for r in rows}
    assert {p: by_path[p]["transcript"] for p in ("spk_a/a2.flac", "spk_b/b1.wav", "spk_b/b2.ogg")} == {
        "spk_a/a2.flac": None, "spk_b/b1.wav": None, "spk_b/b2.ogg": None}
    # An empty field says "no transcript" and the row is used; an empty file is set aside, visibly.
    assert (by_path["spk_b/b1.wav"]["metadata_line"], by_path["spk_b/b2.ogg"]["metadata_line"]) == (2, 3)
    r = next(r for r in rejects if r["source_path"] == "spk_a/a2.txt")
    assert r["reason"] == "empty_transcript" and r["stage"] == "ingest"
    assert r["detail"] == ("spk_a/a2.txt: the transcript file is empty; the transcript is set aside and "
                           "'spk_a/a2.flac' is kept as untranscribed audio; write the transcript into it, or "
                           "delete it if the audio has none")
    assert not [r for r in rejects if r["source_path"].startswith("meta.csv")]


def test_bad_sidecar_beside_a_good_metadata_transcript(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "spk_b" / "b1.txt").write_bytes(b"\xff\xfe")
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    assert {r["source_path"]: r["transcript"] for r in rows}["spk_b/b1.wav"] == "a second line"
    r = next(r for r in rejects if r["source_path"] == "spk_b/b1.txt")
    assert "the transcript is set aside and 'spk_b/b1.wav' keeps the transcript from line 2 of meta.csv" in r["detail"]


def test_unreadable_and_outside_sidecars_keep_their_audio(small_raw: Path, tmp_path: Path) -> None:
    secret = tmp_path / "secret.txt"
    secret.write_text("not for reading", encoding="utf-8")
    (small_raw / "spk_a" / "a2.txt").symlink_to(secret)
    (small_raw / "spk_b" / "b2.txt").symlink_to("gone.txt")  # dangling: cannot be read
    rows, rejects = run_ingest(small_raw, tmp_path / "out")
    by_path = {r["source_path"]: r for r in rows}
    assert by_path["spk_a/a2.flac"]["transcript"] is None and by_path["spk_b/b2.ogg"]["transcript"] is None
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert (reasons["spk_a/a2.txt"], reasons["spk_b/b2.txt"]) == ("path_outside_root", "transcript_unreadable")
    assert all("not for reading" not in r["detail"] for r in rejects)


def test_file_at_root_has_no_speaker(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "loose.wav").write_bytes((small_raw / "spk_a" / "a1.wav").read_bytes()[:-2] + b"\1\0")
    _, rejects = run_ingest(small_raw, tmp_path / "out")
    assert {r["source_path"]: r["reason"] for r in rejects}["loose.wav"] == "missing_speaker"


def test_ids_are_safe_and_stable() -> None:
    sha = "ab" * 32
    assert ingest.source_id("Ünïcode name (take 2)", sha) == "unicode-name-take-2-abababab" + "ab"
    assert ingest.source_id("---", sha) == "clip-ababababab"
    assert ingest.speaker_id("spk_a") == "spk_a"
    odd = ingest.speaker_id("Ana María; rm -rf")
    assert odd.startswith("Ana_Maria_rm_-rf-") and "/" not in odd
    assert ingest.speaker_id("a b") != ingest.speaker_id("a_b")


def test_raw_is_not_modified(small_raw: Path, tmp_path: Path) -> None:
    from tests.conftest import tree_hash

    before = tree_hash(small_raw)
    run_ingest(small_raw, tmp_path / "out")
    assert tree_hash(small_raw) == before


def test_demo_corpus_counts_conservation_and_reasons(tmp_path: Path) -> None:
    """The demo's deliberate faults (listed in demo_corpus/README.md) each get their reason."""
    from pipeline.core.config import load_config
    from tests.conftest import DEMO

    cfg = load_config(DEMO / "corpus.toml")
    out = tmp_path / "out"
    Runner(DEMO, out, cfg, stages=STAGES, workers=2).prepare(("ingest",))
    rows = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    rejects = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    reasons = {r["source_path"]: r["reason"] for r in rejects}
    assert reasons == {
        "plover/plover_09.wav": "empty",
        "alder/alder_tape_label.wav": "undecodable",
        "wren/wren_09.wav": "undecodable",
        "wren/wren_10.flac": "duplicate_content",
        "sedge/sedge_03.txt": "conflicting_transcripts",
        "metadata.csv:6": "conflicting_transcripts",
        "metadata.csv:11": "metadata_missing_audio",
        "metadata.csv:12": "path_outside_root",
    }
    audio_found = sorted(str(p.relative_to(DEMO)) for p in DEMO.rglob("*")
                         if p.suffix.lower() in {".wav", ".flac", ".ogg"})
    accepted = sorted(r["source_path"] for r in rows)
    assert len(audio_found) >= 40
    assert sorted(accepted + [p for p in reasons if p.endswith((".wav", ".flac", ".ogg"))]) == audio_found
    # The conflicting sidecar and row cost only the transcript: the audio is kept, untranscribed.
    assert {r["source_path"]: r["transcript"] for r in rows}["sedge/sedge_03.wav"] is None
    assert len({r["speaker"] for r in rows}) >= 5
    # Every metadata row (lines 2..N) is used by an ingest row or rejected.
    n_lines = len((DEMO / "metadata.csv").read_text(encoding="utf-8").strip().splitlines())
    used = {r["metadata_line"] for r in rows if r["metadata_line"]}
    rejected_lines = {int(p.split(":")[1]) for p in reasons if p.startswith("metadata.csv:")}
    assert used | rejected_lines == set(range(2, n_lines + 1))
    assert not used & rejected_lines
    assert sum(r["transcript"] is not None for r in rows) >= 12


def test_container_missing_from_libsndfile_is_unsupported(small_raw: Path, tmp_path: Path) -> None:
    import soundfile as sf

    formats = {k: v for k, v in sf.available_formats().items() if k != "OGG"}
    with mock.patch("soundfile.available_formats", return_value=formats):
        _, rejects = run_ingest(small_raw, tmp_path / "out", workers=1)
    r = next(r for r in rejects if r["source_path"] == "spk_b/b2.ogg")
    assert r["reason"] == "unsupported_format" and "cannot read OGG" in r["detail"]


def test_latin1_sidecar_end_to_end_then_fixed_by_the_setting(small_raw: Path, tmp_path: Path) -> None:
    """The audio of a Latin-1 sidecar reaches a subset; naming the encoding brings the transcript back."""
    from pipeline.commands.cli import main

    (small_raw / "spk_a" / "a2.txt").write_bytes("the na\u00efve caf\u00e9".encode("latin-1"))
    out = tmp_path / "out"
    common = ["--workers", "1", "--no-progress", "--set", 'ingest.metadata="meta.csv"', "--set", 'split.heldout="0%"',
              "--set", 'split.labelled_budgets=["2s"]', "--set", "split.keep_transcripts=true"]
    assert main(["prepare", str(small_raw), str(out), *common]) == 0
    subsets = {r["source_path"]: r for n in ("labelled", "unlabelled", "heldout")
               for r in pq.read_table(out / "manifests" / f"{n}.parquet").to_pylist()}
    assert subsets["spk_a/a2.flac"]["subset"] == "unlabelled" and subsets["spk_a/a2.flac"]["transcript"] is None
    rejected = {r["source_path"]: r for r in pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()}
    assert rejected["spk_a/a2.txt"]["reason"] == "transcript_encoding"
    assert "spk_a/a2.flac" not in rejected
    assert main(["validate", str(out), "--manifests-only"]) == 0

    assert main(["prepare", str(small_raw), str(out), *common, "--set", 'ingest.transcript_encoding="latin-1"']) == 0
    ingest_rows = {r["source_path"]: r for r in pq.read_table(out / "stages" / "ingest.parquet").to_pylist()}
    assert ingest_rows["spk_a/a2.flac"]["transcript"] == "the na\u00efve caf\u00e9"
    rejected = {r["source_path"] for r in pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()}
    assert "spk_a/a2.txt" not in rejected


def test_decode_text_reports_the_byte_offset_in_the_file() -> None:
    from pipeline.stages.transcripts import decode_text

    assert decode_text(b"ok \xe9", encoding="utf-8") == (None, 3)
    # The offset counts the byte-order mark, so it points into the file as stored.
    assert decode_text(b"\xef\xbb\xbfok \xff", encoding="cp1252") == (None, 6)
    assert decode_text("h\u00e9".encode("utf-16"), encoding="utf-16") == ("h\u00e9", None)
    # 0x81 is one of the five bytes cp1252 leaves undefined (Python's cp1252 codec table).
    assert decode_text(b"a\x81", encoding="cp1252") == (None, 1)


def test_sidecar_with_utf8_mark_is_judged_as_utf8(tmp_path: Path) -> None:
    from pipeline.stages.transcripts import read_sidecar

    (tmp_path / "a.txt").write_bytes(b"\xef\xbb\xbfok \xff")
    text, problem = read_sidecar(tmp_path, "a.txt", encoding="cp1252")
    assert text is None and problem is not None
    assert problem[1] == "a.txt: byte 6 (0xff, after 'ok ') is not valid utf-8"


def test_table_with_utf8_mark_is_judged_as_utf8(small_raw: Path, tmp_path: Path) -> None:
    (small_raw / "meta.csv").write_bytes(b"\xef\xbb\xbfpath,transcript,speaker\nspk_b/b1.wav,na\xefve,spk_b\n")
    rows, rejects = run_ingest(small_raw, tmp_path / "out", {"ingest": {"metadata": "meta.csv",
                                                                         "transcript_encoding": "cp1252"}})
    r = next(r for r in rejects if r["source_path"] == "meta.csv:2")
    assert r["detail"].startswith("meta.csv: line 2: column 'transcript': byte 2 of the field (0xef, after 'na') "
                                  "is not valid utf-8")
    assert {r["source_path"]: r["transcript"] for r in rows}["spk_b/b1.wav"] is None


def test_environment_failure_only_when_nothing_got_through_for_a_machine_reason() -> None:
    # Source: README.md, exit codes: every audio file unreadable points at the machine.
    from pipeline.stages.ingest import environment_failure

    def rej(path: str, reason: str) -> dict:
        return {"source_path": path, "reason": reason, "detail": f"{path}: {reason}"}

    paths = {"a/1.wav", "a/2.wav"}
    unreadable = [rej("a/1.wav", "unreadable"), rej("a/2.wav", "unreadable")]
    assert "every one of the 2 audio files was rejected as unreadable" in environment_failure(
        unreadable, paths=paths, metadata_rows=0, accepted=0)
    # One file of another reason, or one accepted, and the data may well be the cause.
    assert environment_failure([unreadable[0], rej("a/2.wav", "undecodable")], paths=paths, metadata_rows=0,
                               accepted=0) == ""
    assert environment_failure(unreadable[:1], paths=paths, metadata_rows=0, accepted=1) == ""
    # An unreadable transcript is not an unreadable audio file.
    assert environment_failure([unreadable[0], rej("a/2.txt", "unreadable")], paths=paths, metadata_rows=0,
                               accepted=0) == ""
    # No audio found, and every metadata row names a file that is not there.
    missing = [rej("meta.csv:2", "metadata_missing_audio"), rej("meta.csv:3", "metadata_missing_audio")]
    assert "RAW holds none of the 2 audio files" in environment_failure(missing, paths=set(), metadata_rows=2,
                                                                         accepted=0)
    assert environment_failure(missing[:1], paths=set(), metadata_rows=2, accepted=0) == ""
    assert environment_failure([], paths=set(), metadata_rows=0, accepted=0) == ""


def test_probe_cache_follows_the_files(small_raw: Path, tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    out = tmp_path / "out"
    with caplog.at_level(logging.INFO, logger="loam"):
        rows, _ = run_ingest(small_raw, out)
    found = int(re.search(r"ingest: (\d+) files probed, 0 reused", caplog.text).group(1))
    caplog.clear()
    cache = out / "cache" / "ingest" / "probes.arrow"
    cached = set(cache_table(cache).column("path").to_pylist())
    assert {r["source_path"] for r in rows} <= cached
    # A file rewritten with other bytes of the same size is probed again (its mtime
    # moved); a file removed leaves the cache; the rest is reused.
    changed = next(r for r in rows if r["source_path"].endswith(".wav"))
    path = small_raw / changed["source_path"]
    data = bytearray(path.read_bytes())
    data[-2:] = bytes([data[-2] ^ 0x55, data[-1] ^ 0x55])
    path.write_bytes(bytes(data))
    gone = next(r for r in rows if r["source_path"] != changed["source_path"])
    (small_raw / gone["source_path"]).unlink()
    with caplog.at_level(logging.INFO, logger="loam"):
        rows2, _ = run_ingest(small_raw, out)
    assert f"ingest: 1 files probed, {found - 2} reused from cache" in caplog.text
    again = {r["source_path"]: r for r in rows2}
    assert again[changed["source_path"]]["sha256"] == hashlib.sha256(bytes(data)).hexdigest()  # hashlib reference
    assert gone["source_path"] not in set(cache_table(cache).column("path").to_pylist())
    # A damaged cache is only a miss: everything is probed again, to the same rows.
    cache.write_bytes(b"not an Arrow file")
    rows3, _ = run_ingest(small_raw, out)
    assert rows3 == rows2


def test_sidecar_readings_are_reused_until_the_sidecar_changes(small_raw: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    rows, _ = run_ingest(small_raw, out)
    row = next(r for r in rows if r["transcript_origin"] == "sidecar")
    sidecar = small_raw / (row["source_path"].rsplit(".", 1)[0] + ".txt")
    cached = cache_table(out / "cache" / "ingest" / "sidecars.arrow").to_pylist()
    assert {"path": sidecar.relative_to(small_raw).as_posix(), "text": row["transcript"]}.items() <= next(
        c for c in cached if c["path"] == sidecar.relative_to(small_raw).as_posix()).items()
    # Same length, other words: the stat changes, so the sidecar is read again.
    new_text = "".join(chr(ord(c) ^ 1) if c.isalpha() else c for c in row["transcript"])
    sidecar.write_text(new_text + "\n", encoding="utf-8")
    again = {r["source_path"]: r for r in run_ingest(small_raw, out)[0]}
    assert again[row["source_path"]]["transcript"] == new_text
    assert {r["source_path"]: r["transcript"] for r in rows if r is not row} == {
        p: r["transcript"] for p, r in again.items() if p != row["source_path"]}


def test_sidecars_are_read_while_the_workers_probe(small_raw: Path, tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    # The sidecars need no probe: they are paired and read while the workers probe, before
    # the runner's other work, and after the probes when no file needs one.
    events: list[str] = []
    each_result, read_sidecars = ingest.each_result, ingest._read_sidecars

    def recording_each_result(*args, **kwargs):  # type: ignore[no-untyped-def]
        events.append("pool")
        each_result(*args, **kwargs)
        events.append("pool done")

    def recording_read_sidecars(*args, **kwargs):  # type: ignore[no-untyped-def]
        events.append("sidecars")
        return read_sidecars(*args, **kwargs)

    monkeypatch.setattr(ingest, "each_result", recording_each_result)
    monkeypatch.setattr(ingest, "_read_sidecars", recording_read_sidecars)
    rows, rejects = run_ingest(small_raw, tmp_path / "out", workers=2)
    assert events == ["pool", "sidecars", "pool done"]
    events.clear()
    assert run_ingest(small_raw, tmp_path / "out", workers=2) == (rows, rejects)
    assert events == ["pool", "pool done", "sidecars"]  # nothing to probe, no pool
    monkeypatch.undo()
    assert run_ingest(small_raw, tmp_path / "fresh", workers=1) == (rows, rejects)
