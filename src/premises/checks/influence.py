"""Influence: does any single observation steer the fit?

The measures come from :mod:`premises.influence` (closed forms, no refits).
The verdict rests on the largest |DFBETAS|: how far, in standard errors, one
observation moves any coefficient when it is left out. Conventional
per-observation cut-offs (leverage, Cook's distance, DFFITS, DFBETAS) only
label the points in the flagged list; they are screening heuristics, never
exclusion rules.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from premises.checks.base import CheckContext
from premises.results import Finding, FlaggedPoint, Statistic, ThresholdUse, Verdict
from premises.spec import evaluate_threshold

__all__ = [
    "LARGE_T",
    "SHIFT_CONCERN",
    "SHIFT_VIOLATED",
    "Cutoffs",
    "bonferroni_p",
    "assess_influence",
    "evaluate_cutoffs",
    "flag_points",
    "isolated_leverage",
    "shift_p",
]

SHIFT_CONCERN = 0.7
"""Largest |DFBETAS| from which influence is a concern: one observation moves a
coefficient by 0.7 standard errors. It counts only when the shift is larger than
a correct model with this design gives (:func:`shift_p` below alpha): at n = 50
a correct model moves some coefficient this far in about a third of samples
(common practice in this tool, calibrated by simulation)."""

SHIFT_VIOLATED = 1.0
"""... and violated: one observation moves a coefficient by a full standard
error, enough to change a conclusion (common practice in this tool)."""

LARGE_T = 3.0
"""|externally studentized residual| counted as large beside Cook's distance;
about 0.3% of points cross it under a correct model (common practice)."""

MODERATE_T = 2.0
"""|t| counted as large beside high leverage (common practice)."""

_ORIGINS = {
    ("cooks", "4/n"): "common practice; usually credited to Bollen & Jackman 1990",
    ("cooks", "1"): "common practice; usually credited to Cook & Weisberg 1982",
    ("cooks", "F-median"): "Cook 1977",
    ("leverage", "2p/n"): "Hoaglin & Welsch 1978",
    ("leverage", "3p/n"): "usually credited to Velleman & Welsch 1981",
    ("dffits", "2*sqrt(p/n)"): "Belsley, Kuh & Welsch 1980",
    ("dfbetas", "2/sqrt(n)"): "Belsley, Kuh & Welsch 1980",
}


@dataclass(frozen=True)
class Cutoffs:
    """Every cut-off applied, evaluated for this n and p."""

    cooks: float
    cooks_expr: str
    cooks_f_median: float
    leverage: float
    leverage_expr: str
    leverage_strict: float
    dffits: float
    dffits_expr: str
    dfbetas: float
    dfbetas_expr: str
    alpha: float

    def uses(self) -> tuple[ThresholdUse, ...]:
        """The cut-offs as :class:`ThresholdUse` records, each with its origin."""

        def origin(kind: str, expr: str) -> str:
            return _ORIGINS.get((kind, expr.replace(" ", "")), "declared in the block")

        return (
            ThresholdUse(
                "Cook's distance", self.cooks_expr, self.cooks, origin("cooks", self.cooks_expr)
            ),
            ThresholdUse("Cook's distance", "F-median", self.cooks_f_median, "Cook 1977"),
            ThresholdUse("Cook's distance", "1", 1.0, "common practice; usually credited to Cook & Weisberg 1982"),
            ThresholdUse(
                "leverage",
                self.leverage_expr,
                self.leverage,
                origin("leverage", self.leverage_expr),
            ),
            ThresholdUse(
                "leverage", "3p/n", self.leverage_strict, "usually credited to Velleman & Welsch 1981"
            ),
            ThresholdUse(
                "|DFFITS|", self.dffits_expr, self.dffits, origin("dffits", self.dffits_expr)
            ),
            ThresholdUse(
                "|DFBETAS|", self.dfbetas_expr, self.dfbetas, origin("dfbetas", self.dfbetas_expr)
            ),
            ThresholdUse(
                "Bonferroni outlier test",
                f"n * p < {self.alpha:g}",
                self.alpha,
                "Cook & Weisberg 1982",
            ),
            ThresholdUse(
                "largest |DFBETAS| (concern)",
                f">= {SHIFT_CONCERN:g}",
                SHIFT_CONCERN,
                "common practice in this tool, calibrated by simulation",
            ),
            ThresholdUse(
                "largest |DFBETAS| (violated)",
                f">= {SHIFT_VIOLATED:g}",
                SHIFT_VIOLATED,
                "common practice in this tool",
            ),
        )


def evaluate_cutoffs(ctx: CheckContext) -> Cutoffs:
    """Evaluate the block's declared thresholds (and the fixed companions) for this fit."""
    n, p = ctx.fit.n, ctx.fit.p
    t = ctx.spec.thresholds

    def value(expr: str, key: str) -> float:
        return evaluate_threshold(expr, n, p, location=ctx.spec.locate(f"thresholds.{key}"))

    f_median = float(stats.f.ppf(0.5, p, n - p)) if n > p else float("nan")  # Cook (1977)
    return Cutoffs(
        cooks=value(t.cooks, "cooks"),
        cooks_expr=t.cooks,
        cooks_f_median=f_median,
        leverage=value(t.leverage, "leverage"),
        leverage_expr=t.leverage,
        leverage_strict=3.0 * p / n,  # Velleman & Welsch (1981, from memory)
        dffits=value(t.dffits, "dffits"),
        dffits_expr=t.dffits,
        dfbetas=value(t.dfbetas, "dfbetas"),
        dfbetas_expr=t.dfbetas,
        alpha=t.alpha,
    )


