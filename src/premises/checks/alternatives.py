"""Declared alternative analyses: the same model on ranks, on log(outcome), on a Box-Cox outcome.

Each alternative refits the model with :func:`premises.fit.fit_model` and
returns a :class:`SensitivityRow` beside the reported fit. The Box-Cox row is
labelled data-driven: its lambda is estimated from these data, and inference
after choosing it ignores that choice (NEEDS hazard 12).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize, special, stats

from premises.checks.base import CheckContext
from premises.errors import PremisesError, SpecError
from premises.fit import FitResult, fit_model, robust_cov
from premises.formula import Design
from premises.results import Coefficient, SensitivityRow
from premises.spec import ALTERNATIVES

__all__ = [
    "ROUNDED_LAMBDAS",
    "BoxCoxProfile",
    "boxcox_profile",
    "fit_alternatives",
    "profile_loglik",
]

ROUNDED_LAMBDAS = (-1.0, -0.5, 0.0, 0.5, 1.0)
"""Interpretable powers a Box-Cox lambda is rounded to (Box & Cox 1964; common practice)."""

LAMBDA_RANGE = (-3.0, 3.0)
"""Range searched for lambda."""


@dataclass(frozen=True)
class BoxCoxProfile:
    """The Box-Cox profile likelihood's maximum and its likelihood-ratio interval."""

    lam: float
    ci_low: float
    ci_high: float
    rounded: float
    rounded_in_interval: bool


def profile_loglik(
    y: np.ndarray, x: np.ndarray, lam: float, weights: np.ndarray | None = None
) -> float:
    """Profile log-likelihood of a Box-Cox lambda for the regression of y^(lambda) on ``x``.

    -n/2 log(RSS(lambda)/n) + (lambda - 1) sum(log y), constants dropped
    (Box & Cox 1964). With ``x`` a column of ones it equals
    :func:`scipy.stats.boxcox_llf`.
    """
    y = np.asarray(y, dtype=float)
    root_w = np.ones(y.size) if weights is None else np.sqrt(np.asarray(weights, dtype=float))
    z = special.boxcox(y, lam) * root_w
    xw = np.asarray(x, dtype=float) * root_w[:, None]
    coef, *_ = np.linalg.lstsq(xw, z, rcond=None)
    resid = z - xw @ coef
    rss = float(resid @ resid)
    n = y.size
    return float(-0.5 * n * np.log(rss / n) + (lam - 1.0) * np.sum(np.log(y)))


def boxcox_profile(
    y: np.ndarray, x: np.ndarray, weights: np.ndarray | None = None, level: float = 0.95
) -> BoxCoxProfile:
    """Maximum-likelihood lambda, its likelihood-ratio interval, and the rounded value.

    The interval holds the lambdas whose log-likelihood is within
    chi2(1, level) / 2 of the maximum (Box & Cox 1964). The rounded lambda is
    the value of :data:`ROUNDED_LAMBDAS` inside the interval closest to the
    estimate, else the closest overall.
    """

    def loglik(lam: float) -> float:
        return profile_loglik(y, x, lam, weights)

    grid = np.linspace(LAMBDA_RANGE[0], LAMBDA_RANGE[1], 121)
    values = np.array([loglik(v) for v in grid])
    best = int(np.argmax(values))
    low, high = grid[max(best - 1, 0)], grid[min(best + 1, grid.size - 1)]
    found = optimize.minimize_scalar(
        lambda v: -loglik(v), bounds=(low, high), method="bounded", options={"xatol": 1e-6}
    )
    lam = float(found.x)
    peak = -float(found.fun)
    drop = float(stats.chi2.ppf(level, 1)) / 2.0

    def edge(start: float, stop: float) -> float:
        if loglik(stop) >= peak - drop:
            return stop
        return float(optimize.brentq(lambda v: loglik(v) - (peak - drop), start, stop, xtol=1e-6))

    ci_low, ci_high = edge(lam, LAMBDA_RANGE[0]), edge(lam, LAMBDA_RANGE[1])
    inside = [r for r in ROUNDED_LAMBDAS if ci_low <= r <= ci_high]
    pool = inside or list(ROUNDED_LAMBDAS)
    rounded = min(pool, key=lambda r: (abs(r - lam), r))
    return BoxCoxProfile(lam, ci_low, ci_high, rounded, bool(inside))


def _se_kind(ctx: CheckContext) -> str:
    """The SE the reported table uses, so 'changed' compares like with like.

    Mirrors the choice under ``se: auto``: cluster-robust with groups, HC3 when
    the variance check (if it runs) advises it, else classical.
    """
    se = ctx.spec.se
    if se == "auto":
        if ctx.spec.groups is not None:
            return "cluster"
        if "variance" not in ctx.spec.checks:
            return "classical"
        from premises.checks.variance import assess_variance

        return "HC3" if dict(assess_variance(ctx).extra).get("hc3_advised") else "classical"
    return {"classical": "classical", "hc3": "HC3", "cluster": "cluster"}[se]


def _coefficients(ctx: CheckContext, fit: FitResult, kind: str) -> tuple[Coefficient, ...]:
    from premises.checks.independence import group_values

    classical = fit.bse
    df = float(fit.df_resid)
    robust = None
    if kind != "classical":
        groups = group_values(ctx) if kind == "cluster" else None
        robust = np.sqrt(np.diag(robust_cov(fit, kind, groups)))
        if groups is not None:
            df = float(np.unique(groups).size - 1)  # Cameron & Miller (2015)
    se = classical if robust is None else robust
    crit = float(stats.t.ppf(0.975, df))
    out = []
    for j, term in enumerate(fit.design.column_names):
        est = float(fit.params[j])
        t = est / se[j] if se[j] > 0 else float("nan")
        out.append(
            Coefficient(
                term=term,
                estimate=est,
                se=float(classical[j]),
                se_robust=None if robust is None else float(robust[j]),
                ci_low=est - crit * float(se[j]),
                ci_high=est + crit * float(se[j]),
                p=float(2 * stats.t.sf(abs(t), df)),
                statistic=float(t),
            )
        )
    return tuple(out)


