"""The README's quick start works as written.

The two commands are read from README.md's "Quick start". No virtual
environment is created here: the install parts are checked against
pyproject.toml (the extras they name exist), and the ``premises render ...``
part of the demo command is run with the current interpreter, in a temporary
folder holding a copy of ``example_project/``, exactly as the README spells its
arguments. The outputs the README promises must then exist.
"""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
LEAVE_BEHIND = shutil.ignore_patterns(
    ".premises", "report-figures", "report.premises.*", "_site", ".quarto", "*.html", "__pycache__"
)


def quick_start() -> tuple[list[str], str]:
    """The shell commands of the Quick start section, and its prose."""
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    found = re.search(r"^## Quick start\n(.*?)(?=^## )", readme, flags=re.DOTALL | re.MULTILINE)
    assert found is not None, "README.md has no '## Quick start' section"
    section = found.group(1)
    commands = [c.strip() for c in re.findall(r"```sh\n(.*?)```", section, flags=re.DOTALL)]
    return commands, section


def steps(command: str) -> list[list[str]]:
    return [shlex.split(part) for part in command.split("&&")]


def test_quick_start_has_a_demo_and_a_test_command() -> None:
    commands, _ = quick_start()
    assert len(commands) == 2
    demo, tests = (steps(c) for c in commands)
    assert demo[0] == ["python3", "-m", "venv", ".venv"] == tests[0]
    assert any(s[:2] == [".venv/bin/premises", "render"] for s in demo)
    assert tests[-1][:3] == [".venv/bin/python", "-m", "pytest"]


def test_the_extras_the_quick_start_installs_exist() -> None:
    tomllib = pytest.importorskip("tomllib", reason="tomllib is in the standard library from Python 3.11")
    commands, _ = quick_start()
    extras = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["project"]["optional-dependencies"]
    for command in commands:
        for step in steps(command):
            if step[:2] == [".venv/bin/pip", "install"]:
                target = step[-1]
                assert step[-2] == "-e" and target.startswith(".[")
                for extra in target[2:-1].split(","):
                    assert extra in extras, f"pip install names the extra [{extra}], which pyproject.toml lacks"


def test_ci_runs_the_readme_test_command() -> None:
    commands, _ = quick_start()
    ci = (REPO / ".ci" / "run").read_text(encoding="utf-8")
    assert commands[1] in ci.splitlines()


@pytest.mark.slow
def test_demo_command_renders_the_example(tmp_path: Path) -> None:
    commands, prose = quick_start()
    render = next(s for s in steps(commands[0]) if s[:2] == [".venv/bin/premises", "render"])
    shutil.copytree(REPO / "example_project", tmp_path / "example_project", ignore=LEAVE_BEHIND)
    done = subprocess.run(
        [sys.executable, "-m", "premises", *render[1:]], cwd=tmp_path, capture_output=True, text=True, timeout=600, check=False
    )
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    # The files the README says the demo writes, and the JSON the command names.
    promised = re.findall(r"`(example_project/[^`]+)`", prose)
    assert len(promised) >= 3, prose
    json_path = render[render.index("--json") + 1]
    for name in [*promised, json_path]:
        path = tmp_path / name
        assert path.exists(), f"the README promises {name}"
        if path.is_dir():
            assert any(path.iterdir()), f"{name} is empty"
        else:
            assert path.stat().st_size > 0, f"{name} is empty"
    html = (tmp_path / "example_project" / "report.premises.html").read_text(encoding="utf-8")
    assert html.count("<img ") >= 6 and html.count("<table") >= 6