def bonferroni_p(t: np.ndarray, n: int, p: int) -> np.ndarray:
    """Bonferroni-adjusted outlier p: n x two-sided p of t on n - p - 1 df, capped at 1.

    The mean-shift outlier test (Cook & Weisberg 1982; Weisberg 2005). NaN where t is undefined.
    """
    dof = n - p - 1
    t = np.asarray(t, dtype=float)
    if dof < 1:
        return np.full(t.shape, np.nan)
    # n x p is below 1 only beyond |t| = t_isf(1 / 2n): the tail is evaluated there alone
    # (a handful of points instead of 10^6); inside it the capped value is exactly 1. The
    # margin keeps rounding near the cut from changing a value.
    adjusted = np.ones(t.shape)
    with np.errstate(invalid="ignore"):
        tail = np.abs(t) > float(stats.t.isf(0.5 / n, dof)) * (1.0 - 1e-6)
        adjusted[tail] = np.minimum(2.0 * stats.t.sf(np.abs(t[tail]), dof) * n, 1.0)
    adjusted[np.isnan(t)] = np.nan
    return adjusted


def shift_p(dfbetas: np.ndarray, t: np.ndarray, n: int, p: int) -> float:
    """Chance that a correct model with this design moves some coefficient as far as the largest |DFBETAS|.

    DFBETAS_ij = t_i a_ij, where a_ij depends on the design only and t_i, the
    externally studentized residual, follows t(n - p - 1) under normal errors
    (Belsley, Kuh & Welsch 1980, eq. 2.11; Cook & Weisberg 1982). So
    P(max |DFBETAS| >= s) <= sum_i P(|t| >= s / max_j |a_ij|), a union bound
    (common practice in this tool). NaN when it cannot be computed.
    """
    dfb = np.abs(np.asarray(dfbetas, dtype=float))
    t = np.abs(np.asarray(t, dtype=float))
    dof = n - p - 1
    usable = np.isfinite(t) & (t > 0) & np.all(np.isfinite(dfb), axis=1)
    if dof < 1 or not usable.any():
        return float("nan")
    largest = float(np.max(dfb[usable]))
    weight = np.max(dfb[usable], axis=1) / t[usable]
    with np.errstate(divide="ignore"):
        tail = 2.0 * stats.t.sf(largest / weight, dof)
    return float(min(1.0, np.sum(tail)))


def isolated_leverage(hat: np.ndarray) -> np.ndarray:
    """True for the point whose leverage is at least twice the next largest (common practice)."""
    out = np.zeros(hat.shape, dtype=bool)
    if hat.size >= 2:
        # The two largest by a partial sort: O(n), where a full argsort costs 0.1 s at 10^6 rows.
        order = np.argpartition(hat, hat.size - 2)[-2:]
        top, second = hat[order[-1]], hat[order[-2]]
        if second > 0 and top >= 2.0 * second:
            out[order[-1]] = True
    return out


@dataclass(frozen=True)
class _Masks:
    """Which cut-offs each point crosses (vectorised; strings are built only for flagged points)."""

    undefined: np.ndarray
    outlier: np.ndarray
    over_one: np.ndarray
    over_median: np.ndarray
    over_cooks: np.ndarray
    strict_leverage: np.ndarray
    high_leverage: np.ndarray
    isolated: np.ndarray
    big_t: np.ndarray
    moderate_t: np.ndarray
    dffits: np.ndarray
    dfbetas: np.ndarray
    """(n, p) bool."""
    flagged: np.ndarray
    bonferroni: np.ndarray
    """(n,) Bonferroni-adjusted outlier p."""


