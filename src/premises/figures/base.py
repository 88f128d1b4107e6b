"""What every figure shares: flagged points, thresholds, binned smoothers, density layers.

Everything here is plain numpy and costs O(n) (or one sort), so a figure of a
million rows costs about what one of ten thousand does. Drawing helpers live in
:mod:`premises.figures.layers`, caption and alt-text wording in
:mod:`premises.figures.wording`; this module never imports matplotlib.
"""

from __future__ import annotations

import ast
import math
import operator
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from premises.checks.base import CheckContext
from premises.errors import SpecError
from premises.figures.style import LARGE_N, MAX_FLAGGED_DRAWN, MAX_LABELS
from premises.results import Finding, FlaggedPoint

__all__ = [
    "BinnedMean",
    "Cloud",
    "FlagSet",
    "bin_means",
    "bonferroni_t",
    "choose_bin_count",
    "evaluate_threshold",
    "find_flags",
    "make_cloud",
    "point_labels",
    "threshold_value",
]


# --------------------------------------------------------------------------- flags


@dataclass(frozen=True)
class FlagSet:
    """Observations to mark in every figure, most severe first."""

    index: np.ndarray
    """(k,) int positions (design order) of the points drawn as flagged, k <= MAX_FLAGGED_DRAWN."""
    labels: tuple[str, ...]
    """Text label of each drawn point (its id, or ``row N`` without an id column)."""
    total: int
    """How many points were flagged in all (may exceed ``len(index)``)."""
    undefined: np.ndarray
    """(m,) int positions of points with leverage 1 (their residual measures are undefined)."""

    @property
    def labelled(self) -> tuple[str, ...]:
        """Labels of the points that carry text (the first ``MAX_LABELS``)."""
        return self.labels[:MAX_LABELS]


_OPS: dict[type, Callable[..., float]] = {
    ast.Add: operator.add,
    ast.Sub: operator.sub,
    ast.Mult: operator.mul,
    ast.Div: operator.truediv,
    ast.Pow: operator.pow,
    ast.USub: operator.neg,
    ast.UAdd: operator.pos,
}
_FUNCS: dict[str, Callable[[float], float]] = {"sqrt": math.sqrt, "log": math.log}


def evaluate_threshold(expression: str | float, n: int, p: int) -> float:
    """Evaluate a threshold such as ``4/n``, ``2p/n`` or ``2*sqrt(p/n)``.

    Parameters
    ----------
    expression
        Arithmetic in ``n`` and ``p`` (implicit products like ``2p`` allowed), or a number.
    n, p
        Rows analysed and parameters.

    Returns
    -------
    float
        The threshold's value for this fit.

    Examples
    --------
    >>> evaluate_threshold("2p/n", n=100, p=3)
    0.06
    """
    if isinstance(expression, (int, float)):
        return float(expression)
    text = re.sub(r"(\d)\s*([a-z(])", r"\1*\2", expression.strip())
    try:
        tree = ast.parse(text, mode="eval")
        return float(_evaluate_node(tree.body, {"n": float(n), "p": float(p)}))
    except (SyntaxError, ValueError, ZeroDivisionError, KeyError, TypeError) as exc:
        raise SpecError(
            f"The threshold '{expression}' is not arithmetic in n and p.",
            hint="Write it like 4/n, 2p/n or 2*sqrt(p/n).",
        ) from exc


def _evaluate_node(node: ast.AST, names: Mapping[str, float]) -> float:
    """Walk a whitelisted arithmetic tree."""
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)):
        return float(node.value)
    if isinstance(node, ast.Name):
        return names[node.id]
    if isinstance(node, ast.BinOp) and type(node.op) in _OPS:
        return _OPS[type(node.op)](
            _evaluate_node(node.left, names), _evaluate_node(node.right, names)
        )
    if isinstance(node, ast.UnaryOp) and type(node.op) in _OPS:
        return _OPS[type(node.op)](_evaluate_node(node.operand, names))
    if (
        isinstance(node, ast.Call)
        and isinstance(node.func, ast.Name)
        and node.func.id in _FUNCS
        and len(node.args) == 1
    ):
        return _FUNCS[node.func.id](_evaluate_node(node.args[0], names))
    raise ValueError("not allowed")


def threshold_value(ctx: CheckContext, finding: Finding | None, name: str) -> float:
    """The value of threshold ``name`` (cooks, leverage, dfbetas, dffits, vif).

    The finding's own evaluated ``ThresholdUse`` wins, so the figure draws the line
    the check used; otherwise the block's declared expression is evaluated here.
    """
    if finding is not None:
        for use in finding.thresholds:  # "Cook's distance", "|DFBETAS|", "VIF" ...
            if re.sub(r"[^a-z]", "", use.name.lower()).startswith(name):
                return float(use.value)
    declared = getattr(ctx.spec.thresholds, name)
    return evaluate_threshold(declared, ctx.fit.n, ctx.fit.p)


