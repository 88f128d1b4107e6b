"""Drawing layers shared by the figures, and writing a figure to disk byte-stably.

matplotlib is imported inside functions only, so importing premises stays fast;
pyplot is never used: figures are ``matplotlib.figure.Figure`` objects on an Agg
canvas, and nothing is registered in a global figure manager.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
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
    "finish_axes",
    "new_axes",
    "place_labels",
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
    rc: Any = RC_PARAMS  # matplotlib types the keys as literals; ours are checked by use
    with matplotlib.rc_context(rc):
        fig = new_figure(options)
        draw(data, fig)
        _write_atomically(fig, path, fmt, options.dpi)


def _write_atomically(fig: Figure, path: Path, fmt: str, dpi: int) -> None:
    """Draw into memory, then write through :func:`premises.files.atomic_write_bytes`."""
    import io

    from premises.files import atomic_write_bytes

    buffer = io.BytesIO()
    fig.savefig(buffer, format=fmt, dpi=dpi, metadata=METADATA[fmt])
    atomic_write_bytes(path, buffer.getvalue())


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
        "premises-density",
        [COLOURS["density_low"], COLOURS["density_mid"], COLOURS["density_high"]],
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


def draw_smoother(
    ax: Axes, binned: BinnedMean, label: str = "binned mean ± 2 SE"
) -> tuple[Any, Any] | None:
    """The binned mean as a line through bin centres, with its +-2 SE band.

    Returns the (band, line) artists so the legend can show them as one entry.
    """
    from matplotlib import patheffects

    if binned.empty:
        return None
    ok = np.isfinite(binned.se)
    band = ax.fill_between(
        binned.centre[ok],
        binned.low[ok],
        binned.high[ok],
        color=COLOURS["band"],
        alpha=BAND_ALPHA,
        linewidth=0,
        zorder=3,
    )
    (line,) = ax.plot(
        binned.centre,
        binned.mean,
        color=COLOURS["smoother"],
        linewidth=1.8,
        marker="o" if binned.centre.size <= 15 else None,
        markersize=3.0,
        label=label,
        zorder=4,
        # A white outline keeps the line legible over a dense cloud.
        path_effects=[patheffects.withStroke(linewidth=3.6, foreground="white")],
    )
    return band, line


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
        zorder=6,
    )
    # A fixed-size stand-in, so the legend key does not take the largest point's size.
    ax.scatter(
        [], [], s=18.0, facecolors="none", edgecolors=COLOURS["flag"], linewidths=1.1, label=label
    )
    place_labels(ax, x[:MAX_LABELS], y[:MAX_LABELS], labels[:MAX_LABELS], avoid=(x, y))


def _offsets() -> tuple[tuple[float, float, str, str], ...]:
    """Candidate label offsets (points): eight directions, near first, then farther out."""
    out: list[tuple[float, float, str, str]] = []
    for r in (5.0, 14.0):
        out += [
            (r, r * 0.8, "left", "bottom"),
            (r, -r * 0.8, "left", "top"),
            (-r, r * 0.8, "right", "bottom"),
            (-r, -r * 0.8, "right", "top"),
            (r, 0.0, "left", "center"),
            (-r, 0.0, "right", "center"),
            (0.0, r * 1.4, "center", "bottom"),
            (0.0, -r * 1.4, "center", "top"),
        ]
    return tuple(out)


_OFFSETS = _offsets()
Box = tuple[float, float, float, float]


def place_labels(
    ax: Axes,
    x: np.ndarray,
    y: np.ndarray,
    labels: Sequence[str],
    avoid: tuple[np.ndarray, np.ndarray] | None = None,
) -> None:
    """Label points with their ids, choosing per label the offset that overlaps least.

    A greedy search over sixteen offsets, with text boxes estimated from the text
    length, that avoids earlier labels, the marked points in ``avoid`` and the
    axes edges. Far offsets get a thin leader line. Cheap and deterministic; good
    enough for the handful of labels we allow.
    """
    if len(labels) == 0:
        return
    ax.autoscale_view()
    fig = ax.get_figure(root=True)
    assert fig is not None
    scale = fig.dpi / 72.0
    size = 7.5
    height = size * 1.2 * scale
    corners = ax.transAxes.transform([(0, 0), (1, 1)])
    anchors = ax.transData.transform(np.column_stack([x, y]))
    dot = 3.5 * scale
    placed: list[Box] = []
    if avoid is not None and len(avoid[0]):
        for qx, qy in ax.transData.transform(np.column_stack(avoid)):
            placed.append((qx - dot, qy - dot, qx + dot, qy + dot))
    for (px, py), xi, yi, text in zip(anchors, x, y, labels):
        width = len(text) * size * 0.6 * scale
        best: tuple[float, tuple[float, float, str, str], Box]
        best = (np.inf, _OFFSETS[0], (0.0, 0.0, 0.0, 0.0))
        for rank, offset in enumerate(_OFFSETS):
            box = _label_box(px, py, offset, width, height, scale)
            cost = sum(_overlap(box, other) for other in placed) + _outside(box, corners)
            cost += rank * 1e-3  # ties go to the nearer, earlier offset
            if cost < best[0]:
                best = (cost, offset, box)
            if cost < 1.0:
                break
        _, (dx, dy, ha, va), box = best
        placed.append(box)
        far = abs(dx) > 8 or abs(dy) > 12
        ax.annotate(
            text,
            xy=(float(xi), float(yi)),
            xytext=(dx, dy),
            textcoords="offset points",
            ha=ha,
            va=va,
            fontsize=size,
            color=COLOURS["flag_text"],
            zorder=7,
            annotation_clip=False,
            arrowprops=(
                {
                    "arrowstyle": "-",
                    "color": COLOURS["flag_text"],
                    "linewidth": 0.5,
                    "shrinkA": 0,
                    "shrinkB": 3,
                }
                if far
                else None
            ),
        )


def _label_box(
    px: float, py: float, offset: tuple[float, float, str, str], w: float, h: float, scale: float
) -> Box:
    """Display-space box (x0, y0, x1, y1) a label would take at ``offset``."""
    dx, dy, ha, va = offset
    x = px + dx * scale
    y = py + dy * scale
    x0 = {"left": x, "right": x - w, "center": x - w / 2}[ha]
    y0 = {"bottom": y, "top": y - h, "center": y - h / 2}[va]
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


def finish_axes(ax: Axes, title: str, smoother: tuple[Any, Any] | None = None) -> None:
    """Title at the top left and, beneath it, the legend in rows above the plot area.

    Above the axes the legend can never cover a point or a label. A smoother's
    line and band share one legend entry.
    """
    artists, names = ax.get_legend_handles_labels()
    handles: list[Any] = list(artists)
    if smoother is not None:
        band, line = smoother
        handles = [(band, line) if h is line else h for h in handles]
    rows = 0
    if handles:
        ncols = _legend_columns(names, ax)
        rows = -(-len(handles) // ncols)
        ax.legend(
            handles,
            names,
            loc="lower left",
            bbox_to_anchor=(0.0, 1.0),
            ncols=ncols,
            borderaxespad=0.3,
            borderpad=0.1,
            handlelength=1.8,
            columnspacing=1.4,
            handletextpad=0.5,
        )
    ax.set_title(title, loc="left", pad=6.0 + 12.0 * rows)


def _legend_columns(names: Sequence[str], ax: Axes) -> int:
    """Most columns whose widest row still fits the axes width (text width estimated)."""
    fig = ax.get_figure(root=True)
    assert fig is not None
    available = fig.get_figwidth() * 72.0 * 0.85  # points
    widths = [len(name) * 7.5 * 0.55 + 7.5 * 3.6 for name in names]
    for ncols in range(len(names), 0, -1):
        rows = -(-len(names) // ncols)
        columns = [widths[c * rows : (c + 1) * rows] for c in range(ncols)]
        if sum(max(col) for col in columns if col) <= available:
            return ncols
    return 1
