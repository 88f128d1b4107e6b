"""Which observations move which coefficient, and by how much.

DFBETAS_ij = (b_j - b_j(i)) / (s_(i) sqrt[(X'X)^-1_jj]) is the change in
coefficient j when observation i is dropped, in standard errors (Belsley, Kuh &
Welsch 1980, sec. 2.1); |DFBETAS| > 2/sqrt(n) is their size-adjusted cut-off.
A dot chart: one row per term, one dot per observation among the ~10 with the
largest |DFBETAS| anywhere, the cut-off as a shaded band around zero, and the
dots beyond it named by their id.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import FlagSet, point_labels, threshold_value
from premises.figures.layers import finish_axes, new_axes
from premises.figures.style import BAND_ALPHA, COLOURS
from premises.figures.wording import format_number, points_word, verdict_sentence
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = ["CoefficientShiftData", "compute", "describe", "draw"]

MAX_OBSERVATIONS = 10
"""Observations shown: those with the largest |DFBETAS| on any term."""

MAX_TERMS = 20
"""Design columns shown: those the chosen observations move most."""


@dataclass(frozen=True)
class CoefficientShiftData:
    """Everything the coefficient-shift figure draws."""

    name: str
    terms: tuple[str, ...]
    """Design columns, top row first."""
    labels: tuple[str, ...]
    """Ids of the observations shown, largest shift first."""
    shifts: np.ndarray
    """(observations, terms) DFBETAS."""
    cut: float
    """|DFBETAS| cut-off."""
    n: int
    intercept_hidden: bool
    """The intercept's column is left out (its shifts rarely matter to a reader)."""
    terms_hidden: int
    """Other design columns left out (beyond ``MAX_TERMS``)."""

    @property
    def beyond(self) -> np.ndarray:
        """(observations, terms) True where |DFBETAS| exceeds the cut-off."""
        return np.asarray(np.abs(self.shifts) > self.cut, dtype=bool)


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> CoefficientShiftData | None:
    """DFBETAS of the observations that move any coefficient most.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The influence finding (its ``dfbetas`` threshold, if present, is the band).
    flags
        Unused: the observations shown are chosen by |DFBETAS| itself, which ranks
        exactly what this figure is about.

    Returns
    -------
    CoefficientShiftData or None
        None when no observation has defined DFBETAS on a non-intercept column.
    """
    del flags
    dfbetas = np.asarray(ctx.influence.dfbetas, dtype=float)
    names = ctx.fit.design.column_names
    keep_cols = np.array([name != "Intercept" for name in names], dtype=bool)
    if dfbetas.ndim != 2 or not keep_cols.any():
        return None
    size = np.abs(dfbetas)  # one copy; the intercept's column is then zeroed in place
    size[:, ~keep_cols] = 0.0
    largest = size.max(axis=1)  # NaN for undefined rows (they are NaN throughout)
    defined = np.flatnonzero(np.isfinite(largest))
    if defined.size == 0:
        return None
    count = min(MAX_OBSERVATIONS, defined.size)
    top = defined[np.argpartition(-largest[defined], count - 1)[:count]]
    top = top[np.argsort(-largest[top], kind="stable")]
    chosen = dfbetas[top][:, keep_cols]
    order = np.argsort(-np.max(np.abs(chosen), axis=0), kind="stable")[:MAX_TERMS]
    kept_names = [name for name, keep in zip(names, keep_cols) if keep]
    return CoefficientShiftData(
        name="dfbetas",
        terms=tuple(kept_names[j] for j in order),
        labels=point_labels(ctx, top),
        shifts=chosen[:, order],
        cut=threshold_value(ctx, finding, "dfbetas"),
        n=ctx.fit.n,
        intercept_hidden=not keep_cols.all(),
        terms_hidden=len(kept_names) - order.size,
    )


