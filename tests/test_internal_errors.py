"""A bug is reported as a bug: one line, exit code 1, the traceback only with --debug.

A stage of the render is made to raise an exception the tool does not expect
(``RuntimeError``); the command line must say it is a bug in premises, point at
``--debug`` and write nothing. With ``--debug`` the exception and its traceback
come out as Python shows them.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

import premises.analysis
import premises.figures
from premises.cli import EXIT_INTERNAL, main

BLOCK = "# Doc\n\n```premises\nid: a\ndata: d.csv\nmodel: y ~ x\n```\n"


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    rows = "\n".join(f"{i},{2 * i + (i % 3) * 0.5},{i}" for i in range(1, 21))
    (tmp_path / "d.csv").write_text("y,x,t\n" + rows + "\n", encoding="utf-8")
    (tmp_path / "doc.md").write_text(BLOCK, encoding="utf-8")
    return tmp_path


def _boom(*args: Any, **kwargs: Any) -> Any:
    raise RuntimeError("boom in a stage")


def _render(project: Path, *extra: str) -> int:
    return main(["render", str(project / "doc.md"), "-o", str(project / "out" / "doc.md"), "--no-cache", *extra])


def test_a_bug_is_one_line_with_exit_code_one(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setattr(premises.analysis, "analyse_block", _boom)
    code = _render(project)
    err = capsys.readouterr().err
    assert code == EXIT_INTERNAL == 1
    assert err.count("\n") == 1
    assert err.startswith("premises: internal error (RuntimeError: boom in a stage). This is a bug in premises;")
    assert "--debug" in err
    assert "Traceback" not in err
    assert not (project / "out").exists()


def test_debug_lets_the_traceback_through(project: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(premises.analysis, "analyse_block", _boom)
    with pytest.raises(RuntimeError, match="boom in a stage"):
        _render(project, "--debug")
    assert not (project / "out").exists()


def test_a_bug_while_drawing_figures_leaves_no_figures(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    """The third figure fails after two were written: nothing reaches the output folder."""
    real = premises.figures.render_to_file
    calls: list[Path] = []

    def third_fails(draw: Any, data: Any, path: Path, options: Any) -> None:
        calls.append(path)
        if len(calls) == 3:
            raise RuntimeError("figure three")
        real(draw, data, path, options)

    monkeypatch.setattr(premises.figures, "render_to_file", third_fails)
    assert _render(project) == 1
    assert "internal error (RuntimeError: figure three)" in capsys.readouterr().err
    assert len(calls) == 3
    assert not (project / "out").exists()


def test_a_bug_keeps_the_previous_output(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    assert _render(project) == 0
    output = project / "out" / "doc.md"
    figures = sorted((project / "out" / "doc-figures").iterdir())
    before = (output.read_bytes(), [p.read_bytes() for p in figures])
    (project / "d.csv").write_text((project / "d.csv").read_text() + "21,40,21\n", encoding="utf-8")
    monkeypatch.setattr(premises.analysis, "analyse_block", _boom)
    assert _render(project) == 1
    capsys.readouterr()
    assert (output.read_bytes(), [p.read_bytes() for p in figures]) == before
    assert sorted((project / "out" / "doc-figures").iterdir()) == figures


def test_a_bug_in_a_later_block_publishes_no_figure_of_an_earlier_one(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    (project / "doc.md").write_text(BLOCK + "\n" + BLOCK.replace("id: a", "id: b").replace("# Doc\n\n", ""), encoding="utf-8")
    real = premises.analysis.analyse_block

    def second_fails(spec: Any, *args: Any, **kwargs: Any) -> Any:
        if spec.id == "b":
            raise RuntimeError("block b")
        return real(spec, *args, **kwargs)

    monkeypatch.setattr(premises.analysis, "analyse_block", second_fails)
    assert _render(project) == 1
    assert "RuntimeError: block b" in capsys.readouterr().err
    assert not (project / "out").exists()


def test_check_and_status_report_bugs_the_same_way(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setattr(premises.analysis, "prepare_block", _boom)
    assert main(["check", str(project / "doc.md")]) == 1
    assert capsys.readouterr().err.startswith("premises: internal error (RuntimeError: boom in a stage)")
    monkeypatch.setattr("premises.staleness.block_status", _boom)
    assert main(["status", str(project / "doc.md")]) == 1
    assert "This is a bug in premises" in capsys.readouterr().err


def test_an_interrupt_says_the_outputs_were_kept(project: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    def interrupt(*args: Any, **kwargs: Any) -> Any:
        raise KeyboardInterrupt

    monkeypatch.setattr(premises.analysis, "analyse_block", interrupt)
    assert _render(project) == 130
    assert "interrupted; earlier outputs were left as they were" in capsys.readouterr().err
    assert not (project / "out").exists()


def test_the_console_command_prints_a_traceback_only_with_debug(project: Path) -> None:
    """The real process: exit 1 and one line; with --debug Python's traceback (exit 1 too)."""
    code = (
        "import sys, premises.analysis as a\n"
        "def boom(*args, **kwargs): raise RuntimeError('boom in a stage')\n"
        "a.analyse_block = boom\n"
        "from premises.cli import entry\n"
        "sys.argv = ['premises', *sys.argv[1:]]\n"
        "entry()\n"
    )
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).parents[1] / "src")}
    args = [sys.executable, "-c", code, "render", "doc.md", "-o", "out/doc.md", "--no-cache"]
    quiet = subprocess.run(args, check=False, cwd=project, env=env, capture_output=True, text=True, timeout=120)
    assert quiet.returncode == 1
    assert quiet.stderr.count("\n") == 1 and "Traceback" not in quiet.stderr
    loud = subprocess.run([*args, "--debug"], check=False, cwd=project, env=env, capture_output=True, text=True, timeout=120)
    assert loud.returncode == 1
    assert "Traceback (most recent call last)" in loud.stderr
    assert "RuntimeError: boom in a stage" in loud.stderr
    assert not (project / "out").exists()
