"""Model fitting: OLS/WLS on a scaled design, covariance choices, closed-form influence.

The fit is computed on a centred and scaled design and mapped back, because
statsmodels' default fit loses every digit on ill-conditioned designs (NIST
Filip); see :mod:`premises.lsq`. Influence measures (:mod:`premises.influence`,
re-exported here) use the closed forms of Belsley, Kuh & Welsch (1980, ch. 2)
rather than leave-one-out refits, which are quadratic in n.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.special

from premises.errors import ModelError, SpecError
from premises.formula import Design
from premises.influence import LEVERAGE_ONE, Influence, compute_influence
from premises.lsq import ScaledQR, factorise, scaled_solve

__all__ = [
    "ROBUST_KINDS",
    "FitResult",
    "Influence",
    "compute_influence",
    "fit_model",
    "robust_cov",
    "scaled_solve",
]

ROBUST_KINDS: tuple[str, ...] = ("HC0", "HC1", "HC2", "HC3", "cluster")
"""Covariance kinds :func:`robust_cov` accepts (case-insensitive)."""


@dataclass(frozen=True)
class FitResult:
    """A fitted linear model, in the user's parameterisation."""

    design: Design
    params: np.ndarray
    """(p,) coefficients."""
    cov: np.ndarray
    """(p, p) classical covariance, sigma^2 (X'WX)^-1."""
    resid: np.ndarray
    """(n,) raw residuals y - fitted."""
    fitted: np.ndarray
    """(n,) fitted values, y - resid."""
    weights: np.ndarray | None
    """(n,) WLS weights, or None for OLS."""
    sigma2: float
    """Residual variance, RSS/(n - p) (weighted for WLS)."""
    df_resid: float
    """n - p."""
    rank: int
    """Always p: a rank-deficient design is refused, never silently reduced."""
    condition_number: float
    """Condition number of the column-scaled (not centred) design (BKW 1980)."""
    r_squared: float
    """Centred (weighted) when the columns span a constant, uncentred otherwise (as statsmodels)."""
    r_squared_adj: float
    f_statistic: float | None
    """F test of every non-intercept coefficient; None for an intercept-only model."""
    f_p: float | None
    xtx_inv: np.ndarray
    """(p, p) (X'WX)^-1 in the user's parameterisation."""
    df_model: float = 0.0
    """Numerator degrees of freedom of the F test (p minus 1 for the intercept)."""
    ss_resid: float = float("nan")
    """Residual sum of squares, sum w_i e_i^2."""
    ss_total: float = float("nan")
    """Total sum of squares: centred (weighted) with an intercept, uncentred without."""
    factor: ScaledQR | None = field(default=None, repr=False, compare=False)
    """The factorisation the fit came from; influence and robust covariances reuse it."""

    @property
    def n(self) -> int:
        return self.design.n

    @property
    def p(self) -> int:
        return self.design.p

    @property
    def bse(self) -> np.ndarray:
        """Classical standard errors."""
        return np.sqrt(np.diag(self.cov))

    @property
    def weighted_resid(self) -> np.ndarray:
        """(n,) sqrt(w_i) e_i (the raw residuals for OLS)."""
        return self.resid if self.weights is None else self.resid * np.sqrt(self.weights)


