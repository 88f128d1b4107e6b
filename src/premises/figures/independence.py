"""Independence: residuals in their declared order, or residual means by group.

With an ``order`` column, residuals are drawn in that order with a binned mean;
runs and waves show as a wandering mean, and the lag-1 autocorrelation of the
ordered residuals (Box & Jenkins 1970) is given in the title. With ``groups``,
each group's mean residual is drawn with +-2 SE bars (pooled residual SD) and
sorted; groups sharing something the model ignores spread wider than their
bars allow. Without either there is nothing to draw.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from premises.checks.base import CheckContext
from premises.errors import DataError
from premises.figures.base import BinnedMean, Cloud, FlagSet, bin_means, find_flags, make_cloud
from premises.figures.layers import (
    draw_cloud,
    draw_flagged,
    draw_reference,
    draw_smoother,
    finish_axes,
    new_axes,
)
from premises.figures.style import COLOURS
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

__all__ = ["GroupMeansData", "OrderData", "compute", "describe", "draw", "lag1_autocorrelation"]

MAX_GROUPS = 60
"""Groups drawn at most: the 30 lowest and 30 highest means."""

GROUP_MEASURES = ("design effect", "intraclass", "icc", "cluster")
"""Words in a measure's name that say it is about groups rather than order."""

TICK_GROUPS = 25
"""Up to this many groups, every group is named on the axis."""


@dataclass(frozen=True)
class OrderData:
    """Residuals against the declared order."""

    name: str
    order: str
    cloud: Cloud
    smooth: BinnedMean
    dates: bool
    """x holds days since 1970-01-01 (a date or time column)."""
    positional: bool
    """x is the position in the sorted order (the column was not numeric)."""
    lag1: float
    flag_x: np.ndarray
    flag_y: np.ndarray
    flags: FlagSet
    outcome: str


@dataclass(frozen=True)
class GroupMeansData:
    """Mean residual per group, sorted, at most ``MAX_GROUPS`` of them."""

    name: str
    groups: str
    labels: tuple[str, ...]
    mean: np.ndarray
    se: np.ndarray
    count: np.ndarray
    total_groups: int
    outside: int
    """Groups (of all) whose +-2 SE bar excludes zero."""
    outcome: str

    @property
    def beyond(self) -> np.ndarray:
        """Shown groups whose +-2 SE bar excludes zero."""
        return np.asarray(np.abs(self.mean) > 2.0 * self.se, dtype=bool)


def lag1_autocorrelation(resid: np.ndarray) -> float:
    """r1 = sum e_t e_(t-1) / sum e_t^2 of mean-centred residuals (Box & Jenkins 1970)."""
    e = np.asarray(resid, dtype=float)
    e = e[np.isfinite(e)]
    if e.size < 3:
        return float("nan")
    e = e - e.mean()
    denominator = float(e @ e)
    return float(e[1:] @ e[:-1]) / denominator if denominator > 0 else float("nan")


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> OrderData | GroupMeansData | None:
    """Residuals by order or by group, whichever the block declares, else None.

    With both declared, the view follows the finding's measure: a design effect
    or intraclass correlation is about groups, anything else about order.

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The independence finding.
    flags
        Points to mark in the order figure; default :func:`find_flags`.
    """
    order, groups = ctx.spec.order, ctx.spec.groups
    if order and groups:
        measure = (finding.measure.name if finding.measure else "").lower()
        if any(word in measure for word in GROUP_MEASURES):
            order = None
    if order:
        return _by_order(ctx, order, flags if flags is not None else find_flags(ctx, None))
    if groups:
        return _by_group(ctx, groups)
    return None


def _column(ctx: CheckContext, name: str, key: str) -> pd.Series:
    """A column of the analysed rows, or a DataError naming the block key."""
    if name not in ctx.frame.columns:
        raise DataError(
            f"The {key} column '{name}' is not among the analysed columns.",
            location=ctx.spec.locate(key),
            hint=f"Check the spelling of '{key}:' against the data file's header.",
        )
    return ctx.frame[name]


def _by_order(ctx: CheckContext, order: str, flags: FlagSet) -> OrderData:
    """Residuals against the order column (numbers, dates, or positions)."""
    column = _column(ctx, order, "order")
    resid = np.asarray(ctx.fit.resid, dtype=float)
    dates = pd.api.types.is_datetime64_any_dtype(column)
    positional = False
    if dates:
        stamps = pd.to_datetime(column).to_numpy(dtype="datetime64[ns]")
        x = (stamps - np.datetime64("1970-01-01", "ns")) / np.timedelta64(1, "D")
        x = np.asarray(x, dtype=float)
    elif pd.api.types.is_numeric_dtype(column):
        x = column.to_numpy(dtype=float)
    else:
        positional = True
        codes = column.astype(str).to_numpy()
        x = np.empty(codes.size)
        x[np.argsort(codes, kind="stable")] = np.arange(1, codes.size + 1)
    sequence = np.argsort(x, kind="stable")
    return OrderData(
        name="independence",
        order=order,
        cloud=make_cloud(x, resid),
        smooth=bin_means(x, resid),
        dates=dates,
        positional=positional,
        lag1=lag1_autocorrelation(resid[sequence]),
        flag_x=x[flags.index],
        flag_y=resid[flags.index],
        flags=flags,
        outcome=ctx.fit.design.outcome,
    )


