"""Independence: serial correlation along a declared order, clustering within declared groups.

Without an order or groups the check says so and does nothing: the
Durbin-Watson statistic of rows in file order is "not even uniquely defined"
for cross-sectional data (NEEDS.md section 2). With an order the measure is
the lag-1 autocorrelation of the residuals; with groups it is the design
effect 1 + (m - 1) ICC (Kish 1965).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import stats
from statsmodels.stats.stattools import durbin_watson

from premises.checks.base import CheckContext
from premises.checks.variance import weighted_residuals
from premises.errors import DataError
from premises.results import Finding, Statistic, ThresholdUse

__all__ = [
    "AUTOCORRELATION_CONCERN",
    "AUTOCORRELATION_VIOLATED",
    "DEFF_CONCERN",
    "DEFF_VIOLATED",
    "FEW_CLUSTERS",
    "breusch_godfrey",
    "check_independence",
    "cluster_summary",
    "group_values",
    "order_values",
    "serial_summary",
]

AUTOCORRELATION_CONCERN = 0.2
"""|lag-1 autocorrelation| from which serial correlation is a concern: for a
predictor that is itself strongly autocorrelated, classical SEs are then about
20% too small, sqrt((1 + r)/(1 - r)) (common practice in this tool)."""

AUTOCORRELATION_VIOLATED = 0.4
"""... and violated (SEs about 50% too small for such a predictor)."""

DEFF_CONCERN = 1.75
"""Design effect from which clustering is a concern (common practice in this
tool, calibrated by simulation: with 20 groups of 10 and independent errors the
estimate reaches it, with a significant F test, in about 1% of samples)."""

DEFF_VIOLATED = 2.0
"""Design effect from which it is violated; below 2 clustering is often judged
ignorable (Muthen & Satorra 1995, from memory)."""

FEW_CLUSTERS = 40
"""Cluster-robust SEs are unreliable with fewer clusters (Cameron & Miller 2015)."""

UNBALANCED_CV = 1.0
"""Coefficient of variation of cluster sizes above which clusters count as very
unbalanced (common practice in this tool; MacKinnon & Webb on unbalanced clusters)."""


def _column(ctx: CheckContext, key: str) -> pd.Series | None:
    name = getattr(ctx.spec, key)
    if name is None:
        return None
    if name not in ctx.frame.columns:
        raise DataError(
            f"The {key} column '{name}' is not among the analysed data's columns.",
            ctx.spec.locate(key),
            f"Name an existing column in '{key}:' (columns: {', '.join(map(str, ctx.frame.columns))}).",
        )
    values = ctx.frame[name]
    if values.isna().any():
        raise DataError(
            f"The {key} column '{name}' has {int(values.isna().sum())} missing values among the analysed rows.",
            ctx.spec.locate(key),
            f"Exclude those rows with a rule such as 'is_missing({name})', or fill the column.",
        )
    return values


def order_values(ctx: CheckContext) -> np.ndarray | None:
    """Sort keys of the declared ``order`` column (None when none is declared).

    Numbers and dates sort by value, ordered categories by their order, other
    text alphabetically. Raises :class:`DataError` when the column is missing.
    """
    values = _column(ctx, "order")
    if values is None:
        return None
    if pd.api.types.is_datetime64_any_dtype(values):
        return values.astype("int64").to_numpy(dtype=float)
    if pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values):
        return values.to_numpy(dtype=float)
    if isinstance(values.dtype, pd.CategoricalDtype) and values.cat.ordered:
        return values.cat.codes.to_numpy(dtype=float)
    codes, _ = pd.factorize(values.astype(str), sort=True)
    return codes.astype(float)


def group_values(ctx: CheckContext) -> np.ndarray | None:
    """Integer codes of the declared ``groups`` column (None when none is declared)."""
    values = _column(ctx, "groups")
    if values is None:
        return None
    codes, _ = pd.factorize(values, sort=True)
    return codes.astype(np.intp)


def breusch_godfrey(resid: np.ndarray, x: np.ndarray) -> tuple[float, float]:
    """Lag-1 LM test: n R^2 of e_t on X and e_{t-1} (e_0 = 0), chi^2(1) (Breusch 1978; Godfrey 1978)."""
    e = np.asarray(resid, dtype=float)
    lagged = np.concatenate([[0.0], e[:-1]])
    z = np.column_stack([x, lagged])
    coef, *_ = np.linalg.lstsq(z, e, rcond=None)
    fitted = z @ coef
    centred = e - e.mean()
    r2 = 1.0 - float(np.sum((e - fitted) ** 2)) / float(centred @ centred)
    lm = e.size * r2
    return float(lm), float(stats.chi2.sf(lm, 1))


def serial_summary(resid_in_order: np.ndarray) -> dict[str, float]:
    """Durbin-Watson d and the lag-1 autocorrelation (slope of e_t on e_{t-1}) with its t.

    The slope form is the AR(1) regression test of Wooldridge (2019, sect. 12.2).
    """
    e = np.asarray(resid_in_order, dtype=float)
    d = float(durbin_watson(e))
    lag, now = e[:-1], e[1:]
    lag_c = lag - lag.mean()
    sxx = float(lag_c @ lag_c)
    rho = float(lag_c @ (now - now.mean())) / sxx if sxx > 0 else float("nan")
    resid = now - now.mean() - rho * lag_c
    dof = now.size - 2
    se = float(np.sqrt((resid @ resid) / dof / sxx)) if dof > 0 and sxx > 0 else float("nan")
    return {"durbin_watson": d, "rho": rho, "rho_t": rho / se if se > 0 else float("nan")}


def cluster_summary(resid: np.ndarray, groups: np.ndarray) -> dict[str, float]:
    """ICC of the residuals by the one-way ANOVA estimator, design effect and effective n.

    ICC = (MSB - MSW) / (MSB + (n0 - 1) MSW), n0 = (N - sum n_g^2 / N) / (G - 1)
    (Fisher 1925; Donner 1986, from memory); DEFF = 1 + (m - 1) ICC with m the
    mean cluster size (Kish 1965).
    """
    e = np.asarray(resid, dtype=float)
    _, g = np.unique(np.asarray(groups), return_inverse=True)
    sizes = np.bincount(g).astype(float)
    n, k = float(e.size), float(sizes.size)
    means = np.bincount(g, weights=e) / sizes
    grand = e.mean()
    ssb = float(np.sum(sizes * (means - grand) ** 2))
    ssw = float(np.sum((e - means[g]) ** 2))
    msb = ssb / (k - 1) if k > 1 else float("nan")
    msw = ssw / (n - k) if n > k else float("nan")
    n0 = (n - float(np.sum(sizes**2)) / n) / (k - 1) if k > 1 else float("nan")
    icc = (
        (msb - msw) / (msb + (n0 - 1) * msw)
        if k > 1 and n > k and msb + (n0 - 1) * msw > 0
        else float("nan")
    )
    f = msb / msw if msw > 0 else float("nan")
    p = float(stats.f.sf(f, k - 1, n - k)) if np.isfinite(f) else float("nan")
    mean_size = n / k
    deff = 1.0 + (mean_size - 1.0) * max(icc, 0.0) if np.isfinite(icc) else float("nan")
    return {
        "icc": float(icc),
        "f": float(f),
        "p": p,
        "df1": k - 1,
        "df2": n - k,
        "clusters": k,
        "mean_size": mean_size,
        "design_effect": deff,
        "effective_n": n / deff if np.isfinite(deff) and deff > 0 else float("nan"),
        "size_cv": float(np.std(sizes) / np.mean(sizes)),
        "smallest": float(sizes.min()),
        "largest": float(sizes.max()),
    }


_RANK = {"holds": 0, "concern": 1, "violated": 2}


def _grade(value: float, evidence: bool, concern: float, violated: float) -> str:
    if not evidence or not np.isfinite(value) or value < concern:
        return "holds"
    return "violated" if value >= violated else "concern"


def _serial_part(ctx: CheckContext, e: np.ndarray, order: np.ndarray) -> dict[str, Any]:
    idx = np.argsort(order, kind="stable")
    summary = serial_summary(e[idx])
    x = ctx.fit.design.X
    if ctx.fit.weights is not None:
        x = x * np.sqrt(np.asarray(ctx.fit.weights, dtype=float))[:, None]
    lm, p = breusch_godfrey(e[idx], x[idx])
    verdict = _grade(
        abs(summary["rho"]),
        p < ctx.spec.thresholds.alpha,
        AUTOCORRELATION_CONCERN,
        AUTOCORRELATION_VIOLATED,
    )
    ties = int(order.size - np.unique(order).size)
    return {**summary, "bg_lm": lm, "bg_p": p, "verdict": verdict, "ties": ties}


def _cluster_part(ctx: CheckContext, e: np.ndarray, groups: np.ndarray) -> dict[str, Any]:
    summary = cluster_summary(e, groups)
    verdict = _grade(
        summary["design_effect"],
        summary["p"] < ctx.spec.thresholds.alpha,
        DEFF_CONCERN,
        DEFF_VIOLATED,
    )
    return {**summary, "verdict": verdict}


def check_independence(ctx: CheckContext) -> Finding:
    """Assess independence along the declared ``order`` and within the declared ``groups``.

    ``not-assessed`` when neither is declared. Verdicts: |lag-1 autocorrelation|
    from :data:`AUTOCORRELATION_CONCERN` / :data:`AUTOCORRELATION_VIOLATED`
    with a Breusch-Godfrey test below alpha; design effect from
    :data:`DEFF_CONCERN` / :data:`DEFF_VIOLATED` with the ANOVA F test below
    alpha. The worse of the two is the verdict. ``extra`` carries
    ``cluster_robust_advised``.
    """
    order = order_values(ctx)
    groups = group_values(ctx)
    name = f"fig-{ctx.spec.id}-independence"
    if order is None and groups is None:
        return Finding(
            assumption="independence",
            verdict="not-assessed",
            measure=None,
            reason="no order or groups declared",
            method="Independence was not assessed: the block declares neither an order nor groups.",
            notes=(
                "If observations share a site, class, household or person, declare 'groups:'; "
                "if they follow a time or sequence, declare 'order:' (Hurlbert 1984).",
            ),
            figure=name,
            extra=(("cluster_robust_advised", False),),
        )
    e = weighted_residuals(ctx.fit)
    statistics: list[Statistic] = []
    thresholds: list[ThresholdUse] = [
        ThresholdUse(
            "alpha", f"{ctx.spec.thresholds.alpha:g}", ctx.spec.thresholds.alpha, "declared"
        )
    ]
    notes: list[str] = []
    parts: list[tuple[str, Statistic, str, str, str]] = []
    extra: list[tuple[str, Any]] = []
    methods: list[str] = []
    cluster_advised = False
    if order is not None:
        s = _serial_part(ctx, e, order)
        statistics += [
            Statistic("Durbin-Watson d", s["durbin_watson"], source="Durbin & Watson 1950"),
            Statistic(
                "lag-1 autocorrelation",
                s["rho"],
                source="Wooldridge 2019, sect. 12.2",
                note=f"t = {s['rho_t']:.2f}",
            ),
            Statistic(
                "Breusch-Godfrey LM (lag 1)",
                s["bg_lm"],
                s["bg_p"],
                (1.0,),
                "Breusch 1978; Godfrey 1978",
            ),
        ]
        thresholds += [
            ThresholdUse(
                "|autocorrelation| (concern)",
                f">= {AUTOCORRELATION_CONCERN:g}",
                AUTOCORRELATION_CONCERN,
                "common practice in this tool",
            ),
            ThresholdUse(
                "|autocorrelation| (violated)",
                f">= {AUTOCORRELATION_VIOLATED:g}",
                AUTOCORRELATION_VIOLATED,
                "common practice in this tool",
            ),
        ]
        if s["ties"]:
            notes.append(
                f"{s['ties']} rows share an order value with another; ties were kept in file order, "
                "so the autocorrelation depends on that order."
            )
        inflation = (
            np.sqrt((1 + abs(s["rho"])) / (1 - abs(s["rho"])))
            if abs(s["rho"]) < 1
            else float("inf")
        )
        parts.append(
            (
                s["verdict"],
                Statistic("lag-1 autocorrelation", s["rho"], source="Wooldridge 2019, sect. 12.2"),
                f"residuals ordered by {ctx.spec.order} have lag-1 autocorrelation {s['rho']:.2f} "
                f"(Durbin-Watson d = {s['durbin_watson']:.2f}, Breusch-Godfrey p = {s['bg_p']:.3g})",
                f"classical standard errors can be up to about {inflation:.2f} times too small for predictors "
                "that change slowly along the order",
                "Use autocorrelation-robust (Newey-West) standard errors or model the dependence "
                "(lagged terms, autoregressive errors).",
            )
        )
        methods.append(
            f"the Durbin-Watson statistic and lag-1 autocorrelation of the residuals ordered by "
            f"{ctx.spec.order}, with a Breusch-Godfrey test"
        )
        extra += [
            ("durbin_watson", s["durbin_watson"]),
            ("autocorrelation", s["rho"]),
            ("order", ctx.spec.order),
        ]
    if groups is not None:
        c = _cluster_part(ctx, e, groups)
        if c["clusters"] < 2 or c["clusters"] >= e.size:
            notes.append(
                "The groups column puts every row in one group or each row in its own group; "
                "clustering could not be assessed."
            )
        else:
            statistics += [
                Statistic("ICC of residuals", c["icc"], source="one-way ANOVA estimator"),
                Statistic(
                    "F (between groups)", c["f"], c["p"], (c["df1"], c["df2"]), "Fisher 1925"
                ),
                Statistic("design effect", c["design_effect"], source="Kish 1965"),
                Statistic("effective n", c["effective_n"], source="Kish 1965"),
            ]
            thresholds += [
                ThresholdUse(
                    "design effect (concern)",
                    f">= {DEFF_CONCERN:g}",
                    DEFF_CONCERN,
                    "common practice in this tool",
                ),
                ThresholdUse(
                    "design effect (violated)",
                    f">= {DEFF_VIOLATED:g}",
                    DEFF_VIOLATED,
                    "Muthen & Satorra 1995 (from memory)",
                ),
                ThresholdUse(
                    "clusters", f"< {FEW_CLUSTERS}", float(FEW_CLUSTERS), "Cameron & Miller 2015"
                ),
            ]
            few = c["clusters"] < FEW_CLUSTERS
            unbalanced = c["size_cv"] > UNBALANCED_CV
            if few:
                notes.append(
                    f"Only {c['clusters']:.0f} groups: cluster-robust standard errors are unreliable "
                    f"with fewer than about {FEW_CLUSTERS} (Cameron & Miller 2015); a multilevel "
                    "model or a wild cluster bootstrap is safer."
                )
            if unbalanced:
                notes.append(
                    f"Group sizes are very unbalanced ({c['smallest']:.0f} to {c['largest']:.0f} rows); "
                    "the rule of about 40 clusters does not hold then (MacKinnon & Webb)."
                )
            notes.append(
                "The design effect is the SE inflation for a predictor that is constant within groups; "
                "for predictors that vary within groups it is smaller."
            )
            cluster_advised = c["verdict"] != "holds"
            parts.append(
                (
                    c["verdict"],
                    Statistic("design effect", c["design_effect"], source="Kish 1965"),
                    f"residuals within groups of {ctx.spec.groups} have an intraclass correlation of {c['icc']:.2f} (design effect "
                    f"{c['design_effect']:.2f} with {c['clusters']:.0f} groups of {c['mean_size']:.1f} rows on "
                    f"average, effective n about {c['effective_n']:.0f}; F test p = {c['p']:.3g})",
                    f"classical standard errors can be up to about {np.sqrt(c['design_effect']):.2f} times too small",
                    "Consider a multilevel (mixed) model with a random intercept for "
                    f"{ctx.spec.groups}, or cluster-robust standard errors"
                    + (" (with caution: few groups)." if few else "."),
                )
            )
            methods.append(
                f"the intraclass correlation of the residuals within {ctx.spec.groups} and the "
                "design effect"
            )
            extra += [
                ("icc", c["icc"]),
                ("design_effect", c["design_effect"]),
                ("effective_n", c["effective_n"]),
                ("clusters", c["clusters"]),
                ("mean_cluster_size", c["mean_size"]),
                ("few_clusters", few),
                ("unbalanced_clusters", unbalanced),
                ("groups", ctx.spec.groups),
            ]
    extra.append(("cluster_robust_advised", cluster_advised))
    method = "Independence was assessed from " + " and from ".join(methods) + "." if methods else ""
    if not parts:
        return Finding(
            assumption="independence",
            verdict="not-assessed",
            measure=None,
            statistics=tuple(statistics),
            reason="the groups column does not form usable groups",
            method=method,
            notes=tuple(notes),
            figure=name,
            extra=tuple(extra),
        )
    worst = max(parts, key=lambda part: _RANK[part[0]])
    verdict = worst[0]
    if verdict == "holds":
        summary = "No dependence detected: " + "; ".join(part[2] for part in parts) + "."
        consequence = "Treating the observations as independent is reasonable."
        remedy = "None needed."
        if e.size < 50:
            notes.append(
                "With fewer than 50 observations these tests have little power (Ruxton et al. 2015)."
            )
    else:
        summary = "The observations are not independent: " + worst[2] + "."
        consequence = worst[3][0].upper() + worst[3][1:] + "."
        remedy = worst[4]
    return Finding(
        assumption="independence",
        verdict=verdict,
        measure=worst[1],  # type: ignore[arg-type]
        statistics=tuple(statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=tuple(thresholds),
        method=method,
        notes=tuple(notes),
        figure=name,
        extra=tuple(extra),
    )
