"""Manifest schemas: Arrow types derived from JSON Schema, row rules, loud failures."""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.core.errors import ManifestError
from pipeline.core.manifest import (
    arrow_schema,
    check_table,
    read_metadata,
    table_from_rows,
    validate_table,
    write_manifest,
)
from pipeline.core.schemas_io import SCHEMA_DIR
from tests.conftest import examples

MANIFESTS = sorted(p.name.split(".")[0] for p in SCHEMA_DIR.glob("*.schema.json") if p.name != "config.schema.json")


@pytest.mark.parametrize("name", [*MANIFESTS, "config"])
def test_every_schema_is_valid_draft_2020_12(name: str) -> None:
    # Checked here rather than at run time: a clean table never compiles its validator.
    from jsonschema import Draft202012Validator

    from pipeline.core.schemas_io import load_schema

    Draft202012Validator.check_schema(load_schema(name))


def test_building_and_checking_manifests_leaves_pandas_unloaded(tmp_path: Path) -> None:
    # A fresh interpreter: this test process may have imported pandas already.
    script = textwrap.dedent(f"""
        import sys
        from pipeline.core.manifest import check_table, read_manifest, table_from_rows, write_manifest
        row = {{"source_path": "a/b.wav", "reason": "empty", "detail": "a/b.wav: empty",
                "stage": "ingest", "clip_id": None}}
        table = table_from_rows("rejected", [row, dict(row, reason="nonsense")])
        problems = check_table("rejected", table, where="t")
        write_manifest({str(tmp_path / "r.parquet")!r}, "rejected", table.slice(0, 1), metadata={{}})
        read_manifest({str(tmp_path / "r.parquet")!r})
        print(len(problems), "pandas" in sys.modules)
        # pyarrow's pandas integration still works once it is asked for.
        frame = table.to_pandas()
        import pyarrow as pa
        back = pa.Table.from_pandas(frame, preserve_index=False)
        print(back.column("reason").to_pylist(), pa.array(frame["reason"]).to_pylist())
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    first, second = done.stdout.splitlines()
    assert first == "1 False"
    assert second == "['empty', 'nonsense'] ['empty', 'nonsense']"


def good_reject(**kw: object) -> dict:
    row = {"source_path": "a/b.wav", "reason": "empty", "detail": "a/b.wav: empty", "stage": "ingest", "clip_id": None}
    row.update(kw)
    return row


@pytest.mark.parametrize("name", MANIFESTS)
def test_every_schema_derives_an_arrow_schema(name: str) -> None:
    schema = arrow_schema(name)
    assert len(schema) > 0
    # An empty table of the schema is itself valid.
    assert check_table(name, schema.empty_table(), where="empty") == []


def test_bad_row_names_row_column_value_and_rule() -> None:
    rows = [good_reject(), good_reject(reason="because"), good_reject()]
    with pytest.raises(ManifestError) as err:
        validate_table("rejected", table_from_rows("rejected", rows), where="x.parquet")
    text = str(err.value)
    assert "x.parquet: row 1, column 'reason'" in text
    assert '"because"' in text and "enum" in text


def test_missing_and_mistyped_columns() -> None:
    table = table_from_rows("rejected", [good_reject()]).drop_columns(["detail"])
    problems = check_table("rejected", table, where="t")
    assert [(p.column, p.found) for p in problems] == [("detail", "no such column")]
    table = pa.table({**{c: table_from_rows("rejected", [good_reject()]).column(c) for c in arrow_schema("rejected").names if c != "stage"},
                      "stage": pa.array([3])})
    problems = check_table("rejected", table, where="t")
    assert any(p.column == "stage" and "int64" in p.found for p in problems)


def test_null_in_required_column_is_caught() -> None:
    table = table_from_rows("rejected", [good_reject(detail=None)])
    problems = check_table("rejected", table, where="t")
    assert problems and problems[0].row == 0 and problems[0].column == "detail"


def test_write_is_atomic_and_records_metadata(tmp_path: Path) -> None:
    path = tmp_path / "stages" / "r.parquet"
    write_manifest(path, "rejected", table_from_rows("rejected", [good_reject()]), metadata={"stage": "ingest"})
    assert read_metadata(path)["stage"] == "ingest"
    assert read_metadata(path)["schema"] == "rejected"
    assert [p.name for p in path.parent.iterdir()] == ["r.parquet"]
    # A bad table leaves the good file in place and no temporary behind.
    before = path.read_bytes()
    with pytest.raises(ManifestError):
        write_manifest(path, "rejected", table_from_rows("rejected", [good_reject(stage="nowhere")]), metadata={})
    assert path.read_bytes() == before
    assert [p.name for p in path.parent.iterdir()] == ["r.parquet"]


def test_writes_are_byte_identical(tmp_path: Path) -> None:
    table = table_from_rows("rejected", [good_reject(), good_reject(source_path="c.wav")])
    write_manifest(tmp_path / "a.parquet", "rejected", table, metadata={"k": "v"})
    write_manifest(tmp_path / "b.parquet", "rejected", table, metadata={"k": "v"})
    assert (tmp_path / "a.parquet").read_bytes() == (tmp_path / "b.parquet").read_bytes()
    assert pq.read_table(tmp_path / "a.parquet").num_rows == 2


# Random, partly malformed rows: the columnar checker and jsonschema on every row agree.
row_strategy = st.fixed_dictionaries({
    "source_path": st.text(max_size=5),
    "reason": st.sampled_from(["empty", "undecodable", "bogus", ""]),
    "detail": st.one_of(st.none(), st.text(max_size=3)),
    "stage": st.sampled_from(["ingest", "audio", "nope"]),
    "clip_id": st.one_of(st.none(), st.text(max_size=3)),
})


@settings(max_examples=examples(60), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(row_strategy, max_size=12))
def test_columnar_checker_agrees_with_jsonschema(rows: list[dict]) -> None:
    table = table_from_rows("rejected", rows)
    fast = {(p.row, p.column) for p in check_table("rejected", table, where="t")}
    slow = {(p.row, p.column) for p in check_table("rejected", table, where="t", exhaustive=True)}
    assert fast == slow


@settings(max_examples=examples(40), deadline=None)
@given(st.lists(st.fixed_dictionaries({
    "clip_id": st.text(max_size=4),
    "transcript": st.text(max_size=4),
    "norm_text": st.text(max_size=4),
    "words": st.lists(st.text(max_size=2), max_size=3),
    "phones": st.lists(st.text(max_size=2), max_size=3),
    "word_backends": st.lists(st.sampled_from(["cmudict", "neural", "oops"]), max_size=3),
    "oov_words": st.lists(st.text(max_size=2), max_size=2),
    "language": st.sampled_from(["en", "sw", "EN", ""]),
    "transcript_origin": st.sampled_from(["sidecar", "review", "typed"]),
}), max_size=8))
def test_list_columns_agree_with_jsonschema(rows: list[dict]) -> None:
    table = table_from_rows("text", rows)
    fast = {(p.row, p.column) for p in check_table("text", table, where="t")}
    slow = {(p.row, p.column) for p in check_table("text", table, where="t", exhaustive=True)}
    assert fast == slow


@pytest.mark.parametrize("batch_rows", [1, 3, 7, 8192])
def test_builder_gives_the_table_of_the_sorted_rows_whatever_the_arrival_order(batch_rows: int) -> None:
    import random

    from pipeline.core.manifest import ManifestBuilder

    rows = [good_reject(source_path=f"s{i:03d}.wav", detail=f"s{i:03d}.wav: empty",
                        clip_id=None if i % 4 else f"c{i:03d}") for i in range(50)]
    expected = table_from_rows("rejected", rows)  # rows are already in key order
    shuffled = rows[:]
    random.Random(batch_rows).shuffle(shuffled)
    builder = ManifestBuilder("rejected", batch_rows=batch_rows)
    for row in shuffled:
        builder.append(row)
        # Never more pending Python rows than one batch: the rest are Arrow columns.
        assert builder.pending_rows < batch_rows
    assert len(builder) == 50
    table = builder.table(sort_by="source_path")
    assert table.equals(expected)
    assert all(table.column(i).num_chunks == 1 for i in range(table.num_columns))
    assert check_table("rejected", table, where="built") == []


def test_builder_with_no_rows_gives_an_empty_valid_table() -> None:
    from pipeline.core.manifest import ManifestBuilder

    table = ManifestBuilder("audio").table(sort_by="clip_id")
    assert table.num_rows == 0 and table.schema.equals(arrow_schema("audio"))
    with pytest.raises(ValueError, match="batch_rows=0"):
        ManifestBuilder("audio", batch_rows=0)


def _audio_rows(n: int) -> list[dict]:
    return [{"clip_id": f"spk-{i:010x}", "source_id": f"spk-{i:010x}", "source_path": f"spk/{i}.wav",
             "speaker": "spk", "audio_path": f"audio/spk/spk-{i:010x}.flac", "audio_sha256": "a" * 64,
             "sample_rate": 16000, "num_samples": 16000, "duration_s": 1.0, "source_start_s": 0.0,
             "source_end_s": 1.0, "source_sample_rate": 16000, "upsampled_from": None, "segment_index": 0,
             "speech_s": 0.8, "speech_ratio": 0.8, "loudness_in_lufs": -30.0, "loudness_lufs": -23.0,
             "gain_db": 7.0, "peak_limited_db": 0.0, "peak_dbfs": -3.0, "clipped_fraction": 0.0,
             "dc_offset": 0.0, "snr_db": None, "bandwidth_hz": 7000.0, "fingerprint": "AQAAAA==",
             "transcribed": True} for i in range(n)]


def test_read_checked_settles_type_only_columns_from_the_file_statistics(tmp_path: Path) -> None:
    """Columns with no rule beyond their type are not read when the Parquet statistics
    (null counts) settle them; the findings are check_table's, whichever way."""
    from pipeline.core.manifest import read_checked

    table = table_from_rows("audio", _audio_rows(3))
    path = tmp_path / "audio.parquet"
    write_manifest(path, "audio", table, metadata={})
    read, problems = read_checked(path, "audio", where="a")
    assert problems == []
    assert {"fingerprint", "gain_db", "dc_offset", "snr_db"}.isdisjoint(read.column_names)
    assert "clip_id" in read.column_names and read.num_rows == 3
    kept, _ = read_checked(path, "audio", where="a", keep=["fingerprint"])
    assert kept.column("fingerprint").to_pylist() == ["AQAAAA=="] * 3


@pytest.mark.parametrize("statistics", [True, False])
def test_read_checked_finds_a_null_in_a_type_only_column(tmp_path: Path, statistics: bool) -> None:
    """A null where the schema allows none is found from the statistics, or by reading the
    column when the file records none (a hand-written file)."""
    from pipeline.core.manifest import read_checked

    table = table_from_rows("audio", _audio_rows(3))
    nulled = table.set_column(table.schema.get_field_index("fingerprint"), "fingerprint",
                              pa.array(["AQAAAA==", None, "AQAAAA=="], pa.string()))
    path = tmp_path / "audio.parquet"
    pq.write_table(nulled, path, write_statistics=statistics)
    read, problems = read_checked(path, "audio", where="a")
    assert [(p.row, p.column) for p in problems] == [(1, "fingerprint")]
    assert [(p.row, p.column) for p in check_table("audio", pq.read_table(path), where="a")] == [(1, "fingerprint")]


def test_read_checked_reports_the_structure_like_check_table(tmp_path: Path) -> None:
    from pipeline.core.manifest import read_checked

    table = table_from_rows("audio", _audio_rows(2)).drop_columns(["fingerprint"])
    path = tmp_path / "audio.parquet"
    pq.write_table(table, path)
    _, problems = read_checked(path, "audio", where="a")
    assert problems == check_table("audio", table, where="a")
    assert [(p.check, p.column) for p in problems] == [("schema", "fingerprint")]
    (tmp_path / "junk.parquet").write_bytes(b"not parquet")
    with pytest.raises(ManifestError, match="not a readable Parquet file"):
        read_checked(tmp_path / "junk.parquet", "audio", where="j")
