"""The exclusion-rule language: what it refuses, what it accepts, and what it computes.

Expected masks are computed independently in each test with plain pandas
operations (the reference), never with the rule engine.
"""

from __future__ import annotations

import re
import sys

import numpy as np
import pandas as pd
import pytest

from premises.errors import DataError, Location, RuleError
from premises.rules import (
    MAX_RULE_DEPTH,
    MAX_RULE_LENGTH,
    BinOp,
    BoolOp,
    Column,
    Compare,
    InList,
    IsMissing,
    Literal,
    Not,
    Rule,
    Unary,
    describe_rule,
    evaluate_rule,
    parse_rule,
)


@pytest.fixture()
def frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "speed": [50.0, 150.0, np.nan, 200.0, 100.0, 101.0],
            "site": ["a", "b", None, "c", "a", "b"],
            "dose": [1, 5, 7, 2, 0, 10],
            "flag": [True, False, True, False, True, False],
            "name": ["O'Neil", "Smith", "Li", None, "O'Neil", "x"],
            "odd name": [1.0, 2.0, 3.0, np.nan, 5.0, 6.0],
            "x": [0.5, 4.9, 5.0, np.nan, -1.0, 3.0],
            "day": pd.to_datetime(
                ["2024-01-01", "2024-02-01", None, "2024-03-01", "2024-01-15", "2024-02-29"]
            ),
        }
    )


@pytest.fixture()
def big(rng: np.random.Generator) -> pd.DataFrame:
    n = 2000
    speed = rng.normal(100, 30, n)
    speed[rng.random(n) < 0.1] = np.nan
    site = rng.choice(np.array(["a", "b", "c", "d"], dtype=object), n)
    site[rng.random(n) < 0.1] = None
    return pd.DataFrame(
        {"speed": speed, "site": site, "dose": rng.integers(0, 20, n), "x": rng.normal(size=n)}
    )


@pytest.fixture()
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


# --- refused constructs -----------------------------------------------------------

REFUSED = [
    ("__import__('os').system('echo hi')", "double underscores"),
    ("x.__class__", "double underscores"),
    ("x.values > 1", "attribute access"),
    ("open('f')", "function calls are not allowed"),
    ("abs(x) > 1", "function calls are not allowed"),
    ("[c for c in x]", "comprehension"),
    ("x in [c for c in y]", "comprehension"),
    ("lambda: 1", "lambda"),
    ("(lambda: 1)()", "lambda"),
    ("lambda x: x", "lambda"),
    ("a if b else c", "conditional expression"),
    ("x[0] > 1", "indexing"),
    ("'abc'[0] == 'a'", "indexing"),
    ("x := 5", "assignment expression"),
    ("x = 5", "Compare with `==`"),
    ("*x", "unpacking"),
    ("**x", "unpacking"),
    ("{1: 2}", "dict or set literal"),
    ("x in {1, 2}", "square brackets"),
    ("f'{x}' == 'a'", "f-string"),
    ("b'x' == x", "prefixed string"),
    ("import os", "statements are not allowed"),
    ("from os import path", "statements are not allowed"),
    ("x > 1; y > 2", "statements are not allowed"),
    ("x > 1 # why", "comments are not allowed"),
    ("x + 1", "where a condition is needed"),
    ("5", "where a condition is needed"),
    ("'text'", "where a condition is needed"),
    ("x > 1 and y + 2", "where a condition is needed"),
    ("not x * 2", "where a condition is needed"),
    ("(x > 1) + 1 > 0", "arithmetic on the condition"),
    ("-(x > 1) < 0", "arithmetic on the condition"),
    ("x == missing", "x is missing"),
    ("x == None", "x is missing"),
    ("x is 5", "is missing"),
    ("x in y", "square brackets"),
    ("x in (1, 2)", "square brackets"),
    ("site in [a, b]", "Put text in quotes"),
    ("[1, 2]", "does not follow `in`"),
    ("(1, 2)", "tuple"),
    ("()", "empty parentheses"),
    ("x > 1 in [2]", "Join the conditions with `and`"),
    ("x is missing == true", "Join the conditions with `and`"),
    ("x && y", "Write `and`"),
    ("x || y", "Write `or`"),
    ("!x", "Write `not`"),
    ("x <> 1", "Write `!=`"),
    ("x // 2 > 1", "does not have"),
    ("x ^ 2 > 1", "does not have"),
    ("~x", "does not have"),
    ("x > 1)", "without a matching opening"),
    ("(x > 1", "without its closing `)`"),
    ("x in [1, 2", "without its closing ]"),
    ("'abc", "without its closing quote"),
    ("`odd name > 1", "without its closing backquote"),
    ("`` > 1", "empty backquotes"),
    ("1_000 > x", "malformed number"),
    ("0x1F > x", "malformed number"),
    ("1j > x", "malformed number"),
    ("x $ 1", "does not use"),
    ("x ? 1 : 2", "does not use"),
    ("x > 1 \\", "backslash"),
    ("x y", "where an operator"),
    ("x >", "ends where a value was expected"),
    ("not", "ends where a value was expected"),
    ("", "is empty"),
    ("   \n ", "is empty"),
    ("and x", "where a value was expected"),
    ("x, y", "comma"),
]


