"""The wrong-language guard: transcripts that do not look like the language they are said to be.

With a dictionary backend (english, lexicon) the share of word tokens the dictionary
lacks measures how well the transcripts match it: English prose read against CMUdict
leaves a few per cent out (names, rare words), while another language leaves most of
its words out (a Swahili dump left 135 of 171 distinct words out). Above
``WRONG_LANGUAGE_OOV_SHARE`` the run warns loudly with the figure. The 30 % threshold
is common practice for such a check, not a published value.
"""

from __future__ import annotations

__all__ = ["WRONG_LANGUAGE_OOV_SHARE", "oov_rate", "wrong_language_sentence"]

WRONG_LANGUAGE_OOV_SHARE = 0.30


def oov_rate(tokens: int, oov_tokens: int) -> float | None:
    """OOV tokens over word tokens; None without tokens.

    Examples
    --------
    >>> oov_rate(200, 70), oov_rate(0, 0)
    (0.35, None)
    """
    return oov_tokens / tokens if tokens else None


def wrong_language_sentence(language: str, backend: str, tokens: int, oov_tokens: int) -> str | None:
    """The warning for a language whose OOV share is above the threshold, else None.

    Examples
    --------
    >>> print(wrong_language_sentence("en", "english", 100, 79))
    language 'en': 79.0 % of word tokens (79 of 100) are not in the english backend's dictionary (over 30 %): the transcripts do not look like 'en'; set text.language (or ingest.metadata_language_column) to their language
    """
    rate = oov_rate(tokens, oov_tokens)
    if rate is None or rate <= WRONG_LANGUAGE_OOV_SHARE:
        return None
    return (f"language {language!r}: {100 * rate:.1f} % of word tokens ({oov_tokens} of {tokens}) are not in the "
            f"{backend} backend's dictionary (over {100 * WRONG_LANGUAGE_OOV_SHARE:.0f} %): the transcripts do not "
            f"look like {language!r}; set text.language (or ingest.metadata_language_column) to their language")
