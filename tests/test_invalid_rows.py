"""A row whose values break its schema costs that row, not the run; a table the code
got wrong still stops it."""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import soundfile as sf

from pipeline.commands.cli import main
from pipeline.commands.validate import validate_out
from pipeline.core.errors import ManifestError
from pipeline.core.manifest import partition_rows, table_from_rows
from pipeline.stages import audio_file
from tests.conftest import speechlike

SR = 16000
ARGS = ["--workers", "2", "--no-progress", "--set", 'split.group_by="clip"', "--set", 'split.heldout="0%"',
        "--set", 'split.labelled_budgets=["2s"]']


def rejected_row(path: str, detail: str = "a sentence") -> dict[str, object]:
    return {"source_path": path, "reason": "empty", "detail": detail, "stage": "ingest", "clip_id": None}


def test_a_few_bad_values_are_set_aside_with_jsonschema_words() -> None:
    rows = [rejected_row(f"{i}.wav") for i in range(5)]
    rows[3]["detail"] = ""
    rows[1]["stage"] = "nowhere"
    kept, invalid = partition_rows("rejected", table_from_rows("rejected", rows), where="x.parquet")
    assert kept.column("source_path").to_pylist() == ["0.wav", "2.wav", "4.wav"]
    assert [b.row["source_path"] for b in invalid] == ["1.wav", "3.wav"]
    # The jsonschema validator's words: the value found and the rule it breaks.
    assert invalid[0].detail.startswith("column 'stage': found \"nowhere\" (enum:")
    assert invalid[1].detail == "column 'detail': found \"\" (minLength: 1)"


def test_most_rows_failing_points_at_the_code() -> None:
    rows = [rejected_row(f"{i}.wav", detail="") for i in range(3)] + [rejected_row("ok.wav")]
    with pytest.raises(ManifestError, match="3 of 4 rows failing"):
        partition_rows("rejected", table_from_rows("rejected", rows), where="x.parquet")


@pytest.mark.parametrize("broken", ["missing", "undeclared", "type"])
def test_a_structural_failure_stops(broken: str) -> None:
    table = table_from_rows("rejected", [rejected_row("a.wav"), rejected_row("b.wav")])
    if broken == "missing":
        table = table.drop_columns(["clip_id"])
    elif broken == "undeclared":
        table = table.append_column("extra", pa.array([1, 2]))
    else:
        table = table.set_column(4, "clip_id", pa.array([1, 2]))
    with pytest.raises(ManifestError, match="structure"):
        partition_rows("rejected", table, where="x.parquet")


def test_one_source_with_an_impossible_loudness_is_rejected_and_the_run_goes_on(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capfd: pytest.CaptureFixture[str],
) -> None:
    """The case that once stopped a whole run: a float WAV whose samples reach 1000
    measures above the audio schema's 10 LUFS maximum (about +20 LUFS). With the sample bound lifted
    (forked workers inherit the patch) the row reaches the schema check, and only
    that source is set aside."""
    monkeypatch.setattr(audio_file, "MAX_SAMPLE_MAGNITUDE", 1e6)
    raw = tmp_path / "raw"
    (raw / "spk").mkdir(parents=True)
    for i in range(4):
        sf.write(raw / "spk" / f"ok{i}.wav", speechlike(2.0, SR, seed=i), SR)
    x = speechlike(2.0, SR, seed=9).astype(np.float32)
    x[SR // 2: SR: 800] = 1000.0  # 20 samples 60 dB over full scale: too few to count as clipping
    buf = io.BytesIO()
    sf.write(buf, x, SR, format="WAV", subtype="FLOAT")
    (raw / "spk" / "hot.wav").write_bytes(buf.getvalue())
    out = tmp_path / "out"
    assert main(["prepare", str(raw), str(out), *ARGS]) == 0
    rejects = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    (rej,) = [r for r in rejects if r["source_path"] == "spk/hot.wav"]
    assert rej["reason"] == "invalid_measurement" and rej["stage"] == "audio"
    assert "loudness_in_lufs" in rej["detail"] and "(maximum: 10)" in rej["detail"]
    assert rej["detail"].startswith("spk/hot.wav: ")
    audio_rows = pq.read_table(out / "stages" / "audio.parquet").to_pylist()
    assert sorted(r["source_path"] for r in audio_rows) == [f"spk/ok{i}.wav" for i in range(4)]
    # The clip file the set-aside row wrote is gone; only the kept rows' files remain.
    on_disk = {p.relative_to(out).as_posix() for p in (out / "audio").rglob("*.*")}
    assert on_disk == {r["audio_path"] for r in audio_rows}
    assert "spk/hot.wav: its row in stages/audio.parquet breaks" in capfd.readouterr().err  # said, not only logged
    # Downstream checks account for it: every source is in a manifest or rejected.
    result = validate_out(out, audio_files=True)
    assert not [p for p in result.problems if p.check == "conservation"], result.problems


def test_a_file_name_that_is_not_utf8_cannot_be_stored_and_is_rejected(tmp_path: Path) -> None:
    raw = tmp_path / "raw"
    (raw / "spk").mkdir(parents=True)
    sf.write(raw / "spk" / "ok.wav", speechlike(2.0, SR, seed=1), SR)
    sf.write(raw / "spk" / "latin.wav", speechlike(2.0, SR, seed=2), SR)
    # A Latin-1 name (0xE9 is "é" in ISO 8859-1, an invalid lone byte in UTF-8).
    os.rename(os.fsencode(raw / "spk" / "latin.wav"), os.fsencode(raw / "spk") + b"/caf\xe9.wav")
    out = tmp_path / "out"
    assert main(["prepare", str(raw), str(out), *ARGS]) == 0
    (rej,) = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    assert rej["reason"] == "file_name_encoding" and rej["source_path"] == "spk/caf\\xe9.wav"
    assert pq.read_table(out / "stages" / "audio.parquet").column("source_path").to_pylist() == ["spk/ok.wav"]
