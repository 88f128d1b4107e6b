"""Wilkinson formulas: checked against a whitelist, then turned into a design matrix.

A formula comes from a document, and patsy evaluates the Python inside a term.
So every term is parsed with ``ast`` and checked against a small vocabulary
(column names, numbers, arithmetic, and the functions in ``FORMULA_FUNCTIONS``)
before patsy sees it. Nothing else is ever evaluated.

Three layers keep it that way:

1. The formula is tokenized (Python's ``tokenize``; nothing is run) to count
   ``~``, bound the nesting and refuse ``lambda`` and stray characters. Column
   names that are Python keywords (``yield``, ``class``) are quoted as
   ``Q("yield")`` so that patsy can read them.
2. patsy's own formula parser splits it into terms; the code of every factor
   is parsed with ``ast`` and walked by a whitelist (:class:`_TermReader`).
3. The checked ``ModelDesc`` itself (not the text again) goes to
   ``patsy.dmatrices``, in an environment whose namespace holds only the
   allowed functions and whose ``__builtins__`` is empty, so ``open`` or
   ``__import__`` cannot be reached even if a check were missed.
"""

from __future__ import annotations

import ast
import difflib
import io
import keyword
import tokenize
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, NoReturn

import numpy as np

from premises.errors import DataError, Location, SpecError

if TYPE_CHECKING:
    import pandas as pd
    import patsy

__all__ = [
    "CONTRASTS",
    "FORMULA_FUNCTIONS",
    "TRANSFORM_FUNCTIONS",
    "Design",
    "FormulaTransform",
    "build_design",
    "check_formula",
    "formula_columns",
    "formula_transforms",
]


@dataclass(frozen=True, slots=True)
class FormulaTransform:
    """A transform written inside the formula, e.g. ``log2(water)``."""

    expression: str
    """As written: ``log2(water)``."""
    function: str
    """``log2``."""
    column: str
    """``water``."""


@dataclass(frozen=True)
class Design:
    """The numeric model: outcome, design matrix and how columns map to terms."""

    formula: str
    outcome: str
    """Outcome expression as written (left of ``~``)."""
    outcome_columns: tuple[str, ...]
    """Data columns the outcome uses."""
    predictor_columns: tuple[str, ...]
    """Data columns the right-hand side uses."""
    y: np.ndarray
    """(n,) outcome."""
    X: np.ndarray
    """(n, p) design matrix."""
    column_names: tuple[str, ...]
    """Names of the p design columns (patsy's, e.g. ``C(site)[T.b]``)."""
    term_slices: tuple[tuple[str, int, int], ...]
    """(term name, start, stop) for each model term; a factor spans several columns."""
    term_columns: tuple[tuple[str, tuple[str, ...]], ...]
    """(term name, data columns it uses) for each model term."""
    has_intercept: bool
    transforms: tuple[FormulaTransform, ...] = ()

    @property
    def n(self) -> int:
        return int(self.X.shape[0])

    @property
    def p(self) -> int:
        return int(self.X.shape[1])


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

