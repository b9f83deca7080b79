"""Ingest's rows cache and its listing of RAW from the run's snapshot walk: a rebuild gives
the rows and rejects a run without any cache gives, whatever the cache holds."""

from __future__ import annotations

import hashlib
import logging
import os
import re
import wave
from pathlib import Path
from unittest import mock

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pipeline.core import snapshot
from pipeline.core.config import build_config
from pipeline.core.runner import Runner
from pipeline.stages import STAGES, ingest, ingest_rows
from tests.conftest import cache_table, rewrite_cache_table

ROWS = Path("cache") / "ingest" / "rows.arrow"


def write_wav(path: Path, *, seed: int, frames: int = 800) -> None:
    """A short 16-bit mono WAV of seeded noise (each seed other bytes), by the standard library."""
    path.parent.mkdir(parents=True, exist_ok=True)
    samples = np.random.default_rng(seed).integers(-3000, 3000, frames, dtype=np.int16)
    with wave.open(str(path), "wb") as fh:
        fh.setnchannels(1)
        fh.setsampwidth(2)
        fh.setframerate(16000)
        fh.writeframes(samples.astype("<i2").tobytes())


@pytest.fixture(autouse=True)
def logs_reach_caplog(monkeypatch: pytest.MonkeyPatch) -> None:
    """A command run earlier in the session (``cli.main``) may have stopped the loam logger
    propagating to the root logger, where caplog listens."""
    monkeypatch.setattr(logging.getLogger("loam"), "propagate", True)


@pytest.fixture
def raw(tmp_path: Path) -> Path:
    """Twelve files of two speakers, every third with a sidecar transcript."""
    root = tmp_path / "raw"
    for i in range(12):
        rel = f"{'ana' if i % 2 else 'ben'}/take{i:02d}.wav"
        write_wav(root / rel, seed=i)
        if i % 3 == 0:
            (root / rel).with_suffix(".txt").write_text(f"words of take {i}\n", encoding="utf-8")
    return root


def run(raw: Path, out: Path, data: dict | None = None, *, use_cache: bool = True,
        listing: bool = True) -> tuple[list[dict], list[dict]]:
    """The ingest stage as a full prepare runs it (with the snapshot's listing of RAW)."""
    runner = Runner(raw, out, build_config(data or {}), stages=STAGES, workers=1, use_cache=use_cache)
    if listing:
        runner.raw_stats = snapshot.Listing()
        snapshot.raw_digest(runner.raw, stats=runner.raw_stats)
    runner.run_stage("ingest")
    rows = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    rejects = pq.read_table(out / "stages" / "ingest.rejects.parquet").to_pylist()
    return rows, rejects


def uncached(raw: Path, tmp_path: Path, data: dict | None = None) -> tuple[list[dict], list[dict]]:
    return run(raw, tmp_path / "uncached", data, use_cache=False, listing=False)


def reused(caplog: pytest.LogCaptureFixture) -> int:
    return int(re.findall(r"ingest: (\d+) rows reused", caplog.text)[-1])


def test_unchanged_files_take_their_rows_from_the_cache(raw: Path, tmp_path: Path,
                                                        caplog: pytest.LogCaptureFixture) -> None:
    out = tmp_path / "out"
    with caplog.at_level(logging.INFO, logger="loam"):
        first = run(raw, out)
        assert reused(caplog) == 0
        again = run(raw, out)
        assert reused(caplog) == 12
    assert first == again == uncached(raw, tmp_path)


def test_changed_inputs_miss_and_give_the_uncached_rows(raw: Path, tmp_path: Path,
                                                        caplog: pytest.LogCaptureFixture) -> None:
    out = tmp_path / "out"
    run(raw, out)
    write_wav(raw / "ana" / "take01.wav", seed=100)  # new bytes: a new hash
    (raw / "ben" / "take06.txt").write_text("other words, another length\n", encoding="utf-8")
    (raw / "ana" / "take05.txt").write_text("a sidecar that was not there\n", encoding="utf-8")
    (raw / "ben" / "take00.txt").unlink()
    # Earlier in path order than ana/take03.wav and holding its bytes: the cached file
    # becomes the duplicate, though its own inputs did not change.
    (raw / "ana" / "take02.wav").write_bytes((raw / "ana" / "take03.wav").read_bytes())
    with caplog.at_level(logging.INFO, logger="loam"):
        rows, rejects = run(raw, out)
    assert reused(caplog) == 12 - 5
    assert (rows, rejects) == uncached(raw, tmp_path)
    by_path = {r["source_path"]: r for r in rows}
    assert by_path["ben/take06.wav"]["transcript"] == "other words, another length"
    assert by_path["ben/take00.wav"]["transcript"] is None
    assert [(r["source_path"], r["reason"]) for r in rejects] == [("ana/take03.wav", "duplicate_content")]


