"""Where a block's values came from, and its YAML read with the line of every key.

Every message about a block is located: document line (fence line plus the
YAML mark inside the block), block id and key path. :func:`load_yaml` reads
the body with PyYAML's safe loader, records the document line of every key
path, refuses duplicate keys, tabs, stray line-break characters and alias
"bombs", and translates YAML errors into SpecErrors.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from typing import Any, Literal

import yaml

from premises.errors import Location, SpecError
from premises.keys import ID_PATTERN, MAX_BLOCK_CHARS, MAX_BLOCK_ITEMS


@dataclass(frozen=True, slots=True)
class SourceRef:
    """Where a block came from, so every later error can point back at it."""

    file: str | None
    """Document path as the user named it (None for a string input)."""
    line: int | None
    """1-based line of the opening fence in the document."""
    key_lines: tuple[tuple[str, int], ...] = ()
    """(dotted key path, 1-based document line) for every key in the block."""

    def line_of(self, key: str) -> int | None:
        """Document line of ``key`` (or of its nearest parent), else the fence line."""
        lines = dict(self.key_lines)
        probe = key
        while probe:
            if probe in lines:
                return lines[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return self.line

    def locate(self, block: str | None, key: str | None = None) -> Location:
        """A :class:`Location` for ``key`` in this block."""
        return Location(self.file, self.line_of(key) if key else self.line, block, key)



@dataclass(frozen=True, slots=True)
class Context:
    """Where values being checked came from, so every message can say where."""

    file: str | None
    fence_line: int
    block: str | None = None
    key_lines: tuple[tuple[str, int], ...] = ()
    origin: Literal["block", "attributes", "defaults", "overrides"] = "block"

    def locate(self, path: str) -> Location:
        if self.origin == "block":
            line = SourceRef(self.file, self.fence_line, self.key_lines).line_of(path)
        elif self.origin == "attributes":
            line = self.fence_line
        else:
            line = None
        return Location(self.file, line, self.block, path or None)

    def fail(self, path: str, problem: str, hint: str | None = None) -> SpecError:
        notes = {
            "attributes": "The value comes from the fence's attributes.",
            "defaults": "The value comes from the document's front matter or project settings.",
            "overrides": "The value comes from the command line.",
        }
        extra = notes.get(self.origin)
        if extra:
            hint = f"{hint} {extra}" if hint else extra
        return SpecError(problem, self.locate(path), hint)



def quote_value(value: Any) -> str:
    """A value as a message quotes it."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "nothing (null)"
    if isinstance(value, str):
        return f"'{value}'"
    if isinstance(value, (int, float)):
        return f"{value:g}" if isinstance(value, float) else str(value)
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, dict):
        return "a mapping"
    return f"a {type(value).__name__} value"


_YAML_BREAK = re.compile("\r\n|[\r\n\x85\u2028\u2029]")
"""Line breaks as YAML counts them."""


_OTHER_BREAK = re.compile("[\x85\u2028\u2029]")
"""Characters YAML reads as line breaks but a Markdown document does not."""


def _reject_other_breaks(body: str, ctx: Context) -> None:
    """Refuse U+0085, U+2028 and U+2029: YAML would break the line there and every
    later line number would disagree with the document's."""
    found = _OTHER_BREAK.search(body)
    if found is not None:
        line = ctx.fence_line + 1 + len(re.findall("\r\n|\r|\n", body[: found.start()]))
        raise SpecError(
            f"The block holds the character U+{ord(found.group()):04X}, which YAML reads as a line "
            "break but the document does not.",
            Location(ctx.file, line, ctx.block),
            "Replace it with a space or an ordinary line break (it often comes from pasted text).",
        )


def _reject_tabs(body: str, ctx: Context) -> None:
    for number, text in enumerate(_YAML_BREAK.split(body)):
        indent = text[: len(text) - len(text.lstrip(" \t"))]
        if "\t" in indent:
            raise SpecError(
                "This line of the block is indented with a tab.",
                Location(ctx.file, ctx.fence_line + 1 + number, ctx.block),
                "YAML allows only spaces for indentation; replace the tab with spaces.",
            )