# Where a transform is undefined: log of zero or less, sqrt of a negative number.
_UNDEFINED = {
    "log": ("<=", 0),
    "log2": ("<=", 0),
    "log10": ("<=", 0),
    "log1p": ("<=", -1),
    "sqrt": ("<", 0),
}
# Python keywords that cannot start anything a formula term may contain, so a
# column of that name (``yield``, ``class``) is meant; patsy reads it as Q("...").
_QUOTABLE_KEYWORDS = frozenset(keyword.kwlist) - {
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
_VOCABULARY_HINT = (
    "Formulas may use column names (Q('odd name') for unusual names), numbers, "
    "arithmetic inside I(), and the functions "
    + ", ".join(FORMULA_FUNCTIONS)
    + "; contrasts ("
    + ", ".join(CONTRASTS)
    + ") go inside C(), e.g. C(g, Treatment('b'))."
)


def _shorten(text: str, limit: int = 80) -> str:
    flat = " ".join(text.split())
    return flat if len(flat) <= limit else flat[: limit - 3] + "..."


def _is_dunder(name: str) -> bool:
    return len(name) >= 4 and name.startswith("__") and name.endswith("__")


def _suggest_column(name: str, columns: tuple[str, ...]) -> str:
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


class _TermReader:
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

    def error(self, problem: str, hint: str = _VOCABULARY_HINT) -> SpecError:
        return SpecError(
            f"The model formula `{_shorten(self.formula)}` {problem}", self.location, hint
        )

    def fail(self, problem: str, hint: str = _VOCABULARY_HINT) -> NoReturn:
        raise self.error(problem, hint)

    def read(self) -> None:
        try:
            tree = ast.parse(self.code, mode="eval")
        except SyntaxError as exc:
            raise self.error(
                f"has a term `{_shorten(self.code, 60)}` that is not a valid expression.",
                "Check the brackets and quotes of that term.",
            ) from exc
        except (RecursionError, MemoryError) as exc:
            raise self.error("is nested too deeply to read.", "Simplify the formula.") from exc
        self.visit(tree.body, 1)

    def refuse(self, node: ast.AST) -> NoReturn:
        what = _REFUSED.get(type(node), f"a {type(node).__name__} expression")
        segment = ast.get_source_segment(self.code, node) or self.code
        hint = _VOCABULARY_HINT
        if (
            isinstance(node, ast.Attribute)
            and isinstance(node.value, ast.Name)
            and node.value.id in _MODULE_PREFIXES
        ):
            hint = (
                f"Write the function without a module prefix, e.g. {node.attr}(x). "
                + _VOCABULARY_HINT
            )
        self.fail(f"uses {what} (`{_shorten(segment, 60)}`), which formulas do not allow.", hint)

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
                    f"(`{_shorten(ast.get_source_segment(self.code, node) or '', 60)}`).",
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


@dataclass(frozen=True)
class _Reading:
    """A formula after all checks: patsy's model description and what each term reads."""

    formula: str
    outcome: str
    description: Any
    """patsy.ModelDesc, built from the (keyword-quoted) formula."""
    factor_columns: tuple[tuple[str, tuple[str, ...]], ...]
    """(factor code, data columns it reads)."""
    outcome_columns: tuple[str, ...]
    predictor_columns: tuple[str, ...]
    outcome_column: str | None
    """The outcome's column when the outcome is a bare column."""
    transforms: tuple[FormulaTransform, ...]


def _prepare_text(formula: str, location: Location | None) -> tuple[str, str]:
    """Checks on the raw tokens; returns (text for patsy, outcome as written)."""

    def fail(problem: str, hint: str) -> NoReturn:
        raise SpecError(f"The model formula `{_shorten(formula)}` {problem}", location, hint)

    text = " ".join(formula.split())  # YAML may fold a long formula over lines
    try:
        tokens = list(tokenize.generate_tokens(io.StringIO(text).readline))
    except (tokenize.TokenError, SyntaxError) as exc:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` has an unclosed quote or bracket.",
            location,
            "Close every quote and bracket.",
        ) from exc
    depth, tildes, pieces, last = 0, [], [], 0
    for token in tokens:
        if token.type == tokenize.ERRORTOKEN and not token.string.isspace():
            if token.string in "'\"":
                fail("has a quote without its closing quote.", "Close every quote.")
            hint = (
                "Write Q('odd name') for a column with spaces or symbols."
                if token.string == "`"
                else "Check the formula for a stray character."
            )
            fail(f"has the character {token.string!r}, which formulas do not use.", hint)
        if token.type == tokenize.OP:
            depth += token.string in "([{"
            depth -= token.string in ")]}"
            if depth > MAX_FORMULA_DEPTH:
                fail(f"is nested deeper than {MAX_FORMULA_DEPTH} levels.", "Simplify the formula.")
            if token.string == "~":
                tildes.append(token.start[1])
        if token.type == tokenize.NAME and token.string == "lambda":
            fail("uses a lambda, which formulas do not allow.", _VOCABULARY_HINT)
        if token.type == tokenize.NAME and token.string in _QUOTABLE_KEYWORDS:
            pieces += [text[last : token.start[1]], f'Q("{token.string}")']
            last = token.end[1]
    if len(tildes) != 1:
        fail(
            "needs exactly one `~` between the outcome and the predictors"
            + (f"; it has {len(tildes)}." if tildes else "."),
            "Write it as `outcome ~ term + term`, e.g. `yield ~ log2(water) + ph + C(district)`.",
        )
    return "".join(pieces) + text[last:], text[: tildes[0]].strip()


