"""The catalogue of bad inputs: every one gets one clear message, exit code 2, and nothing written.

Each YAML file in ``tests/data/catalogue/`` holds cases on one theme. A case
builds a small project in a temporary folder, runs ``premises render`` in
process (``premises.cli.main``) and checks what the user sees:

- a failing case: exit code 2; stderr is one line starting with ``premises: ``
  that names the document and line (``doc.md:6``), the block and the key where
  the case says so, matches every ``expect`` phrase and the ``fix`` phrase (how
  to fix it); no ``Traceback``; nothing on stdout; neither the ``-o`` output nor
  the figures folder exists afterwards;
- a succeeding case (``succeed: true``): exit code 0 and an output whose text
  matches every ``output`` phrase;
- every case: the document and every data file have the same bytes afterwards
  (a source is never opened for writing).

Case fields (unknown fields are an error, so a typo cannot weaken a case)::

    title     what the case is about (the test id)
    block     YAML inside a ```premises fence; the document puts the fence on
              line 5, so the block's first line is document line 6
    document  the whole document instead of ``block`` ({block} is not expanded)
    document_bytes  a generator for the document itself: latin1 (``text``),
              many_blocks (``count``), huge_block (``lines``), absent, directory
    files     data files in the project folder: name -> text, or a mapping
              {generate: KEYWORD, ...} (see ``_generate``); ``d.csv`` (the
              standard 30-row data set) is always there unless replaced
    outside   the same for files in a folder beside the project (outside it)
    links     symbolic links in the project: name -> target ({outside} and
              {project} are replaced)
    args      extra command-line arguments ({outside}, {project}, {document})
    expect    regular expressions the message must match (failing cases)
    fix       regular expression for the hint part of the message
    line      document line the message must point at
    block_id  block id the message must name (``block 'a'``)
    key       key path the message must name (``key 'model'``)
    succeed   true: the render must succeed
    output    regular expressions the rendered document must match
    root_skip reason to skip when running as root (file permissions)
    expand    long text for a block: {name: [text, times]} replaces ``{name}``
              in ``block`` with ``text`` repeated ``times`` times
    check     false when ``premises check`` (no fitting, no output) cannot see the
              problem; otherwise check must give the render's message (or succeed)
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
import yaml

from premises.cli import main

CATALOGUE = Path(__file__).parent / "data" / "catalogue"
THEMES = ("document", "block", "data", "model", "rules", "paths")
FENCE_LINE = 5
WRAPPER = "# A case\n\nSome text before the block.\n\n```premises\n{block}```\n\nSome text after it.\n"
FIELDS = {
    "title", "block", "document", "document_bytes", "files", "outside", "links", "args",
    "expect", "fix", "line", "block_id", "key", "succeed", "output", "root_skip", "expand", "check",
}


@dataclass(frozen=True)
class Case:
    """One catalogue entry."""

    theme: str
    number: int
    title: str
    raw: dict[str, Any] = field(repr=False)

    @property
    def test_id(self) -> str:
        slug = re.sub(r"[^a-z0-9]+", "-", self.title.lower()).strip("-")
        return f"{self.theme}-{self.number:02d}-{slug}"


def _load() -> list[Case]:
    cases = []
    for theme in THEMES:
        data = yaml.safe_load((CATALOGUE / f"{theme}.yaml").read_text(encoding="utf-8"))
        for number, raw in enumerate(data["cases"], start=1):
            unknown = set(raw) - FIELDS
            assert not unknown, f"{theme}.yaml case {number}: unknown fields {sorted(unknown)}"
            assert ("block" in raw) + ("document" in raw) + ("document_bytes" in raw) <= 1, raw["title"]
            if not raw.get("succeed"):
                assert raw.get("expect") and raw.get("fix"), f"{raw['title']}: a failing case needs expect and fix"
            cases.append(Case(theme, number, raw["title"], raw))
    return cases


CASES = _load()


# --- data generators --------------------------------------------------------------------


def standard_rows() -> list[dict[str, str]]:
    """The standard data set: 30 rows, 6 groups of 5, a clean linear relation plus fixed noise."""
    rows = []
    for i in range(1, 31):
        x = round(10 + 5 * math.sin(i * 1.7) + i / 6, 3)
        z = round(3 + 2 * math.cos(i * 2.3), 3)
        noise = round(0.8 * math.sin(i * 7.31) + 0.5 * math.cos(i * 3.17), 3)
        y = round(4 + 1.5 * x - 2 * z + noise, 3)
        rows.append(
            {
                "id": f"r{i:02d}",
                "y": str(y),
                "x": str(x),
                "z": str(z),
                "g": f"g{(i - 1) // 5 + 1}",
                "t": str(i),
                "w": str(round(1 + (i % 4) / 2, 2)),
                "cat": "abc"[i % 3],
                "bin": str(i % 2),
                "const": "5",
                "x2": str(round(2 * x, 3)),
            }
        )
    return rows


def _csv(rows: list[dict[str, str]], newline: str = "\n") -> str:
    columns = list(rows[0])
    return newline.join([",".join(columns), *(",".join(r[c] for c in columns) for r in rows)]) + newline


def _standard(spec: dict[str, Any]) -> list[dict[str, str]]:
    rows = standard_rows()[: spec.get("rows", 30)]
    for edit in spec.get("edit", ()):
        rows[edit["row"] - 1][edit["column"]] = str(edit["value"])
    for column, value in (spec.get("fill") or {}).items():
        for row in rows:
            row[column] = str(value)
    return rows


def _generate(spec: str | dict[str, Any]) -> bytes | None:
    """File bytes from a case's description; None for a directory.

    Keywords: ``standard`` (with ``rows``, ``edit``, ``fill``), ``bom`` and
    ``crlf`` (the standard set with a UTF-8 byte-order mark or CRLF line ends),
    ``utf16``, ``latin1`` (``text`` encoded so), ``binary``, ``empty``,
    ``huge_line`` (``bytes`` long), ``directory``.
    """
    if isinstance(spec, str):
        return spec.encode("utf-8")
    kind = spec["generate"]
    text = spec.get("text")
    if kind == "standard":
        return _csv(_standard(spec)).encode("utf-8")
    if kind == "bom":
        return b"\xef\xbb\xbf" + _csv(_standard(spec)).encode("utf-8")
    if kind == "crlf":
        return _csv(_standard(spec), "\r\n").encode("utf-8")
    if kind == "utf16":
        return (text or _csv(_standard(spec))).encode("utf-16")
    if kind == "latin1":
        return str(text).encode("latin-1")
    if kind == "binary":
        return bytes(range(256)) * 16
    if kind == "empty":
        return b""
    if kind == "huge_line":
        rows = b"".join(b"%d,%d\n" % (i, 3 * i % 7) for i in range(1, 11))
        return b"y,x\n" + rows + b"11," + b"9" * int(spec["bytes"]) + b"\n"
    if kind == "directory":
        return None
    raise AssertionError(f"unknown generator {kind!r}")


def _document_bytes(spec: dict[str, Any]) -> bytes:
    kind = spec["generate"]
    if kind == "latin1":
        return str(spec["text"]).encode("latin-1")
    if kind == "many_blocks":
        blocks = [f"```premises\nid: b{i}\ndata: d.csv\nmodel: y ~ x\n```\n" for i in range(1, spec["count"] + 1)]
        return ("# Many\n\n" + "\n".join(blocks)).encode("utf-8")
    if kind == "huge_block":
        body = "id: a\ndata: d.csv\nmodel: y ~ x\n" + "".join(f"# {'filler ' * 12}{i}\n" for i in range(spec["lines"]))
        return WRAPPER.format(block=body).encode("utf-8")
    raise AssertionError(f"unknown document generator {kind!r}")


# --- the run ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Run:
    code: int
    out: str
    err: str
    document: Path
    output: Path
    figures: Path


def _fill(text: str, places: dict[str, Path]) -> str:
    for name, path in places.items():
        text = text.replace("{" + name + "}", str(path))
    return text


def _write_files(folder: Path, files: dict[str, Any]) -> None:
    for name, spec in files.items():
        target = folder / name
        data = _generate(spec)
        if data is None:
            target.mkdir(parents=True, exist_ok=True)
            continue
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(data)
        if isinstance(spec, dict) and "mode" in spec:
            target.chmod(spec["mode"])


def build_case(case: Case, root: Path) -> tuple[Path, Path, Path, list[str]]:
    """Write the case's project; return (project, outside folder, document, extra arguments)."""
    raw = case.raw
    project, outside = root / "project", root / "outside"
    project.mkdir(parents=True)
    outside.mkdir()
    places = {"project": project, "outside": outside}
    files = {"d.csv": {"generate": "standard"}, **(raw.get("files") or {})}
    _write_files(project, files)
    _write_files(outside, raw.get("outside") or {})
    for name, target in (raw.get("links") or {}).items():
        (project / name).symlink_to(_fill(target, places))
    document = project / "doc.md"
    places["document"] = document
    if raw.get("document_bytes", {}).get("generate") == "directory":
        document.mkdir()
    elif raw.get("document_bytes", {}).get("generate") == "absent":
        pass
    elif "document_bytes" in raw:
        document.write_bytes(_document_bytes(raw["document_bytes"]))
    elif "document" in raw:
        document.write_bytes(raw["document"].encode("utf-8"))
    else:
        block = _fill(raw["block"], places)
        for name, (text, times) in (raw.get("expand") or {}).items():
            block = block.replace("{" + name + "}", text * times)
        document.write_bytes(WRAPPER.format(block=block).encode("utf-8"))
    args = [_fill(str(a), places) for a in raw.get("args") or ()]
    return project, outside, document, args


