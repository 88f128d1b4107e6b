"""Properties of the rule language, over generated input.

1. Any text at all: ``parse_rule`` returns a Rule or raises RuleError, never
   anything else, and a rule it returns survives ``describe_rule`` unchanged.
2. Generated valid rules over a small frame: ``evaluate_rule`` returns a
   boolean mask or raises DataError, and the mask equals a row-by-row
   reference evaluator written here (plain Python, three-valued logic).
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from premises.errors import DataError, RuleError
from premises.rules import (
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
    describe_rule,
    evaluate_rule,
    parse_rule,
)

SETTINGS = settings(max_examples=2000, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# --- 1. arbitrary text ---------------------------------------------------------------

PIECES = [
    "x",
    "y",
    "site",
    "yield",
    "`odd name`",
    "`",
    "1",
    "2.5",
    ".5",
    "1e999",
    "0x1",
    "1_0",
    "-",
    "+",
    "*",
    "/",
    "%",
    "**",
    "//",
    "==",
    "!=",
    "<",
    "<=",
    ">",
    ">=",
    "<>",
    "=",
    ":=",
    "and",
    "or",
    "not",
    "in",
    "is",
    "missing",
    "true",
    "false",
    "None",
    "(",
    ")",
    "[",
    "]",
    "{",
    "}",
    ",",
    ".",
    ":",
    ";",
    "'a'",
    '"b"',
    "'",
    '"',
    "\\",
    "#",
    "f'",
    "lambda",
    "for",
    "if",
    "else",
    "import",
    "__import__",
    "__class__",
    "open",
    "&",
    "|",
    "!",
    "~",
    "^",
    "@",
    "\n",
    "é",
    "²",
    "٣",
]
pieces = st.lists(st.sampled_from(PIECES), max_size=40)
any_text = st.one_of(
    st.text(max_size=200),
    pieces.map(" ".join),
    pieces.map("".join),
    st.text(alphabet="x1(). []'\"`-+*=<>!,:{}_", max_size=120),
)


@SETTINGS
@given(any_text)
def test_parse_returns_a_rule_or_raises_rule_error(text: str) -> None:
    try:
        rule = parse_rule(text)
    except RuleError:
        return
    assert isinstance(rule, Rule)
    again = parse_rule(describe_rule(rule))
    assert again.root == rule.root
    assert again.columns == rule.columns


# --- 2. generated valid rules ----------------------------------------------------------

FRAME = pd.DataFrame(
    {
        "a": [1.5, np.nan, -2.0, 0.0, 7.25, 3.0],
        "b": np.array([0, 3, -1, 2, 5, 3], dtype=np.int64),
        "n": [np.inf, 2.0, np.nan, -0.5, 1.0, 4.0],
        "t": ["u", "v", None, "w", "u", "v"],
        "flag": [True, False, True, True, False, False],
    }
)
KINDS = {"a": "number", "b": "number", "n": "number", "t": "text", "flag": "bool"}
COMPARISONS = ["==", "!=", "<", "<=", ">", ">="]

plain_numbers = st.one_of(st.integers(0, 6), st.sampled_from([0.5, 2.5, 1e999, 0.0])).map(Literal)
list_items = st.one_of(
    st.integers(-3, 6),
    st.sampled_from([0.5, -2.0, 1e999]),
    st.sampled_from(["u", "v", "zz"]),
    st.booleans(),
).map(Literal)
value_leaves = st.one_of(
    st.sampled_from(sorted(KINDS)).map(Column),
    plain_numbers,
    st.sampled_from(["u", "v"]).map(Literal),
)
values = st.recursive(
    value_leaves,
    lambda inner: st.one_of(
        st.builds(BinOp, st.sampled_from(["+", "-", "*", "/", "%", "**"]), inner, inner),
        st.builds(Unary, st.sampled_from(["-", "+"]), inner),
    ),
    max_leaves=6,
)
condition_leaves = st.one_of(
    st.builds(
        lambda left, ops, rights: Compare(left, tuple(ops[: len(rights)]), tuple(rights)),
        values,
        st.lists(st.sampled_from(COMPARISONS), min_size=2, max_size=2),
        st.lists(values, min_size=1, max_size=2),
    ),
    st.builds(InList, values, st.lists(list_items, max_size=3).map(tuple), st.booleans()),
    st.builds(IsMissing, values, st.booleans()),
    st.sampled_from([Column("flag"), Literal(True), Literal(False)]),
)
conditions = st.recursive(
    condition_leaves,
    lambda inner: st.one_of(
        st.builds(Not, inner),
        st.builds(
            BoolOp,
            st.sampled_from(["and", "or"]),
            st.lists(inner, min_size=2, max_size=3).map(tuple),
        ),
    ),
    max_leaves=6,
)


class _Refused(Exception):
    """The reference evaluator's type error (the engine must raise DataError there)."""