def _read_formula(
    formula: str, columns: tuple[str, ...] | None, location: Location | None
) -> _Reading:
    """Every check of :func:`check_formula`; the result feeds :func:`build_design`."""
    import patsy

    if not isinstance(formula, str):
        raise SpecError(
            f"The model formula must be text; got {type(formula).__name__}.",
            location,
            "Write it as `outcome ~ term + term`.",
        )
    if len(formula) > MAX_FORMULA_LENGTH:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` is {len(formula)} characters long, "
            f"more than the {MAX_FORMULA_LENGTH} allowed.",
            location,
            "Shorten the formula.",
        )
    text, outcome = _prepare_text(formula, location)
    try:
        description = patsy.ModelDesc.from_formula(text)
    except patsy.PatsyError as exc:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` cannot be read: {str(exc).splitlines()[0].rstrip('.')}.",
            location,
            "Write it as `outcome ~ term + term`, e.g. `yield ~ log2(water) + ph + C(district)`.",
        ) from exc
    except (RecursionError, MemoryError) as exc:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` is nested too deeply to read.",
            location,
            "Simplify the formula.",
        ) from exc
    lhs, rhs = description.lhs_termlist, description.rhs_termlist
    if len(lhs) != 1 or len(lhs[0].factors) != 1:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` must have one outcome left of `~`; "
            f"it has `{outcome or 'nothing'}`.",
            location,
            "Write a single column or an expression of one column, e.g. `log(y) ~ x`.",
        )
    if not rhs:
        raise SpecError(
            f"The model formula `{_shorten(formula)}` has no terms and no intercept.",
            location,
            "Add a predictor, or write `y ~ 1` for an intercept-only model.",
        )
    readers: dict[str, _TermReader] = {}
    for term in [*lhs, *rhs]:
        for factor in term.factors:
            if factor.code not in readers:
                readers[factor.code] = _TermReader(formula, factor.code, columns, location)
                readers[factor.code].read()
    outcome_reader = readers[lhs[0].factors[0].code]
    outcome_columns = tuple(outcome_reader.names)
    predictor_columns = tuple(
        dict.fromkeys(
            name for term in rhs for factor in term.factors for name in readers[factor.code].names
        )
    )
    if columns is not None:
        for name in (*outcome_columns, *predictor_columns):
            if name not in columns:
                raise DataError(
                    f"The model formula `{_shorten(formula)}` uses column '{name}', "
                    "which the data do not have.",
                    location,
                    _suggest_column(name, columns),
                )
    transforms = tuple(dict.fromkeys(t for reader in readers.values() for t in reader.transforms))
    single = outcome_reader.column_of(ast.parse(outcome_reader.code, mode="eval").body)
    return _Reading(
        formula=formula,
        outcome=outcome,
        description=description,
        factor_columns=tuple((code, tuple(reader.names)) for code, reader in readers.items()),
        outcome_columns=outcome_columns,
        predictor_columns=predictor_columns,
        outcome_column=single,
        transforms=transforms,
    )


def check_formula(
    formula: str, columns: tuple[str, ...] | None = None, *, location: Location | None = None
) -> tuple[str, ...]:
    """Validate ``formula``; return the data columns it uses.

    Raises :class:`premises.errors.SpecError` (no location; the caller adds it)
    for syntax errors or anything outside the vocabulary, and
    :class:`premises.errors.DataError` for a column not in ``columns``.

    Parameters
    ----------
    formula
        A Wilkinson formula, e.g. ``"yield ~ log2(water) + ph + C(district)"``.
    columns
        Column names of the data; None skips the check that each column exists.
    location
        Where the formula sits; carried by any error.

    Returns
    -------
    tuple of str
        Outcome columns first, then the predictors' columns, each once.

    Examples
    --------
    >>> check_formula("yield ~ log2(water) + ph + C(district)")
    ('yield', 'water', 'ph', 'district')
    """
    reading = _read_formula(formula, columns, location)
    return tuple(dict.fromkeys((*reading.outcome_columns, *reading.predictor_columns)))


def formula_columns(formula: str, *, location: Location | None = None) -> tuple[str, ...]:
    """The data columns ``formula`` uses, checked but without needing the data.

    Examples
    --------
    >>> formula_columns("y ~ x1 * x2 + Q('odd name')")
    ('y', 'x1', 'x2', 'odd name')
    """
    return check_formula(formula, None, location=location)


