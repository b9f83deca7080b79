"""The text stage's languages: each transcript's language, and the tools that follow it.

A transcript's language is ``text.language``, or the cell of the metadata table's column
``ingest.metadata_language_column`` on the row the transcript came from (an empty cell
means ``text.language``). Every language gets its own :class:`LanguageTools`: the
pronouncer (``text.backend``; ``auto`` is the english backend for English and the rules
backend for any other language), the normalisation options (the built-in abbreviation
list and spelled initialisms for English only, ``text.abbreviations`` for every language,
``text.language_abbreviations`` for its own) and, for a language other than English,
the number reader of :mod:`pipeline.text.numbers` (never English number words).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pyarrow as pa

from pipeline.core.columns import counted_items, list_lengths, row_members
from pipeline.core.config import Config, TextConfig
from pipeline.core.errors import ParameterError
from pipeline.stages.tags import (
    LANGUAGE_TAG,
    canonical_tag,
    file_languages,
    language_cells,
    metadata_table,
)
from pipeline.text.numbers import NumberReader, missing_sentence
from pipeline.text.pronounce import Pronouncer
from pipeline.text.rules import RulePhones

__all__ = ["LANGUAGE_TAG", "LanguageTools", "Toolbox", "canonical_tag", "file_languages", "language_cells",
           "metadata_table"]


def rule_phones(cfg: TextConfig) -> RulePhones | None:
    """The rule engine of ``cfg.language`` when its backend is rules (``text.engines`` or the default)."""
    if cfg.resolved_backend != "rules":
        return None
    engines = dict(cfg.engines)
    engine = engines.get(cfg.language, engines.get(cfg.language.split("-")[0], ""))
    return RulePhones(cfg.language, engine, keep_stress=cfg.keep_stress, keep_tone=cfg.keep_tone)


@dataclass
class LanguageTools:
    """What one language's transcripts go through."""

    language: str
    backend: str
    pronouncer: Pronouncer
    options: dict[str, Any]
    numbers: NumberReader | None
    cfg: TextConfig

    def read_numbers(self, source: str, transcript: str) -> tuple[str, tuple[str, str] | None]:
        """The transcript with its numbers in words, or the reject when some cannot be read."""
        if self.numbers is None or not self.cfg.verbalise_numbers:
            return transcript, None
        text = self.numbers.read(transcript)
        if self.numbers.missing:
            return transcript, ("unreadable_number", missing_sentence(source, self.numbers.missing, self.language))
        return text, None

    def invalid_phones(self, words: list[str]) -> str:
        """Why these words got no phones ("" when nothing was said)."""
        return "; ".join(self.pronouncer.problems[w] for w in words if w in self.pronouncer.problems)


class Toolbox:
    """LanguageTools per language tag, built on first use.

    ``make_pronouncer(cfg)`` builds the english, lexicon or graphemes pronouncer for a
    TextConfig (the text stage's ``build_pronouncer``); ``make_options(cfg, pronouncer)``
    the normalisation options.
    """

    def __init__(self, config: Config, *, make_pronouncer: Any, make_options: Any) -> None:
        self.config = config
        self.make_pronouncer = make_pronouncer
        self.make_options = make_options
        self.tools: dict[str, LanguageTools] = {}
        self.failures: dict[str, str] = {}
        self._by_cell: dict[str, LanguageTools] = {}  # the tag as written -> its tools

    def get(self, tag: str) -> LanguageTools:
        """The tools for ``tag``; ParameterError naming the fix when no engine covers it."""
        known = self._by_cell.get(tag)
        if known is not None:
            return known
        if not LANGUAGE_TAG.match(tag):
            raise ParameterError(f"language {tag!r} is not a BCP-47 tag such as 'en', 'sw' or 'es-CO'")
        cell, tag = tag, canonical_tag(tag)
        if tag in self.failures:
            raise ParameterError(self.failures[tag])
        if tag not in self.tools:
            try:
                self.tools[tag] = self._build(tag)
            except ParameterError as exc:
                self.failures[tag] = str(exc)
                raise
        self._by_cell[cell] = self.tools[tag]
        return self.tools[tag]

    def _build(self, tag: str) -> LanguageTools:
        cfg = replace(self.config.text, language=tag)
        backend = cfg.resolved_backend
        english = cfg.english
        pronouncer = self.make_pronouncer(cfg)
        options = self.make_options(replace(cfg, backend=backend), pronouncer)
        if not english:
            options.update(verbalise_numbers=False, spell_initialisms=False, is_known=None,
                           abbreviations=dict(cfg.abbreviations))
        own = {k: dict(v) for k, v in cfg.language_abbreviations}
        options["abbreviations"] = {**options["abbreviations"], **own.get(tag, own.get(tag.split("-")[0], {}))}
        tables = {k: dict(v) for k, v in cfg.number_words}
        numbers = None if english else NumberReader(tag, tables.get(tag, tables.get(tag.split("-")[0], {})))
        return LanguageTools(tag, backend, pronouncer, options, numbers, replace(cfg, backend=backend))