def _kind(node: Node) -> str:
    if isinstance(node, Column):
        return KINDS[node.name]
    if isinstance(node, Literal):
        return (
            "bool"
            if isinstance(node.value, bool)
            else "text"
            if isinstance(node.value, str)
            else "number"
        )
    if isinstance(node, (BinOp, Unary)):
        return "number"
    return "bool"


def _compatible(left: str, right: str) -> bool:
    numeric = {"number", "bool"}
    return (left in numeric and right in numeric) or left == right


def _value(node: Node, row: dict[str, Any]) -> Any:
    """A scalar, or None for missing; raises _Refused on a type error."""
    if isinstance(node, Column):
        raw = row[node.name]
        return None if raw is None or (isinstance(raw, float) and math.isnan(raw)) else raw
    if isinstance(node, Literal):
        return node.value
    if isinstance(node, (BinOp, Unary)):
        parts = [node.operand] if isinstance(node, Unary) else [node.left, node.right]
        if any(_kind(p) not in ("number", "bool") for p in parts):
            raise _Refused
        numbers = [_value(p, row) for p in parts]
        if any(v is None for v in numbers):
            return None
        x = [np.float64(v) for v in numbers]
        with np.errstate(all="ignore"):
            if isinstance(node, Unary):
                out = -x[0] if node.op == "-" else x[0]
            else:
                out = {
                    "+": np.add,
                    "-": np.subtract,
                    "*": np.multiply,
                    "/": np.true_divide,
                    "%": np.mod,
                    "**": np.power,
                }[node.op](x[0], x[1])
        return None if math.isnan(out) else float(out)
    return _truth(node, row)


def _truth(node: Node, row: dict[str, Any]) -> bool | None:
    """True, False or None (unknown)."""
    if isinstance(node, Not):
        inner = _truth(node.operand, row)
        return None if inner is None else not inner
    if isinstance(node, BoolOp):
        parts = [_truth(o, row) for o in node.operands]  # all evaluated, as the engine does
        if node.op == "and":
            return False if False in parts else (True if all(p is True for p in parts) else None)
        return True if True in parts else (False if all(p is False for p in parts) else None)
    if isinstance(node, Compare):
        operands = [node.left, *node.comparators]
        for left, right in itertools.pairwise(operands):
            if not _compatible(_kind(left), _kind(right)):
                raise _Refused
        got = [_value(o, row) for o in operands]
        results: list[bool | None] = []
        for op, left, right in zip(node.ops, got, got[1:]):
            if left is None or right is None:
                results.append(None)
                continue
            results.append(
                {
                    "==": left == right,
                    "!=": left != right,
                    "<": left < right,
                    "<=": left <= right,
                    ">": left > right,
                    ">=": left >= right,
                }[op]
            )
        return False if False in results else (True if all(r is True for r in results) else None)
    if isinstance(node, InList):
        if any(not _compatible(_kind(node.operand), _kind(item)) for item in node.values):
            raise _Refused
        value = _value(node.operand, row)
        if value is None:
            return None
        hit = any(value == item.value for item in node.values)
        return (not hit) if node.negated else hit
    if isinstance(node, IsMissing):
        missing = _value(node.operand, row) is None
        return (not missing) if node.negated else missing
    value = _value(node, row)
    return None if value is None else bool(value)


def _reference(root: Node, frame: pd.DataFrame) -> np.ndarray:
    rows = frame.astype(object).where(frame.notna(), None).to_dict("records")
    return np.array([_truth(root, row) is True for row in rows], dtype=bool)


@SETTINGS
@given(conditions)
def test_generated_rules_evaluate_to_a_mask_or_raise_data_error(root: Node) -> None:
    text = describe_rule(Rule("", root, ()))
    rule = parse_rule(text)
    assert rule.root == root  # the canonical text parses back to the same tree
    try:
        expected = _reference(root, FRAME)
    except _Refused:
        expected = None
    try:
        mask = evaluate_rule(rule, FRAME)
    except DataError:
        assert expected is None, f"{text}: the engine refused a rule the reference evaluates"
        return
    assert isinstance(mask, np.ndarray) and mask.dtype == bool and mask.shape == (len(FRAME),)
    assert expected is not None, f"{text}: the engine evaluated a rule with a type error"
    np.testing.assert_array_equal(mask, expected, err_msg=text)