def _sealed_environment() -> patsy.EvalEnvironment:
    """patsy's evaluation environment, holding only the allowed functions.

    patsy evaluates a factor with ``eval(code, {}, namespaces)``; Python fills
    the empty globals with the real builtins, so ``open`` or ``__import__``
    would be reachable. This environment evaluates with an empty
    ``__builtins__`` instead, and keeps doing so through patsy's ``subset``.
    """
    import patsy
    from patsy.builtins import C, Diff, Helmert, I, Poly, Q, Sum, Treatment
    from patsy.eval import VarLookupDict
    from patsy.state import center, scale, standardize

    class SealedEnvironment(patsy.EvalEnvironment):  # type: ignore[misc]
        def eval(
            self, expr: str, source_name: str = "<string>", inner_namespace: Any = None
        ) -> Any:
            code = compile(expr, source_name, "eval", self.flags, False)
            lookup = VarLookupDict([inner_namespace or {}, *self._namespaces])
            return eval(
                code, {"__builtins__": {}}, lookup
            )  # only whitelisted factor code gets here

        def subset(self, names: list[str]) -> SealedEnvironment:
            lookup = VarLookupDict(self._namespaces)
            return SealedEnvironment([{name: lookup[name] for name in names}], self.flags)

    namespace: dict[str, object] = {
        "log": np.log,
        "log2": np.log2,
        "log10": np.log10,
        "log1p": np.log1p,
        "sqrt": np.sqrt,
        "exp": np.exp,
        "abs": np.abs,
        "center": center,
        "standardize": standardize,
        "scale": scale,
        "C": C,
        "I": I,
        "Q": Q,
        "Treatment": Treatment,
        "Sum": Sum,
        "Helmert": Helmert,
        "Poly": Poly,
        "Diff": Diff,
    }
    return SealedEnvironment([namespace])


def _check_rows(reading: _Reading, frame: pd.DataFrame, location: Location | None) -> None:
    """Complete rows, a numeric outcome, and transforms defined on every row."""
    import pandas as pd

    shown = _shorten(reading.formula)
    for name in dict.fromkeys((*reading.outcome_columns, *reading.predictor_columns)):
        if isinstance(frame[name], pd.DataFrame):
            raise DataError(
                f"Column '{name}' appears more than once in the data.",
                location,
                "Give every column in the data file a distinct name.",
            )
        missing = int(frame[name].isna().sum())
        if missing:
            raise DataError(
                f"Column '{name}' has {missing} missing values, but the model "
                f"`{shown}` needs complete rows.",
                location,
                "Drop rows with missing values first (missing: drop).",
            )
    if reading.outcome_column is not None:
        outcome = frame[reading.outcome_column]
        if pd.api.types.is_bool_dtype(outcome.dtype) or not pd.api.types.is_numeric_dtype(
            outcome.dtype
        ):
            raise DataError(
                _not_numeric(reading.outcome_column, _kind_words(outcome.dtype)),
                location,
                _NOT_NUMERIC_HINT,
            )
    for transform in reading.transforms:
        if transform.function not in _UNDEFINED:
            continue
        values = frame[transform.column]
        if not pd.api.types.is_numeric_dtype(values.dtype) or pd.api.types.is_bool_dtype(
            values.dtype
        ):
            raise DataError(
                f"The term '{transform.expression}' in `{shown}` needs numbers, but column "
                f"'{transform.column}' holds {_kind_words(values.dtype)}.",
                location,
                "Use a numeric column, or C() for labels.",
            )
        op, bound = _UNDEFINED[transform.function]
        bad = int(((values <= bound) if op == "<=" else (values < bound)).sum())
        if bad:
            rule = f"{_rule_name(transform.column)} {op} {bound}"
            raise DataError(
                f"The term '{transform.expression}' in `{shown}` is undefined for {bad} "
                f"row{'s' if bad != 1 else ''} where {transform.column} {op} {bound}.",
                location,
                f'Exclude those rows with a reason (exclude: [{{when: "{rule}", reason: ...}}]) '
                f"or use another transform (e.g. log1p or sqrt).",
            )


_NOT_NUMERIC_HINT = (
    "A linear model needs a numeric outcome; a model for that outcome type, "
    "e.g. logistic regression, is needed. If the values are numbers stored as "
    "text, clean the column in the data."
)


def _not_numeric(column: str, kind: str) -> str:
    return f"The outcome '{column}' is not numeric (it holds {kind})."


def _kind_words(dtype: object) -> str:
    """What a column holds, in words, for messages."""
    import pandas as pd

    if pd.api.types.is_bool_dtype(dtype):
        return "true/false values"
    if isinstance(dtype, pd.CategoricalDtype):
        return "categories"
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return "dates"
    return (
        "text"
        if pd.api.types.is_object_dtype(dtype) or pd.api.types.is_string_dtype(dtype)
        else f"{dtype} values"
    )


