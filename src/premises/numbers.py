"""Number formatting for the generated prose and tables, and log-scale effects.

One set of formatting filters, registered once in the Jinja2 environment
(``FILTERS``), so the short and the full section print every number the same
way. The rules follow the APA Publication Manual, 7th edition (2020), as
remembered (sections 6.36-6.40, from memory):

- no leading zero for a quantity that cannot exceed 1 (p, r, R², proportions);
- p to three decimals, and ``< .001`` below that;
- test statistics to two decimals, degrees of freedom in parentheses;
- commas between groups of three digits from 1,000 up, except in degrees of
  freedom and to the right of the decimal point.

Negative numbers use the Unicode minus sign (U+2212), which typesets as a
minus rather than a hyphen. A missing value prints as an em dash.

The module also holds the arithmetic that turns a coefficient on a log scale
into a statement on the original scale (:func:`log_effect`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

__all__ = [
    "FILTERS",
    "MINUS",
    "MISSING",
    "LogEffect",
    "decimals_for_se",
    "fmt_bounded",
    "fmt_ci",
    "fmt_df",
    "fmt_fixed",
    "fmt_int",
    "fmt_num",
    "fmt_p",
    "fmt_pct",
    "fmt_stat",
    "log_effect",
]

MINUS = "\u2212"
"""Unicode minus sign, used for every negative number."""
MISSING = "\u2014"
"""Em dash: what a missing or undefined number prints as (APA tables, from memory)."""

_SUPERSCRIPT = str.maketrans(
    "-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079"
)


def _is_missing(x: float | None) -> bool:
    return x is None or (isinstance(x, float) and not math.isfinite(x))


def _signed(text: str, negative: bool) -> str:
    """Prefix the Unicode minus, unless the rounded number is zero (no "−0.00")."""
    if negative and any(ch in "123456789" for ch in text):
        return MINUS + text
    return text


def _group_thousands(integer_part: str) -> str:
    """Insert commas every three digits (APA 7, 6.38, from memory)."""
    return f"{int(integer_part):,}" if integer_part else integer_part


def fmt_fixed(x: float | None, decimals: int = 2, *, thousands: bool = True) -> str:
    """Format ``x`` with a fixed number of decimals, Unicode minus, comma groups.

    Parameters
    ----------
    x
        The number; None or a non-finite value prints as an em dash.
    decimals
        Digits after the decimal point.
    thousands
        Group the integer part with commas (off for degrees of freedom).

    Examples
    --------
    >>> fmt_fixed(-1234.5678, 2)
    '−1,234.57'
    """
    if _is_missing(x):
        return MISSING
    assert x is not None
    decimals = max(0, int(decimals))
    text = f"{abs(x):.{decimals}f}"
    whole, _, frac = text.partition(".")
    if thousands:
        whole = _group_thousands(whole)
    body = whole + ("." + frac if frac else "")
    return _signed(body, x < 0)


def _magnitude(x: float) -> int:
    return math.floor(math.log10(abs(x)))


def fmt_num(x: float | None, sig: int = 3, decimals: int | None = None) -> str:
    """Format a number to ``sig`` significant digits, sensible to its magnitude.

    Values from 1,000 up print as whole numbers with commas; values below
    0.0001 in absolute size print in scientific notation (``1.20 × 10⁻⁵``).
    ``decimals`` overrides the significant-digit rule.

    Examples
    --------
    >>> [fmt_num(v) for v in (12345.6, 12.345, 0.012345, -0.5)]
    ['12,346', '12.3', '0.0123', '−0.500']
    """
    if _is_missing(x):
        return MISSING
    assert x is not None
    if decimals is not None:
        return fmt_fixed(x, decimals)
    if x == 0:
        return "0"
    mag = _magnitude(x)
    if mag < -4:
        mantissa = x / 10.0**mag
        if round(abs(mantissa), sig - 1) >= 10:  # 9.995e-6 rounds up to 10.0
            mantissa /= 10
            mag += 1
        exponent = str(mag).translate(_SUPERSCRIPT)
        return f"{fmt_fixed(mantissa, sig - 1)} \u00d7 10{exponent}"
    places = max(0, sig - 1 - mag)
    rounded = round(abs(x), places)
    if rounded and _magnitude(rounded) > mag:  # 9.996 -> 10.0: one digit fewer after the point
        places = max(0, places - 1)
    return fmt_fixed(x, places)


def decimals_for_se(se: float | None, sig: int = 2) -> int:
    """Decimals that show a standard error to ``sig`` significant digits.

    The estimate and its interval are then printed to the same decimal place,
    so no digit is shown beyond what the precision supports (common practice;
    e.g. Cole 2015, "Too many digits", from memory). Between 2 and 6 for
    ordinary standard errors; 2 when the SE is missing or zero.
    """
    if _is_missing(se) or not se:
        return 2
    assert se is not None
    return min(6, max(0, sig - 1 - _magnitude(se)))


def fmt_int(n: float | None) -> str:
    """Format a count with comma groups and Unicode minus: ``1,234``."""
    if n is None or _is_missing(float(n)):
        return MISSING
    return fmt_fixed(float(round(n)), 0)


def fmt_df(df: float | None) -> str:
    """Degrees of freedom: whole numbers without commas (APA 7, 6.38), else one decimal."""
    if _is_missing(df):
        return MISSING
    assert df is not None
    if abs(df - round(df)) < 1e-9:
        return fmt_fixed(float(round(df)), 0, thousands=False)
    return fmt_fixed(df, 1, thousands=False)


def fmt_bounded(x: float | None, decimals: int = 2) -> str:
    """A quantity that cannot exceed 1 in size (r, R², a proportion): no leading zero.

    APA 7, 6.36 (from memory): ".43", "−.43"; a value that rounds to 1 keeps
    its digit ("1.00").
    """
    text = fmt_fixed(x, decimals)
    if text.startswith("0."):
        return text[1:]
    if text.startswith(MINUS + "0."):
        return MINUS + text[2:]
    return text


def fmt_p(p: float | None, symbol: bool = False) -> str:
    """A p value in APA style: ``.032``, ``< .001``, ``> .999``; no leading zero.

    With ``symbol`` the result is a phrase for running text: ``*p* = .032``,
    ``*p* < .001`` (the symbol in italics, APA 7, 6.42, from memory).

    Examples
    --------
    >>> fmt_p(0.0004), fmt_p(0.03149), fmt_p(0.03149, symbol=True)
    ('< .001', '.031', '*p* = .031')
    """
    if _is_missing(p):
        return MISSING
    assert p is not None
    if p < 0.001:
        body, relation = ".001", "<"
    elif round(p, 3) >= 1.0:  # would print as 1.000
        body, relation = ".999", ">"
    else:
        body, relation = fmt_bounded(p, 3), "="
    if symbol:
        return f"*p* {relation} {body}"
    return body if relation == "=" else f"{relation} {body}"


def fmt_ci(low: float | None, high: float | None, decimals: int | None = None) -> str:
    """A confidence interval in brackets: ``[0.12, 0.56]`` (APA 7, 6.44, from memory).

    Without ``decimals`` the precision follows the interval's width, read as
    about four standard errors (a 95% interval spans 2 × 1.96 SE).
    """
    if _is_missing(low) or _is_missing(high):
        return MISSING
    assert low is not None and high is not None
    if decimals is None:
        decimals = decimals_for_se((high - low) / 3.92)
    return f"[{fmt_fixed(low, decimals)}, {fmt_fixed(high, decimals)}]"


def fmt_pct(x: float | None) -> str:
    """A percentage already in percent units: one decimal from 1% up, two significant digits below."""
    if _is_missing(x):
        return MISSING
    assert x is not None
    if abs(x) >= 1 or x == 0:
        return fmt_fixed(x, 1) + "%"
    return fmt_num(x, sig=2) + "%"


def _is_symbol(word: str) -> bool:
    """A test-statistic symbol (F, W, LM, A2, χ², t, z; ``*F*`` in italics), not a variable name."""
    word = word.strip("*")
    if not word or len(word) > 3 or "_" in word:
        return False
    return word[0].isupper() or not word[0].isascii() or word in ("t", "z", "d", "r", "q")


def fmt_stat(
    name: str, value: float | None, df: float | tuple[float, ...] | list[float] | None = None
) -> str:
    """A test statistic: ``t(97) = 2.31``, ``F(2, 95) = 3.40`` (two decimals, APA 7, 6.36).

    ``df`` may be one number or several; they print without commas. A name
    whose last word is a symbol (three characters at most) takes the df in
    parentheses; a longer, descriptive name gets ``, df = …`` after the value.
    """
    dfs: tuple[float, ...]
    if df is None:
        dfs = ()
    elif isinstance(df, (tuple, list)):
        dfs = tuple(df)
    else:
        dfs = (df,)
    df_text = ", ".join(fmt_df(d) for d in dfs)
    words = name.split()
    if dfs and words and _is_symbol(words[-1]) and not name.endswith(")"):
        # A symbol takes its df in parentheses: "F(2, 95)", "RESET F(2, 383)".
        return f"{name}({df_text}) = {fmt_fixed(value, 2)}"
    if dfs:
        # A descriptive name would misread with "(df)" glued on: give df after the value.
        return f"{name} = {fmt_fixed(value, 2)}, df = {df_text}"
    return f"{name} = {fmt_fixed(value, 2)}"


FILTERS: dict[str, Callable[..., str]] = {
    "fmt_p": fmt_p,
    "fmt_num": fmt_num,
    "fmt_fixed": fmt_fixed,
    "fmt_ci": fmt_ci,
    "fmt_int": fmt_int,
    "fmt_df": fmt_df,
    "fmt_stat": fmt_stat,
    "fmt_bounded": fmt_bounded,
    "fmt_pct": fmt_pct,
}
"""The formatting filters, by the name templates use."""


# --- coefficients on a log scale ------------------------------------------------------

EffectKind = Literal["log-predictor", "log-outcome", "elasticity"]


@dataclass(frozen=True, slots=True)
class LogEffect:
    """A coefficient restated on the original scale of a log-transformed variable."""

    kind: EffectKind
    """``log-predictor``: change in y per ``factor``-fold x; ``log-outcome``: percent
    change in y per unit of the term; ``elasticity``: both logged."""
    value: float
    """The restated effect (a change in y, a percent, or an elasticity)."""
    low: float
    high: float
    """The interval's ends, restated the same way (the map is monotone)."""
    factor: float = 2.0
    """For a logged predictor: the multiple of x the change refers to (2 or 10)."""
    doubling_pct: float | None = None
    """For an elasticity: percent change in y when x doubles."""


