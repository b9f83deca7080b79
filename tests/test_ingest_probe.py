"""Ingest's probes: batched on the workers, confirmed by content when only the inode
changed; either way the rows and rejects a run without any cache gives."""

from __future__ import annotations

import hashlib
import logging
import os
import re
import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from pipeline.core.config import build_config
from pipeline.core.parallel import batches
from pipeline.core.runner import Runner
from pipeline.stages import STAGES
from tests.conftest import cache_table, rewrite_cache_table
from tests.test_ingest_rows import run, uncached, write_wav
from tests.test_worker_deaths import CRASHING, probe_crashing_on_one_file


@pytest.fixture(autouse=True)
def logs_reach_caplog(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(logging.getLogger("loam"), "propagate", True)


def make_raw(root: Path, files: int) -> Path:
    """``files`` short WAVs of three speakers (``spk<i % 3>/take<i>.wav``), every fourth with a sidecar."""
    for i in range(files):
        rel = f"spk{i % 3}/take{i:02d}.wav"
        write_wav(root / rel, seed=i)
        if i % 4 == 0:
            (root / rel).with_suffix(".txt").write_text(f"take {i}\n", encoding="utf-8")
    return root


def probed(caplog: pytest.LogCaptureFixture) -> tuple[int, int]:
    found = re.findall(r"ingest: (\d+) files probed, (\d+) reused from cache", caplog.text)[-1]
    return int(found[0]), int(found[1])


def test_a_crash_costs_its_file_and_not_its_batch(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    raw = make_raw(tmp_path / "raw", 40)
    assert max(len(b) for b in batches(range(40), threads=2)) > 1  # the crashing file shares a batch
    expected_rows, expected_rejects = uncached(raw, tmp_path)
    out = tmp_path / "out"
    with monkeypatch.context() as patch:
        patch.setattr("pipeline.stages.ingest_probe.probe_file", probe_crashing_on_one_file)
        Runner(raw, out, build_config({}), stages=STAGES, workers=2).prepare(("ingest",))
    (row,) = pq.read_table(out / "stages" / "ingest.rejects.parquet").to_pylist()
    assert row["source_path"] == CRASHING and row["reason"] == "decoder_crashed"
    assert row["detail"].startswith(f"{CRASHING}: the worker process probing it died (killed by signal SIGSEGV), "
                                  "also when it ran alone")
    rows = pq.read_table(out / "stages" / "ingest.parquet").to_pylist()
    assert rows == [r for r in expected_rows if r["source_path"] != CRASHING] and not expected_rejects


def test_worker_count_and_batches_do_not_change_the_rows(tmp_path: Path) -> None:
    raw = make_raw(tmp_path / "raw", 40)
    results = []
    for workers in (1, 2, 3):
        out = tmp_path / f"out{workers}"
        Runner(raw, out, build_config({}), stages=STAGES, workers=workers, use_cache=False).prepare(("ingest",))
        results.append((out / "stages" / "ingest.parquet").read_bytes())
    assert results[0] == results[1] == results[2]


def replace_keeping_size_and_time(path: Path, data: bytes) -> None:
    """Put ``data`` (of the file's size) at ``path`` as a new file (a new inode) with the old mtime."""
    st = path.stat()
    assert len(data) == st.st_size
    tmp = path.with_name(path.name + ".new")
    tmp.write_bytes(data)
    os.utime(tmp, ns=(st.st_atime_ns, st.st_mtime_ns))
    tmp.replace(path)


def test_a_copied_raw_is_hashed_not_probed_and_other_bytes_are_probed(tmp_path: Path,
                                                                      caplog: pytest.LogCaptureFixture) -> None:
    raw = make_raw(tmp_path / "raw", 12)
    out = tmp_path / "out"
    run(raw, out)
    copy = tmp_path / "copy"
    shutil.copytree(raw, copy)  # copy2: the same sizes and mtimes, new inodes
    assert all(os.stat(p).st_ino != os.stat(copy / p.relative_to(raw)).st_ino for p in raw.rglob("*.wav"))
    with caplog.at_level(logging.INFO, logger="loam"):
        result = run(copy, out)
    assert probed(caplog) == (0, 12)
    assert result == uncached(copy, tmp_path)
    assert "12 files of unchanged size and time but a new inode" in caplog.text
    assert "12 hold the bytes cached for them" in caplog.text

    # Other bytes of the same size, with the old mtime and a new inode: probed again.
    changed = copy / "spk1" / "take01.wav"
    data = bytearray(changed.read_bytes())
    data[-2:] = bytes([data[-2] ^ 0x55, data[-1] ^ 0x55])
    replace_keeping_size_and_time(changed, bytes(data))
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="loam"):
        rows, rejects = run(copy, out)
    assert probed(caplog) == (1, 11)
    assert "1 files of unchanged size and time but a new inode" in caplog.text and "0 hold the bytes" in caplog.text
    assert (rows, rejects) == uncached(copy, tmp_path)
    by_path = {r["source_path"]: r for r in rows}
    assert by_path["spk1/take01.wav"]["sha256"] == hashlib.sha256(bytes(data)).hexdigest()  # hashlib reference


def test_a_cached_hash_that_is_not_the_files_is_probed_again(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """A tampered probe cache (a wrong hash for a file whose inode changed) costs a probe, not a wrong row."""
    import pyarrow as pa

    raw = make_raw(tmp_path / "raw", 12)
    out = tmp_path / "out"
    run(raw, out)
    cache = out / "cache" / "ingest" / "probes.arrow"
    table = cache_table(cache)
    sha = table.column("sha256").to_pylist()
    sha[3] = "0" * 64
    table = table.set_column(table.schema.get_field_index("sha256"), "sha256", pa.array(sha))
    rewrite_cache_table(cache, table)  # under the scope and with the digest it had: read as written
    path = raw / table.column("path")[3].as_py()
    replace_keeping_size_and_time(path, path.read_bytes())
    with caplog.at_level(logging.INFO, logger="loam"):
        result = run(raw, out)
    assert probed(caplog) == (1, 11)
    assert result == uncached(raw, tmp_path)


def test_the_parquet_probe_table_of_an_older_layout_serves_once(tmp_path: Path,
                                                                 caplog: pytest.LogCaptureFixture) -> None:
    """Probes an older Loam kept as Parquet (a table and a part, same scope) stand: the
    first run with mapped tables probes only what they lack, then writes the mapped
    table and removes the Parquet files."""
    from pipeline.core.cache import TableCache

    raw = make_raw(tmp_path / "raw", 12)
    out = tmp_path / "out"
    run(raw, out)
    folder = out / "cache" / "ingest"
    table = cache_table(folder / "probes.arrow")
    older = TableCache(out / "cache", "ingest", "probes", scope=table.schema.metadata[b"loam_cache_scope"].decode())
    older.save(table.slice(0, 9).replace_schema_metadata(None))
    older.append(table.slice(9, 2).replace_schema_metadata(None))  # the last file's probe is not there
    for name in ("probes.arrow", "probes.arrow.sha256"):
        (folder / name).unlink()
    with caplog.at_level(logging.INFO, logger="loam"):
        result = run(raw, out)
    assert probed(caplog) == (1, 11)
    assert result == uncached(raw, tmp_path)
    assert sorted(p.name for p in folder.glob("probes*")) == ["probes.arrow", "probes.arrow.sha256"]
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="loam"):
        run(raw, out)
    assert probed(caplog) == (0, 12)
    # One of another scope (another probe code) is not used: every file is probed again.
    TableCache(out / "cache", "ingest", "probes", scope="another probe").save(table.replace_schema_metadata(None))
    for name in ("probes.arrow", "probes.arrow.sha256"):
        (folder / name).unlink()
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="loam"):
        run(raw, out)
    assert probed(caplog) == (12, 0)