@pytest.mark.parametrize(("text", "phrase"), REFUSED, ids=[t for t, _ in REFUSED])
def test_refused_constructs_raise_rule_error_naming_them(text: str, phrase: str) -> None:
    with pytest.raises(RuleError, match=re.escape(phrase)) as info:
        parse_rule(text)
    assert info.value.hint  # every refusal says how to fix it


def test_deep_nesting_is_refused_without_recursion_error() -> None:
    text = "(" * 1000 + "x" + ")" * 1000  # 2001 characters: refused by length first
    with pytest.raises(RuleError, match="characters long"):
        parse_rule(text)
    text = "(" * 900 + "x > 1" + ")" * 900
    with pytest.raises(RuleError, match=f"deeper than {MAX_RULE_DEPTH}"):
        parse_rule(text)


@pytest.mark.parametrize(
    "text",
    [
        "-" * 500 + "x > 1",
        "not " * 300 + "flag",
        "x" + " ** x" * 300 + " > 1",
        " + ".join(["x"] * 400) + " > 1",
        "[" * 600,
    ],
)
def test_long_operator_chains_are_refused_as_too_deep(text: str) -> None:
    with pytest.raises(RuleError, match="deeper than"):
        parse_rule(text)


def test_depth_guard_does_not_depend_on_a_high_recursion_limit() -> None:
    # With a tight interpreter limit the parser still answers with RuleError.
    old = sys.getrecursionlimit()
    sys.setrecursionlimit(250)
    try:
        with pytest.raises(RuleError):
            parse_rule("(" * 60 + "x > 1" + ")" * 60)
        assert parse_rule("((x > 1))").columns == ("x",)
    finally:
        sys.setrecursionlimit(old)


def test_length_is_checked_before_parsing() -> None:
    text = "x > 1 or " * 300 + "x > 1"
    assert len(text) > MAX_RULE_LENGTH
    with pytest.raises(RuleError, match=f"more than the {MAX_RULE_LENGTH} allowed"):
        parse_rule(text)


def test_rule_of_exact_maximum_length_is_accepted() -> None:
    text = "x == 1"
    text = text + " " * (MAX_RULE_LENGTH - len(text))
    assert parse_rule(text).columns == ("x",)


def test_non_text_rule_is_refused() -> None:
    with pytest.raises(RuleError, match="must be text"):
        parse_rule(5)  # type: ignore[arg-type]


def test_location_is_carried_by_rule_errors() -> None:
    where = Location("paper.qmd", 12, "main", "exclude[0].when")
    with pytest.raises(RuleError) as info:
        parse_rule("open('f')", location=where)
    assert info.value.location == where
    assert str(info.value).startswith("paper.qmd:12: block 'main', key 'exclude[0].when': ")


def test_python_keywords_that_are_not_rule_words_are_column_names() -> None:
    assert parse_rule("yield > 5 and class == 'a' and lambda < 1").columns == (
        "yield",
        "class",
        "lambda",
    )


def test_backquoted_dunder_is_only_a_column_name() -> None:
    # A backquoted name is looked up in the data, never resolved as Python.
    rule = parse_rule("`__index_level_0__` > 1")
    assert rule.root == Compare(Column("__index_level_0__"), (">",), (Literal(1),))


# --- accepted rules: trees ---------------------------------------------------------