def _rule_name(column: str) -> str:
    """A column as the rule language writes it."""
    return column if column.isidentifier() and not keyword.iskeyword(column) else f"`{column}`"


def _check_finite(name: str, values: np.ndarray, formula: str, location: Location | None) -> None:
    """Every design value defined: log(0), log of a negative number or exp overflow are errors."""
    rows = ~np.isfinite(values if values.ndim == 2 else values[:, None]).all(axis=1)
    bad = int(rows.sum())
    if bad:
        raise DataError(
            f"The term '{name}' in `{_shorten(formula)}` gives an undefined or infinite value in "
            f"{bad} row{'s' if bad != 1 else ''} (such as the log of zero or of a negative number, "
            "or an overflow).",
            location,
            "Exclude those rows with a reason (exclude: [{when: ..., reason: ...}]) "
            "or use another transform (e.g. log1p or sqrt).",
        )


def build_design(formula: str, frame: pd.DataFrame, *, location: Location | None = None) -> Design:
    """Evaluate a checked formula on ``frame`` (a pandas DataFrame without missing values).

    Parameters
    ----------
    formula
        The model formula; it is checked again here, against ``frame``'s columns.
    frame
        The analysed rows.
    location
        Where the formula sits; carried by any error.

    Returns
    -------
    Design
        Outcome, design matrix, column names, the slice of columns of each term
        and the data columns each term reads.

    Raises
    ------
    SpecError
        The formula is malformed or outside the vocabulary.
    DataError
        A column is unknown or incomplete, the outcome is not numeric, a
        transform is undefined on some rows, or patsy cannot evaluate a term.

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"y": [1.0, 2.0, 4.0], "x": [1.0, 2.0, 3.0]})
    >>> build_design("y ~ log(x)", frame).column_names
    ('Intercept', 'log(x)')
    """
    import pandas as pd
    import patsy

    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"build_design needs a pandas DataFrame, got {type(frame).__name__}")
    reading = _read_formula(formula, tuple(str(c) for c in frame.columns), location)
    _check_rows(reading, frame, location)
    try:
        with np.errstate(all="ignore"):  # undefined values are reported per term below
            y_frame, x_frame = patsy.dmatrices(
                reading.description,
                frame,
                eval_env=_sealed_environment(),
                NA_action=patsy.NAAction(NA_types=[]),
                # Plain matrices: a DataFrame wrapper and its to_numpy() cost two more
                # copies of the design (0.6 s and 160 MB at 10^6 x 10).
                return_type="matrix",
            )
    except patsy.PatsyError as exc:
        raise DataError(
            f"The model formula `{_shorten(formula)}` cannot be evaluated on the data: "
            f"{str(exc).splitlines()[0]}",
            location,
            "Check that each column holds what its term needs: numbers for arithmetic "
            "and logs, labels for C().",
        ) from exc
    if y_frame.shape[1] != 1:
        raise DataError(_not_numeric(reading.outcome, "categories"), location, _NOT_NUMERIC_HINT)
    y = np.array(np.asarray(y_frame)[:, 0], dtype=np.float64)
    X = np.asarray(x_frame, dtype=np.float64).view(np.ndarray)
    info = x_frame.design_info
    term_slices = tuple((name, s.start, s.stop) for name, s in info.term_name_slices.items())
    _check_finite(reading.outcome, y, formula, location)
    for name, start, stop in term_slices:
        _check_finite(name, X[:, start:stop], formula, location)
    factor_columns = dict(reading.factor_columns)
    term_columns = tuple(
        (term.name(), tuple(dict.fromkeys(c for f in term.factors for c in factor_columns[f.code])))
        for term in info.terms
    )
    return Design(
        formula=formula,
        outcome=reading.outcome,
        outcome_columns=reading.outcome_columns,
        predictor_columns=reading.predictor_columns,
        y=y,
        X=X,
        column_names=tuple(str(c) for c in info.column_names),
        term_slices=term_slices,
        term_columns=term_columns,
        has_intercept=any(not term.factors for term in info.terms),
        transforms=reading.transforms,
    )


def formula_transforms(
    formula: str, *, location: Location | None = None
) -> tuple[FormulaTransform, ...]:
    """Transforms written inside ``formula`` (``log2(water)``), checked, without the data.

    The ledger records them before the design is built.

    Examples
    --------
    >>> [t.expression for t in formula_transforms("y ~ log2(water) + ph")]
    ['log2(water)']
    """
    return _read_formula(formula, None, location).transforms
