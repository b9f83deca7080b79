"""RAW's listing and digest (``snapshot.raw_digest``) taken by two processes at once.

A ``prepare`` that records a snapshot lists RAW before any stage works (0.42 CPU s at
100,000 sources, about 0.31 of it system calls). In one process the walk waits for
the imports and the config before it begins, and the imports wait for nothing, yet a
walk on a thread would not overlap them: each of its 134,687 ``lstat`` calls gives
the GIL away and waits up to the switch interval (5 ms) to get it back from a thread
running Python. So :class:`RawWalk` forks a helper process as the command begins
(before any lock is taken, any thread started or any heavy library imported). RAW's
top-level folders are cut into at most ``SHARES`` runs; a pipe holds one byte per
run, and the helper at once, this process when it asks for the listing, each take
the next byte and walk that run, until none is left. The helper sends back what it
walked: per run, the bytes the walk hashes and the files' stats. This process hashes
the root's bytes and every run's in order, which gives the digest of one walk
(:func:`snapshot.tree_digest`), and joins the listings in the walk's order. A run the
helper took but never sent (it died) is walked here; so is everything where there is
no ``fork`` (not Linux: the rule of ``pipeline.core.pool.start_method``) or RAW has
fewer than two folders at its top.
"""

from __future__ import annotations

import contextlib
import hashlib
import marshal
import os
import signal
import sys
from array import array
from pathlib import Path

from pipeline.core.forked import child_sends
from pipeline.core.snapshot import Listing, folder_digest, raw_digest, walk_folders

# At most this many runs of top-level folders: one byte each in the pipe, far below the
# pipe's atomic write size; enough for the two processes to finish close together.
SHARES = 64
# A run walked: (index, bytes hashed, paths, numbers, inodes, whether it held only
# folders and regular files); the helper sends the paths as one NUL-separated string
# and the arrays as their bytes (marshal of a list of 67,000 strings cost more).
_Walked = tuple[int, bytes, list[str], array, array, bool]  # type: ignore[type-arg]
_Sent = tuple[int, bytes, bytes, bytes, bytes, bool]


class _Chunks:
    """Keeps, in order, what a walk hands its digest."""

    def __init__(self) -> None:
        self.parts: list[bytes] = []

    def update(self, data: bytes) -> None:
        self.parts.append(data)


