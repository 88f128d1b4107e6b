"""Find premises fences in a Markdown or Quarto document and splice replacements in.

A line-based scanner after the CommonMark rules for fenced code: a fence is three
or more backticks or tildes indented by at most three spaces; the closing fence
uses the same character, is at least as long, and carries nothing but blanks.
Every fence is tracked, so a ```` ```premises ```` written inside a longer
```` ````markdown ```` fence is example text, not a block.

Known limitation: fences nested in list items or block quotes are only found when
their lines start like a top-level fence. The pandoc filters work on the syntax
tree and do find them.

Nothing here knows statistics: a block is returned raw, as text plus positions.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import yaml

from premises.errors import Location, SpecError

__all__ = ["RawBlock", "find_blocks", "read_front_matter", "splice"]

BLOCK_CLASS = "premises"

_LINE = re.compile(r"[^\r\n]*(?:\r\n|\r|\n)|[^\r\n]+\Z")
_OPEN = re.compile(r"^(?P<indent> {0,3})(?P<fence>`{3,}|~{3,})(?P<info>.*)$")
_ATTR_TOKEN = re.compile(
    r"""\#(?P<id>[^\s{}]+)"""
    r"""|\.(?P<cls>[^\s{}=]+)"""
    r"""|(?P<key>[A-Za-z_][\w.:-]*)=(?:"(?P<dq>[^"]*)"|'(?P<sq>[^']*)'|(?P<bare>[^\s"'{}]+))"""
)


@dataclass(frozen=True, slots=True)
class RawBlock:
    """A premises fence as it sits in the document, before its YAML is read."""

    info: str
    """The info string after the opening fence, stripped (``premises``, ``{.premises #a}``)."""
    body: str
    """Text between the fences, fence indentation removed, line endings kept."""
    line: int
    """1-based line of the opening fence."""
    end_line: int
    """1-based line of the closing fence."""
    start: int
    """Character offset where the opening fence line starts (its indentation included)."""
    end: int
    """Character offset just after the closing fence, before that line's line ending."""
    attrs: tuple[tuple[str, str], ...] = ()
    """``#id`` and ``key=val`` pairs of a ``{.premises ...}`` info string; ``#x`` is ``("id", "x")``."""
    classes: tuple[str, ...] = ()
    """Every class of the info string (``premises`` among them)."""
    fence: str = "```"
    """The opening fence characters."""

    @property
    def attr_map(self) -> dict[str, str]:
        """The attributes as a mapping."""
        return dict(self.attrs)


@dataclass(frozen=True, slots=True)
class _Line:
    start: int
    text: str
    """The line without its ending."""
    ending: str


def _split_lines(text: str) -> list[_Line]:
    """Lines with their offsets; CR, LF and CRLF all end a line (CommonMark)."""
    lines = []
    for match in _LINE.finditer(text):
        raw = match.group(0)
        body = raw.rstrip("\r\n")
        lines.append(_Line(match.start(), body, raw[len(body) :]))
    return lines


def _front_matter_length(lines: Sequence[_Line]) -> int:
    """Number of lines of a leading ``---`` ... ``---``/``...`` block, else 0."""
    if not lines or lines[0].text.lstrip("\ufeff").rstrip() != "---":
        return 0
    for number, line in enumerate(lines[1:], start=2):
        if line.text.rstrip() in ("---", "..."):
            return number
    return 0


def _parse_attributes(
    inner: str, file: str | None, line: int
) -> tuple[tuple[str, ...], tuple[tuple[str, str], ...]]:
    """Classes and key/value pairs of a pandoc attribute list (inside the braces)."""
    classes: list[str] = []
    pairs: list[tuple[str, str]] = []
    position = 0
    while position < len(inner):
        if inner[position].isspace():
            position += 1
            continue
        match = _ATTR_TOKEN.match(inner, position)
        if match is None:
            bad = inner[position:].split()[0]
            raise SpecError(
                f"The fence attributes '{{{inner}}}' contain '{bad}', which is not "
                "'.class', '#id' or 'key=value'.",
                Location(file, line),
                "Write the info string like {.premises #my-id key=value}.",
            )
        if match.group("id") is not None:
            pairs.append(("id", match.group("id")))
        elif match.group("cls") is not None:
            classes.append(match.group("cls"))
        else:
            value = next(v for v in match.group("dq", "sq", "bare") if v is not None)
            pairs.append((match.group("key"), value))
        position = match.end()
    return tuple(classes), tuple(pairs)


def _premises_info(
    info: str, file: str | None, line: int
) -> tuple[tuple[str, ...], tuple[tuple[str, str], ...]] | None:
    """Classes and attributes if ``info`` opens a premises block, else None."""
    if info.startswith("{") and info.endswith("}"):
        inner = info[1:-1].strip()
        if re.match(r"[A-Za-z]", inner):
            # Quarto takes `{name ...}` (a letter right after the brace) as an
            # executable cell; for `premises` it would look for an engine.
            if re.split(r"[\s,]", inner, maxsplit=1)[0] == BLOCK_CLASS:
                raise SpecError(
                    f"The fence '{info}' would make Quarto treat this block as an "
                    "executable code cell and look for a 'premises' engine.",
                    Location(file, line),
                    "Write ```premises or ```{.premises} instead.",
                )
            return None
        if not re.search(r"(^|\s)\.premises(\s|$)", inner):
            return None
        return _parse_attributes(inner, file, line)
    words = info.split()
    if words and words[0] == BLOCK_CLASS:
        return (BLOCK_CLASS,), ()
    return None


