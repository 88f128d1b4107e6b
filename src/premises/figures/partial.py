"""Linearity, term by term: component-plus-residual plots for numeric predictors.

For a numeric term x_j the partial residual is b_j (x_j - mean x_j) + e (Larsen &
McCleary 1972; Wood 1973). Against x_j it scatters around the straight line of
slope b_j when the term enters linearly; a binned mean bending away from that
line shows the shape the model missed, and in which predictor.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import BinnedMean, Cloud, FlagSet, bin_means, find_flags, make_cloud
from premises.figures.layers import draw_cloud, draw_flagged, draw_smoother, finish_axes, new_axes
from premises.figures.style import COLOURS
from premises.figures.wording import (
    cloud_words,
    density_note,
    flag_sentence,
    format_number,
    join_caption,
    slugify,
    verdict_sentence,
)
from premises.formula import Design
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["MAX_PARTIAL_FIGURES", "PartialData", "compute", "describe", "draw", "numeric_terms"]

MAX_PARTIAL_FIGURES = 12
"""Component-plus-residual plots drawn per block at most (the first terms of the
formula); the last one's caption names the terms left without a plot. A bound on
the files and the time one block can cost (common practice in this tool)."""


@dataclass(frozen=True)
class PartialData:
    """One component-plus-residual figure."""

    name: str
    term: str
    slope: float
    x_mean: float
    x_range: tuple[float, float]
    cloud: Cloud
    smooth: BinnedMean
    flag_x: np.ndarray
    flag_y: np.ndarray
    flags: FlagSet
    resid_sd: float
    max_bend_sd: float
    """Largest gap between the binned mean and the straight line, in residual SDs."""
    not_drawn: tuple[str, ...] = ()
    """Numeric terms beyond ``MAX_PARTIAL_FIGURES`` that get no plot (on the last figure only)."""


def numeric_terms(design: Design) -> tuple[tuple[str, int], ...]:
    """(term, design column) for terms that are one numeric column, alone in their data.

    Factors, interactions and terms whose data columns another term also uses (say
    ``x`` beside ``I(x**2)``) are left out: their component alone is not the
    effect of moving that predictor, so the straight line would mislead.
    """
    uses: dict[str, int] = {}
    for _, columns in design.term_columns:
        for column in columns:
            uses[column] = uses.get(column, 0) + 1
    columns_of = dict(design.term_columns)
    found: list[tuple[str, int]] = []
    for term, start, stop in design.term_slices:
        if term == "Intercept" or stop - start != 1 or ":" in term:
            continue
        if design.column_names[start] != term:
            continue  # a two-level factor also spans one column, named term[T.level]
        if any(uses.get(column, 0) > 1 for column in columns_of.get(term, ())):
            continue
        found.append((term, start))
    return tuple(found)


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> tuple[PartialData, ...]:
    """One :class:`PartialData` per numeric term (empty when the model has none).

    Parameters
    ----------
    ctx
        The fitted block.
    finding
        The linearity finding.
    flags
        Points to mark; default: :func:`find_flags` without an influence finding.
    """
    flags = flags if flags is not None else find_flags(ctx, None)
    fit = ctx.fit
    resid = np.asarray(fit.resid, dtype=float)
    sd = float(np.sqrt(fit.sigma2)) if fit.sigma2 > 0 else float(np.nanstd(resid))
    names: set[str] = set()
    out: list[PartialData] = []
    terms = numeric_terms(fit.design)
    for term, column in terms[:MAX_PARTIAL_FIGURES]:
        # A contiguous copy of the column: strided reads are several times slower.
        x = np.ascontiguousarray(fit.design.X[:, column], dtype=float)
        slope = float(fit.params[column])
        centre = float(x.mean())  # design columns are finite
        partial = slope * (x - centre) + resid
        smooth = bin_means(x, partial)
        line = slope * (smooth.centre - centre)
        bend = float(np.max(np.abs(smooth.mean - line)) / sd) if not smooth.empty and sd else 0.0
        out.append(
            PartialData(
                name=_unique_name(f"partial-{slugify(term)}", names),
                term=term,
                slope=slope,
                x_mean=centre,
                x_range=(float(x.min()), float(x.max())),
                cloud=make_cloud(x, partial),
                smooth=smooth,
                flag_x=x[flags.index],
                flag_y=partial[flags.index],
                flags=flags,
                resid_sd=sd,
                max_bend_sd=bend,
            )
        )
    skipped = tuple(term for term, _ in terms[MAX_PARTIAL_FIGURES:])
    if skipped:
        out[-1] = replace(out[-1], not_drawn=skipped)
    return tuple(out)


def _unique_name(name: str, taken: set[str]) -> str:
    """``name``, or ``name-2``, ``name-3`` ... if two terms slugify alike."""
    candidate, k = name, 1
    while candidate in taken:
        k += 1
        candidate = f"{name}-{k}"
    taken.add(candidate)
    return candidate


def draw(data: PartialData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    draw_cloud(ax, data.cloud)
    x0, x1 = data.x_range
    xs = np.array([x0, x1])
    ax.plot(
        xs,
        data.slope * (xs - data.x_mean),
        color=COLOURS["threshold"],
        linewidth=1.1,
        label=f"fitted linear effect (slope {format_number(data.slope)})",
        zorder=3.5,
    )
    smoother = draw_smoother(ax, data.smooth, label="binned mean of partial residuals ± 2 SE")
    draw_flagged(ax, data.flag_x, data.flag_y, data.flags.labels)
    ax.set_xlabel(data.term)
    ax.set_ylabel("Component + residual")
    finish_axes(ax, f"Component plus residual for {data.term}", smoother)


def _not_drawn_note(terms: tuple[str, ...]) -> str:
    if not terms:
        return ""
    listed = ", ".join(terms[:5]) + (f" and {len(terms) - 5} more" if len(terms) > 5 else "")
    return (
        f"A block draws at most {MAX_PARTIAL_FIGURES} of these plots; {len(terms)} further "
        f"numeric term{'s' if len(terms) != 1 else ''} ({listed}) {'have' if len(terms) != 1 else 'has'} none."
    )


def describe(data: PartialData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    caption = join_caption(
        f"Component-plus-residual plot for {data.term}: the straight line is the fitted "
        f"linear effect (slope {format_number(data.slope)}), the curve the binned mean of "
        "the partial residuals with its ±2 SE band; a curve that bends away from the line "
        f"shows the shape the model misses in {data.term}.",
        density_note(data.cloud),
        verdict_sentence(finding),
        _not_drawn_note(data.not_drawn),
    )
    shape = cloud_words(data.cloud, "partial residual", data.term)
    if data.smooth.empty:
        trend = "too few points for a binned mean"
    else:
        trend = (
            f"the binned mean departs from the straight line by at most "
            f"{format_number(data.max_bend_sd, 2)} residual SD"
        )
    return caption, f"{shape}; {trend}; {flag_sentence(data.flags)}."
