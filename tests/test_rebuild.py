"""End to end on a copy of the demo corpus: new audio arrives, nothing already assigned moves."""

from __future__ import annotations

import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest
import soundfile as sf

from pipeline.commands.cli import main
from tests.conftest import DEMO, speechlike

SUBSETS = ("labelled", "unlabelled", "heldout")


def assignments(out: Path) -> dict[str, tuple[str, tuple[str, ...]]]:
    found = {}
    for name in SUBSETS:
        for row in pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist():
            found[row["clip_id"]] = (row["subset"], tuple(row["tiers"]))
    return found


@pytest.mark.slow
def test_new_audio_changes_no_earlier_assignment(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    raw = tmp_path / "raw"
    shutil.copytree(DEMO, raw, symlinks=True)
    out = tmp_path / "out"
    args = ["prepare", str(raw), str(out), "--config", str(raw / "corpus.toml"), "--no-progress"]
    assert main(args) == 0
    before = assignments(out)
    ledger_before = (out / "ledger.tsv").read_text(encoding="utf-8")

    # A new speaker and one more file for a known one.
    (raw / "kestrel").mkdir()
    for i in range(3):
        sf.write(raw / "kestrel" / f"kestrel_{i:02d}.flac", speechlike(3.0, 22050, seed=100 + i), 22050)
    sf.write(raw / "heron" / "heron_late.wav", speechlike(2.5, 16000, seed=200), 16000)
    capsys.readouterr()
    assert main(args) == 0
    log = capsys.readouterr().err
    after = assignments(out)

    assert set(before) <= set(after)
    assert {c: after[c] for c in before} == before, "an earlier clip changed subset or tiers"
    new = set(after) - set(before)
    assert len(new) == 4
    # The new clip of a known speaker follows its speaker's side.
    heron_side = {s for c, (s, _) in before.items() if c.startswith("heron")}
    late = next(c for c in new if c.startswith("heron_late"))
    assert (after[late][0] == "heldout") == (heron_side == {"heldout"})
    assert "split changes against" in log and "added (" in log
    # Every line of the old ledger is still in the new one.
    ledger_after = (out / "ledger.tsv").read_text(encoding="utf-8").splitlines()
    kept_lines = [line for line in ledger_before.splitlines()[1:] if line.startswith("clip\t")]
    assert set(kept_lines) <= set(ledger_after)
