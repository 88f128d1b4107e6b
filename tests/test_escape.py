"""A document cannot run code or read files outside its project.

The document sits in a fresh folder outside this repository (its own project:
no ``_quarto.yml`` above it). Its rule, formula, threshold and templates try to
run a shell command that would create a marker file; its data paths try
``../../etc/passwd``, an absolute path and a symbolic link out of the folder.
An audit hook records every file the render opens: nothing outside the
project that holds data is opened, no marker file appears, and each attempt is
refused with a message naming the path or the construct.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from premises.cli import main

REPO = Path(__file__).parents[1].resolve()

_OPENED: list[str] = []
_LISTENING: list[bool] = []
_HOOKED: list[bool] = []


def _audit(event: str, args: tuple[object, ...]) -> None:
    if _LISTENING and event == "open" and isinstance(args[0], (str, bytes, os.PathLike)):
        _OPENED.append(os.path.realpath(os.fsdecode(args[0])))


@pytest.fixture()
def opened() -> Iterator[list[str]]:
    """Paths opened while the test body runs (audit hooks cannot be removed, so it idles between tests)."""
    if not _HOOKED:
        sys.addaudithook(_audit)
        _HOOKED.append(True)
    _OPENED.clear()
    _LISTENING.append(True)
    try:
        yield _OPENED
    finally:
        _LISTENING.clear()


@pytest.fixture()
def places(tmp_path: Path) -> dict[str, Path]:
    """An outside folder with a secret data file, a project folder beside it, a marker path."""
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    secret = outside / "secret.csv"
    secret.write_text("y,x\n1,2\n2,3\n3,5\n4,4\n", encoding="utf-8")
    project = tmp_path / "evil"
    project.mkdir()
    (project / "d.csv").write_text("y,x\n" + "".join(f"{i},{(i * 7) % 5 + i}\n" for i in range(1, 21)), encoding="utf-8")
    marker = Path(f"/tmp/pwned_x_{os.getpid()}_{tmp_path.name}")
    if marker.exists():
        marker.unlink()
    assert not project.resolve().is_relative_to(REPO)
    return {"outside": outside, "secret": secret, "project": project, "marker": marker}


def _render(places: dict[str, Path], block: str, capsys: pytest.CaptureFixture[str], *extra: str) -> tuple[int, str]:
    document = places["project"] / "doc.md"
    document.write_text(f"# Evil\n\n```premises\n{block}```\n", encoding="utf-8")
    capsys.readouterr()
    code = main(["render", str(document), "-o", str(places["project"] / "out" / "doc.md"), "--no-cache", *extra])
    return code, capsys.readouterr().err


def _outside_project(paths: list[str], places: dict[str, Path]) -> list[str]:
    """Opened paths that are data-like files outside the project (the secret, /etc)."""
    banned = (str(places["outside"].resolve()), "/etc/passwd", "/etc/shadow")
    return [p for p in paths if p.startswith(banned)]


def test_a_rule_that_tries_a_shell_command_runs_nothing(places: dict[str, Path], opened: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    marker = places["marker"]
    code, err = _render(places, (
        "id: a\ndata: d.csv\nmodel: y ~ x\nexclude:\n"
        f"  - when: \"__import__('os').system('touch {marker}') == 0\"\n    reason: probe\n"
    ), capsys)
    assert code == 2
    assert "names with double underscores on both sides are not allowed" in err
    assert not marker.exists()


@pytest.mark.parametrize(
    "rule",
    [
        "x.__class__.__base__.__subclasses__() == 0",
        "open('{marker}', 'w') == 0",
        "(lambda: __import__('os').system('touch {marker}'))() == 0",
        "[c for c in ().__class__.__base__.__subclasses__()] == 0",
        "exec('import os') == 0",
        "x in [eval('1')]",
    ],
)
def test_other_rules_that_try_code_run_nothing(rule: str, places: dict[str, Path], capsys: pytest.CaptureFixture[str]) -> None:
    text = rule.replace("{marker}", str(places["marker"]))
    code, err = _render(places, f"id: a\ndata: d.csv\nmodel: y ~ x\nexclude:\n  - when: \"{text}\"\n    reason: probe\n", capsys)
    assert code == 2, err
    assert "key 'exclude[0].when'" in err
    assert not places["marker"].exists()


@pytest.mark.parametrize(
    "model",
    [
        "y ~ __import__('os').system('touch {marker}')",
        "y ~ I(open('{marker}', 'w'))",
        "y ~ x + I(x.__class__.__mro__)",
        "y ~ C(x, lambda: __import__('os'))",
    ],
)
def test_a_formula_that_tries_code_runs_nothing(model: str, places: dict[str, Path], capsys: pytest.CaptureFixture[str]) -> None:
    text = model.replace("{marker}", str(places["marker"]))
    code, err = _render(places, f"id: a\ndata: d.csv\nmodel: \"{text}\"\n", capsys)
    assert code == 2, err
    assert "key 'model'" in err
    assert not places["marker"].exists()


def test_a_threshold_that_tries_code_runs_nothing(places: dict[str, Path], capsys: pytest.CaptureFixture[str]) -> None:
    code, err = _render(places, (
        "id: a\ndata: d.csv\nmodel: y ~ x\nthresholds:\n"
        f"  cooks: \"__import__('os').system('touch {places['marker']}')\"\n"
    ), capsys)
    assert code == 2
    assert "Unknown name '__import__'" in err
    assert not places["marker"].exists()


def test_a_template_that_tries_code_runs_nothing(places: dict[str, Path], capsys: pytest.CaptureFixture[str]) -> None:
    """User templates (the block's `templates:` key) are rendered in a sandbox."""
    folder = places["project"] / "tpl"
    folder.mkdir()
    (folder / "section.md.j2").write_text(
        "{{ self.__init__.__globals__.__builtins__.__import__('os').system('touch " + str(places["marker"]) + "') }}\n",
        encoding="utf-8",
    )
    code, err = _render(places, "id: a\ndata: d.csv\nmodel: y ~ x\ntemplates: tpl\n", capsys)
    assert code == 2, err
    assert "reaches for Python internals" in err
    assert not places["marker"].exists()
    assert not (places["project"] / "out").exists()


@pytest.mark.parametrize(
    ("data", "phrase"),
    [
        ("../../../../../../../../etc/passwd", "leads outside the project folder"),
        ("../elsewhere/secret.csv", "leads outside the project folder"),
        ("/etc/passwd", "is absolute"),
        ("{secret}", "is absolute"),
        ("link.csv", "leads outside the project folder"),
        ("linked-folder/secret.csv", "leads outside the project folder"),
    ],
)
def test_data_paths_out_of_the_project_are_not_read(data: str, phrase: str, places: dict[str, Path], opened: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    (places["project"] / "link.csv").symlink_to(places["secret"])
    (places["project"] / "linked-folder").symlink_to(places["outside"])
    path = data.replace("{secret}", str(places["secret"]))
    code, err = _render(places, f"id: a\ndata: \"{path}\"\nmodel: y ~ x\n", capsys)
    assert code == 2, err
    assert f"the data path '{path}' {phrase}" in err
    assert "key 'data'" in err
    assert _outside_project(opened, places) == []
    assert not (places["project"] / "out").exists()


def test_allow_outside_data_is_the_only_way_out(places: dict[str, Path], opened: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    code, err = _render(places, "id: a\ndata: ../elsewhere/secret.csv\nmodel: y ~ x\nse: classical\nchecks: [linearity]\n", capsys, "--allow-outside-data")
    # The secret has 4 rows: it is read (and fitted) only because the flag says so.
    assert code == 0, err
    assert str(places["secret"].resolve()) in opened


def test_the_audit_hook_sees_opens(places: dict[str, Path], opened: list[str]) -> None:
    # Without this the path tests above could pass with a hook that records nothing.
    places["secret"].read_bytes()
    assert _outside_project(opened, places) == [str(places["secret"].resolve())]
