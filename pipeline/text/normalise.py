"""Transcript normalisation: one canonical spelling per transcript, pure and deterministic.

``normalise`` runs these steps in order:

1. Characters. Control, format (zero-width joiners, bidi marks, soft hyphens),
   private-use, unassigned and surrogate code points are removed; whitespace
   controls and space separators become spaces. NFKC. Curly quotes, guillemets
   and primes become ``'`` or ``"``; every dash and minus variant becomes ``-``;
   every decimal digit becomes its ASCII digit.
2. English verbalisation when asked: money, clock times, percentages, ordinals,
   decades, ranges, negative numbers, decimals, years and cardinals. ``inflect``
   supplies the number words and is imported only when a transcript has a digit.
3. Abbreviations from a table (``load_abbreviations`` plus the caller's own).
4. Initialisms, when asked: dotted ones (``U.S.A.``) and all-caps tokens of 2-5
   letters the caller's dictionary does not know are spelled letter by letter.
5. Case folding (``str.casefold`` and NFKC until stable). Then each character
   is classed: letters, digits and the combining marks that follow them make
   words, and an apostrophe between word characters stays in its word.
   Punctuation is kept or becomes a space. Everything else becomes a space:
   symbols, emoji, stray combining marks, and the punctuation signs that are
   read as nothing (``# % & * @ / \\ § ¶ † ‡ • ‰ _``, unless step 2 or 3
   turned them into words).

Emoji and other symbols are dropped on purpose. They carry no pronunciation,
and reading them aloud ("smiling face") would put words in the transcript that
the speaker never said.

Conventions for number words. Commas are removed from inflect's output and its
hyphens become spaces, but its British "and" stays ("one hundred and five").
Four-digit integers from 1000 to 2099 written without a comma are read as years
("1998" is "nineteen ninety eight", "2005" is "two thousand and five"). Integers
of more than 15 digits, or with a leading zero, are read digit by digit.
"""

from __future__ import annotations

import functools
import re
import unicodedata
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.core.errors import ParameterError

PUNCTUATION_MODES = ("strip", "keep")
ABBREVIATIONS_FILE = Path(__file__).resolve().parent.parent / "data" / "abbreviations.tsv"

# CMUdict has no words past "trillion", so longer numbers are read digit by digit.
MAX_CARDINAL_DIGITS = 15
# The character steps reach a fixed point in one or two rounds; the bound only
# guards against a Unicode corner that would otherwise loop.
_MAX_ROUNDS = 4


@dataclass(frozen=True)
class Normalised:
    """A normalised transcript: the text and the words in it, in order."""

    text: str
    words: tuple[str, ...]


# --- step 1: characters -----------------------------------------------------------

_REPLACEMENTS = {
    **dict.fromkeys("\u2018\u2019\u201a\u201b\u2032\u2035\u2039\u203a", "'"),
    **dict.fromkeys("\u201c\u201d\u201e\u201f\u00ab\u00bb\u2033\u2036\u301d\u301e\u301f", '"'),
    **dict.fromkeys("\u2010\u2011\u2012\u2013\u2014\u2015\u2212\u2043\ufe58\ufe63\uff0d", "-"),
}
_WHITESPACE_CONTROLS = frozenset("\t\n\r\x0b\x0c\x1c\x1d\x1e\x1f\x85")


@functools.lru_cache(maxsize=1 << 16)
def _map_char(ch: str) -> str:
    if ch in _REPLACEMENTS:
        return _REPLACEMENTS[ch]
    if ch in _WHITESPACE_CONTROLS:
        return " "
    category = unicodedata.category(ch)
    if category[0] == "Z":
        return " "
    if category[0] == "C":
        return ""
    if category == "Nd" and not "0" <= ch <= "9":
        return str(unicodedata.decimal(ch))
    return ch


# Character classes, used for word boundaries (steps 2 to 4) and by step 5.
_WORD, _MARK, _APOSTROPHE, _SPACE, _PUNCT, _OTHER = range(6)
# Punctuation by Unicode category, but read as nothing: treated like symbols.
_SILENT_PUNCTUATION = frozenset("#%&*@/\\§¶†‡•‰‱※⁂_")


