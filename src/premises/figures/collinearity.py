"""Collinearity: variance inflation per term as a dot chart, with the threshold line.

VIF_j = [R^-1]_jj for R the predictors' correlation matrix (Marquardt 1970). A
term of several columns (a factor) gets the generalized VIF, GVIF =
det R_11 det R_22 / det R (Fox & Monette 1992), shown as GVIF^(1/df) = (GVIF^(1/(2 df)))^2
so that it reads on the same scale as a VIF and meets the same threshold. The
values come from the collinearity finding (``extra["vif"]``) when the check
recorded them, so the figure shows exactly what the text reports.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import threshold_value
from premises.figures.layers import finish_axes, new_axes
from premises.figures.style import COLOURS
from premises.figures.wording import format_number, verdict_sentence
from premises.formula import Design
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["CollinearityData", "compute", "describe", "draw", "term_vifs"]


@dataclass(frozen=True)
class CollinearityData:
    """Per-term VIFs, largest first."""

    name: str
    terms: tuple[str, ...]
    values: np.ndarray
    threshold: float
    generalized: tuple[bool, ...]
    """True where the value is GVIF^(1/df) (a term of several columns)."""

    @property
    def log_scale(self) -> bool:
        """A log axis once the values span more than a factor of 30 (our choice)."""
        return bool(np.nanmax(self.values) / max(np.nanmin(self.values), 1e-12) > 30)


def term_vifs(design: Design) -> tuple[tuple[str, float, bool], ...]:
    """(term, VIF or GVIF^(1/df), generalized?) for every non-intercept term.

    Computed from one correlation matrix of the design's non-constant columns
    (centred when the model has an intercept, as usual), with log-determinants.

    Examples
    --------
    For two predictors with correlation r both VIFs equal 1 / (1 - r^2).
    """
    X = np.asarray(design.X, dtype=float)
    centre = X.mean(axis=0) if design.has_intercept else np.zeros(X.shape[1])
    cross = _centred_cross_product(X, centre)
    scale = np.sqrt(np.diag(cross))
    columns = np.flatnonzero(scale > 1e-12 * max(float(scale.max()), 1e-300))
    if columns.size < 2:
        return ()
    R = cross[np.ix_(columns, columns)] / np.outer(scale[columns], scale[columns])
    _, logdet_all = np.linalg.slogdet(R)
    position = {int(c): k for k, c in enumerate(columns)}
    out: list[tuple[str, float, bool]] = []
    for term, start, stop in design.term_slices:
        mine = [position[c] for c in range(start, stop) if c in position]
        if term == "Intercept" or not mine:
            continue
        rest = [k for k in range(columns.size) if k not in mine]
        _, logdet_own = np.linalg.slogdet(R[np.ix_(mine, mine)])
        logdet_rest = np.linalg.slogdet(R[np.ix_(rest, rest)])[1] if rest else 0.0
        gvif_log = logdet_own + logdet_rest - logdet_all
        out.append((term, float(np.exp(gvif_log / len(mine))), len(mine) > 1))
    return tuple(out)


def _centred_cross_product(X: np.ndarray, centre: np.ndarray, chunk: int = 65_536) -> np.ndarray:
    """(X - centre)'(X - centre), accumulated over row chunks.

    Centring before multiplying keeps the digits that X'X - n m m' would cancel
    (a year column, say); chunking keeps the copy small at a million rows.
    """
    p = X.shape[1]
    out = np.zeros((p, p))
    for start in range(0, X.shape[0], chunk):
        block = X[start : start + chunk] - centre
        out += block.T @ block
    return out


def _from_extra(finding: Finding) -> tuple[tuple[str, float, bool], ...] | None:
    """Per-term values recorded by the check, if any.

    ``extra["vif"]`` holds VIF or GVIF^(1/df) per term and ``extra["df"]`` each
    term's column count; a bare ``extra["gvif"]`` is converted with those df.
    """
    extra = dict(finding.extra)
    dfs = {term: int(df) for term, df in _pairs(extra.get("df") or {})}
    for key in ("vif", "vifs"):
        pairs = _pairs(extra.get(key) or {})
        if pairs:
            return tuple((t, v, dfs.get(t, 1) > 1) for t, v in pairs)
    pairs = _pairs(extra.get("gvif") or {})
    if pairs:
        return tuple((t, v ** (1.0 / dfs.get(t, 1)), dfs.get(t, 1) > 1) for t, v in pairs)
    return None


def _pairs(value: Any) -> list[tuple[str, float]]:
    """Normalise a mapping, a sequence of (term, value) pairs or of mappings to pairs."""
    if isinstance(value, Mapping):
        return [(str(k), float(v)) for k, v in value.items() if v is not None]
    pairs: list[tuple[str, float]] = []
    for item in value:
        if isinstance(item, Mapping):
            number = item.get("gvif_adjusted", item.get("value", item.get("vif")))
            if number is not None:
                pairs.append((str(item.get("term")), float(number)))
        elif isinstance(item, (tuple, list)) and len(item) >= 2 and item[1] is not None:
            pairs.append((str(item[0]), float(item[1])))
    return pairs


def compute(ctx: CheckContext, finding: Finding, flags: object = None) -> CollinearityData | None:
    """Per-term VIFs (from the finding if recorded, else computed), largest first.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The collinearity finding.
    flags
        Unused (no observation is marked in this figure).

    Returns
    -------
    CollinearityData or None
        None with fewer than two terms: a single predictor cannot be collinear.
    """
    del flags
    rows = _from_extra(finding) or term_vifs(ctx.fit.design)
    rows = tuple(row for row in rows if np.isfinite(row[1]))
    if len(rows) < 2:
        return None
    rows = tuple(sorted(rows, key=lambda row: -row[1]))
    return CollinearityData(
        name="collinearity",
        terms=tuple(row[0] for row in rows),
        values=np.array([row[1] for row in rows]),
        threshold=threshold_value(ctx, finding, "vif"),
        generalized=tuple(row[2] for row in rows),
    )


def draw(data: CollinearityData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    ax.yaxis.grid(False)
    ax.xaxis.grid(True, color=COLOURS["grid"], linewidth=0.6)
    rows = np.arange(len(data.terms))[::-1]
    over = data.values >= data.threshold
    ax.hlines(rows, 1.0, data.values, color=COLOURS["grid"], linewidth=1.2, zorder=2)
    ax.scatter(data.values[~over], rows[~over], s=30, c=COLOURS["smoother"], zorder=3)
    ax.scatter(data.values[over], rows[over], s=34, c=COLOURS["flag"], zorder=4)
    ax.axvline(data.threshold, color=COLOURS["threshold"], linewidth=0.9, zorder=1)
    ax.axvline(1.0, color=COLOURS["reference"], linewidth=0.8, zorder=1)
    ax.annotate(
        f"threshold {format_number(data.threshold)}",
        xy=(data.threshold, 1.0),
        xycoords=("data", "axes fraction"),
        xytext=(3, -2),
        textcoords="offset points",
        ha="left",
        va="top",
        fontsize=7,
        color=COLOURS["threshold"],
    )
    for value, row, high in zip(data.values, rows, over):
        ax.annotate(
            format_number(float(value)),
            xy=(float(value), float(row)),
            xytext=(6, 0),
            textcoords="offset points",
            ha="left",
            va="center",
            fontsize=7,
            color=COLOURS["flag_text"] if high else COLOURS["text"],
        )
    names = [f"{t} *" if g else t for t, g in zip(data.terms, data.generalized)]
    ax.set_yticks(rows, names)
    ax.set_ylim(-0.7, len(data.terms) - 0.3)
    if data.log_scale:
        from matplotlib.ticker import FuncFormatter

        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: format_number(v)))
    top = max(float(np.nanmax(data.values)), data.threshold)
    ax.set_xlim(0.9 if data.log_scale else 0.0, top * (2.0 if data.log_scale else 1.15))
    label = "Variance inflation factor"
    if any(data.generalized):
        label += " (* GVIF^(1/df) for multi-column terms)"
    ax.set_xlabel(label)
    finish_axes(ax, "Variance inflation by term")


def describe(data: CollinearityData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    over = [t for t, v in zip(data.terms, data.values) if v >= data.threshold]
    caption = (
        "Variance inflation factor of each term (how much collinearity with the other terms "
        "inflates the variance of its coefficient; 1 = none), with the threshold "
        f"{format_number(data.threshold)} as a line"
        + (
            "; terms marked * have several columns and show GVIF^(1/df)"
            if any(data.generalized)
            else ""
        )
        + ". "
        + verdict_sentence(finding)
    )
    listing = ", ".join(f"{t} {format_number(float(v))}" for t, v in zip(data.terms, data.values))
    alt = (
        f"Dot chart of variance inflation factors for {len(data.terms)} terms "
        f"({'log scale' if data.log_scale else 'linear scale'}): {listing}; "
        + (
            f"{len(over)} at or above the threshold {format_number(data.threshold)} "
            f"({', '.join(over)})."
            if over
            else f"none reaches the threshold {format_number(data.threshold)}."
        )
    )
    return caption, alt
