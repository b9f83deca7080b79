"""End to end on a copy of the demo corpus, pseudonymised: no shareable file under OUT
names a speaker, folder or file of the raw dump, and a rebuild after new audio keeps
every reference, pseudonym and assignment."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq
import pytest
import soundfile as sf

from pipeline.commands.cli import main
from tests.conftest import DEMO, speechlike

PRIVATE = ("cache", "logs", ".loam.lock")
# The dump's own bookkeeping files: their names are the config's (ingest.metadata), not a person's.
BOOKKEEPING = ("metadata.csv", "corpus.toml", "README.md", "generate.py")


def raw_names(raw: Path) -> set[str]:
    """Every folder name, file stem and speaker id (the demo's speakers are its folders) of the dump."""
    found = set()
    for path in raw.rglob("*"):
        rel = path.relative_to(raw)
        if path.is_dir():
            found.add(path.name)
        elif rel.as_posix() not in BOOKKEEPING:
            found.add(path.stem)
    return found


def cells(value: Any) -> list[str]:
    if isinstance(value, dict):
        return [s for v in value.values() for s in cells(v)]
    if isinstance(value, (list, tuple)):
        return [s for v in value for s in cells(v)]
    return [] if value is None else [str(value)]


def shareable_texts(out: Path) -> dict[str, str]:
    """File name and content of every shareable file: Parquet cells and metadata, JSON,
    HTML, TSV, Markdown, and every other file read as text."""
    texts = {}
    for path in sorted(out.rglob("*")):
        rel = path.relative_to(out).as_posix()
        if not path.is_file() or rel.split("/")[0] in PRIVATE:
            continue
        if path.suffix == ".parquet":
            table = pq.read_table(path)
            meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
            body = "\n".join(cells(table.to_pylist()) + cells(meta))
        elif path.suffix in (".flac", ".wav", ".ogg"):
            body = ""  # the clips' bytes: their names are checked
        else:
            body = path.read_text(encoding="utf-8", errors="replace")
        texts[rel] = rel + "\n" + body
    return texts


def leaks(out: Path, names: set[str]) -> list[tuple[str, str]]:
    # A name counts as a whole token: letters and digits around it do not belong to it.
    pattern = re.compile(r"(?<![^\W_])(?:" + "|".join(re.escape(n) for n in sorted(names, key=len, reverse=True))
                         + r")(?![^\W_])")
    return [(rel, m.group(0)) for rel, text in shareable_texts(out).items() for m in pattern.finditer(text)]


def assignments(out: Path) -> dict[str, tuple[str, str, str, tuple[str, ...]]]:
    found = {}
    for name in ("labelled", "unlabelled", "heldout"):
        for row in pq.read_table(out / "manifests" / f"{name}.parquet").to_pylist():
            found[row["clip_id"]] = (row["source_path"], row["speaker"], row["subset"], tuple(row["tiers"]))
    return found


@pytest.mark.slow
def test_pseudonymised_demo_names_nobody_and_rebuild_keeps_references(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    raw = tmp_path / "raw"
    shutil.copytree(DEMO, raw, symlinks=True)
    private = tmp_path / "private"
    private.mkdir()
    (private / "speaker.key").write_text("5f0c1e9a" * 8 + "\n")
    # The config stays in the dump, as the demo's does, so the ledger goes to OUT and is scanned too.
    config = raw / "corpus.toml"
    config.write_text(config.read_text(encoding="utf-8")
                      + f'\n[privacy]\npseudonymise = true\nkey_file = "{private / "speaker.key"}"\n'
                      f'mapping_file = "{private / "mapping.tsv"}"\n', encoding="utf-8")
    out = tmp_path / "out"
    prepare = ["prepare", str(raw), str(out), "--config", str(config), "--no-progress"]
    assert main(prepare) == 0
    assert main(["report", str(out)]) == 0
    names = raw_names(raw)
    assert {"heron", "wren", "sedge_marsh_walk", "alder_tape_label"} <= names  # the scan looks for these
    assert (out / "ledger.tsv").is_file()
    assert leaks(out, names) == []
    rejected = pq.read_table(out / "manifests" / "rejected.parquet").to_pylist()
    assert any(r["reason"] == "duplicate_content" and r["source_path"].startswith("src-") for r in rejected)

    # The private mapping holds the real names, and the check finds them when they leak.
    capsys.readouterr()
    assert main(["validate", str(out)]) == 0
    said = capsys.readouterr().out
    assert "safe to share" in said and "cache/" in said
    (out / "report" / "notes.md").write_text("Recorded at the harbour by wren.\n", encoding="utf-8")
    assert main(["validate", str(out), "--json"]) == 1
    found = json.loads(capsys.readouterr().out)["problems"]
    assert [(p["check"], p["file"], "'wren'" in p["found"]) for p in found if p["check"] == "privacy_names"] == [
        ("privacy_names", "report/notes.md", True)]
    assert main(["validate", str(out)]) == 1  # the table's verdict and the share line agree
    assert "not safe to share" in capsys.readouterr().out
    (out / "report" / "notes.md").unlink()

    # A reference leads back to its file, through OUT's private mapping or the mapping file.
    before = assignments(out)
    ref, speaker = next((p, s) for p, s, _, _ in before.values())
    assert main(["locate", ref, str(out)]) == 0
    where = capsys.readouterr().out.strip().split("\t")
    assert where[:2] == [ref, "source"] and (raw / where[2]).is_file()
    assert main(["locate", speaker, "--mapping", str(private / "mapping.tsv")]) == 0
    assert capsys.readouterr().out.strip().split("\t")[2] == where[2].split("/")[0]

    # New audio: a new speaker and one more file for a known one.
    (raw / "kestrel").mkdir()
    for i in range(3):
        sf.write(raw / "kestrel" / f"kestrel_{i:02d}.flac", speechlike(3.0, 22050, seed=100 + i), 22050)
    sf.write(raw / "heron" / "heron_late.wav", speechlike(2.5, 16000, seed=200), 16000)
    assert main(prepare) == 0
    assert main(["report", str(out)]) == 0
    after = assignments(out)
    assert {c: after[c] for c in before} == before, "a clip changed reference, pseudonym, subset or tiers"
    assert len(set(after) - set(before)) == 4
    assert leaks(out, raw_names(raw)) == []
