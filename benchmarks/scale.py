"""Whole-process wall time and peak memory of one block, n = 10^3 to 10^6, against two references.

Run from the repository root::

    .venv/bin/python benchmarks/scale.py [--sizes 1e3,1e4,1e5,1e6] [--predictors 3,10]
                                         [--quick] [--limit 300] [--repeat 1] [--markdown FILE]

For each n one seeded synthetic data set is written as parquet (outcome ``y``,
ten standard normal predictors ``x1`` .. ``x10``, a numeric grouping column
``site`` with 200 groups whose random intercepts the errors share). For each n
and each number of predictors p, three programs run in a fresh interpreter:

tool
    ``python -m premises render doc.md --no-cache``: one block, model
    ``y ~ x1 + ... + xp``, ``groups: site``; the whole section (fit, every
    check, influence with closed forms, sensitivity refits, figures, text).
baseline
    the bare statsmodels formula fit plus the O(n) influence measures
    (``get_influence()``: hat values, Cook's distance, internally studentised
    residuals): the floor a diagnostic report cannot go below.
hand
    the pipeline a user would otherwise write: formula fit,
    ``get_influence().summary_frame()``, statsmodels' default LOWESS of the
    residuals on the fitted values, Breusch-Pagan, Shapiro-Wilk, a
    ``variance_inflation_factor`` loop, four pyplot scatter PNGs. It is stopped
    at ``--limit`` seconds ("did not finish"); once it has not finished at some
    n it is not started again at a larger n with the same p (it only gets slower).

Wall time is measured around each child; peak memory is the child's own peak
resident set size (``ru_maxrss`` from ``os.wait4``). Every program reads the
same parquet file and pays its own imports, as a user's script would.
Goals at n = 10^6, p = 10: tool <= 3 x baseline in time and <= 2 x in memory,
and at least 20 times faster than the hand-written pipeline (or that one does
not finish).
"""

from __future__ import annotations

import argparse
import datetime
import os
import platform
import signal
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

SIZES = (1_000, 10_000, 100_000, 1_000_000)
PREDICTORS = (3, 10)
GROUPS = 200
SEED = 20_240_601
LIMIT = 300.0

BASELINE = textwrap.dedent(
    """
    import sys
    import pandas as pd
    import statsmodels.formula.api as smf

    data = pd.read_parquet(sys.argv[1])
    p = int(sys.argv[2])
    fit = smf.ols("y ~ " + " + ".join(f"x{j}" for j in range(1, p + 1)), data=data).fit()
    influence = fit.get_influence()
    hat = influence.hat_matrix_diag
    cooks = influence.cooks_distance[0]
    studentised = influence.resid_studentized_internal
    print(float(hat.sum()), float(cooks.max()), float(abs(studentised).max()))
    """
)

HAND = textwrap.dedent(
    """
    import sys
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np
    import pandas as pd
    import statsmodels.api as sm
    import statsmodels.formula.api as smf
    from scipy import stats
    from statsmodels.stats.diagnostic import het_breuschpagan
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    data = pd.read_parquet(sys.argv[1])
    p = int(sys.argv[2])
    out = sys.argv[3]
    fit = smf.ols("y ~ " + " + ".join(f"x{j}" for j in range(1, p + 1)), data=data).fit()
    table = fit.get_influence().summary_frame()
    smooth = sm.nonparametric.lowess(fit.resid, fit.fittedvalues)
    bp = het_breuschpagan(fit.resid, fit.model.exog)
    sw = stats.shapiro(fit.resid)
    exog = fit.model.exog
    vif = [variance_inflation_factor(exog, j) for j in range(1, exog.shape[1])]
    std = table["standard_resid"].to_numpy()
    panels = [
        (fit.fittedvalues, fit.resid, "fitted", "residual"),
        (stats.norm.ppf((np.arange(1, std.size + 1) - 0.5) / std.size), np.sort(std), "normal quantile", "standardised residual"),
        (fit.fittedvalues, np.sqrt(np.abs(std)), "fitted", "sqrt |standardised residual|"),
        (table["hat_diag"], std, "leverage", "standardised residual"),
    ]
    for k, (x, y, xlabel, ylabel) in enumerate(panels):
        plt.figure()
        plt.scatter(x, y, s=4)
        if k == 0:
            plt.plot(smooth[:, 0], smooth[:, 1], color="red")
        plt.xlabel(xlabel)
        plt.ylabel(ylabel)
        plt.savefig(f"{out}/panel{k}.png")
        plt.close()
    print(bp[1], sw.pvalue, max(vif))
    """
)


