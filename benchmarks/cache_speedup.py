"""How much faster an unchanged document renders the second time, as whole processes.

Run: ``.venv/bin/python benchmarks/cache_speedup.py [--repeats 5]``

Each repeat copies ``example_project`` to a fresh temporary folder, runs
``premises render report.qmd`` once with an empty result store (the first
render: read, fit, check, draw, write) and then ``--repeats`` more times
unchanged (cache hits: parse the block, hash the data, copy stored bytes). It
prints the median wall time of each and their ratio. Goal: a ratio of at least
20. A fresh process per run is what an editor hook, a pre-commit hook or the
Quarto filter pays, so start-up and imports are part of the measure.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
GOAL = 20.0


def _premises() -> list[str]:
    script = Path(sys.executable).with_name("premises")
    return [str(script)] if script.is_file() else [sys.executable, "-m", "premises"]


def _timed(command: list[str], cwd: Path) -> float:
    start = time.perf_counter()
    subprocess.run(command, cwd=cwd, check=True, capture_output=True)
    return time.perf_counter() - start


def measure(repeats: int, rounds: int) -> tuple[list[float], list[float]]:
    """Wall times of first renders and of unchanged re-renders."""
    first: list[float] = []
    again: list[float] = []
    command = [*_premises(), "render", "report.qmd"]
    for _ in range(rounds):
        with tempfile.TemporaryDirectory(prefix="premises-bench-") as tmp:
            project = Path(tmp) / "project"
            shutil.copytree(ROOT / "example_project", project, ignore=shutil.ignore_patterns(".premises", "*.premises.*", "*-figures", "_site", ".quarto"))
            first.append(_timed(command, project))
            out = (project / "report.premises.md").read_bytes()
            for _ in range(repeats):
                again.append(_timed(command, project))
                assert (project / "report.premises.md").read_bytes() == out, "a cached render changed the output"
    return first, again


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5, help="unchanged re-renders per round (default 5)")
    parser.add_argument("--rounds", type=int, default=3, help="fresh copies of the project (default 3)")
    args = parser.parse_args()
    first, again = measure(args.repeats, args.rounds)
    cold, warm = statistics.median(first), statistics.median(again)
    ratio = cold / warm
    print(f"first render      median {cold:.3f} s  ({', '.join(f'{t:.2f}' for t in first)})")
    print(f"unchanged render  median {warm:.3f} s  ({', '.join(f'{t:.2f}' for t in again)})")
    print(f"speed-up          {ratio:.1f}x  (goal >= {GOAL:.0f}x: {'met' if ratio >= GOAL else 'NOT met'})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