def _record_lines(
    node: yaml.Node, path: str, ctx: Context, lines: dict[str, int], stack: tuple[int, ...] = ()
) -> None:
    """Map every key path below ``node`` to its document line; reject duplicate keys."""
    if id(node) in stack:  # a recursive alias; the validator rejects the value itself
        return
    if len(lines) > MAX_BLOCK_ITEMS:
        raise SpecError(
            f"The block holds more than {MAX_BLOCK_ITEMS:,} keys and list items once its "
            "YAML aliases (*name) are expanded.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "Write the values out instead of repeating anchors; a block needs a few dozen keys.",
        )
    stack = (*stack, id(node))
    if isinstance(node, yaml.MappingNode):
        seen: dict[str, int] = {}
        for key_node, value_node in node.value:
            name = str(key_node.value)
            sub = f"{path}.{name}" if path else name
            line = ctx.fence_line + 1 + key_node.start_mark.line
            if name in seen:
                raise SpecError(
                    f"The key '{sub}' appears twice (first on line {seen[name]}).",
                    Location(ctx.file, line, ctx.block, sub),
                    "Keep one of them; YAML would silently keep only the last.",
                )
            seen[name] = line
            lines.setdefault(sub, line)
            _record_lines(value_node, sub, ctx, lines, stack)
    elif isinstance(node, yaml.SequenceNode):
        for index, item in enumerate(node.value):
            sub = f"{path}[{index}]"
            lines.setdefault(sub, ctx.fence_line + 1 + item.start_mark.line)
            _record_lines(item, sub, ctx, lines, stack)


def _yaml_problem(exc: yaml.MarkedYAMLError) -> str:
    """PyYAML's context and problem as one clause ("while parsing ..., expected ...")."""
    return ", ".join(part for part in (exc.context, exc.problem) if part) or str(exc)


def _error_line(exc: yaml.MarkedYAMLError, body: str, ctx: Context) -> int:
    """Document line of a YAML error; a mark past the body's end falls back to its context."""
    last = len(_YAML_BREAK.findall(body.rstrip("\r\n")))
    marks = [m for m in (exc.problem_mark, exc.context_mark) if m is not None]
    inside = [m for m in marks if m.line <= last]
    if inside:
        return ctx.fence_line + 1 + int(inside[0].line)
    return ctx.fence_line + 1 + last


def _with_block_id(node: yaml.Node, ctx: Context) -> Context:
    """Name the block in messages about its YAML when its 'id' is a plain value."""
    if ctx.block is not None or not isinstance(node, yaml.MappingNode):
        return ctx
    for key_node, value_node in node.value:
        if key_node.value == "id" and isinstance(value_node, yaml.ScalarNode):
            if isinstance(value_node.value, str) and ID_PATTERN.fullmatch(value_node.value):
                return replace(ctx, block=value_node.value)
    return ctx


_ID_LINE = re.compile(r"^id:[ \t]*([a-z0-9-]+)[ \t]*\r?$", re.MULTILINE)
"""A plain top-level ``id:`` line, read from the raw body when YAML cannot read it."""


def _named_from_text(body: str, ctx: Context) -> Context:
    """Name the block in a message about YAML that does not parse, from its ``id:`` line."""
    if ctx.block is not None:
        return ctx
    found = _ID_LINE.search(body)
    return replace(ctx, block=found.group(1)) if found else ctx


def load_yaml(body: str, ctx: Context) -> tuple[dict[str, Any], tuple[tuple[str, int], ...]]:
    """The block's mapping and the document line of every key path."""
    if len(body) > MAX_BLOCK_CHARS:
        raise SpecError(
            f"The block is {len(body):,} characters long, over the limit of {MAX_BLOCK_CHARS:,}.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "Split it into several blocks, or shorten long titles and reasons.",
        )
    _reject_other_breaks(body, ctx)
    _reject_tabs(body, ctx)
    lines: dict[str, int] = {}
    try:
        loader = yaml.SafeLoader(body)
        try:
            node = loader.get_single_node()
            value = None
            if node is not None:
                ctx = _with_block_id(node, ctx)
                _record_lines(node, "", ctx, lines)
                value = loader.construct_document(node)
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        ctx = _named_from_text(body, ctx)
        raise SpecError(
            f"The block is not valid YAML: {_yaml_problem(exc)}.",
            Location(ctx.file, _error_line(exc, body, ctx), ctx.block),
            "Check indentation and quoting near this line; values holding ': ' or ' #' "
            "need quotes.",
        ) from exc
    except yaml.reader.ReaderError as exc:
        ctx = _named_from_text(body, ctx)
        line = ctx.fence_line + 1 + len(_YAML_BREAK.findall(body, 0, exc.position))
        raise SpecError(
            f"The block holds a character YAML does not allow (code point {exc.character:#x}).",
            Location(ctx.file, line, ctx.block),
            "Remove the control character from this line.",
        ) from exc
    except yaml.YAMLError as exc:
        ctx = _named_from_text(body, ctx)
        raise SpecError(
            f"The block is not valid YAML: {exc}.", Location(ctx.file, ctx.fence_line, ctx.block)
        ) from exc
    if value is None:
        raise SpecError(
            "The block is empty.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "A block needs at least 'id', 'data' and 'model' keys.",
        )
    if not isinstance(value, dict):
        raise SpecError(
            f"The block must be a YAML mapping of keys to values; got {quote_value(value)}.",
            Location(
                ctx.file, ctx.fence_line + 1 + (node.start_mark.line if node else 0), ctx.block
            ),
            "Write one 'key: value' per line, e.g. 'id: main', 'data: data.csv'.",
        )
    return value, tuple(lines.items())
