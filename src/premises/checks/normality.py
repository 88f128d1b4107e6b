"""Normality of the errors, judged from the studentized residuals.

The verdict rests on a tail measure in interpretable units: the largest
distance, in robust standard deviations, between the residuals' quantiles and
a normal distribution's over the central 98%. Tests (Shapiro-Wilk,
Anderson-Darling) are the evidence that the shape is not chance; the sample
size decides how much a departure matters, because least-squares inference on
coefficients leans on the central limit theorem as n grows (Lumley et al. 2002).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from premises.checks.base import CheckContext
from premises.results import Finding, Statistic, ThresholdUse, Verdict

__all__ = [
    "LARGE_ENOUGH_N",
    "SHAPIRO_MAX_N",
    "TAIL_CONCERN",
    "TAIL_VIOLATED",
    "anderson_darling",
    "assess_normality",
    "qq_data",
    "shapiro_wilk",
    "tail_deviation",
]

TAIL_CONCERN = 0.7
"""Tail deviation (robust SD units) from which non-normality is a concern
(common practice in this tool, calibrated by simulation: normal errors at
n = 200 reach it in about 1.5% of samples with a significant Shapiro-Wilk
test, t(3) errors in about 95%)."""

TAIL_VIOLATED = 1.0
"""Tail deviation from which it is violated at any n: tails this heavy or
skewed cost least squares much of its efficiency and distort prediction
intervals, whatever the sample size (common practice in this tool)."""

LARGE_ENOUGH_N = 30
"""From this n a mild departure is at most a concern, resting on the central
limit theorem for coefficient inference (common practice; Lumley et al. 2002)."""

SHAPIRO_MAX_N = 5000
"""Royston's (1995) algorithm is validated for 3 <= n <= 5000; above, a seeded
subsample of this size is tested."""

TAIL_RANGE = (0.01, 0.99)
"""Plotting positions compared: the central 98% (common practice in this tool)."""


def _positions(n: int) -> np.ndarray:
    """Blom (1958) plotting positions (i - 3/8) / (n + 1/4)."""
    return (np.arange(1, n + 1) - 0.375) / (n + 0.25)


def tail_deviation(z: np.ndarray) -> tuple[float, float]:
    """Largest |residual quantile - normal quantile| over the central 98%, in robust SD units.

    Residuals are centred at their median and scaled by IQR / 1.349 so heavy
    tails cannot hide by inflating the scale. Returns the deviation (signed:
    positive when the residual quantile lies further out than the normal one)
    and the plotting position where it occurs.

    Examples
    --------
    >>> z = stats.norm.ppf(_positions(999))
    >>> round(tail_deviation(z)[0], 6)
    0.0
    """
    values = np.sort(np.asarray(z, dtype=float))
    n = values.size
    q25, q50, q75 = np.quantile(values, [0.25, 0.5, 0.75])
    scale = (q75 - q25) / (stats.norm.ppf(0.75) - stats.norm.ppf(0.25))
    if n < 3 or scale <= 0.0:
        return float("nan"), float("nan")
    prob = _positions(n)
    keep = (prob >= TAIL_RANGE[0]) & (prob <= TAIL_RANGE[1])
    normal = stats.norm.ppf(prob[keep])
    sample = (values[keep] - q50) / scale
    diff = sample - normal
    at = int(np.argmax(np.abs(diff)))
    outward = diff[at] * np.sign(normal[at]) if normal[at] != 0 else abs(diff[at])
    return float(outward), float(prob[keep][at])


def qq_data(z: np.ndarray, max_points: int = 1200) -> tuple[np.ndarray, np.ndarray]:
    """Normal quantiles and sorted residuals for a Q-Q plot, thinned to about ``max_points``.

    Beyond ``max_points`` residuals, evenly spaced ranks are kept plus the 10
    most extreme at each end, so the tails stay visible.
    """
    values = np.sort(np.asarray(z, dtype=float)[np.isfinite(z)])
    n = values.size
    theoretical = stats.norm.ppf(_positions(n))
    if n <= max_points:
        return theoretical, values
    ends = np.r_[np.arange(10), np.arange(n - 10, n)]
    keep = np.unique(np.r_[np.linspace(0, n - 1, max_points - 20).round().astype(int), ends])
    return theoretical[keep], values[keep]


def shapiro_wilk(z: np.ndarray, seed: int) -> tuple[float, float, bool]:
    """Shapiro-Wilk W and p (Shapiro & Wilk 1965; Royston 1995 via scipy).

    Above :data:`SHAPIRO_MAX_N` observations a seeded random subsample of that
    size is tested; the third value says whether that happened.
    """
    values = np.asarray(z, dtype=float)
    subsampled = values.size > SHAPIRO_MAX_N
    if subsampled:
        rng = np.random.default_rng(seed)
        values = rng.choice(values, SHAPIRO_MAX_N, replace=False)
    result = stats.shapiro(values)
    return float(result.statistic), float(result.pvalue), subsampled


def anderson_darling(z: np.ndarray) -> tuple[float, float]:
    """Anderson-Darling A^2 for normality with estimated mean and SD, and its p-value.

    A^2 as in Anderson & Darling (1954); the p-value from Stephens' (1974)
    formulas on the adjusted A^2 (1 + 0.75/n + 2.25/n^2), via statsmodels
    ``normal_ad`` (scipy's version only interpolates a table bounded to 0.01-0.15).
    """
    from statsmodels.stats.diagnostic import normal_ad

    values = np.asarray(z, dtype=float)
    if (
        values.size < 8
    ):  # the formulas are given for n >= 8 (D'Agostino & Stephens 1986, from memory)
        return float("nan"), float("nan")
    a2, p = normal_ad(values)
    return float(a2), float(p)


def _grade(tail: float, evidence: bool, n: int) -> Verdict:
    if not evidence or not np.isfinite(tail) or abs(tail) < TAIL_CONCERN:
        return "holds"
    if abs(tail) >= TAIL_VIOLATED or n < LARGE_ENOUGH_N:
        return "violated"
    return "concern"


def _describe(tail: float, at: float, skew: float) -> str:
    side = "upper" if at > 0.5 else "lower"
    if tail >= 0:
        shape = f"the {side} tail is longer than a normal distribution's"
    else:
        shape = f"the {side} tail is shorter than a normal distribution's"
    if abs(skew) >= 0.5:
        shape += f" (skewness {skew:.2f})"
    return shape


def assess_normality(ctx: CheckContext) -> Finding:
    """Assess normality of the errors from the internally studentized residuals.

    Verdict: ``concern`` when the tail deviation is at least :data:`TAIL_CONCERN`
    and Shapiro-Wilk is significant at ``thresholds.alpha``; ``violated`` from
    :data:`TAIL_VIOLATED`, or already from the concern level when n < 30.
    """
    alpha = ctx.spec.thresholds.alpha
    z = np.asarray(ctx.influence.studentized_internal, dtype=float)
    z = z[np.isfinite(z)]
    n = z.size
    name = f"fig-{ctx.spec.id}-normality"
    method = (
        "Normality of the errors was assessed from a Q-Q plot of the studentized residuals against normal quantiles, "
        "the largest gap between their quantiles and normal quantiles over the central 98% "
        "(in robust standard deviations), skewness and excess kurtosis, and the Shapiro-Wilk and "
        "Anderson-Darling tests"
    )
    if n < 3:
        return Finding(
            assumption="normality",
            verdict="not-assessed",
            measure=None,
            reason="fewer than 3 residuals are defined",
            method=method + ".",
            figure=name,
        )
    tail, at = tail_deviation(z)
    skew = float(stats.skew(z))
    kurt = float(stats.kurtosis(z))
    w, w_p, subsampled = shapiro_wilk(z, ctx.seed)
    a2, a2_p = anderson_darling(z)
    statistics = (
        Statistic(
            "Shapiro-Wilk W",
            w,
            w_p,
            source="Shapiro & Wilk 1965; Royston 1995",
            note=f"on a random subsample of {SHAPIRO_MAX_N}" if subsampled else "",
        ),
        Statistic(
            "Anderson-Darling A2",
            a2,
            a2_p,
            source="Anderson & Darling 1954; Stephens 1974",
            note="p from Stephens' (1974) formulas",
        ),
        Statistic("skewness", skew, source="descriptive"),
        Statistic("excess kurtosis", kurt, source="descriptive"),
    )
    verdict = _grade(tail, w_p < alpha, n)
    measure = Statistic(
        "tail deviation",
        abs(tail),
        source="common practice in this tool",
        note=f"robust SD units, at plotting position {at:.3f}",
    )
    notes: list[str] = []
    if subsampled:
        notes.append(
            f"Shapiro-Wilk was computed on a seeded random subsample of {SHAPIRO_MAX_N} residuals "
            f"(seed {ctx.seed}); its p-value is not calibrated above that size (Royston 1995)."
        )
    if verdict == "holds":
        if abs(tail) >= TAIL_CONCERN:
            summary = (
                f"The residual quantiles depart from normal quantiles by up to {abs(tail):.2f} SD, "
                f"within what chance gives at n = {n} (Shapiro-Wilk W = {w:.3f}, p = {w_p:.3g})."
            )
        else:
            summary = (
                f"The residuals are close to normal: their quantiles stay within {abs(tail):.2f} SD "
                f"of normal quantiles (Shapiro-Wilk W = {w:.3f}, p = {w_p:.3g})."
            )
        consequence = "Normal-theory confidence intervals and tests are appropriate."
        remedy = "None needed."
        if w_p < alpha:
            notes.append(
                f"Shapiro-Wilk is significant, but the departure is small; with n = {n} formal tests "
                "flag departures that do not affect inference on the coefficients (Lumley et al. 2002)."
            )
        elif n < 50:
            notes.append(
                "With fewer than 50 observations normality tests have low power (generally below 0.5, "
                "Ruxton et al. 2015): a non-significant test is weak evidence of normality."
            )
    else:
        summary = (
            f"The residuals depart from normality: {_describe(tail, at, skew)}, by up to {abs(tail):.2f} SD "
            f"(Shapiro-Wilk W = {w:.3f}, p = {w_p:.3g})."
        )
        if n >= LARGE_ENOUGH_N:
            consequence = (
                f"With n = {n}, confidence intervals for coefficients are roughly right (central "
                "limit theorem), but least squares is inefficient with heavy tails or skew, and "
                "prediction intervals are wrong."
            )
        else:
            consequence = (
                f"With only n = {n}, t-based confidence intervals and p-values for the coefficients "
                "may be inaccurate."
            )
        remedy = (
            "Check for outliers (see influence) and a misspecified mean first; consider a transformation "
            "of the outcome, robust regression, or bootstrap confidence intervals."
        )
    thresholds = (
        ThresholdUse(
            "tail deviation (concern)",
            f">= {TAIL_CONCERN:g}",
            TAIL_CONCERN,
            "common practice in this tool, calibrated by simulation",
        ),
        ThresholdUse(
            "tail deviation (violated)",
            f">= {TAIL_VIOLATED:g}",
            TAIL_VIOLATED,
            "common practice in this tool",
        ),
        ThresholdUse(
            "n for the CLT argument",
            f">= {LARGE_ENOUGH_N}",
            float(LARGE_ENOUGH_N),
            "common practice; Lumley et al. 2002",
        ),
        ThresholdUse("alpha", f"{alpha:g}", alpha, "declared"),
    )
    extra = (
        ("tail_deviation", tail),
        ("tail_position", at),
        ("skewness", skew),
        ("excess_kurtosis", kurt),
        ("shapiro_subsampled", subsampled),
        ("n", n),
    )
    return Finding(
        assumption="normality",
        verdict=verdict,
        measure=measure,
        statistics=statistics,
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=thresholds,
        method=method + ".",
        notes=tuple(notes),
        figure=name,
        extra=extra,
    )