def _by_group(ctx: CheckContext, groups: str) -> GroupMeansData:
    """Group means of the residuals with +-2 SE from the pooled residual SD."""
    column = _column(ctx, groups, "groups")
    resid = pd.Series(np.asarray(ctx.fit.resid, dtype=float))
    summary = resid.groupby(column.astype(str).to_numpy(), sort=True).agg(["mean", "count"])
    sd = float(np.sqrt(ctx.fit.sigma2))
    mean = summary["mean"].to_numpy(dtype=float)
    count = summary["count"].to_numpy(dtype=float)
    se = sd / np.sqrt(count)
    labels = np.asarray(summary.index.astype(str))
    sequence = np.argsort(mean, kind="stable")
    if sequence.size > MAX_GROUPS:
        half = MAX_GROUPS // 2
        sequence = np.concatenate([sequence[:half], sequence[-half:]])
    return GroupMeansData(
        name="independence",
        groups=groups,
        labels=tuple(str(v) for v in labels[sequence]),
        mean=mean[sequence],
        se=se[sequence],
        count=count[sequence].astype(np.intp),
        total_groups=int(mean.size),
        outside=int(np.sum(np.abs(mean) > 2.0 * se)),
        outcome=ctx.fit.design.outcome,
    )


def draw(data: OrderData | GroupMeansData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    if isinstance(data, GroupMeansData):
        _draw_groups(data, fig)
        return
    ax = new_axes(fig)
    draw_cloud(ax, data.cloud)
    draw_reference(ax, 0.0)
    smoother = draw_smoother(ax, data.smooth)
    draw_flagged(ax, data.flag_x, data.flag_y, data.flags.labels)
    if data.dates:
        ax.xaxis_date()
    ax.set_xlabel(f"Position in {data.order} order" if data.positional else data.order)
    ax.set_ylabel(f"Residual ({data.outcome})")
    finish_axes(
        ax,
        f"Residuals in {data.order} order (lag-1 autocorrelation {data.lag1:.2f})",
        smoother,
    )


def _draw_groups(data: GroupMeansData, fig: Figure) -> None:
    """Sorted group means with +-2 SE bars; groups clear of zero in vermillion."""
    ax = new_axes(fig)
    x = np.arange(data.mean.size)
    out = data.beyond
    draw_reference(ax, 0.0)
    for mask, colour, label in (
        (~out, COLOURS["points"], "mean ± 2 SE, covers zero"),
        (out, COLOURS["flag"], "mean ± 2 SE, clear of zero"),
    ):
        if not mask.any():
            continue
        ax.errorbar(
            x[mask],
            data.mean[mask],
            yerr=2.0 * data.se[mask],
            fmt="o",
            markersize=3.5,
            color=colour,
            ecolor=colour,
            elinewidth=1.0,
            capsize=0,
            zorder=3,
            label=label,
        )
    hidden = data.total_groups - data.mean.size
    if hidden > 0:
        # The lowest and highest halves meet here; mark the gap so it is not read as adjacent.
        gap = data.mean.size / 2 - 0.5
        ax.axvline(gap, color=COLOURS["grid"], linewidth=4.0, zorder=1)
        ax.annotate(
            f"{hidden} groups\nnot shown",
            xy=(gap, 0.0),
            xycoords=("data", "axes fraction"),
            xytext=(0, 3),
            textcoords="offset points",
            ha="center",
            va="bottom",
            fontsize=6.5,
            color=COLOURS["text"],
        )
    if data.mean.size <= TICK_GROUPS:
        ax.set_xticks(
            x,
            data.labels,
            rotation=45 if data.mean.size > 8 else 0,
            ha="right" if data.mean.size > 8 else "center",
        )
    else:
        ax.set_xticks([])
        for i in np.flatnonzero(out):
            above = data.mean[i] > 0
            ax.annotate(
                data.labels[i],
                xy=(x[i], data.mean[i] + (2 if above else -2) * data.se[i]),
                xytext=(0, 3 if above else -3),
                textcoords="offset points",
                ha="center",
                va="bottom" if above else "top",
                fontsize=6.5,
                rotation=90,
                color=COLOURS["flag_text"],
            )
    shown = data.mean.size
    ax.set_xlabel(
        f"{data.groups}, sorted by mean residual"
        + ("" if shown == data.total_groups else f" ({shown} most extreme of {data.total_groups})")
    )
    ax.set_ylabel(f"Mean residual ({data.outcome})")
    finish_axes(ax, f"Mean residual by {data.groups}")


def describe(data: OrderData | GroupMeansData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    if isinstance(data, GroupMeansData):
        shown = data.mean.size
        subset = (
            ""
            if shown == data.total_groups
            else (f" (the {shown} with the lowest and highest means of {data.total_groups})")
        )
        caption = (
            f"Mean residual for each level of {data.groups}{subset}, sorted, with ±2 SE bars "
            "from the pooled residual SD; with independent errors about 1 group in 20 has a "
            "bar clear of zero by chance. " + verdict_sentence(finding)
        )
        alt = (
            f"Dot chart of mean residuals for {data.total_groups} groups of {data.groups}"
            f"{subset}, ranging from {format_number(float(data.mean.min()))} to "
            f"{format_number(float(data.mean.max()))}; {data.outside} of {data.total_groups} "
            "groups have a ±2 SE bar that excludes zero."
        )
        return caption, alt
    caption = join_caption(
        f"Residuals in {data.order} order with a binned mean and its ±2 SE band; waves or "
        "runs in the mean show errors that depend on their neighbours. Lag-1 "
        f"autocorrelation of the ordered residuals: {data.lag1:.2f}.",
        density_note(data.cloud),
        verdict_sentence(finding),
    )
    shape = cloud_words(data.cloud, "residual", f"{data.order}")
    alt = f"{shape}; the lag-1 autocorrelation is {data.lag1:.2f}; {flag_sentence(data.flags)}."
    return caption, alt
