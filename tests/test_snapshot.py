"""The no-change check (pipeline.core.snapshot): an identical rerun ends at once, and any
change to RAW, OUT, the config, the overrides or a watched file makes a full run."""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.commands.cli import main
from pipeline.core import names, snapshot
from tests.conftest import REPO, tree_hash

NOTHING = "nothing changed since the last run"


def _run(raw: Path, out: Path, capsys: pytest.CaptureFixture[str], *extra: str) -> str:
    capsys.readouterr()
    assert main(["prepare", str(raw), str(out), "--workers", "1", "--no-progress", *extra]) == 0
    return capsys.readouterr().err


def _outputs(out: Path) -> dict[str, str]:
    """Manifests, clips and lexicon; the stage summaries count what was redone, so differ."""
    return {k: v for k, v in tree_hash(out).items()
            if not k.startswith(("logs", "cache")) and not k.endswith(".summary.json")}


def test_identical_rerun_ends_at_once_with_the_same_outputs(small_raw: Path, tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    first = _run(small_raw, out, capsys)
    assert NOTHING not in first
    assert (out / names.SNAPSHOT_STATE).is_file()
    before = _outputs(out)
    again = _run(small_raw, out, capsys)
    assert NOTHING in again
    assert "ingest running" not in again and "reused from cache" not in again
    # The last run's closing lines are repeated, so the console says the same thing.
    assert "split changes: none" in again and "rejected: 2 rows in" in again
    assert _outputs(out) == before
    assert json.loads((out / "logs" / "last-run.json").read_text())["unchanged_since_last_run"] is True


def test_the_check_imports_nothing_heavy(small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    probe = ("import sys\nfrom pipeline.commands.cli import main\n"
             f"rc = main(['prepare', {str(small_raw)!r}, {str(out)!r}, '--workers', '1', '--no-progress'])\n"
             "print(rc, sorted(m for m in ('numpy', 'pyarrow', 'jsonschema', 'soundfile') if m in sys.modules))\n")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, cwd=REPO, check=True)
    assert NOTHING in done.stderr
    assert done.stdout.split("\n")[0] == "0 []"


@pytest.mark.parametrize("change", ["touch_raw", "add_raw", "remove_raw", "delete_clip", "edit_manifest",
                                    "override", "fresh", "no_cache"])
def test_any_change_makes_a_full_run(change: str, small_raw: Path, tmp_path: Path,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    import soundfile as sf

    from tests.conftest import speechlike

    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    before = _outputs(out)
    extra: list[str] = []
    if change == "touch_raw":
        st = os.stat(small_raw / "spk_a" / "a1.txt")
        os.utime(small_raw / "spk_a" / "a1.txt", ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    elif change == "add_raw":
        sf.write(small_raw / "spk_a" / "a3.wav", speechlike(1.5, 16000, seed=9), 16000)
    elif change == "remove_raw":
        (small_raw / "spk_b" / "b2.ogg").unlink()
    elif change == "delete_clip":
        next((out / "audio").rglob("*.flac")).unlink()
    elif change == "edit_manifest":
        (out / "manifests" / "unlabelled.parquet").write_bytes(b"not parquet")
    elif change == "override":
        extra = ["--set", "audio.target_lufs=-20"]
    elif change == "fresh":
        extra = ["--fresh"]
    elif change == "no_cache":
        extra = ["--no-cache"]
    log = _run(small_raw, out, capsys, *extra)
    assert NOTHING not in log
    assert "ingest running" in log
    if change in {"touch_raw", "delete_clip", "edit_manifest", "fresh", "no_cache"}:
        # Nothing that matters changed, so the full run puts back the same outputs.
        assert _outputs(out) == before
    if change == "no_cache":
        # A run that skips the caches records no snapshot, so the next one is full too.
        assert not (out / names.SNAPSHOT_STATE).exists()


def test_a_rebuild_in_place_lists_raw_once_and_its_snapshot_is_a_fresh_walk(
        small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    # The no-change check walks RAW when the command is the same; the full run it then
    # leads to takes that listing instead of walking RAW again. Reference: a walk of
    # RAW made after the run (nothing changed meanwhile) gives the digest recorded.
    import soundfile as sf

    from pipeline.core import raw_walk
    from tests.conftest import speechlike

    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    sf.write(small_raw / "spk_a" / "a3.wav", speechlike(1.5, 16000, seed=9), 16000)
    walked: list[Path] = []
    walk, list_folder = snapshot.tree_digest, raw_walk.folder_digest

    def counted(root: Path, **kwargs: object) -> str:
        walked.append(Path(root))
        return walk(root, **kwargs)  # type: ignore[arg-type]

    def counted_root(folder: str, rel_folder: str, *args: object) -> object:
        # A walk of RAW by pipeline.core.raw_walk begins with its root, in this process.
        if not rel_folder:
            walked.append(Path(folder))
        return list_folder(folder, rel_folder, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(snapshot, "tree_digest", counted)
    monkeypatch.setattr(raw_walk, "folder_digest", counted_root)
    log = _run(small_raw, out, capsys)
    assert NOTHING not in log and "ingest running" in log
    assert walked.count(small_raw) == 1
    state = snapshot.load(out)
    assert state is not None and state["raw"] == walk(small_raw)
    assert NOTHING in _run(small_raw, out, capsys)


def test_a_changed_config_file_or_ledger_makes_a_full_run(small_raw: Path, tmp_path: Path,
                                                          capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    config = tmp_path / "corpus.toml"
    ledger = tmp_path / "splits.tsv"
    config.write_text(f'seed = 3\n[split]\nledger = "{ledger}"\n', encoding="utf-8")
    _run(small_raw, out, capsys, "--config", str(config))
    assert NOTHING in _run(small_raw, out, capsys, "--config", str(config))
    # The ledger lives outside OUT: it is watched by its own stat.
    ledger.write_text(ledger.read_text(encoding="utf-8") + "\n", encoding="utf-8")
    assert NOTHING not in _run(small_raw, out, capsys, "--config", str(config))
    assert NOTHING in _run(small_raw, out, capsys, "--config", str(config))
    config.write_text(config.read_text(encoding="utf-8") + "# a comment\n", encoding="utf-8")
    assert NOTHING not in _run(small_raw, out, capsys, "--config", str(config))


def test_a_run_that_stops_half_way_leaves_no_snapshot(small_raw: Path, tmp_path: Path,
                                                      capsys: pytest.CaptureFixture[str],
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    (small_raw / "spk_a" / "a1.txt").write_text("changed words\n", encoding="utf-8")
    import pipeline.stages.text

    def broken(ctx: object) -> None:
        raise RuntimeError("stopped")

    monkeypatch.setattr(pipeline.stages.text, "STAGE", dataclasses.replace(pipeline.stages.text.STAGE, run=broken))
    assert main(["prepare", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 1
    assert not (out / names.SNAPSHOT_STATE).exists()
    monkeypatch.undo()
    assert NOTHING not in _run(small_raw, out, capsys)


def test_loam_stage_forgets_the_snapshot(small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    assert main(["stage", "text", str(small_raw), str(out), "--workers", "1", "--no-progress"]) == 0
    assert not (out / names.SNAPSHOT_STATE).exists()


def test_listing_sees_symlink_targets(tmp_path: Path) -> None:
    root = tmp_path / "root"
    root.mkdir()
    (tmp_path / "target.wav").write_bytes(b"1")
    (root / "link.wav").symlink_to(tmp_path / "target.wav")
    before = snapshot.tree_digest(root)
    (tmp_path / "target.wav").write_bytes(b"22")
    assert snapshot.tree_digest(root) != before


def test_the_listing_holds_every_regular_file_with_its_stat(tmp_path: Path) -> None:
    # Reference: os.lstat of each regular file. Folder "a" holds a folder and files (packed
    # as numbers), "c" a link (hashed as lines of text): both give their files.
    root = tmp_path / "root"
    for rel in ("a/x.wav", "a/b/y.txt", "c/z.wav", "line\nbreak/\u00e9.wav"):
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(rel.encode())
    (root / "c" / "link.wav").symlink_to(root / "a" / "x.wav")
    (root / "empty").mkdir()
    listing = snapshot.Listing()
    digest = snapshot.tree_digest(root, stats=listing)
    expected = {str(p.relative_to(root)): (p.lstat().st_size, p.lstat().st_mtime_ns, p.lstat().st_ino)
                for p in root.rglob("*") if p.is_file() and not p.is_symlink()}
    assert dict(listing) == expected and sorted(listing) == sorted(expected) and not listing.complete
    plain: dict[str, tuple[int, int, int]] = {}
    assert snapshot.tree_digest(root, stats=plain) == digest and plain == expected
    # Any number of a file changes the digest: its mode, its mtime, its inode (a copy).
    (root / "a" / "x.wav").chmod(0o600)
    changed = snapshot.tree_digest(root)
    assert changed != digest
    st = (root / "a" / "b" / "y.txt").stat()
    os.utime(root / "a" / "b" / "y.txt", ns=(st.st_atime_ns, st.st_mtime_ns + 1))
    assert snapshot.tree_digest(root) not in (digest, changed)
    touched = snapshot.tree_digest(root)
    # A copy renamed over the file (made while the file exists: another inode), with
    # the same size and mtime.
    old = (root / "c" / "z.wav").stat()
    (root / "c" / "z.copy").write_bytes((root / "c" / "z.wav").read_bytes())
    os.utime(root / "c" / "z.copy", ns=(old.st_atime_ns, old.st_mtime_ns))
    os.replace(root / "c" / "z.copy", root / "c" / "z.wav")
    assert snapshot.tree_digest(root) != touched
    (root / "c" / "link.wav").unlink()
    listing = snapshot.Listing()
    snapshot.tree_digest(root, stats=listing)
    assert listing.complete


def test_the_bytes_made_from_a_table_of_files_are_those_a_walk_hashes(tmp_path: Path) -> None:
    """tree_listing.folder_bytes against the walk itself (snapshot.tree_digest lists the
    folder): names that sort differently as whole paths ("a-b/" before "a/"), names
    outside ASCII, one file or many per subfolder, the rows in any order and chunks."""
    import random

    import pyarrow as pa

    from pipeline.core.tree_listing import folder_bytes

    rng = random.Random(7)
    alphabet = "ab-._0Zé語"
    out = tmp_path / "out"
    rels = set()
    for sub in ("a", "a-b", "a.b", "b", "é", "語x", "Z"):
        for _ in range(rng.randint(1, 6)):
            rels.add(f"audio/{sub}/{''.join(rng.choices(alphabet, k=rng.randint(1, 8)))}.flac")
    for rel in rels:
        (out / rel).parent.mkdir(parents=True, exist_ok=True)
        (out / rel).write_bytes(rel.encode())
    shuffled = sorted(rels)
    rng.shuffle(shuffled)
    stats = [os.lstat(out / rel) for rel in shuffled]
    columns = {"path": shuffled, **{k: [getattr(st, k) for st in stats]
                                     for k in ("st_mode", "st_size", "st_mtime_ns", "st_ino")}}
    whole = pa.table(columns)
    chunked = pa.concat_tables([whole.slice(0, 3), whole.slice(3)])
    for files in (whole, chunked):
        given = folder_bytes("audio", files)
        assert given is not None
        assert snapshot.tree_digest(out, given={"audio/": given}) == snapshot.tree_digest(out)
    # A path named twice is not one file per row: the caller walks the folder.
    assert folder_bytes("audio", pa.concat_tables([whole, whole.slice(0, 1)])) is None


@pytest.mark.parametrize("change", ["touch_clip", "chmod_clip", "add_file", "add_folder", "remove_clip"])
def test_the_snapshot_of_audio_taken_from_the_stage_sees_any_change(
        change: str, small_raw: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    """The snapshot's digest of OUT/audio comes from the audio stage's listing and the
    clips it wrote (pipeline.core.tree_listing), not from a second walk: it must be the
    digest a walk gives, so that a rerun walking OUT still sees any change under audio/."""
    from pipeline.core import runner, tree_listing

    made: list[bytes | None] = []

    def spy(folder: str, files: object) -> bytes | None:
        made.append(tree_listing.folder_bytes(folder, files))  # type: ignore[arg-type]
        return made[-1]

    import soundfile as sf

    from tests.conftest import speechlike

    monkeypatch.setattr(runner, "folder_bytes", spy)
    out = tmp_path / "out"
    _run(small_raw, out, capsys)
    # A rebuild: the audio stage reuses the clips it listed and writes the new file's.
    sf.write(small_raw / "spk_a" / "a3.wav", speechlike(1.5, 16000, seed=9), 16000)
    assert "reused from cache" in _run(small_raw, out, capsys)
    assert len(made) == 2 and all(given is not None for given in made)
    state = snapshot.load(out)
    assert state is not None and state["out"] == snapshot.tree_digest(out, ignored=snapshot.OUT_IGNORED)
    assert NOTHING in _run(small_raw, out, capsys)
    clip = sorted((out / "audio").rglob("*.flac"))[0]
    if change == "touch_clip":
        st = os.stat(clip)
        os.utime(clip, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
    elif change == "chmod_clip":
        clip.chmod(0o600)
    elif change == "add_file":
        (clip.parent / "stray.flac").write_bytes(b"")
    elif change == "add_folder":
        (out / "audio" / "empty").mkdir()
    elif change == "remove_clip":
        clip.unlink()
    log = _run(small_raw, out, capsys)
    assert NOTHING not in log and "ingest running" in log
