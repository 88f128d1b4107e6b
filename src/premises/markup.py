"""Markdown text for the generated section: escaping, code spans, ids and small phrase helpers.

Everything here turns plain text (names from the data, messages from checks)
into Markdown that pandoc and GFM print literally, or joins words the way
running text does. Standard library only; the templates reach these through
the filters of :mod:`premises.render`.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import Any

__all__ = [
    "attribute_value",
    "code_span",
    "count_word",
    "escape_markdown",
    "join_words",
    "link_target",
    "paragraph",
    "phrase",
    "sentence",
    "summarise_ids",
    "upper_first",
    "xref_id",
]

# Characters that start Markdown or pandoc syntax anywhere in a line: emphasis,
# code, links, raw HTML, math, citations, sub/superscript, attributes, table cells.
_ALWAYS = set("\\`*[]<$@~^{}|")


def escape_markdown(text: Any) -> str:
    """Escape plain text so pandoc and GFM print it literally.

    Backslash escapes of ASCII punctuation are valid in both. ``_`` is escaped
    only at a word edge (inside a word it is literal in both); ``#`` and ``>``
    only at the start (``>`` elsewhere would end a GFM autolink as ``\\>``). ``%`` and ``&`` are left for pandoc's LaTeX writer to escape.
    """
    s = " ".join(str(text).split())
    out: list[str] = []
    for i, ch in enumerate(s):
        if ch in _ALWAYS:
            out.append("\\" + ch)
        elif ch == "_":
            inner = 0 < i < len(s) - 1 and s[i - 1].isalnum() and s[i + 1].isalnum()
            out.append(ch if inner else "\\_")
        elif ch in "#>" and i == 0:  # a heading or a block quote only at the start
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def code_span(text: Any) -> str:
    """A code span that survives backticks inside the text (CommonMark rule)."""
    s = " ".join(str(text).split())
    runs = [len(m) for m in re.findall(r"`+", s)]
    fence = "`" * (max(runs, default=0) + 1)
    pad = " " if s.startswith("`") or s.endswith("`") else ""
    return f"{fence}{pad}{s}{pad}{fence}"


def attribute_value(text: Any) -> str:
    """Text for a quoted attribute value: one line, no double quotes."""
    return " ".join(str(text).split()).replace('"', "'").replace("\\", "/")


def link_target(path: Any) -> str:
    """A link target, in angle brackets when it holds spaces or brackets."""
    s = str(path)
    return f"<{s}>" if any(ch in s for ch in " ()<>") else s


def xref_id(*parts: Any) -> str:
    """A cross-reference id: lower case, ``-`` for anything not ``[a-z0-9-]``.

    >>> xref_id("tbl", "Yield_2024", "ledger")
    'tbl-yield-2024-ledger'
    """
    raw = "-".join(str(p) for p in parts if str(p))
    return re.sub(r"-{2,}", "-", re.sub(r"[^a-z0-9-]", "-", raw.lower())).strip("-")


def summarise_ids(ids: Sequence[Any], limit: int = 5) -> str:
    """The first ``limit`` ids and "and N more", for the text (the JSON has all)."""
    shown = [escape_markdown(i) for i in list(ids)[:limit]]
    rest = len(ids) - len(shown)
    if not shown:
        return "none"
    if rest <= 0:
        return ", ".join(shown)
    return f"{', '.join(shown)} and {rest:,} more"


def count_word(n: int) -> str:
    # APA 7, 6.32 (from memory): words for zero to nine in running text.
    words = ("no", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine")
    return words[n] if 0 <= n < 10 else f"{n:,}"


def join_words(items: Sequence[str], conjunction: str = "and") -> str:
    """``a``, ``a and b``, ``a, b and c``."""
    items = list(items)
    if len(items) <= 2:
        return f" {conjunction} ".join(items)
    return ", ".join(items[:-1]) + f" {conjunction} " + items[-1]


def phrase(text: Any) -> str:
    """A clause for the middle of a sentence: no final period, first letter lowered
    unless the first word is an acronym (``RESET``)."""
    s = " ".join(str(text).split()).rstrip(".")
    if len(s) > 1 and s[0].isupper() and s[1].islower():
        s = s[0].lower() + s[1:]
    return s


def upper_first(text: Any) -> str:
    """The text with its first letter in upper case."""
    s = str(text)
    return s[:1].upper() + s[1:]


def paragraph(text: Any) -> str:
    """Join a template's lines into one paragraph line; no space before , ; : or a final period."""
    s = " ".join(str(text).split())
    return re.sub(r"\s+([.,;:])(?=\s|$)", r"\1", s)


def sentence(text: Any) -> str:
    """Text ending in one period (or ? / !); the case of its first letter is kept."""
    s = " ".join(str(text).split())
    if not s:
        return ""
    return s if s[-1] in ".?!" else s + "."