@functools.lru_cache(maxsize=1 << 16)
def _kind(ch: str) -> int:
    category = unicodedata.category(ch)
    if category[0] == "L" or category == "Nd":
        return _WORD
    if category[0] == "M":
        return _MARK
    if ch == "'":
        return _APOSTROPHE
    if ch == " ":
        return _SPACE
    if category[0] == "P" and ch not in _SILENT_PUNCTUATION:
        return _PUNCT
    return _OTHER


# ASCII fast paths (most transcripts): NFKC is the identity on ASCII and casefold
# is str.lower, so a translation table built from the general per-character rules
# gives the same result several times faster; a test compares the two paths.
_ASCII_MAP = {i: _map_char(chr(i)) for i in range(128)}
_ASCII_FOLD = {i: _map_char(chr(i).lower()) for i in range(128)}
_ASCII_KEEP = {i: " " if _kind(chr(i)) == _OTHER else chr(i) for i in range(128)}
_ASCII_WORD = re.compile(r"[A-Za-z0-9]+(?:'[A-Za-z0-9]+)*")


def _canon(text: str) -> str:
    """Step 1 without case folding, repeated until NFKC and the mapping agree."""
    if text.isascii():
        return text.translate(_ASCII_MAP)
    for _ in range(_MAX_ROUNDS):
        mapped = unicodedata.normalize("NFKC", "".join(map(_map_char, text)))
        mapped = "".join(map(_map_char, mapped))
        if mapped == text:
            break
        text = mapped
    return text


def fold(text: str) -> str:
    """Character-level canonical form: step 1 plus case folding, nothing else.

    Lexicon headwords and alphabets go through this so they compare equal to
    normalised words.

    Parameters
    ----------
    text : str
        Any string.

    Returns
    -------
    str
        ``text`` with controls removed, NFKC applied, quotes, dashes and digits
        mapped, and case folded.

    Examples
    --------
    >>> fold("Stra\\u00dfe \\u201cQuoted\\u201d")
    'strasse "quoted"'
    """
    for _ in range(_MAX_ROUNDS):
        folded = _canon(text.casefold())
        if folded == text:
            break
        text = folded
    return text


# --- word boundaries (steps 2 to 4) ----------------------------------------------------


def _attached(text: str, i: int) -> bool:
    """Whether ``text[i]`` is part of a word: a letter or digit, or a mark sitting on one."""
    while i >= 0 and _kind(text[i]) == _MARK:
        i -= 1
    return i >= 0 and _kind(text[i]) == _WORD


def _glued(match: re.Match[str]) -> bool:
    """Whether a word-like match continues a word on its left or right.

    Done here rather than with regex lookarounds because Python's ``\\w`` leaves
    out combining marks and counts other numerals: "İdr." casefolds to
    "i" + U+0307 + "dr.", and both spellings must be treated alike.
    """
    text, start, end = match.string, match.start(), match.end()
    found = match.group(0)
    left = _kind(found[0]) == _WORD and start > 0 and _attached(text, start - 1)
    right = _kind(found[-1]) == _WORD and end < len(text) and _kind(text[end]) in (_WORD, _MARK)
    return left or right


def _padded(match: re.Match[str], words: str) -> str:
    """``words`` with a space on each side where the neighbour would glue onto it."""
    text, start, end = match.string, match.start(), match.end()
    left = " " if start > 0 and _attached(text, start - 1) else ""
    right = " " if end < len(text) and _kind(text[end]) in (_WORD, _MARK) else ""
    return f"{left}{words}{right}"


# --- step 2: numbers ------------------------------------------------------------------


@functools.cache
def _inflect() -> Any:
    """inflect's engine, imported only for transcripts with a digit.

    inflect wraps its methods in typeguard's ``@typechecked``, which re-compiles each
    of them at import: about 2 s of a 2.1 s import. The checks only reject arguments
    of the wrong type, which this module never passes, so ``typechecked`` is an
    identity while inflect is imported (0.1 s). tests/test_normalise.py checks the
    words are the same as with an ordinary import.
    """
    import sys

    if "inflect" not in sys.modules:
        try:
            import typeguard
        except ImportError:  # an inflect without typeguard: nothing to skip
            typeguard = None
        if typeguard is not None:
            original = typeguard.typechecked

            def unchecked(target: Any = None, **_options: Any) -> Any:
                return target if target is not None else (lambda function: function)

            typeguard.typechecked = unchecked
            try:
                import inflect
            finally:
                typeguard.typechecked = original
    import inflect

    return inflect.engine()