def test_same_size_and_mtime_is_trusted_as_the_probe_cache_trusts_it(raw: Path, tmp_path: Path) -> None:
    """Bytes changed in place with size and mtime put back: the probe and sidecar caches
    keep their readings (the stat test they rely on), and the rows cache gives the row
    those readings give without it."""
    out = tmp_path / "out"
    run(raw, out)
    sidecar = raw / "ben" / "take06.txt"
    st = sidecar.stat()
    sidecar.write_text("WORDS OF TAKE 6\n", encoding="utf-8")  # same length
    os.utime(sidecar, ns=(st.st_atime_ns, st.st_mtime_ns))
    with_rows = run(raw, out)
    (out / ROWS).unlink()
    without_rows = run(raw, out)
    assert with_rows == without_rows
    assert {r["source_path"]: r["transcript"] for r in with_rows[0]}["ben/take06.wav"] == "words of take 6"


def test_a_row_recorded_for_other_inputs_is_not_used(raw: Path, tmp_path: Path,
                                                     caplog: pytest.LogCaptureFixture) -> None:
    """A cache row whose recorded hash or sidecar stat is not the file's now is ignored,
    whatever it says."""
    out = tmp_path / "out"
    expected = run(raw, out)
    table = cache_table(out / ROWS)
    table = table.set_column(table.schema.get_field_index("speaker"), "speaker",
                             pa.array(["someone-else"] * table.num_rows))
    sha = table.column("sha256").to_pylist()
    sha[0] = "0" * 64
    size = table.column("sidecar_size").to_pylist()
    with_sidecar = next(i for i, s in enumerate(size) if s is not None and i != 0)
    size[with_sidecar] += 1
    table = table.set_column(table.schema.get_field_index("sha256"), "sha256", pa.array(sha))
    table = table.set_column(table.schema.get_field_index("sidecar_size"), "sidecar_size", pa.array(size, pa.int64()))
    rewrite_cache_table(out / ROWS, table)
    with caplog.at_level(logging.INFO, logger="loam"):
        rows, _ = run(raw, out)
    assert reused(caplog) == 10
    speakers = {r["source_path"]: r["speaker"] for r in rows}
    paths = table.column("path").to_pylist()
    assert speakers[paths[0]] == speakers[paths[with_sidecar]] == {r["source_path"]: r["speaker"]
                                                                   for r in expected[0]}[paths[0]]


def test_other_settings_or_code_miss_the_whole_cache(raw: Path, tmp_path: Path,
                                                     caplog: pytest.LogCaptureFixture) -> None:
    out = tmp_path / "out"
    run(raw, out)
    solo = {"ingest": {"speaker": "narrator"}}
    with caplog.at_level(logging.INFO, logger="loam"):
        rows = run(raw, out, solo)
        assert reused(caplog) == 0
    assert rows == uncached(raw, tmp_path, solo)
    assert {r["speaker"] for r in rows[0]} == {"narrator"}
    run(raw, out)
    with mock.patch.object(ingest_rows, "code_version", return_value="another-version"), \
            caplog.at_level(logging.INFO, logger="loam"):
        assert run(raw, out) == uncached(raw, tmp_path)
        assert reused(caplog) == 0


