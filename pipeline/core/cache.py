"""A content-addressed cache of per-file results under ``OUT/cache/<namespace>/``.

Keys are SHA-256 digests of everything a result depends on (source content hash,
stage parameters, stage code version), so a hit can be reused without asking
whether anything changed, and a changed input simply misses.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
from pathlib import Path
from typing import Any

from pipeline.core.config import canonical_json
from pipeline.core.fsio import write_bytes_atomic


def cache_key(*parts: Any) -> str:
    return hashlib.sha256(canonical_json(list(parts))).hexdigest()


class FileCache:
    """JSON values stored one file per key, written atomically."""

    def __init__(self, root: Path, namespace: str, *, enabled: bool = True) -> None:
        self.folder = Path(root) / namespace
        self.enabled = enabled

    def _path(self, key: str) -> Path:
        return self.folder / key[:2] / f"{key}.json"

    def get(self, key: str) -> Any | None:
        if not self.enabled:
            return None
        try:
            return json.loads(self._path(key).read_bytes())
        except FileNotFoundError:
            return None
        except (OSError, ValueError):
            # A damaged entry is only a miss: the result is recomputed and rewritten.
            with contextlib.suppress(OSError):
                self._path(key).unlink()
            return None

    def put(self, key: str, value: Any) -> None:
        if self.enabled:
            # No fsync: an entry a power cut leaves empty or torn does not parse, and
            # get() takes that as a miss; a thousand fsyncs would cost more than that.
            write_bytes_atomic(self._path(key), canonical_json(value), durable=False)
