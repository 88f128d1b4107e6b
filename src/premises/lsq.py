"""Least squares on a centred, scaled design: one pivoted QR serves the fit and its diagnostics.

The user's design ``X`` may be badly conditioned (a raw polynomial, a predictor
with large mean). Solving on it directly loses digits that centring and scaling
the columns would keep, so every computation here runs on

    Z_j = sqrt(w) (X_j - m_j) / s_j        (the non-intercept columns)

where ``m_j`` is the (weighted) column mean when the model has an intercept
column (else 0) and ``s_j`` makes each column unit length. With an intercept,
the centred columns are orthogonal to ``sqrt(w)``, so the intercept separates
out exactly. Results are mapped back to the user's parameterisation through a
p x p matrix ``to_user``. Nothing here is n x n.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from premises.errors import ModelError

__all__ = ["ScaledQR", "factorise", "scaled_solve"]

_REFINEMENT_STEPS = 0
"""Steps of iterative refinement of the solution (Björck 1967); the second rarely changes it."""


@dataclass(frozen=True)
class ScaledQR:
    """Pivoted thin QR of the centred, scaled, sqrt-weighted design, and the way back.

    Scaled parameters are ordered ``[intercept?] + non-intercept columns in user
    order``; ``to_user`` maps them to the user's coefficients.
    """

    x: np.ndarray
    """(n, p) the user's design (a reference, not a copy)."""
    names: tuple[str, ...]
    """The p design column names."""
    q: np.ndarray
    """(n, k) orthonormal factor of the k non-intercept columns (pivoted order)."""
    r: np.ndarray
    """(k, k) upper-triangular factor."""
    perm: np.ndarray
    """(k,) pivot: column ``perm[j]`` of Z is column j of ``q @ r``."""
    intercept_index: int | None
    """User index of the constant column, or None."""
    other_index: np.ndarray
    """(k,) user indices of the non-intercept columns."""
    means: np.ndarray
    """(k,) (weighted) means subtracted from those columns (zeros without an intercept)."""
    scales: np.ndarray
    """(k,) lengths the centred, weighted columns were divided by."""
    sqrt_w: np.ndarray | None
    """(n,) square roots of the WLS weights, or None for OLS."""
    sum_w: float
    """Sum of the weights (n for OLS)."""
    to_user: np.ndarray
    """(p, p) maps scaled parameters to the user's coefficients."""
    hat: np.ndarray
    """(n,) leverage h_ii of the (weighted) design."""

    @property
    def n(self) -> int:
        return int(self.x.shape[0])

    def scaled_columns(self) -> np.ndarray:
        """Return Z, the (n, k) centred, scaled, weighted non-intercept columns."""
        z = (self.x[:, self.other_index] - self.means) / self.scales
        return z if self.sqrt_w is None else z * self.sqrt_w[:, None]

    def solve(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Least-squares coefficients (user parameterisation) and weighted residuals for ``y``.

        The residuals ``sqrt(w) (y - X b)`` are computed on the scaled problem,
        where they keep the digits that ``y - X @ b`` would lose.
        """
        yw = y if self.sqrt_w is None else y * self.sqrt_w
        centre = 0.0
        if self.intercept_index is not None:
            w = None if self.sqrt_w is None else self.sqrt_w**2
            centre = float(np.average(y, weights=w))
            yw = yw - centre * (1.0 if self.sqrt_w is None else self.sqrt_w)
        y_scale = float(np.linalg.norm(yw)) or 1.0
        yz = yw / y_scale
        z = self.scaled_columns()
        g = np.zeros(self.r.shape[0])
        resid = yz
        # Iterative refinement: re-solve for the correction from the current
        # residual with the same factorisation (Björck 1967); it recovers the
        # digits the first solve loses on ill-conditioned designs (NIST Filip).
        for _ in range(_REFINEMENT_STEPS + 1):
            g_perm = scipy.linalg.solve_triangular(self.r, self.q.T @ resid, check_finite=False)
            g[self.perm] += g_perm
            resid = yz - z @ g
        # The centred intercept absorbs the part of the residual along sqrt(w)
        # that rounding left behind (exactly zero in exact arithmetic).
        theta = np.concatenate(([centre / y_scale], g)) if self.intercept_index is not None else g
        if self.intercept_index is not None:
            sw = np.ones(self.n) if self.sqrt_w is None else self.sqrt_w
            shift = float(sw @ resid) / self.sum_w
            theta[0] += shift
            resid = resid - shift * sw
        return self.to_user @ theta * y_scale, resid * y_scale

    def scaled_inverse(self) -> np.ndarray:
        """(X~'X~)^-1 for the scaled design, in scaled parameter order."""
        k = self.r.shape[0]
        r_inv = scipy.linalg.solve_triangular(self.r, np.eye(k), check_finite=False)
        inner = np.empty((k, k))
        inner[np.ix_(self.perm, self.perm)] = r_inv @ r_inv.T
        if self.intercept_index is None:
            return inner
        full = np.zeros((k + 1, k + 1))
        full[0, 0] = 1.0 / self.sum_w
        full[1:, 1:] = inner
        return full

    def xtx_inv(self) -> np.ndarray:
        """(X'WX)^-1 in the user's parameterisation."""
        return self.to_user @ self.scaled_inverse() @ self.to_user.T

    def coef_rows(self) -> np.ndarray:
        """(n, p) matrix whose row i is (X'WX)^-1 sqrt(w_i) x_i: column i of (X'WX)^-1 X'W^(1/2).

        Built as Q R^-T in scaled coordinates (O(n p^2), never n x n), then mapped.
        """
        k = self.r.shape[0]
        r_inv = scipy.linalg.solve_triangular(self.r, np.eye(k), check_finite=False)
        rows = np.empty((self.n, k))
        rows[:, self.perm] = self.q @ r_inv.T
        if self.intercept_index is not None:
            sw = np.ones(self.n) if self.sqrt_w is None else self.sqrt_w
            rows = np.column_stack((sw / self.sum_w, rows))
        return rows @ self.to_user.T


def find_intercept(x: np.ndarray) -> int | None:
    """Index of the first column that is one nonzero constant, or None."""
    for j in range(x.shape[1]):
        column = x[:, j]
        if column[0] != 0 and np.all(column == column[0]):
            return j
    return None


def factorise(x: np.ndarray, names: tuple[str, ...], weights: np.ndarray | None = None) -> ScaledQR:
    """Centre, scale and factorise the design; refuse a rank-deficient one.

    Parameters
    ----------
    x
        (n, p) finite design matrix.
    names
        The p column names, used in the message when columns are collinear.
    weights
        (n,) positive finite WLS weights, or None.

    Raises
    ------
    ModelError
        If some design columns are exactly collinear; the message names them.
    """
    n, p = x.shape
    sqrt_w = None if weights is None else np.sqrt(weights)
    sum_w = float(n if weights is None else np.sum(weights))
    intercept = find_intercept(x)
    other = np.array([j for j in range(p) if j != intercept], dtype=np.intp)
    raw = x[:, other]
    means = np.zeros(len(other))
    if intercept is not None:
        means = np.average(raw, axis=0, weights=weights)
    z = raw - means
    if sqrt_w is not None:
        z *= sqrt_w[:, None]
    scales = np.linalg.norm(z, axis=0)
    raw_norms = np.linalg.norm(raw if sqrt_w is None else raw * sqrt_w[:, None], axis=0)
    tol = max(n, p) * np.finfo(float).eps
    flat = scales <= tol * raw_norms
    if np.any(flat):
        bad = [names[other[j]] for j in np.flatnonzero(flat)]
        involved = bad if intercept is None or np.all(raw_norms[flat] == 0) else [names[intercept], *bad]
        raise _collinear_error(involved)
    z /= scales
    q, r, perm = scipy.linalg.qr(z, mode="economic", pivoting=True, overwrite_a=True, check_finite=False)
    _check_rank(r, perm, x, names, intercept, other, means, scales, tol)
    to_user = _map_to_user(p, intercept, other, means, scales)
    hat = np.einsum("ij,ij->i", q, q)
    if intercept is not None:
        # The intercept column sqrt(w) is orthogonal to Z, so it adds w_i / sum(w).
        hat += (np.ones(n) if weights is None else weights) / sum_w
    return ScaledQR(x, names, q, r, perm, intercept, other, means, scales, sqrt_w, sum_w, to_user, hat)


def _check_rank(
    r: np.ndarray,
    perm: np.ndarray,
    x: np.ndarray,
    names: tuple[str, ...],
    intercept: int | None,
    other: np.ndarray,
    means: np.ndarray,
    scales: np.ndarray,
    tol: float,
) -> None:
    """Raise ModelError naming the columns of an exact linear dependence, if any."""
    if r.shape[0] == 0:
        return
    _, sv, vt = np.linalg.svd(r)
    # Numerical rank as numpy.linalg.matrix_rank decides it: singular values
    # below max(n, p) * eps * largest (Press et al. 2007, Numerical Recipes, §2.6).
    null = vt[sv <= tol * sv[0]]
    if null.shape[0] == 0:
        return
    v = np.empty(len(perm))
    v[perm] = null[-1]  # the direction with the smallest singular value
    involved = [names[other[j]] for j in np.flatnonzero(np.abs(v) > 1e-6 * np.abs(v).max())]
    if intercept is not None:
        # In the user's columns the relation is sum_j (v_j / s_j) X_j = c * 1 with
        # c = sum_j v_j m_j / s_j; the intercept takes part when c is not ~0.
        coef = v / scales
        c = float(coef @ means)
        if abs(c) > 1e-8 * float(np.abs(coef * means).sum()):
            involved.insert(0, names[intercept])
    raise _collinear_error(involved)


def _collinear_error(involved: list[str]) -> ModelError:
    listed = ", ".join(f"'{name}'" for name in involved)
    return ModelError(
        f"The design columns {listed} are exactly collinear (one is a linear combination "
        "of the others), so their coefficients are not identified.",
        hint="Remove one of them from the formula (for a factor, drop one level or the intercept).",
    )


def _map_to_user(
    p: int, intercept: int | None, other: np.ndarray, means: np.ndarray, scales: np.ndarray
) -> np.ndarray:
    """The p x p matrix taking scaled parameters to the user's coefficients.

    Slopes: b_j = g_j / s_j. Intercept: a = c - sum_j m_j b_j.
    """
    to_user = np.zeros((p, p))
    offset = 0 if intercept is None else 1
    to_user[other, offset + np.arange(len(other))] = 1.0 / scales
    if intercept is not None:
        to_user[intercept, 0] = 1.0
        to_user[intercept, 1:] = -means / scales
    return to_user


def scaled_solve(
    x: np.ndarray, y: np.ndarray, weights: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares coefficients and raw residuals of ``y`` on ``x`` by the scaled QR.

    For auxiliary regressions (e.g. of squared residuals) that need the same
    care as the main fit. Column names in errors are ``x0, x1, ...``.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.column_stack([np.ones(4), [1.0, 2.0, 3.0, 4.0]])
    >>> coef, resid = scaled_solve(x, np.array([3.0, 5.0, 7.0, 9.0]))
    >>> np.round(coef, 12).tolist()
    [1.0, 2.0]
    """
    names = tuple(f"x{j}" for j in range(x.shape[1]))
    factor = factorise(np.asarray(x, dtype=float), names, weights)
    coef, resid_w = factor.solve(np.asarray(y, dtype=float))
    return coef, resid_w if factor.sqrt_w is None else resid_w / factor.sqrt_w