def test_trees_of_normal_rules() -> None:
    assert parse_rule("speed > 100 and site in ['a', 'b']").root == BoolOp(
        "and",
        (
            Compare(Column("speed"), (">",), (Literal(100),)),
            InList(Column("site"), (Literal("a"), Literal("b")), False),
        ),
    )
    assert parse_rule("not (x is missing)").root == Not(IsMissing(Column("x"), False))
    assert parse_rule("x is not missing").root == IsMissing(Column("x"), True)
    assert parse_rule("dose * 2 >= 10").root == Compare(
        BinOp("*", Column("dose"), Literal(2)), (">=",), (Literal(10),)
    )
    assert parse_rule('name == "O\'Neil"').root == Compare(
        Column("name"), ("==",), (Literal("O'Neil"),)
    )
    assert parse_rule("0 < x < 5").root == Compare(
        Literal(0), ("<", "<"), (Column("x"), Literal(5))
    )
    assert parse_rule("x not in [-1, 2.5]").root == InList(
        Column("x"), (Literal(-1), Literal(2.5)), True
    )
    assert parse_rule("`odd name` > 1").columns == ("odd name",)


def test_precedence_follows_python() -> None:
    assert parse_rule("-x ** 2 < 1").root == Compare(
        Unary("-", BinOp("**", Column("x"), Literal(2))), ("<",), (Literal(1),)
    )
    assert parse_rule("2 ** 3 ** x > 1").root.left == BinOp(  # type: ignore[union-attr]
        "**", Literal(2), BinOp("**", Literal(3), Column("x"))
    )
    assert parse_rule("a - b - c > 0").root.left == BinOp(  # type: ignore[union-attr]
        "-", BinOp("-", Column("a"), Column("b")), Column("c")
    )
    assert parse_rule("a or b and not c").root == BoolOp(
        "or", (Column("a"), BoolOp("and", (Column("b"), Not(Column("c")))))
    )


def test_escapes_inside_quoted_text() -> None:
    assert parse_rule(r"name == 'O\'Neil'").root.comparators == (Literal("O'Neil"),)  # type: ignore[union-attr]
    assert parse_rule(r"name == 'a\\b'").root.comparators == (Literal("a\\b"),)  # type: ignore[union-attr]
    assert parse_rule(r"name == 'a\nb'").root.comparators == (Literal("a\\nb"),)  # type: ignore[union-attr]


def test_numbers() -> None:
    values = [
        parse_rule(f"x == {text}").root.comparators[0].value  # type: ignore[union-attr]
        for text in ("12", "0.5", ".5", "5.", "1e3", "2E-2", "1e999", "99999999999999999999")
    ]
    assert values == [12, 0.5, 0.5, 5.0, 1000.0, 0.02, float("inf"), 1e20]
    assert isinstance(values[0], int)


def test_columns_listed_once_in_order_of_appearance() -> None:
    assert parse_rule("b > 1 or a > 2 or b < 0").columns == ("b", "a")
    assert parse_rule("true").columns == ()


# --- canonical text -------------------------------------------------------------

CANONICAL = [
    ("(speed>100)and(site in['a','b'])", "speed > 100 and site in ['a', 'b']"),
    ("not (x is missing)", "not (x is missing)"),
    ("not x is missing", "not (x is missing)"),
    ("not not flag", "not not flag"),
    ("not(x>1)", "not (x > 1)"),
    ("dose*2>=10", "dose * 2 >= 10"),
    ('name=="O\'Neil"', 'name == "O\'Neil"'),
    ("0<x<5", "0 < x < 5"),
    ("(-x)**2 > 1", "(-x) ** 2 > 1"),
    ("-(x**2) > 1", "-x ** 2 > 1"),
    ("(a ** b) ** c > 1", "(a ** b) ** c > 1"),
    ("a - (b - c) > 0", "a - (b - c) > 0"),
    ("(a - b) - c > 0", "a - b - c > 0"),
    ("(a or b) and c", "(a or b) and c"),
    ("(a or b) or c", "(a or b) or c"),
    ("`odd name` > 1 and `yield` < 2", "`odd name` > 1 and `yield` < 2"),
    ("x == True", "x == true"),
    ("x in [-1, 1e400]", "x in [-1, 1e999]"),
    ("(x < 1) == (y < 2)", "(x < 1) == (y < 2)"),
]


@pytest.mark.parametrize(("text", "canonical"), CANONICAL)
def test_describe_gives_canonical_text_that_parses_back(text: str, canonical: str) -> None:
    rule = parse_rule(text)
    assert describe_rule(rule) == canonical
    assert parse_rule(canonical).root == rule.root


