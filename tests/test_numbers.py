"""Number formatting against the APA 7 rules, and the log-scale restatements.

The APA rules are checked as remembered from the Publication Manual of the
American Psychological Association, 7th edition (2020), sections 6.32-6.44
(from memory); each assertion names the rule it pins.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from premises.numbers import (
    MINUS,
    MISSING,
    decimals_for_se,
    fmt_bounded,
    fmt_ci,
    fmt_df,
    fmt_fixed,
    fmt_int,
    fmt_num,
    fmt_p,
    fmt_pct,
    fmt_stat,
    log_effect,
)


def _parse(text: str) -> float:
    """Read a formatted number back (Unicode minus, comma groups)."""
    return float(text.replace(MINUS, "-").replace(",", ""))


# --- p values -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("p", "expected"),
    [
        (0.0004, "< .001"),  # APA 7, 6.36 (from memory): below .001 report "p < .001"
        (0.000999, "< .001"),
        (0.001, ".001"),
        (0.0316, ".032"),  # exact p to three decimals, no leading zero
        (0.05, ".050"),
        (0.5, ".500"),
        (0.9994, ".999"),
        (0.9996, "> .999"),  # rounding must not print "1.000" for a p below 1
    ],
)
def test_p_values_follow_apa(p: float, expected: str) -> None:
    assert fmt_p(p) == expected


def test_p_value_phrase_has_italic_symbol() -> None:
    # APA 7, 6.42 (from memory): statistical symbols in italics.
    assert fmt_p(0.0316, symbol=True) == "*p* = .032"
    assert fmt_p(1e-9, symbol=True) == "*p* < .001"


def test_p_never_has_a_leading_zero() -> None:
    for p in np.linspace(0.001, 0.999, 97):
        assert not fmt_p(float(p)).startswith("0")


def test_missing_values_print_as_dash() -> None:
    for fn in (fmt_p, fmt_num, fmt_int, fmt_df, fmt_bounded, fmt_pct):
        assert fn(None) == MISSING
    assert fmt_fixed(float("nan")) == MISSING
    assert fmt_ci(None, 1.0) == MISSING


# --- bounded quantities ---------------------------------------------------------------


def test_bounded_quantities_drop_the_leading_zero() -> None:
    # APA 7, 6.36 (from memory): no zero before the decimal point when the value
    # cannot exceed 1 (correlations, proportions, p).
    assert fmt_bounded(0.43) == ".43"
    assert fmt_bounded(-0.43) == MINUS + ".43"
    assert fmt_bounded(0.999) == "1.00"
    assert fmt_bounded(0.0341, 3) == ".034"


# --- signs, grouping, decimals --------------------------------------------------------


def test_negative_numbers_use_the_unicode_minus() -> None:
    assert fmt_fixed(-2.5, 1) == "\u22122.5"
    assert "-" not in fmt_num(-0.0123)


def test_rounded_zero_has_no_sign() -> None:
    assert fmt_fixed(-0.0004, 2) == "0.00"


def test_thousands_are_grouped_with_commas() -> None:
    # APA 7, 6.38 (from memory): commas between groups of three digits from 1,000 up.
    assert fmt_int(1234) == "1,234"
    assert fmt_int(999) == "999"
    assert fmt_int(-1234567) == MINUS + "1,234,567"
    assert fmt_fixed(12345.678, 1) == "12,345.7"


def test_degrees_of_freedom_have_no_commas() -> None:
    # APA 7, 6.38 (from memory): the comma rule excepts degrees of freedom.
    assert fmt_df(1234) == "1234"
    assert fmt_df(97.46) == "97.5"


@pytest.mark.parametrize(
    ("x", "expected"),
    [
        (12345.6, "12,346"),
        (123.45, "123"),
        (12.345, "12.3"),
        (1.2345, "1.23"),
        (0.12345, "0.123"),
        (0.012345, "0.0123"),
        (9.996, "10.0"),  # rounding up adds a digit before the point: keep three significant
        (0.0009996, "0.00100"),
        (0.0, "0"),
        (1.2e-7, "1.20 \u00d7 10\u207b\u2077"),
    ],
)
def test_significant_digits_follow_magnitude(x: float, expected: str) -> None:
    assert fmt_num(x) == expected


@given(
    st.floats(min_value=-1e9, max_value=1e9, allow_nan=False), st.integers(min_value=0, max_value=6)
)
def test_fixed_format_reads_back_as_the_rounded_value(x: float, decimals: int) -> None:
    text = fmt_fixed(x, decimals)
    assert math.isclose(_parse(text), round(x, decimals), rel_tol=1e-12, abs_tol=10.0**-decimals)
    assert (len(text.split(".")[1]) if "." in text else 0) == decimals


@given(st.floats(min_value=1e-4, max_value=1e6, allow_nan=False))
def test_significant_format_keeps_three_digits(x: float) -> None:
    text = fmt_num(x)
    value = _parse(text)
    # Three significant digits: relative error at most half a unit in the third digit.
    assert abs(value - x) <= 0.5 * 10.0 ** (math.floor(math.log10(x)) - 2) * 1.0000001 + 1e-12


def test_se_decimals_show_two_significant_digits() -> None:
    assert decimals_for_se(0.083) == 3
    assert decimals_for_se(0.61) == 2
    assert decimals_for_se(4.56) == 1
    assert decimals_for_se(45.6) == 0
    assert decimals_for_se(None) == 2


# --- intervals and statistics -----------------------------------------------------------


def test_confidence_interval_in_brackets() -> None:
    # APA 7, 6.44 (from memory): "95% CI [0.12, 0.56]".
    assert fmt_ci(0.1234, 0.5567, 2) == "[0.12, 0.56]"
    assert fmt_ci(-1.5, 0.25, 2) == f"[{MINUS}1.50, 0.25]"


def test_ci_precision_follows_its_width() -> None:
    # width 0.326 -> SE about 0.083 -> three decimals
    assert fmt_ci(0.711, 1.037) == "[0.711, 1.037]"


def test_test_statistics_have_two_decimals_and_df() -> None:
    # APA 7, 6.43 (from memory): "t(97) = 2.31", "F(2, 95) = 3.40".
    assert fmt_stat("t", 2.3149, 97) == "t(97) = 2.31"
    assert fmt_stat("F", 3.4, (2, 95)) == "F(2, 95) = 3.40"
    assert fmt_stat("t", -2.3149, 97.0) == f"t(97) = {MINUS}2.31"
    assert fmt_stat("W", 0.99361) == "W = 0.99"


def test_statistic_whose_name_ends_in_parentheses_gives_df_after() -> None:
    assert fmt_stat("LM (studentized)", 9.871, (3,)) == "LM (studentized) = 9.87, df = 3"


def test_descriptive_statistic_names_give_df_after_symbols_before() -> None:
    assert fmt_stat("RESET F", 3.41, (2, 383)) == "RESET F(2, 383) = 3.41"
    assert (
        fmt_stat("binned smooth over x", 1.81, (6, 165))
        == "binned smooth over x = 1.81, df = 6, 165"
    )


def test_percent() -> None:
    assert fmt_pct(8.6540) == "8.7%"
    assert fmt_pct(-0.5204) == MINUS + "0.52%"


# --- log-scale restatements -------------------------------------------------------------


def test_log_outcome_gives_percent_change() -> None:
    # Wooldridge, Introductory Econometrics, Example 2.10 (from memory): log(wage) on
    # educ, b = 0.083; the exact change per year is 100 (e^0.083 - 1) = 8.65%.
    effect = log_effect(0.083, 0.07, 0.096, outcome_base=math.e)
    assert effect is not None and effect.kind == "log-outcome"
    assert effect.value == pytest.approx(100 * np.expm1(0.083))  # numpy as the reference
    assert effect.value == pytest.approx(8.654, abs=5e-4)
    assert effect.low == pytest.approx(100 * np.expm1(0.07))
    assert effect.high == pytest.approx(100 * np.expm1(0.096))


def test_log2_outcome_uses_its_base() -> None:
    effect = log_effect(0.5, 0.0, 1.0, outcome_base=2.0)
    assert effect is not None
    assert effect.value == pytest.approx(100 * (np.sqrt(2) - 1))


def test_log2_predictor_is_a_change_per_doubling() -> None:
    # y = a + b log2(x): doubling x adds exactly b to y.
    effect = log_effect(0.874, 0.711, 1.037, predictor_base=2.0)
    assert effect is not None and effect.kind == "log-predictor"
    assert effect.factor == 2.0
    assert (effect.value, effect.low, effect.high) == pytest.approx((0.874, 0.711, 1.037))


def test_natural_log_predictor_is_restated_per_doubling() -> None:
    # y = a + b ln(x): doubling x adds b ln 2 (checked by evaluating the model at x and 2x).
    b = 1.7
    effect = log_effect(b, 1.0, 2.0, predictor_base=math.e)
    assert effect is not None
    x = 3.7
    assert effect.value == pytest.approx(b * np.log(2 * x) - b * np.log(x))


def test_log10_predictor_is_a_change_per_tenfold() -> None:
    effect = log_effect(2.0, 1.0, 3.0, predictor_base=10.0)
    assert effect is not None
    assert effect.factor == 10.0 and effect.value == pytest.approx(2.0)


def test_log_log_gives_an_elasticity() -> None:
    # ln y = a + b log2 x: d ln y / d ln x = b / ln 2; doubling x multiplies y by e^b.
    b = 0.3
    effect = log_effect(b, 0.1, 0.5, outcome_base=math.e, predictor_base=2.0)
    assert effect is not None and effect.kind == "elasticity"
    assert effect.value == pytest.approx(b / np.log(2))
    assert effect.doubling_pct == pytest.approx(100 * np.expm1(b))


def test_nothing_logged_gives_nothing() -> None:
    assert log_effect(1.0, 0.0, 2.0) is None
