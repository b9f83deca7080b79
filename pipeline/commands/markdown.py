"""Markdown that untrusted text cannot turn into markup: escaped prose, code spans, tables.

Transcripts, file names, speaker ids, reject sentences and config strings reach the
datasheet; none of them may become a heading, a list, a link, an image or HTML when the
file is rendered. CommonMark lets any ASCII punctuation character be escaped with a
backslash (CommonMark spec 0.31, section 2.4), so every character that can open markup
is escaped; GitHub's extended autolinks (GFM spec, section 6.9; both section numbers from
memory) are turned off by escaping a ``:`` before
``/`` and the ``.`` after ``www``; an e-mail address is autolinked whatever its
escapes, so a word holding ``@`` is shown as a code span, where nothing is a link. Line
breaks become spaces, so escaped text never starts a block of its own.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Sequence

# Escaped wherever they stand: emphasis, code, links and images, HTML and entities,
# table cells, strikethrough and math (GitHub), headings.
_ALWAYS = frozenset("\\`*_[]<>!&|~$#")
# Escaped only as the first character, where they open a block (list, quote, heading).
_AT_START = frozenset("-+=>")
# Embedding, override and isolate controls reorder what a reader sees (Unicode UAX #9).
_BIDI = frozenset("\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")
_SPACES = re.compile(r"\s+")
_ORDERED = re.compile(r"^([0-9]{1,9})([.)])")


class Md(str):
    """A string that is Markdown already (written by Loam), passed through unescaped."""


def _plain(text: object) -> str:
    """``text`` on one line: controls and line breaks as spaces, reordering controls named."""
    out = []
    for char in "" if text is None else str(text):
        if char in _BIDI:
            out.append(f"[U+{ord(char):04X}]")
        elif unicodedata.category(char) == "Cc":
            out.append(" ")
        else:
            out.append(char)
    return _SPACES.sub(" ", "".join(out)).strip()


def _escape_word(word: str) -> str:
    chars = []
    for i, char in enumerate(word):
        # ':' before '/' ends a URL scheme, '.' after "www" starts a web address.
        if (char in _ALWAYS or (char == ":" and word[i + 1:i + 2] == "/")
                or (char == "." and word[max(0, i - 3):i].lower() == "www")):
            chars.append("\\" + char)
        else:
            chars.append(char)
    return "".join(chars)


def md_text(text: object, *, in_table: bool = False) -> str:
    """``text`` as Markdown prose that renders as exactly these characters.

    Parameters
    ----------
    text : object
        Anything; None is the empty string. Line breaks and other control characters
        become single spaces.
    in_table : bool
        The text goes in a table cell (see :func:`md_code`).

    Returns
    -------
    str
        One line of Markdown: markup characters escaped, words holding ``@`` as code
        spans, a leading block marker escaped.

    Examples
    --------
    >>> md_text("[click](https://x.example) <b>*hi*</b>")
    '\\\\[click\\\\](https\\\\://x.example) \\\\<b\\\\>\\\\*hi\\\\*\\\\</b\\\\>'
    >>> md_text("# 1. mail ed@x.example")
    '\\\\# 1. mail `ed@x.example`'
    >>> md_text("2. second")
    '2\\\\. second'
    """
    words = [md_code(word, in_table=in_table) if "@" in word else _escape_word(word) for word in _plain(text).split(" ")]
    line = " ".join(words)
    if line[:1] in _AT_START:
        line = "\\" + line
    return _ORDERED.sub(lambda m: m.group(1) + "\\" + m.group(2), line)


def md_code(text: object, *, in_table: bool = True) -> str:
    """``text`` as a code span: shown verbatim in a fixed-width font, never markup.

    Parameters
    ----------
    text : object
        Anything; None or an empty string gives an em dash.
    in_table : bool
        Escape ``|`` as ``\\|``, which a GFM table cell needs even inside a code span
        (GFM spec, section 4.10); outside a table the backslash would show.

    Returns
    -------
    str
        The text between enough backticks that none inside closes the span.

    Examples
    --------
    >>> md_code("heron/a_1.wav")
    '`heron/a_1.wav`'
    >>> md_code("a`b")
    '``a`b``'
    >>> md_code("`x|y`")
    '`` `x\\\\|y` ``'
    """
    body = _plain(text)
    if not body:
        return "\u2014"
    if in_table:
        body = body.replace("|", "\\|")
    runs = [len(run) for run in re.findall(r"`+", body)]
    fence = "`" * (max(runs, default=0) + 1)
    pad = " " if body.startswith("`") or body.endswith("`") else ""
    return f"{fence}{pad}{body}{pad}{fence}"


def md_cell(value: object) -> str:
    """A table cell: :class:`Md` as it is, a number as written, anything else escaped."""
    if isinstance(value, Md):
        return str(value).replace("\n", " ")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return str(value)
    return md_text(value, in_table=True)


def md_table(headers: Sequence[str], rows: Sequence[Sequence[object]], *, empty: str = "none") -> str:
    """A GFM table; every cell goes through :func:`md_cell`.

    Parameters
    ----------
    headers : sequence of str
        Column headings (escaped like any cell).
    rows : sequence of sequences
        The cells, row by row.
    empty : str
        The sentence written, in italics, instead of a table without rows.

    Returns
    -------
    str
        The table's lines, ending with a line break.

    Examples
    --------
    >>> print(md_table(["speaker", "clips"], [["<wren>", 3]]), end="")
    | speaker | clips |
    |---|---|
    | \\<wren\\> | 3 |
    >>> md_table(["speaker"], [], empty="no speaker")
    '*no speaker*\\n'
    """
    if not rows:
        return f"*{md_text(empty)}*\n"
    lines = ["| " + " | ".join(md_cell(h) for h in headers) + " |", "|" + "---|" * len(headers)]
    lines += ["| " + " | ".join(md_cell(c) for c in row) + " |" for row in rows]
    return "\n".join(lines) + "\n"


def md_paragraphs(text: object) -> list[str]:
    """``text`` cut at blank lines into escaped paragraphs (see :func:`md_text`).

    Examples
    --------
    >>> md_paragraphs("first line\\nstill first\\n\\n  second *one*  ")
    ['first line still first', 'second \\\\*one\\\\*']
    """
    blocks = re.split(r"\n[ \t]*\n", ("" if text is None else str(text)).replace("\r\n", "\n"))
    return [md_text(block) for block in blocks if block.strip()]
