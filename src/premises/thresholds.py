"""Threshold cut-offs written as expressions in n (rows) and p (parameters).

A cut-off such as ``cooks: 4/n`` or ``leverage: 2p/n`` is read by a small
whitelist parser here (numbers, n, p, + - * / **, sqrt, parentheses and
implicit multiplication such as ``2p``) into a tuple tree, and evaluated by
walking that tree; nothing is ever evaluated by Python. ``F-median`` (Cook's
distance only) is the median of the F(p, n - p) distribution.
"""

from __future__ import annotations

import math
import re
from typing import Any

from premises.errors import Location, SpecError

__all__ = ["F_MEDIAN", "Expr", "ExpressionError", "evaluate_threshold", "evaluate_tree", "parse_threshold"]

F_MEDIAN = "F-median"
Expr = tuple[Any, ...]
_EXPR_TOKEN = re.compile(
    r"\s*(?:(?P<num>(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)|(?P<name>[A-Za-z_]\w*)"
    r"|(?P<op>\*\*|[-+*/()^])|(?P<bad>\S))",
    re.ASCII,  # no Unicode digits or spaces: float() would accept some of them
)
EXPRESSION_HELP = "Expressions may use numbers, n, p, + - * / **, sqrt() and parentheses, e.g. '4/n'."


class ExpressionError(ValueError):
    """A threshold expression is malformed; the text says why."""


def _tokenize(text: str) -> list[tuple[str, str]]:
    tokens = []
    for match in _EXPR_TOKEN.finditer(text):
        kind = match.lastgroup
        if kind is None:
            continue
        value = match.group(kind)
        if kind == "bad" or value == "^":
            extra = " (write ** for a power)" if value == "^" else ""
            raise ExpressionError(f"'{value}' is not allowed{extra}.")
        if kind == "name" and value not in ("n", "p", "sqrt"):
            raise ExpressionError(f"Unknown name '{value}'; only n, p and sqrt are known.")
        tokens.append((kind, value))
    return tokens


class _ExprParser:
    """Recursive descent; implicit multiplication ("2p", "2(p+1)") binds tighter than * and /."""

    def __init__(self, text: str) -> None:
        self.tokens = _tokenize(text)
        self.index = 0

    def peek(self) -> tuple[str, str] | None:
        return self.tokens[self.index] if self.index < len(self.tokens) else None

    def take(self, value: str | None = None) -> tuple[str, str]:
        token = self.peek()
        if token is None:
            raise ExpressionError("The expression ends too early.")
        if value is not None and token[1] != value:
            raise ExpressionError(f"Expected '{value}' but found '{token[1]}'.")
        self.index += 1
        return token

    def parse(self) -> Expr:
        if not self.tokens:
            raise ExpressionError("The expression is empty.")
        tree = self.sum()
        if self.peek() is not None:
            raise ExpressionError(f"Unexpected '{self.peek()[1]}'.")  # type: ignore[index]
        return tree

    def sum(self) -> Expr:
        tree = self.term()
        while self.peek() in (("op", "+"), ("op", "-")):
            tree = ("bin", self.take()[1], tree, self.term())
        return tree

    def term(self) -> Expr:
        tree = self.product()
        while self.peek() in (("op", "*"), ("op", "/")):
            tree = ("bin", self.take()[1], tree, self.product())
        return tree

    def product(self) -> Expr:
        tree = self.unary()
        while self._juxtaposed():
            tree = ("bin", "*", tree, self.power())
        return tree

    def _juxtaposed(self) -> bool:
        before = self.tokens[self.index - 1] if self.index else None
        after = self.peek()
        return (
            before is not None
            and after is not None
            and (before[0] == "num" or before == ("op", ")"))
            and (after[0] == "name" or after == ("op", "("))
        )

    def unary(self) -> Expr:
        if self.peek() in (("op", "-"), ("op", "+")):
            sign = self.take()[1]
            operand = self.unary()
            return ("neg", operand) if sign == "-" else operand
        return self.power()

    def power(self) -> Expr:
        base = self.atom()
        if self.peek() == ("op", "**"):
            self.take()
            return ("bin", "**", base, self.unary())
        return base

    def atom(self) -> Expr:
        kind, value = self.take()
        if kind == "num":
            return ("num", float(value))
        if value == "sqrt":
            self.take("(")
            inner = self.sum()
            self.take(")")
            return ("sqrt", inner)
        if kind == "name":
            return ("var", value)
        if value == "(":
            inner = self.sum()
            self.take(")")
            return inner
        raise ExpressionError(f"Unexpected '{value}'.")