@dataclass(frozen=True)
class Run:
    """One child process: its wall time and peak memory, or why it has none."""

    seconds: float | None
    peak_mb: float | None
    status: str = "ok"
    """ok, did not finish, failed, or skipped."""


def write_data(folder: Path, n: int) -> Path:
    """The seeded data set of ``n`` rows as parquet (written once per size)."""
    path = folder / f"data_{n}.parquet"
    if path.is_file():
        return path
    rng = np.random.default_rng(SEED + n)
    x = rng.standard_normal((n, max(PREDICTORS)))
    site = rng.integers(0, GROUPS, n)
    beta = np.linspace(1.0, -1.0, x.shape[1])
    y = 2.0 + x @ beta + 0.3 * rng.standard_normal(GROUPS)[site] + rng.standard_normal(n)
    frame = pd.DataFrame(x, columns=[f"x{j}" for j in range(1, x.shape[1] + 1)])
    frame.insert(0, "y", y)
    frame["site"] = site
    frame.to_parquet(path, index=False)
    return path


def write_document(folder: Path, data: Path, p: int) -> Path:
    """A Markdown document with one block on ``data`` using the first ``p`` predictors."""
    terms = " + ".join(f"x{j}" for j in range(1, p + 1))
    path = folder / f"{data.stem}_p{p}.md"
    path.write_text(
        f"# Scale\n\n```{{.premises}}\nid: scale\ndata: {data.name}\nmodel: y ~ {terms}\n"
        "groups: site\n```\n",
        encoding="utf-8",
    )
    return path


def run_child(command: list[str], cwd: Path, limit: float) -> Run:
    """Run ``command``; its wall time and peak RSS (its own, from wait4), killed after ``limit`` s."""
    # stderr goes to a file: a pipe nobody reads while we poll could fill and block the child.
    with tempfile.TemporaryFile() as errors:
        start = time.perf_counter()
        child = subprocess.Popen(
            command, cwd=cwd, stdout=subprocess.DEVNULL, stderr=errors, start_new_session=True
        )
        while True:
            pid, status, usage = os.wait4(child.pid, os.WNOHANG)
            elapsed = time.perf_counter() - start
            if pid:
                break
            if elapsed > limit:
                os.killpg(child.pid, signal.SIGKILL)
                os.wait4(child.pid, 0)
                child.returncode = -signal.SIGKILL  # reaped here: Popen must not wait for it again
                return Run(None, None, "did not finish")
            time.sleep(0.02)
        child.returncode = os.waitstatus_to_exitcode(status)
        if child.returncode != 0:
            errors.seek(0)
            text = errors.read().decode(errors="replace")
            print(
                f"  failed ({child.returncode}): {' '.join(command)}\n{text[-2000:]}",
                file=sys.stderr,
            )
            return Run(None, None, "failed")
    # ru_maxrss is in KiB on Linux (bytes on macOS).
    scale = 1024 if sys.platform != "darwin" else 1
    return Run(elapsed, usage.ru_maxrss * scale / 1e6)


def median_run(command: list[str], cwd: Path, limit: float, repeat: int) -> Run:
    """Median wall time and peak memory over ``repeat`` runs (the first failure ends it)."""
    runs = []
    for _ in range(repeat):
        run = run_child(command, cwd, limit)
        if run.status != "ok":
            return run
        runs.append(run)
    return Run(
        statistics.median(r.seconds for r in runs if r.seconds is not None),
        statistics.median(r.peak_mb for r in runs if r.peak_mb is not None),
    )


def _seconds(run: Run) -> str:
    if run.seconds is None:
        return run.status
    return f"{run.seconds:.2f}"


def _ratio(top: float | None, bottom: float | None, fmt: str = "{:.1f}") -> str:
    if top is None or bottom is None or bottom == 0:
        return "-"
    return fmt.format(top / bottom)


def table_row(n: int, p: int, tool: Run, base: Run, hand: Run, limit: float) -> str:
    """One Markdown row of the results table."""
    if hand.seconds is None and hand.status in ("did not finish", "skipped") and tool.seconds:
        hand_cell = f"> {limit:.0f} ({hand.status})"
        speedup = f"> {limit / tool.seconds:.0f}"
    else:
        hand_cell = _seconds(hand)
        speedup = _ratio(hand.seconds, tool.seconds)
    return (
        f"| {n:,} | {p} | {_seconds(tool)} | {_seconds(base)} | {hand_cell} "
        f"| {_ratio(tool.seconds, base.seconds, '{:.2f}')} | {speedup} "
        f"| {tool.peak_mb or 0:.0f} | {base.peak_mb or 0:.0f} "
        f"| {_ratio(tool.peak_mb, base.peak_mb, '{:.2f}')} |"
    )


