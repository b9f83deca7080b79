"""The mapped cache tables' check of their bytes (pipeline.core.cache): hashed unless the
file is the very one written (same size, modification time and inode)."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pyarrow as pa
import pytest

from pipeline.core.cache import TableCache

TABLE = pa.table({"path": [f"s/{i}.wav" for i in range(200)], "frames": list(range(200))})


def _saved(tmp_path: Path) -> TableCache:
    cache = TableCache(tmp_path, "audio", "outcomes", scope="v1", mapped=True)
    cache.save(TABLE)
    return cache


def _hashes(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Count the SHA-256 digests taken from now on."""
    taken: list[int] = []
    real = hashlib.sha256

    def counted(*args: object) -> object:
        taken.append(1)
        return real(*args)

    monkeypatch.setattr(hashlib, "sha256", counted)
    return taken


def _damaged(path: Path, *, keep_time: bool) -> None:
    """One byte of a value changed, written as a new file (a new inode) in its place;
    with ``keep_time`` the old modification time is put back."""
    st = path.stat()
    data = bytearray(path.read_bytes())
    at = bytes(data).rindex(b"s/199.wav")
    data[at] = ord("t")
    new = path.with_name(path.name + ".new")
    new.write_bytes(bytes(data))
    if keep_time:
        os.utime(new, ns=(st.st_atime_ns, st.st_mtime_ns))
    new.replace(path)


def test_the_file_written_is_used_without_hashing(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cache = _saved(tmp_path)
    taken = _hashes(monkeypatch)
    assert cache.load().equals(TABLE)
    assert taken == []


@pytest.mark.parametrize("keep_time", [False, True])
def test_other_bytes_in_its_place_are_hashed_and_missed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                        keep_time: bool) -> None:
    cache = _saved(tmp_path)
    _damaged(cache.path, keep_time=keep_time)
    taken = _hashes(monkeypatch)
    assert cache.load() is None
    assert taken == [1]


def test_a_copy_is_hashed_and_used(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    cache = _saved(tmp_path / "a")
    copy = TableCache(tmp_path / "b", "audio", "outcomes", scope="v1", mapped=True)
    copy.path.parent.mkdir(parents=True)
    for name in (cache.path.name, cache.path.name + ".sha256"):
        (copy.path.parent / name).write_bytes((cache.path.parent / name).read_bytes())
    taken = _hashes(monkeypatch)
    assert copy.load().equals(TABLE)
    assert taken == [1]


def test_a_digest_without_a_stat_from_an_older_loam_is_checked(tmp_path: Path) -> None:
    cache = _saved(tmp_path)
    digest = cache.path.with_name(cache.path.name + ".sha256")
    digest.write_text(digest.read_text().split("\n")[0] + "\n")
    assert cache.load().equals(TABLE)
    _damaged(cache.path, keep_time=False)
    assert cache.load() is None
