"""Keyed pseudonyms for speaker ids and source references (HMAC-SHA-256, RFC 2104).

A pseudonym is ``spk-`` plus the first 16 hex digits of HMAC-SHA-256(key, speaker); a
source reference is ``src-`` plus the first 16 hex digits of HMAC-SHA-256(key, the
file's RAW-relative path). Without the key nobody can recompute or reverse them, so
manifests and reports can be shared; with the same key, the same speaker and file get
the same names in every run, which keeps split ledgers stable. Keep the key outside OUT.

The mapping back (``kind<TAB>name<TAB>reference``, kind ``speaker`` or ``source``) goes
where ``privacy.mapping_file`` says, outside OUT, and to the private file
``names.PRIVATE_MAPPING`` under OUT's cache, from which the audio stage finds the files
and ``loam validate`` learns the real names to look for.
"""

from __future__ import annotations

import hashlib
import hmac
import posixpath
import re
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from pipeline.core.errors import UsageError
from pipeline.core.fsio import write_text_atomic
from pipeline.stages.paths import is_inside

MIN_KEY_BYTES = 16
PREFIX = "spk-"
SOURCE_PREFIX = "src-"
HEADER = "kind\tname\treference"


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


def source_reference(rel: str, *, key: bytes) -> str:
    """The reference of the RAW-relative path ``rel`` under ``key``.

    >>> source_reference("heron/heron_01.wav", key=b"k" * 16) == source_reference("heron/heron_01.wav", key=b"k" * 16)
    True
    >>> source_reference("heron/heron_01.wav", key=b"k" * 16).startswith("src-")
    True
    """
    digest = hmac.new(key, rel.encode("utf-8", "surrogateescape"), hashlib.sha256).hexdigest()
    return SOURCE_PREFIX + digest[:16]


def mapping_text(speakers: Mapping[str, str], sources: Mapping[str, str]) -> str:
    """The mapping file's text: a header, then ``speaker`` and ``source`` lines sorted by name.

    >>> mapping_text({"ana": "spk-1"}, {"ana/a.wav": "src-2"}).splitlines()
    ['kind\\tname\\treference', 'speaker\\tana\\tspk-1', 'source\\tana/a.wav\\tsrc-2']
    """
    lines = [HEADER] + [f"speaker\t{s}\t{p}" for s, p in sorted(speakers.items())]
    lines += [f"source\t{rel}\t{ref}" for rel, ref in sorted(sources.items())]
    return "\n".join(lines) + "\n"


def read_mapping(path: Path) -> dict[str, dict[str, str]]:
    """A mapping file as ``{"speaker": {name: reference}, "source": {name: reference}}``;
    UsageError naming the file and line when a line is not ``kind<TAB>name<TAB>reference``."""
    found: dict[str, dict[str, str]] = {"speaker": {}, "source": {}}
    try:
        lines = path.read_text(encoding="utf-8", errors="surrogateescape").splitlines()
    except OSError as exc:
        raise UsageError(f"{path}: cannot read the privacy mapping ({exc.strerror})") from exc
    for number, line in enumerate(lines[1:], start=2):
        parts = line.split("\t")
        if len(parts) != 3 or parts[0] not in found:
            raise UsageError(f"{path}: line {number}: expected kind<TAB>name<TAB>reference with kind "
                             f"'speaker' or 'source', got {line!r}")
        found[parts[0]][parts[1]] = parts[2]
    return found


def write_mapping(path: Path, speakers: Mapping[str, str], sources: Mapping[str, str], *, out: Path) -> None:
    """Write the mapping where the user asked, never inside OUT."""
    if is_inside(path, folder=out):
        raise UsageError(f"privacy.mapping_file {str(path)!r} lies inside OUT; it would undo the pseudonyms")
    write_text_atomic(path, mapping_text(speakers, sources))


def real_names(speakers: Iterable[str], sources: Iterable[str]) -> set[str]:
    """Every name a shareable file must not hold: the speaker ids, and the folder names
    and file stems of the RAW-relative paths.

    >>> sorted(real_names(["ana"], ["north/ana_01.wav"]))
    ['ana', 'ana_01', 'north']
    """
    found = {s for s in speakers if s}
    for rel in sources:
        *folders, leaf = rel.split("/")
        found.update(f for f in folders if f)
        found.add(posixpath.splitext(leaf)[0] or leaf)
    return found


def name_pattern(names: Iterable[str]) -> re.Pattern[str] | None:
    """A pattern matching any of ``names`` as a whole token (not inside a longer run of
    letters and digits), longest first; None when there is no name.

    >>> name_pattern(["ana"]).findall("ana/ana_01.wav, banana")
    ['ana', 'ana']
    """
    trie: dict[str, Any] = {}
    for name in {n for n in names if n}:
        node = trie
        for char in name:
            node = node.setdefault(char, {})
        node[""] = {}
    if not trie:
        return None
    return re.compile(rf"(?<![^\W_])(?:{_trie_pattern(trie)})(?![^\W_])")


def _trie_pattern(node: dict[str, Any]) -> str:
    """The names of a character trie as one regex that branches on each character: a
    plain alternation of tens of thousands of names is tried name by name at every
    position of the text (20,000 names over 2 MB of text: 21 s), this one letter by letter.
    Longer names are tried first; the pattern backtracks to a shorter one."""
    branches = [re.escape(char) + _trie_pattern(child) for char, child in sorted(node.items()) if char]
    if not branches:
        return ""
    body = branches[0] if len(branches) == 1 else "(?:" + "|".join(branches) + ")"
    if "" not in node:
        return body
    return (f"(?:{body})?" if len(branches) == 1 else body + "?")


def scrub(text: str, *, sources: Mapping[str, str], pattern: re.Pattern[str] | None) -> str:
    """``text`` with every RAW-relative path replaced by its reference, then every other
    real name (a folder, a stem, a speaker) by ``[withheld]``.

    >>> scrub("ana/a.wav: byte-identical to 'ana/b.wav'", sources={"ana/a.wav": "src-1"},
    ...       pattern=name_pattern(["ana", "b"]))
    "src-1: byte-identical to '[withheld]/[withheld].wav'"
    """
    for rel in sorted(sources, key=len, reverse=True):
        text = text.replace(rel, sources[rel])
    return pattern.sub("[withheld]", text) if pattern is not None else text
