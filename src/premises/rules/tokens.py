"""Tokens of the rule language and the stream the parser reads them from.

The tokenizer turns a rule's text into numbers, quoted text, names, backquoted
names and operators; anything else is refused by name. The stream also names
the constructs a rule may not use (calls, indexing, comprehensions, Python
operators such as ``&&`` or ``:=``) when the parser meets them. Standard
library only: reading a rule never loads numpy or pandas.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import NoReturn

from premises.errors import Location, RuleError

MAX_RULE_LENGTH = 2000
"""Longest rule text accepted, checked before anything is parsed."""
MAX_RULE_DEPTH = 50
"""Deepest nesting of operators and parentheses accepted."""

LANGUAGE_HINT = (
    "A rule may use column names (`odd name` in backquotes), numbers, quoted text, "
    "true/false, comparisons (== != < <= > >=), and/or/not, `x in [a, b]`, "
    "arithmetic (+ - * / % **), `x is missing` and parentheses."
)

# --- tokens ------------------------------------------------------------------

_INT64_MAX = 2**63 - 1  # larger integers are read as floats, as a 64-bit column holds them
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
COMPARISONS = ("==", "!=", "<", "<=", ">", ">=")
WORDS = frozenset({"and", "or", "not", "in", "is", "missing", "true", "false", "True", "False"})
_STRING_PREFIXES = frozenset({"f", "r", "b", "u", "rb", "br", "fr", "rf"})
STATEMENT_WORDS = frozenset(
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
class Token:
    kind: str
    """num, str, name, qname (backquoted name), op or end."""
    text: str
    pos: int
    """0-based offset in the rule text."""
    value: bool | int | float | str | None = None


def shorten(text: str, limit: int = 80) -> str:
    """The rule text for a message, cut to ``limit`` characters."""
    flat = " ".join(text.split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


class TokenStream:
    """Tokenizer of one rule and cursor over its tokens; every failure is a located RuleError."""


    def __init__(self, text: str, location: Location | None) -> None:
        self.text = text
        self.location = location
        self.tokens: list[Token] = []
        self.index = 0
        self.nesting = 0

    def fail(self, problem: str, hint: str = LANGUAGE_HINT) -> NoReturn:
        raise RuleError(f"The rule `{shorten(self.text)}` {problem}", self.location, hint)

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
                self.tokens.append(Token("qname", text[i : end + 1], i, text[i + 1 : end]))
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
                self.tokens.append(Token("op", op, i))
                i += len(op)
        self.tokens.append(Token("end", "", len(text)))

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
            value = big if big <= _INT64_MAX else float(word)
        self.tokens.append(Token("num", word, i, value))
        return end

    def _read_string(self, i: int) -> int:
        quote, j = self.text[i], i + 1
        chars: list[str] = []
        while j < len(self.text):
            ch = self.text[j]
            if ch == quote:
                self.tokens.append(Token("str", self.text[i : j + 1], i, "".join(chars)))
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
        self.tokens.append(Token("name", word, i))
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

    def peek(self, ahead: int = 0) -> Token:
        return self.tokens[min(self.index + ahead, len(self.tokens) - 1)]

    def advance(self) -> Token:
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

    # refusals of constructs outside the language

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


    def unexpected(
        self, token: Token, opened: Token | None = None, expected_value: bool = False
    ) -> NoReturn:
        """Name the construct that ``token`` starts, or say what was expected instead."""
        text, where = token.text, f"at character {token.pos + 1}"
        specific = {
            ":=": (
                "uses an assignment expression (`:=`), which the rule language does not allow.",
                LANGUAGE_HINT,
            ),
            "=": (f"uses `=` {where}; assignment is not allowed.", "Compare with `==`."),
            ":": (
                f"uses `:` {where} (a lambda, slice or dict), which the rule language does not allow.",
                LANGUAGE_HINT,
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
                LANGUAGE_HINT,
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