def _masks(ctx: CheckContext, cut: Cutoffs) -> _Masks:
    inf = ctx.influence
    h, t, d = inf.hat, inf.studentized_external, inf.cooks
    bonf = bonferroni_p(t, ctx.fit.n, ctx.fit.p)
    with np.errstate(invalid="ignore"):
        outlier = bonf < cut.alpha
        high = h > cut.leverage
        big_t = np.abs(t) > LARGE_T
        moderate_t = np.abs(t) > MODERATE_T
        over_cooks = d > cut.cooks
        over_median = d > cut.cooks_f_median
        over_one = d > 1.0
        # The flag rule (common practice in this tool): points a reader should look at, without
        # listing the ~5% of clean data that |t| > 2 or Cook's 4/n cross by construction.
        flagged = (
            inf.undefined
            | outlier
            | over_median
            | over_one
            | (high & moderate_t)
            | (over_cooks & big_t)
        )
        return _Masks(
            undefined=np.asarray(inf.undefined, dtype=bool),
            outlier=outlier,
            over_one=over_one,
            over_median=over_median,
            over_cooks=over_cooks,
            strict_leverage=h > cut.leverage_strict,
            high_leverage=high,
            isolated=isolated_leverage(h),
            big_t=big_t,
            moderate_t=moderate_t,
            dffits=np.abs(inf.dffits) > cut.dffits,
            dfbetas=np.abs(inf.dfbetas) > cut.dfbetas,
            flagged=flagged,
            bonferroni=bonf,
        )


def _rules_for(i: int, m: _Masks, cut: Cutoffs, names: tuple[str, ...]) -> tuple[str, ...]:
    """The rules point ``i`` fired, most serious first."""
    if m.undefined[i]:
        return ("leverage 1 (undefined: this observation alone determines a coefficient)",)
    checks = (
        (m.outlier, f"Bonferroni outlier test p < {cut.alpha:g}"),
        (m.over_one, "Cook's distance > 1"),
        (m.over_median, "Cook's distance > F-median"),
        (m.over_cooks, f"Cook's distance > {cut.cooks_expr}"),
        (m.strict_leverage, "leverage > 3p/n"),
        (m.high_leverage, f"leverage > {cut.leverage_expr}"),
        (m.isolated, "leverage at least twice the next largest"),
        (m.big_t, f"|studentized residual| > {LARGE_T:g}"),
        (m.moderate_t, f"|studentized residual| > {MODERATE_T:g}"),
        (m.dffits, f"|DFFITS| > {cut.dffits_expr}"),
    )
    # Indexed per point: an expression on whole masks here would cost O(n) per flagged point.
    fired = [text for mask, text in checks if mask[i] and not (mask is m.moderate_t and m.big_t[i])]
    over = [names[j] for j in np.flatnonzero(m.dfbetas[i])]
    if over:
        fired.append(f"|DFBETAS| > {cut.dfbetas_expr} ({', '.join(over)})")
    return tuple(fired)


