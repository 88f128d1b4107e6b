"""Closed-form influence measures: one factorisation, no refits, nothing n x n.

Leverage comes from the thin QR factor of the (sqrt-weighted) design; every
leave-one-out quantity follows from the residual, the leverage and one p x p
inverse (Belsley, Kuh & Welsch 1980, ch. 2). statsmodels computes the external
studentized residuals, DFFITS and DFBETAS by refitting the model once per row,
which is quadratic in n.

For a WLS fit the measures are those of the transformed problem
sqrt(w) y = sqrt(w) X b + error: weighted residuals and the weighted design's
hat matrix W^(1/2) X (X'WX)^-1 X' W^(1/2).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from premises.lsq import factorise

if TYPE_CHECKING:
    from premises.fit import FitResult

__all__ = ["LEVERAGE_ONE", "Influence", "compute_influence"]

LEVERAGE_ONE = 1.0 - 1e-10
"""Leverage above this counts as 1: the point alone determines a coefficient.

Rounding leaves h_ii = 1 +- a few eps where it is exactly 1 (statsmodels
reports 1.0000000000000002 for Anscombe's set IV). Above 1 - 1e-10 the computed
1 - h_ii carries a relative error of at least eps / 1e-10 ~ 1e-6 and every
measure divided by it is dominated by rounding, so such a point is reported as
undefined rather than given numbers (common practice; the margin is ours).
"""


@dataclass(frozen=True)
class Influence:
    """Per-observation diagnostics from one factorisation (no refits)."""

    hat: np.ndarray
    """(n,) leverage h_ii."""
    studentized_internal: np.ndarray
    """(n,) e_i / (s sqrt(1 - h_ii)); NaN where h_ii == 1."""
    studentized_external: np.ndarray
    """(n,) e_i / (s_(i) sqrt(1 - h_ii)); NaN where undefined."""
    cooks: np.ndarray
    """(n,) Cook's distance; NaN where h_ii == 1."""
    dffits: np.ndarray
    """(n,) DFFITS; NaN where undefined."""
    dfbetas: np.ndarray
    """(n, p) DFBETAS; NaN rows where undefined."""
    undefined: np.ndarray
    """(n,) bool: leverage numerically 1 (the point alone determines a coefficient)."""
    sigma_without: np.ndarray | None = None
    """(n,) s_(i), the residual SD with observation i left out; NaN where undefined."""


def compute_influence(fit: FitResult) -> Influence:
    """Closed-form leverage, studentized residuals, Cook's D, DFFITS and DFBETAS.

    Parameters
    ----------
    fit
        A result of :func:`premises.fit.fit_model`.

    Returns
    -------
    Influence
        Every measure is NaN for an observation whose leverage is numerically 1
        (``undefined``): its residual is 0 whatever its outcome, and deleting it
        leaves a coefficient without data. Without a second residual degree of
        freedom (n - p = 1) the leave-one-out measures are NaN for every row.

    Notes
    -----
    With e_i the (weighted) residual, h_i the leverage and s^2 = RSS/(n - p)
    (Belsley, Kuh & Welsch 1980, eqs. 2.7-2.11; Cook 1977):

    - r_i = e_i / (s sqrt(1 - h_i))                      internally studentized
    - s_(i)^2 = ((n - p) s^2 - e_i^2 / (1 - h_i)) / (n - p - 1)
    - t_i = e_i / (s_(i) sqrt(1 - h_i))                  externally studentized
    - D_i = r_i^2 h_i / (p (1 - h_i))                    Cook's distance
    - DFFITS_i = t_i sqrt(h_i / (1 - h_i))
    - DFBETAS_ij = [(X'WX)^-1 x_i]_j e_i / (1 - h_i) / (s_(i) sqrt([(X'WX)^-1]_jj))

    Examples
    --------
    >>> import numpy as np
    >>> from premises.formula import Design
    >>> from premises.fit import fit_model
    >>> x = np.array([1.0, 2.0, 3.0, 4.0, 10.0])
    >>> X = np.column_stack([np.ones(5), x])
    >>> d = Design("y ~ x", "y", ("y",), ("x",), x + [0, .3, -.2, .1, 0], X,
    ...            ("Intercept", "x"), (("Intercept", 0, 1), ("x", 1, 2)),
    ...            (("Intercept", ()), ("x", ("x",))), True)
    >>> int(np.argmax(compute_influence(fit_model(d)).hat))
    4
    """
    factor = fit.factor or factorise(fit.design.X, fit.design.column_names, fit.weights)
    n, p = fit.n, fit.p
    h = factor.hat
    e = fit.weighted_resid
    undefined = h > LEVERAGE_ONE
    one_minus_h = np.where(undefined, np.nan, 1.0 - h)
    s = np.sqrt(fit.sigma2)
    dof = n - p
    with np.errstate(divide="ignore", invalid="ignore"):
        r = e / (s * np.sqrt(one_minus_h))
        cooks = r**2 * h / (p * one_minus_h)  # Cook (1977)
        if dof > 1:
            # Leave-one-out variance without refitting (BKW 1980, eq. 2.8);
            # clipped at 0, where rounding can leave -eps for a point the
            # other rows fit exactly.
            s2_without = np.maximum(dof * fit.sigma2 - e**2 / one_minus_h, 0.0) / (dof - 1)
        else:
            s2_without = np.full(n, np.nan)
        s_without = np.sqrt(s2_without)
        t = e / (s_without * np.sqrt(one_minus_h))
        dffits = t * np.sqrt(h / one_minus_h)
        # b - b_(i) = (X'WX)^-1 x_i e_i / (1 - h_i) (BKW 1980, eq. 2.1), row-wise.
        # In place on the (n, p) rows: no further (n, p) temporaries at 10^6 rows.
        dfbetas = factor.coef_rows()
        dfbetas *= (e / one_minus_h / s_without)[:, None]
        dfbetas /= np.sqrt(np.diag(fit.xtx_inv))[None, :]
    return Influence(
        hat=h,
        studentized_internal=r,
        studentized_external=t,
        cooks=cooks,
        dffits=dffits,
        dfbetas=dfbetas,
        undefined=undefined,
        sigma_without=s_without,
    )