def draw(data: CoefficientShiftData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    ax.yaxis.grid(False)
    ax.xaxis.grid(True, color=COLOURS["grid"], linewidth=0.6)
    n_obs, n_terms = data.shifts.shape
    ax.axvspan(
        -data.cut,
        data.cut,
        color=COLOURS["band"],
        alpha=BAND_ALPHA * 0.6,
        linewidth=0,
        label=f"within ±{format_number(data.cut)} (cut-off)",
    )
    ax.axvline(0.0, color=COLOURS["reference"], linewidth=0.9)
    # Observations are spread vertically inside each term's row, in the same order
    # in every row, so one observation sits at the same height throughout.
    dodge = np.linspace(0.3, -0.3, n_obs) if n_obs > 1 else np.zeros(1)
    rows = np.arange(n_terms)[::-1]
    for j, row in enumerate(rows):
        y = row + dodge
        x = data.shifts[:, j]
        out = data.beyond[:, j]
        ax.scatter(x[~out], y[~out], s=16, c=COLOURS["points"], linewidths=0, zorder=3)
        ax.scatter(x[out], y[out], s=22, c=COLOURS["flag"], linewidths=0, zorder=4)
        _label_outermost(ax, x, y, out, data.labels)
        if row > 0:
            ax.axhline(row - 0.5, color=COLOURS["grid"], linewidth=0.6, zorder=1)
    ax.scatter([], [], s=22, c=COLOURS["flag"], linewidths=0, label="beyond the cut-off")
    ax.set_yticks(rows, data.terms)
    ax.set_ylim(-0.6, n_terms - 0.4)
    reach = float(np.nanmax(np.abs(data.shifts))) if data.shifts.size else data.cut
    limit = max(reach, data.cut) * 1.4
    ax.set_xlim(-limit, limit)
    ax.set_xlabel("DFBETAS: coefficient with the point minus without it (in SEs)")
    finish_axes(ax, f"Coefficient shifts from the {n_obs} most influential observations")


def _label_outermost(
    ax: Axes, x: np.ndarray, y: np.ndarray, out: np.ndarray, labels: tuple[str, ...]
) -> None:
    """Name the outermost dot beyond the cut-off on each side of zero.

    Outermost dots have nothing further out to collide with, so their labels stay
    readable; the alt text lists every observation beyond the cut-off.
    """
    for side in (-1.0, 1.0):
        candidates = np.flatnonzero(out & (np.sign(x) == side))
        if candidates.size == 0:
            continue
        i = int(candidates[np.argmax(np.abs(x[candidates]))])
        ax.annotate(
            labels[i],
            xy=(x[i], y[i]),
            xytext=(4 * side, 0),
            textcoords="offset points",
            ha="left" if side > 0 else "right",
            va="center",
            fontsize=7,
            color=COLOURS["flag_text"],
            zorder=5,
        )


def describe(data: CoefficientShiftData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    n_obs = len(data.labels)
    hidden = _hidden_words(data)
    caption = (
        f"DFBETAS of the {n_obs} observations with the largest coefficient shifts, one row "
        f"per model column{hidden}: each dot is the change in that coefficient, in standard "
        "errors, when the observation is left out (coefficient with it minus without it). "
        f"The shaded band marks the cut-off ±{format_number(data.cut)} (2/√n by default); dots "
        "beyond it are vermillion, and the outermost on each side is named. "
        + verdict_sentence(finding)
    )
    idx = np.unravel_index(int(np.nanargmax(np.abs(data.shifts))), data.shifts.shape)
    biggest = float(data.shifts[idx])
    beyond = data.beyond
    movers = [data.labels[i] for i in range(n_obs) if beyond[i].any()]
    alt = (
        f"Dot chart of DFBETAS for {points_word(n_obs, 'observation')} across "
        f"{points_word(len(data.terms), 'model column')}; the largest shift is "
        f"{format_number(biggest)} SE, by {data.labels[idx[0]]} on {data.terms[idx[1]]}; "
        f"{points_word(int(beyond.sum()), 'shift')} "
        f"{'exceeds' if int(beyond.sum()) == 1 else 'exceed'} ±{format_number(data.cut)}"
    )
    alt += f", by {', '.join(movers)}." if movers else "."
    return caption, alt


def _hidden_words(data: CoefficientShiftData) -> str:
    """' (intercept not shown)' and the like, or empty."""
    parts = []
    if data.intercept_hidden:
        parts.append("intercept")
    if data.terms_hidden:
        parts.append(f"{data.terms_hidden} columns moved least")
    return f" ({' and '.join(parts)} not shown)" if parts else ""