def _finite(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def flag_points(ctx: CheckContext) -> tuple[FlaggedPoint, ...]:
    """Observations worth a reader's look, ranked (undefined first, then by Cook's distance).

    A point is flagged when its leverage is 1 (undefined measures), it is an
    outlier by the Bonferroni test at ``thresholds.alpha``, its Cook's distance
    exceeds the F-median or 1, it has high leverage (declared cut-off) with
    |t| > 2, or its Cook's distance exceeds the declared cut-off with |t| > 3.
    Every cut-off it crosses, including DFFITS and DFBETAS, is listed in
    ``rules``. Under a correct model this flags well under 1% of points,
    where |t| > 2 or Cook's 4/n alone would flag about 5%.
    """
    cut = evaluate_cutoffs(ctx)
    masks = _masks(ctx, cut)
    bonf = masks.bonferroni
    inf = ctx.influence
    names = ctx.fit.design.column_names
    points = []
    for i in np.flatnonzero(masks.flagged):
        undefined = bool(inf.undefined[i])
        row = inf.dfbetas[i]
        dfbetas = tuple(
            (names[j], None if undefined else _finite(row[j])) for j in range(len(names))
        )
        largest = (
            None
            if undefined or not np.any(np.isfinite(row))
            else names[int(np.nanargmax(np.abs(row)))]
        )
        points.append(
            FlaggedPoint(
                id=str(ctx.ids[i]),
                row=int(ctx.rows[i]),
                leverage=float(inf.hat[i]),
                studentized=None if undefined else _finite(inf.studentized_external[i]),
                cooks=None if undefined else _finite(inf.cooks[i]),
                dffits=None if undefined else _finite(inf.dffits[i]),
                dfbetas=dfbetas,
                rules=_rules_for(int(i), masks, cut, names),
                largest_term=largest,
                undefined=undefined,
                bonferroni_p=None if undefined else _finite(bonf[i]),
            )
        )
    points.sort(key=lambda fp: (not fp.undefined, -(fp.cooks if fp.cooks is not None else np.inf)))
    return tuple(points)


def _grade(shift: float, undefined: bool, unusual: bool) -> Verdict:
    if undefined or shift >= SHIFT_VIOLATED:
        return "violated"
    return "concern" if shift >= SHIFT_CONCERN and unusual else "holds"


def assess_influence(ctx: CheckContext) -> Finding:
    """Assess whether single observations steer the coefficients.

    Verdict: ``violated`` when a point has leverage 1 or moves a coefficient by
    at least :data:`SHIFT_VIOLATED` standard errors; ``concern`` from
    :data:`SHIFT_CONCERN` when :func:`shift_p` is below ``thresholds.alpha``
    (the shift exceeds what a correct model with this design gives). Bonferroni
    outliers are reported and flagged; on their own (without that much
    influence) they do not change the verdict.
    """
    inf = ctx.influence
    n, p = ctx.fit.n, ctx.fit.p
    names = ctx.fit.design.column_names
    name = f"fig-{ctx.spec.id}-influence"
    cut = evaluate_cutoffs(ctx)
    masks = _masks(ctx, cut)
    flagged, bonf = masks.flagged, masks.bonferroni
    method = (
        "Influence was assessed from leverage, externally studentized residuals with a Bonferroni "
        "outlier test, Cook's distance, DFFITS and DFBETAS (closed forms, Belsley, Kuh & Welsch 1980); "
        "the verdict rests on the largest shift of any coefficient other than the intercept, in "
        "standard errors, when one observation is left out"
    )
    undefined_ids = [str(ctx.ids[i]) for i in np.flatnonzero(inf.undefined)]
    dfb = np.abs(np.asarray(inf.dfbetas, dtype=float))
    if p > 1 and "Intercept" in names:
        # The verdict rests on the model's terms: the intercept's shift depends on where the
        # predictors' zero lies and is rarely the question (the DFBETAS figure leaves it out too).
        dfb[:, names.index("Intercept")] = np.nan
    finite = np.isfinite(dfb)
    if finite.any():
        flat = int(np.argmax(np.where(finite, dfb, -np.inf)))
        at_row, at_term = divmod(flat, p)
        shift = float(dfb[at_row, at_term])
    else:
        at_row, at_term, shift = 0, 0, float("nan")
    outliers = [i for i in np.flatnonzero(np.nan_to_num(bonf, nan=1.0) < cut.alpha)]
    chance = shift_p(inf.dfbetas, inf.studentized_external, n, p)
    unusual = bool(np.isfinite(chance) and chance < cut.alpha)
    verdict = _grade(shift if np.isfinite(shift) else 0.0, bool(undefined_ids), unusual)
    who = str(ctx.ids[at_row]) if np.isfinite(shift) else "none"
    term = names[at_term]

    def count(mask: np.ndarray) -> int:
        return int(np.sum(np.nan_to_num(mask.astype(float), nan=0.0)))

    with np.errstate(invalid="ignore"):
        crossings = {
            f"cooks > {cut.cooks_expr}": count(inf.cooks > cut.cooks),
            "cooks > F-median": count(inf.cooks > cut.cooks_f_median),
            f"leverage > {cut.leverage_expr}": count(inf.hat > cut.leverage),
            "leverage > 3p/n": count(inf.hat > cut.leverage_strict),
            f"|dffits| > {cut.dffits_expr}": count(np.abs(inf.dffits) > cut.dffits),
            f"|dfbetas| > {cut.dfbetas_expr}": count(np.any(dfb > cut.dfbetas, axis=1)),
            "bonferroni outliers": len(outliers),
        }
    statistics = [
        Statistic("largest leverage", float(np.max(inf.hat)), source="Hoaglin & Welsch 1978"),
        Statistic(
            "largest Cook's distance",
            _finite(np.nanmax(inf.cooks)) if np.any(np.isfinite(inf.cooks)) else None,
            source="Cook 1977",
        ),
    ]
    if np.isfinite(chance):
        statistics.append(
            Statistic(
                "chance of so large a shift under the model",
                chance,
                source="Belsley, Kuh & Welsch 1980",
                note="probability that a correct model with this design moves a coefficient this far "
                "(union bound over observations)",
            )
        )
    if np.any(np.isfinite(bonf)):
        i_min = int(np.nanargmin(bonf))
        statistics.append(
            Statistic(
                "largest |studentized residual|",
                _finite(abs(inf.studentized_external[i_min])),
                float(bonf[i_min]),
                (float(n - p - 1),),
                "Cook & Weisberg 1982",
                note=f"Bonferroni-adjusted p, observation {ctx.ids[i_min]}",
            )
        )
    notes = [
        (
            "These cut-offs are screening heuristics, not exclusion rules: a flagged point calls for "
            "a look at the data, and removing it needs a reason other than its fit (Simmons et al. 2011)."
        )
    ]
    if int(np.sum(flagged)) > 1:
        notes.append(
            "Several points are flagged: single-case measures can mask each other when outliers "
            "come in groups."
        )
    if 2.0 * p / n >= 1.0:
        notes.append(
            "2p/n is at least 1 here, so the leverage cut-off does not apply (Montgomery, Peck & Vining)."
        )
    if undefined_ids:
        measure = Statistic(
            "largest |DFBETAS|",
            None,
            source="Belsley, Kuh & Welsch 1980",
            note="undefined: an observation alone determines a coefficient",
        )
        summary = (
            f"Observation{'s' if len(undefined_ids) > 1 else ''} {', '.join(undefined_ids)} "
            f"{'have' if len(undefined_ids) > 1 else 'has'} leverage 1, so {'their' if len(undefined_ids) > 1 else 'its'} "
            "influence is undefined: this observation alone determines a coefficient."
        )
        consequence = (
            "A coefficient rests on one observation; its estimate and standard error say nothing "
            "about the other rows."
        )
        remedy = (
            "Collect data that vary where this point does, or report the coefficient as resting on "
            "one observation; do not read its p-value as evidence."
        )
    elif verdict == "holds":
        measure = Statistic(
            "largest |DFBETAS|",
            shift,
            source="Belsley, Kuh & Welsch 1980",
            note=f"observation {who}, coefficient {term}",
        )
        summary = (
            f"No single observation moves any coefficient by more than {shift:.2f} standard errors "
            f"(largest: observation {who} on {term})."
        )
        consequence = "The conclusions do not hinge on any one observation."
        remedy = "None needed."
        if shift >= SHIFT_CONCERN:
            notes.append(
                f"Observation {who} moves {term} by {shift:.2f} standard errors, no more than a "
                f"correct model with this design often gives at n = {n} (chance {chance:.2f}); with "
                "few observations every point carries weight, so read the sensitivity table."
            )
        if outliers:
            notes.append(
                f"{len(outliers)} observation(s) are outliers by the Bonferroni test but move no "
                "coefficient much; check them for data errors."
            )
    else:
        measure = Statistic(
            "largest |DFBETAS|",
            shift,
            source="Belsley, Kuh & Welsch 1980",
            note=f"observation {who}, coefficient {term}",
        )
        summary = (
            f"Observation {who} moves the coefficient of {term} by {shift:.2f} standard errors when "
            f"left out ({int(np.sum(flagged))} observation(s) flagged)."
        )
        consequence = (
            "A conclusion about this coefficient may depend on one observation; the sensitivity "
            "table shows the fit with the flagged points left out."
        )
        remedy = (
            "Check the flagged observations for data errors and report the fit with and without them; "
            "exclude only with a reason other than their influence."
        )
    extra: tuple[tuple[str, Any], ...] = (
        (
            "flagged",
            [{"id": str(ctx.ids[i]), "row": int(ctx.rows[i])} for i in np.flatnonzero(flagged)],
        ),
        ("flagged_count", int(np.sum(flagged))),
        ("crossings", crossings),
        ("largest_dfbetas_observation", who),
        ("largest_dfbetas_term", term),
        ("undefined", undefined_ids),
        ("shift_chance", chance),
        ("bonferroni_outliers", [str(ctx.ids[i]) for i in outliers]),
    )
    return Finding(
        assumption="influence",
        verdict=verdict,
        measure=measure,
        statistics=tuple(statistics),
        summary=summary,
        consequence=consequence,
        remedy=remedy,
        thresholds=cut.uses(),
        method=method + ".",
        notes=tuple(notes),
        figure=name,
        extra=extra,
    )
