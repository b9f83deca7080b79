"""Transcript normalisation (pipeline/text/normalise.py).

Number words are checked against the inflect library (the reference the module
builds on) for random integers; the worked examples for years, money, times and
ordinals are written from common English practice, no source, and marked so.
"""

from __future__ import annotations

import random
import re
import subprocess
import sys
import unicodedata

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.core.errors import ParameterError
from pipeline.text.normalise import (
    MAX_CARDINAL_DIGITS,
    Normalised,
    _classify,
    _finish,
    _finish_general,
    fold,
    load_abbreviations,
    normalise,
    split_words,
    verbalise,
)
from tests.conftest import examples

ABBREVIATIONS = load_abbreviations()


def english(text: str, **kwargs: object) -> str:
    options: dict = {"abbreviations": ABBREVIATIONS, "spell_initialisms": True}
    options.update(kwargs)
    return normalise(text, **options).text


def inflect_convention(words: str) -> str:
    """Our stated convention applied to inflect's output: commas dropped, hyphens as spaces, "and" kept."""
    return " ".join(words.replace(",", " ").replace("-", " ").split())


# --- numbers against inflect ------------------------------------------------------------


@pytest.fixture(scope="module")
def engine():
    import inflect

    return inflect.engine()


def random_integers(seed: int, count: int) -> list[int]:
    rng = random.Random(seed)
    return [rng.randrange(10 ** rng.randint(1, MAX_CARDINAL_DIGITS)) for _ in range(count)]


def test_integers_agree_with_inflect(engine) -> None:
    # Reference: inflect.engine().number_to_words. Plain four-digit numbers from 1000
    # to 2099 are read as years by our convention, so they are checked below instead.
    checked = 0
    for n in random_integers(seed=20240611, count=600):
        if 1000 <= n <= 2099:
            continue
        assert normalise(str(n)).text == inflect_convention(engine.number_to_words(n)), n
        checked += 1
    assert checked > 500


def test_integers_with_thousands_commas_agree_with_inflect(engine) -> None:
    # Reference: inflect; with a comma a number is never a year ("1,998").
    for n in random_integers(seed=7, count=300) + [1000, 1998, 2099]:
        assert normalise(f"{n:,}").text == inflect_convention(engine.number_to_words(n)), n


def test_ordinals_agree_with_inflect(engine) -> None:
    # Reference: inflect's ordinal() of number_to_words, under our convention.
    rng = random.Random(3)
    for n in [rng.randrange(1, 10**6) for _ in range(200)]:
        suffix = engine.ordinal(n)[-2:]
        assert normalise(f"{n}{suffix}").text == inflect_convention(engine.ordinal(engine.number_to_words(n))), n


def test_decimals_read_digit_by_digit_after_point(engine) -> None:
    # Reference: inflect for the whole part; the digits after "point" one by one.
    rng = random.Random(11)
    for _ in range(100):
        whole, frac = rng.randrange(10**6), "".join(rng.choice("0123456789") for _ in range(rng.randint(1, 4)))
        expected = inflect_convention(engine.number_to_words(whole)) + " point " + " ".join(
            engine.number_to_words(int(d)) for d in frac)
        assert normalise(f"{whole:,}.{frac}").text == expected


def test_long_numbers_and_leading_zeros_read_digit_by_digit() -> None:
    # Our convention (CMUdict has no word past "trillion"): more than 15 digits, or a leading 0.
    assert normalise("007").text == "zero zero seven"
    assert normalise("1" * (MAX_CARDINAL_DIGITS + 1)).text == " ".join(["one"] * (MAX_CARDINAL_DIGITS + 1))


# --- worked examples (common practice, no source) --------------------------------------