def process_in_language(source: str, transcript: str, language: str, *, toolbox: Toolbox,
                        cfg: TextConfig) -> Any:
    """``text.process_transcript`` with the tools of the transcript's language; the row
    gains its ``language``, and the rejects of this module say what the language lacks."""
    from pipeline.stages.text import TranscriptOutcome, process_transcript

    try:
        tools = toolbox.get(language)
    except ParameterError as exc:
        return TranscriptOutcome(rejected=("unpronounceable", f"{source}: {exc}"), language=language)
    text, problem = tools.read_numbers(source, transcript)
    if problem is not None:
        return TranscriptOutcome(rejected=problem, language=tools.language)
    outcome = process_transcript(source, text, pronouncer=tools.pronouncer, options=tools.options, cfg=tools.cfg)
    outcome.language = tools.language
    if outcome.row is not None:
        outcome.row["transcript"] = transcript
        outcome.row["language"] = tools.language
    elif outcome.rejected and outcome.rejected[0] == "unpronounceable":
        why = tools.invalid_phones([w for w in tools.pronouncer.problems if repr(w) in outcome.rejected[1]])
        if why:
            outcome.rejected = ("unpronounceable", f"{outcome.rejected[1]}; {why}")
    return outcome


def language_summary(table: pa.Table, languages: Mapping[str, int], toolbox: Toolbox) -> dict[str, Any]:
    """Per language: transcripts, accepted, word tokens, OOV tokens and rate, backend, engine
    (``table``: the accepted rows; ``languages``: how many transcripts have each language cell)."""
    from collections import Counter

    from pipeline.text.guard import oov_rate

    # Each distinct cell canonicalised once, not once per transcript.
    transcripts: Counter[str] = Counter()
    for cell, count in languages.items():
        transcripts[canonical_tag(cell) if LANGUAGE_TAG.match(cell) else cell] += count
    words = table.column("words").combine_chunks()
    rows, flat = counted_items(words)
    oov = row_members(rows, flat, table.column("oov_words").combine_chunks())
    row_language = np.asarray(table.column("language").to_numpy(zero_copy_only=False), dtype=object)
    tokens = list_lengths(words)
    out: dict[str, dict[str, Any]] = {}
    for tag in sorted(transcripts):
        tools = toolbox.tools.get(tag)
        mine = row_language == tag
        n_tokens, n_oov = int(tokens[mine].sum()), int(oov[mine[rows]].sum()) if len(rows) else 0
        rate = oov_rate(n_tokens, n_oov)
        out[tag] = {
            "transcripts": transcripts[tag], "accepted": int(mine.sum()),
            "backend": tools.backend if tools else None,
            "engine": tools.pronouncer.rules.engine.label if tools and tools.pronouncer.rules else None,
            "word_tokens": n_tokens, "oov_word_tokens": n_oov,
            "oov_rate": None if rate is None else round(rate, 4),
        }
    return {"languages": out}


def warn_wrong_language(languages: dict[str, dict[str, Any]], log: Any) -> list[str]:
    """Log a loud warning for each language whose OOV share says it is not that language."""
    from pipeline.text.guard import wrong_language_sentence

    sentences = []
    for tag, info in languages.items():
        if info["backend"] in ("english", "lexicon"):
            sentence = wrong_language_sentence(tag, info["backend"], info["word_tokens"], info["oov_word_tokens"])
            if sentence:
                log.warning("text: WARNING: %s", sentence)
                sentences.append(sentence)
    return sentences


def language_metadata(toolbox: Toolbox) -> dict[str, str]:
    """Manifest metadata: which engine served each language (no run-dependent values)."""
    meta = {"text.languages": ",".join(sorted(toolbox.tools))}
    for tag, tools in sorted(toolbox.tools.items()):
        if tools.pronouncer.rules is not None:
            meta[f"g2p.{tag}"] = "; ".join(f"{k}={v}" for k, v in sorted(tools.pronouncer.provenance().items()))
    return meta
