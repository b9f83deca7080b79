"""Pronunciation lexicon files: a word, a tab and its phones on each line.

:func:`read_lexicon` reads the user lexicon of the ``lexicon`` backend and the override
lexicon that every backend consults first.
"""

from __future__ import annotations

from pathlib import Path

from pipeline.core.errors import UsageError
from pipeline.text.normalise import fold

__all__ = ["read_lexicon"]


def read_lexicon(path: str | Path) -> dict[str, tuple[str, ...]]:
    """Read a pronunciation lexicon: the first pronunciation of each word.

    Each line is a word, a tab and its phones separated by spaces; further tab
    columns (such as the count in ``lexicon/predicted.tsv``) are ignored. A line
    without a tab is read as a word and its phones separated by spaces. Blank
    lines and lines starting with ``#`` are skipped. A word may have several
    lines; the first wins. Words are folded like normalised text (NFKC, case).

    Parameters
    ----------
    path : str or Path
        The TSV file (UTF-8).

    Returns
    -------
    dict
        Folded word to a tuple of phones.

    Raises
    ------
    UsageError
        When the file cannot be read, or a line is not UTF-8, has no word or no
        phones; the message names the file, the line and what was expected.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.NamedTemporaryFile("w", suffix=".tsv", delete=False) as fh:
    ...     _ = fh.write("Taluko\\tt a l u k o\\ntaluko\\tt a l u g o\\n")
    >>> read_lexicon(fh.name)
    {'taluko': ('t', 'a', 'l', 'u', 'k', 'o')}
    >>> os.unlink(fh.name)
    """
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise UsageError(f"{path}: cannot read lexicon: {exc.strerror}") from exc
    expected = "a word, a tab, then its phones separated by spaces"
    entries: dict[str, tuple[str, ...]] = {}
    for number, line_bytes in enumerate(raw.split(b"\n"), start=1):
        try:
            line = line_bytes.decode("utf-8").rstrip("\r")
        except UnicodeDecodeError as exc:
            raise UsageError(f"{path}: line {number}: not UTF-8 (byte {exc.start}); expected {expected}") from exc
        if number == 1:
            line = line.removeprefix("\ufeff")
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        if "\t" in line:
            fields = line.split("\t")
            word, phones = fields[0].strip(), tuple(fields[1].split())
        else:
            word, *rest = line.split()
            phones = tuple(rest)
        key = fold(word)
        if not key or not phones:
            raise UsageError(f"{path}: line {number}: found {line!r}; expected {expected}")
        entries.setdefault(key, phones)
    return entries