def _tidy_words(words: str) -> str:
    return " ".join(words.replace(",", " ").replace("-", " ").split())


@functools.lru_cache(maxsize=1 << 14)
def cardinal(number: int) -> str:
    """English words for a non-negative integer, following the module's convention.

    Parameters
    ----------
    number : int
        0 or more, at most ``MAX_CARDINAL_DIGITS`` digits.

    Returns
    -------
    str
        inflect's ``number_to_words`` with commas removed and hyphens as spaces.

    Examples
    --------
    >>> cardinal(1234)
    'one thousand two hundred and thirty four'
    """
    if number < 0 or len(str(number)) > MAX_CARDINAL_DIGITS:
        raise ParameterError(f"number={number} is not between 0 and {10**MAX_CARDINAL_DIGITS - 1}")
    return _tidy_words(_inflect().number_to_words(number))


@functools.lru_cache(maxsize=1 << 12)
def ordinal(number: int) -> str:
    """English ordinal words ("twenty first") for a non-negative integer.

    Examples
    --------
    >>> ordinal(3)
    'third'
    """
    cardinal(number)  # the same range check
    engine = _inflect()
    return _tidy_words(engine.ordinal(engine.number_to_words(number)))


def year(number: int) -> str:
    """A year read in pairs of digits: 1998 "nineteen ninety eight", 1905 "nineteen oh five".

    Whole thousands and 2001-2009 are read as cardinals ("two thousand and five").

    Examples
    --------
    >>> year(1998)
    'nineteen ninety eight'
    """
    if number % 1000 == 0 or 2000 < number < 2010:
        return cardinal(number)
    high, low = divmod(number, 100)
    if low == 0:
        return f"{cardinal(high)} hundred"
    if low < 10:
        return f"{cardinal(high)} oh {cardinal(low)}"
    return f"{cardinal(high)} {cardinal(low)}"


def _digits(digits: str) -> str:
    return " ".join(cardinal(int(d)) for d in digits)


def _read_integer(digits: str, *, years: bool) -> str:
    if (len(digits) > 1 and digits[0] == "0") or len(digits) > MAX_CARDINAL_DIGITS:
        return _digits(digits)
    number = int(digits)
    if years and len(digits) == 4 and 1000 <= number <= 2099:
        return year(number)
    return cardinal(number)


def _read_number(token: str, *, years: bool) -> str:
    """A number token as found: optional thousands commas, optional decimals."""
    whole, _, fraction = token.partition(".")
    digits = whole.replace(",", "")
    if fraction:
        head = _read_integer(digits, years=False) if digits else ""
        return f"{head} point {_digits(fraction)}".strip()
    return _read_integer(digits, years=years and "," not in whole)


def _plural_last(words: str) -> str:
    head, _, last = words.rpartition(" ")
    return f"{head} {_inflect().plural(last)}".strip()


_CURRENCIES = {
    "$": ("dollar", "dollars", "cent", "cents"),
    "£": ("pound", "pounds", "penny", "pence"),
    "€": ("euro", "euros", "cent", "cents"),
    "¥": ("yen", "yen", "", ""),
}
_SCALES = {"k": "thousand", "m": "million", "bn": "billion"}


def _read_money(symbol: str, amount: str, scale: str) -> str:
    one, many, sub_one, sub_many = _CURRENCIES[symbol]
    if scale:
        return f"{_read_number(amount, years=False)} {_SCALES.get(scale.lower(), scale.lower())} {many}"
    whole, _, fraction = amount.partition(".")
    if fraction and (len(fraction) > 2 or not sub_one):
        return f"{_read_number(amount, years=False)} {many}"
    digits = whole.replace(",", "")
    units = int(digits)
    cents = int(fraction.ljust(2, "0")) if fraction else 0
    parts = []
    if units or not cents:
        parts.append(f"{_read_integer(digits, years=False)} {one if units == 1 else many}")
    if cents:
        parts.append(f"{cardinal(cents)} {sub_one if cents == 1 else sub_many}")
    return " and ".join(parts)


