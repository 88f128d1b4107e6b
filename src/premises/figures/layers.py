"""Drawing layers shared by the figures, and writing a figure to disk byte-stably.

matplotlib is imported inside functions only, so importing premises stays fast;
pyplot is never used: figures are ``matplotlib.figure.Figure`` objects on an Agg
canvas, and nothing is registered in a global figure manager.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Sequence
from contextlib import suppress
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import numpy as np

from premises.errors import SpecError
from premises.figures.base import BinnedMean, Cloud
from premises.figures.style import (
    ASPECT,
    BAND_ALPHA,
    COLOURS,
    MAX_LABELS,
    RASTER_ABOVE,
    RC_PARAMS,
    point_alpha,
    point_size,
    style_axes,
)
from premises.spec import FIGURE_FORMATS, FigureOptions

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = [
    "METADATA",
    "draw_cloud",
    "draw_flagged",
    "draw_reference",
    "draw_smoother",
    "new_axes",
    "render_to_file",
]

D = TypeVar("D")

METADATA: dict[str, dict[str, str | None]] = {
    "png": {"Software": None},
    "svg": {"Date": None, "Creator": None},
    "pdf": {"CreationDate": None, "ModDate": None, "Producer": None, "Creator": None},
}
"""Per-format metadata that would otherwise stamp a version or a time into the bytes."""


def new_figure(options: FigureOptions) -> Figure:
    """A blank figure of the block's width (height = ASPECT x width) on an Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(
        figsize=(options.width, options.width * ASPECT), dpi=options.dpi, layout="constrained"
    )
    FigureCanvasAgg(fig)
    return fig


def new_axes(fig: Figure) -> Axes:
    """The single axes of a figure, in the house style."""
    ax = fig.add_subplot(1, 1, 1)
    style_axes(ax)
    return ax


def render_to_file(
    draw: Callable[[D, Figure], None], data: D, path: Path, options: FigureOptions
) -> None:
    """Draw ``data`` into a new figure and write it to ``path`` atomically.

    The style is applied through a local ``rc_context``; metadata that would carry a
    date or a version is dropped so the same data give the same bytes.
    """
    import matplotlib

    fmt = options.format
    if fmt not in FIGURE_FORMATS:
        raise SpecError(
            f"The figure format must be one of {', '.join(FIGURE_FORMATS)}; got '{fmt}'.",
            hint="Set figures: {format: png} (or svg, pdf) in the block.",
        )
    with matplotlib.rc_context(RC_PARAMS):
        fig = new_figure(options)
        draw(data, fig)
        _write_atomically(fig, path, fmt, options.dpi)


