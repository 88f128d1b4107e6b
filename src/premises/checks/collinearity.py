"""Collinearity: how much do correlated predictors inflate the standard errors?

Variance inflation factors come from one inverse of the predictors'
correlation matrix (VIF_j = [R^-1]_jj), not from p auxiliary regressions; a
term spanning several columns (a factor, a spline) gets the generalised VIF
of Fox & Monette (1992), computed from the same inverse. The verdict rests on
the largest VIF; the condition number of the scaled, uncentred design
(Belsley, Kuh & Welsch 1980) is reported beside it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from premises.checks.base import CheckContext
from premises.results import Finding, Statistic, ThresholdUse, Verdict

__all__ = ["VIOLATED_FACTOR", "assess_collinearity", "generalised_vif", "vif_from_correlation"]

VIOLATED_FACTOR = 10.0
"""VIF at this multiple of the declared threshold (100 by default: standard
errors ten times what they would be without the correlation) counts as
violated (common practice in this tool)."""


def _correlation(x: np.ndarray, weights: np.ndarray | None) -> np.ndarray:
    """Correlation matrix of the columns of ``x`` (weighted for WLS)."""
    w = np.ones(x.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    centred = x - (w @ x) / w.sum()
    scaled = centred * np.sqrt(w)[:, None]
    cross = scaled.T @ scaled
    sd = np.sqrt(np.diag(cross))
    return np.asarray(cross / np.outer(sd, sd))


def vif_from_correlation(x: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """Variance inflation factors: the diagonal of the inverse correlation matrix of ``x``.

    ``x`` holds the predictor columns without the intercept. Infinite where the
    columns are exactly collinear.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> a = rng.normal(size=200)
    >>> bool(vif_from_correlation(np.column_stack([a, a + 0.1 * rng.normal(size=200)]))[0] > 50)
    True
    """
    r = _correlation(np.asarray(x, dtype=float), weights)
    try:
        return np.asarray(np.diag(np.linalg.inv(r)))
    except np.linalg.LinAlgError:
        return np.full(r.shape[0], np.inf)


def generalised_vif(r: np.ndarray, groups: list[list[int]]) -> list[float]:
    """GVIF of each group of columns: det(R_AA) det(R_BB) / det(R) (Fox & Monette 1992).

    Uses det(R_BB) / det(R) = 1 / det((R^-1)_AA) (a Schur-complement identity), so
    one inverse serves every term: GVIF_A = det(R_AA) det((R^-1)_AA).
    """
    inverse = np.linalg.inv(r)
    out = []
    for columns in groups:
        index = np.ix_(columns, columns)
        _, log_a = np.linalg.slogdet(r[index])
        _, log_inv = np.linalg.slogdet(inverse[index])
        out.append(float(np.exp(log_a + log_inv)))
    return out


def _terms(ctx: CheckContext) -> tuple[list[str], list[list[int]], np.ndarray]:
    """Non-intercept terms, their column positions among the predictor columns, and those columns."""
    x = np.asarray(ctx.fit.design.X, dtype=float)
    varying = np.flatnonzero(np.ptp(x, axis=0) > 0)
    position = {int(c): k for k, c in enumerate(varying)}
    names, groups = [], []
    for term, start, stop in ctx.fit.design.term_slices:
        columns = [position[c] for c in range(start, stop) if c in position]
        if columns:
            names.append(term)
            groups.append(columns)
    return names, groups, x[:, varying]


def _structural(ctx: CheckContext, high: list[str]) -> bool:
    """True when every high-VIF term shares a data column with another high-VIF term.

    Powers, products and the main effects they are built from are collinear by
    construction; Allison (2012) explains such VIFs can be ignored.
    """
    columns = {term: set(cols) for term, cols in ctx.fit.design.term_columns}
    if len(high) < 2:
        return False
    return all(
        any(columns.get(a, set()) & columns.get(b, set()) for b in high if b != a) for a in high
    )


def assess_collinearity(ctx: CheckContext) -> Finding:
    """Assess collinearity among the predictor terms.

    ``not-assessed`` with fewer than two predictor terms. Verdict: ``concern``
    when a term's VIF (GVIF^(1/df) for multi-column terms) reaches
    ``thresholds.vif``; ``violated`` from :data:`VIOLATED_FACTOR` times it;
    ``holds`` with an explanation when only terms built from the same variables
    (powers, interactions) are high (Allison 2012).
    """
    name = f"fig-{ctx.spec.id}-collinearity"
    limit = ctx.spec.thresholds.vif
    condition_limit = ctx.spec.thresholds.condition
    method = (
        "Collinearity was assessed with variance inflation factors from the inverse of the predictors' "
        "correlation matrix (generalised VIFs, Fox & Monette 1992, for terms with several columns) and "
        "the condition number of the scaled, uncentred design (Belsley, Kuh & Welsch 1980)"
    )
    names, groups, x = _terms(ctx)
    if len(names) < 2:
        return Finding(
            assumption="collinearity",
            verdict="not-assessed",
            measure=None,
            reason="fewer than two predictor terms",
            method=method + ".",
            figure=name,
            extra=(("vif", {}),),
        )
    r = _correlation(x, ctx.fit.weights)
    try:
        gvif = generalised_vif(r, groups)
    except np.linalg.LinAlgError:
        gvif = [float("inf")] * len(groups)
    dfs = [len(g) for g in groups]
    comparable = [
        g ** (1.0 / d) for g, d in zip(gvif, dfs)
    ]  # (GVIF^(1/(2 df)))^2, Fox & Monette 1992
    worst = int(np.argmax(comparable))
    largest = comparable[worst]
    condition = float(ctx.fit.condition_number)
    high = [t for t, v in zip(names, comparable) if v >= limit]
    structural = _structural(ctx, high)
    if not high or structural:
        verdict: Verdict = "holds"
    else:
        verdict = "violated" if largest >= VIOLATED_FACTOR * limit else "concern"
    statistics = [
        Statistic(
            f"VIF {t}" if d == 1 else f"GVIF^(1/(2df)) {t}",
            v if d == 1 else v**0.5,
            source="Marquardt 1970" if d == 1 else "Fox & Monette 1992",
            df=None if d == 1 else (float(d),),
        )
        for t, v, d in zip(names, comparable, dfs)
    ]
    statistics.append(
        Statistic(
            "condition number",
            condition,
            source="Belsley, Kuh & Welsch 1980",
            note="scaled, uncentred design",
        )
    )
    notes = [
        (
            "Collinearity widens the confidence intervals of the terms involved only; it does not bias "
            "the estimates or affect the other terms. Dropping a variable to lower a VIF is not "
            "advised: it can bias what remains (O'Brien 2007)."
        )
    ]
    if structural:
        notes.append(
            f"The high VIFs ({', '.join(high)}) involve powers or products of the same variables; "
            "such VIFs are expected and can be ignored, because the joint test of those terms is "
            "unaffected (Allison 2012). Centring the variables lowers them without changing the fit."
        )
    if condition >= condition_limit and not high:
        notes.append(
            f"The condition number is {condition:.0f} although no VIF is high: the near-dependency "
            "involves the intercept (predictors far from zero); it affects the intercept's precision "
            "only, and centring the predictors removes it."
        )
    if not ctx.fit.design.has_intercept:
        notes.append(
            "The model has no intercept; VIFs from the correlation matrix describe the centred "
            "predictors."
        )
    measure = Statistic(
        "largest VIF",
        largest,
        source="Marquardt 1970; Fox & Monette 1992",
        note=f"term {names[worst]}" + ("" if dfs[worst] == 1 else ", GVIF^(1/df)"),
    )
    if verdict == "holds" and not high:
        summary = (
            f"The predictors are not strongly collinear: the largest VIF is {largest:.2f} "
            f"({names[worst]}); condition number {condition:.1f}."
        )
        consequence = (
            "Standard errors are not noticeably inflated by correlation among the predictors."
        )
        remedy = "None needed."
    elif verdict == "holds":
        summary = (
            f"VIFs are high only for terms built from the same variables (largest {largest:.1f}, "
            f"{names[worst]}), which is expected and harmless."
        )
        consequence = (
            "The individual coefficients of those terms are imprecise; their joint test is not."
        )
        remedy = "None needed; centre the variables if the individual coefficients are of interest."
    else:
        summary = (
            f"The standard error of {names[worst]} is inflated about {np.sqrt(largest):.1f}-fold by its "
            f"correlation with other predictors (VIF {largest:.1f}; {len(high)} term(s) at or above "
            f"{limit:g})."
        )
        consequence = (
            "The coefficients of the collinear terms are estimated imprecisely and can change sign "
            "between samples; their joint effect is still well estimated."
        )
        remedy = (
            "Interpret the collinear terms jointly (a joint test), or collect data that separate them; "
            "do not drop variables just to lower the VIF (O'Brien 2007)."
        )
    thresholds = (
        ThresholdUse("VIF", f"{limit:g}", limit, "Marquardt 1970; common practice"),
        ThresholdUse(
            "VIF (violated)",
            f"{VIOLATED_FACTOR * limit:g}",
            VIOLATED_FACTOR * limit,
            "common practice in this tool",
        ),
        ThresholdUse(
            "condition number",
            f"{condition_limit:g}",
            condition_limit,
            "Belsley, Kuh & Welsch 1980",
        ),
    )
    extra: tuple[tuple[str, Any], ...] = (
        ("vif", dict(zip(names, comparable))),
        ("gvif", dict(zip(names, gvif))),
        ("df", dict(zip(names, dfs))),
        ("condition_number", condition),
        ("high", high),
        ("structural", structural),
    )
    return Finding(
        assumption="collinearity",
        verdict=verdict,
        measure=measure,
        statistics=tuple(statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=thresholds,
        method=method + ".",
        notes=tuple(notes),
        figure=name,
        extra=extra,
    )