def _read_time(hours: str, minutes: str, seconds: str | None, ampm: str | None) -> str:
    words = cardinal(int(hours))
    if minutes == "00":
        if not ampm:
            words += " o'clock"
    elif minutes[0] == "0":
        words += f" oh {cardinal(int(minutes))}"
    else:
        words += f" {cardinal(int(minutes))}"
    if seconds:
        words += f" and {cardinal(int(seconds))} seconds"
    if ampm:
        words += f" {ampm.lower()} m"
    return words


_NUM = r"(?:[0-9]{1,3}(?:,[0-9]{3})+(?![0-9])|[0-9]+)(?:\.[0-9]+)?"
_AMPM = r"(?:\s?(?P<{name}>[ap])\.?m\.?(?![^\W\d_]))"
# One scan, alternatives tried in order at each position, so no rule ever sees
# another rule's output.
_NUMBERS = re.compile(
    rf"""
    (?P<money>(?P<symbol>[$£€¥])\s?(?P<amount>{_NUM})
        (?:\s(?P<scale_word>thousand|million|billion|trillion)|(?P<scale>bn|k|m))?(?![^\W\d_]))
  | (?P<cents>(?P<cents_amount>[0-9]+)\s?¢)
  | (?P<time>(?<![0-9:.])(?P<hours>[01]?[0-9]|2[0-4]):(?P<minutes>[0-5][0-9])
        (?::(?P<seconds>[0-5][0-9]))?(?![0-9:]){_AMPM.format(name="time_ampm")}?)
  | (?P<hour>(?<![0-9:.,])(?P<hour12>1[0-2]|0?[1-9]){_AMPM.format(name="ampm")})
  | (?P<percent>(?P<percent_amount>{_NUM})\s?%)
  | (?P<ordinal>(?P<ordinal_number>[0-9]{{1,3}}(?:,[0-9]{{3}})+|[0-9]+)(?:st|nd|rd|th)(?![^\W\d_]))
  | (?P<decade>(?P<decade_number>[12][0-9]{{2}}0|[0-9]0)s(?![^\W\d_]))
  | (?P<range>(?P<low>{_NUM})-(?P<high>{_NUM}))
  | (?P<minus>(?<![^\s(\[])-(?=\.?[0-9]))
  | (?P<point>(?<![^\W_])\.[0-9]+)
  | (?P<number>{_NUM})
    """,
    re.VERBOSE | re.IGNORECASE,
)
# "COVID-19", "19-year-old": a hyphen between a letter and a digit separates words.
_LETTER_DIGIT_HYPHEN = re.compile(r"(?<=[^\W\d_])-(?=[0-9])|(?<=[0-9])-(?=[^\W\d_])")
_HAS_DIGIT = re.compile(r"[0-9]")


def _number_words(m: re.Match[str]) -> str:
    g = m.group
    if g("money"):
        return _read_money(g("symbol"), g("amount"), g("scale_word") or g("scale") or "")
    if g("cents"):
        count = int(g("cents_amount"))
        return f"{_read_integer(g('cents_amount'), years=False)} {'cent' if count == 1 else 'cents'}"
    if g("time"):
        return _read_time(g("hours"), g("minutes"), g("seconds"), g("time_ampm"))
    if g("hour"):
        return f"{cardinal(int(g('hour12')))} {g('ampm').lower()} m"
    if g("percent"):
        return f"{_read_number(g('percent_amount'), years=False)} percent"
    if g("ordinal"):
        digits = g("ordinal_number").replace(",", "")
        if len(digits) > MAX_CARDINAL_DIGITS:
            return f"{_digits(digits)} th"
        return ordinal(int(digits))
    if g("decade"):
        return _plural_last(_read_integer(g("decade_number"), years=True))
    if g("range"):
        return f"{_read_number(g('low'), years=True)} to {_read_number(g('high'), years=True)}"
    if g("minus"):
        return "minus"
    if g("point"):
        return f"point {_digits(g('point')[1:])}"
    return _read_number(g("number"), years=True)


