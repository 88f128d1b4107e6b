"""The rule language of ``exclude: [{when: ...}]``, parsed by hand and never run as Python.

A rule comes from a document, so it is read by a small tokenizer and a
recursive-descent parser written here; no rule text ever reaches ``eval``,
``exec``, ``compile`` or ``DataFrame.query``. The grammar, lowest precedence
first (Python's precedence, so rules read the way they look)::

    rule       := and ('or' and)*
    and        := not ('and' not)*
    not        := 'not' not | comparison
    comparison := sum (CMP sum)*                  CMP: == != < <= > >=, chains allowed
                | sum ['not'] 'in' list
                | sum 'is' ['not'] 'missing'
    sum        := term (('+' | '-') term)*
    term       := unary (('*' | '/' | '%') unary)*
    unary      := ('-' | '+') unary | power
    power      := atom ['**' unary]
    atom       := NUMBER | 'text' | "text" | true | false | name | `odd name` | '(' rule ')'
    list       := '[' [item (',' item)* [',']] ']'    item: number, text, true or false

Missing values follow three-valued (Kleene) logic: a comparison with a missing
value is *unknown*, ``not`` and ``and``/``or`` keep it unknown, and a row whose
rule ends unknown is not excluded. Only ``is missing`` matches missing values.
So ``x > 5`` and ``not (x <= 5)`` both leave rows with a missing ``x`` alone.
An undefined arithmetic result (``0 / 0``) counts as missing; ``1 / 0`` is infinity.

Values have kinds (numbers, text, true/false, dates); comparing different kinds
(text with a number) or doing arithmetic on text is a DataError, raised when the
data are known. A date column compares with a quoted date: ``day >= '2024-01-31'``.

The parser builds the frozen node tree below; :func:`evaluate_rule` walks it
with vectorised numpy/pandas operations on the data.
"""

from __future__ import annotations

import keyword
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from premises.errors import DataError, Location, RuleError

__all__ = [
    "MAX_RULE_DEPTH",
    "MAX_RULE_LENGTH",
    "BinOp",
    "BoolOp",
    "Column",
    "Compare",
    "InList",
    "IsMissing",
    "Literal",
    "Node",
    "Not",
    "Rule",
    "Unary",
    "describe_rule",
    "evaluate_rule",
    "parse_rule",
]

MAX_RULE_LENGTH = 2000
"""Longest rule text accepted, checked before anything is parsed."""
MAX_RULE_DEPTH = 50
"""Deepest nesting of operators and parentheses accepted."""

_LANGUAGE_HINT = (
    "A rule may use column names (`odd name` in backquotes), numbers, quoted text, "
    "true/false, comparisons (== != < <= > >=), and/or/not, `x in [a, b]`, "
    "arithmetic (+ - * / % **), `x is missing` and parentheses."
)


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
_CONDITIONS = (Compare, InList, IsMissing, Not, BoolOp)


@dataclass(frozen=True, slots=True)
class Rule:
    """A parsed, checked exclusion rule."""

    text: str
    """The rule as written."""
    root: Node
    """Root of the node tree."""
    columns: tuple[str, ...]
    """Data columns the rule reads, in order of first appearance."""


# --- tokens ------------------------------------------------------------------

_NUMBER = re.compile(r"(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?", re.ASCII)
_OPERATORS = (
    "**",
    "==",
    "!=",
    "<=",
    ">=",
    "<>",
    ":=",
    "//",
    "<<",
    ">>",
    "&&",
    "||",
    "<",
    ">",
    "+",
    "-",
    "*",
    "/",
    "%",
    "(",
    ")",
    "[",
    "]",
    ",",
    "=",
    ".",
    ":",
    "{",
    "}",
    ";",
    "&",
    "|",
    "!",
    "~",
    "^",
    "@",
)  # longest first, so "**" wins over "*"
_COMPARISONS = ("==", "!=", "<", "<=", ">", ">=")
_WORDS = frozenset({"and", "or", "not", "in", "is", "missing", "true", "false", "True", "False"})
_STRING_PREFIXES = frozenset({"f", "r", "b", "u", "rb", "br", "fr", "rf"})
_STATEMENT_WORDS = frozenset(
    {
        "import",
        "from",
        "def",
        "class",
        "return",
        "del",
        "global",
        "nonlocal",
        "assert",
        "raise",
        "pass",
        "with",
        "while",
        "for",
        "if",
        "try",
        "exec",
        "print",
    }
)


@dataclass(frozen=True, slots=True)
class _Token:
    kind: str
    """num, str, name, qname (backquoted name), op or end."""
    text: str
    pos: int
    """0-based offset in the rule text."""
    value: bool | int | float | str | None = None