def bonferroni_t(n: int, p: int, alpha: float) -> float:
    """Two-sided Bonferroni critical |t| for the largest externally studentized residual.

    Each t_i follows Student's t with n - p - 1 df under the model (Belsley, Kuh &
    Welsch 1980, sec. 2.1); testing all n at level alpha/n is the usual outlier test
    (Cook & Weisberg 1982, sec. 2.2, from memory).
    """
    from scipy.special import stdtrit  # lazy: scipy is heavy at start-up

    df = max(n - p - 1, 1)
    return float(-stdtrit(df, alpha / (2.0 * max(n, 1))))


def find_flags(ctx: CheckContext, influence_finding: Finding | None) -> FlagSet:
    """The flagged observations, read from the influence finding when it lists them.

    The influence check records its flagged points as ``extra["flagged"]`` (a
    sequence of :class:`FlaggedPoint`, of ids, or of mappings with ``row``/``id``).
    Without that list the figures flag, on their own: points with leverage 1,
    Cook's distance above the block's ``cooks`` threshold, or |t| above the
    Bonferroni critical value. Severity order is Cook's distance, largest first.
    """
    infl = ctx.influence
    n = ctx.fit.n
    undefined = np.flatnonzero(np.asarray(infl.undefined, dtype=bool))
    listed = _listed_flags(ctx, influence_finding)
    if listed is None:
        cooks_cut = threshold_value(ctx, influence_finding, "cooks")
        t_cut = bonferroni_t(n, ctx.fit.p, ctx.spec.thresholds.alpha)
        with np.errstate(invalid="ignore"):
            mask = (infl.cooks > cooks_cut) | (np.abs(infl.studentized_external) > t_cut)
        mask[undefined] = True
        listed = np.flatnonzero(mask)
    severity = np.nan_to_num(np.asarray(infl.cooks, dtype=float)[listed], nan=np.inf)
    order = listed[np.argsort(-severity, kind="stable")]
    shown = order[:MAX_FLAGGED_DRAWN]
    return FlagSet(
        index=shown.astype(np.intp),
        labels=point_labels(ctx, shown),
        total=int(order.size),
        undefined=undefined.astype(np.intp),
    )


def _listed_flags(ctx: CheckContext, finding: Finding | None) -> np.ndarray | None:
    """Positions of the points the influence finding lists, or None if it lists none.

    Matching is vectorised (``np.isin``), since at large n the list can hold
    tens of thousands of entries.
    """
    if finding is None:
        return None
    entries = dict(finding.extra).get("flagged")
    if entries is None:
        return None
    rows: list[int] = []
    ids: list[str] = []
    for entry in entries:
        row, name = _row_or_id(entry)
        if row is not None:
            rows.append(row)
        elif name is not None:
            ids.append(name)
    mask = np.isin(np.asarray(ctx.rows), np.asarray(rows, dtype=np.int64))
    if ids:
        mask |= np.isin(np.asarray(ctx.ids).astype(str), np.asarray(ids, dtype=str))
    return np.flatnonzero(mask)


def _row_or_id(entry: Any) -> tuple[int | None, str | None]:
    """The data-file row (preferred) or the id of one listed flag."""
    if isinstance(entry, FlaggedPoint):
        return entry.row, entry.id
    if isinstance(entry, Mapping):
        row = entry.get("row")
        return (int(row) if row is not None else None), (
            str(entry["id"]) if entry.get("id") is not None else None
        )
    return None, str(entry)


def point_labels(ctx: CheckContext, index: np.ndarray) -> tuple[str, ...]:
    """Labels for points: the id column's value, or ``row N`` when the block has none."""
    if ctx.spec.id_column:
        ids = np.asarray(ctx.ids)
        return tuple(str(ids[i]) for i in index)
    rows = np.asarray(ctx.rows)
    return tuple(f"row {int(rows[i])}" for i in index)


# ------------------------------------------------------------------ binned smoother


@dataclass(frozen=True)
class BinnedMean:
    """A binned mean with a +-2 SE band: the house smoother."""

    centre: np.ndarray
    """(b,) mean of x within each bin."""
    mean: np.ndarray
    """(b,) mean of y within each bin."""
    se: np.ndarray
    """(b,) standard error of that mean (NaN for a bin of one point)."""
    count: np.ndarray
    """(b,) points per bin."""

    @property
    def low(self) -> np.ndarray:
        """Lower edge of the band, mean - 2 SE (approximate pointwise 95%; common practice)."""
        return self.mean - 2.0 * self.se

    @property
    def high(self) -> np.ndarray:
        """Upper edge of the band, mean + 2 SE."""
        return self.mean + 2.0 * self.se

    @property
    def empty(self) -> bool:
        return self.centre.size == 0


QUANTILE_SAMPLE = 100_000
"""Bin edges are quantiles of at most about this many points (an even stride)."""


MIN_BIN_COUNT = 3
"""Bins with fewer points are left out of the smoother (our choice)."""