def _write_atomically(fig: Figure, path: Path, fmt: str, dpi: int) -> None:
    """Save to a temporary file in the target folder, then rename over the target."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            fig.savefig(handle, format=fmt, dpi=dpi, metadata=METADATA[fmt])
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; figures are meant to be served
        os.replace(tmp, path)
    except BaseException:
        with suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


# ---------------------------------------------------------------------------- layers


def draw_cloud(ax: Axes, cloud: Cloud, label: str | None = None) -> None:
    """Points, or above the large-n threshold a log-shaded 2-D histogram image.

    Both are rasterised inside SVG/PDF once they are large, so vector files stay small.
    """
    if cloud.dense:
        _draw_density(ax, cloud)
        return
    assert cloud.x is not None and cloud.y is not None
    ax.scatter(
        cloud.x,
        cloud.y,
        s=point_size(cloud.n),
        c=COLOURS["points"],
        alpha=point_alpha(cloud.n),
        linewidths=0,
        rasterized=cloud.n > RASTER_ABOVE,
        label=label,
        zorder=2,
    )


def _draw_density(ax: Axes, cloud: Cloud) -> None:
    """The 2-D histogram as an image; empty cells stay white."""
    from matplotlib.colors import LinearSegmentedColormap, LogNorm

    assert cloud.counts is not None and cloud.extent is not None
    cmap = LinearSegmentedColormap.from_list(
        "premises-density", [COLOURS["density_low"], COLOURS["points"], COLOURS["density_high"]]
    )
    counts = np.ma.masked_equal(cloud.counts, 0)
    ax.imshow(
        counts,
        extent=cloud.extent,
        origin="lower",
        aspect="auto",
        cmap=cmap,
        norm=LogNorm(vmin=1, vmax=max(2, int(cloud.counts.max()))),
        interpolation="nearest",
        rasterized=True,
        zorder=1,
    )


def draw_smoother(ax: Axes, binned: BinnedMean, label: str = "binned mean ± 2 SE") -> None:
    """The binned mean as a line through bin centres, with its +-2 SE band."""
    if binned.empty:
        return
    ok = np.isfinite(binned.se)
    ax.fill_between(
        binned.centre[ok],
        binned.low[ok],
        binned.high[ok],
        color=COLOURS["band"],
        alpha=BAND_ALPHA,
        linewidth=0,
        zorder=3,
    )
    ax.plot(
        binned.centre,
        binned.mean,
        color=COLOURS["smoother"],
        linewidth=1.8,
        marker="o",
        markersize=3.0,
        label=label,
        zorder=4,
    )


def draw_reference(ax: Axes, y: float = 0.0, label: str | None = None) -> None:
    """A thin solid grey horizontal reference line."""
    ax.axhline(y, color=COLOURS["reference"], linewidth=0.9, zorder=2.5, label=label)


def draw_flagged(
    ax: Axes,
    x: np.ndarray,
    y: np.ndarray,
    labels: Sequence[str],
    sizes: np.ndarray | None = None,
    label: str = "flagged",
) -> None:
    """Flagged points in vermillion on top of everything; the first MAX_LABELS get text."""
    if len(x) == 0:
        return
    ax.scatter(
        x,
        y,
        s=18.0 if sizes is None else sizes,
        facecolors="none",
        edgecolors=COLOURS["flag"],
        linewidths=1.1,
        label=label,
        zorder=6,
    )
    place_labels(ax, x[:MAX_LABELS], y[:MAX_LABELS], labels[:MAX_LABELS])


_OFFSETS: tuple[tuple[float, float, str, str], ...] = (
    (5, 4, "left", "bottom"),
    (5, -4, "left", "top"),
    (-5, 4, "right", "bottom"),
    (-5, -4, "right", "top"),
    (0, 8, "center", "bottom"),
    (0, -8, "center", "top"),
)


def place_labels(ax: Axes, x: np.ndarray, y: np.ndarray, labels: Sequence[str]) -> None:
    """Label points with their ids, choosing per label the offset that overlaps least.

    A greedy search over six offsets with boxes estimated from the text length:
    cheap, deterministic, and good enough for the handful of labels we allow.
    """
    if len(labels) == 0:
        return
    ax.autoscale_view()
    fig = ax.get_figure()
    assert fig is not None
    scale = fig.dpi / 72.0
    size = 7.5
    height = size * 1.2 * scale
    corners = ax.transAxes.transform([(0, 0), (1, 1)])
    anchors = ax.transData.transform(np.column_stack([x, y]))
    placed: list[tuple[float, float, float, float]] = []
    for (px, py), text in zip(anchors, labels):
        width = len(text) * size * 0.6 * scale
        best: tuple[float, tuple[float, float, str, str], tuple[float, float, float, float]]
        best = (np.inf, _OFFSETS[0], (0.0, 0.0, 0.0, 0.0))
        for offset in _OFFSETS:
            box = _label_box(px, py, offset, width, height, scale)
            cost = sum(_overlap(box, other) for other in placed) + _outside(box, corners)
            if cost < best[0]:
                best = (cost, offset, box)
            if cost == 0:
                break
        _, (dx, dy, ha, va), box = best
        placed.append(box)
        ax.annotate(
            text,
            xy=(float(ax.transData.inverted().transform((px, py))[0]),
                float(ax.transData.inverted().transform((px, py))[1])),
            xytext=(dx, dy),
            textcoords="offset points",
            ha=ha,
            va=va,
            fontsize=size,
            color=COLOURS["flag_text"],
            zorder=7,
            annotation_clip=False,
        )


def _label_box(
    px: float, py: float, offset: tuple[float, float, str, str], w: float, h: float, scale: float
) -> tuple[float, float, float, float]:
    """Display-space box (x0, y0, x1, y1) a label would take at ``offset``."""
    dx, dy, ha, va = offset
    x = px + dx * scale
    y = py + dy * scale
    x0 = {"left": x, "right": x - w, "center": x - w / 2}[ha]
    y0 = {"bottom": y, "top": y - h}[va]
    return (x0, y0, x0 + w, y0 + h)


def _overlap(a: tuple[float, float, float, float], b: tuple[float, float, float, float]) -> float:
    """Area shared by two boxes."""
    w = min(a[2], b[2]) - max(a[0], b[0])
    h = min(a[3], b[3]) - max(a[1], b[1])
    return max(w, 0.0) * max(h, 0.0)


def _outside(box: tuple[float, float, float, float], corners: Any) -> float:
    """Area of ``box`` outside the axes (weighted so it is avoided first)."""
    (ax0, ay0), (ax1, ay1) = corners
    inside = _overlap(box, (ax0, ay0, ax1, ay1))
    return 4.0 * ((box[2] - box[0]) * (box[3] - box[1]) - inside)


def add_legend(ax: Axes, loc: str = "best") -> None:
    """A small frameless legend, if anything was labelled."""
    handles, names = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, names, loc=loc, handlelength=1.6, borderaxespad=0.3)