class RawWalk:
    """RAW's listing, begun by a forked helper as soon as this is made.

    Parameters
    ----------
    raw : Path
        The folder to list.
    helper : bool
        Fork a helper (where fork is the rule); False walks everything here, when
        :meth:`listing` is first called.

    Examples
    --------
    >>> import tempfile
    >>> raw = Path(tempfile.mkdtemp())
    >>> for rel in ("a/x.wav", "b/y.wav", "b/c/z.txt", "top.csv"):
    ...     (raw / rel).parent.mkdir(parents=True, exist_ok=True); _ = (raw / rel).write_bytes(b"1")
    >>> walk = RawWalk(raw)
    >>> listing = walk.listing()
    >>> listing.digest == raw_digest(raw), list(listing), listing.complete
    (True, ['top.csv', 'a/x.wav', 'b/y.wav', 'b/c/z.txt'], True)
    >>> walk.close()
    >>> import shutil; shutil.rmtree(raw)
    """

    def __init__(self, raw: Path, *, helper: bool = True) -> None:
        self.raw = os.fspath(raw)
        self._listing: Listing | None = None
        self._pid = 0
        self._tokens = self._results = -1
        self._root = _Chunks()
        self._root_stats = Listing()
        listed = folder_digest(self.raw, "", frozenset(), self._root_stats, self._root)
        self._whole = listed is not None and listed[1]
        self._folders = listed[0] if listed is not None else []
        count = min(SHARES, len(self._folders))
        self._bounds = [len(self._folders) * i // count for i in range(count + 1)] if count else [0]
        if listed is not None and helper and count >= 2 and _can_fork():
            self._start()

    def _start(self) -> None:
        tokens_read, tokens_write = os.pipe()
        results_read, results_write = os.pipe()
        os.write(tokens_write, bytes(range(len(self._bounds) - 1)))
        os.close(tokens_write)  # the pipe ends when both processes have emptied it
        pid = os.fork()
        if pid == 0:  # the helper: walk what it can take, send it, leave without cleanup
            child_sends(results_read, results_write,
                        lambda: marshal.dumps([_sendable(walked) for walked in self._take(tokens_read)]))
        os.close(results_write)
        self._pid, self._tokens, self._results = pid, tokens_read, results_read

    def _take(self, tokens: int) -> list[_Walked]:
        """Walk the runs this process takes from the pipe until it is empty."""
        walked = []
        while token := os.read(tokens, 1):
            walked.append(self._walk_run(token[0]))
        return walked

    def _walk_run(self, index: int) -> _Walked:
        stats, chunks = Listing(), _Chunks()
        simple = walk_folders(self._folders[self._bounds[index]:self._bounds[index + 1]], chunks, stats=stats)
        paths, numbers, inodes = stats.columns()
        return index, b"".join(chunks.parts), paths, numbers, inodes, simple

    def listing(self) -> Listing:
        """RAW's listing, its ``digest`` set (as ``snapshot.raw_digest`` gives them);
        walked the first time, with the helper, and kept."""
        if self._listing is not None:
            return self._listing
        if not self._folders:
            listing = Listing()
            raw_digest(Path(self.raw), stats=listing)
            self._listing = listing
            return listing
        walked: dict[int, _Walked] = {}
        if self._pid:
            walked.update((w[0], w) for w in self._take(self._tokens))
            walked.update((w[0], w) for w in self._collect())
        listing, digest, simple = Listing(), hashlib.sha256(), self._whole
        paths, numbers, inodes = self._root_stats.columns()
        listing.add("", paths, numbers, inodes)
        digest.update(b"".join(self._root.parts))
        for index in range(len(self._bounds) - 1):
            _, data, paths, numbers, inodes, whole = walked.get(index) or self._walk_run(index)
            listing.add("", paths, numbers, inodes)
            digest.update(data)
            simple = simple and whole
        listing.complete, listing.digest = simple, digest.hexdigest()
        self._listing = listing
        return listing

    def _collect(self) -> list[_Walked]:
        """What the helper sent (nothing if it failed), once it has ended."""
        with open(self._results, "rb", closefd=True) as fh:
            data = fh.read()
        self._results = -1
        self._end_helper(kill=False)
        try:
            return [_received(sent) for sent in marshal.loads(data)]
        except (EOFError, ValueError, TypeError):  # the helper failed: its runs are walked here
            return []

    def _end_helper(self, *, kill: bool) -> None:
        for fd in (self._tokens, self._results):
            if fd >= 0:
                os.close(fd)
        self._tokens = self._results = -1
        if self._pid:
            if kill:
                with contextlib.suppress(ProcessLookupError):
                    os.kill(self._pid, signal.SIGKILL)
            with contextlib.suppress(ChildProcessError):
                os.waitpid(self._pid, 0)
            self._pid = 0

    def close(self) -> None:
        """Stop the helper if the listing was never asked for (the command ended first)."""
        self._end_helper(kill=True)


def _sendable(walked: _Walked) -> _Sent:
    index, data, paths, numbers, inodes, simple = walked
    return index, data, "\0".join(paths).encode("utf-8", "surrogateescape"), numbers.tobytes(), inodes.tobytes(), simple


def _received(sent: _Sent) -> _Walked:
    index, data, joined, number_bytes, inode_bytes, simple = sent
    numbers, inodes = array("q"), array("Q")
    numbers.frombytes(number_bytes)
    inodes.frombytes(inode_bytes)
    paths = joined.decode("utf-8", "surrogateescape").split("\0") if joined else []
    return index, data, paths, numbers, inodes, simple


def _can_fork() -> bool:
    """Fork where the worker pools do (``pipeline.core.pool.start_method``): on Linux."""
    return sys.platform.startswith("linux") and hasattr(os, "fork")
