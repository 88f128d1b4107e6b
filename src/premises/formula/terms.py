"""The vocabulary of a formula term, and the whitelist walk that enforces it.

patsy evaluates the Python inside a term, so the code of every factor is parsed
with ``ast`` and walked by :class:`TermReader` before patsy sees it: column
names, numbers, arithmetic, and the functions in ``FORMULA_FUNCTIONS``; calls,
attributes, indexing and everything else are refused by name. Standard library
only.
"""

from __future__ import annotations

import ast
import difflib
import keyword
from dataclasses import dataclass
from typing import NoReturn

from premises.errors import Location, SpecError


@dataclass(frozen=True, slots=True)
class FormulaTransform:
    """A transform written inside the formula, e.g. ``log2(water)``."""

    expression: str
    """As written: ``log2(water)``."""
    function: str
    """``log2``."""
    column: str
    """``water``."""


FORMULA_FUNCTIONS: tuple[str, ...] = (
    "C",
    "I",
    "Q",
    "center",
    "standardize",
    "scale",
    "log",
    "log2",
    "log10",
    "log1p",
    "sqrt",
    "exp",
    "abs",
)
"""Functions a formula may call; everything else is refused before evaluation."""


CONTRASTS: tuple[str, ...] = ("Treatment", "Sum", "Helmert", "Poly", "Diff")
"""patsy contrasts, allowed only as the second argument of ``C()``."""
TRANSFORM_FUNCTIONS: tuple[str, ...] = (
    "log",
    "log2",
    "log10",
    "log1p",
    "sqrt",
    "exp",
    "center",
    "standardize",
    "scale",
)
"""Functions whose call on one column is recorded as a :class:`FormulaTransform`."""

MAX_FORMULA_LENGTH = 2000
"""Longest formula accepted, checked before anything is parsed."""
MAX_FORMULA_DEPTH = 50
"""Deepest nesting of brackets and operators accepted."""
# Python keywords that cannot start anything a formula term may contain, so a
# column of that name (``yield``, ``class``) is meant; patsy reads it as Q("...").
QUOTABLE_KEYWORDS = frozenset(keyword.kwlist) - {
    "and",
    "or",
    "not",
    "in",
    "is",
    "if",
    "else",
    "lambda",
    "for",
    "None",
    "True",
    "False",
}
_ARITHMETIC = (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.FloorDiv, ast.Mod, ast.Pow)
_COMPARISONS = (ast.Eq, ast.NotEq, ast.Lt, ast.LtE, ast.Gt, ast.GtE)
_OPERATOR_NAMES = {
    ast.BitOr: "|",
    ast.BitAnd: "&",
    ast.BitXor: "^",
    ast.LShift: "<<",
    ast.RShift: ">>",
    ast.MatMult: "@",
    ast.Invert: "~",
    ast.Not: "not",
}
_REFUSED = {
    ast.Attribute: "attribute access",
    ast.Subscript: "indexing",
    ast.Slice: "a slice",
    ast.Lambda: "a lambda",
    ast.ListComp: "a comprehension",
    ast.SetComp: "a comprehension",
    ast.DictComp: "a comprehension",
    ast.GeneratorExp: "a generator expression",
    ast.JoinedStr: "an f-string",
    ast.FormattedValue: "an f-string",
    ast.NamedExpr: "an assignment expression (:=)",
    ast.Starred: "unpacking (*)",
    ast.Dict: "a dict literal",
    ast.Set: "a set literal",
    ast.List: "a list literal",
    ast.Tuple: "a tuple",
    ast.IfExp: "a conditional expression",
    ast.BoolOp: "and/or",
    ast.Await: "await",
    ast.Yield: "yield",
    ast.YieldFrom: "yield",
}
_MODULE_PREFIXES = ("np", "numpy", "math", "scipy", "pd", "pandas")
VOCABULARY_HINT = (
    "Formulas may use column names (Q('odd name') for unusual names), numbers, "
    "arithmetic inside I(), and the functions "
    + ", ".join(FORMULA_FUNCTIONS)
    + "; contrasts ("
    + ", ".join(CONTRASTS)
    + ") go inside C(), e.g. C(g, Treatment('b'))."
)


