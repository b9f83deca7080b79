"""The datasheet's questions and the page they are written on.

The questions follow Gebru et al., "Datasheets for Datasets" (arXiv:1803.09010, 2018;
Communications of the ACM 64(12), 2021), in Loam's own words and cut to what a speech
corpus needs. A question a person must answer names its key of the config's
``[datasheet]`` section; an empty answer leaves the question with the visible mark
:data:`TO_BE_ANSWERED`. Answers are untrusted text like any other and are escaped.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

from pipeline.commands.markdown import md_code, md_paragraphs

TO_BE_ANSWERED = "**[to be answered]**"

# The questions only a person can answer, by their key of [datasheet], in the order asked.
QUESTIONS = {
    "purpose": "For what purpose was the corpus made: which task, or which gap did it fill?",
    "creators": "Who made the corpus, and on behalf of which organisation or community?",
    "funding": "Who funded the work?",
    "sampling": "Does the corpus hold every recording of the collection, or a selection? How was it selected?",
    "subpopulations": "Which groups of speakers does it cover (age, gender, dialect, region), how was that "
                      "recorded, and how are they spread?",
    "sensitive_content": "Does the speech or the text hold confidential, offensive or sensitive matter "
                         "(health, beliefs, politics, other people's private lives)?",
    "collection": "How, where and by whom were the recordings made (devices, settings, read or spontaneous speech)?",
    "timeframe": "Over what period were the recordings made?",
    "consent": "On what basis were the recordings collected and are they used (the speakers' consent and its "
               "form, or another legal basis), and what were the speakers told?",
    "consent_withdrawal": "How can a speaker withdraw consent, and what happens to their recordings then?",
    "ethical_review": "Did an ethics review or a data-protection impact assessment take place, and with what outcome?",
    "compensation": "Were the speakers, and the people who recorded or transcribed, paid? How?",
    "transcription": "Who wrote the transcripts, following which conventions, and how were they checked?",
    "raw_data": "Is the raw dump kept, where, and who may get it?",
    "uses_so_far": "What has the corpus been used for already, and where are those uses described?",
    "intended_uses": "What tasks is the corpus meant for?",
    "out_of_scope_uses": "What must the corpus not be used for?",
    "known_limitations": "What in the corpus could mislead a user or harm the speakers (who is missing or "
                         "under-represented, known errors)?",
    "distribution": "Will the corpus be shared beyond the team that made it? How, and from when?",
    "licence": "Under what licence or terms of use is it shared?",
    "third_party_restrictions": "Do others restrict its use (rights in what was said, agreements with the "
                                "community, export rules)?",
    "maintainer": "Who looks after the corpus?",
    "contact": "How can the maintainer be reached?",
    "updates": "Will the corpus be updated (new recordings, corrections, removals), how often, and how will "
               "users hear of it?",
    "retention": "Are there limits on how long the recordings may be kept, and what happens after?",
    "contributions": "Can others add to the corpus or correct it? How?",
}


def clock(seconds: float | None) -> str:
    """A duration as h:mm:ss, rounded to the second.

    Examples
    --------
    >>> clock(253.2), clock(3600.0), clock(None)
    ('0:04:13', '1:00:00', 'none')
    """
    if seconds is None or not math.isfinite(seconds):
        return "none"
    total = int(round(seconds))
    return f"{total // 3600}:{total % 3600 // 60:02d}:{total % 60:02d}"


def hms(seconds: float | None) -> str:
    """A duration as h:mm:ss with its hours, e.g. ``0:04:13 (0.070 h)``.

    Examples
    --------
    >>> hms(253.2), hms(None)
    ('0:04:13 (0.070 h)', 'none')
    """
    if seconds is None or not math.isfinite(seconds):
        return "none"
    return f"{clock(seconds)} ({seconds / 3600:.3f} h)"


def plural(n: int, word: str, words: str | None = None) -> str:
    """``n`` and ``word``, or ``words`` (default ``word + "s"``) when ``n`` is not 1.

    >>> plural(1, "clip"), plural(3, "clip"), plural(0, "copy", "copies")
    ('1 clip', '3 clips', '0 copies')
    """
    return f"{n} {word if n == 1 else (words or word + 's')}"


class Sheet:
    """The datasheet as Markdown blocks, with the answers from ``[datasheet]``.

    Parameters
    ----------
    answers : mapping of str to str
        The ``[datasheet]`` section; an empty or missing value leaves its question
        marked as to be answered.

    Examples
    --------
    >>> sheet = Sheet({"purpose": "", "funding": "A *village* fund."})
    >>> sheet.ask("purpose")
    >>> sheet.ask("funding", built=["Nothing else is known."])
    >>> print(sheet.text(), end="")
    **For what purpose was the corpus made: which task, or which gap did it fill?** (`datasheet.purpose`)
    <BLANKLINE>
    **[to be answered]**
    <BLANKLINE>
    **Who funded the work?** (`datasheet.funding`)
    <BLANKLINE>
    A \\*village\\* fund.
    <BLANKLINE>
    Nothing else is known.
    >>> sheet.unanswered
    ['purpose']
    """

    def __init__(self, answers: Mapping[str, str]) -> None:
        self.answers = answers
        self.blocks: list[str] = []
        self.unanswered: list[str] = []

    def add(self, *blocks: str) -> None:
        """Append Markdown blocks (already escaped), each its own paragraph or table."""
        self.blocks.extend(b.rstrip("\n") for b in blocks if b)

    def heading(self, level: int, title: str) -> None:
        """A heading written by Loam (never from the inputs)."""
        self.add("#" * level + " " + title)

    def ask(self, key: str | None = None, *, question: str | None = None, built: Iterable[str] = ()) -> None:
        """A question: its person's answer (``key``), then what the build knows (``built``).

        A question with a key and no answer gets :data:`TO_BE_ANSWERED`; ``question``
        is the text of a question the build answers alone.
        """
        text = QUESTIONS[key] if key else question
        label = f" ({md_code('datasheet.' + key, in_table=False)})" if key else ""
        self.add(f"**{text}**{label}")
        if key:
            paragraphs = md_paragraphs(self.answers.get(key, ""))
            if not paragraphs:
                self.unanswered.append(key)
                paragraphs = [TO_BE_ANSWERED]
            self.add(*paragraphs)
        self.add(*built)

    def text(self) -> str:
        """The page: the blocks with a blank line between them."""
        return "\n\n".join(self.blocks) + "\n"
