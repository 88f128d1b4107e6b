"""Figures: one per assumption, computed apart from drawing, written byte-stably.

Each figure kind is a module with ``compute(ctx, finding, flags) -> data``
(frozen dataclass of arrays, or a tuple of them, or None when there is nothing
to show), ``draw(data, fig)`` on a bare :class:`matplotlib.figure.Figure`, and
``describe(data, finding) -> (caption, alt)``. ``FIGURE_KINDS`` is the table
that names them; :func:`draw_figures` runs it for a block's findings.

matplotlib is imported only when a figure is drawn, and pyplot never.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from premises.checks.base import CheckContext
from premises.figures import (
    coefmoves,
    collinearity,
    independence,
    influence,
    linearity,
    normality,
    partial,
    variance,
)
from premises.figures.base import FlagSet, find_flags
from premises.figures.layers import render_to_file
from premises.results import FigureRef, Finding
from premises.spec import FigureOptions

__all__ = [
    "FIGURE_KINDS",
    "FigureKind",
    "FlagSet",
    "PlannedFigure",
    "draw_figures",
    "find_flags",
    "plan_figures",
]


@dataclass(frozen=True)
class FigureKind:
    """One row of the figure table."""

    name: str
    """Module-level name of the kind."""
    assumption: str
    """The finding (by assumption) whose verdict the figure shows."""
    compute: Callable[[CheckContext, Finding, FlagSet], Any]
    draw: Callable[[Any, Any], None]
    describe: Callable[[Any, Finding], tuple[str, str]]


FIGURE_KINDS: tuple[FigureKind, ...] = (
    FigureKind("linearity", "linearity", linearity.compute, linearity.draw, linearity.describe),
    FigureKind("partial", "linearity", partial.compute, partial.draw, partial.describe),
    FigureKind("normality", "normality", normality.compute, normality.draw, normality.describe),
    FigureKind("variance", "variance", variance.compute, variance.draw, variance.describe),
    FigureKind("influence", "influence", influence.compute, influence.draw, influence.describe),
    FigureKind("coefmoves", "influence", coefmoves.compute, coefmoves.draw, coefmoves.describe),
    FigureKind(
        "independence",
        "independence",
        independence.compute,
        independence.draw,
        independence.describe,
    ),
    FigureKind(
        "collinearity",
        "collinearity",
        collinearity.compute,
        collinearity.draw,
        collinearity.describe,
    ),
)
"""Figure kinds in reporting order within an assumption."""


@dataclass(frozen=True)
class PlannedFigure:
    """A computed figure, ready to draw."""

    id: str
    """``fig-<block>-<name>``."""
    kind: FigureKind
    finding: Finding
    data: Any


def plan_figures(ctx: CheckContext, findings: Sequence[Finding]) -> tuple[PlannedFigure, ...]:
    """Compute every figure's data for ``findings`` (no drawing, no files).

    Findings with nothing to show (say, independence without ``order`` or
    ``groups``) produce no figure.
    """
    by_assumption = {finding.assumption: finding for finding in findings}
    flags = find_flags(ctx, by_assumption.get("influence"))
    planned: list[PlannedFigure] = []
    for finding in findings:
        for kind in FIGURE_KINDS:
            if kind.assumption != finding.assumption:
                continue
            result = kind.compute(ctx, finding, flags)
            items = result if isinstance(result, tuple) else (result,)
            for data in items:
                if data is not None:
                    figure_id = f"fig-{ctx.spec.id}-{data.name}"
                    planned.append(PlannedFigure(figure_id, kind, finding, data))
    return tuple(planned)


def draw_figures(
    ctx: CheckContext,
    findings: Sequence[Finding],
    out_dir: Path,
    rel_dir: str,
    options: FigureOptions,
) -> tuple[FigureRef, ...]:
    """Write one figure per assumption (plus per-term and per-coefficient views).

    Parameters
    ----------
    ctx
        The fitted block: its fit, influence measures, analysed rows and ids.
    findings
        The block's check results; each assumption present gets its figure(s).
    out_dir
        Folder the files are written to (created if missing); each file is
        ``<figure id>.<format>``, written atomically.
    rel_dir
        The same folder as the output document refers to it (``""`` for beside it).
    options
        Format (png, svg, pdf), dpi and width in inches (height is 0.72 x width).

    Returns
    -------
    tuple of FigureRef
        In the order of ``findings``; ids are ``fig-<block>-<name>``.

    Examples
    --------
    >>> refs = draw_figures(ctx, findings, Path("out/figures"), "figures",
    ...                     FigureOptions(format="svg"))  # doctest: +SKIP
    >>> refs[0].id  # doctest: +SKIP
    'fig-growth-linearity'
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    refs: list[FigureRef] = []
    for figure in plan_figures(ctx, findings):
        file_name = f"{figure.id}.{options.format}"
        render_to_file(figure.kind.draw, figure.data, out_dir / file_name, options)
        caption, alt = figure.kind.describe(figure.data, figure.finding)
        path = f"{rel_dir.rstrip('/')}/{file_name}" if rel_dir else file_name
        refs.append(FigureRef(figure.id, figure.finding.assumption, path, caption, alt))
    return tuple(refs)