def _shorten(text: str, limit: int = 80) -> str:
    """The rule text for a message, cut to ``limit`` characters."""
    flat = " ".join(text.split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


class _Reader:
    """Tokenizer and parser of one rule; every failure is a located RuleError."""

    def __init__(self, text: str, location: Location | None) -> None:
        self.text = text
        self.location = location
        self.tokens: list[_Token] = []
        self.index = 0
        self.nesting = 0

    def fail(self, problem: str, hint: str = _LANGUAGE_HINT) -> NoReturn:
        raise RuleError(f"The rule `{_shorten(self.text)}` {problem}", self.location, hint)

    # tokenizer

    def tokenize(self) -> None:
        text, i, depth = self.text, 0, 0
        while i < len(text):
            ch = text[i]
            if ch.isspace():
                i += 1
            elif ch in "0123456789" or (ch == "." and text[i + 1 : i + 2] in tuple("0123456789")):
                i = self._read_number(i)
            elif ch in "'\"":
                i = self._read_string(i)
            elif ch == "`":
                end = text.find("`", i + 1)
                if end < 0:
                    self.fail(
                        f"has a backquote at character {i + 1} without its closing backquote."
                    )
                if end == i + 1:
                    self.fail(f"has empty backquotes at character {i + 1}.")
                self.tokens.append(_Token("qname", text[i : end + 1], i, text[i + 1 : end]))
                i = end + 1
            elif ch == "_" or ch.isalpha():
                i = self._read_name(i)
            else:
                op = next((o for o in _OPERATORS if text.startswith(o, i)), None)
                if op is None:
                    self._refuse_character(ch, i)
                depth += op in "([{"
                depth -= op in ")]}"
                if depth > MAX_RULE_DEPTH:
                    self.fail(
                        f"is nested deeper than {MAX_RULE_DEPTH} levels.",
                        "Split it into simpler rules.",
                    )
                self.tokens.append(_Token("op", op, i))
                i += len(op)
        self.tokens.append(_Token("end", "", len(text)))

    def _read_number(self, i: int) -> int:
        match = _NUMBER.match(self.text, i)
        assert match is not None  # the caller saw a digit
        end = match.end()
        if end < len(self.text) and (self.text[end].isalnum() or self.text[end] in "_."):
            self.fail(
                f"has a malformed number at character {i + 1} (`{self.text[i : end + 1]}`).",
                "Write numbers as 12, 0.5 or 1e-3; no underscores, hex, complex numbers or units.",
            )
        word = match.group()
        value: int | float
        if any(c in word for c in ".eE"):
            value = float(word)
        else:
            big = int(word)
            value = big if big <= np.iinfo(np.int64).max else float(word)
        self.tokens.append(_Token("num", word, i, value))
        return end

    def _read_string(self, i: int) -> int:
        quote, j = self.text[i], i + 1
        chars: list[str] = []
        while j < len(self.text):
            ch = self.text[j]
            if ch == quote:
                self.tokens.append(_Token("str", self.text[i : j + 1], i, "".join(chars)))
                return j + 1
            if ch == "\\" and j + 1 < len(self.text) and self.text[j + 1] in "\\'\"":
                chars.append(self.text[j + 1])
                j += 2
                continue
            chars.append(ch)
            j += 1
        self.fail(
            f"has text starting at character {i + 1} without its closing quote ({quote}).",
            "Close the quoted text; inside it, write \\' or \\\" for a quote character.",
        )

    def _read_name(self, i: int) -> int:
        j = i
        while j < len(self.text) and (self.text[j].isalnum() or self.text[j] == "_"):
            j += 1
        word = self.text[i:j]
        if not word.isidentifier():
            self.fail(
                f"has a name `{word}` at character {i + 1} that is not a plain name.",
                "Put column names with unusual characters in backquotes: `odd name`.",
            )
        if j < len(self.text) and self.text[j] in "'\"" and word.lower() in _STRING_PREFIXES:
            self.fail(
                f"uses a prefixed string or f-string (`{word}{self.text[j]}...`), "
                "which the rule language does not allow.",
                "Write plain quoted text, e.g. 'abc', without a prefix.",
            )
        if len(word) >= 4 and word.startswith("__") and word.endswith("__"):
            self.fail(
                f"uses the name `{word}`; names with double underscores on both sides are not allowed.",
                "If a data column really has this name, put it in backquotes: `" + word + "`.",
            )
        self.tokens.append(_Token("name", word, i))
        return j

    def _refuse_character(self, ch: str, i: int) -> NoReturn:
        if ch == "#":
            self.fail(
                f"has '#' at character {i + 1}; comments are not allowed.", "Remove the comment."
            )
        if ch == "\\":
            self.fail(f"has a backslash at character {i + 1} outside quoted text.")
        self.fail(
            f"has the character {ch!r} at character {i + 1}, which the rule language does not use."
        )

    # parser helpers

    def peek(self, ahead: int = 0) -> _Token:
        return self.tokens[min(self.index + ahead, len(self.tokens) - 1)]

    def advance(self) -> _Token:
        token = self.peek()
        self.index += 1
        return token

    def at(self, kind: str, *texts: str, ahead: int = 0) -> bool:
        token = self.peek(ahead)
        return token.kind == kind and (not texts or token.text in texts)

    def at_word(self, *words: str, ahead: int = 0) -> bool:
        return self.at("name", *words, ahead=ahead)

    def enter(self) -> None:
        self.nesting += 1
        if self.nesting > MAX_RULE_DEPTH:
            self.fail(
                f"is nested deeper than {MAX_RULE_DEPTH} levels.", "Split it into simpler rules."
            )

    def leave(self) -> None:
        self.nesting -= 1

    # grammar

    def parse(self) -> Node:
        self.tokenize()
        if self.at("end"):
            self.fail("is empty.", "Write a condition, e.g. `speed > 100`.")
        node = self.parse_or()
        if not self.at("end"):
            self.unexpected(self.peek())
        return node

    def parse_or(self) -> Node:
        operands = [self.parse_and()]
        while self.at_word("or"):
            self.advance()
            operands.append(self.parse_and())
        return operands[0] if len(operands) == 1 else BoolOp("or", tuple(operands))

    def parse_and(self) -> Node:
        operands = [self.parse_not()]
        while self.at_word("and"):
            self.advance()
            operands.append(self.parse_not())
        return operands[0] if len(operands) == 1 else BoolOp("and", tuple(operands))

    def parse_not(self) -> Node:
        if not self.at_word("not"):
            return self.parse_comparison()
        self.advance()
        self.enter()
        operand = self.parse_not()
        self.leave()
        return Not(operand)

    def parse_comparison(self) -> Node:
        left = self.parse_sum()
        node: Node
        if self.at("op", *_COMPARISONS):
            ops: list[str] = []
            comparators: list[Node] = []
            while self.at("op", *_COMPARISONS):
                ops.append(self.advance().text)
                comparators.append(self.parse_sum())
            node = Compare(left, tuple(ops), tuple(comparators))
        elif self.at_word("in") or (self.at_word("not") and self.at_word("in", ahead=1)):
            negated = self.advance().text == "not"
            if negated:
                self.advance()
            node = InList(left, self.parse_list(), negated)
        elif self.at_word("is"):
            self.advance()
            negated = self.at_word("not")
            if negated:
                self.advance()
            if not self.at_word("missing"):
                self.fail(
                    "uses `is` other than in `is missing` / `is not missing`.",
                    "Compare values with == or !=; test for a missing value with `x is missing`.",
                )
            self.advance()
            node = IsMissing(left, negated)
        else:
            return left
        if (
            self.at("op", *_COMPARISONS)
            or self.at_word("in", "is")
            or (self.at_word("not") and self.at_word("in", ahead=1))
        ):
            self.fail(
                "chains `in` or `is missing` with another comparison.",
                "Join the conditions with `and`, e.g. `x > 0 and x in [1, 2]`.",
            )
        return node

    def parse_sum(self) -> Node:
        node = self.parse_term()
        while self.at("op", "+", "-"):
            op = self.advance().text
            node = BinOp(op, node, self.parse_term())
        return node

    def parse_term(self) -> Node:
        node = self.parse_unary()
        while self.at("op", "*", "/", "%"):
            op = self.advance().text
            node = BinOp(op, node, self.parse_unary())
        return node

    def parse_unary(self) -> Node:
        if not self.at("op", "-", "+"):
            return self.parse_power()
        op = self.advance().text
        self.enter()
        operand = self.parse_unary()
        self.leave()
        return Unary(op, operand)

    def parse_power(self) -> Node:
        base = self.parse_atom()
        self.refuse_postfix(base)
        if not self.at("op", "**"):
            return base
        self.advance()
        self.enter()
        exponent = self.parse_unary()
        self.leave()
        return BinOp("**", base, exponent)

    def parse_atom(self) -> Node:
        token = self.peek()
        if token.kind in ("num", "str"):
            self.advance()
            assert token.value is not None
            return Literal(token.value)
        if token.kind == "qname":
            self.advance()
            return Column(str(token.value))
        if token.kind == "name":
            return self.parse_name(token)
        if token.kind == "end":
            before = self.peek(-1).text if self.index else ""
            self.fail(f"ends where a value was expected (after `{before}`).")
        if token.text == "(":
            self.advance()
            if self.at("op", ")"):
                self.fail(f"has empty parentheses at character {token.pos + 1}.")
            self.enter()
            node = self.parse_or()
            self.leave()
            if self.at("op", ","):
                self.fail(
                    "uses a tuple `(a, b)`, which the rule language does not allow.",
                    "For a set of values write `x in [a, b]` with square brackets.",
                )
            if not self.at("op", ")"):
                self.unexpected(self.peek(), opened=token)
            self.advance()
            return node
        if token.text == "[":
            self.refuse_comprehension()
            self.fail(
                f"has a list at character {token.pos + 1} that does not follow `in`.",
                "A list of values goes after `in` or `not in`: `site in ['a', 'b']`.",
            )
        if token.text == "*":
            self.fail("uses unpacking (`*x`), which the rule language does not allow.")
        if token.text == "**":
            self.fail("uses unpacking (`**x`), which the rule language does not allow.")
        if token.text == "{":
            self.fail("uses a dict or set literal `{...}`, which the rule language does not allow.")
        self.unexpected(token, expected_value=True)

    def parse_name(self, token: _Token) -> Node:
        word = token.text
        following = self.peek(1)
        if word in ("true", "True", "false", "False"):
            self.advance()
            return Literal(word in ("true", "True"))
        if word == "missing":
            self.fail(
                "uses `missing` as a value.",
                "Test for a missing value with `x is missing` (or `x is not missing`).",
            )
        if word in ("None", "null", "NULL"):
            self.fail(
                f"uses `{word}`, which is not a value in the rule language.",
                "Test for a missing value with `x is missing` (or `x is not missing`).",
            )
        if word in _WORDS:
            self.fail(f"has `{word}` at character {token.pos + 1} where a value was expected.")
        if word == "lambda" and (
            following.kind in ("name", "qname") or following.text in (":", "*", "**", ",")
        ):
            self.fail("uses a lambda, which the rule language does not allow.")
        if (
            word in _STATEMENT_WORDS
            and self.index == 0
            and following.kind in ("name", "qname", "num", "str")
        ):
            self.fail(
                f"looks like a statement (`{word} ...`); statements are not allowed.",
                "A rule is a single condition, e.g. `speed > 100 and site in ['a', 'b']`.",
            )
        self.advance()
        return Column(word)

    def parse_list(self) -> tuple[Literal, ...]:
        start = self.peek()
        if not self.at("op", "["):
            self.fail(
                "needs a list in square brackets after `in`.",
                "Write the values in square brackets: `site in ['a', 'b']`.",
            )
        self.refuse_comprehension()
        self.advance()
        items: list[Literal] = []
        while not self.at("op", "]"):
            items.append(self.parse_item(start))
            if self.at("op", ","):
                self.advance()
            elif not self.at("op", "]"):
                if self.at("end"):
                    self.fail(
                        f"has a list starting at character {start.pos + 1} without its closing ]."
                    )
                self.fail(
                    f"has a list starting at character {start.pos + 1} that is not closed properly.",
                    "Separate the values with commas and close the list with ].",
                )
        self.advance()
        return tuple(items)

    def refuse_comprehension(self) -> None:
        """At a '[': refuse `[... for ...]` by name rather than as a bad list item."""
        depth = 0
        for token in self.tokens[self.index :]:
            depth += token.kind == "op" and token.text == "["
            depth -= token.kind == "op" and token.text == "]"
            if token.kind == "name" and token.text == "for":
                self.fail(
                    "uses a comprehension `[... for ...]`, which the rule language does not allow."
                )
            if depth == 0:
                return

    def parse_item(self, start: _Token) -> Literal:
        sign = 1
        if self.at("op", "-", "+"):
            sign = -1 if self.advance().text == "-" else 1
            if not self.at("num"):
                self.fail("has a sign in a list that is not followed by a number.")
        token = self.advance()
        if token.kind == "num" and isinstance(token.value, (int, float)):
            return Literal(sign * token.value)
        if token.kind == "str":
            return Literal(str(token.value))
        if token.kind == "name" and token.text in ("true", "True", "false", "False"):
            return Literal(token.text in ("true", "True"))
        if token.kind == "end":
            self.fail(f"has a list starting at character {start.pos + 1} without its closing ].")
        self.fail(
            f"has `{token.text}` in a list; list items must be numbers, quoted text or true/false.",
            "Put text in quotes: `site in ['a', 'b']`.",
        )

    def refuse_postfix(self, operand: Node) -> None:
        """Calls, attribute access and indexing look like postfix operators; refuse each by name."""
        token = self.peek()
        shown = operand.name if isinstance(operand, Column) else "(...)"
        if self.at("op", "("):
            self.fail(
                f"calls a function (`{shown}(...)`); function calls are not allowed.",
                "Rules cannot call functions: write the arithmetic directly, or compute a "
                "new column in `transforms` and use that.",
            )
        if self.at("op", "."):
            after = self.peek(1)
            attribute = after.text if after.kind == "name" else ""
            self.fail(
                f"uses attribute access (`{shown}.{attribute}`), which the rule language does not allow."
            )
        if self.at("op", "["):
            self.fail(
                f"uses indexing (`{shown}[...]`) at character {token.pos + 1}, "
                "which the rule language does not allow."
            )

    def unexpected(
        self, token: _Token, opened: _Token | None = None, expected_value: bool = False
    ) -> NoReturn:
        """Name the construct that ``token`` starts, or say what was expected instead."""
        text, where = token.text, f"at character {token.pos + 1}"
        specific = {
            ":=": (
                "uses an assignment expression (`:=`), which the rule language does not allow.",
                _LANGUAGE_HINT,
            ),
            "=": (f"uses `=` {where}; assignment is not allowed.", "Compare with `==`."),
            ":": (
                f"uses `:` {where} (a lambda, slice or dict), which the rule language does not allow.",
                _LANGUAGE_HINT,
            ),
            ";": ("uses `;`; statements are not allowed.", "A rule is a single condition."),
            "&": (f"uses `&` {where}.", "Write `and`."),
            "&&": (f"uses `&&` {where}.", "Write `and`."),
            "|": (f"uses `|` {where}.", "Write `or`."),
            "||": (f"uses `||` {where}.", "Write `or`."),
            "!": (f"uses `!` {where}.", "Write `not`, or `!=` for 'not equal'."),
            "<>": (f"uses `<>` {where}.", "Write `!=`."),
            "{": (
                "uses a dict or set literal `{...}`, which the rule language does not allow.",
                _LANGUAGE_HINT,
            ),
        }
        if token.kind == "op" and text in specific:
            self.fail(*specific[text])
        if token.kind == "name" and text in ("if", "else"):
            self.fail(
                "uses a conditional expression (`a if b else c`), which the rule language does not allow.",
                "Combine conditions with and/or instead.",
            )
        if token.kind == "name" and text == "for":
            self.fail(
                "uses a comprehension (`... for ...`), which the rule language does not allow."
            )
        if token.kind == "op" and text in (")", "]", "}") and opened is None:
            self.fail(f"has a closing `{text}` {where} without a matching opening bracket.")
        if opened is not None:
            self.fail(
                f"has an opening parenthesis at character {opened.pos + 1} without its closing `)`."
            )
        if token.kind == "op" and text in ("//", "~", "^", "@", "<<", ">>"):
            self.fail(f"uses the operator `{text}`, which the rule language does not have.")
        if token.kind == "op" and text == ",":
            self.fail(
                f"has a comma {where} outside a list.",
                "A list of values goes after `in`: `x in [a, b]`.",
            )
        if expected_value:
            self.fail(f"has `{text}` {where} where a value was expected.")
        self.fail(
            f"has `{text}` {where} where an operator (such as and, or, ==, +) was expected.",
            "Check for a missing operator or quote; names with spaces go in backquotes: `odd name`.",
        )


# --- shape checks after parsing ----------------------------------------------


def _children(node: Node) -> tuple[Node, ...]:
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


def _tree_depth(root: Node) -> int:
    """Depth of the tree, without recursion (long operator chains are deep but flat in text)."""
    deepest, stack = 0, [(root, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        stack.extend((child, depth + 1) for child in _children(node))
    return deepest


def _is_condition(node: Node) -> bool:
    return isinstance(node, _CONDITIONS) or (
        isinstance(node, Literal) and isinstance(node.value, bool)
    )


def _is_plain_value(node: Node) -> bool:
    return isinstance(node, (BinOp, Unary)) or (
        isinstance(node, Literal) and not isinstance(node.value, bool)
    )


def _check_shape(node: Node, logical: bool, reader: _Reader) -> None:
    """Conditions where and/or/not need them; numbers where arithmetic needs them."""
    if logical and _is_plain_value(node):
        shown = _describe(node)
        reader.fail(
            f"uses `{shown}`, a value, where a condition is needed.",
            f"Compare it with something, e.g. `{shown} > 0`.",
        )
    if isinstance(node, (BinOp, Unary)):
        for child in _children(node):
            if _is_condition(child):
                reader.fail(
                    f"does arithmetic on the condition `{_describe(child)}`.",
                    "Arithmetic works on numbers; combine conditions with and/or/not.",
                )
    for child in _children(node):
        _check_shape(child, isinstance(node, (BoolOp, Not)), reader)


def _collect_columns(node: Node, found: dict[str, None]) -> None:
    if isinstance(node, Column):
        found.setdefault(node.name, None)
    for child in _children(node):
        _collect_columns(child, found)


def parse_rule(text: str, location: Location | None = None) -> Rule:
    """Parse and check an exclusion rule, without touching any data.

    Parameters
    ----------
    text
        The rule as written in the block, e.g. ``"speed > 100 and site in ['a', 'b']"``.
    location
        Where the rule sits (file, line, block, key); carried by any error.

    Returns
    -------
    Rule
        The rule with its node tree and the columns it reads.

    Raises
    ------
    RuleError
        The rule is empty, too long, too deeply nested, does not parse, or uses
        anything outside the rule language (calls, attributes, indexing, ...).

    Examples
    --------
    >>> parse_rule("0 < dose <= 5 and site not in ['x']").columns
    ('dose', 'site')
    """
    if not isinstance(text, str):
        raise RuleError(
            f"A rule must be text; got {type(text).__name__}.",
            location,
            'Write the rule as a quoted string, e.g. when: "speed > 100".',
        )
    if len(text) > MAX_RULE_LENGTH:
        raise RuleError(
            f"The rule `{_shorten(text)}` is {len(text)} characters long, more than the "
            f"{MAX_RULE_LENGTH} allowed.",
            location,
            "Split it into several shorter rules.",
        )
    reader = _Reader(text, location)
    try:
        root = reader.parse()
    except (RecursionError, MemoryError) as exc:  # a guard, should the depth counters miss a path
        raise RuleError(
            f"The rule `{_shorten(text)}` is nested too deeply to read.",
            location,
            "Split it into simpler rules.",
        ) from exc
    if _tree_depth(root) > MAX_RULE_DEPTH:
        reader.fail(
            f"is nested deeper than {MAX_RULE_DEPTH} levels of operators.",
            "Split it into simpler rules, or use `x in [...]` for long lists of values.",
        )
    _check_shape(root, True, reader)
    found: dict[str, None] = {}
    _collect_columns(root, found)
    return Rule(text, root, tuple(found))


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
        and name not in _WORDS
        and not keyword.iskeyword(name)
        and name not in ("None", "null", "NULL", "lambda")
        and not (name.startswith("__") and name.endswith("__"))
    )
    return name if plain else f"`{name}`"


def _format_literal(value: bool | float | str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        if "'" in value and '"' not in value:
            return '"' + value.replace("\\", "\\\\") + '"'
        return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"
    if isinstance(value, float) and np.isinf(value):
        return "1e999" if value > 0 else "-1e999"  # parses back to infinity
    return repr(value)


def _wrap(node: Node, parens: bool) -> str:
    text = _describe(node)
    return f"({text})" if parens else text


def _describe(node: Node) -> str:
    """Canonical text of ``node``, with the fewest parentheses that keep its meaning."""
    if isinstance(node, Column):
        return _format_name(node.name)
    if isinstance(node, Literal):
        return _format_literal(node.value)
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
        items = ", ".join(_format_literal(item.value) for item in node.values)
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
    >>> describe_rule(parse_rule("(speed>100)and(site in['a','b'])"))
    "speed > 100 and site in ['a', 'b']"
    """
    return _describe(rule.root)


# --- evaluation ------------------------------------------------------------------

_KIND_WORDS = {
    "number": "numbers",
    "text": "text",
    "bool": "true/false values",
    "datetime": "dates",
    "empty": "only missing values",
}
_NUMERIC = ("number", "bool")
_COMPARE = {
    "==": np.equal,
    "!=": np.not_equal,
    "<": np.less,
    "<=": np.less_equal,
    ">": np.greater,
    ">=": np.greater_equal,
}
_ARITHMETIC = {
    "+": np.add,
    "-": np.subtract,
    "*": np.multiply,
    "/": np.true_divide,
    "%": np.mod,
    "**": np.power,
}

Truth = tuple[Any, Any]
"""(true, known): boolean arrays or scalars; ``true`` is False wherever ``known`` is."""


@dataclass(frozen=True, slots=True)
class _Value:
    """A column, literal or computed value during evaluation."""

    kind: str
    """number, text, bool, datetime, or empty (a column holding only missing values)."""
    data: Any
    """(n,) array or a scalar; missing entries hold a placeholder."""
    missing: Any
    """(n,) bool array or a scalar bool."""
    label: str
    """How messages name it: "column 'x'", "the number 5", "`x + 1`"."""
    tz: str | None = None
    """Time zone of a zone-aware date column (its data are held in UTC)."""


def _literal_value(value: bool | float | str) -> _Value:
    shown = _format_literal(value)
    if isinstance(value, bool):
        return _Value("bool", value, False, f"`{shown}`")
    if isinstance(value, str):
        return _Value("text", value, False, f"the text {shown}")
    return _Value("number", value, False, f"the number {shown}")


def _column_value(series: pd.Series, name: str, fail: Callable[[str, str], NoReturn]) -> _Value:
    """A data column as a typed value; ``fail(problem, hint)`` raises for unusable columns."""
    label = f"column '{name}'"
    missing = series.isna().to_numpy(dtype=bool)
    if isinstance(series.dtype, pd.CategoricalDtype):
        series = series.astype(object)
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return _Value("bool", series.to_numpy(dtype=bool, na_value=False), missing, label)
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
        if isinstance(dtype, np.dtype) and dtype.kind in "iu":
            return _Value("number", series.to_numpy(), missing, label)  # exact integer comparisons
        return _Value("number", series.to_numpy(dtype=np.float64, na_value=np.nan), missing, label)
    if pd.api.types.is_datetime64_any_dtype(dtype):
        tz = getattr(dtype, "tz", None)
        if tz is not None:
            series = series.dt.tz_convert("UTC").dt.tz_localize(None)
        data = series.to_numpy(dtype="datetime64[ns]")
        return _Value("datetime", data, missing, label, str(tz) if tz is not None else None)
    inferred = pd.api.types.infer_dtype(series, skipna=True) if dtype == object else ""
    if isinstance(dtype, pd.StringDtype) or inferred == "string":
        return _Value("text", series.to_numpy(dtype=object, na_value=""), missing, label)
    if inferred == "empty":
        return _Value("empty", np.zeros(len(series)), missing, label)
    if inferred in ("integer", "floating", "mixed-integer-float", "decimal"):
        return _Value("number", series.to_numpy(dtype=np.float64, na_value=np.nan), missing, label)
    if inferred == "boolean":
        return _Value(
            "bool",
            np.where(missing, False, series.to_numpy(dtype=object)).astype(bool),
            missing,
            label,
        )
    if inferred:
        fail(
            f"reads {label}, which mixes kinds of values (such as numbers and text).",
            "Clean the column so that it holds only numbers, only text or only dates.",
        )
    fail(
        f"reads {label}, whose type ({dtype}) rules cannot compare.",
        "Rules work on numbers, text, true/false values and dates.",
    )


def _suggest(name: str, available: list[str]) -> str:
    """A 'did you mean' sentence plus the list of columns that exist."""
    import difflib

    lowered = {c.lower(): c for c in available}
    close = (
        [lowered[name.lower()]]
        if name.lower() in lowered
        else difflib.get_close_matches(name, available, n=3, cutoff=0.6)
    )
    shown = ", ".join(available[:25]) + (
        f" and {len(available) - 25} more" if len(available) > 25 else ""
    )
    guess = "Did you mean " + " or ".join(f"'{c}'" for c in close) + "? " if close else ""
    return f"{guess}The data have: {shown or 'no columns'}."


def _and(a: Truth, b: Truth) -> Truth:
    true = np.logical_and(a[0], b[0])
    false = np.logical_or(
        np.logical_and(a[1], np.logical_not(a[0])), np.logical_and(b[1], np.logical_not(b[0]))
    )
    return true, np.logical_or(true, false)


def _or(a: Truth, b: Truth) -> Truth:
    true = np.logical_or(a[0], b[0])
    false = np.logical_and(
        np.logical_and(a[1], np.logical_not(a[0])), np.logical_and(b[1], np.logical_not(b[0]))
    )
    return true, np.logical_or(true, false)


class _Evaluator:
    """Walks a rule's tree over one frame, vectorised; type errors are DataErrors."""

    def __init__(self, rule: Rule, frame: pd.DataFrame, location: Location | None) -> None:
        self.rule = rule
        self.location = location
        self.columns: dict[str, _Value] = {}
        available = [str(c) for c in frame.columns]
        for name in rule.columns:
            if name not in frame.columns:
                self.fail(
                    f"uses column '{name}', which the data do not have.", _suggest(name, available)
                )
            series = frame[name]
            if isinstance(series, pd.DataFrame):
                self.fail(
                    f"uses column '{name}', which appears more than once in the data.",
                    "Give every column in the data file a distinct name.",
                )
            self.columns[name] = _column_value(series, name, self.fail)

    def fail(self, problem: str, hint: str) -> NoReturn:
        raise DataError(f"The rule `{_shorten(self.rule.text)}` {problem}", self.location, hint)

    def value(self, node: Node) -> _Value:
        if isinstance(node, Column):
            return self.columns[node.name]
        if isinstance(node, Literal):
            return _literal_value(node.value)
        if isinstance(node, (Unary, BinOp)):
            return self.arithmetic(node)
        true, known = self.truth(node)
        return _Value("bool", true, np.logical_not(known), f"the condition `{_describe(node)}`")

    def arithmetic(self, node: Unary | BinOp) -> _Value:
        operands = [self.value(child) for child in _children(node)]
        for operand in operands:
            if operand.kind not in (*_NUMERIC, "empty"):
                self.fail(
                    f"does arithmetic (`{node.op}`) on {operand.label}, which holds "
                    f"{_KIND_WORDS[operand.kind]}.",
                    "Arithmetic works on numbers; compare text with == or `in [...]`.",
                )
        label = f"`{_describe(node)}`"
        if any(operand.kind == "empty" for operand in operands):
            return _Value("empty", 0.0, True, label)
        numbers = [np.asarray(operand.data, dtype=np.float64) for operand in operands]
        with np.errstate(all="ignore"):  # 1/0 -> inf and 0/0 -> nan are results, not warnings
            result = (
                np.negative(numbers[0])
                if node.op == "-" and len(numbers) == 1
                else (
                    numbers[0]
                    if len(numbers) == 1
                    else _ARITHMETIC[node.op](numbers[0], numbers[1])
                )
            )
        missing = np.isnan(result)
        for operand in operands:
            missing = np.logical_or(missing, operand.missing)
        return _Value("number", result, missing, label)

    def truth(self, node: Node) -> Truth:
        if isinstance(node, Not):
            true, known = self.truth(node.operand)
            return np.logical_and(np.logical_not(true), known), known
        if isinstance(node, BoolOp):
            combine = _and if node.op == "and" else _or
            result = self.truth(node.operands[0])
            for operand in node.operands[1:]:
                result = combine(result, self.truth(operand))
            return result
        if isinstance(node, Compare):
            values = [self.value(node.left), *(self.value(c) for c in node.comparators)]
            chain: Truth = (True, True)
            for op, left, right in zip(node.ops, values, values[1:]):
                chain = _and(chain, self.compare(op, left, right))
            return chain
        if isinstance(node, InList):
            return self.membership(node)
        if isinstance(node, IsMissing):
            missing = np.asarray(self.value(node.operand).missing, dtype=bool)
            return (np.logical_not(missing) if node.negated else missing), True
        value = self.value(node)  # a column or true/false standing alone as a condition
        if value.kind == "empty":
            return False, False
        if value.kind != "bool":
            example = (
                f"{_describe(node)} == 'a'" if value.kind == "text" else f"{_describe(node)} > 0"
            )
            self.fail(
                f"uses {value.label}, which holds {_KIND_WORDS[value.kind]}, as a condition.",
                f"Compare it with something, e.g. `{example}`.",
            )
        known = np.logical_not(value.missing)
        return np.logical_and(value.data, known), known

    def comparable(self, op: str, left: _Value, right: _Value) -> tuple[Any, Any]:
        """The two operands' data in a form numpy compares, or a DataError naming both."""
        kinds = {left.kind, right.kind}
        if kinds <= set(_NUMERIC) or len(kinds) == 1:
            return left.data, right.data
        if kinds == {"datetime", "text"}:
            dates, text = (left, right) if left.kind == "datetime" else (right, left)
            if np.ndim(text.data) == 0:
                when = self.parse_date(str(text.data), dates.tz)
                return (left.data, when) if left is dates else (when, right.data)
        hint = "Compare values of the same kind."
        if kinds == {"text", "number"}:
            text_side = left if left.kind == "text" else right
            hint = (
                "Quote the number if the column holds labels (e.g. site == '5'), "
                "or check that the column was read as numbers."
                if text_side.label.startswith("column")
                else "Write the number without quotes, or check that the column was read as text."
            )
        elif "datetime" in kinds:
            hint = "Compare dates with a quoted date, e.g. day >= '2024-01-31'."
        elif "bool" in kinds:
            hint = "Compare true/false columns with true or false."
        self.fail(
            f"compares {left.label} ({_KIND_WORDS[left.kind]}) with {right.label} "
            f"({_KIND_WORDS[right.kind]}) using `{op}`.",
            hint,
        )

    def parse_date(self, text: str, tz: str | None) -> np.datetime64:
        try:
            stamp = pd.Timestamp(text)
        except (ValueError, TypeError, OverflowError) as exc:
            raise DataError(
                f"The rule `{_shorten(self.rule.text)}` compares a date column with "
                f"'{text}', which is not a date.",
                self.location,
                "Write dates as 'YYYY-MM-DD' or 'YYYY-MM-DD HH:MM'.",
            ) from exc
        if pd.isna(stamp):
            self.fail(
                f"compares a date column with '{text}', which is not a date.",
                "Write dates as 'YYYY-MM-DD' or 'YYYY-MM-DD HH:MM'.",
            )
        if stamp.tz is None and tz is not None:
            stamp = stamp.tz_localize(tz)  # a plain date means the column's own zone
        if stamp.tz is not None:
            stamp = stamp.tz_convert("UTC").tz_localize(None)
        return np.datetime64(stamp.as_unit("ns").to_datetime64())

    def compare(self, op: str, left: _Value, right: _Value) -> Truth:
        if "empty" in (left.kind, right.kind):
            return False, False
        a, b = self.comparable(op, left, right)
        known = np.logical_not(np.logical_or(left.missing, right.missing))
        with np.errstate(invalid="ignore"):
            result = np.asarray(_COMPARE[op](a, b), dtype=bool)
        return np.logical_and(result, known), known

    def membership(self, node: InList) -> Truth:
        value = self.value(node.operand)
        if value.kind == "empty":
            return False, False
        choices = [
            self.comparable("in", value, _literal_value(item.value))[1] for item in node.values
        ]
        if np.ndim(value.data) == 0:
            hit: Any = any(bool(np.asarray(_COMPARE["=="](value.data, c))) for c in choices)
        else:
            hit = pd.Series(value.data, copy=False).isin(choices).to_numpy(dtype=bool)
        known = np.logical_not(value.missing)
        return np.logical_and(np.logical_not(hit) if node.negated else hit, known), known


def evaluate_rule(rule: Rule, frame: pd.DataFrame, location: Location | None = None) -> np.ndarray:
    """Rows of ``frame`` that ``rule`` matches, as a boolean mask.

    Parameters
    ----------
    rule
        A rule from :func:`parse_rule`.
    frame
        The data; columns are looked up by name.
    location
        Where the rule sits; carried by any error.

    Returns
    -------
    numpy.ndarray
        ``(len(frame),)`` bool array; True marks a row the rule excludes. A row
        whose rule is unknown because of a missing value is not matched.

    Raises
    ------
    DataError
        The rule names a column the data lack, compares values of different
        kinds (text with a number), or does arithmetic on text.

    Examples
    --------
    >>> frame = pd.DataFrame({"x": [1.0, None, 7.0]})
    >>> evaluate_rule(parse_rule("x > 5"), frame).tolist()
    [False, False, True]
    """
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"evaluate_rule needs a pandas DataFrame, got {type(frame).__name__}")
    true, known = _Evaluator(rule, frame, location).truth(rule.root)
    mask = np.asarray(np.logical_and(true, known), dtype=bool)
    return np.broadcast_to(mask, (len(frame),)).copy()