def test_fresh_rows_go_in_a_part_and_the_latest_wins(raw: Path, tmp_path: Path,
                                                     caplog: pytest.LogCaptureFixture) -> None:
    for i in range(12, 40):  # enough files that one change leaves the table mostly in use
        write_wav(raw / "cyd" / f"take{i:02d}.wav", seed=i)
    out = tmp_path / "out"
    run(raw, out)
    sidecar, audio = raw / "cyd" / "take20.txt", raw / "cyd" / "take21.wav"
    for seed, words in ((100, "first words"), (101, "second words")):
        sidecar.write_text(words + "\n", encoding="utf-8")
        write_wav(audio, seed=seed, frames=800 + seed)  # another size: the stat test misses
        rows, rejects = run(raw, out)
        by_path = {r["source_path"]: r for r in rows}
        assert by_path["cyd/take20.wav"]["transcript"] == words
        assert by_path["cyd/take21.wav"]["sha256"] == hashlib.sha256(audio.read_bytes()).hexdigest()  # hashlib reference
    for name in ("rows", "probes"):
        assert sorted(p.name for p in (out / ROWS).parent.glob(f"{name}*.arrow")) == [
            f"{name}.arrow", f"{name}.part-000000.arrow", f"{name}.part-000001.arrow"]
    with caplog.at_level(logging.INFO, logger="loam"):
        assert run(raw, out) == (rows, rejects)  # the parts' rows serve: nothing probed or followed again
        assert "ingest: 0 files probed, 40 reused from cache" in caplog.text
        assert reused(caplog) == 40
    assert (rows, rejects) == uncached(raw, tmp_path)


def test_listing_stands_for_the_walk(tmp_path: Path) -> None:
    """The files the snapshot's listing gives ingest are those its own walk finds,
    extensions matched as os.path.splitext and str.lower have them (the Kelvin sign
    lower-cases to k); a link makes the listing incomplete, so the walk is used."""
    root = tmp_path / "raw"
    names = [".wav", "..wav", "a.WAV", "b.tar.wav", "c.wav.txt", "c.txt", "c.TXT", "dir.wav/x.txt", "dir.wav/x.wav",
             "é.WAV", "\u212a.wav", "k.\u212aav", "noext", "a.", "line\nbreak.wav", "s/.hidden.wav", "s/..x.flac",
             "z/y/...wav", "z/y/a..wav", "Ü/ß.MP3", "a.wav.", "İ.wav", "x.wİv"]
    for name in names:
        (root / name).parent.mkdir(parents=True, exist_ok=True)
        (root / name).write_bytes(b"x")
    listing = snapshot.Listing()
    snapshot.raw_digest(root, stats=listing)
    assert listing.complete
    for extensions in (("wav", "flac", "ogg", "mp3"), ("WAV", "kav", "wiv")):
        walked = ingest.scan(root, extensions, "txt")
        listed, stat = ingest.scan_listing(listing, extensions, "txt")
        assert (listed.audio, listed.sidecars) == (walked.audio, walked.sidecars)
        assert [tuple(int(c[i]) for c in stat[:3]) for i in range(len(listed.audio))] == [
            (st.st_size, st.st_mtime_ns, st.st_ino) for st in (os.stat(root / rel) for rel in listed.audio)]
    assert "k.\u212aav" in listed.audio
    os.symlink(root / "a.WAV", root / "link.wav")
    listing = snapshot.Listing()
    snapshot.raw_digest(root, stats=listing)
    assert not listing.complete and ingest.scan_listing(listing, ("wav",), "txt") is None