def test_flat_folder_is_the_one_folder_of_every_path() -> None:
    """The early-stopping loop gives what the set of every path's folder gives."""
    import random

    from pipeline.stages.speaker_source import flat_folder

    rng = random.Random(5)
    for _ in range(300):
        folders = rng.sample(["", "a", "a/b", "b", "wavs"], rng.randint(1, 2))
        paths = sorted(f"{rng.choice(folders)}/{i}.wav".lstrip("/") for i in range(rng.randint(1, 6)))
        every = {p.rpartition("/")[0] for p in paths}
        assert flat_folder(paths) == (every.pop() if len(every) == 1 else None)


def test_sidecar_stats_from_the_listing_are_those_of_os_stat(tmp_path: Path) -> None:
    from pipeline.core import snapshot
    from pipeline.stages import ingest

    raw = make_raw(tmp_path / "raw", 12)
    listing = snapshot.Listing()
    snapshot.raw_digest(raw, stats=listing)
    found, _ = ingest.scan_listing(listing, ("wav",), "txt")
    needed = sorted(found.sidecars) + ["spk0/none.txt"]
    listed = ingest._listed_stats(needed, found.sidecar_listing)
    statted = ingest._stats(str(raw), needed)
    for a, b in zip(listed, statted, strict=True):
        assert a.dtype == b.dtype and a.tolist() == b.tolist()
    assert listed[3].tolist() == [True] * (len(needed) - 1) + [False]