def fit_model(design: Design, weights: np.ndarray | None = None) -> FitResult:
    """Fit OLS (or WLS with ``weights``) by a scaled, pivoted QR factorisation.

    Parameters
    ----------
    design
        Outcome, design matrix and column names.
    weights
        (n,) positive finite WLS weights (inverse variances), or None for OLS.

    Returns
    -------
    FitResult
        Coefficients, classical covariance, residuals and summary statistics.

    Raises
    ------
    ModelError
        Fewer rows than parameters plus one, a constant outcome, non-finite
        values, invalid weights, or exactly collinear design columns (named).

    Examples
    --------
    >>> import numpy as np
    >>> from premises.formula import Design
    >>> x = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    >>> X = np.column_stack([np.ones(5), x])
    >>> d = Design("y ~ x", "y", ("y",), ("x",), 2 * x + 1 + [0, .1, -.1, 0, 0], X,
    ...            ("Intercept", "x"), (("Intercept", 0, 1), ("x", 1, 2)),
    ...            (("Intercept", ()), ("x", ("x",))), True)
    >>> round(float(fit_model(d).params[1]), 6)
    1.99
    """
    x = np.asarray(design.X, dtype=float)
    y = np.asarray(design.y, dtype=float)
    n, p = x.shape
    _check_values(design, x, y)
    w = _check_weights(weights, n)
    factor = factorise(x, design.column_names, w)
    params, resid_w = factor.solve(y)
    resid = resid_w if factor.sqrt_w is None else resid_w / factor.sqrt_w
    df_resid = n - p
    rss = float(resid_w @ resid_w)
    sigma2 = rss / df_resid
    xtx_inv = factor.xtx_inv()
    centred = factor.spans_constant()
    tss = _total_ss(y, w, centred)
    r_squared = 1.0 - rss / tss
    # Adjusted R^2 and the F test of every non-intercept coefficient, as in
    # statsmodels' RegressionResults (uncentred when there is no intercept).
    k_constant = 1 if centred else 0
    df_model = p - k_constant
    f_statistic, f_p = _overall_f(tss - rss, rss, df_model, df_resid)
    return FitResult(
        design=design,
        params=params,
        cov=sigma2 * xtx_inv,
        resid=resid,
        fitted=y - resid,
        weights=w,
        sigma2=sigma2,
        df_resid=float(df_resid),
        rank=p,
        condition_number=factor.condition_number(),
        r_squared=r_squared,
        r_squared_adj=1.0 - (n - k_constant) / df_resid * (1.0 - r_squared),
        f_statistic=f_statistic,
        f_p=f_p,
        xtx_inv=xtx_inv,
        df_model=float(df_model),
        ss_resid=rss,
        ss_total=tss,
        factor=factor,
    )


def _check_values(design: Design, x: np.ndarray, y: np.ndarray) -> None:
    """Refuse shapes, non-finite values and a constant outcome before any arithmetic."""
    n, p = x.shape
    if p == 0:
        raise ModelError(
            "The model has no parameters to estimate.", hint="Add an intercept or a predictor."
        )
    if y.shape != (n,):
        raise ModelError(f"The outcome has {y.size} values but the design has {n} rows.")
    if n <= p:
        raise ModelError(
            f"The model has {n} rows but {p} parameters; least squares needs more rows "
            "than parameters to leave any residual degrees of freedom.",
            hint="Use fewer terms or more rows (check the exclusions and missing values).",
        )
    bad = [design.column_names[j] for j in np.flatnonzero(~np.isfinite(x).all(axis=0))]
    if not np.isfinite(y).all():
        bad.insert(0, design.outcome)
    if bad:
        listed = ", ".join(f"'{name}'" for name in bad)
        raise ModelError(
            f"There are infinite or missing values in {listed} after the transforms.",
            hint="A log of zero or a division by zero gives infinity; exclude or fix those rows.",
        )
    if np.ptp(y) == 0:
        raise ModelError(
            f"The outcome '{design.outcome}' is constant ({y[0]:g} in all {n} rows), "
            "so there is nothing to explain.",
            hint="Check the outcome column and the exclusion rules.",
        )


def _check_weights(weights: np.ndarray | None, n: int) -> np.ndarray | None:
    """Return weights as a float array, or raise ModelError unless all are positive and finite."""
    if weights is None:
        return None
    w = np.asarray(weights, dtype=float)
    if w.shape != (n,):
        raise ModelError(f"There are {w.size} weights for {n} rows.")
    bad = np.flatnonzero(~(np.isfinite(w) & (w > 0)))
    if bad.size:
        raise ModelError(
            f"{bad.size} weights are zero, negative or not finite (first in analysed row "
            f"{bad[0] + 1}: "
            f"{w[bad[0]]!r}); WLS weights must be positive and finite.",
            hint="Exclude those rows or choose another weights column.",
        )
    return w


def _total_ss(y: np.ndarray, w: np.ndarray | None, centred: bool) -> float:
    """Total sum of squares, weighted, centred on the weighted mean when there is an intercept."""
    centre = float(np.average(y, weights=w)) if centred else 0.0
    dev2 = (y - centre) ** 2
    return float(dev2.sum() if w is None else w @ dev2)