# --- evaluation against pandas --------------------------------------------------


def _mask(series: pd.Series) -> np.ndarray:
    """A pandas boolean result as a plain mask, missing counted as not matched."""
    return series.fillna(False).to_numpy(dtype=bool)


def test_normal_rules_match_pandas(frame: pd.DataFrame) -> None:
    f = frame
    cases = {
        "speed > 100 and site in ['a', 'b']": (f.speed > 100) & f.site.isin(["a", "b"]),
        "not (x is missing)": f.x.notna(),
        "x is missing": f.x.isna(),
        "dose * 2 >= 10": f.dose * 2 >= 10,
        'name == "O\'Neil"': f.name == "O'Neil",
        "0 < x < 5": (f.x > 0) & (f.x < 5),
        "`odd name` >= 3": f["odd name"] >= 3,
        "flag": f.flag,
        "not flag": ~f.flag,
        "site not in ['a']": f.site.notna() & ~f.site.isin(["a"]),
        "speed / 2 + dose % 3 > 30": f.speed / 2 + f.dose % 3 > 30,
        "-x ** 2 < -10": -(f.x**2) < -10,
        "day >= '2024-02-01'": f.day >= pd.Timestamp("2024-02-01"),
        "speed > 100 or x is missing": (f.speed > 100) | f.x.isna(),
    }
    for text, expected in cases.items():
        got = evaluate_rule(parse_rule(text), f)
        assert got.dtype == bool and got.shape == (len(f),), text
        np.testing.assert_array_equal(got, _mask(expected), err_msg=text)


def test_missing_values_are_never_matched_by_comparisons(frame: pd.DataFrame) -> None:
    # speed is missing in row 2: neither `speed > 100` nor its negation excludes it.
    for text in (
        "speed > 100",
        "not (speed > 100)",
        "speed <= 100",
        "speed != 150",
        "not (speed == 150)",
        "site != 'a'",
        "not (site in ['a'])",
        "site not in ['zz']",
    ):
        assert not evaluate_rule(parse_rule(text), frame)[2], text
    assert evaluate_rule(parse_rule("speed is missing"), frame)[2]
    # unknown or true is true; unknown and false is false
    assert evaluate_rule(parse_rule("speed > 100 or flag"), frame)[2]
    assert not evaluate_rule(parse_rule("not (speed > 100 and flag)"), frame)[2]
    assert evaluate_rule(parse_rule("not (speed > 100 and not flag)"), frame)[2]


def test_rules_match_pandas_on_a_larger_random_frame(big: pd.DataFrame) -> None:
    f = big
    known_speed = f.speed.notna()
    cases = {
        "speed > 120 and site in ['a', 'b']": (f.speed > 120) & f.site.isin(["a", "b"]),
        "not (speed > 120)": known_speed & ~(f.speed > 120),
        "speed > 120 or site == 'c'": (f.speed > 120) | (f.site == "c"),
        "dose * 2 - 3 >= x * 10 and site is not missing": (f.dose * 2 - 3 >= f.x * 10)
        & f.site.notna(),
        "80 <= speed < 90 or dose in [0, 19]": f.speed.between(80, 90, inclusive="left")
        | f.dose.isin([0, 19]),
        "speed is missing or site is missing": f.speed.isna() | f.site.isna(),
    }
    for text, expected in cases.items():
        np.testing.assert_array_equal(
            evaluate_rule(parse_rule(text), f), _mask(expected), err_msg=text
        )


def test_division_by_zero_is_a_value_not_a_warning(frame: pd.DataFrame) -> None:
    got = evaluate_rule(parse_rule("speed / (dose - dose) > 0"), frame)
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = frame.speed / 0.0 > 0
    np.testing.assert_array_equal(got, _mask(expected))
    # 0/0 is undefined: treated as missing
    assert evaluate_rule(parse_rule("(dose - dose) / (dose - dose) is missing"), frame).all()


def test_integer_comparisons_are_exact() -> None:
    big_id = 2**53 + 1  # not representable as a float
    frame = pd.DataFrame({"id": np.array([big_id, big_id - 1], dtype=np.int64)})
    np.testing.assert_array_equal(
        evaluate_rule(parse_rule(f"id == {big_id}"), frame), [True, False]
    )


