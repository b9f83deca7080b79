"""A long transcript cut into sentences, for aligning it to its recording.

A sentence ends at a line break, or after sentence punctuation (``.``, ``!``, ``?``, the
ellipsis, and the full stops and question marks of other scripts) followed by white
space or the end of the text; closing quotes and brackets after the mark stay with the
sentence. A full stop inside a token (``3.5``, ``e.g.x``) does not end one, since no
white space follows it. An abbreviation followed by a space (``Dr. Reed``) does end one
here: the aligner only needs pieces that a speaker reads as units, and a wrong cut
after an abbreviation costs at most a short, merged sentence.
"""

from __future__ import annotations

import re

__all__ = ["split_sentences"]

# Sentence-final marks: Latin . ! ? and the ellipsis, Devanagari danda (U+0964, U+0965),
# Arabic question mark (U+061F), Ethiopic full stop (U+1362), CJK full stop and the
# full-width ! and ? (U+3002, U+FF01, U+FF1F). Closing quotes and brackets that follow
# the mark belong to the sentence.
_END = re.compile(r"""[.!?\u2026\u0964\u0965\u061f\u1362\u3002\uff01\uff1f]+["'\u2019\u201d\u00bb)\]]*(?=\s|$)""")


def split_sentences(text: str) -> list[str]:
    """The sentences of ``text``, in order, each stripped and with its spaces collapsed.

    Parameters
    ----------
    text : str
        The whole transcript (a sidecar file or a metadata cell).

    Returns
    -------
    list of str
        Non-empty sentences; empty when the text holds only white space.

    Examples
    --------
    >>> split_sentences("The tide turned at noon. Was the ferry late?\\nNo\\n\\n  it was early!")
    ['The tide turned at noon.', 'Was the ferry late?', 'No', 'it was early!']
    >>> split_sentences('He said "go." Then 3.5 miles more... "Fine."')
    ['He said "go."', 'Then 3.5 miles more...', '"Fine."']
    """
    sentences: list[str] = []
    for line in text.splitlines():
        start = 0
        for match in _END.finditer(line):
            sentences.append(line[start:match.end()])
            start = match.end()
        sentences.append(line[start:])
    return [" ".join(s.split()) for s in sentences if s.strip()]
