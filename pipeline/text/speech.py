"""Speech synthesised by espeak-ng, for aligning a transcript to its recording.

The library and its voices come from the ``espeakng-loader`` wheel (the same instance the
rules backend reads phones from, :mod:`pipeline.text.engines`), so synthesis needs no
system package and reaches no network. espeak-ng is a formant synthesiser: its speech
is robotic but its timing and spectra follow each language's rules, which is what a
dynamic-time-warping alignment needs.
"""

from __future__ import annotations

import ctypes

import numpy as np

from pipeline.core.errors import ParameterError
from pipeline.text.engines import _espeak, resolve

__all__ = ["DEFAULT_PITCH", "DEFAULT_WORDS_PER_MINUTE", "speech_voice", "synthesise", "synthesis_rate"]

# espeak-ng's own defaults (espeak_SetParameter: espeakRATE 175 words per minute,
# espeakPITCH 50 on its 0-100 scale), set on every call so one call's settings never
# carry into the next.
DEFAULT_WORDS_PER_MINUTE = 175
DEFAULT_PITCH = 50
_RATE, _PITCH = 1, 3  # espeak_PARAMETER values from speak_lib.h
_POS_CHARACTER, _CHARS_UTF8 = 1, 1
_CALLBACK = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.POINTER(ctypes.c_short), ctypes.c_int, ctypes.c_void_p)


def speech_voice(language: str) -> str | None:
    """The espeak-ng voice that speaks ``language`` (a BCP-47 tag), or None when none does.

    Examples
    --------
    >>> speech_voice("es"), speech_voice("sw"), speech_voice("yo")
    ('es', 'sw', None)
    """
    try:
        return resolve(language, "espeak")[1]
    except ParameterError:
        return None


def synthesis_rate() -> int:
    """The sample rate espeak-ng synthesises at, in Hz.

    Examples
    --------
    >>> synthesis_rate()
    22050
    """
    return int(_espeak().sample_rate)


def synthesise(text: str, *, voice: str, words_per_minute: int = DEFAULT_WORDS_PER_MINUTE,
               pitch: int = DEFAULT_PITCH) -> np.ndarray:
    """``text`` spoken by espeak-ng, as float32 samples at :func:`synthesis_rate`.

    Parameters
    ----------
    text : str
        What to say (UTF-8; read as plain text, never as markup).
    voice : str
        An espeak-ng voice name (:func:`speech_voice`).
    words_per_minute : int
        Speaking rate, 80 to 450.
    pitch : int
        Base pitch on espeak-ng's scale, 0 to 100.

    Returns
    -------
    np.ndarray
        Mono float32 samples in [-1, 1); empty for a text with nothing to say.

    Examples
    --------
    >>> speech = synthesise("The tide is out.", voice="en")
    >>> 0.5 < len(speech) / synthesis_rate() < 2.5, speech.dtype
    (True, dtype('float32'))
    """
    if not 80 <= words_per_minute <= 450:
        raise ParameterError(f"words_per_minute={words_per_minute}: expected 80 to 450")
    if not 0 <= pitch <= 100:
        raise ParameterError(f"pitch={pitch}: expected 0 to 100")
    engine = _espeak()
    lib = engine.lib
    engine.select(voice)
    lib.espeak_SetParameter(_RATE, words_per_minute, 0)
    lib.espeak_SetParameter(_PITCH, pitch, 0)
    chunks: list[np.ndarray] = []

    def take(wav: ctypes._Pointer, count: int, events: int) -> int:  # type: ignore[type-arg]
        if count > 0 and wav:
            chunks.append(np.ctypeslib.as_array(wav, shape=(count,)).copy())
        return 0  # go on

    callback = _CALLBACK(take)  # kept alive until the synchronous call returns
    lib.espeak_SetSynthCallback(callback)
    data = text.encode("utf-8") + b"\0"
    lib.espeak_Synth.argtypes = [ctypes.c_char_p, ctypes.c_size_t, ctypes.c_uint, ctypes.c_int, ctypes.c_uint,
                                 ctypes.c_uint, ctypes.c_void_p, ctypes.c_void_p]
    status = lib.espeak_Synth(data, len(data), 0, _POS_CHARACTER, 0, _CHARS_UTF8, None, None)
    if status != 0:
        raise ParameterError(f"espeak-ng could not synthesise {text[:40]!r} with voice {voice!r} (status {status})")
    if not chunks:
        return np.zeros(0, dtype=np.float32)
    return np.concatenate(chunks).astype(np.float32) / np.float32(32768.0)