def verbalise(text: str) -> str:
    """Spell out the numbers in English text (step 2 alone).

    Parameters
    ----------
    text : str
        Text whose digits are ASCII (``normalise`` maps other digits first).

    Returns
    -------
    str
        ``text`` with every digit sequence replaced by words; text without a
        digit comes back unchanged, and inflect is not imported for it.

    Examples
    --------
    >>> verbalise("$5.20 at 10:30 on the 3rd")
    'five dollars and twenty cents at ten thirty on the third'
    """
    if not _HAS_DIGIT.search(text):
        return text
    text = _LETTER_DIGIT_HYPHEN.sub(" ", text)
    return _NUMBERS.sub(lambda m: _padded(m, _number_words(m)), text)


# --- step 3: abbreviations ----------------------------------------------------------


def load_abbreviations(path: str | Path = ABBREVIATIONS_FILE) -> dict[str, str]:
    """Read an abbreviation table: ``key<TAB>expansion`` lines, ``#`` comments.

    Parameters
    ----------
    path : str or Path
        The table; the built-in English one by default.

    Returns
    -------
    dict
        Lower-case key to expansion, in file order.

    Raises
    ------
    ParameterError
        When a line has no tab or an empty key or expansion; the message names
        the file and line.

    Examples
    --------
    >>> load_abbreviations()["dr."]
    'doctor'
    """
    table: dict[str, str] = {}
    for number, line in enumerate(Path(path).read_text(encoding="utf-8").splitlines(), start=1):
        if not line.strip() or line.startswith("#"):
            continue
        key, tab, expansion = line.partition("\t")
        if not tab or not key.strip() or not expansion.strip():
            raise ParameterError(f"{path}: line {number}: expected 'key<TAB>expansion', found {line!r}")
        table[key.strip().casefold()] = expansion.strip()
    return table


@functools.lru_cache(maxsize=32)
def _abbreviation_table(items: tuple[tuple[str, str], ...]) -> tuple[re.Pattern[str] | None, dict[str, str]]:
    table = {_canon(key).casefold(): value for key, value in items if key.strip()}
    parts = []
    for key in sorted(table, key=lambda k: (-len(k), k)):
        part = re.escape(key)
        parts.append(part)
    pattern = re.compile("|".join(parts), re.IGNORECASE) if parts else None
    return pattern, table


def _expand_abbreviations(text: str, abbreviations: Mapping[str, str]) -> str:
    pattern, table = _abbreviation_table(tuple(sorted(abbreviations.items())))
    if pattern is None:
        return text

    def expand(m: re.Match[str]) -> str:
        # Word-like keys must stand alone ("co." is not the end of "taco."); symbol
        # keys such as "&" apply anywhere, as in "R&D".
        return m.group(0) if _glued(m) else _padded(m, table[m.group(0).casefold()])

    return pattern.sub(expand, text)


# --- step 4: initialisms --------------------------------------------------------------

# Word boundaries are checked by _glued, not by lookarounds.
_DOTTED_INITIALISM = re.compile(r"[^\W\d_](?:\.[^\W\d_])+\.?")
_CAPS_INITIALISM = re.compile(r"[A-Z]{2,5}")


def _spell_initialisms(text: str, is_known: Callable[[str], bool] | None) -> str:
    def letters(m: re.Match[str]) -> str:
        if _glued(m):
            return m.group(0)
        return _padded(m, " ".join(ch.lower() for ch in m.group(0) if ch != "."))

    def caps(m: re.Match[str]) -> str:
        word = m.group(0).lower()
        return m.group(0) if is_known is not None and is_known(word) else letters(m)

    # Spelling one initialism can expose another ("AA.B" -> "a a.B", "A.A..B" ->
    # "a a.B"), which a second normalisation would find, so repeat until nothing
    # changes. Each round removes capitals or periods, so this ends.
    while True:
        spelled = _DOTTED_INITIALISM.sub(letters, _CAPS_INITIALISM.sub(caps, text))
        if spelled == text:
            return text
        text = spelled


# --- step 5: case and character classes --------------------------------------------


