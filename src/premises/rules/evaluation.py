"""Vectorised evaluation of a parsed rule on a data frame.

Missing values follow three-valued (Kleene) logic: a comparison with a missing
value is unknown, and a row whose rule ends unknown is not excluded. Values
have kinds (numbers, text, true/false, dates); comparing different kinds is a
DataError naming both. This module imports numpy and pandas; parsing does not.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from premises.errors import DataError, Location
from premises.rules.nodes import (
    BinOp,
    BoolOp,
    Column,
    Compare,
    InList,
    IsMissing,
    Literal,
    Node,
    Not,
    Rule,
    Unary,
    children,
    describe_node,
    format_literal,
)
from premises.rules.tokens import shorten

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
    shown = format_literal(value)
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
        raise DataError(f"The rule `{shorten(self.rule.text)}` {problem}", self.location, hint)

    def value(self, node: Node) -> _Value:
        if isinstance(node, Column):
            return self.columns[node.name]
        if isinstance(node, Literal):
            return _literal_value(node.value)
        if isinstance(node, (Unary, BinOp)):
            return self.arithmetic(node)
        true, known = self.truth(node)
        return _Value("bool", true, np.logical_not(known), f"the condition `{describe_node(node)}`")

    def arithmetic(self, node: Unary | BinOp) -> _Value:
        operands = [self.value(child) for child in children(node)]
        for operand in operands:
            if operand.kind not in (*_NUMERIC, "empty"):
                self.fail(
                    f"does arithmetic (`{node.op}`) on {operand.label}, which holds "
                    f"{_KIND_WORDS[operand.kind]}.",
                    "Arithmetic works on numbers; compare text with == or `in [...]`.",
                )
        label = f"`{describe_node(node)}`"
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
                f"{describe_node(node)} == 'a'" if value.kind == "text" else f"{describe_node(node)} > 0"
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
                f"The rule `{shorten(self.rule.text)}` compares a date column with "
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
    >>> from premises.rules import parse_rule
    >>> frame = pd.DataFrame({"x": [1.0, None, 7.0]})
    >>> evaluate_rule(parse_rule("x > 5"), frame).tolist()
    [False, False, True]
    """
    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"evaluate_rule needs a pandas DataFrame, got {type(frame).__name__}")
    true, known = _Evaluator(rule, frame, location).truth(rule.root)
    mask = np.asarray(np.logical_and(true, known), dtype=bool)
    return np.broadcast_to(mask, (len(frame),)).copy()