@pytest.mark.parametrize(("text", "expected"), [
    # Years, read in pairs of digits (common practice, no source).
    ("1998", "nineteen ninety eight"),
    ("1905", "nineteen oh five"),
    ("1900", "nineteen hundred"),
    ("2000", "two thousand"),
    ("2005", "two thousand and five"),
    ("2019", "twenty nineteen"),
    ("the 1990s", "the nineteen nineties"),
    ("the 80s", "the eighties"),
    # Money (common practice, no source).
    ("$5.20", "five dollars and twenty cents"),
    ("£3", "three pounds"),
    ("$1", "one dollar"),
    ("$0.50", "fifty cents"),
    ("€1.01", "one euro and one cent"),
    ("£2.50", "two pounds and fifty pence"),
    ("50¢", "fifty cents"),
    ("$5 million", "five million dollars"),
    ("$2.5bn", "two point five billion dollars"),
    # Percentages (common practice, no source).
    ("50%", "fifty percent"),
    ("3.5 %", "three point five percent"),
    # Clock times (common practice, no source).
    ("10:30", "ten thirty"),
    ("10:05", "ten oh five"),
    ("10:00", "ten o'clock"),
    ("9:05pm", "nine oh five p m"),
    ("7 a.m.", "seven a m"),
    # Ordinals (common practice, no source).
    ("3rd", "third"),
    ("21st", "twenty first"),
    ("the 100th", "the one hundredth"),
    # Ranges, signs, decimals, hyphenated numbers (common practice, no source).
    ("5-10", "five to ten"),
    ("1990-1995", "nineteen ninety to nineteen ninety five"),
    ("-3", "minus three"),
    ("3.14", "three point one four"),
    (".5", "point five"),
    ("route-66", "route sixty six"),
    ("a 19-year-old", "a nineteen year old"),
])
def test_worked_examples(text: str, expected: str) -> None:
    assert english(text) == expected


def test_non_ascii_digits_are_read_as_numbers() -> None:
    # Unicode: U+0663 U+0664 U+0665 are ARABIC-INDIC DIGIT THREE, FOUR, FIVE.
    assert normalise("\u0663\u0664\u0665").text == normalise("345").text == "three hundred and forty five"


def test_verbalise_off_keeps_digits_as_words() -> None:
    assert normalise("room 42, floor 3", verbalise_numbers=False) == Normalised("room 42 floor 3", ("room", "42", "floor", "3"))


def test_text_without_digits_does_not_import_inflect() -> None:
    code = (
        "import sys; from pipeline.text.normalise import normalise; "
        "normalise('Dr. Okapi walks home'); assert 'inflect' not in sys.modules; "
        "normalise('at 5'); assert 'inflect' in sys.modules"
    )
    subprocess.run([sys.executable, "-c", code], check=True)


# --- abbreviations and initialisms -------------------------------------------------------


def test_builtin_abbreviations_and_their_boundaries() -> None:
    assert english("Dr. Okapi vs. Mr. Tamsel, etc.") == "doctor okapi versus mister tamsel et cetera"
    # "co." must not match the end of "taco." and "dr." needs its period.
    assert english("one taco. dr") == "one taco dr"
    assert english("R&D and 2+2=4") == "r and d and two plus two equals four"


def test_config_abbreviations_extend_the_table() -> None:
    extra = {**ABBREVIATIONS, "qty": "quantity", "dr.": "drive"}
    assert english("qty: 3 on Fennel Dr.", abbreviations=extra) == "quantity three on fennel drive"


def test_initialisms_spelled_unless_known() -> None:
    known = {"nasa"}.__contains__
    assert english("the FBX and NASA", is_known=known) == "the f b x and nasa"
    assert english("the U.S.A. at 5 p.m.") == "the u s a at five p m"
    # Six capitals is a word, not an initialism; mixed case is left alone.
    assert english("SHOUTING PhD") == "shouting phd"


def test_no_initialisms_without_spell_initialisms() -> None:
    assert normalise("FBX").text == "fbx"


# --- characters ---------------------------------------------------------------------------


def test_characters_quotes_dashes_controls_and_symbols() -> None:
    # Unicode: U+201C/U+201D double quotes, U+2014 em dash, U+200D ZWJ, U+0007 BEL.
    text = "\u201cHe\u2019s here\u201d \u2014 \u0007said \U0001F642 the o\u200dwl \U0001F469\u200d\U0001F467"
    assert normalise(text).text == "he's here said the owl"
    assert normalise(text, punctuation="keep").text == "\"he's here\" - said the owl"


def test_nfkc_casefold_and_marks() -> None:
    # NFKC maps fullwidth letters to ASCII; casefold maps "ß" to "ss".
    assert normalise("\uff21\uff22\uff23 Stra\u00dfe").text == "abc strasse"
    # A decomposed e + U+0301 becomes the precomposed U+00E9; a mark with no letter goes.
    assert normalise("cafe\u0301 \u0301x").words == ("caf\u00e9", "x")
    # Right-to-left text and Devanagari vowel signs (category Mc/Mn) stay inside words.
    assert normalise("\u0645\u0631\u062d\u0628\u0627 \u0915\u093f\u0924\u093e\u092c").words == (
        "\u0645\u0631\u062d\u0628\u0627", "\u0915\u093f\u0924\u093e\u092c")


def test_apostrophes_inside_words_only() -> None:
    assert normalise("'Tis the dogs' rock'n'roll").words == ("tis", "the", "dogs", "rock'n'roll")
    assert normalise("don't 'quote'", punctuation="keep").text == "don't 'quote'"


