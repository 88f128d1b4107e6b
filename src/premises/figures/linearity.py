"""Linearity: residuals against fitted values, with a binned mean and its band.

If the mean structure is right, the residual mean is zero at every fitted
value; a binned mean that bends away from the zero line, beyond its +-2 SE
band, shows curvature the model missed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import BinnedMean, Cloud, FlagSet, bin_means, find_flags, make_cloud
from premises.figures.layers import (
    draw_cloud,
    draw_flagged,
    draw_reference,
    draw_smoother,
    finish_axes,
    new_axes,
)
from premises.figures.wording import (
    cloud_words,
    density_note,
    flag_sentence,
    format_number,
    join_caption,
    verdict_sentence,
)
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["LinearityData", "compute", "describe", "draw"]


@dataclass(frozen=True)
class LinearityData:
    """Everything the linearity figure draws."""

    name: str
    cloud: Cloud
    smooth: BinnedMean
    flag_x: np.ndarray
    flag_y: np.ndarray
    flags: FlagSet
    outcome: str
    resid_sd: float
    """Residual standard deviation, the unit the drift is reported in."""
    max_drift_sd: float
    """Largest |binned mean| in residual SDs."""
    bins_off_zero: int
    """Bins whose +-2 SE band excludes zero."""


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> LinearityData | None:
    """Residuals and fitted values, their binned mean, and the flagged points.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The linearity finding (its verdict goes into the caption).
    flags
        Points to mark; default: :func:`find_flags` without an influence finding.

    Returns
    -------
    LinearityData or None
        None when there are fewer than three residuals to show.
    """
    fitted = np.asarray(ctx.fit.fitted, dtype=float)
    resid = np.asarray(ctx.fit.resid, dtype=float)
    if np.isfinite(resid).sum() < 3:
        return None
    flags = flags if flags is not None else find_flags(ctx, None)
    smooth = bin_means(fitted, resid)
    sd = float(np.sqrt(ctx.fit.sigma2)) if ctx.fit.sigma2 > 0 else float(np.nanstd(resid))
    drift = float(np.max(np.abs(smooth.mean)) / sd) if not smooth.empty and sd > 0 else 0.0
    off = int(np.sum((smooth.low > 0) | (smooth.high < 0))) if not smooth.empty else 0
    return LinearityData(
        name="linearity",
        cloud=make_cloud(fitted, resid),
        smooth=smooth,
        flag_x=fitted[flags.index],
        flag_y=resid[flags.index],
        flags=flags,
        outcome=ctx.fit.design.outcome,
        resid_sd=sd,
        max_drift_sd=drift,
        bins_off_zero=off,
    )


def draw(data: LinearityData, fig: Figure) -> None:
    """Draw the figure on ``fig`` (a blank :class:`matplotlib.figure.Figure`)."""
    ax = new_axes(fig)
    draw_cloud(ax, data.cloud)
    draw_reference(ax, 0.0)
    smoother = draw_smoother(ax, data.smooth)
    draw_flagged(ax, data.flag_x, data.flag_y, data.flags.labels)
    ax.set_xlabel(f"Fitted {data.outcome}")
    ax.set_ylabel(f"Residual ({data.outcome})")
    finish_axes(ax, "Mean residual along the fitted values", smoother)


def describe(data: LinearityData, finding: Finding) -> tuple[str, str]:
    """Caption (what is shown, then the verdict) and alt text (what it shows, in numbers)."""
    caption = join_caption(
        "Residuals against fitted values, with the binned mean residual and its "
        "±2 SE band; the mean stays near zero when the model's mean structure is right.",
        density_note(data.cloud),
        verdict_sentence(finding),
    )
    shape = cloud_words(data.cloud, "residual", "fitted values")
    if data.smooth.empty:
        trend = "too few points for a binned mean"
    else:
        trend = (
            f"the binned mean stays within {format_number(data.max_drift_sd, 2)} residual SD "
            f"of zero, and its band excludes zero in {data.bins_off_zero} of "
            f"{data.smooth.centre.size} bins"
        )
    alt = f"{shape}; {trend}; {flag_sentence(data.flags)}."
    return caption, alt
