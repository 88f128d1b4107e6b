"""The node tree of a parsed rule, and its canonical text.

:func:`describe_rule` prints a tree back as text with one spacing and the
fewest parentheses that keep its meaning; the ledger shows that text. Standard
library only.
"""

from __future__ import annotations

import keyword
import math
from dataclasses import dataclass

from premises.rules.tokens import WORDS

# --- the node tree ---------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Column:
    """A data column, by name."""

    name: str


@dataclass(frozen=True, slots=True)
class Literal:
    """A number, a piece of text, or true/false."""

    value: bool | int | float | str


@dataclass(frozen=True, slots=True)
class Unary:
    """``-x`` or ``+x``."""

    op: str
    operand: Node


@dataclass(frozen=True, slots=True)
class BinOp:
    """Arithmetic: ``+ - * / % **``."""

    op: str
    left: Node
    right: Node


@dataclass(frozen=True, slots=True)
class Compare:
    """A comparison, possibly chained: ``0 < x <= 5``."""

    left: Node
    ops: tuple[str, ...]
    comparators: tuple[Node, ...]


@dataclass(frozen=True, slots=True)
class InList:
    """``x in [...]`` or ``x not in [...]``."""

    operand: Node
    values: tuple[Literal, ...]
    negated: bool


@dataclass(frozen=True, slots=True)
class IsMissing:
    """``x is missing`` or ``x is not missing``."""

    operand: Node
    negated: bool


@dataclass(frozen=True, slots=True)
class Not:
    """``not x``."""

    operand: Node


@dataclass(frozen=True, slots=True)
class BoolOp:
    """``a and b and ...`` or ``a or b or ...``."""

    op: str
    operands: tuple[Node, ...]


Node = Column | Literal | Unary | BinOp | Compare | InList | IsMissing | Not | BoolOp
CONDITIONS = (Compare, InList, IsMissing, Not, BoolOp)


@dataclass(frozen=True, slots=True)
class Rule:
    """A parsed, checked exclusion rule."""

    text: str
    """The rule as written."""
    root: Node
    """Root of the node tree."""
    columns: tuple[str, ...]
    """Data columns the rule reads, in order of first appearance."""


# --- walking the tree --------------------------------------------------------------


def children(node: Node) -> tuple[Node, ...]:
    """Direct sub-nodes of ``node``."""
    if isinstance(node, (Unary, Not, InList, IsMissing)):
        return (node.operand,)
    if isinstance(node, BinOp):
        return (node.left, node.right)
    if isinstance(node, Compare):
        return (node.left, *node.comparators)
    if isinstance(node, BoolOp):
        return node.operands
    return ()


def tree_depth(root: Node) -> int:
    """Depth of the tree, without recursion (long operator chains are deep but flat in text)."""
    deepest, stack = 0, [(root, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        stack.extend((child, depth + 1) for child in children(node))
    return deepest


# --- canonical text ------------------------------------------------------------

_PRECEDENCE = {"or": 1, "and": 2, "+": 5, "-": 5, "*": 6, "/": 6, "%": 6, "**": 8}


def _precedence(node: Node) -> int:
    if isinstance(node, BoolOp):
        return _PRECEDENCE[node.op]
    if isinstance(node, Not):
        return 3
    if isinstance(node, (Compare, InList, IsMissing)):
        return 4
    if isinstance(node, BinOp):
        return _PRECEDENCE[node.op]
    if isinstance(node, Unary):
        return 7
    if isinstance(node, Literal) and not isinstance(node.value, (bool, str)) and node.value < 0:
        return 7  # printed with a leading minus
    return 9


def _format_name(name: str) -> str:
    plain = (
        name.isidentifier()
        and name not in WORDS
        and not keyword.iskeyword(name)
        and name not in ("None", "null", "NULL", "lambda")
        and not (name.startswith("__") and name.endswith("__"))
    )
    return name if plain else f"`{name}`"


def format_literal(value: bool | float | str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        if "'" in value and '"' not in value:
            return '"' + value.replace("\\", "\\\\") + '"'
        return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"
    if isinstance(value, float) and math.isinf(value):
        return "1e999" if value > 0 else "-1e999"  # parses back to infinity
    return repr(value)


def _wrap(node: Node, parens: bool) -> str:
    text = describe_node(node)
    return f"({text})" if parens else text


def describe_node(node: Node) -> str:
    """Canonical text of ``node``, with the fewest parentheses that keep its meaning."""
    if isinstance(node, Column):
        return _format_name(node.name)
    if isinstance(node, Literal):
        return format_literal(node.value)
    if isinstance(node, Unary):
        inner = _wrap(node.operand, _precedence(node.operand) < 7)
        return node.op + (" " + inner if inner[:1] in "+-" else inner)
    if isinstance(node, BinOp):
        own = _precedence(node)
        if node.op == "**":  # right-associative; the exponent may carry a sign
            left = _wrap(node.left, _precedence(node.left) <= own)
            right = _wrap(node.right, _precedence(node.right) < 7)
        else:
            left = _wrap(node.left, _precedence(node.left) < own)
            right = _wrap(node.right, _precedence(node.right) <= own)
        return f"{left} {node.op} {right}"
    if isinstance(node, Compare):
        parts = [_wrap(node.left, _precedence(node.left) <= 4)]
        for op, comparator in zip(node.ops, node.comparators):
            parts += [op, _wrap(comparator, _precedence(comparator) <= 4)]
        return " ".join(parts)
    if isinstance(node, InList):
        items = ", ".join(format_literal(item.value) for item in node.values)
        word = "not in" if node.negated else "in"
        return f"{_wrap(node.operand, _precedence(node.operand) <= 4)} {word} [{items}]"
    if isinstance(node, IsMissing):
        word = "is not missing" if node.negated else "is missing"
        return f"{_wrap(node.operand, _precedence(node.operand) <= 4)} {word}"
    if isinstance(node, Not):
        # parenthesise and/or (needed) and comparisons (clearer: `not (x > 1)`)
        return "not " + _wrap(node.operand, _precedence(node.operand) in (1, 2, 4))
    own = _precedence(node)
    return f" {node.op} ".join(_wrap(o, _precedence(o) <= own) for o in node.operands)


def describe_rule(rule: Rule) -> str:
    """Canonical text of a rule, for the ledger: one spacing, minimal parentheses.

    ``parse_rule(describe_rule(r))`` has the same tree as ``r``.

    Examples
    --------
    >>> from premises.rules import parse_rule
    >>> describe_rule(parse_rule("(speed>100)and(site in['a','b'])"))
    "speed > 100 and site in ['a', 'b']"
    """
    return describe_node(rule.root)
