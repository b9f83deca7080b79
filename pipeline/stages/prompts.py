"""Text-disjoint evaluation: prompts shared between held-out parts and labelled training.

A clip's prompt is its normalised transcript (the text stage's ``norm_text``) under
:func:`prompt_key`. A held-out part that is text-disjoint (``split.parts``,
``text_disjoint``, true unless set false) must not be scored on a prompt that labelled
training holds, or its scores are flattered by sentences the model was trained on.
``split.text_overlap`` says what gives way:

- ``"unscore"`` (the default): the part's clips whose prompt labelled holds stay in the
  part, not scorable (flag ``prompt_in_labelled``); no training label is spent;
- ``"demote"``: the training clips that read a prompt of such a part (scorable there)
  are kept out of labelled, and their rows lose the transcript (flag
  ``prompt_demoted``); the part stays scorable;
- ``"allow"``: nothing changes; ``loam validate`` warns.

The split stage, ``loam validate`` and the report use these functions, so they agree
on what a shared prompt is.
"""

from __future__ import annotations

from collections.abc import Iterable

MODES = ("unscore", "demote", "allow")
UNSCORED = "prompt_in_labelled"
DEMOTED = "prompt_demoted"


def prompt_key(norm_text: object) -> str | None:
    """The prompt a normalised transcript stands for: case-folded, runs of white space
    made one space, ends stripped; None for no or blank text (or anything not a string,
    such as the NaN a table gives for a missing value).

    Examples
    --------
    >>> prompt_key("The  Tide turned "), prompt_key("   "), prompt_key(None)
    ('the tide turned', None, None)
    """
    if not isinstance(norm_text, str):
        return None
    key = " ".join(norm_text.casefold().split())
    return key or None


def prompt_set(texts: Iterable[object]) -> set[str]:
    """The prompts of ``texts`` (blank and missing ones left out).

    Examples
    --------
    >>> sorted(prompt_set(["A b", "a  B", None, "c"]))
    ['a b', 'c']
    """
    return {k for k in map(prompt_key, texts) if k is not None}


def shares_prompt(norm_text: object, prompts: set[str]) -> bool:
    """Whether the clip's prompt is one of ``prompts``.

    Examples
    --------
    >>> shares_prompt("The tide", {"the tide"}), shares_prompt(None, {"the tide"})
    (True, False)
    """
    key = prompt_key(norm_text)
    return key is not None and key in prompts
