"""What a tag may hold: the one rule, for problem documents (``tags``) and sweeps alike.

A tag is 1 to `MAX_TAG_CHARS` characters: letters of any alphabet (``Zürich``, ``Łódź``, ``東京``),
the combining marks some scripts write letters with (not first), decimal digits, and ``_ . : -``.  No
spaces, no control or format characters (so no invisible or text-direction characters), no symbols or
quotes: a tag is shown as text on the dashboard, sent in URLs (``?tag=``, percent-encoded as UTF-8) and
stored as JSON in the job's record, never in a Redis key name.  It must be written composed (Unicode NFC),
as keyboards write it: a tag is matched exactly (``GET /v1/jobs?tag=``, whose value is composed before it
is compared), so ``u`` plus a combining diaeresis would not find ``ü``.
"""

from __future__ import annotations

import unicodedata
from typing import Annotated, Any

from pydantic import AfterValidator
from pydantic_core import PydanticCustomError

from worker.document._fields import SchemaExtra

__all__ = ["MAX_TAG_CHARS", "TAG_RULE", "TagText", "tag_problem"]

MAX_TAG_CHARS = 64
"""Longest tag, in characters (Unicode code points)."""
TAG_PUNCTUATION = "_.:-"
"""The punctuation a tag may hold besides letters and digits."""
TAG_RULE = (
    f"1 to {MAX_TAG_CHARS} characters: letters of any alphabet (such as Zürich), digits and _ . : - "
    "(no spaces)"
)
"""The rule in words, for messages and the schema."""


def tag_problem(value: Any) -> str | None:
    """Why ``value`` is not a tag (a sentence naming the first offending character), or None when it is one."""
    if not isinstance(value, str):
        return "a tag must be a string"
    if not 1 <= len(value) <= MAX_TAG_CHARS:
        return f"a tag must be {TAG_RULE}; this one has {len(value)} characters"
    for position, char in enumerate(value, start=1):
        category = unicodedata.category(char)
        if category[0] == "L" or category == "Nd" or char in TAG_PUNCTUATION or (category[0] == "M" and position > 1):
            continue
        return f"a tag must be {TAG_RULE}; character {position} is {_named(char)}"
    composed = unicodedata.normalize("NFC", value)
    if composed != value:
        return (
            f"a tag must be {TAG_RULE}, written composed (Unicode NFC) as it is matched exactly: "
            f"write `{composed}` (letters and accents as single characters)"
        )
    return None


def _named(char: str) -> str:
    name = unicodedata.name(char, "")
    if char.isprintable() and not char.isspace():
        return f"`{char}` ({name.lower()})" if name else f"`{char}`"
    return f"U+{ord(char):04X}" + (f" ({name.lower()})" if name else "")


def _check_tag(value: str) -> str:
    problem = tag_problem(value)
    if problem is not None:
        raise PydanticCustomError("fixq_check", "{problem}", {"problem": problem})
    return value


TagText = Annotated[
    str,
    AfterValidator(_check_tag),
    SchemaExtra(minLength=1, maxLength=MAX_TAG_CHARS, description=f"A tag: {TAG_RULE}."),
]
"""A tag in a pydantic model."""
