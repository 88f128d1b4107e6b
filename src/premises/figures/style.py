"""The look of every premises figure: palette, sizes, fonts and axes styling.

The palette is drawn from Okabe & Ito (2008), "Color Universal Design", whose
eight colours stay distinguishable under the common forms of colour-vision
deficiency; the assignment of colours to roles is ours. No pure red is used.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # matplotlib is imported lazily at draw time
    from matplotlib.axes import Axes

__all__ = [
    "ASPECT",
    "BAND_ALPHA",
    "COLOURS",
    "FONT_FAMILY",
    "LARGE_N",
    "MAX_FLAGGED_DRAWN",
    "MAX_LABELS",
    "MAX_QUANTILES",
    "RASTER_ABOVE",
    "RC_PARAMS",
    "SVG_HASH_SALT",
    "point_alpha",
    "point_size",
    "style_axes",
]

COLOURS: dict[str, str] = {
    "points": "#8A9AAD",  # muted blue-grey: recedes behind the summaries
    "smoother": "#0072B2",
    "band": "#0072B2",
    "flag": "#D55E00",
    "flag_text": "#8C3A00",
    "undefined": "#D55E00",
    "reference": "#9E9E9E",
    "threshold": "#7D7D7D",
    "envelope": "#56B4E9",
    "text": "#2B2B2B",
    "spine": "#7A7A7A",
    "grid": "#E4E4E4",
    "density_low": "#F1F3F6",
    "density_mid": "#B9C3CF",
    "density_high": "#66788E",
    "background": "#FFFFFF",
}
"""Role -> colour. Blues and vermillion/orange from Okabe & Ito (2008); greys ours."""

BAND_ALPHA = 0.18
"""Opacity of uncertainty bands."""

ASPECT = 0.72
"""Figure height as a share of its width."""

FONT_FAMILY = "DejaVu Sans"
"""Ships with matplotlib, so output does not depend on the fonts a machine has."""

SVG_HASH_SALT = "premises"
"""Fixed salt for SVG element ids, so the same figure gives the same bytes."""

LARGE_N = 20_000
"""Above this many points the cloud is drawn as a 2-D histogram image (our choice:
by then individual markers overlap into an opaque block and cost time linear in n)."""

MAX_FLAGGED_DRAWN = 60
"""At most this many flagged points are drawn individually, the most severe first (our
choice: at large n the Cook's 4/n rule flags about 5% of rows, and thousands of rings
would hide the cloud)."""

MAX_LABELS = 8
"""At most this many flagged points carry a text label (the most severe first)."""

MAX_QUANTILES = 1200
"""A Q-Q plot shows at most about this many order statistics."""

RASTER_ABOVE = 1_000
"""Point clouds larger than this are rasterised inside SVG/PDF to keep files small."""

RC_PARAMS: dict[str, Any] = {
    "font.family": "sans-serif",
    "font.sans-serif": [FONT_FAMILY],
    "font.size": 9.0,
    "axes.titlesize": 9.5,
    "axes.titleweight": "normal",
    "axes.titlelocation": "left",
    "axes.labelsize": 9.0,
    "axes.labelcolor": COLOURS["text"],
    "axes.edgecolor": COLOURS["spine"],
    "axes.linewidth": 0.8,
    "axes.facecolor": COLOURS["background"],
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "xtick.color": COLOURS["spine"],
    "ytick.color": COLOURS["spine"],
    "xtick.labelcolor": COLOURS["text"],
    "ytick.labelcolor": COLOURS["text"],
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "figure.facecolor": COLOURS["background"],
    "savefig.facecolor": COLOURS["background"],
    "svg.hashsalt": SVG_HASH_SALT,
    "svg.fonttype": "path",
    "pdf.fonttype": 42,
    "path.simplify": True,
    "image.interpolation": "nearest",
}
"""Applied through a local ``matplotlib.rc_context`` around drawing and saving."""


def style_axes(ax: Axes) -> None:
    """Apply the house axes style: no top/right spines, light horizontal grid only."""
    ax.spines["top"].set_visible(False)
    ax.spines["right"].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(COLOURS["spine"])
        ax.spines[side].set_linewidth(0.8)
    ax.set_axisbelow(True)
    ax.xaxis.grid(False)
    ax.yaxis.grid(True, color=COLOURS["grid"], linewidth=0.6, linestyle="-")
    ax.tick_params(length=3, width=0.6)


def point_alpha(n: int) -> float:
    """Marker opacity falling with n so that dense regions read darker (our choice)."""
    return float(min(0.9, max(0.25, 12.0 / max(n, 1) ** 0.5)))


def point_size(n: int) -> float:
    """Marker area in pt^2, smaller for larger clouds (our choice)."""
    if n <= 300:
        return 18.0
    if n <= 3_000:
        return 10.0
    return 4.0