def evaluate_tree(tree: Expr, n: float, p: float) -> float:
    """The value of a tree from :func:`parse_threshold` (not ``F-median``) at ``n`` and ``p``."""
    head = tree[0]
    if head == "num":
        return float(tree[1])
    if head == "var":
        return n if tree[1] == "n" else p
    if head == "neg":
        return -evaluate_tree(tree[1], n, p)
    if head == "sqrt":
        inner = evaluate_tree(tree[1], n, p)
        if inner < 0:
            raise ExpressionError(f"sqrt of a negative number ({inner:g}).")
        return math.sqrt(inner)
    left, right = evaluate_tree(tree[2], n, p), evaluate_tree(tree[3], n, p)
    try:
        if tree[1] == "+":
            return left + right
        if tree[1] == "-":
            return left - right
        if tree[1] == "*":
            return left * right
        if tree[1] == "/":
            return left / right
        result = left**right
    except ZeroDivisionError as exc:
        raise ExpressionError("It divides by zero.") from exc
    except OverflowError as exc:
        raise ExpressionError("It overflows.") from exc
    if isinstance(result, complex):
        raise ExpressionError("A negative number is raised to a fractional power.")
    return float(result)


def parse_threshold(text: str, *, allow_f_median: bool = False) -> Expr:
    """Parse a threshold expression into a small tree, or raise ``ValueError``.

    Parameters
    ----------
    text
        A number or an expression in n and p: ``"4/n"``, ``"2p/n"``, ``"3*p/n"``,
        ``"2*sqrt(p/n)"``, ``"1"``; ``"F-median"`` where ``allow_f_median``.
    allow_f_median
        Accept ``F-median`` (Cook's distance only).

    Returns
    -------
    tuple
        The expression tree (``("fmedian",)`` for ``F-median``).
    """
    if text.strip() == F_MEDIAN:
        if not allow_f_median:
            raise ExpressionError("F-median applies to Cook's distance only.")
        return ("fmedian",)
    return _ExprParser(text).parse()


def evaluate_threshold(expr: str, n: int, p: int, *, location: Location | None = None) -> float:
    """The cut-off an expression gives for ``n`` rows and ``p`` parameters.

    Parameters
    ----------
    expr
        A number or an expression in n and p (see :func:`parse_threshold`), or
        ``F-median``: the median of the F(p, n - p) distribution, Cook (1977).
    n, p
        Rows analysed and parameters (intercept included).
    location
        Where the expression was written, for the error message.

    Returns
    -------
    float
        A positive, finite cut-off.

    Raises
    ------
    SpecError
        When the expression is malformed or gives no positive finite number.

    Examples
    --------
    >>> evaluate_threshold("2p/n", n=50, p=5)
    0.2
    """
    try:
        tree = parse_threshold(expr, allow_f_median=True)
        if tree == ("fmedian",):
            if n <= p:
                raise ExpressionError(f"F-median needs more rows than parameters (n={n}, p={p}).")
            from scipy.stats import f as f_distribution  # lazy: scipy is heavy

            value = float(f_distribution.ppf(0.5, p, n - p))  # Cook (1977)
        else:
            value = evaluate_tree(tree, float(n), float(p))
    except ExpressionError as exc:
        raise SpecError(
            f"The threshold '{expr}' cannot be evaluated for n={n}, p={p}: {exc}",
            location,
            EXPRESSION_HELP,
        ) from exc
    if not math.isfinite(value) or value <= 0:
        raise SpecError(
            f"The threshold '{expr}' gives {value:g} for n={n}, p={p}; a cut-off must be "
            "a positive finite number.",
            location,
            EXPRESSION_HELP,
        )
    return value