def test_bad_punctuation_mode() -> None:
    with pytest.raises(ParameterError, match="punctuation='drop'"):
        normalise("x", punctuation="drop")


def test_fold_matches_normalised_words() -> None:
    assert fold("Ka\u0301LO") == normalise("Ka\u0301LO").text == "k\u00e1lo"


# --- properties (hypothesis) ---------------------------------------------------------------

# Every code point, surrogates and controls included.
ANY_CHAR = st.characters(codec=None, exclude_categories=())
TRICKY = st.sampled_from([
    "$", "£", "5", "10:30", "1998", "%", "-", ".", ",", "'", "a.m.", "Dr.", "U.S.", "FBI", "3rd",
    "1,000", "&", "\u0301", "\u200d", "\u200f", "\U0001F642", "\u0130", "\u00df", "\ufb03",
    "\ud800", "\u01c5", "\u02bc", "\u1100\u1161", "\u0645\u0631", "\u0915\u093f", "\u00bd", " ",
])
TEXTS = st.lists(st.one_of(st.text(ANY_CHAR, max_size=6), TRICKY), max_size=25).map("".join)
OPTIONS = st.fixed_dictionaries({
    "punctuation": st.sampled_from(["strip", "keep"]),
    "verbalise_numbers": st.booleans(),
    "spell_initialisms": st.booleans(),
    "abbreviations": st.sampled_from([None, ABBREVIATIONS]),
})
PROPERTY = settings(max_examples=examples(300), deadline=None, suppress_health_check=[HealthCheck.too_slow])


def check(result: Normalised, options: dict) -> None:
    result.text.encode("utf-8")  # no lone surrogate survives
    assert result.text == result.text.strip() and "  " not in result.text
    assert result.words == split_words(result.text)
    if options["punctuation"] == "strip":
        assert result.text == " ".join(result.words)
    assert not any(unicodedata.category(ch)[0] in "CS" for ch in result.text)


@PROPERTY
@given(TEXTS, OPTIONS)
def test_idempotent_on_arbitrary_unicode(text: str, options: dict) -> None:
    once = normalise(text, **options)
    check(once, options)
    assert normalise(once.text, **options) == once


@settings(max_examples=examples(15), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.text(ANY_CHAR, min_size=1, max_size=40), OPTIONS)
def test_ten_thousand_characters(sample: str, options: dict) -> None:
    text = (sample * (10_000 // len(sample) + 1))[:10_000]
    once = normalise(text, **options)
    check(once, options)
    assert normalise(once.text, **options) == once


def test_verbalise_leaves_digit_free_text_alone() -> None:
    assert verbalise("no digits here, just words.") == "no digits here, just words."
    assert not re.search(r"[0-9]", english("a 10,000-character line has 1 or 2 digits: 3.5% at 10:30"))


@PROPERTY
@given(st.text(st.characters(max_codepoint=127), max_size=40), st.booleans())
def test_ascii_fast_path_agrees_with_the_general_rules(text: str, keep: bool) -> None:
    # Reference: the general per-character path of the same module (NFKC, casefold,
    # Unicode categories), which the ASCII translation tables must reproduce.
    assert _finish(text, keep_punctuation=keep) == _finish_general(text, keep_punctuation=keep)
    assert split_words(text) == tuple(_classify(text, keep_punctuation=False).split())


NUMBER_SENTENCES = [
    "The ferry leaves at 10:30.", "Pier 7 lost 1,234,567 shells in 1999.", "It is the 21st of 3 tides.",
    "Tickets cost $4.50 or 12%.", "From 1990-2005 and 3.14159 miles.", "Route 66, the 2nd-to-last of 101.",
    "-42 degrees and 0.5 m", "In 2026 the 1,000th boat sailed; 15 knots.",
]


def test_words_equal_an_ordinarily_imported_inflect() -> None:
    # Reference: inflect imported as usual, with typeguard's checks, in its own process;
    # the module imports it with those checks skipped. Both must give the same words.
    script = (
        "import json\n"
        "{pre}"
        "from pipeline.text.normalise import normalise\n"
        f"print(json.dumps([normalise(t).text for t in {NUMBER_SENTENCES!r}]))\n"
    )
    outputs = []
    for pre in ("import inflect\n", ""):
        done = subprocess.run([sys.executable, "-c", script.format(pre=pre)], capture_output=True, text=True,
                              check=True)
        outputs.append(done.stdout.splitlines()[0])
    assert outputs[0] == outputs[1]
    assert "one thousand" in outputs[1] and "ten thirty" in outputs[1]
