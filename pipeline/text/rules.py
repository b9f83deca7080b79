"""The rules backend: a word's IPA phones from a rule engine, checked against the feature table.

:mod:`pipeline.text.engines` runs the engine (espeak-ng or epitran) and
:mod:`pipeline.text.ipa` turns its output into phones and checks each one. A word whose
output holds a symbol the table lacks gets no phones, and the sentence saying why is
kept for the reject: an invalid symbol is never passed on.
"""

from __future__ import annotations

from pipeline.text.engines import Engine
from pipeline.text.ipa import InvalidPhone, segment

__all__ = ["RulePhones"]

_NO_DIGITS = str.maketrans("", "", "0123456789")


class RulePhones:
    """IPA phones for the words of one language.

    Parameters
    ----------
    language : str
        BCP-47 tag.
    engine : str
        ``""`` for the language's default engine, or an engine name (see :func:`pipeline.text.engines.resolve`).
    keep_stress, keep_tone : bool
        Keep stress marks, tone marks on their segments.

    Examples
    --------
    >>> RulePhones("sw").phones("ng'ombe")
    ('ŋ', 'o', 'm', 'b', 'e')
    >>> RulePhones("yo", keep_tone=False).phones("ọjọ́")
    ('ɔ', 'd͡ʒ', 'ɔ')
    """

    def __init__(self, language: str, engine: str = "", *, keep_stress: bool = False, keep_tone: bool = True) -> None:
        self.engine = Engine(language, engine)
        self.keep_stress = keep_stress
        self.keep_tone = keep_tone
        self.problems: dict[str, str] = {}

    def phones(self, word: str) -> tuple[str, ...]:
        """The word's phones; ``()`` when the engine gave none or an invalid symbol (see ``problems``).

        espeak-ng writes the tones of tone languages (Thai, Mandarin, Cantonese,
        Vietnamese) as digits after the vowel, which are not IPA; with ``keep_tone=False``
        they are dropped, otherwise the word is rejected with a sentence that says so.
        """
        units = self.engine.units(word)
        if self.engine.name == "espeak" and not self.keep_tone:
            units = [u.translate(_NO_DIGITS) for u in units]
        try:
            return segment(units, keep_stress=self.keep_stress, keep_tone=self.keep_tone)
        except InvalidPhone as exc:
            hint = ""
            if self.engine.name == "espeak" and any(ch.isdigit() for u in units for ch in u):
                hint = ("; espeak-ng writes this language's tones as digits, which are not IPA: set "
                        "text.keep_tone = false to drop them, or choose another engine in text.engines")
            self.problems[word] = f"{self.engine.label} gave {' '.join(units)!r}: {exc}{hint}"
            return ()

    def provenance(self) -> dict[str, str]:
        from pipeline.text.engines import engine_version

        return {"g2p.engine": f"{self.engine.label} ({engine_version(self.engine.name)})",
                "g2p.feature_table": "panphon ipa_all.csv",
                "g2p.tone": "kept" if self.keep_tone else "stripped"}