def choose_bin_count(n: int) -> int:
    """Quantile bins for n points: about 25 points per bin, 3 to 40 bins (our choice)."""
    return int(min(40, max(3, n // 25)))


def bin_means(x: np.ndarray, y: np.ndarray, bins: int | None = None) -> BinnedMean:
    """Mean of ``y`` within quantile bins of ``x``, in O(n) after one quantile pass.

    Bins hold about equal counts; when x takes few distinct values (a 0/1
    predictor, a factor-only model) each value is its own bin.

    Parameters
    ----------
    x, y
        Paired arrays; non-finite pairs are dropped.
    bins
        Number of quantile bins; default :func:`choose_bin_count`.

    Returns
    -------
    BinnedMean
        Empty when fewer than 6 finite pairs remain.

    Examples
    --------
    >>> b = bin_means(np.arange(100.0), np.ones(100), bins=4)
    >>> b.mean.tolist()
    [1.0, 1.0, 1.0, 1.0]
    """
    x, y = _finite_pairs(x, y)
    if x.size < 6:
        nothing = np.empty(0)
        return BinnedMean(nothing, nothing, nothing, np.empty(0, dtype=np.intp))
    k = bins or choose_bin_count(int(x.size))
    # Above QUANTILE_SAMPLE points the edges come from an evenly strided subsample:
    # bins stay close to equal-count and the cost no longer grows with n log n.
    step = max(1, x.size // QUANTILE_SAMPLE)
    edges = np.quantile(x[::step], np.linspace(0.0, 1.0, k + 1))
    inner = np.unique(edges[1:-1])
    if inner.size < k - 1:  # ties: maybe few distinct values
        distinct = np.unique(x)
        if distinct.size <= k:
            inner = (distinct[:-1] + distinct[1:]) / 2.0
    which = np.searchsorted(inner, x, side="right")
    count = np.bincount(which, minlength=inner.size + 1)
    keep = count >= MIN_BIN_COUNT  # a bin of one or two points summarises nothing
    safe = np.maximum(count, 1)
    centre = np.bincount(which, weights=x, minlength=count.size) / safe
    mean = np.bincount(which, weights=y, minlength=count.size) / safe
    # Two passes rather than sum of squares: y may carry a large common offset.
    sq = np.bincount(which, weights=(y - mean[which]) ** 2, minlength=count.size)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where(count > 1, sq / np.maximum(count - 1, 1), np.nan)
        se = np.sqrt(var / safe)
    return BinnedMean(centre[keep], mean[keep], se[keep], count[keep])


def _finite_pairs(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Contiguous float copies (or views) of x and y without non-finite pairs."""
    x = np.ascontiguousarray(x, dtype=float)
    y = np.ascontiguousarray(y, dtype=float)
    ok = np.isfinite(x)
    ok &= np.isfinite(y)
    if not ok.all():
        x, y = x[ok], y[ok]
    return x, y


# -------------------------------------------------------------------- point clouds


@dataclass(frozen=True)
class Cloud:
    """A point cloud: the points themselves, or a 2-D histogram above ``LARGE_N``."""

    n: int
    """Finite points in the cloud."""
    x: np.ndarray | None
    """(n,) x, or None in density mode."""
    y: np.ndarray | None
    counts: np.ndarray | None
    """(ny, nx) counts of the 2-D histogram, or None in point mode."""
    extent: tuple[float, float, float, float] | None
    """(x0, x1, y0, y1) of the histogram."""

    @property
    def dense(self) -> bool:
        """True when the cloud is drawn as a density image."""
        return self.counts is not None


def make_cloud(
    x: np.ndarray, y: np.ndarray, shape: tuple[int, int] = (150, 100), large_n: int = LARGE_N
) -> Cloud:
    """Keep the points when n <= ``large_n``; otherwise bin them into a 2-D histogram.

    The histogram is computed with one ``bincount`` over equal-width cells, O(n);
    drawing it then costs the same whatever n was.
    """
    x, y = _finite_pairs(x, y)
    n = int(x.size)
    if n <= large_n:
        return Cloud(n, x, y, None, None)
    nx, ny = shape
    x0, x1 = _padded_range(x)
    y0, y1 = _padded_range(y)
    ix = np.minimum(((x - x0) * (nx / (x1 - x0))).astype(np.intp), nx - 1)
    iy = np.minimum(((y - y0) * (ny / (y1 - y0))).astype(np.intp), ny - 1)
    counts = np.bincount(iy * nx + ix, minlength=nx * ny).reshape(ny, nx)
    return Cloud(n, None, None, counts, (x0, x1, y0, y1))


def _padded_range(v: np.ndarray) -> tuple[float, float]:
    """Min and max, widened a little (and made non-degenerate)."""
    lo, hi = float(v.min()), float(v.max())
    pad = (hi - lo) * 0.02 or max(abs(lo) * 0.05, 0.5)
    return lo - pad, hi + pad
