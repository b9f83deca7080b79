"""Speaker pseudonyms: HMAC-SHA-256 (RFC 2104) checked against RFC 4231 and hmac."""

from __future__ import annotations

import hashlib
import hmac
import re
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline.core.config import build_config
from pipeline.core.errors import UsageError
from pipeline.core.names import PRIVATE_MAPPING
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from pipeline.stages.privacy import load_key, pseudonym, read_mapping, source_reference


def test_hmac_primitive_matches_rfc4231_case_2() -> None:
    # RFC 4231, test case 2: key "Jefe", data "what do ya want for nothing?"
    expected = "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert hmac.new(b"Jefe", b"what do ya want for nothing?", hashlib.sha256).hexdigest() == expected
    assert pseudonym("what do ya want for nothing?", key=b"Jefe") == "spk-" + expected[:16]


def test_key_rules(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (tmp_path / "short.key").write_text("abc")
    with pytest.raises(UsageError, match="expected at least 16"):
        load_key(tmp_path / "short.key", out=out)
    (out / "in.key").write_text("x" * 40)
    with pytest.raises(UsageError, match="inside OUT"):
        load_key(out / "in.key", out=out)


def test_ingest_pseudonymises_and_writes_mapping_only_where_asked(small_raw: Path, tmp_path: Path) -> None:
    key = tmp_path / "secret.key"
    key.write_text("0123456789abcdef0123456789abcdef\n")
    mapping = tmp_path / "private" / "speakers.tsv"
    cfg = build_config({"ingest": {"metadata": "meta.csv"},
                        "privacy": {"pseudonymise": True, "key_file": str(key), "mapping_file": str(mapping)}})
    out = tmp_path / "out"
    Runner(small_raw, out, cfg, stages=STAGES, workers=1).prepare(("ingest",))
    rows = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    expected = {"spk_a": pseudonym("spk_a", key=key.read_bytes().strip()), "spk_b": pseudonym("spk_b", key=key.read_bytes().strip())}
    assert {r["speaker"] for r in rows} == set(expected.values())
    assert all(r["source_id"].startswith("clip-") for r in rows)
    lines = mapping.read_text().splitlines()
    assert lines[0] == "kind\tname\treference"
    assert [x for x in lines if x.startswith("speaker\t")] == [f"speaker\t{s}\t{p}" for s, p in sorted(expected.items())]
    sources = dict(x.split("\t")[1:] for x in lines if x.startswith("source\t"))
    assert {r["source_path"] for r in rows} <= set(sources.values())
    assert all(sources[rel] == source_reference(rel, key=key.read_bytes().strip()) for rel in sources)
    # Nothing in OUT names the speakers.
    for path in out.rglob("*.parquet"):
        table = pq.read_table(path)
        if "speaker" in table.column_names:
            assert not {"spk_a", "spk_b"} & set(table.column("speaker").to_pylist())


def test_metadata_speaker_names_leave_no_trace_in_rejects(small_raw: Path, tmp_path: Path) -> None:
    # Speakers named in the table as written (a space, an accent), one file with two of them.
    (small_raw / "meta.csv").write_text(
        "path,transcript,speaker\n"
        "spk_b/b1.wav,a second line,Ana María\n"
        "spk_b/b2.ogg,a third line,Ana María\n"
        "spk_b/b2.ogg,a third line,Bryn Tal\n"
        "spk_a/a1.wav,,Bryn Tal\n"
        "spk_a/a2.flac,,Bryn Tal\n",
        encoding="utf-8")
    key = tmp_path / "secret.key"
    key.write_text("0123456789abcdef0123456789abcdef\n")
    cfg = build_config({"ingest": {"metadata": "meta.csv", "speaker_from": "metadata"},
                        "privacy": {"pseudonymise": True, "key_file": str(key)}})
    out = tmp_path / "out"
    Runner(small_raw, out, cfg, stages=STAGES, workers=1).prepare(("ingest",))
    rejects = pq.read_table(out / "stages" / "ingest.rejects.parquet").to_pylist()
    assert any(r["reason"] == "missing_speaker" for r in rejects)
    text = repr(rejects) + repr(pq.read_table(out / "stages" / "ingest.parquet").to_pylist())
    for name in ("Ana", "María", "Bryn", "Tal", "spk_a", "spk_b", "b1", "b2", "a1", "a2", "broken", "copy"):
        # As a whole token: "b1" may well occur inside a hex digest.
        assert not re.search(rf"(?<![^\W_]){re.escape(name)}(?![^\W_])", text), name
    # The private mapping knows them all, so loam validate can look for them.
    private = read_mapping(out / PRIVATE_MAPPING)
    assert {"Ana María", "Bryn Tal"} <= set(private["speaker"])
    assert set(private["source"]) >= {"spk_a/a1.wav", "spk_b/b2.ogg", "spk_b/broken.wav", "spk_b/copy.wav"}


def test_audio_rejects_quote_no_raw_path(tmp_path: Path) -> None:
    # A decoder's message may quote the file's full path (libsndfile does: "Error opening '...'").
    from pipeline.stages.audio import _scrub_rejects

    raw = tmp_path / "raw"
    detail = f"src-1: could not be decoded: LibsndfileError: Error opening '{raw / 'Ana' / 'ana_interview.wav'}'"
    [scrubbed] = _scrub_rejects([{"source_path": "src-1", "detail": detail}], {"src-1": "Ana/ana_interview.wav"},
                                raw=raw)
    assert scrubbed["detail"] == "src-1: could not be decoded: LibsndfileError: Error opening 'src-1'"
