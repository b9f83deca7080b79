"""Rule-based pronunciation engines that ship their data: espeak-ng and epitran.

``espeak``   libespeak-ng and its data from the ``espeakng-loader`` wheel, driven through
             ctypes (``espeak_TextToPhonemes`` in IPA mode, phones separated); about a
             hundred languages with their own stress rules and exception dictionaries.
``epitran``  epitran's orthography-to-IPA rule sets, shipped in its package (Yoruba,
             Amharic in Ethiopic script, Kinyarwanda, Somali and many more).

Neither is imported before a word needs it: a run that does not use a rule engine does
not pay for loading one (epitran brings pandas, about a second). Neither reaches the
network: both read only files inside their installed packages.

An engine is named ``espeak``, ``espeak:<voice>``, ``epitran`` or ``epitran:<code>``
(``epitran:yor-Latn``); without a suffix the voice or rule set is found from the language
tag (:func:`resolve`).
"""

from __future__ import annotations

import ctypes
import functools
import importlib.util
from pathlib import Path

from pipeline.core.errors import ParameterError

__all__ = ["ENGINES", "EPITRAN_CODES", "Engine", "espeak_voices", "epitran_codes", "resolve"]

ENGINES = ("espeak", "epitran")
# Languages whose rule engine is epitran unless text.engines says otherwise: those
# espeak-ng lacks, and Swahili, whose ng' (/ŋ/) espeak-ng 1.52 spells out letter by
# letter. ISO 639-1 to 639-3 codes from the ISO 639-2 registration authority's table.
EPITRAN_CODES = {"sw": "swa-Latn", "yo": "yor-Latn", "rw": "kin-Latn", "so": "som-Latn", "am": "amh-Ethi",
                 "ha": "hau-Latn", "ig": "ibo-Latn", "zu": "zul-Latn", "xh": "xho-Latn", "lg": "lug-Latn"}


def _package_dir(name: str) -> Path | None:
    spec = importlib.util.find_spec(name)
    if spec is None or not spec.submodule_search_locations:
        return None
    return Path(next(iter(spec.submodule_search_locations)))


@functools.cache
def espeak_voices() -> tuple[str, ...]:
    """Voice names of the installed espeak-ng data, e.g. ``("af", "am", ...)`` (sorted).

    A voice counts when its language file and its dictionary are both present.
    """
    root = _package_dir("espeakng_loader")
    if root is None:
        return ()
    data = root / "espeak-ng-data"
    dicts = {p.name[: -len("_dict")] for p in data.glob("*_dict")}
    voices = {p.name for p in (data / "lang").rglob("*") if p.is_file()}
    return tuple(sorted(v for v in voices if v.split("-")[0].lower() in dicts))


@functools.cache
def epitran_codes() -> tuple[str, ...]:
    """Rule-set codes shipped with epitran, e.g. ``("aar-Latn", ...)`` (sorted)."""
    root = _package_dir("epitran")
    if root is None:
        return ()
    return tuple(sorted(p.stem for p in (root / "data" / "map").glob("*.csv")))


def resolve(language: str, engine: str = "") -> tuple[str, str]:
    """The engine and its voice or rule set for a language tag.

    Parameters
    ----------
    language : str
        BCP-47 tag (``sw``, ``es``, ``en-US``).
    engine : str
        ``""`` for the default, or ``espeak``, ``espeak:<voice>``, ``epitran``, ``epitran:<code>``.

    Returns
    -------
    (engine, target) : tuple of str

    Raises
    ------
    ParameterError
        No installed engine covers the language, or the named voice or rule set is missing.

    Examples
    --------
    >>> resolve("es"), resolve("sw"), resolve("yo", "epitran:yor-Latn")
    (('espeak', 'es'), ('epitran', 'swa-Latn'), ('epitran', 'yor-Latn'))
    """
    name, _, target = engine.partition(":")
    primary = language.split("-")[0].lower()
    if name not in ("", *ENGINES):
        raise ParameterError(f"engine={engine!r} for language {language!r}: expected one of {', '.join(ENGINES)}")
    if name == "epitran" or (not name and primary in EPITRAN_CODES and EPITRAN_CODES[primary] in epitran_codes()):
        target = target or EPITRAN_CODES.get(primary, "")
        if target not in epitran_codes():
            raise ParameterError(f"language {language!r}: epitran has no rule set {target!r}; "
                                 "name one (engine = \"epitran:<code>\"; `loam languages` lists them)")
        return "epitran", target
    voices = {v.lower(): v for v in espeak_voices()}
    target = target or next((voices[t] for t in (language.lower(), primary) if t in voices), "")
    if target.lower() not in voices:
        raise ParameterError(f"language {language!r}: no espeak-ng voice {target or primary!r} and no epitran rule set; "
                             "set text.engines for it (`loam languages` lists what this install has)")
    return "espeak", voices[target.lower()]


