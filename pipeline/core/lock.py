"""One run at a time per output folder: a lock file that holds the owner's pid."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from pathlib import Path

from pipeline.core import names
from pipeline.core.errors import LockedError


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


@contextlib.contextmanager
def output_lock(out: Path) -> Iterator[Path]:
    """Hold ``OUT/.loam.lock`` for the duration of a run.

    The lock is created with O_EXCL, so two runs racing for it cannot both win. A lock
    whose pid no longer runs was left by a crash and is taken over.
    """
    out.mkdir(parents=True, exist_ok=True)
    path = out / names.LOCK
    for _ in range(2):
        try:
            fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                pid = int(path.read_text().strip() or "0")
            except (OSError, ValueError):
                pid = 0
            if pid and pid != os.getpid() and _alive(pid):
                raise LockedError(
                    f"{out} is in use by another loam run (pid {pid}, lock file {path}); "
                    "wait for it to finish or choose another output folder"
                ) from None
            # Stale: the owner died without cleaning up.
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
            continue
        with os.fdopen(fd, "w") as fh:
            fh.write(f"{os.getpid()}\n")
        break
    else:  # pragma: no cover - another process re-created it between our two attempts
        raise LockedError(f"{out} is in use by another loam run (lock file {path})")
    try:
        yield path
    finally:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()
