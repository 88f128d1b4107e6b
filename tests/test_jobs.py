"""Blocks in parallel worker processes (``render --jobs``): same bytes, same errors as one process."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from premises.errors import DataError, SpecError
from premises.pipeline import RenderOptions, render_file, worker_count

SRC = Path(__file__).resolve().parents[1] / "src"

BLOCKS = {
    "growth": "model: y ~ x1 + x2\ngroups: g",
    "dose": "model: y ~ x1 + x3\nexclude:\n  - when: x3 > 2.5\n    reason: outside the dose range studied",
    "site": "model: y ~ x2 + C(g)",
}


def _project(folder: Path, models: dict[str, str] = BLOCKS) -> Path:
    """A document with one block per entry of ``models`` on one seeded CSV file."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(11)
    n = 90
    frame = pd.DataFrame(
        {"x1": rng.standard_normal(n), "x2": rng.standard_normal(n), "x3": rng.gamma(2.0, 1.0, n)}
    )
    frame["g"] = rng.integers(0, 6, n)
    frame["y"] = 1.0 + frame["x1"] - 0.5 * frame["x2"] + 0.2 * frame["x3"] + rng.standard_normal(n)
    frame.to_csv(folder / "data.csv", index=False)
    parts = ["---\ntitle: Jobs\n---\n"]
    for block, body in models.items():
        parts.append(
            f"\n## {block}\n\n```{{.premises}}\nid: {block}\ndata: data.csv\n{body}\n```\n"
        )
    doc = folder / "report.md"
    doc.write_text("".join(parts), encoding="utf-8")
    return doc


def _files(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and ".premises" not in p.parts
    }


def test_worker_count() -> None:
    assert worker_count(1, 10) == 1
    assert worker_count(4, 2) == 2
    assert worker_count(2, 0) == 1
    assert worker_count(0, 64) == min(os.cpu_count() or 1, 64)


@pytest.mark.parametrize("use_cache", [False, True])
def test_three_blocks_render_byte_identically_with_one_and_two_jobs(
    tmp_path: Path, use_cache: bool
) -> None:
    outputs = {}
    for jobs in (1, 2):
        doc = _project(tmp_path / f"jobs{jobs}")
        options = RenderOptions(use_cache=use_cache, jobs=jobs)
        first = render_file(doc, options=options, json_path=doc.with_suffix(".json"))
        assert [b.id for b in first.result.blocks] == list(BLOCKS)
        if use_cache:  # a second render reads every block from the store, in the workers too
            render_file(doc, options=options, json_path=doc.with_suffix(".json"))
        outputs[jobs] = _files(doc.parent)
    assert sorted(outputs[1]) == sorted(outputs[2])
    assert any(name.endswith(".png") for name in outputs[1])
    for name, data in outputs[1].items():
        assert outputs[2][name] == data, name


def test_an_error_in_a_worker_keeps_its_location_and_hint(tmp_path: Path) -> None:
    models = dict(BLOCKS, dose="model: y ~ x1 + nowhere")
    doc = _project(tmp_path, models)
    with pytest.raises((SpecError, DataError)) as serial:
        render_file(doc, options=RenderOptions(use_cache=False, jobs=1))
    with pytest.raises((SpecError, DataError)) as parallel:
        render_file(doc, options=RenderOptions(use_cache=False, jobs=2))
    assert type(parallel.value) is type(serial.value)
    assert parallel.value.location == serial.value.location
    assert parallel.value.location.block == "dose" and parallel.value.location.key == "model"
    assert (parallel.value.problem, parallel.value.hint) == (
        serial.value.problem,
        serial.value.hint,
    )


def _cli(doc: Path, *args: str) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(SRC))
    return subprocess.run(
        [sys.executable, "-m", "premises", "render", doc.name, "--no-cache", *args],
        cwd=doc.parent,
        capture_output=True,
        text=True,
        env=env,
        check=False,
    )


def test_cli_reports_the_first_failing_block_once_with_exit_2(tmp_path: Path) -> None:
    # Two blocks fail; a serial render stops at the first in document order, so must a parallel one.
    models = {
        "growth": BLOCKS["growth"],
        "dose": "model: y ~ x1 + nowhere",
        "site": "model: y ~ x2 + alsonot",
    }
    serial_doc = _project(tmp_path / "serial", models)
    parallel_doc = _project(tmp_path / "parallel", models)
    serial = _cli(serial_doc)
    parallel = _cli(parallel_doc, "--jobs", "2")
    assert (serial.returncode, parallel.returncode) == (2, 2)
    lines = [line for line in parallel.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("premises: "), parallel.stderr
    assert "block 'dose'" in lines[0] and "nowhere" in lines[0]
    assert parallel.stderr == serial.stderr
    assert not (parallel_doc.parent / "report.premises.md").exists()


def test_cli_refuses_a_negative_number_of_jobs(tmp_path: Path) -> None:
    doc = _project(tmp_path)
    done = _cli(doc, "--jobs", "-1")
    assert done.returncode == 2
    assert "--jobs" in done.stderr


def test_jobs_zero_means_one_per_cpu_and_renders_the_same(tmp_path: Path) -> None:
    one = _project(tmp_path / "one")
    auto = _project(tmp_path / "auto")
    assert _cli(one).returncode == 0
    done = _cli(auto, "--jobs", "0")
    assert done.returncode == 0, done.stderr
    assert (one.parent / "report.premises.md").read_bytes() == (
        auto.parent / "report.premises.md"
    ).read_bytes()
