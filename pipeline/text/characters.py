"""The characters of a normalised word: letter units, English spellings, alphabet checks.

What the backends need to know about a word's characters before pronouncing it: its
grapheme units (a base character with its combining marks), the accent-free spelling
CMUdict and g2p-en are asked for, and which characters an alphabet does not allow.
"""

from __future__ import annotations

import functools
import unicodedata
from collections.abc import Iterable

__all__ = ["ENGLISH_LETTERS", "describe_characters", "disallowed_characters", "english_key", "english_letter",
           "grapheme_units"]

# What g2p-en's model can read: its grapheme table is a-z, and CMUdict spells
# words with the same letters plus apostrophes.
ENGLISH_LETTERS = frozenset("abcdefghijklmnopqrstuvwxyz'")


def grapheme_units(word: str) -> tuple[str, ...]:
    """A word's letters as units: each base character with the combining marks after it.

    Parameters
    ----------
    word : str
        A normalised word.

    Returns
    -------
    tuple of str
        The units in order; joined, they give ``word`` back.

    Examples
    --------
    >>> [len(unit) for unit in grapheme_units("n\\u0303aka")]  # n + combining tilde is one unit
    [2, 1, 1, 1]
    """
    units: list[str] = []
    for ch in word:
        if units and unicodedata.category(ch)[0] == "M":
            units[-1] += ch
        else:
            units.append(ch)
    return tuple(units)


def english_key(word: str) -> str:
    """The spelling CMUdict and g2p-en are asked for: accents removed (NFD, marks dropped).

    Parameters
    ----------
    word : str
        A normalised word.

    Returns
    -------
    str
        ``word`` without its non-spacing marks (ASCII words come back as they are).

    Examples
    --------
    >>> english_key("caf\u00e9")
    'cafe'
    """
    if word.isascii():
        return word
    return "".join(ch for ch in unicodedata.normalize("NFD", word) if unicodedata.category(ch) != "Mn")


@functools.lru_cache(maxsize=1 << 12)
def english_letter(ch: str) -> bool:
    """Whether the english backend can read ``ch``: a-z or the apostrophe, once accents go.

    Parameters
    ----------
    ch : str
        One character.

    Returns
    -------
    bool
        True when :func:`english_key` of ``ch`` is made of ``ENGLISH_LETTERS``.

    Examples
    --------
    >>> english_letter("\u00e9"), english_letter("\u00f8")
    (True, False)
    """
    return set(english_key(ch)) <= ENGLISH_LETTERS


def disallowed_characters(word: str, *, alphabet: str | frozenset[str]) -> list[str]:
    """The characters of ``word`` outside ``alphabet``, in order of first appearance.

    Parameters
    ----------
    word : str
        A normalised word.
    alphabet : str or frozenset of str
        The allowed characters; empty allows any letter or combining mark and the
        apostrophe.

    Returns
    -------
    list of str
        Each disallowed character once.

    Examples
    --------
    >>> disallowed_characters("k4x", alphabet="akx")
    ['4']
    """
    allowed = frozenset(alphabet)
    found: list[str] = []
    for ch in word:
        ok = ch in allowed if allowed else (unicodedata.category(ch)[0] in "LM" or ch == "'")
        if not ok and ch not in found:
            found.append(ch)
    return found


def describe_characters(chars: Iterable[str]) -> str:
    """Code points for a message: ``U+00E9 'é', U+00F8 'ø'`` (sorted, unique).

    Parameters
    ----------
    chars : iterable of str
        Characters, repeats allowed.

    Returns
    -------
    str
        Each character's code point and repr, comma-separated.

    Examples
    --------
    >>> describe_characters("\\u00f8\\u00e9")
    "U+00E9 'é', U+00F8 'ø'"
    """
    return ", ".join(f"U+{ord(ch):04X} {ch!r}" for ch in sorted(set(chars)))
