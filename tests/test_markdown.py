"""Escaped Markdown renders as the very characters it was given, and never as markup.

The reference renderer is cmark-gfm (through ``cmarkgfm``), the CommonMark
implementation with GitHub's extensions (tables, strikethrough, extended autolinks,
tag filter) that renders Markdown files on GitHub; raw HTML is let through
(``CMARK_OPT_UNSAFE``), so an escape that fails shows as a tag.
"""

from __future__ import annotations

import html
import re

import cmarkgfm
import pytest
from cmarkgfm.cmark import Options
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.commands.markdown import Md, md_code, md_paragraphs, md_table, md_text
from tests.conftest import examples

HOSTILE = [
    "[click](https://evil.example)", "![x](https://evil.example/p.png)", "<script>alert(1)</script>",
    "<img src=x onerror=alert(2)>", "# heading", "- item", "+ item", "1. first", "10) tenth", "> quote",
    "    indented code", "```fenced```", "`tick`", "**bold** _em_ ~~gone~~", "$x^2$", "a | b | c",
    "&amp; &#60;b&#62; &copy;", "https://evil.example", "www.evil.example", "ed@evil.example",
    "mailto:ed@evil.example", "<https://evil.example>", "[ref]: https://evil.example", "[^1]",
    "line one\n\n# line two\n---", "\u202egnp.exe", "trailing\\", "<!-- comment -->", "=== x",
    "x\r\ny\tz\x00w",
]
# What a rendering of escaped text may contain: a paragraph, code spans, a table.
TAGS = {"p", "code", "table", "thead", "tbody", "tr", "th", "td"}


def render(markdown: str) -> str:
    return cmarkgfm.github_flavored_markdown_to_html(markdown, options=Options.CMARK_OPT_UNSAFE)


def tags(rendered: str) -> set[str]:
    return set(re.findall(r"</?([A-Za-z][A-Za-z0-9]*)", rendered))


def shown(rendered: str) -> str:
    """The text a reader sees: the tags dropped, entities decoded."""
    return html.unescape(re.sub(r"<[^>]+>", "", rendered)).strip()


def one_line(text: str) -> str:
    """What md_text promises to show: controls and runs of white space as one space."""
    text = "".join(f"[U+{ord(c):04X}]" if "\u202a" <= c <= "\u202e" or "\u2066" <= c <= "\u2069"
                   else " " if ord(c) < 32 or 127 <= ord(c) < 160 else c for c in text)
    return re.sub(r"\s+", " ", text).strip()


@pytest.mark.parametrize("text", HOSTILE)
def test_hostile_text_renders_as_itself(text: str) -> None:
    for markdown in (md_text(text), md_code(text, in_table=False)):
        rendered = render(markdown)
        assert tags(rendered) <= {"p", "code"}, (text, markdown, rendered)
        assert shown(rendered) == one_line(text), (text, markdown, rendered)


@pytest.mark.parametrize("text", HOSTILE)
def test_hostile_cells_stay_in_their_cell(text: str) -> None:
    rendered = render(md_table(["a", "b"], [[text, Md(md_code(text))], ["ok", 1]]))
    assert tags(rendered) <= TAGS, rendered
    cells = [shown(c) for c in re.findall(r"<td>(.*?)</td>", rendered, flags=re.S)]
    assert cells == [one_line(text), one_line(text), "ok", "1"]


def test_paragraphs_split_at_blank_lines_only() -> None:
    rendered = render("\n\n".join(md_paragraphs("first *line*\nstill first\n\n# second\n\n\n- third")))
    assert re.findall(r"<p>(.*?)</p>", rendered) == ["first *line* still first", "# second", "- third"]


# Markup characters, digits, letters, spaces and line breaks, and runs of them that
# open something ("http://", "www.", "@", "](").
MARKUP = st.text(alphabet="\\`*_[]()<>!&|~$#:-+=.@/ \n\taw1é", max_size=40) | st.lists(
    st.sampled_from(["http://", "www.", "a@b.c", "](", "<a>", "&lt;", "```", "1. ", "- ", "# ", "|", "x"]),
    max_size=8).map("".join)


@settings(max_examples=examples(300), deadline=None)
@given(MARKUP)
def test_any_text_renders_as_itself(text: str) -> None:
    """A property over generated text (drawn the same on every run; `make property-search` draws more)."""
    rendered = render(md_text(text))
    assert tags(rendered) <= {"p", "code"}, (text, rendered)
    assert shown(rendered) == one_line(text), (text, rendered)
    cell = render(md_table(["h"], [[text]]))
    assert tags(cell) <= TAGS and shown(re.search(r"<td>(.*?)</td>", cell, flags=re.S)[1]) == one_line(text)
