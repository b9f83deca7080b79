"""A rule-based part-of-speech guess for homographs: is the word after this one a verb?

g2p-en ships a list of words whose pronunciation depends on whether they are used as
verbs ("to record" and "a record"); its own code reads the part of speech from NLTK's
tagger, whose data is not installed. Instead :func:`context_tag` looks at the previous
word: "to", modals and subject pronouns mark a verb, determiners and prepositions a
noun.
"""

from __future__ import annotations

import hashlib

__all__ = ["POS_TAGGER", "context_tag"]

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


def _cues_sha256() -> str:
    """SHA-256 of the cue lists (sorted, one word a line): names the rules by their content."""
    text = "".join(f"{tag}\t{word}\n" for tag, cues in (("V", _VERB_CUES), ("N", _NOUN_CUES)) for word in sorted(cues))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# What the text stage records as its tagger: the rules are named by the hash of their
# cue lists, so the record changes when the rules do and never when the code moves.
POS_TAGGER = (
    f"rule-based previous-word cues sha256={_cues_sha256()}; NLTK's averaged_perceptron_tagger "
    "is not installed and is not used"
)


def context_tag(previous: str | None) -> str | None:
    """"V" (verb), "N" (noun) or None (no cue) for the word after ``previous``.

    Parameters
    ----------
    previous : str or None
        The previous word, normalised (lower case); None at the start of a transcript.

    Returns
    -------
    str or None
        "V" after "to", modals and subject pronouns; "N" after determiners and
        prepositions; None otherwise.

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
