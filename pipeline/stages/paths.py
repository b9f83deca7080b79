"""Path checks the stages share: is a path inside a folder, and is a path from
untrusted metadata a safe path relative to RAW.

Paths from metadata tables and file names are untrusted: nothing here opens a file.
"""

from __future__ import annotations

import posixpath
import re
from pathlib import Path


def is_inside(path: Path, *, folder: Path) -> bool:
    """Whether ``path``, symbolic links resolved, lies in ``folder`` (or is it).

    A path that cannot be resolved (a link loop, an unreadable folder) counts as outside.

    Examples
    --------
    >>> is_inside(Path("/srv/raw/ana/take.wav"), folder=Path("/srv/raw"))
    True
    >>> is_inside(Path("/srv/raw/../out"), folder=Path("/srv/raw"))
    False
    """
    try:
        path.resolve().relative_to(folder.resolve())
    except (ValueError, OSError, RuntimeError):
        return False
    return True


def check_relative_path(raw: Path, text: str) -> tuple[str | None, str | None]:
    """Normalise a path from metadata; returns (relative path, problem sentence).

    Absolute paths, ``..`` that climbs out, and symlinks resolving outside RAW are
    refused without opening anything.

    Examples
    --------
    >>> check_relative_path(Path("/srv/raw"), "ana\\\\take.wav")
    ('ana/take.wav', None)
    >>> check_relative_path(Path("/srv/raw"), "../secret.wav")
    (None, "the path '../secret.wav' leaves the raw folder")
    """
    cleaned = text.strip().replace("\\", "/")
    if not cleaned:
        return None, "the path is empty"
    if cleaned.startswith("/") or re.match(r"^[A-Za-z]:/", cleaned):
        return None, f"the path {cleaned!r} is absolute; expected a path relative to the raw folder"
    norm = posixpath.normpath(cleaned)
    if norm == ".." or norm.startswith("../"):
        return None, f"the path {cleaned!r} leaves the raw folder"
    if not is_inside(raw / norm, folder=raw):
        return None, f"the path {cleaned!r} resolves outside the raw folder (a symbolic link)"
    return norm, None