def shorten(text: str, limit: int = 80) -> str:
    flat = " ".join(text.split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


def _is_dunder(name: str) -> bool:
    return len(name) >= 4 and name.startswith("__") and name.endswith("__")


def suggest_column(name: str, columns: tuple[str, ...]) -> str:
    """A 'did you mean' sentence plus the columns that exist."""
    lowered = {c.lower(): c for c in columns}
    close = (
        [lowered[name.lower()]]
        if name.lower() in lowered
        else difflib.get_close_matches(name, list(columns), n=3, cutoff=0.6)
    )
    shown = ", ".join(columns[:25]) + (
        f" and {len(columns) - 25} more" if len(columns) > 25 else ""
    )
    guess = "Did you mean " + " or ".join(f"'{c}'" for c in close) + "? " if close else ""
    return f"{guess}The data have: {shown or 'no columns'}."


class TermReader:
    """Whitelist walk of one factor's Python code (``log2(water)``, ``C(g, Sum)``)."""

    def __init__(
        self, formula: str, code: str, columns: tuple[str, ...] | None, location: Location | None
    ) -> None:
        self.formula = formula
        self.code = code
        self.columns = columns
        self.location = location
        self.names: dict[str, None] = {}
        """Data columns, in order of first appearance."""
        self.called: dict[str, None] = {}
        self.transforms: list[FormulaTransform] = []

    def error(self, problem: str, hint: str = VOCABULARY_HINT) -> SpecError:
        return SpecError(
            f"The model formula `{shorten(self.formula)}` {problem}", self.location, hint
        )

    def fail(self, problem: str, hint: str = VOCABULARY_HINT) -> NoReturn:
        raise self.error(problem, hint)

    def read(self) -> None:
        try:
            tree = ast.parse(self.code, mode="eval")
        except SyntaxError as exc:
            raise self.error(
                f"has a term `{shorten(self.code, 60)}` that is not a valid expression.",
                "Check the brackets and quotes of that term.",
            ) from exc
        except (RecursionError, MemoryError) as exc:
            raise self.error("is nested too deeply to read.", "Simplify the formula.") from exc
        self.visit(tree.body, 1)

    def refuse(self, node: ast.AST) -> NoReturn:
        what = _REFUSED.get(type(node), f"a {type(node).__name__} expression")
        segment = ast.get_source_segment(self.code, node) or self.code
        hint = VOCABULARY_HINT
        if (
            isinstance(node, ast.Attribute)
            and isinstance(node.value, ast.Name)
            and node.value.id in _MODULE_PREFIXES
        ):
            hint = (
                f"Write the function without a module prefix, e.g. {node.attr}(x). "
                + VOCABULARY_HINT
            )
        self.fail(f"uses {what} (`{shorten(segment, 60)}`), which formulas do not allow.", hint)

    def visit(self, node: ast.AST, depth: int) -> None:
        if depth > MAX_FORMULA_DEPTH:
            self.fail(f"is nested deeper than {MAX_FORMULA_DEPTH} levels.", "Simplify the formula.")
        if isinstance(node, ast.Name):
            self.name(node)
        elif isinstance(node, ast.Constant):
            self.constant(node)
        elif isinstance(node, ast.BinOp):
            self.arithmetic(node, depth)
        elif isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            self.visit(node.operand, depth + 1)
        elif isinstance(node, ast.Compare) and all(isinstance(op, _COMPARISONS) for op in node.ops):
            for child in (node.left, *node.comparators):
                self.visit(child, depth + 1)
        elif isinstance(node, ast.Call):
            self.call(node, depth)
        elif isinstance(node, (ast.UnaryOp, ast.Compare)):
            op = (
                node.op
                if isinstance(node, ast.UnaryOp)
                else next(o for o in node.ops if not isinstance(o, _COMPARISONS))
            )
            shown = _OPERATOR_NAMES.get(type(op), type(op).__name__.lower())
            self.fail(f"uses the operator `{shown}`, which formulas do not allow.")
        else:
            self.refuse(node)

    def name(self, node: ast.Name) -> None:
        if _is_dunder(node.id):
            self.fail(f"uses the name `{node.id}`; names with double underscores are not allowed.")
        is_column = self.columns is not None and node.id in self.columns
        if not is_column and node.id in FORMULA_FUNCTIONS + CONTRASTS:
            self.fail(
                f"names the function `{node.id}` without calling it.",
                f"Call it on a column, e.g. {node.id}(x).",
            )
        self.names.setdefault(node.id, None)

    def constant(self, node: ast.Constant) -> None:
        if not isinstance(node.value, (int, float, str)):
            self.fail(
                f"uses the constant `{node.value!r}`, which formulas do not allow.",
                "Constants may be numbers or quoted text.",
            )

    def arithmetic(self, node: ast.BinOp, depth: int) -> None:
        if not isinstance(node.op, _ARITHMETIC):
            shown = _OPERATOR_NAMES.get(type(node.op), type(node.op).__name__)
            self.fail(f"uses the operator `{shown}`, which formulas do not allow.")
        if any(
            isinstance(side, ast.Constant) and isinstance(side.value, str)
            for side in (node.left, node.right)
        ):
            self.fail("does arithmetic on quoted text.", "Arithmetic works on numbers.")
        if (
            isinstance(node.op, ast.Pow)
            and _constant_only(node.left)
            and _constant_only(node.right)
        ):
            # Python computes int ** int exactly: 10 ** 10 ** 10 would never finish.
            base, exponent = _number(node.left), _number(node.right)
            if base is None or exponent is None or abs(exponent) > 64:
                self.fail(
                    f"raises a constant to a large or computed power "
                    f"(`{shorten(ast.get_source_segment(self.code, node) or '', 60)}`).",
                    "Write the number itself.",
                )
        self.visit(node.left, depth + 1)
        self.visit(node.right, depth + 1)

    def call(self, node: ast.Call, depth: int) -> None:
        if not isinstance(node.func, ast.Name):
            self.refuse(node.func)
        function = node.func.id
        if _is_dunder(function):
            self.fail(f"uses the name `{function}`; names with double underscores are not allowed.")
        if function in CONTRASTS:
            self.fail(
                f"uses the contrast {function}() outside C().",
                f"A contrast is the second argument of C(), e.g. C(g, {function}()).",
            )
        if function not in FORMULA_FUNCTIONS:
            close = difflib.get_close_matches(function, FORMULA_FUNCTIONS, n=1, cutoff=0.6)
            guess = "log" if function == "ln" else (close[0] if close else "")
            self.fail(
                f"calls {function}(), which formulas do not allow.",
                (f"Did you mean {guess}()? " if guess else "")
                + "Formulas may call: "
                + ", ".join(FORMULA_FUNCTIONS)
                + ".",
            )
        if self.columns is not None and function in self.columns:
            self.fail(
                f"calls {function}(), but the data also have a column named '{function}'.",
                "Rename that column in the data so that it does not hide the function.",
            )
        if any(isinstance(a, ast.Starred) for a in node.args) or any(
            k.arg is None for k in node.keywords
        ):
            self.fail(f"unpacks arguments (* or **) in {function}(), which formulas do not allow.")
        self.called.setdefault(function, None)
        if function == "C":
            self.categorical(node, depth)
        elif function == "Q":
            self.quoted(node)
        else:
            if len(node.args) != 1 or node.keywords:
                self.fail(
                    f"calls {function}() with other than one argument.",
                    f"{function}() takes one argument here, e.g. {function}(x).",
                )
            self.visit(node.args[0], depth + 1)
            column = self.column_of(node.args[0])
            if function in TRANSFORM_FUNCTIONS and column is not None:
                written = (
                    f"{function}({column})"
                    if column.isidentifier()
                    else ast.get_source_segment(self.code, node) or f"{function}(Q({column!r}))"
                )
                self.transforms.append(FormulaTransform(written, function, column))

    def column_of(self, node: ast.AST) -> str | None:
        """The column ``node`` names directly (``x`` or ``Q('x')``), else None."""
        if isinstance(node, ast.Name):
            return node.id
        if (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id == "Q"
            and node.args
            and isinstance(node.args[0], ast.Constant)
        ):
            return str(node.args[0].value)
        return None

    def categorical(self, node: ast.Call, depth: int) -> None:
        if not 1 <= len(node.args) <= 2:
            self.fail(
                "calls C() with other than one or two arguments.",
                "Write C(g), or C(g, Treatment('b')) to choose a contrast.",
            )
        self.visit(node.args[0], depth + 1)
        if len(node.args) == 2:
            self.contrast(node.args[1])
        for word in node.keywords:
            if word.arg == "levels":
                if not isinstance(word.value, (ast.List, ast.Tuple)):
                    self.fail(
                        "gives C() levels that are not a list.", "Write levels=['a', 'b', 'c']."
                    )
                for item in word.value.elts:
                    self.literal(item, "levels")
            elif word.arg == "contrast" and len(node.args) == 1:
                self.contrast(word.value)
            else:
                self.fail(
                    f"passes `{word.arg}=` to C(), which formulas do not allow.",
                    "C() takes a column, a contrast and levels=[...].",
                )

    def contrast(self, node: ast.AST) -> None:
        if isinstance(node, ast.Name) and node.id in CONTRASTS:
            return
        if (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id in CONTRASTS
        ):
            for argument in node.args:
                self.literal(argument, node.func.id + "()")
            for word in node.keywords:
                if not (node.func.id == "Treatment" and word.arg == "reference"):
                    self.fail(
                        f"passes `{word.arg}=` to {node.func.id}(), which formulas do not allow.",
                        "Only Treatment(reference=...) takes a keyword.",
                    )
                self.literal(word.value, "Treatment()")
            return
        self.fail(
            "gives C() a second argument that is not a contrast.",
            "The second argument of C() is one of "
            + ", ".join(CONTRASTS)
            + ", e.g. C(g, Treatment('b')).",
        )

    def literal(self, node: ast.AST, where: str) -> None:
        if _number(node) is not None or (
            isinstance(node, ast.Constant) and isinstance(node.value, str)
        ):
            return
        self.fail(
            f"gives {where} a value that is not a number or quoted text.",
            "Write plain values, e.g. Treatment('b') or levels=['a', 'b'].",
        )

    def quoted(self, node: ast.Call) -> None:
        argument = node.args[0] if len(node.args) == 1 and not node.keywords else None
        if not (isinstance(argument, ast.Constant) and isinstance(argument.value, str)):
            self.fail("calls Q() with other than one quoted column name.", "Write Q('odd name').")
        if _is_dunder(argument.value):
            self.fail(
                f"quotes the name `{argument.value}`; names with double underscores are not allowed."
            )
        self.names.setdefault(argument.value, None)


def _constant_only(node: ast.AST) -> bool:
    return not any(isinstance(n, (ast.Name, ast.Call)) for n in ast.walk(node))


def _number(node: ast.AST) -> float | None:
    """The value of a number literal, possibly signed; None for anything else."""
    sign = 1.0
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        sign = -1.0 if isinstance(node.op, ast.USub) else 1.0
        node = node.operand
    if (
        isinstance(node, ast.Constant)
        and isinstance(node.value, (int, float))
        and not isinstance(node.value, bool)
    ):
        return sign * float(node.value)
    return None