def _changed(reported: tuple[Coefficient, ...], other: tuple[Coefficient, ...]) -> tuple[str, ...]:
    """Terms whose conclusion differs: a sign flip, or the CI now including or excluding 0."""
    base = {c.term: c for c in reported}
    out = []
    for c in other:
        ref = base.get(c.term)
        if ref is None or c.term == "Intercept":
            continue
        flip = ref.estimate * c.estimate < 0
        if flip or (ref.ci_low > 0 or ref.ci_high < 0) != (c.ci_low > 0 or c.ci_high < 0):
            out.append(c.term)
    return tuple(out)


def _row(
    ctx: CheckContext,
    label: str,
    description: str,
    design: Design,
    kind: str,
    data_driven: bool = False,
) -> SensitivityRow:
    try:
        fit = fit_model(design, ctx.fit.weights)
        coefs = _coefficients(ctx, fit, kind)
    except PremisesError as exc:
        return SensitivityRow(
            label=label,
            description=f"{description} (could not be fitted: {exc.problem})",
            n=0,
            coefficients=(),
            data_driven=data_driven,
        )
    reported = _coefficients(ctx, ctx.fit, kind)
    return SensitivityRow(
        label=label,
        description=description,
        n=fit.n,
        coefficients=coefs,
        changed=_changed(reported, coefs),
        data_driven=data_driven,
    )


def _not_fitted(
    label: str, description: str, why: str, data_driven: bool = False
) -> SensitivityRow:
    return SensitivityRow(
        label=label,
        description=f"{description} (not fitted: {why})",
        n=0,
        coefficients=(),
        data_driven=data_driven,
    )


def _rank_row(ctx: CheckContext, kind: str) -> SensitivityRow:
    design = ctx.fit.design
    x = np.array(design.X, dtype=float)
    for j in range(x.shape[1]):
        if np.unique(x[:, j]).size > 2:  # numeric columns; dummies and the intercept stay
            x[:, j] = stats.rankdata(x[:, j])
    y = stats.rankdata(design.y)
    ranked = replace(design, y=y, X=x, outcome=f"rank({design.outcome})")
    return _row(
        ctx,
        "ranks",
        "outcome and numeric predictors replaced by their ranks (rank regression, "
        "Iman & Conover 1979); coefficients are in rank units, so compare signs and conclusions",
        ranked,
        kind,
    )


def _log_row(ctx: CheckContext, kind: str) -> SensitivityRow:
    design = ctx.fit.design
    label, description = (
        "log outcome",
        "natural log of the outcome; 100 (exp(b) - 1) is the percent change",
    )
    if np.any(design.y <= 0):
        return _not_fitted(
            label, description, f"{int(np.sum(design.y <= 0))} outcome values are zero or negative"
        )
    logged = replace(design, y=np.log(design.y), outcome=f"log({design.outcome})")
    return _row(ctx, label, description, logged, kind)


def _boxcox_row(ctx: CheckContext, kind: str) -> SensitivityRow:
    design = ctx.fit.design
    label = "Box-Cox outcome"
    if np.any(design.y <= 0):
        return _not_fitted(
            label,
            "Box-Cox transformation of the outcome",
            "the outcome has values that are zero or negative",
            data_driven=True,
        )
    prof = boxcox_profile(design.y, design.X, ctx.fit.weights)
    power = "log" if prof.rounded == 0 else f"power {prof.rounded:g}"
    description = (
        f"Box-Cox transformation of the outcome chosen from these data (Box & Cox 1964): lambda "
        f"{prof.lam:.2f}, 95% interval {prof.ci_low:.2f} to {prof.ci_high:.2f}, rounded to "
        f"{prof.rounded:g} ({power})"
        + ("" if prof.rounded_in_interval else ", a value outside the interval")
        + "; inference after choosing lambda ignores that choice"
    )
    y = np.log(design.y) if prof.rounded == 0 else special.boxcox(design.y, prof.rounded)
    transformed = replace(
        design, y=np.asarray(y, dtype=float), outcome=f"boxcox({design.outcome}, {prof.rounded:g})"
    )
    return _row(ctx, label, description, transformed, kind, data_driven=True)


_BUILDERS = {"rank": _rank_row, "log-outcome": _log_row, "boxcox": _boxcox_row}


def fit_alternatives(ctx: CheckContext, names: tuple[str, ...]) -> tuple[SensitivityRow, ...]:
    """Fit each declared alternative analysis.

    Parameters
    ----------
    ctx
        The fitted block.
    names
        Any of ``rank``, ``log-outcome``, ``boxcox`` (``spec.ALTERNATIVES``), in
        the order wanted.

    Returns
    -------
    tuple of SensitivityRow
        One row per name. ``changed`` compares with the reported fit using the
        same kind of standard error; a row that cannot be fitted has no
        coefficients and says why in its description.
    """
    unknown = [n for n in names if n not in _BUILDERS]
    if unknown:
        raise SpecError(
            f"Unknown alternative analysis '{unknown[0]}'.",
            ctx.spec.locate("alternatives"),
            f"Use one of: {', '.join(ALTERNATIVES)}.",
        )
    if not names:
        return ()
    kind = _se_kind(ctx)
    return tuple(_BUILDERS[name](ctx, kind) for name in names)
