"""RAW's listing taken by this process and a forked helper (pipeline.core.raw_walk).

Reference: one walk in one process, ``snapshot.tree_digest`` with a ``Listing``: the
shared walk must give the very same digest, paths in the same order, the same numbers
and the same ``complete`` flag, whoever walked which folders.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from pipeline.core import snapshot
from pipeline.core.raw_walk import SHARES, RawWalk


def _tree(root: Path, *, folders: int) -> None:
    for i in range(folders):
        for rel in (f"spk{i:03d}/a.wav", f"spk{i:03d}/deep/b.txt", f"spk{i:03d}/c.wav"):
            (root / rel).parent.mkdir(parents=True, exist_ok=True)
            (root / rel).write_bytes(rel.encode())
    (root / "metadata.csv").write_bytes(b"x")
    (root / "empty").mkdir()
    # A name that is not UTF-8 (kept by surrogateescape) in a folder the walk packs.
    (root / ("spk000" if folders else "") / os.fsdecode(b"\xff.wav")).write_bytes(b"odd")


def _walk(root: Path) -> snapshot.Listing:
    listing = snapshot.Listing()
    listing.digest = snapshot.tree_digest(root, stats=listing)
    return listing


def _listed(root: Path) -> snapshot.Listing:
    """RAW's listing as the shared walk gives it, its helper ended after."""
    walk = RawWalk(root)
    try:
        return walk.listing()
    finally:
        walk.close()


def _same(found: snapshot.Listing, expected: snapshot.Listing) -> None:
    assert found.digest == expected.digest
    assert found.complete == expected.complete
    assert found.columns() == expected.columns()  # paths, then numbers and inodes (arrays)


@pytest.mark.parametrize("folders", [0, 1, 2, 7, SHARES + 5])
@pytest.mark.parametrize("helper", [True, False])
def test_the_shared_walk_gives_the_walk_of_one_process(tmp_path: Path, folders: int, helper: bool) -> None:
    root = tmp_path / "raw"
    root.mkdir()
    _tree(root, folders=folders)
    walk = RawWalk(root, helper=helper)
    try:
        _same(walk.listing(), _walk(root))
        assert walk.listing() is walk.listing()
    finally:
        walk.close()


def test_a_link_makes_the_listing_partial_as_in_one_walk(tmp_path: Path) -> None:
    root = tmp_path / "raw"
    root.mkdir()
    _tree(root, folders=9)
    (root / "spk005" / "link.wav").symlink_to(root / "spk001" / "a.wav")
    expected = _walk(root)
    assert not expected.complete
    _same(_listed(root), expected)


def test_what_a_dead_helper_took_is_walked_here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    root = tmp_path / "raw"
    root.mkdir()
    _tree(root, folders=12)
    parent, take = os.getpid(), RawWalk._take

    def dying(self: RawWalk, tokens: int) -> object:
        if os.getpid() != parent:  # the helper takes a run and dies with it
            os.read(tokens, 1)
            os._exit(3)
        return take(self, tokens)

    monkeypatch.setattr(RawWalk, "_take", dying)
    _same(_listed(root), _walk(root))


def test_close_ends_a_helper_never_asked(tmp_path: Path) -> None:
    root = tmp_path / "raw"
    root.mkdir()
    _tree(root, folders=4)
    walk = RawWalk(root)
    pid = walk._pid
    assert pid
    walk.close()
    with pytest.raises(ChildProcessError):  # ended and reaped: no zombie left
        os.waitpid(pid, os.WNOHANG)