def _overall_f(
    ss_model: float, rss: float, df_model: int, df_resid: int
) -> tuple[float | None, float | None]:
    """F statistic and p-value for all non-intercept coefficients being zero."""
    if df_model == 0:
        return None, None
    if rss == 0.0:
        return float("inf"), 0.0
    f = (ss_model / df_model) / (rss / df_resid)
    return float(f), float(scipy.special.fdtrc(df_model, df_resid, f))


def robust_cov(fit: FitResult, kind: str, groups: np.ndarray | None = None) -> np.ndarray:
    """Heteroscedasticity- or cluster-robust covariance of the coefficients.

    Parameters
    ----------
    fit
        A result of :func:`fit_model`.
    kind
        ``"HC0"`` (White 1980), ``"HC1"``, ``"HC2"``, ``"HC3"`` (MacKinnon &
        White 1985), or ``"cluster"``: CR1, the sandwich summed over groups with
        the small-sample factor G/(G-1) (n-1)/(n-p) (Cameron & Miller 2015,
        statsmodels' ``cov_type="cluster"`` default).
    groups
        (n,) group labels, required for ``"cluster"``.

    Returns
    -------
    numpy.ndarray
        (p, p) covariance. HC2 and HC3 are NaN where a point has leverage 1
        (Anscombe's set IV), where they are undefined.

    Examples
    --------
    >>> import numpy as np
    >>> from premises.formula import Design
    >>> x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    >>> X = np.column_stack([np.ones(6), x])
    >>> d = Design("y ~ x", "y", ("y",), ("x",), x + [0, .3, -.2, .1, 0, .4], X,
    ...            ("Intercept", "x"), (("Intercept", 0, 1), ("x", 1, 2)),
    ...            (("Intercept", ()), ("x", ("x",))), True)
    >>> robust_cov(fit_model(d), "HC3").shape
    (2, 2)
    """
    label = kind.lower()
    if label not in {k.lower() for k in ROBUST_KINDS}:
        raise SpecError(
            f"The covariance kind must be one of {', '.join(ROBUST_KINDS)}; got '{kind}'."
        )
    factor = fit.factor or factorise(fit.design.X, fit.design.column_names, fit.weights)
    rows = factor.coef_rows()  # row i: (X'WX)^-1 sqrt(w_i) x_i
    u = fit.weighted_resid
    n, p = rows.shape
    if label == "cluster":
        return _cluster_cov(rows, u, groups, n, p)
    u2 = u**2
    if label == "hc1":
        # Degrees-of-freedom scaling (Hinkley 1977, as cited by MacKinnon & White 1985).
        u2 = u2 * n / (n - p)
    elif label in ("hc2", "hc3"):
        # Undefined (0/0) where a point alone fixes a coefficient (h_ii = 1).
        one_minus_h = np.where(factor.hat > LEVERAGE_ONE, np.nan, 1.0 - factor.hat)
        # HC2: unbiased under homoscedasticity; HC3: jackknife approximation
        # (MacKinnon & White 1985).
        u2 = u2 / (one_minus_h if label == "hc2" else one_minus_h**2)
    return np.asarray((rows * u2[:, None]).T @ rows)


def _cluster_cov(
    rows: np.ndarray, u: np.ndarray, groups: np.ndarray | None, n: int, p: int
) -> np.ndarray:
    """CR1: sum over groups of (sum_i rows_i u_i)(...)' times G/(G-1) (n-1)/(n-p)."""
    if groups is None:
        raise ModelError(
            "Cluster-robust standard errors need a grouping variable.",
            hint="Name the column that identifies the clusters.",
        )
    labels = np.asarray(groups)
    if labels.shape != (n,):
        raise ModelError(f"There are {labels.size} group labels for {n} rows.")
    codes, uniques = pd.factorize(labels, use_na_sentinel=True)
    if np.any(codes < 0):
        raise ModelError(
            f"{int(np.sum(codes < 0))} rows have a missing cluster label.",
            hint="Exclude them or give them a label.",
        )
    g = len(uniques)
    if g < 2:
        raise ModelError(
            f"Cluster-robust standard errors need at least two clusters; there is {g}.",
            hint="Use HC3 instead, or check the grouping column.",
        )
    scores = rows * u[:, None]
    sums = np.column_stack(
        [np.bincount(codes, weights=scores[:, j], minlength=g) for j in range(p)]
    )
    factor = g / (g - 1) * (n - 1) / (n - p)
    return np.asarray(factor * (sums.T @ sums))
