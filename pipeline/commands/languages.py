"""The languages of a build: OOV rate per language (validate, report) and ``loam languages``.

The OOV rate of a language is the share of its word tokens that the dictionary of a
dictionary backend (english: CMUdict; lexicon: the user's lexicon) lacks; the rules and
graphemes backends have no dictionary and no rate. Above
:data:`pipeline.text.guard.WRONG_LANGUAGE_OOV_SHARE` the transcripts do not look like the
language they are labelled with, and ``loam validate`` warns.
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa

from pipeline.core.manifest import Problem
from pipeline.text.guard import WRONG_LANGUAGE_OOV_SHARE, oov_rate, wrong_language_sentence

__all__ = ["check_language_oov", "language_rates", "languages_line", "languages_listing"]

_DICTIONARY_SOURCES = {"cmudict": "english", "neural": "english", "lexicon": "lexicon"}


def language_rates(text: pa.Table | None) -> dict[str, dict[str, Any]]:
    """Per language of ``stages/text.parquet``: clips, word tokens, the sources of their
    pronunciations, and the OOV rate over the tokens a dictionary backend looked up.

    Examples
    --------
    >>> t = pa.table({"language": ["en", "sw"], "words": [["a", "zorb"], ["chai"]], "oov_words": [["zorb"], []],
    ...               "word_backends": [["cmudict", "neural"], ["rules"]]})
    >>> rates = language_rates(t)
    >>> rates["en"]["oov_rate"], rates["sw"]["oov_rate"], rates["sw"]["sources"]
    (0.5, None, ['rules'])
    """
    if text is None or "language" not in text.column_names:
        return {}
    out: dict[str, dict[str, Any]] = {}
    sources: dict[str, set[str]] = {}
    for row in text.select(["language", "words", "oov_words", "word_backends"]).to_pylist():
        info = out.setdefault(row["language"], {"clips": 0, "word_tokens": 0, "dictionary_word_tokens": 0,
                                                "oov_word_tokens": 0, "backend": None})
        info["clips"] += 1
        info["word_tokens"] += len(row["words"])
        oov = set(row["oov_words"])
        # A row whose lists disagree in length is counted as far as they agree: this
        # measure reports, other checks judge the rows.
        for word, source in zip(row["words"], row["word_backends"], strict=False):
            sources.setdefault(row["language"], set()).add(source)
            if source in _DICTIONARY_SOURCES:
                info["backend"] = info["backend"] or _DICTIONARY_SOURCES[source]
                info["dictionary_word_tokens"] += 1
                info["oov_word_tokens"] += word in oov
    for tag, info in out.items():
        rate = oov_rate(info["dictionary_word_tokens"], info["oov_word_tokens"])
        info["oov_rate"] = None if rate is None else round(rate, 4)
        info["sources"] = sorted(sources.get(tag, ()))
    return dict(sorted(out.items()))


def languages_line(rates: dict[str, dict[str, Any]]) -> str:
    """One line for ``loam validate``: each language's clips and OOV rate.

    Examples
    --------
    >>> print(languages_line({"en": {"clips": 16, "dictionary_word_tokens": 155, "oov_rate": 0.0129},
    ...                       "sw": {"clips": 3, "dictionary_word_tokens": 0, "oov_rate": None}}))
    languages: en 16 clips, OOV 1.3 % of 155 word tokens; sw 3 clips, no dictionary (no OOV rate)
    """
    parts = []
    for tag, x in rates.items():
        rate = ("no dictionary (no OOV rate)" if x["oov_rate"] is None
                else f"OOV {100 * x['oov_rate']:.1f} % of {x['dictionary_word_tokens']} word tokens")
        parts.append(f"{tag} {x['clips']} clips, {rate}")
    return "languages: " + "; ".join(parts)


def check_language_oov(text: pa.Table | None) -> list[Problem]:
    """A warning per language whose OOV share is above the threshold."""
    problems = []
    for tag, info in language_rates(text).items():
        sentence = wrong_language_sentence(tag, info["backend"] or "dictionary", info["dictionary_word_tokens"],
                                           info["oov_word_tokens"])
        if sentence:
            problems.append(Problem("warning", "language_oov", "stages/text.parquet", None, "oov_words", sentence,
                                    f"at most {100 * WRONG_LANGUAGE_OOV_SHARE:.0f} % out-of-vocabulary word tokens"))
    return problems


def languages_listing() -> str:
    """What ``loam languages`` prints: each engine's languages on this install."""
    from pipeline.text.engines import EPITRAN_CODES, engine_version, epitran_codes, espeak_voices

    voices, codes = espeak_voices(), epitran_codes()
    defaults = ", ".join(f"{tag} -> epitran:{code}" for tag, code in sorted(EPITRAN_CODES.items()) if code in codes)
    return "\n".join([
        "english  en (CMUdict + g2p-en; the default for English)",
        f"espeak   {engine_version('espeak')}: {len(voices)} voices (text.engines value espeak:<voice>)",
        *_wrapped(voices),
        f"epitran  {engine_version('epitran')}: {len(codes)} rule sets (text.engines value epitran:<code>)",
        *_wrapped(codes),
        f"default engine for a language: epitran for {defaults}; espeak-ng where it has a voice; "
        "otherwise set text.engines",
    ])


def _wrapped(names: tuple[str, ...], width: int = 96) -> list[str]:
    lines, line = [], "        "
    for name in names:
        if len(line) + len(name) + 1 > width:
            lines.append(line.rstrip())
            line = "        "
        line += name + " "
    return [*lines, line.rstrip()] if line.strip() else lines
