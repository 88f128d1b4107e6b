"""The text side of the filter protocol: read a request, write a reply.

The Lua filter (``premises.lua``) sends one Markdown request per document. Block
*N* is a premises fence inside a fenced div ``::: {#premises-out-N}``. The reply
uses the same shape: div ``premises-out-N`` holds the Markdown that replaces
block *N*. Nothing here knows statistics; :mod:`premises.quarto` does the work.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

from premises.documents.markdown import RawBlock, find_blocks
from premises.errors import Location, SpecError

__all__ = [
    "OUT_PREFIX",
    "RequestBlock",
    "escape_markdown",
    "read_request",
    "warning_callout",
    "write_reply",
]

OUT_PREFIX = "premises-out-"
"""Id prefix of the divs that carry blocks in a request and sections in a reply."""

_DIV_OPEN = re.compile(r"^ {0,3}:{3,}\s*\{\s*#" + re.escape(OUT_PREFIX) + r"(?P<number>\d+)\s*\}\s*$")
_COLON_RUN = re.compile(r"^ {0,3}(:{3,})", re.MULTILINE)
# CommonMark lets a backslash escape any ASCII punctuation; these are the ones
# that could start markup inside a paragraph.
_SPECIAL = re.compile(r"([\\`*_{}\[\]<>#|~^$@!])")


@dataclass(frozen=True, slots=True)
class RequestBlock:
    """One block of a filter request."""

    number: int
    """The N of its ``premises-out-N`` div (1-based, document order)."""
    raw: RawBlock
    """The fence as written in the request (lines count within the request)."""


def read_request(text: str) -> tuple[RequestBlock, ...]:
    """Read the blocks of a filter request.

    Parameters
    ----------
    text
        The request Markdown the Lua filter wrote.

    Returns
    -------
    tuple of RequestBlock
        In request order.

    Raises
    ------
    SpecError
        When a fence sits outside a ``premises-out-N`` div or a number repeats:
        the filter and the package do not speak the same protocol.

    Examples
    --------
    >>> request = "::: {#premises-out-1}\\n``` premises\\nid: a\\n```\\n:::\\n"
    >>> [(b.number, b.raw.body) for b in read_request(request)]
    [(1, 'id: a\\n')]
    """
    openers: list[tuple[int, int]] = []
    for index, line in enumerate(text.splitlines(), start=1):
        match = _DIV_OPEN.match(line)
        if match:
            openers.append((index, int(match.group("number"))))
    blocks: list[RequestBlock] = []
    seen: set[int] = set()
    for raw in find_blocks(text, "<filter request>"):
        owner = [number for line, number in openers if line < raw.line]
        if not owner or owner[-1] in seen:
            raise SpecError(
                f"the filter request has a premises block at line {raw.line} outside its own "
                f"'{OUT_PREFIX}N' div.",
                Location("<filter request>", raw.line),
                hint="The Lua filter and the package disagree on the protocol; install both "
                "from the same premises version (premises lua-filter, premises quarto install).",
            )
        seen.add(owner[-1])
        blocks.append(RequestBlock(owner[-1], raw))
    return tuple(blocks)


def _div_fence(section: str) -> str:
    """A colon fence longer than any the section uses, so its own divs nest inside."""
    longest = max((len(run) for run in _COLON_RUN.findall(section)), default=0)
    return ":" * max(3, longest + 1)


def write_reply(sections: Sequence[tuple[int, str]]) -> str:
    """Wrap each section in its ``premises-out-N`` div.

    Parameters
    ----------
    sections
        ``(N, markdown)`` pairs.

    Returns
    -------
    str
        The reply Markdown.

    Examples
    --------
    >>> print(write_reply([(1, "Text.")]), end="")
    ::: {#premises-out-1}
    Text.
    :::
    """
    parts = []
    for number, section in sections:
        fence = _div_fence(section)
        body = section.strip("\n")
        parts.append(f"{fence} {{#{OUT_PREFIX}{number}}}\n{body}\n{fence}\n")
    return "\n".join(parts)


def escape_markdown(text: str) -> str:
    """Backslash-escape characters that would start Markdown markup.

    Examples
    --------
    >>> escape_markdown("a_b *c*")
    'a\\\\_b \\\\*c\\\\*'
    """
    return _SPECIAL.sub(r"\\\1", text)


def warning_callout(message: str, flavor: str) -> str:
    """A visible warning that takes the place of a block that failed.

    ``quarto`` and ``pandoc`` write a ``callout-warning`` div; ``gfm`` (which
    has no divs) writes a block quote.
    """
    title = "premises could not render this block"
    lines = [escape_markdown(line) for line in message.splitlines() or [""]]
    if flavor == "gfm":
        quoted = "\n".join(f"> {line}" if line else ">" for line in lines)
        return f"> **Warning: {title}**\n>\n{quoted}\n"
    body = "\n".join(lines)
    return f"::: {{.callout-warning}}\n**{title}**\n\n{body}\n:::\n"
