"""Influence: leverage against studentized residual, point area growing with Cook's distance.

A point moves the fit when it is both unusual in the predictors (leverage, x) and
badly fitted (studentized residual, y); Cook's distance combines the two (Cook
1977), so it sets each point's area. Thin solid lines mark the leverage cut-off
(2p/n by default; Hoaglin & Welsch 1978) and the Bonferroni |t| cut-off. Points
with leverage 1 have no residual measures: they sit on the zero line as open
diamonds with a note, because they alone determine a coefficient.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import (
    Cloud,
    FlagSet,
    bonferroni_t,
    find_flags,
    make_cloud,
    point_labels,
    threshold_value,
)
from premises.figures.layers import draw_cloud, draw_flagged, finish_axes, new_axes, place_labels
from premises.figures.style import COLOURS, RASTER_ABOVE
from premises.figures.wording import (
    cloud_words,
    density_note,
    flag_sentence,
    format_number,
    join_caption,
    points_word,
    verdict_sentence,
)
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = ["InfluenceData", "compute", "describe", "draw"]

AREA_MIN = 6.0
AREA_MAX = 200.0
"""Marker areas (pt^2) for Cook's distance 0 and the largest Cook's distance."""


@dataclass(frozen=True)
class InfluenceData:
    """Everything the influence figure draws."""

    name: str
    cloud: Cloud
    """Leverage and studentized residual of every defined point (sizes in point mode)."""
    area: np.ndarray | None
    """(n,) marker areas in point mode, None in density mode."""
    cooks_max: float
    cooks_cut: float
    leverage_cut: float
    t_cut: float
    flag_x: np.ndarray
    flag_y: np.ndarray
    flag_area: np.ndarray
    flags: FlagSet
    undefined_x: np.ndarray
    undefined_labels: tuple[str, ...]
    leverage_max: float
    n: int


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> InfluenceData | None:
    """Leverage, studentized residuals, Cook's distances and the cut-off lines.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The influence finding (its thresholds, when present, are the lines drawn).
    flags
        Points to mark; default: :func:`find_flags` with this finding.
    """
    infl = ctx.influence
    hat = np.asarray(infl.hat, dtype=float)
    t = np.asarray(infl.studentized_external, dtype=float)
    cooks = np.asarray(infl.cooks, dtype=float)
    if hat.size == 0:
        return None
    flags = flags if flags is not None else find_flags(ctx, finding)
    defined = ~np.asarray(infl.undefined, dtype=bool) & np.isfinite(t)
    finite_cooks = cooks[np.isfinite(cooks)]
    cooks_max = float(finite_cooks.max()) if finite_cooks.size else 0.0
    area = _area(cooks, cooks_max)
    cloud = make_cloud(hat[defined], t[defined])
    flagged = flags.index[defined[flags.index]]
    return InfluenceData(
        name="influence",
        cloud=cloud,
        area=None if cloud.dense else area[defined],
        cooks_max=cooks_max,
        cooks_cut=threshold_value(ctx, finding, "cooks"),
        leverage_cut=threshold_value(ctx, finding, "leverage"),
        t_cut=bonferroni_t(ctx.fit.n, ctx.fit.p, ctx.spec.thresholds.alpha),
        flag_x=hat[flagged],
        flag_y=t[flagged],
        flag_area=area[flagged],
        flags=flags,
        undefined_x=hat[flags.undefined],
        undefined_labels=point_labels(ctx, flags.undefined),
        leverage_max=float(np.nanmax(hat)),
        n=ctx.fit.n,
    )


def _area(cooks: np.ndarray, cooks_max: float) -> np.ndarray:
    """Marker area proportional to Cook's distance (plus a floor so every point shows)."""
    scale = (AREA_MAX - AREA_MIN) / cooks_max if cooks_max > 0 else 0.0
    return np.asarray(AREA_MIN + scale * np.nan_to_num(cooks, nan=0.0), dtype=float)


