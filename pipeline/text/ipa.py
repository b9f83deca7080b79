"""IPA strings as phones: segmentation, suprasegmentals, and the check against a feature table.

A phone is a base symbol with what modifies it: combining diacritics (nasal, voiceless,
syllabic, dental...), spacing modifier letters (length ``ː``, aspiration ``ʰ``,
labialisation ``ʷ``...), and a second base joined by a tie bar (``t͡ʃ``). Tone marks
(combining accents and tone letters ``˥˦˧˨˩``) belong to the segment before them, so
Yoruba ``ɔ́`` is one phone even when an engine hands over ``ɔ`` and ``́`` as two tokens;
stress marks (``ˈ``, ``ˌ``) stand before their syllable and are attached to the segment
that follows them.

Every phone, once its tone and stress are set aside, must be a segment of panphon's
IPA feature table (``panphon/data/ipa_all.csv``, the table of Mortensen et al., "PanPhon:
A Resource for Mapping IPA Segments to Articulatory Feature Vectors", COLING 2016). The
table is read as a CSV file: panphon itself (which imports pandas) is not imported.
Affricates written without a tie bar (``tʃ``, as espeak-ng writes them) take the tie bar
when the table has the tied form; a unit the table lacks (a diphthong ``aɪ``) is split
into its segments, and each must be in the table.
"""

from __future__ import annotations

import csv
import functools
import importlib.util
import unicodedata
from pathlib import Path

from pipeline.core.errors import ParameterError

__all__ = ["STRESS_MARKS", "TONE_MARKS", "InvalidPhone", "feature_table", "phone_class", "segment", "table_units"]

STRESS_MARKS = frozenset("ˈˌ")
# Combining tone diacritics (acute, grave, macron, caron, circumflex, double acute and
# double grave: IPA chart, "Tones and word accents") and the five Chao tone letters.
TONE_MARKS = frozenset("\u0301\u0300\u0304\u030c\u0302\u030b\u030f˥˦˧˨˩")
TIE_BARS = frozenset("\u0361\u035c")
# Modifier letters that belong to the segment before them (IPA chart, "Diacritics" and
# "Suprasegmentals": length, half-length, aspiration, labialisation, palatalisation,
# velarisation, pharyngealisation, nasal and lateral release, rhoticity, ejective).
_POSTFIX = frozenset("ːˑʰʷʲˠˤⁿˡ˞ʼ")
# Separators engines put between phones or syllables; they are not phones.
_SEPARATORS = frozenset(" _.‿|‖-")


class InvalidPhone(ValueError):
    """A symbol that is not a segment of the feature table."""


@functools.cache
def _table_path() -> Path:
    spec = importlib.util.find_spec("panphon")
    if spec is None or not spec.submodule_search_locations:
        raise ParameterError("panphon is not installed: its IPA feature table checks every phone")
    return Path(next(iter(spec.submodule_search_locations))) / "data" / "ipa_all.csv"


@functools.cache
def feature_table() -> dict[str, dict[str, str]]:
    """panphon's segments, NFD-normalised, to their features ("+", "-" or "0").

    Examples
    --------
    >>> feature_table()["ɲ"]["nas"], feature_table()["a"]["syl"]
    ('+', '+')
    """
    with _table_path().open(encoding="utf-8", newline="") as f:
        rows = list(csv.DictReader(f))
    return {unicodedata.normalize("NFD", r.pop("ipa")): r for r in rows}


def table_units(phone: str) -> str:
    """A phone without its tone and stress marks: the key looked up in the feature table."""
    return "".join(ch for ch in unicodedata.normalize("NFD", phone) if ch not in TONE_MARKS and ch not in STRESS_MARKS)


def phone_class(phone: str) -> str:
    """``"vowel"`` or ``"consonant"`` from the table's ``syl`` and ``cons`` features.

    Examples
    --------
    >>> phone_class("ɔ́"), phone_class("t͡ʃ")
    ('vowel', 'consonant')
    """
    features = feature_table()[table_units(phone)]
    return "vowel" if features["syl"] == "+" and features["cons"] == "-" else "consonant"


def _units(text: str) -> list[list[str]]:
    """Raw segments: each a list of characters, a base first, then what modifies it."""
    segments: list[list[str]] = []
    pending: list[str] = []  # stress marks waiting for the next base
    join = False
    for ch in unicodedata.normalize("NFD", text):
        if ch in _SEPARATORS:
            join = False
            continue
        if ch in STRESS_MARKS:
            pending.append(ch)
        elif _modifies(ch):
            if not segments:
                raise InvalidPhone(f"{text!r}: {_name(ch)} has no segment before it")
            segments[-1].append(ch)
            join = ch in TIE_BARS
        elif join:
            segments[-1].append(ch)
            join = False
        else:
            segments.append([*pending, ch])
            pending = []
    if pending and segments:
        segments[-1].extend(pending)
    return segments


def _modifies(ch: str) -> bool:
    return ch in TIE_BARS or ch in TONE_MARKS or ch in _POSTFIX or bool(unicodedata.combining(ch))


def _name(ch: str) -> str:
    return f"U+{ord(ch):04X} {unicodedata.name(ch, '?')}"


def _tied(unit: str) -> str | None:
    """``tʃ`` -> ``t͡ʃ`` when the table has the tied form (espeak-ng writes affricates untied)."""
    bare = table_units(unit)
    if len(bare) == 2 and not unicodedata.combining(bare[1]):
        tied = bare[0] + "\u0361" + bare[1]
        if tied in feature_table():
            return unit.replace(bare, tied, 1)
    return None


def segment(ipa: str | list[str], *, keep_stress: bool = False, keep_tone: bool = True) -> tuple[str, ...]:
    """Split IPA into phones and check each against the feature table.

    Parameters
    ----------
    ipa : str or list of str
        An IPA string, or an engine's units (each may hold one phone or several).
    keep_stress : bool
        Keep ``ˈ``/``ˌ`` on the segment after them; otherwise they are dropped.
    keep_tone : bool
        Keep tone marks on their segment; otherwise they are dropped.

    Returns
    -------
    tuple of str
        Phones in NFC.

    Raises
    ------
    InvalidPhone
        A phone (tone and stress set aside) is not a segment of the feature table.

    Examples
    --------
    >>> segment(["ɔ", "d͡ʒ", "ɔ", "\u0301"])
    ('ɔ', 'd͡ʒ', 'ɔ́')
    >>> segment(["ˈtʃ", "aː", "i"], keep_stress=True)
    ('ˈt͡ʃ', 'aː', 'i')
    >>> segment("ɔ́", keep_tone=False)
    ('ɔ',)
    """
    units: list[str] = []
    for unit in [ipa] if isinstance(ipa, str) else ipa:
        unit = unicodedata.normalize("NFD", unit)
        if units and unit and _modifies(unit[0]):
            units[-1] += unit  # a token of marks belongs to the unit before it
        else:
            units.append(unit)
    table = feature_table()
    phones: list[str] = []
    for unit in units:
        tied = _tied(unit)
        candidates = [list(tied)] if tied is not None else _units(unit)
        for seg in candidates:
            phone = "".join(seg)
            if table_units(phone) not in table:
                raise InvalidPhone(f"{phone!r} (from {unit!r}) is not a segment of panphon's IPA feature table")
            kept = "".join(ch for ch in phone if (keep_stress or ch not in STRESS_MARKS)
                           and (keep_tone or ch not in TONE_MARKS))
            phones.append(unicodedata.normalize("NFC", kept))
    return tuple(phones)

