"""Speaker ids as ingest writes them, shared with the split stage's balance table."""

from __future__ import annotations

import functools
import hashlib
import re
import unicodedata

_SPEAKER_KEEP = re.compile(r"[^A-Za-z0-9_.-]+")


# Memoised: a rebuild asks once per file, and a corpus has few speakers.
@functools.lru_cache(maxsize=4096)
def speaker_id(name: str) -> str:
    """A file-name-safe speaker id; a name that needs changing gets a hash suffix so two
    different names can never map to one id.

    Examples
    --------
    >>> speaker_id("wren"), speaker_id("Grèbe hup")[:9]
    ('wren', 'Grebe_hup')
    """
    safe = _SPEAKER_KEEP.sub("_", unicodedata.normalize("NFKD", name).encode("ascii", "ignore").decode())
    safe = safe.strip("._-") or "speaker"
    if safe != name:
        safe = f"{safe}-{hashlib.sha256(name.encode('utf-8', 'surrogateescape')).hexdigest()[:6]}"
    return safe
