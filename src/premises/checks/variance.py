"""Equal variance: does the spread of the residuals change with the fitted values?

The verdict rests on the ratio of residual spread (mean absolute residual)
between the top and bottom thirds of the fitted values, with a Breusch-Pagan
test (Koenker's studentised form) as the evidence that the pattern is not
noise. White's general test and Brown-Forsythe tests across factor levels are
reported beside it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from premises.checks.base import CheckContext
from premises.fit import FitResult
from premises.lsq import gram_lstsq, well_conditioned
from premises.results import Finding, Statistic, ThresholdUse, Verdict

__all__ = [
    "SPREAD_CONCERN",
    "SPREAD_VIOLATED",
    "breusch_pagan",
    "assess_variance",
    "factor_spread",
    "full_rank_columns",
    "spread_ratio",
    "weighted_residuals",
    "white_test",
]

SPREAD_CONCERN = 1.5
"""Spread ratio from which unequal variance is a concern (variance ratio 2.25);
common practice in this tool, calibrated by simulation (benchmarks/detection.py)."""

SPREAD_VIOLATED = 2.0
"""Spread ratio from which it is violated: a variance ratio of 4, the usual
rule-of-thumb limit for the largest to smallest group variance (common
practice, from memory)."""

WHITE_MAX_PREDICTORS = 10
"""White's test is skipped above this many design columns: its auxiliary
regression grows as p^2 and loses power (White 1980; PERF.md)."""

WHITE_MAX_CELLS = 20_000_000
"""White's test is skipped when its auxiliary design (rows x terms) would hold
more values than this (160 MB): at n = 10^6 and 10 design columns it takes
7 s and 2 GB (PERF.md), and at that n Breusch-Pagan has ample power."""


def weighted_residuals(fit: FitResult) -> np.ndarray:
    """Residuals on the scale where the model assumes equal variance: sqrt(w) * e for WLS."""
    if fit.weights is None:
        return np.asarray(fit.resid, dtype=float)
    return np.asarray(
        np.sqrt(np.asarray(fit.weights, dtype=float)) * np.asarray(fit.resid, dtype=float)
    )


def full_rank_columns(z: np.ndarray, tol: float = 1e-9) -> np.ndarray:
    """Columns of ``z`` after dropping ones linearly dependent on earlier ones (pivoted QR)."""
    from scipy.linalg import qr

    if tol < 1e-4 and well_conditioned(z):
        # Every |R_jj| of the unit-scaled columns is then above 1e-4 (premises.lsq.well_conditioned):
        # nothing to drop, and no factorisation of an n-row matrix is needed.
        return np.asarray(z)
    scale = np.sqrt(np.sum(z**2, axis=0))
    scale[scale == 0.0] = 1.0
    r, pivots = qr(z / scale, mode="r", pivoting=True)
    diag = np.abs(np.diag(r))
    rank = int(np.sum(diag > tol * max(diag.max(), 1.0))) if diag.size else 0
    keep = np.sort(pivots[:rank])
    return np.asarray(z[:, keep])


def _with_constant(x: np.ndarray) -> np.ndarray:
    ones = np.ones((x.shape[0], 1))
    return full_rank_columns(np.hstack([ones, x]))


def _het_statistics(
    resid: np.ndarray, z: np.ndarray
) -> tuple[float, float, float, float, float, float]:
    """Studentised LM, its p, F, F's p, and the original LM with its p, for e^2 on ``z``.

    The auxiliary regression of statsmodels' ``het_breuschpagan`` (Koenker's
    n R^2 and the original ESS / 2 of e^2 / mean(e^2); Breusch & Pagan 1979,
    Koenker 1981), solved once by the normal equations when ``z`` (with its
    constant first) is well conditioned: the two forms share one regression,
    and an SVD of a 10^6-row matrix is avoided. Otherwise statsmodels computes them.
    """
    y = np.asarray(resid, dtype=float) ** 2
    n, k = z.shape
    coef = gram_lstsq(z, y) if k >= 2 and np.all(z[:, 0] == 1.0) else None
    if coef is None:
        from statsmodels.stats.diagnostic import het_breuschpagan

        lm, lm_p, f, f_p = het_breuschpagan(resid, z, robust=True)
        lm0, lm0_p, _, _ = het_breuschpagan(resid, z, robust=False)
        return float(lm), float(lm_p), float(f), float(f_p), float(lm0), float(lm0_p)
    ssr = float(np.sum((y - z @ coef) ** 2))
    mean = float(np.mean(y))
    tss = float(np.sum((y - mean) ** 2))
    ess = tss - ssr  # as statsmodels' RegressionResults.ess (centred)
    df_model, df_resid = k - 1, n - k
    lm = n * (1.0 - ssr / tss)
    f = (ess / df_model) / (ssr / df_resid)
    lm0 = ess / mean**2 / 2.0  # the original LM: e^2 divided by its mean
    return (
        float(lm),
        float(stats.chi2.sf(lm, df_model)),
        float(f),
        float(stats.f.sf(f, df_model, df_resid)),
        float(lm0),
        float(stats.chi2.sf(lm0, df_model)),
    )


def breusch_pagan(resid: np.ndarray, x: np.ndarray) -> dict[str, float]:
    """Koenker's studentised Breusch-Pagan LM (n R^2) with its F form, and the original LM.

    ``x`` are the variance regressors (a constant is added if missing; dependent
    columns are dropped). Breusch & Pagan (1979); Koenker (1981).
    """
    z = _with_constant(np.asarray(x, dtype=float))
    lm, lm_p, f, f_p, lm0, lm0_p = _het_statistics(resid, z)
    return {
        "koenker_lm": float(lm),
        "koenker_p": float(lm_p),
        "f": float(f),
        "f_p": float(f_p),
        "original_lm": float(lm0),
        "original_p": float(lm0_p),
        "df": float(z.shape[1] - 1),
    }


def white_test(resid: np.ndarray, x: np.ndarray) -> dict[str, float]:
    """White's (1980) test: n R^2 of e^2 on the regressors, their squares and cross-products.

    Duplicated or dependent auxiliary columns (a dummy's square is itself) are
    dropped before the regression, so the degrees of freedom are right.
    """
    x = np.asarray(x, dtype=float)
    base = _with_constant(x)
    rows, cols = np.triu_indices(base.shape[1])
    aux = full_rank_columns(base[:, rows] * base[:, cols])
    lm, p, f, f_p, _, _ = _het_statistics(resid, aux)
    return {
        "lm": float(lm),
        "p": float(p),
        "df": float(aux.shape[1] - 1),
        "f": float(f),
        "f_p": float(f_p),
    }


def _third(values: np.ndarray, count: int, *, top: bool) -> np.ndarray:
    """Indices of the ``count`` smallest (or largest) values, ties taken as a stable sort takes them.

    Two partial sorts, O(n) (a full argsort costs 0.2 s at 10^6 rows): every
    value beyond the cut, then tied values at the cut in index order (the
    first ones for the bottom, the last ones for the top).
    """
    n = values.size
    kth = n - count if top else count - 1
    cut = np.partition(values, kth)[kth]
    beyond = np.flatnonzero(values > cut if top else values < cut)
    ties = np.flatnonzero(values == cut)
    need = count - beyond.size
    return np.concatenate([beyond, ties[ties.size - need :] if top else ties[:need]])


def spread_ratio(fitted: np.ndarray, resid: np.ndarray) -> tuple[float, str]:
    """Ratio (>= 1) of mean absolute residual between the top and bottom thirds of fitted values.

    Returns the ratio and which third has the larger spread ("top" or "bottom").
    """
    fitted = np.asarray(fitted, dtype=float)
    third = max(fitted.size // 3, 1)
    bottom = float(np.mean(np.abs(resid[_third(fitted, third, top=False)])))
    top = float(np.mean(np.abs(resid[_third(fitted, third, top=True)])))
    if min(top, bottom) <= 0.0:
        return float("inf"), "top" if top >= bottom else "bottom"
    return (top / bottom, "top") if top >= bottom else (bottom / top, "bottom")


def factor_spread(resid: np.ndarray, groups: np.ndarray) -> dict[str, float] | None:
    """Brown-Forsythe test (Levene with medians; Brown & Forsythe 1974) and spread ratio.

    Spread is the mean absolute deviation from the group median; levels with
    fewer than 3 observations are left out. None when fewer than two levels remain.
    """
    frame = pd.DataFrame({"e": resid, "g": groups})
    samples = [
        g["e"].to_numpy() for _, g in frame.groupby("g", sort=True, observed=True) if len(g) >= 3
    ]
    if len(samples) < 2:
        return None
    statistic, p = stats.levene(*samples, center="median")
    spreads = np.array([np.mean(np.abs(s - np.median(s))) for s in samples])
    ratio = float(spreads.max() / spreads.min()) if spreads.min() > 0 else float("inf")
    return {
        "statistic": float(statistic),
        "p": float(p),
        "ratio": ratio,
        "levels": float(len(samples)),
    }


def _factor_terms(ctx: CheckContext) -> list[tuple[str, str]]:
    """(term, data column) for terms that are a single categorical column."""
    out = []
    for term, columns in ctx.fit.design.term_columns:
        if len(columns) != 1 or columns[0] not in ctx.frame.columns:
            continue
        column = ctx.frame[columns[0]]
        categorical = not pd.api.types.is_numeric_dtype(column) or pd.api.types.is_bool_dtype(
            column
        )
        if categorical or term.startswith("C("):
            out.append((term, columns[0]))
    return out


def _grade(ratio: float, evidence: bool) -> Verdict:
    if not evidence or ratio < SPREAD_CONCERN:
        return "holds"
    return "violated" if ratio >= SPREAD_VIOLATED else "concern"


def assess_variance(ctx: CheckContext) -> Finding:
    """Assess equal variance of the residuals.

    Verdict: ``concern`` when the spread ratio between the top and bottom thirds
    of fitted values (or between levels of a factor) is at least
    :data:`SPREAD_CONCERN` and a test of that pattern is significant at
    ``thresholds.alpha``; ``violated`` from :data:`SPREAD_VIOLATED`. ``extra``
    carries ``hc3_advised`` (True for concern or violated).
    """
    fit = ctx.fit
    design = fit.design
    alpha = ctx.spec.thresholds.alpha
    e = weighted_residuals(fit)
    n = e.size
    regressors = design.X[:, np.ptp(design.X, axis=0) > 0]
    name = f"fig-{ctx.spec.id}-variance"
    method = (
        "Equal variance was assessed from the residuals plotted against the fitted values, the "
        "ratio of the mean absolute residual between the top and bottom thirds of the fitted "
        "values, and Koenker's studentised Breusch-Pagan test"
    )
    if regressors.shape[1] == 0 or np.ptp(fit.fitted) == 0 or n < 6:
        return Finding(
            assumption="variance",
            verdict="not-assessed",
            measure=None,
            reason="the model has no predictor that varies, so the fitted values are constant",
            method=method + ".",
            figure=name,
            extra=(("hc3_advised", False),),
        )
    ratio, side = spread_ratio(fit.fitted, e)
    bp = breusch_pagan(e, regressors)
    statistics = [
        Statistic(
            "Breusch-Pagan LM (Koenker)",
            bp["koenker_lm"],
            bp["koenker_p"],
            (bp["df"],),
            "Breusch & Pagan 1979; Koenker 1981",
        ),
        Statistic(
            "Breusch-Pagan F",
            bp["f"],
            bp["f_p"],
            (bp["df"], n - bp["df"] - 1),
            "Breusch & Pagan 1979; Koenker 1981",
        ),
        Statistic(
            "Breusch-Pagan LM (original)",
            bp["original_lm"],
            bp["original_p"],
            (bp["df"],),
            "Breusch & Pagan 1979",
            "assumes normal errors; Koenker (1981) shows its size is wrong otherwise",
        ),
    ]
    notes: list[str] = []
    n_aux = regressors.shape[1] + 1
    n_aux = n_aux * (n_aux + 1) // 2
    if n * n_aux > WHITE_MAX_CELLS:
        notes.append(
            f"White's test was skipped: its auxiliary regression would hold {n_aux} columns of "
            f"{n:,} rows, more than the tool computes ({WHITE_MAX_CELLS:,} values); at this n the "
            "Breusch-Pagan test has ample power against variance that changes with the regressors."
        )
    elif design.p <= WHITE_MAX_PREDICTORS and n > n_aux + 10:
        white = white_test(e, regressors)
        statistics.append(
            Statistic("White LM", white["lm"], white["p"], (white["df"],), "White 1980")
        )
    else:
        notes.append(
            f"White's test was skipped: with {design.p} parameters it needs {n_aux} auxiliary "
            f"terms, too many for {n} observations or for useful power (White 1980)."
        )
    measure_value, where = ratio, f"the {side} third of fitted values"
    evidence = bp["koenker_p"] < alpha
    factors = []
    for term, column in _factor_terms(ctx):
        result = factor_spread(e, ctx.frame[column].to_numpy())
        if result is None:
            continue
        factors.append({"term": term, **result})
        statistics.append(
            Statistic(
                f"Brown-Forsythe across {term}",
                result["statistic"],
                result["p"],
                (result["levels"] - 1, n - result["levels"]),
                "Brown & Forsythe 1974",
            )
        )
        if result["p"] < alpha and result["ratio"] > measure_value:
            measure_value, where, evidence = result["ratio"], f"one level of {term}", True
    verdict = _grade(measure_value, evidence)
    advised = verdict in ("concern", "violated")
    thresholds = (
        ThresholdUse(
            "spread ratio (concern)",
            f">= {SPREAD_CONCERN:g}",
            SPREAD_CONCERN,
            "common practice in this tool, calibrated by simulation",
        ),
        ThresholdUse(
            "spread ratio (violated)",
            f">= {SPREAD_VIOLATED:g}",
            SPREAD_VIOLATED,
            "common practice (variance ratio 4)",
        ),
        ThresholdUse("alpha", f"{alpha:g}", alpha, "declared"),
    )
    measure = Statistic(
        "spread ratio",
        measure_value,
        source="common practice",
        note="mean absolute residual, larger over smaller group",
    )
    if verdict == "holds":
        if measure_value >= SPREAD_CONCERN:
            summary = (
                f"The residual spread is {measure_value:.2f} times larger in {where}, within what "
                f"chance gives at n = {n} (Breusch-Pagan p = {bp['koenker_p']:.3g})."
            )
        else:
            summary = (
                f"The residual spread is similar across the fitted values (ratio {ratio:.2f} "
                f"between the {side} and the opposite third; Breusch-Pagan p = {bp['koenker_p']:.3g})."
            )
        consequence = "Classical standard errors are appropriate as far as variance is concerned."
        remedy = "None needed."
        if n < 50 and bp["koenker_p"] >= alpha:
            notes.append(
                "With fewer than 50 observations a non-significant test is weak evidence "
                "that the variance is constant (Ruxton et al. 2015)."
            )
    else:
        summary = (
            f"The residual spread is {measure_value:.2f} times larger in {where} "
            f"(Breusch-Pagan p = {bp['koenker_p']:.3g})."
        )
        consequence = (
            "Classical standard errors and confidence intervals may be too narrow or too "
            "wide; the coefficient estimates themselves stay unbiased."
        )
        remedy = (
            "Report heteroscedasticity-consistent (HC3) standard errors (MacKinnon & White 1985; "
            "Long & Ervin 2000); consider a transformation of the outcome or weighted least squares."
        )
        notes.append(
            "Unequal variance often signals a misspecified mean; see the linearity check before "
            "settling for robust standard errors (King & Roberts 2015)."
        )
    notes.append(
        "Long & Ervin (2000) advise against choosing the standard error from a pre-test: a "
        "robust standard error shown here follows the size of the spread ratio or a declared "
        "choice, never the test's p value, and HC3 is valid whether or not the variance is "
        "constant."
    )
    return Finding(
        assumption="variance",
        verdict=verdict,
        measure=measure,
        statistics=tuple(statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=thresholds,
        method=method + (", with Brown-Forsythe tests across factor levels." if factors else "."),
        notes=tuple(notes),
        figure=name,
        extra=(
            ("hc3_advised", advised),
            ("spread_ratio_thirds", ratio),
            ("larger_third", side),
            ("factors", factors),
        ),
    )