def test_a_changed_metadata_row_misses(raw: Path, tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    table = raw / "meta.csv"
    data = {"ingest": {"metadata": "meta.csv"}}
    table.write_text("path,transcript,speaker\nana/take01.wav,from the table,ana\nben/take02.wav,kept,ben\n",
                     encoding="utf-8")
    out = tmp_path / "out"
    run(raw, out, data)
    table.write_text("path,transcript,speaker\nana/take01.wav,changed in the table,ana\nben/take02.wav,kept,ben\n",
                     encoding="utf-8")
    with caplog.at_level(logging.INFO, logger="loam"):
        rows, rejects = run(raw, out, data)
    assert reused(caplog) == 11
    assert {r["source_path"]: r["transcript"] for r in rows}["ana/take01.wav"] == "changed in the table"
    assert (rows, rejects) == uncached(raw, tmp_path, data)


def test_sidecars_paired_in_arrow_as_one_by_one() -> None:
    paths = ["a/x.wav", "a/x.y.flac", "a/y.wav", "b.c/z.ogg", "é/ü.mp3", "top.wav", "a/.h.wav"]
    sidecars = {"a/x.txt", "a/x.TXT", "a/x.y.txt", "b.c/z.txt", "b.txt", "é/ü.Txt", "top.txt", "a/.h.txt", "a/y/x.txt"}
    arrow = paired_as_lists(ingest.pair_sidecars(paths, sidecars, columnar=True))
    python = paired_as_lists(ingest.pair_sidecars(paths, sidecars, columnar=False))
    assert arrow == python
    assert arrow[0] == ["a/x.TXT", "a/x.y.txt", None, "b.c/z.txt", "é/ü.Txt", "top.txt", "a/.h.txt"]


def paired_as_lists(paired: tuple) -> tuple[list, list, list]:
    return paired[0].to_pylist(), paired[1].to_pylist(), paired[2].tolist()


def test_sidecars_paired_in_arrow_as_one_by_one_on_random_names() -> None:
    """Random dumps: stems shared or not, extensions in any case, dots in folders and
    stems, names outside ASCII; the sidecars given sorted in Arrow (as the listing gives
    them) or as a set. The one-by-one pairing (a dict of stems) is the reference."""
    rng = np.random.default_rng(18)
    parts = ["a", "b.c", "é", "x.y", ".h", "ü", "k"]
    for _ in range(300):
        def name(extension: str) -> str:
            folders = "/".join(rng.choice(parts, size=rng.integers(0, 3)))
            stem = "".join(rng.choice(parts, size=rng.integers(1, 3)))
            return f"{folders}/{stem}.{extension}".lstrip("/")

        paths = sorted({name(str(rng.choice(["wav", "WAV", "flac", "Mp3"]))) for _ in range(rng.integers(0, 12))})
        sidecars = {name(str(rng.choice(["txt", "TXT", "Txt"]))) for _ in range(rng.integers(0, 12))}
        sidecars |= {p[:p.rfind(".")] + "." + str(rng.choice(["txt", "TXT"])) for p in paths if rng.random() < 0.5}
        python = paired_as_lists(ingest.pair_sidecars(paths, sidecars, columnar=False))
        assert paired_as_lists(ingest.pair_sidecars(paths, sidecars, columnar=True)) == python
        given = pa.array(sorted(sidecars), pa.string())
        assert paired_as_lists(ingest.pair_sidecars(paths, sidecars, columnar=True, names=pa.array(paths, pa.string()),
                                                    sorted_sidecars=given)) == python


def test_the_probes_follow_the_probe_code_alone(raw: Path, tmp_path: Path,
                                                caplog: pytest.LogCaptureFixture) -> None:
    """An edit to the stage outside the probe's reach keeps the probes (their results depend
    on the bytes and the probe's code); an edit within it probes every file again."""
    out = tmp_path / "out"
    run(raw, out)
    real = ingest.code_version

    def edited(module: str) -> object:
        return lambda stage, **kw: "edited" if stage == module else real(stage, **kw)

    for module, probed in (("ingest", 0), (ingest.PROBE_MODULE, 12)):
        caplog.clear()
        with mock.patch.object(ingest, "code_version", edited(module)), \
                mock.patch.object(ingest_rows, "code_version", edited(module)), \
                caplog.at_level(logging.INFO, logger="loam"):
            assert run(raw, out) == uncached(raw, tmp_path)
        assert f"ingest: {probed} files probed, {12 - probed} reused from cache" in caplog.text


def test_sorted_paths_hold_what_a_set_holds() -> None:
    """Membership by bisection in the sorted audio paths against a set (the reference),
    on random names outside ASCII too, and on names that sort between or beyond them."""
    rng = np.random.default_rng(7)
    alphabet = list("ab/._-é\u212aİz0")
    for _ in range(300):
        names = {"".join(rng.choice(alphabet, size=rng.integers(1, 6))) for _ in range(rng.integers(0, 20))}
        found = ingest.SortedPaths(sorted(names))
        asked = names | {"".join(rng.choice(alphabet, size=rng.integers(0, 6))) for _ in range(20)}
        assert {rel for rel in asked if rel in found} == names
        assert len(found) == len(names) and list(found) == sorted(names)
