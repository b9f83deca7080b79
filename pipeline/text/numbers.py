"""Numbers written with digits, read out in the transcript's language (not English).

English keeps its own reader (:func:`pipeline.text.normalise.verbalise`: money, times,
years, ordinals). Any other language gets its whole numbers from the user's table for
it in ``text.number_words`` first (``sw = { "12" = "kumi na mbili" }``), then from ``num2words`` when it
has the language. A number neither covers, or one with a decimal or group separator
(whose reading depends on the language's conventions), is not guessed: the caller
rejects the transcript with :func:`missing_sentence`, which names the override. So a
non-English transcript never gets English number words.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping

__all__ = ["NumberReader", "missing_sentence", "num2words_language"]

_NUMBER = re.compile(r"[0-9]+(?:[.,][0-9]+)*")


@functools.cache
def _num2words_languages() -> frozenset[str]:
    from num2words import CONVERTER_CLASSES  # 30 ms; only for transcripts with digits

    return frozenset(CONVERTER_CLASSES)


def num2words_language(language: str) -> str | None:
    """num2words' code for a BCP-47 tag (``es-CO`` -> ``es_CO``, ``sw`` -> None).

    Examples
    --------
    >>> num2words_language("es-CO"), num2words_language("es-MX"), num2words_language("sw")
    ('es_CO', 'es', None)
    """
    parts = language.split("-")
    for code in (f"{parts[0].lower()}_{parts[1].upper()}" if len(parts) > 1 else "", parts[0].lower()):
        if code and code in _num2words_languages():
            return code
    return None


class NumberReader:
    """Reads the numbers of one non-English language; remembers what it could not read.

    Parameters
    ----------
    language : str
        BCP-47 tag.
    number_words : mapping
        Digits (``"12"``) to words, consulted before num2words.

    Examples
    --------
    >>> NumberReader("es", {}).read("Tengo 1984 libros")
    'Tengo mil novecientos ochenta y cuatro libros'
    >>> r = NumberReader("sw", {"12": "kumi na mbili"})
    >>> r.read("ng'ombe 12 na 7"), r.missing
    ("ng'ombe kumi na mbili na 7", ['7'])
    """

    def __init__(self, language: str, number_words: Mapping[str, str]) -> None:
        self.language = language
        self.number_words = dict(number_words)
        self.missing: list[str] = []
        self._code: str | None | bool = False  # False: not looked up yet

    def _word(self, digits: str) -> str | None:
        if digits in self.number_words:
            return self.number_words[digits]
        if not digits.isdigit():
            return None
        if self._code is False:
            self._code = num2words_language(self.language)
        if self._code is None:
            return None
        from num2words import num2words

        return str(num2words(int(digits), lang=self._code))

    def read(self, text: str) -> str:
        """``text`` with every number it can read spelled out; see ``missing`` for the rest."""
        self.missing = []

        def spell(m: re.Match[str]) -> str:
            words = self._word(m.group())
            if words is None:
                self.missing.append(m.group())
                return m.group()
            return f" {words} "

        if not any(ch.isdigit() for ch in text):
            return text
        return re.sub(r"\s+", " ", _NUMBER.sub(spell, text)).strip()


def missing_sentence(source: str, numbers: list[str], language: str) -> str:
    """The reject sentence for numbers no reader covers (names the override)."""
    shown = ", ".join(repr(n) for n in dict.fromkeys(numbers))
    why = ("num2words has no number names for this language" if num2words_language(language) is None
           else "decimal and grouped numbers are read out for English only")
    return (f"{source}: transcript has numbers written in digits ({shown}) that cannot be read out in "
            f"language {language!r}: {why}; expected the number in words, or its words in text.number_words "
            f"(e.g. {language.split('-')[0]} = {{ \"{numbers[0]}\" = \"...\" }})")
