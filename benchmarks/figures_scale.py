"""How figure time grows with n: every figure of one block at n = 10^4, 10^5, 10^6.

Run from the repository root::

    PYTHONPATH=src .venv/bin/python benchmarks/figures_scale.py [--format png] [--repeat 3]

The block (p = 11 columns: intercept, eight numeric predictors, a three-level factor; an order
column and 200 groups) is fitted once per n outside the timing; what is timed is
``draw_figures`` (computing and writing every figure), split by figure. The goal
is time(10^6) <= 2 x time(10^5): above ``LARGE_N`` the point clouds become 2-D
histograms, the Q-Q plot is thinned, and everything else is O(n) numpy.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from premises.checks.base import CheckContext
from premises.figures import draw_figures, plan_figures
from premises.figures.layers import render_to_file
from premises.fit import compute_influence, fit_model
from premises.formula import Design
from premises.results import Finding, Statistic
from premises.spec import BlockSpec, FigureOptions

SIZES = (10_000, 100_000, 1_000_000)
ASSUMPTIONS = ("linearity", "normality", "variance", "influence", "independence", "collinearity")


def build_context(n: int, seed: int = 11) -> CheckContext:
    """A fitted synthetic block of n rows (design built directly, no formula parsing)."""
    rng = np.random.default_rng(seed)
    numeric = rng.normal(size=(n, 8))
    level = rng.integers(0, 3, n)
    X = np.column_stack([np.ones(n), level == 1, level == 2, numeric]).astype(float)
    beta = np.concatenate([[2.0, 0.5, -0.3], np.linspace(1.0, -1.0, 8)])
    y = X @ beta + 0.3 * numeric[:, 0] ** 2 + rng.standard_t(5, n) * (1 + 0.2 * np.abs(X[:, 3]))
    names = ("Intercept", "C(g)[T.1]", "C(g)[T.2]") + tuple(f"x{j}" for j in range(1, 9))
    slices = (("Intercept", 0, 1), ("C(g)", 1, 3)) + tuple(
        (f"x{j}", 2 + j, 3 + j) for j in range(1, 9)
    )
    columns = (("Intercept", ()), ("C(g)", ("g",))) + tuple(
        (f"x{j}", (f"x{j}",)) for j in range(1, 9)
    )
    design = Design(
        formula="y ~ C(g) + " + " + ".join(f"x{j}" for j in range(1, 9)),
        outcome="y",
        outcome_columns=("y",),
        predictor_columns=("g",) + tuple(f"x{j}" for j in range(1, 9)),
        y=y,
        X=X,
        column_names=names,
        term_slices=slices,
        term_columns=columns,
        has_intercept=True,
    )
    fit = fit_model(design)
    frame = pd.DataFrame(numeric, columns=[f"x{j}" for j in range(1, 9)])
    frame["g"] = level
    frame["t"] = np.arange(n)
    frame["site"] = rng.integers(0, 200, n)
    frame["id"] = [f"R{i}" for i in range(n)]
    spec = BlockSpec(
        id="scale",
        data="synthetic.csv",
        model=design.formula,
        id_column="id",
        order="t",
        groups="site",
    )
    return CheckContext(
        spec,
        fit,
        compute_influence(fit),
        frame,
        frame["id"].to_numpy(),
        np.arange(1, n + 1),
        spec.seed,
    )


def findings() -> tuple[Finding, ...]:
    """One finding per assumption (the figures only read verdict and measure)."""
    return tuple(Finding(a, "holds", Statistic("measure", 0.1)) for a in ASSUMPTIONS)


def time_block(ctx: CheckContext, options: FigureOptions, repeat: int) -> float:
    """Median wall time of draw_figures over ``repeat`` runs."""
    runs = []
    for _ in range(repeat):
        with tempfile.TemporaryDirectory() as folder:
            start = time.perf_counter()
            draw_figures(ctx, findings(), Path(folder), "f", options)
            runs.append(time.perf_counter() - start)
    return statistics.median(runs)


def time_each(ctx: CheckContext, options: FigureOptions) -> dict[str, float]:
    """Seconds per figure (computing its data plus drawing and writing it), one run."""
    out: dict[str, float] = {}
    with tempfile.TemporaryDirectory() as folder:
        start = time.perf_counter()
        planned = plan_figures(ctx, findings())
        out["(plan all)"] = time.perf_counter() - start
        for figure in planned:
            start = time.perf_counter()
            render_to_file(
                figure.kind.draw,
                figure.data,
                Path(folder) / f"{figure.id}.{options.format}",
                options,
            )
            out[figure.id.removeprefix("fig-scale-")] = time.perf_counter() - start
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--format", default="png", choices=("png", "svg", "pdf"))
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    options = FigureOptions(format=args.format)
    totals: dict[int, float] = {}
    per_figure: dict[int, dict[str, float]] = {}
    time_block(build_context(1_000), options, 1)  # warm-up: imports, font cache
    for n in SIZES:
        ctx = build_context(n)
        totals[n] = time_block(ctx, options, args.repeat)
        per_figure[n] = time_each(ctx, options)
        print(f"n = {n:>9,}: all figures {totals[n]:6.2f} s (median of {args.repeat})")
    names = list(per_figure[SIZES[0]])
    print("\nper figure (s):" + "".join(f"{n:>11,}" for n in SIZES))
    for name in names:
        print(
            f"  {name:<28}"
            + "".join(f"{per_figure[n].get(name, float('nan')):11.3f}" for n in SIZES)
        )
    ratio = totals[SIZES[2]] / totals[SIZES[1]]
    print(
        f"\ntime(10^6) / time(10^5) = {ratio:.2f}  (goal <= 2.0: {'met' if ratio <= 2 else 'NOT met'})"
    )
    print(f"time(10^5) / time(10^4) = {totals[SIZES[1]] / totals[SIZES[0]]:.2f}")


if __name__ == "__main__":
    main()