def checksums(*folders: Path) -> dict[str, str]:
    """SHA-256 of every file below ``folders`` (symbolic links by their target text)."""
    found = {}
    for folder in folders:
        for path in sorted(folder.rglob("*")):
            if path.is_symlink():
                found[str(path)] = "link:" + os.readlink(path)
            elif path.is_file() and os.access(path, os.R_OK):
                found[str(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
            elif path.is_dir():
                found[str(path)] = "dir"
    return found


def run_case(case: Case, root: Path, capsys: pytest.CaptureFixture[str]) -> Run:
    root.mkdir(parents=True, exist_ok=True)
    project, outside, document, args = build_case(case, root)
    output = root / "out" / "doc.premises.md"
    before = checksums(project, outside)
    capsys.readouterr()
    code = main(["render", str(document), "-o", str(output), "--cache-dir", str(root / "cache"), *args])
    captured = capsys.readouterr()
    after = checksums(project, outside)
    assert after == before, "a source document or data file changed"
    return Run(code, captured.out, captured.err, document, output, output.parent / "doc-figures")


# --- the tests --------------------------------------------------------------------------


@pytest.mark.parametrize("count", [len(CASES)], ids=[f"{len(CASES)}-cases"])
def test_the_catalogue_has_at_least_sixty_cases(count: int) -> None:
    by_theme = {t: sum(c.theme == t for c in CASES) for t in THEMES}
    print(f"catalogue: {count} cases ({', '.join(f'{t} {n}' for t, n in by_theme.items())})")
    assert count >= 60
    assert all(by_theme.values())


def _skip_if_root(case: Case) -> None:
    reason = case.raw.get("root_skip")
    if reason and hasattr(os, "geteuid") and os.geteuid() == 0:
        pytest.skip(reason)


@pytest.mark.parametrize("case", CASES, ids=[c.test_id for c in CASES])
def test_case(case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _skip_if_root(case)
    run = run_case(case, tmp_path, capsys)
    assert "Traceback" not in run.err
    if case.raw.get("succeed"):
        _check_success(case, run)
    else:
        _check_failure(case, run)


def _check_success(case: Case, run: Run) -> None:
    assert run.code == 0, run.err
    assert run.err == ""
    text = run.output.read_bytes().decode("utf-8")  # line ends as written
    for pattern in case.raw.get("output") or ():
        assert re.search(pattern, text), f"output lacks {pattern!r}"


def _check_failure(case: Case, run: Run) -> None:
    raw = case.raw
    assert run.code == 2, f"exit {run.code}: {run.err}"
    lines = run.err.rstrip("\n").split("\n")
    assert len(lines) == 1, f"expected one message line, got:\n{run.err}"
    message = lines[0]
    assert message.startswith("premises: ")
    assert run.out == ""
    for pattern in raw["expect"]:
        assert re.search(pattern, message), f"{pattern!r} not in: {message}"
    assert re.search(raw["fix"], message), f"fix {raw['fix']!r} not in: {message}"
    if "line" in raw:
        assert f"{run.document}:{raw['line']}:" in message, message
    if "block_id" in raw:
        assert f"block '{raw['block_id']}'" in message, message
    if "key" in raw:
        assert f"key '{raw['key']}'" in message, message
    assert not run.output.exists(), "an output was written"
    assert not run.figures.exists(), "a figures folder was written"
    assert not run.output.parent.exists()


def test_the_documented_limits_are_the_ones_in_force() -> None:
    """docs/limits.md quotes each limit with the constant that sets it; they must agree."""
    import importlib

    table = (Path(__file__).parents[1] / "docs" / "limits.md").read_text(encoding="utf-8")
    rows = re.findall(
        r"^\| [^|]+ \| ([0-9,.]+)(?: (GiB|characters|levels))? \| `(?:--[a-z-]+` \(`)?premises\.([a-z.]+)\.([A-Z_]+)`",
        table,
        re.MULTILINE,
    )
    assert len(rows) == 11
    for number, unit, module, name in rows:
        value = getattr(importlib.import_module(f"premises.{module}"), name)
        expected = float(number.replace(",", "")) * (1024**3 if unit == "GiB" else 1)
        assert value == expected, f"{module}.{name} is {value}, docs/limits.md says {number} {unit}"


CHECKED = [c for c in CASES if c.raw.get("check", True)]


@pytest.mark.parametrize("case", CHECKED, ids=[c.test_id for c in CHECKED])
def test_check_finds_what_render_finds(case: Case, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``premises check`` validates without fitting: the same message as the render, or success."""
    _skip_if_root(case)
    run = run_case(case, tmp_path / "render", capsys)
    _, _, document, args = build_case(case, tmp_path / "check")
    options = [a for i, a in enumerate(args) if a != "-o" and (i == 0 or args[i - 1] != "-o")]
    code = main(["check", str(document), *options])
    err = capsys.readouterr().err
    assert code == run.code, err
    rendered_message = run.err.replace(str(tmp_path / "render"), str(tmp_path / "check"))
    assert err == rendered_message


def test_every_fixture_file_is_a_theme() -> None:
    assert sorted(p.stem for p in CATALOGUE.glob("*.yaml")) == sorted(THEMES)


if __name__ == "__main__":  # pragma: no cover - for the README's count
    print(len(CASES))
    sys.exit(0)
