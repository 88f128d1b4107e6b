"""Independence: serial correlation along a declared order, clustering within declared groups.

Without an order or groups the check says so and does nothing: the
Durbin-Watson statistic of rows in file order is "not even uniquely defined"
for cross-sectional data. With an order the measure is
the lag-1 autocorrelation of the residuals; with groups it is the design
effect 1 + (m - 1) ICC (Kish 1965).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats
from statsmodels.stats.stattools import durbin_watson

from premises.checks.base import CheckContext
from premises.checks.variance import weighted_residuals
from premises.errors import DataError
from premises.results import Finding, Statistic, ThresholdUse, Verdict

__all__ = [
    "AUTOCORRELATION_CONCERN",
    "AUTOCORRELATION_VIOLATED",
    "DEFF_CONCERN",
    "DEFF_VIOLATED",
    "FEW_CLUSTERS",
    "breusch_godfrey",
    "assess_independence",
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
            f"Exclude those rows with a rule such as '{name} is missing', or fill the column.",
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
        return np.asarray(values.astype("int64").to_numpy(dtype=float))
    if pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values):
        return np.asarray(values.to_numpy(dtype=float))
    if isinstance(values.dtype, pd.CategoricalDtype) and values.cat.ordered:
        return np.asarray(values.cat.codes.to_numpy(dtype=float))
    codes, _ = pd.factorize(values.astype(str), sort=True)
    return np.asarray(codes, dtype=float)


def group_values(ctx: CheckContext) -> np.ndarray | None:
    """Integer codes of the declared ``groups`` column (None when none is declared)."""
    values = _column(ctx, "groups")
    if values is None:
        return None
    codes, _ = pd.factorize(values, sort=True)
    return np.asarray(codes, dtype=np.intp)


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
        "singletons": float(np.sum(sizes == 1)),
    }


_RANK = {"holds": 0, "concern": 1, "violated": 2}


def _grade(value: float, evidence: bool, concern: float, violated: float) -> Verdict:
    if not evidence or not np.isfinite(value) or value < concern:
        return "holds"
    return "violated" if value >= violated else "concern"


@dataclass
class _Part:
    """What one source of dependence (order or groups) contributes to the finding."""

    verdict: Verdict
    measure: Statistic
    description: str
    consequence: str
    remedy: str
    method: str
    statistics: list[Statistic] = field(default_factory=list)
    thresholds: list[ThresholdUse] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    extra: list[tuple[str, Any]] = field(default_factory=list)


def _serial_part(ctx: CheckContext, e: np.ndarray, order: np.ndarray) -> _Part:
    idx = np.argsort(order, kind="stable")
    s = serial_summary(e[idx])
    x = ctx.fit.design.X
    if ctx.fit.weights is not None:
        x = x * np.sqrt(np.asarray(ctx.fit.weights, dtype=float))[:, None]
    lm, p = breusch_godfrey(e[idx], x[idx])
    rho = s["rho"]
    verdict = _grade(
        abs(rho), p < ctx.spec.thresholds.alpha, AUTOCORRELATION_CONCERN, AUTOCORRELATION_VIOLATED
    )
    # SE understatement for a predictor that is itself strongly autocorrelated (common practice)
    inflation = float(np.sqrt((1 + abs(rho)) / (1 - abs(rho)))) if abs(rho) < 1 else float("inf")
    part = _Part(
        verdict=verdict,
        measure=Statistic("lag-1 autocorrelation", rho, source="Wooldridge 2019, sect. 12.2"),
        description=(
            f"residuals ordered by {ctx.spec.order} have lag-1 autocorrelation {rho:.2f} "
            f"(Durbin-Watson d = {s['durbin_watson']:.2f}, Breusch-Godfrey p = {p:.3g})"
        ),
        consequence=(
            f"classical standard errors can be up to about {inflation:.2f} times too small for "
            "predictors that change slowly along the order"
        ),
        remedy=(
            "Use autocorrelation-robust (Newey-West) standard errors or model the dependence "
            "(lagged terms, autoregressive errors)."
        ),
        method=(
            "the Durbin-Watson statistic and lag-1 autocorrelation of the residuals ordered by "
            f"{ctx.spec.order}, with a Breusch-Godfrey test"
        ),
        statistics=[
            Statistic("Durbin-Watson d", s["durbin_watson"], source="Durbin & Watson 1950"),
            Statistic(
                "lag-1 autocorrelation",
                rho,
                source="Wooldridge 2019, sect. 12.2",
                note=f"t = {s['rho_t']:.2f}",
            ),
            Statistic("Breusch-Godfrey LM (lag 1)", lm, p, (1.0,), "Breusch 1978; Godfrey 1978"),
        ],
        thresholds=[
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
        ],
        extra=[
            ("durbin_watson", s["durbin_watson"]),
            ("autocorrelation", rho),
            ("order", ctx.spec.order),
        ],
    )
    ties = int(order.size - np.unique(order).size)
    if ties:
        part.notes.append(
            f"{ties} rows share an order value with another; ties were kept in file order, "
            "so the autocorrelation depends on that order."
        )
    return part


def _cluster_part(ctx: CheckContext, e: np.ndarray, groups: np.ndarray) -> _Part | None:
    c = cluster_summary(e, groups)
    if c["clusters"] < 2 or c["clusters"] >= e.size:
        return None
    verdict = _grade(
        c["design_effect"], c["p"] < ctx.spec.thresholds.alpha, DEFF_CONCERN, DEFF_VIOLATED
    )
    few = c["clusters"] < FEW_CLUSTERS
    unbalanced = c["size_cv"] > UNBALANCED_CV
    name = ctx.spec.groups
    part = _Part(
        verdict=verdict,
        measure=Statistic("design effect", c["design_effect"], source="Kish 1965"),
        description=(
            f"residuals within groups of {name} have an intraclass correlation of {c['icc']:.2f} "
            f"(design effect {c['design_effect']:.2f} with {c['clusters']:.0f} groups of "
            f"{c['mean_size']:.1f} rows on average, effective n about {c['effective_n']:.0f}; "
            f"F test p = {c['p']:.3g})"
        ),
        consequence=(
            f"classical standard errors can be up to about {np.sqrt(c['design_effect']):.2f} times too small"
        ),
        remedy=(
            f"Consider a multilevel (mixed) model with a random intercept for {name}, or "
            f"cluster-robust standard errors{' (with caution: few groups)' if few else ''}."
        ),
        method=f"the intraclass correlation of the residuals within {name} and the design effect",
        statistics=[
            Statistic("ICC of residuals", c["icc"], source="one-way ANOVA estimator"),
            Statistic("F (between groups)", c["f"], c["p"], (c["df1"], c["df2"]), "Fisher 1925"),
            Statistic("design effect", c["design_effect"], source="Kish 1965"),
            Statistic("effective n", c["effective_n"], source="Kish 1965"),
        ],
        thresholds=[
            ThresholdUse(
                "design effect (concern)",
                f">= {DEFF_CONCERN:g}",
                DEFF_CONCERN,
                "common practice in this tool, calibrated by simulation",
            ),
            ThresholdUse(
                "design effect (violated)",
                f">= {DEFF_VIOLATED:g}",
                DEFF_VIOLATED,
                "common practice; usually credited to Muthén & Satorra 1995",
            ),
            ThresholdUse(
                "clusters", f"< {FEW_CLUSTERS}", float(FEW_CLUSTERS), "Cameron & Miller 2015"
            ),
        ],
        extra=[
            ("icc", c["icc"]),
            ("design_effect", c["design_effect"]),
            ("effective_n", c["effective_n"]),
            ("clusters", c["clusters"]),
            ("mean_cluster_size", c["mean_size"]),
            ("few_clusters", few),
            ("unbalanced_clusters", unbalanced),
            ("groups", name),
        ],
    )
    if few:
        part.notes.append(
            f"Only {c['clusters']:.0f} groups: cluster-robust standard errors are unreliable with fewer "
            f"than about {FEW_CLUSTERS} (Cameron & Miller 2015); a multilevel model or a wild cluster "
            "bootstrap is safer."
        )
    if c["singletons"]:
        lone = int(c["singletons"])
        part.notes.append(
            f"{lone} group{' has' if lone == 1 else 's have'} a single row; such a group says nothing "
            "about correlation within groups and enters the cluster-robust standard errors as a "
            "cluster of its own (allowed, but check the groups column)."
        )
    if unbalanced:
        part.notes.append(
            f"Group sizes are very unbalanced ({c['smallest']:.0f} to {c['largest']:.0f} rows); the rule "
            "of about 40 clusters does not hold then (MacKinnon & Webb)."
        )
    part.notes.append(
        "The design effect is the SE inflation for a predictor that is constant within groups; for "
        "predictors that vary within groups it is smaller."
    )
    return part


def assess_independence(ctx: CheckContext) -> Finding:
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
                (
                    "If observations share a site, class, household or person, declare 'groups:'; "
                    "if they follow a time or sequence, declare 'order:' (Hurlbert 1984)."
                ),
            ),
            figure=name,
            extra=(("cluster_robust_advised", False),),
        )
    e = weighted_residuals(ctx.fit)
    alpha = ctx.spec.thresholds.alpha
    serial = _serial_part(ctx, e, order) if order is not None else None
    cluster = _cluster_part(ctx, e, groups) if groups is not None else None
    parts = [part for part in (serial, cluster) if part is not None]
    notes = [note for part in parts for note in part.notes]
    advised = cluster is not None and cluster.verdict != "holds"
    extra = [item for part in parts for item in part.extra] + [("cluster_robust_advised", advised)]
    if groups is not None and cluster is None:
        notes.append(
            "The groups column puts every row in one group or each row in its own group; clustering "
            "could not be assessed."
        )
    if not parts:
        return Finding(
            assumption="independence",
            verdict="not-assessed",
            measure=None,
            reason="the groups column does not form usable groups",
            method="Independence was not assessed: the declared groups do not form usable groups.",
            notes=tuple(notes),
            figure=name,
            extra=tuple(extra),
        )
    worst = max(reversed(parts), key=lambda part: _RANK[part.verdict])
    if worst.verdict == "holds":
        summary = "No dependence detected: " + "; ".join(part.description for part in parts) + "."
        consequence = "Treating the observations as independent is reasonable."
        remedy = "None needed."
        if e.size < 50:
            notes.append(
                "With fewer than 50 observations these tests have little power (Ruxton et al. 2015)."
            )
    else:
        summary = "The observations are not independent: " + worst.description + "."
        consequence = worst.consequence[0].upper() + worst.consequence[1:] + "."
        remedy = worst.remedy
    return Finding(
        assumption="independence",
        verdict=worst.verdict,
        measure=worst.measure,
        statistics=tuple(s for part in parts for s in part.statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=(ThresholdUse("alpha", f"{alpha:g}", alpha, "declared"),)
        + tuple(t for part in parts for t in part.thresholds),
        method="Independence was assessed from "
        + " and from ".join(part.method for part in parts)
        + ".",
        notes=tuple(notes),
        figure=name,
        extra=tuple(extra),
    )
