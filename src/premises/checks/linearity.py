"""Linearity: is the mean of the outcome a linear function of the terms as written?

The verdict rests on the largest share of residual variance that a smooth (a
broken line through quantile knots, :mod:`premises.checks.smoothing`)
explains, against the fitted values and against each numeric predictor term
(the departure of a component-plus-residual smooth from its straight line is
the same curve of the residuals). Ramsey's RESET, and Harvey-Collier when an
order is declared, are reported as formal tests.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from premises.checks.base import CheckContext
from premises.checks.independence import order_values
from premises.checks.smoothing import SmoothShare, broken_line_share, default_knots
from premises.checks.variance import full_rank_columns, weighted_residuals
from premises.fit import FitResult
from premises.lsq import gram_lstsq
from premises.results import Finding, Statistic, ThresholdUse, Verdict

__all__ = [
    "HARVEY_COLLIER_MAX_N",
    "SHARE_CONCERN",
    "SHARE_VIOLATED",
    "assess_linearity",
    "harvey_collier",
    "predictor_curves",
    "reset_from_fit",
    "reset_test",
]

SHARE_CONCERN = 0.04
"""Share of residual variance a smooth explains from which nonlinearity is a
concern: the model's mean is off by about 0.2 residual SD on average (common
practice in this tool, calibrated by simulation, benchmarks/detection.py)."""

SHARE_VIOLATED = 0.15
"""Share from which linearity is violated (mean off by about 0.4 residual SD;
common practice in this tool, calibrated by simulation)."""

HARVEY_COLLIER_MAX_N = 100_000
"""Harvey-Collier's recursive residuals cost O(n p^2) in a Python loop; above
this it is skipped with a note (PERF.md)."""


def reset_test(
    y: np.ndarray,
    x: np.ndarray,
    fitted: np.ndarray,
    weights: np.ndarray | None = None,
    powers: int = 3,
) -> dict[str, float]:
    """Ramsey's (1969) RESET: F test of adding fitted^2 .. fitted^powers to the model.

    The powers are of the fitted values divided by their largest absolute value,
    which leaves the F test unchanged and keeps the columns well scaled. With
    ``weights`` every row is multiplied by sqrt(w) (the WLS fitting scale).
    """
    root_w = _root_weights(weights, np.asarray(y).size)
    y = np.asarray(y, dtype=float) * root_w
    x = np.asarray(x, dtype=float) * root_w[:, None]
    scale = float(np.max(np.abs(fitted))) or 1.0
    extra = np.column_stack([(fitted / scale) ** k for k in range(2, powers + 1)]) * root_w[:, None]
    base = full_rank_columns(x)
    full = full_rank_columns(np.hstack([base, extra]))
    q = full.shape[1] - base.shape[1]
    n = y.size
    rss0 = _rss(base, y)
    rss1 = _rss(full, y)
    df2 = n - full.shape[1]
    if q < 1 or df2 < 1 or rss1 <= 0.0:
        return {"f": float("nan"), "p": float("nan"), "df1": float(q), "df2": float(df2)}
    f = ((rss0 - rss1) / q) / (rss1 / df2)
    return {"f": float(f), "p": float(stats.f.sf(f, q, df2)), "df1": float(q), "df2": float(df2)}


def reset_from_fit(fit: FitResult, powers: int = 3) -> dict[str, float]:
    """:func:`reset_test` for a fitted model, from its factorisation (same statistic, O(n p)).

    By Frisch-Waugh, the residual sum of squares with the powers of the fitted
    values added is the fit's own, less what those powers explain of its
    residuals once the design is projected out of them (premises.lsq's
    ``residualise``). No (n, p + 2) design is formed or factorised; powers that
    the design already spans (a relative remainder below 1e-9, as
    ``full_rank_columns`` decides) are dropped. Falls back to
    :func:`reset_test` when the fit carries no factorisation.
    """
    from scipy.linalg import qr

    design = fit.design
    factor = fit.factor
    if factor is None:
        return reset_test(design.y, design.X, fit.fitted, fit.weights, powers)
    n, p = design.n, design.p
    root_w = _root_weights(fit.weights, n)
    scale = float(np.max(np.abs(fit.fitted))) or 1.0
    extra = np.column_stack([(fit.fitted / scale) ** k for k in range(2, powers + 1)]) * root_w[:, None]
    lengths = np.sqrt(np.einsum("ij,ij->j", extra, extra))
    lengths[lengths == 0.0] = 1.0
    remainder = factor.residualise(extra) / lengths
    r, pivots = qr(remainder, mode="r", pivoting=True)
    diag = np.abs(np.diag(r))
    keep = np.sort(pivots[: int(np.sum(diag > 1e-9))]) if diag.size else np.empty(0, dtype=np.intp)
    q = int(keep.size)
    df2 = n - p - q
    rss0 = float(fit.ss_resid)
    if q < 1 or df2 < 1:
        return {"f": float("nan"), "p": float("nan"), "df1": float(q), "df2": float(df2)}
    kept = remainder[:, keep]
    e = fit.weighted_resid
    # What the remainders explain of the residuals: e'F (F'F)^-1 F'e, a q x q solve.
    cross = kept.T @ e
    explained = float(cross @ np.linalg.solve(kept.T @ kept, cross))
    rss1 = rss0 - explained
    if rss1 <= 0.0:
        return {"f": float("nan"), "p": float("nan"), "df1": float(q), "df2": float(df2)}
    f = (explained / q) / (rss1 / df2)
    return {"f": float(f), "p": float(stats.f.sf(f, q, df2)), "df1": float(q), "df2": float(df2)}


def _root_weights(weights: np.ndarray | None, n: int) -> np.ndarray:
    return np.ones(n) if weights is None else np.sqrt(np.asarray(weights, dtype=float))


def _rss(x: np.ndarray, y: np.ndarray) -> float:
    # Normal equations when well conditioned (premises.lsq.gram_lstsq; the residual sum
    # of squares is then exact to second order in the coefficients' error), else SVD.
    coef = gram_lstsq(x, y)
    if coef is None:
        coef, *_ = np.linalg.lstsq(x, y, rcond=None)
    r = y - x @ coef
    return float(r @ r)


def harvey_collier(
    y: np.ndarray, x: np.ndarray, order: np.ndarray, weights: np.ndarray | None = None
) -> dict[str, float]:
    """Harvey & Collier (1977): t test that recursive residuals, in ``order``, have mean 0."""
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import recursive_olsresiduals

    root_w = _root_weights(weights, np.asarray(y).size)
    idx = np.argsort(order, kind="stable")
    yw = (np.asarray(y, dtype=float) * root_w)[idx]
    xw = (np.asarray(x, dtype=float) * root_w[:, None])[idx]
    n, p = xw.shape
    skip = p
    # The recursion starts from the first `skip` rows; they must identify every
    # coefficient (factor dummies may not appear early in the order).
    while skip < n and np.linalg.matrix_rank(xw[:skip]) < p:
        skip = min(2 * skip, n)
    if skip > n - 3:
        return {"t": float("nan"), "p": float("nan"), "df": float("nan")}
    standardized = recursive_olsresiduals(sm.OLS(yw, xw).fit(), skip=skip)[3][skip:]
    # statsmodels' linear_harvey_collier drops only the first 3 entries, which
    # leaves NaNs in when skip > 3; the t test itself is the same.
    test = stats.ttest_1samp(standardized, 0.0)
    return {"t": float(test.statistic), "p": float(test.pvalue), "df": float(standardized.size - 1)}


def predictor_curves(ctx: CheckContext) -> list[tuple[str, np.ndarray]]:
    """(term, design column) for each numeric predictor term entered linearly.

    A term qualifies when it is one design column built from one data column
    and takes more than two values (``x``, ``log(x)``, ``center(x)``; not a
    dummy, power or product). The first such term of each data column is
    used: the residuals are orthogonal to it, as the smooth's degrees of
    freedom assume.
    """
    design = ctx.fit.design
    columns = dict(design.term_columns)
    seen: set[str] = set()
    out = []
    for term, start, stop in design.term_slices:
        sources = columns.get(term, ())
        if stop - start != 1 or len(sources) != 1 or sources[0] in seen:
            continue
        values = np.asarray(design.X[:, start], dtype=float)
        if np.unique(values).size > 2:
            seen.add(sources[0])
            out.append((term, values))
    return out


def _grade(share: float, evidence: bool) -> Verdict:
    if not evidence or share < SHARE_CONCERN:
        return "holds"
    return "violated" if share >= SHARE_VIOLATED else "concern"


def assess_linearity(ctx: CheckContext) -> Finding:
    """Assess linearity from smooths of the residuals.

    The measure is the largest adjusted share of residual variance explained by
    a broken-line smooth of the residuals against the fitted values and each
    numeric predictor term (:func:`predictor_curves`). Verdict: ``concern``
    from :data:`SHARE_CONCERN` and ``violated`` from :data:`SHARE_VIOLATED`,
    each only when that smooth's F test, Bonferroni-adjusted over the curves
    examined, is below ``thresholds.alpha``.
    """
    fit = ctx.fit
    design = fit.design
    alpha = ctx.spec.thresholds.alpha
    name = f"fig-{ctx.spec.id}-linearity"
    order = order_values(ctx)
    e = weighted_residuals(fit)
    n = e.size
    method = (
        "Linearity was assessed from smooths of the residuals against the fitted values and "
        "each numeric predictor (the share of residual variance a broken line through "
        "quantile knots explains beyond a straight line) and Ramsey's RESET test"
    )
    if np.ptp(fit.fitted) == 0 or n < 10:
        return Finding(
            assumption="linearity",
            verdict="not-assessed",
            measure=None,
            reason="the fitted values are constant or fewer than 10 rows were analysed",
            method=method + ".",
            figure=name,
        )
    k = default_knots(n)
    curves = [("fitted values", np.asarray(fit.fitted, dtype=float))] + predictor_curves(ctx)
    shares: dict[str, SmoothShare] = {
        label: broken_line_share(x, e, k, design.p) for label, x in curves
    }
    worst = max(shares, key=lambda label: shares[label].share)
    top = shares[worst]
    adjusted_p = min(1.0, top.p * len(shares)) if np.isfinite(top.p) else float("nan")
    reset = reset_from_fit(fit)
    statistics = [
        Statistic(
            f"smooth of residuals against {worst}",
            top.f_statistic,
            top.p,
            top.df,
            "extra-sum-of-squares F test",
            note=f"Bonferroni-adjusted p = {adjusted_p:.3g}",
        ),
        Statistic(
            "RESET F (powers 2-3)",
            reset["f"],
            reset["p"],
            (reset["df1"], reset["df2"]),
            "Ramsey 1969",
        ),
    ]
    notes: list[str] = []
    if order is not None:
        if n <= HARVEY_COLLIER_MAX_N and n > design.p + 3:
            hc = harvey_collier(design.y, design.X, order, fit.weights)
            statistics.append(
                Statistic(
                    f"Harvey-Collier t (ordered by {ctx.spec.order})",
                    hc["t"],
                    hc["p"],
                    (hc["df"],),
                    "Harvey & Collier 1977",
                )
            )
        else:
            notes.append(
                f"The Harvey-Collier test was skipped for n = {n} (its recursive residuals "
                "are too slow above 100,000 rows)."
            )
    verdict = _grade(top.share, adjusted_p < alpha)
    share_pct = max(top.share, 0.0)
    measure = Statistic(
        "share of residual variance explained by a smooth",
        share_pct,
        source="common practice in this tool",
        note=f"largest over: {worst}",
    )
    if verdict == "holds":
        if share_pct >= SHARE_CONCERN:
            summary = (
                f"A smooth of the residuals against {worst} explains {share_pct:.1%} of their "
                f"variance, within what chance gives at n = {n} (adjusted p = {adjusted_p:.3g}; "
                f"RESET p = {reset['p']:.3g})."
            )
        else:
            summary = (
                f"No systematic curve in the residuals: a smooth explains at most {share_pct:.1%} "
                f"of their variance (largest against {worst}; RESET p = {reset['p']:.3g})."
            )
        consequence = "The linear form of the terms describes the mean adequately."
        remedy = "None needed."
        if reset["p"] < alpha:
            notes.append(
                "RESET is significant although no smooth explains much of the residual variance; "
                "at large n it flags departures too small to matter (Li et al. 2024)."
            )
        if n < 50:
            notes.append(
                "With fewer than 50 observations a curve can go undetected; judge the figure too."
            )
    else:
        summary = (
            f"The residuals follow a curve against {worst}: a smooth explains {share_pct:.1%} of "
            f"their variance (adjusted p = {adjusted_p:.3g}; RESET p = {reset['p']:.3g})."
        )
        consequence = (
            "Coefficients describe a straight-line approximation; predictions and effects are "
            "biased where the curve departs from it, and unequal variance may be an artefact."
        )
        remedy = (
            f"Model the curvature{' in ' + worst if worst != 'fitted values' else ''}: a spline, a "
            "polynomial term or a transformation, chosen on subject-matter grounds."
        )
    thresholds = (
        ThresholdUse(
            "smooth share (concern)",
            f">= {SHARE_CONCERN:g}",
            SHARE_CONCERN,
            "common practice in this tool, calibrated by simulation",
        ),
        ThresholdUse(
            "smooth share (violated)",
            f">= {SHARE_VIOLATED:g}",
            SHARE_VIOLATED,
            "common practice in this tool, calibrated by simulation",
        ),
        ThresholdUse("alpha", f"{alpha:g}", alpha, "declared"),
    )
    extra = (
        ("knots", k),
        ("shares", {label: s.share for label, s in shares.items()}),
        ("p_values", {label: s.p for label, s in shares.items()}),
        ("worst", worst),
    )
    return Finding(
        assumption="linearity",
        verdict=verdict,
        measure=measure,
        statistics=tuple(statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=thresholds,
        method=method
        + (" and the Harvey-Collier test in the declared order" if order is not None else "")
        + ".",
        notes=tuple(notes),
        figure=name,
        extra=extra,
    )