HEADER = (
    "| n | p | tool s | baseline s | hand s | tool / baseline | hand / tool "
    "| tool peak MB | baseline peak MB | memory ratio |\n"
    "|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"
)


def machine() -> str:
    """Cores, memory, load, date and versions, for the record."""
    memory = "?"
    with open("/proc/meminfo", encoding="ascii") as handle:
        for line in handle:
            if line.startswith("MemTotal"):
                memory = f"{int(line.split()[1]) / 1024**2:.0f} GiB"
    load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    versions = []
    for name in ("numpy", "pandas", "scipy", "statsmodels", "matplotlib"):
        try:
            module = __import__(name)
            versions.append(f"{name} {module.__version__}")
        except ImportError:
            versions.append(f"{name} absent")
    return (
        f"{datetime.date.today().isoformat()}; {os.cpu_count()} cores, {memory}; "
        f"load average (1, 5, 15 min) {load}; Python {platform.python_version()}; "
        + ", ".join(versions)
    )


def _parse_sizes(text: str) -> tuple[int, ...]:
    return tuple(int(float(part)) for part in text.split(",") if part.strip())


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--sizes", type=_parse_sizes, default=SIZES, help="e.g. 1e3,1e4,1e5,1e6")
    parser.add_argument("--predictors", type=_parse_sizes, default=PREDICTORS, help="e.g. 3,10")
    parser.add_argument("--quick", action="store_true", help="n = 10^3 and 10^4 only, p = 3")
    parser.add_argument(
        "--limit", type=float, default=LIMIT, help="seconds before a run is stopped"
    )
    parser.add_argument("--repeat", type=int, default=1, help="runs per cell (median)")
    parser.add_argument(
        "--work", type=Path, help="folder for data and outputs (default: temporary)"
    )
    parser.add_argument("--markdown", type=Path, help="also write the table to this file")
    parser.add_argument("--no-hand", action="store_true", help="skip the hand-written pipeline")
    args = parser.parse_args()
    sizes, predictors = (args.sizes, args.predictors)
    if args.quick:
        sizes, predictors = (1_000, 10_000), (3,)
    with tempfile.TemporaryDirectory(prefix="premises-scale-") as scratch:
        work = args.work or Path(scratch)
        work.mkdir(parents=True, exist_ok=True)
        (work / "baseline.py").write_text(BASELINE, encoding="utf-8")
        (work / "hand.py").write_text(HAND, encoding="utf-8")
        before = machine()
        print(f"machine at start: {before}", flush=True)
        rows = []
        stopped: dict[int, int] = {}  # p -> n at which the hand-written pipeline did not finish
        for n in sizes:
            data = write_data(work, n)
            for p in predictors:
                document = write_document(work, data, p)
                tool = median_run(
                    [
                        sys.executable,
                        "-m",
                        "premises",
                        "render",
                        document.name,
                        "--no-cache",
                        "-o",
                        f"{document.stem}.out.md",
                    ],
                    work,
                    args.limit,
                    args.repeat,
                )
                base = median_run(
                    [sys.executable, "baseline.py", data.name, str(p)],
                    work,
                    args.limit,
                    args.repeat,
                )
                if args.no_hand:
                    hand = Run(None, None, "not run")
                elif p in stopped:
                    hand = Run(None, None, "skipped")
                else:
                    panels = work / f"hand_{n}_{p}"
                    panels.mkdir(exist_ok=True)
                    hand = median_run(
                        [sys.executable, "hand.py", data.name, str(p), panels.name],
                        work,
                        args.limit,
                        1,
                    )
                    if hand.status == "did not finish":
                        stopped[p] = n
                row = table_row(n, p, tool, base, hand, args.limit)
                rows.append(row)
                print(row, flush=True)
        after = machine()
    text = f"{HEADER}\n" + "\n".join(rows)
    notes = (
        f"\nMachine at start: {before}\nMachine at end: {after}\n"
        f"hand: stopped after {args.limit:.0f} s; 'skipped' means it did not finish at a "
        "smaller n with the same p.\n"
    )
    print("\n" + text + notes)
    if args.markdown:
        args.markdown.write_text(text + "\n" + notes, encoding="utf-8")


if __name__ == "__main__":
    main()
