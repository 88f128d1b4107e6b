"""Normality: a Q-Q plot of externally studentized residuals with a simulation envelope.

Under the model each externally studentized residual follows Student's t with
n - p - 1 df (Belsley, Kuh & Welsch 1980, sec. 2.1). The envelope is the pointwise
95% range of the order statistics of n such values, simulated (seeded) through
the Beta law of uniform order statistics: U_(k) ~ Beta(k, n - k + 1) (David &
Nagaraja 2003, sec. 2.2, from memory), then T_(k) = F_t^-1(U_(k)). Simulating
only the plotted order statistics keeps the cost independent of n. Correlation
between residuals is ignored, as in the usual envelopes once n is moderate
(Atkinson 1985 simulates through the hat matrix; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from premises.checks.base import CheckContext
from premises.figures.base import FlagSet, find_flags
from premises.figures.layers import draw_flagged, finish_axes, new_axes
from premises.figures.style import BAND_ALPHA, COLOURS, MAX_QUANTILES, point_alpha, point_size
from premises.figures.wording import flag_sentence, format_number, points_word, verdict_sentence
from premises.results import Finding

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["ENVELOPE_DRAWS", "NormalityData", "compute", "describe", "draw", "plotted_ranks"]

ENVELOPE_DRAWS = 99
"""Simulated samples behind the envelope (common practice: 99 gives 1-in-100 resolution)."""

TAIL_KEPT = 100
"""When thinning, every order statistic this close to either end is kept."""


@dataclass(frozen=True)
class NormalityData:
    """Everything the Q-Q figure draws."""

    name: str
    n: int
    """Finite studentized residuals."""
    df: float
    theoretical: np.ndarray
    """(k,) standard normal quantiles at the plotted ranks (Blom positions)."""
    sample: np.ndarray
    """(k,) ordered studentized residuals at those ranks."""
    low: np.ndarray
    high: np.ndarray
    """(k,) pointwise 2.5% and 97.5% of the simulated order statistics."""
    flag_x: np.ndarray
    flag_y: np.ndarray
    flags: FlagSet
    outside: int
    """Plotted points outside the envelope."""


def plotted_ranks(n: int, limit: int = MAX_QUANTILES) -> np.ndarray:
    """0-based ranks to plot: all of them up to ``limit``, else both tails plus an even spread."""
    if n <= limit:
        return np.arange(n)
    tail = min(TAIL_KEPT, n // 4)
    middle = np.round(np.linspace(tail, n - tail - 1, max(limit - 2 * tail, 2))).astype(np.intp)
    return np.unique(np.concatenate([np.arange(tail), middle, np.arange(n - tail, n)]))


def compute(
    ctx: CheckContext, finding: Finding, flags: FlagSet | None = None
) -> NormalityData | None:
    """Ordered studentized residuals, their normal quantiles and the seeded envelope.

    Parameters
    ----------
    ctx
        The fitted block (``ctx.seed`` seeds the envelope).
    finding
        The normality finding.
    flags
        Points to mark; default: :func:`find_flags` without an influence finding.

    Returns
    -------
    NormalityData or None
        None with fewer than three defined studentized residuals.
    """
    from scipy.special import ndtri, stdtrit  # lazy: scipy is heavy at start-up

    flags = flags if flags is not None else find_flags(ctx, None)
    t = np.asarray(ctx.influence.studentized_external, dtype=float)
    finite = t[np.isfinite(t)]
    n = int(finite.size)
    if n < 3:
        return None
    ordered = np.sort(finite)
    df = float(max(ctx.fit.n - ctx.fit.p - 1, 1))
    ranks = plotted_ranks(n)
    flag_t = t[flags.index]
    flag_ok = np.isfinite(flag_t)
    flag_ranks = np.minimum(np.searchsorted(ordered, flag_t[flag_ok]), n - 1)
    ranks = np.union1d(ranks, flag_ranks)
    k = ranks + 1.0
    theoretical = ndtri((k - 0.375) / (n + 0.25))  # Blom (1958) plotting positions
    rng = np.random.default_rng(ctx.seed)
    u = rng.beta(k, n - k + 1.0, size=(ENVELOPE_DRAWS, k.size))
    simulated = stdtrit(df, u)
    low, high = np.quantile(simulated, [0.025, 0.975], axis=0)
    sample = ordered[ranks]
    outside = int(np.sum((sample < low) | (sample > high)))
    return NormalityData(
        name="normality",
        n=n,
        df=df,
        theoretical=theoretical,
        sample=sample,
        low=low,
        high=high,
        flag_x=ndtri((flag_ranks + 1.0 - 0.375) / (n + 0.25)),
        flag_y=flag_t[flag_ok],
        flags=_defined_only(flags, flag_ok),
        outside=outside,
    )


def _defined_only(flags: FlagSet, ok: np.ndarray) -> FlagSet:
    """The flags whose studentized residual is defined (leverage-1 points cannot be placed)."""
    return FlagSet(
        index=flags.index[ok],
        labels=tuple(label for label, keep in zip(flags.labels, ok) if keep),
        total=flags.total - int((~ok).sum()),
        undefined=flags.undefined,
    )


def draw(data: NormalityData, fig: Figure) -> None:
    """Draw the figure on ``fig``."""
    ax = new_axes(fig)
    ax.fill_between(
        data.theoretical,
        data.low,
        data.high,
        color=COLOURS["envelope"],
        alpha=BAND_ALPHA + 0.1,
        linewidth=0,
        label="95% simulation envelope",
        zorder=1,
    )
    # The identity line spans the normal quantiles only, so it does not stretch the x axis.
    reach = float(np.max(np.abs(data.theoretical))) * 1.05
    ax.plot(
        [-reach, reach],
        [-reach, reach],
        color=COLOURS["reference"],
        linewidth=0.9,
        zorder=2,
        label="identity (exactly normal)",
    )
    ax.scatter(
        data.theoretical,
        data.sample,
        s=point_size(data.theoretical.size),
        c=COLOURS["points"],
        alpha=max(point_alpha(data.theoretical.size), 0.6),
        linewidths=0,
        zorder=3,
    )
    draw_flagged(ax, data.flag_x, data.flag_y, data.flags.labels)
    ax.set_xlabel("Normal quantile")
    ax.set_ylabel("Studentized residual")
    finish_axes(ax, "Ordered residuals against normal quantiles")


def describe(data: NormalityData, finding: Finding) -> tuple[str, str]:
    """Caption and alt text."""
    plotted = data.theoretical.size
    thinned = "" if plotted >= data.n else f" ({plotted:,} of them plotted, both tails in full)"
    caption = (
        "Q-Q plot of externally studentized residuals against normal quantiles; the band is "
        f"the pointwise 95% range of {ENVELOPE_DRAWS} simulated samples from the fitted model's "
        f"t distribution ({format_number(data.df)} df), so points leaving it depart from "
        "normal errors by more than chance. " + verdict_sentence(finding)
    )
    alt = (
        f"Q-Q plot of {points_word(data.n, 'studentized residual')}{thinned} against normal "
        f"quantiles with a shaded simulation envelope; {data.outside:,} of {plotted:,} plotted "
        f"points fall outside the envelope; the largest residual is "
        f"{format_number(float(data.sample.max()))} and the smallest "
        f"{format_number(float(data.sample.min()))}; {flag_sentence(data.flags)}."
    )
    return caption, alt