def test_pandas_extension_types() -> None:
    frame = pd.DataFrame(
        {
            "n": pd.array([1, None, 3], dtype="Int64"),
            "b": pd.array([True, None, False], dtype="boolean"),
            "c": pd.Categorical(["u", "v", None]),
            "s": pd.array(["p", None, "q"], dtype="string"),
            "t": pd.to_datetime(["2024-01-01 00:30", "2024-06-01 00:00", None]).tz_localize(
                "Europe/Paris"
            ),
            "o": pd.Series([1, 2.5, None], dtype=object),
        }
    )
    check = {
        "n > 1": [False, False, True],
        "n is missing": [False, True, False],
        "b": [True, False, False],
        "not b": [False, False, True],
        "c in ['u']": [True, False, False],
        "s == 'q'": [False, False, True],
        # 00:30 in Paris is 23:30 UTC the day before
        "t < '2024-01-01 01:00'": [True, False, False],
        "t < '2024-01-01T00:00Z'": [True, False, False],
        "o >= 2": [False, True, False],
    }
    for text, expected in check.items():
        assert evaluate_rule(parse_rule(text), frame).tolist() == expected, text


def test_literal_only_rule_covers_every_row(frame: pd.DataFrame) -> None:
    assert evaluate_rule(parse_rule("true"), frame).all()
    assert not evaluate_rule(parse_rule("1 > 2"), frame).any()
    assert evaluate_rule(parse_rule("x > 1"), frame.iloc[:0]).shape == (0,)


def test_column_of_only_missing_values_matches_nothing() -> None:
    frame = pd.DataFrame({"e": [None, None], "x": [1, 2]})
    assert not evaluate_rule(parse_rule("e > 1 or e == 'a'"), frame).any()
    assert evaluate_rule(parse_rule("e is missing"), frame).all()


# --- evaluation errors ---------------------------------------------------------------

DATA_ERRORS = [
    ("sped > 1", "Did you mean 'speed'"),
    ("Site == 'a'", "Did you mean 'site'"),
    ("nothing_like_it > 1", "The data have: speed, site"),
    ("site > 5", "compares column 'site' (text) with the number 5"),
    ("site == 5", "Quote the number"),
    ("speed == '5'", "Write the number without quotes"),
    ("speed in ['a']", "with the text 'a'"),
    ("site + 1 > 2", "arithmetic (`+`) on column 'site'"),
    ("-site > 1", "arithmetic (`-`) on column 'site'"),
    ("'a' * 3 == 'aaa'", "arithmetic (`*`) on the text 'a'"),
    ("speed", "holds numbers, as a condition"),
    ("site", "holds text, as a condition"),
    ("day > 5", "Compare dates with a quoted date"),
    ("day > 'soon'", "is not a date"),
    ("day + 1 > 2", "arithmetic"),
    ("flag == 'yes'", "Compare true/false columns with true or false"),
]


@pytest.mark.parametrize(("text", "phrase"), DATA_ERRORS, ids=[t for t, _ in DATA_ERRORS])
def test_evaluation_errors_are_data_errors(frame: pd.DataFrame, text: str, phrase: str) -> None:
    with pytest.raises(DataError, match=re.escape(phrase)):
        evaluate_rule(parse_rule(text), frame)


def test_mixed_and_unsupported_columns_are_data_errors() -> None:
    frame = pd.DataFrame({"m": [1, "a"], "d": pd.to_timedelta([1, 2], unit="s")})
    with pytest.raises(DataError, match="mixes kinds of values"):
        evaluate_rule(parse_rule("m == 1"), frame)
    with pytest.raises(DataError, match="rules cannot compare"):
        evaluate_rule(parse_rule("d is missing"), frame)


def test_duplicate_column_is_a_data_error() -> None:
    frame = pd.DataFrame([[1, 2]], columns=["x", "x"])
    with pytest.raises(DataError, match="more than once"):
        evaluate_rule(parse_rule("x > 1"), frame)


def test_evaluation_error_carries_location(frame: pd.DataFrame) -> None:
    where = Location("paper.qmd", 3, "main", "exclude[1].when")
    with pytest.raises(DataError) as info:
        evaluate_rule(parse_rule("sped > 1"), frame, location=where)
    assert info.value.location == where


def test_rule_is_frozen() -> None:
    rule = parse_rule("x > 1")
    assert isinstance(rule, Rule)
    with pytest.raises(AttributeError):
        rule.text = "y"  # type: ignore[misc]