def _closes(line: str, char: str, length: int) -> bool:
    """Does ``line`` close a fence of ``length`` ``char`` characters?"""
    indent = len(line) - len(line.lstrip(" "))
    if indent > 3:
        return False
    rest = line[indent:]
    run = len(rest) - len(rest.lstrip(char))
    return run >= length and rest[run:].strip(" \t") == ""


def _dedent(text: str, indent: int) -> str:
    """Remove up to ``indent`` leading spaces, as CommonMark does inside a fence."""
    spaces = len(text) - len(text.lstrip(" "))
    return text[min(spaces, indent) :]


def _scan(text: str, file: str | None) -> Iterator[RawBlock]:
    lines = _split_lines(text)
    index = _front_matter_length(lines)
    while index < len(lines):
        opening = _OPEN.match(lines[index].text)
        if opening is None or (opening.group("fence")[0] == "`" and "`" in opening.group("info")):
            index += 1
            continue
        fence, indent = opening.group("fence"), len(opening.group("indent"))
        info = opening.group("info").strip()
        found = _premises_info(info, file, index + 1)
        close = next(
            (
                later
                for later in range(index + 1, len(lines))
                if _closes(lines[later].text, fence[0], len(fence))
            ),
            None,
        )
        if close is None:
            if found is not None:
                raise SpecError(
                    "This premises block has no closing fence.",
                    Location(file, index + 1),
                    f"End the block with a line of at least {len(fence)} '{fence[0]}' "
                    "characters, indented by at most three spaces.",
                )
            return  # an unclosed fence runs to the end of the document (CommonMark)
        if found is not None:
            body = "".join(
                _dedent(lines[k].text, indent) + lines[k].ending for k in range(index + 1, close)
            )
            classes, attrs = found
            yield RawBlock(
                info=info,
                body=body,
                line=index + 1,
                end_line=close + 1,
                start=lines[index].start,
                end=lines[close].start + len(lines[close].text),
                attrs=attrs,
                classes=classes,
                fence=fence,
            )
        index = close + 1


def find_blocks(text: str, file: str | None = None) -> tuple[RawBlock, ...]:
    """Find the premises blocks of a Markdown document.

    Parameters
    ----------
    text
        The whole document.
    file
        Its path, for error messages.

    Returns
    -------
    tuple of RawBlock
        In document order.

    Raises
    ------
    SpecError
        For a ```` ```{premises} ```` fence (Quarto would run it as a code cell),
        malformed fence attributes, or a premises fence that is never closed.

    Examples
    --------
    >>> [b.line for b in find_blocks("text\\n\\n```premises\\nid: a\\n```\\n")]
    [3]
    """
    return tuple(_scan(text, file))


def read_front_matter(text: str, file: str | None = None) -> tuple[dict[str, Any], int]:
    """Read the YAML front matter between leading ``---`` lines.

    Parameters
    ----------
    text
        The whole document.
    file
        Its path, for error messages.

    Returns
    -------
    (dict, int)
        The front matter mapping (empty without front matter) and the number of
        lines it occupies, delimiters included (0 without front matter).

    Raises
    ------
    SpecError
        When the YAML is malformed or is not a mapping; the message gives the line.
    """
    lines = _split_lines(text)
    length = _front_matter_length(lines)
    if length == 0:
        return {}, 0
    source = "".join(line.text + "\n" for line in lines[1 : length - 1])
    try:
        value = yaml.safe_load(source)
    except yaml.MarkedYAMLError as exc:
        # A problem found at the end of the text (an unclosed quote, say) is
        # better placed where its context began.
        last = len(lines[1 : length - 1]) - 1
        marks = [m for m in (exc.problem_mark, exc.context_mark) if m is not None]
        inside = [m for m in marks if m.line <= last] or marks
        line = inside[0].line + 2 if inside else 1
        raise SpecError(
            f"The front matter is not valid YAML: {exc.problem or exc}.",
            Location(file, line),
            "Check indentation and quoting near this line; values holding ': ' or ' #' need quotes.",
        ) from exc
    except yaml.YAMLError as exc:
        raise SpecError(f"The front matter is not valid YAML: {exc}.", Location(file, 1)) from exc
    if value is None:
        return {}, length
    if not isinstance(value, dict):
        raise SpecError(
            "The front matter must be a YAML mapping of keys to values.",
            Location(file, 2),
            "Write it as 'key: value' lines between the two '---' lines.",
        )
    return value, length


def splice(text: str, blocks: Sequence[RawBlock], replacements: Sequence[str]) -> str:
    """Replace each block's fence by its replacement; keep everything else byte for byte.

    Parameters
    ----------
    text
        The document the blocks were found in.
    blocks
        Blocks from :func:`find_blocks` on ``text``, in document order.
    replacements
        One text per block. The line ending after the closing fence is kept, so a
        replacement needs no trailing newline.

    Returns
    -------
    str
        The new document; ``text`` itself when there are no blocks.
    """
    if len(blocks) != len(replacements):
        raise ValueError(
            f"splice needs one replacement per block: {len(blocks)} blocks, "
            f"{len(replacements)} replacements"
        )
    pieces: list[str] = []
    cursor = 0
    for block, replacement in zip(blocks, replacements):
        if block.start < cursor or block.end > len(text):
            raise ValueError("splice needs blocks found in this text, in document order")
        pieces.append(text[cursor : block.start])
        pieces.append(replacement)
        cursor = block.end
    pieces.append(text[cursor:])
    return "".join(pieces)