class _Espeak:
    """libespeak-ng in this process (one instance: the library keeps global state)."""

    _IPA = 0x02  # espeakPHONEMES_IPA
    _SYNCHRONOUS = 0x02  # AUDIO_OUTPUT_SYNCHRONOUS: no audio device is opened

    def __init__(self) -> None:
        root = _package_dir("espeakng_loader")
        if root is None:
            raise ParameterError("espeakng-loader is not installed: the espeak engine needs it")
        lib = ctypes.CDLL(str(root / "libespeak-ng.so"))
        lib.espeak_Initialize.restype = ctypes.c_int
        lib.espeak_Initialize.argtypes = [ctypes.c_int, ctypes.c_int, ctypes.c_char_p, ctypes.c_int]
        lib.espeak_SetVoiceByName.argtypes = [ctypes.c_char_p]
        lib.espeak_TextToPhonemes.restype = ctypes.c_char_p
        lib.espeak_TextToPhonemes.argtypes = [ctypes.POINTER(ctypes.c_char_p), ctypes.c_int, ctypes.c_int]
        # espeak_Initialize returns the sample rate of the speech it synthesises.
        self.sample_rate = lib.espeak_Initialize(self._SYNCHRONOUS, 0, str(root / "espeak-ng-data").encode(), 0)
        if self.sample_rate <= 0:
            raise ParameterError(f"espeak-ng failed to start from {root}")
        self.lib = lib
        self.voice = ""

    def select(self, voice: str) -> None:
        """Make ``voice`` the library's current voice."""
        if voice != self.voice:
            if self.lib.espeak_SetVoiceByName(voice.encode()) != 0:
                raise ParameterError(f"espeak-ng has no voice {voice!r}")
            self.voice = voice

    def units(self, word: str, voice: str) -> list[str]:
        self.select(voice)
        buffer = ctypes.c_char_p(word.encode("utf-8"))
        pointer = ctypes.pointer(buffer)
        out: list[str] = []
        # Separator "_" between phones (bits 8-15 of phonememode); a call reads one clause.
        while buffer.value:
            text = self.lib.espeak_TextToPhonemes(pointer, 1, self._IPA | (ord("_") << 8))
            out.extend(u for u in (text or b"").decode("utf-8").replace(" ", "_").split("_") if u)
        return out


@functools.cache
def _espeak() -> _Espeak:
    return _Espeak()


@functools.cache
def _epitran(code: str):  # type: ignore[no-untyped-def]
    import epitran  # 1 s with pandas: only for languages that use it

    return epitran.Epitran(code)


class Engine:
    """One language's engine: a word in, the engine's IPA units out.

    Examples
    --------
    >>> Engine("es").units("niño")
    ['n', 'ˈi', 'ɲ', 'o']
    """

    def __init__(self, language: str, engine: str = "") -> None:
        self.language = language
        self.name, self.target = resolve(language, engine)

    @property
    def label(self) -> str:
        return f"{self.name}:{self.target}"

    def units(self, word: str) -> list[str]:
        if self.name == "espeak":
            return _espeak().units(word, self.target)
        return [u for u in _epitran(self.target).trans_list(word) if u.strip()]


def engine_version(name: str) -> str:
    """The installed distribution behind an engine, for manifest metadata."""
    import importlib.metadata

    distribution = {"espeak": "espeakng-loader", "epitran": "epitran"}[name]
    try:
        return f"{distribution} {importlib.metadata.version(distribution)}"
    except importlib.metadata.PackageNotFoundError:
        return f"{distribution} not installed"