def draw(data: InfluenceData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    if data.cloud.dense:
        draw_cloud(ax, data.cloud)
    elif data.cloud.x is not None and data.cloud.y is not None:
        ax.scatter(
            data.cloud.x,
            data.cloud.y,
            s=data.area,
            c=COLOURS["points"],
            alpha=0.55,
            linewidths=0,
            rasterized=data.cloud.n > RASTER_ABOVE,
            zorder=2,
        )
    ax.axhline(0.0, color=COLOURS["reference"], linewidth=0.8, zorder=1.5)
    for sign in (-1.0, 1.0):
        ax.axhline(sign * data.t_cut, color=COLOURS["threshold"], linewidth=0.7, zorder=1.5)
    if 0 < data.leverage_cut < 1:
        ax.axvline(data.leverage_cut, color=COLOURS["threshold"], linewidth=0.7, zorder=1.5)
    _size_key(ax, data)
    draw_flagged(
        ax, data.flag_x, data.flag_y, data.flags.labels[: data.flag_x.size], sizes=data.flag_area
    )
    _draw_undefined(ax, data)
    ax.set_xlim(left=0)
    ax.set_xlabel("Leverage (hat value)")
    ax.set_ylabel("Studentized residual")
    ax.annotate(
        f"leverage {format_number(data.leverage_cut)}",
        xy=(data.leverage_cut, 0.0),
        xycoords=("data", "axes fraction"),
        xytext=(3, 2),
        textcoords="offset points",
        ha="left",
        va="bottom",
        fontsize=7,
        color=COLOURS["threshold"],
    )
    ax.annotate(
        f"|t| {format_number(data.t_cut)}",
        # The |t| label sits at the left end of its line and the leverage label at the foot of
        # its line, so the two never meet when the leverage cut-off lies near the right edge.
        xy=(0.0, data.t_cut),
        xycoords=("axes fraction", "data"),
        xytext=(3, 2),
        textcoords="offset points",
        ha="left",
        va="bottom",
        fontsize=7,
        color=COLOURS["threshold"],
    )
    finish_axes(ax, "Leverage, residual and Cook's distance")


def _size_key(ax: Axes, data: InfluenceData) -> None:
    """Legend entries showing the marker area of two Cook's distances."""
    if data.cooks_max <= 0:
        return
    for value in sorted({min(data.cooks_cut, data.cooks_max), data.cooks_max}):
        ax.scatter(
            [],
            [],
            s=float(_area(np.array([value]), data.cooks_max)[0]),
            facecolors="none",
            edgecolors=COLOURS["points"],
            linewidths=1.0,
            label=f"Cook's D {format_number(value)}",
        )


def _draw_undefined(ax: Axes, data: InfluenceData) -> None:
    """Leverage-1 points: open diamonds on the zero line, labelled 'id (leverage 1)'."""
    if data.undefined_x.size == 0:
        return
    zeros = np.zeros(data.undefined_x.size)
    ax.scatter(
        data.undefined_x,
        zeros,
        marker="D",
        s=60,
        facecolors="none",
        edgecolors=COLOURS["undefined"],
        linewidths=1.4,
        label="leverage 1 (undefined)",
        zorder=6,
    )
    place_labels(
        ax, data.undefined_x, zeros, [f"{label} (leverage 1)" for label in data.undefined_labels]
    )


def describe(data: InfluenceData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    caption = (
        "Leverage against externally studentized residual; each point's area grows with "
        "its Cook's distance. Thin lines mark the leverage cut-off "
        f"({format_number(data.leverage_cut)}) and the Bonferroni |t| cut-off "
        f"({format_number(data.t_cut)}); points beyond both move the fit most. "
    )
    if data.undefined_x.size:
        names = ", ".join(data.undefined_labels)
        caption += (
            f"The point with leverage 1 ({names}) alone determines a coefficient; its "
            "residual and Cook's distance are undefined, so it is drawn as an open diamond. "
            if len(data.undefined_labels) == 1
            else f"The {len(data.undefined_labels)} points with leverage 1 ({names}) each alone "
            "determine a coefficient; their residuals and Cook's distances are undefined, so "
            "they are drawn as open diamonds. "
        )
    caption = join_caption(caption, density_note(data.cloud), verdict_sentence(finding))
    shape = cloud_words(data.cloud, "studentized residual", "leverage")
    alt = (
        f"{shape}; leverage runs up to {format_number(data.leverage_max)}, the largest "
        f"Cook's distance is {format_number(data.cooks_max)} (cut-off "
        f"{format_number(data.cooks_cut)}); {flag_sentence(data.flags)}"
    )
    if data.undefined_x.size:
        alt += (
            f"; {points_word(len(data.undefined_labels), 'point')} with leverage 1 "
            f"({', '.join(data.undefined_labels)}) shown as open diamonds on the zero line"
        )
    return caption, alt + "."
