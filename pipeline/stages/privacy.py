"""Keyed pseudonyms for speaker ids (HMAC-SHA-256, RFC 2104).

A pseudonym is ``spk-`` plus the first 16 hex digits of HMAC-SHA-256(key, speaker).
Without the key nobody can recompute or reverse it, so manifests and reports can be
shared; with the same key, the same speaker gets the same pseudonym in every run,
which keeps split ledgers stable. Keep the key outside OUT.
"""

from __future__ import annotations

import hashlib
import hmac
from pathlib import Path

from pipeline.core.errors import UsageError
from pipeline.core.fsio import write_text_atomic
from pipeline.stages.paths import is_inside

MIN_KEY_BYTES = 16
PREFIX = "spk-"


def load_key(path: Path, *, out: Path) -> bytes:
    """Read the secret key file; refuse a short key or one stored inside OUT."""
    if is_inside(path, folder=out):
        raise UsageError(f"privacy.key_file {str(path)!r} lies inside OUT; keep the key outside what you share")
    try:
        key = path.read_bytes().strip()
    except OSError as exc:
        raise UsageError(f"privacy.key_file {str(path)!r}: cannot read the key ({exc.strerror})") from exc
    if len(key) < MIN_KEY_BYTES:
        raise UsageError(
            f"privacy.key_file {str(path)!r}: the key has {len(key)} bytes; expected at least {MIN_KEY_BYTES} "
            "(e.g. `python3 -c \"import secrets; print(secrets.token_hex(32))\" > speaker.key`)"
        )
    return key


def pseudonym(speaker: str, *, key: bytes) -> str:
    """The pseudonym of ``speaker`` under ``key``."""
    digest = hmac.new(key, speaker.encode("utf-8", "surrogateescape"), hashlib.sha256).hexdigest()
    return PREFIX + digest[:16]


def write_mapping(path: Path, mapping: dict[str, str], *, out: Path) -> None:
    """Write ``speaker<TAB>pseudonym`` lines where the user asked, never inside OUT."""
    if is_inside(path, folder=out):
        raise UsageError(f"privacy.mapping_file {str(path)!r} lies inside OUT; it would undo the pseudonyms")
    lines = ["speaker\tpseudonym"] + [f"{s}\t{p}" for s, p in sorted(mapping.items())]
    write_text_atomic(path, "\n".join(lines) + "\n")