def _classify(text: str, *, keep_punctuation: bool) -> str:
    kinds = []
    for ch in text:
        kind = _kind(ch)
        if kind == _MARK and not (kinds and kinds[-1] in (_WORD, _MARK)):
            kind = _SPACE  # a mark with no letter to sit on
        kinds.append(kind)
    out = []
    last = len(kinds) - 1
    for i, (ch, kind) in enumerate(zip(text, kinds, strict=True)):
        if kind in (_WORD, _MARK):
            out.append(ch)
        elif kind == _APOSTROPHE:
            inner = 0 < i < last and kinds[i - 1] in (_WORD, _MARK) and kinds[i + 1] == _WORD
            out.append(ch if inner or keep_punctuation else " ")
        elif kind == _PUNCT and keep_punctuation:
            out.append(ch)
        else:
            out.append(" ")
    return " ".join("".join(out).split())


def split_words(text: str) -> tuple[str, ...]:
    """The words of normalised text: letters, digits and marks, inner apostrophes kept.

    Examples
    --------
    >>> split_words("don't stop, 'now'")
    ("don't", 'stop', 'now')
    """
    if text.isascii():
        return tuple(_ASCII_WORD.findall(text))
    return tuple(_classify(text, keep_punctuation=False).split())


def _finish(text: str, *, keep_punctuation: bool) -> str:
    """Step 5: fold case, class characters, collapse spaces."""
    if text.isascii():
        folded = text.translate(_ASCII_FOLD)
        if keep_punctuation:
            return " ".join(folded.translate(_ASCII_KEEP).split())
        return " ".join(_ASCII_WORD.findall(folded))
    return _finish_general(text, keep_punctuation=keep_punctuation)


def _finish_general(text: str, *, keep_punctuation: bool) -> str:
    for _ in range(_MAX_ROUNDS):
        done = _classify(fold(text), keep_punctuation=keep_punctuation)
        if done == text:
            break
        text = done
    return text


# --- the whole thing -------------------------------------------------------------------


def normalise(
    text: str,
    *,
    punctuation: str = "strip",
    verbalise_numbers: bool = True,
    abbreviations: Mapping[str, str] | None = None,
    spell_initialisms: bool = False,
    is_known: Callable[[str], bool] | None = None,
) -> Normalised:
    """Normalise one transcript (see the module docstring for the steps).

    Parameters
    ----------
    text : str
        The transcript as found; any Unicode string.
    punctuation : {"strip", "keep"}
        Keep punctuation in the text, or turn it into spaces. Words are the
        same either way.
    verbalise_numbers : bool
        Spell out numbers, money, times and percentages in English. When False,
        digits stay and count as word characters.
    abbreviations : mapping, optional
        Lower-case key to expansion (see ``load_abbreviations`` for the rules).
    spell_initialisms : bool
        Spell dotted initialisms and unknown all-caps tokens of 2-5 letters.
    is_known : callable, optional
        ``is_known(lower_case_word)``: whether the dictionary has the word, in
        which case an all-caps token is left as a word ("NASA"). Without it every
        such token is spelled.

    Returns
    -------
    Normalised
        ``text``: the normalised transcript, "" when nothing is left;
        ``words``: its words.

    Raises
    ------
    ParameterError
        When ``punctuation`` is not "strip" or "keep".

    Examples
    --------
    >>> normalise("Dr. Okapi paid $3.50 at 10:05 -- FBX!", abbreviations={"dr.": "doctor"},
    ...           spell_initialisms=True).text
    'doctor okapi paid three dollars and fifty cents at ten oh five f b x'
    """
    if punctuation not in PUNCTUATION_MODES:
        raise ParameterError(f"punctuation={punctuation!r} is not one of 'strip', 'keep'")
    out = _canon(text)
    # Numbers before abbreviations: the spaces around number words can free an
    # abbreviation ("0DR." -> "zero DR."), which must be found in this pass.
    if verbalise_numbers:
        out = verbalise(out)
    if abbreviations:
        out = _expand_abbreviations(out, abbreviations)
        if verbalise_numbers:
            out = verbalise(out)  # an expansion may itself hold digits
    if spell_initialisms:
        out = _spell_initialisms(out, is_known)
    keep = punctuation == "keep"
    out = _finish(out, keep_punctuation=keep)
    words = tuple(out.split()) if not keep else split_words(out)
    return Normalised(text=out, words=words)