def _percent_change(b: float, base: float) -> float:
    # A unit step in a log_base(y) model multiplies y by base**b: percent change
    # 100 * (base**b - 1) (e.g. Wooldridge, Introductory Econometrics, ch. 6, from memory).
    return 100.0 * (math.pow(base, b) - 1.0)


def log_effect(
    estimate: float,
    low: float,
    high: float,
    *,
    outcome_base: float | None = None,
    predictor_base: float | None = None,
) -> LogEffect | None:
    """Restate a coefficient when the outcome, the predictor or both are on a log scale.

    Parameters
    ----------
    estimate, low, high
        Coefficient and its confidence limits, on the model's scale.
    outcome_base, predictor_base
        Base of the log applied to the outcome or the predictor (``math.e``,
        2 or 10); None when that side is not logged.

    Returns
    -------
    LogEffect or None
        None when neither side is logged.

    Notes
    -----
    - Logged outcome only: a unit increase in the term multiplies y by
      ``base**b``, a change of ``100 (base**b - 1)`` percent.
    - Logged predictor only: multiplying x by ``k`` changes y by
      ``b ln k / ln base``; ``k`` is the base itself for 2 and 10, else 2.
    - Both: ``b ln(base_y) / ln(base_x)`` is the elasticity d ln y / d ln x;
      doubling x multiplies y by ``2**elasticity``.

    Examples
    --------
    >>> round(log_effect(0.1, 0.0, 0.2, outcome_base=math.e).value, 4)
    10.5171
    """
    if outcome_base is None and predictor_base is None:
        return None
    if outcome_base is not None and predictor_base is not None:
        scale = math.log(outcome_base) / math.log(predictor_base)
        value, lo, hi = estimate * scale, low * scale, high * scale
        return LogEffect("elasticity", value, lo, hi, 2.0, _percent_change(value, 2.0))
    if outcome_base is not None:
        return LogEffect(
            "log-outcome",
            _percent_change(estimate, outcome_base),
            _percent_change(low, outcome_base),
            _percent_change(high, outcome_base),
        )
    assert predictor_base is not None
    factor = predictor_base if predictor_base in (2.0, 10.0) else 2.0
    scale = math.log(factor) / math.log(predictor_base)
    return LogEffect("log-predictor", estimate * scale, low * scale, high * scale, factor)
