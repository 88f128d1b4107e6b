"""Equal variance: the size of studentized residuals along the fitted values.

Under constant variance |t_i| has the same mean everywhere: E|T| for Student's
t with n - p - 1 df (a standard result; about 0.80 for large df). A binned mean
of |t| that climbs or falls with the fitted values, beyond its +-2 SE band, is
the funnel shape of non-constant variance, in units a reader can compare.
One panel only: spread by factor level is reported in the caption, not drawn.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

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

__all__ = ["VarianceData", "compute", "describe", "draw", "expected_abs_t"]

MAX_LEVELS = 50
"""A grouping with more levels than this is not summarised in the caption."""


@dataclass(frozen=True)
class VarianceData:
    """Everything the variance figure draws, plus the by-group summary for the caption."""

    name: str
    cloud: Cloud
    smooth: BinnedMean
    expected: float
    """E|T| under constant variance."""
    flag_x: np.ndarray
    flag_y: np.ndarray
    flags: FlagSet
    outcome: str
    spread_ratio: float
    """Largest over smallest binned mean of |t|."""
    grouping: str | None
    """Factor (or groups column) the caption summarises spread by."""
    group_sd: tuple[float, float] | None
    """Smallest and largest residual SD over its levels."""


def expected_abs_t(df: float) -> float:
    """E|T| for Student's t with ``df`` > 1: sqrt(df/pi) Gamma((df-1)/2) / Gamma(df/2)."""
    if not df > 1:
        return float("nan")
    if df > 1e7:
        return math.sqrt(2.0 / math.pi)  # the normal limit, E|Z|
    log_value = 0.5 * math.log(df / math.pi) + math.lgamma((df - 1) / 2) - math.lgamma(df / 2)
    return math.exp(log_value)


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> VarianceData | None:
    """|studentized residual| against fitted values, binned, with a by-level summary.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The variance finding.
    flags
        Points to mark; default: :func:`find_flags` without an influence finding.
    """
    fitted = np.asarray(ctx.fit.fitted, dtype=float)
    size = np.abs(np.asarray(ctx.influence.studentized_external, dtype=float))
    if np.isfinite(size).sum() < 3:
        return None
    flags = flags if flags is not None else find_flags(ctx, None)
    smooth = bin_means(fitted, size)
    positive = smooth.mean[smooth.mean > 0]
    ratio = float(positive.max() / positive.min()) if positive.size > 1 else float("nan")
    grouping, spread = _spread_by_level(ctx)
    return VarianceData(
        name="variance",
        cloud=make_cloud(fitted, size),
        smooth=smooth,
        expected=expected_abs_t(ctx.fit.n - ctx.fit.p - 1),
        flag_x=fitted[flags.index],
        flag_y=size[flags.index],
        flags=flags,
        outcome=ctx.fit.design.outcome,
        spread_ratio=ratio,
        grouping=grouping,
        group_sd=spread,
    )


def _spread_by_level(ctx: CheckContext) -> tuple[str | None, tuple[float, float] | None]:
    """Residual SD range over the levels of the model's first factor, else of ``groups``."""
    design = ctx.fit.design
    columns_of = dict(design.term_columns)
    candidates = [
        columns_of[term][0]
        for term, start, _ in design.term_slices
        if term != "Intercept"
        and ":" not in term
        and len(columns_of.get(term, ())) == 1
        and design.column_names[start] != term  # factor columns read term[T.level]
    ]
    if ctx.spec.groups:
        candidates.append(ctx.spec.groups)
    for column in candidates:
        if column not in ctx.frame.columns:
            continue
        levels = pd.Series(np.asarray(ctx.fit.resid, dtype=float)).groupby(
            np.asarray(ctx.frame[column]), sort=True
        )
        if not 2 <= levels.ngroups <= MAX_LEVELS:
            continue
        sd = levels.std(ddof=1).dropna()
        if sd.size >= 2:
            return column, (float(sd.min()), float(sd.max()))
    return None, None


def draw(data: VarianceData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    draw_cloud(ax, data.cloud)
    if math.isfinite(data.expected):
        draw_reference(
            ax, data.expected, label=f"expected under equal variance ({data.expected:.2f})"
        )
    smoother = draw_smoother(ax, data.smooth, label="binned mean of |t| ± 2 SE")
    draw_flagged(ax, data.flag_x, data.flag_y, data.flags.labels)
    ax.set_ylim(bottom=0)
    ax.set_xlabel(f"Fitted {data.outcome}")
    ax.set_ylabel("|Studentized residual|")
    finish_axes(ax, "Residual size along the fitted values", smoother)


def describe(data: VarianceData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    caption = (
        "Absolute studentized residuals against fitted values, with their binned mean and "
        f"±2 SE band; the grey line is the mean expected under equal variance "
        f"({data.expected:.2f}), and a rising or falling mean shows spread changing with "
        "the fitted value. "
    )
    if data.grouping is not None and data.group_sd is not None:
        low, high = data.group_sd
        caption += (
            f"Across the levels of {data.grouping} the residual SD ranges from "
            f"{format_number(low)} to {format_number(high)} (ratio "
            f"{format_number(high / low if low > 0 else float('inf'))}); levels are not "
            "drawn separately. "
        )
    caption = join_caption(caption, density_note(data.cloud), verdict_sentence(finding))
    shape = cloud_words(data.cloud, "absolute studentized residual", "fitted values")
    if data.smooth.empty:
        trend = "too few points for a binned mean"
    else:
        trend = (
            f"the binned mean of |t| runs from {format_number(float(data.smooth.mean.min()))} "
            f"to {format_number(float(data.smooth.mean.max()))} (expected "
            f"{data.expected:.2f} throughout under equal variance; largest to smallest "
            f"ratio {format_number(data.spread_ratio)})"
        )
    return caption, f"{shape}; {trend}; {flag_sentence(data.flags)}."
