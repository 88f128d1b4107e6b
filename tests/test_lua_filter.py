"""The pandoc Lua filter (premises.lua) and its reference pass (premises-refs.lua).

Most tests put a stand-in interpreter in place of Python (PREMISES_PYTHON), so
they check the filter's own work: which blocks it finds, what it sends, how it
splices the reply, how it fails. The end-to-end tests at the bottom run the
real package on the example project.

Every test runs on each pandoc found: the one in the pypandoc-binary wheel
(3.x) and Debian's /usr/bin/pandoc (2.17) where it is installed.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from premises._version import PROTOCOL_VERSION
from premises.quarto import lua_filter_path

pytestmark = pytest.mark.pandoc

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "example_project"
LUA = lua_filter_path()
REFS = LUA.with_name("premises-refs.lua")


def _pandocs() -> list[tuple[str, str]]:
    found: list[tuple[str, str]] = []
    try:
        import pypandoc  # type: ignore[import-untyped]

        found.append(("wheel", str(pypandoc.get_pandoc_path())))
    except (ImportError, OSError):
        pass
    if Path("/usr/bin/pandoc").is_file():
        found.append(("debian", "/usr/bin/pandoc"))
    return found


PANDOCS = _pandocs()
if not PANDOCS:  # pragma: no cover - CI installs both
    pytest.skip("no pandoc binary found (install the test extra: pypandoc-binary)", allow_module_level=True)


@pytest.fixture(params=PANDOCS, ids=[name for name, _ in PANDOCS])
def pandoc(request: pytest.FixtureRequest) -> str:
    return str(request.param[1])


def _version(pandoc: str) -> tuple[int, ...]:
    first = subprocess.run([pandoc, "--version"], capture_output=True, text=True, check=True).stdout.split("\n")[0]
    return tuple(int(part) for part in first.split()[1].split("."))


def _env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("PREMISES_PYTHON", "QUARTO_PYTHON")}
    env.update(extra)
    return env


def _run(pandoc: str, args: list[str], cwd: Path, env: dict[str, str], stdin: str | None = None) -> subprocess.CompletedProcess[bytes]:
    # --wrap=none: assertions look for whole elements, which line wrapping would split
    return subprocess.run([pandoc, "--wrap=none", *args], cwd=cwd, env=env, input=stdin.encode() if stdin is not None else None, capture_output=True, check=False, timeout=600)


FAKE = """\
#!PYTHON
# Stands in for `python -m premises filter`: logs its call, answers from FAKE_MODE.
import json, os, re, sys
name = "NAME"
request = sys.stdin.read()
with open(os.environ["FAKE_LOG"], "a", encoding="utf-8") as log:
    log.write(json.dumps({"name": name, "args": sys.argv[1:], "request": request}) + "\\n")
mode = os.environ.get("FAKE_MODE", "echo")
if mode == "fail":
    print("premises: doc.md:7: block 'a', key 'se': the se key is wrong. Write se: hc3.")
    sys.exit(2)
if mode == "empty":
    sys.exit(0)
for n in re.findall(r"premises-out-(\\d+)", request):
    print("::: {#premises-out-" + n + "}")
    print("Section " + n + " by " + name + ". See @fig-fake-" + n + " and @tbl-fake-" + n + ".")
    print()
    print("![Fake figure " + n + "](fig" + n + ".png){#fig-fake-" + n + "}")
    print()
    print("| a | b |")
    print("|---|---|")
    print("| 1 | 2 |")
    print()
    print(": Fake table " + n + " {#tbl-fake-" + n + "}")
    print(":::")
    print()
"""


def _fake(folder: Path, name: str = "fake") -> Path:
    path = folder / name
    path.write_text(FAKE.replace("PYTHON", sys.executable).replace("NAME", name), encoding="utf-8")
    path.chmod(0o755)
    return path


def _meta(folder: Path, line: str) -> str:
    """A metadata file setting one premises: key (pandoc's -M does not nest keys)."""
    path = folder / "meta.yml"
    path.write_text(f"premises:\n  {line}\n", encoding="utf-8")
    return str(path)


def _calls(log: Path) -> list[dict[str, object]]:
    if not log.exists():
        return []
    return [json.loads(line) for line in log.read_text(encoding="utf-8").splitlines()]


DOC = """\
---
title: A test
---

Intro with a citation [@smith2020] and `code`.

```premises
id: a
```

- an item

  ```{.premises #b detail=brief}
  id: b
  ```

> quoted
>
> ```premises
> id: c
> ```

```python
print("not a block")
```
"""


@pytest.fixture
def doc(tmp_path: Path) -> Path:
    path = tmp_path / "doc.md"
    path.write_text(DOC, encoding="utf-8")
    return path


def test_no_block_document_is_byte_identical(pandoc: str, tmp_path: Path) -> None:
    source = tmp_path / "plain.md"
    source.write_text(
        "---\ntitle: Plain\n---\n\nText [@smith2020] and @fig-x.\n\n![Cap](x.png){#fig-x}\n\n"
        "| a |\n|---|\n| 1 |\n\n: Cap {#tbl-y}\n\n```python\nx = 1\n```\n",
        encoding="utf-8",
    )
    # A missing interpreter proves the filter never calls out when there is nothing to do.
    env = _env(PREMISES_PYTHON=str(tmp_path / "no-such-python"))
    for to in ("html", "latex", "native", "markdown"):
        plain = _run(pandoc, [source.name, "-s", "-t", to], tmp_path, env)
        filtered = _run(pandoc, [source.name, "-s", "-t", to, "--lua-filter", str(LUA)], tmp_path, env)
        assert plain.returncode == 0 and filtered.returncode == 0, filtered.stderr
        assert filtered.stdout == plain.stdout, to


def test_request_holds_every_block_in_document_order(pandoc: str, doc: Path, tmp_path: Path) -> None:
    log = tmp_path / "log.jsonl"
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(log))
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 0, done.stderr
    calls = _calls(log)
    assert len(calls) == 1  # one process per document, however many blocks
    args = calls[0]["args"]
    assert args == [
        "-m", "premises", "filter", "--protocol", str(PROTOCOL_VERSION), "--flavor", "pandoc",
        "--base-dir", args[8], "--input", "doc.md", "--on-error", "fail",
    ]
    assert Path(str(args[8])).resolve() == tmp_path.resolve()
    request = str(calls[0]["request"])
    numbers = re.findall(r"\{#premises-out-(\d+)\}", request)
    assert numbers == ["1", "2", "3"]
    # top level, inside a list item, inside a block quote, in that order; other code is not sent
    assert [m for m in re.findall(r"^id: (\w)$", request, re.MULTILINE)] == ["a", "b", "c"]
    assert "not a block" not in request
    assert "detail" in request and "#b" in request  # fence attributes travel with the block
    html = done.stdout.decode()
    for number in (1, 2, 3):
        assert f"Section {number} by fake." in html
    assert "not a block" in html and "id: a" not in html


def test_reply_is_spliced_and_references_numbered(pandoc: str, doc: Path, tmp_path: Path) -> None:
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(tmp_path / "log.jsonl"))
    html = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert html.returncode == 0, html.stderr
    text = html.stdout.decode()
    assert '<a href="#fig-fake-2">Figure\u00a02</a>' in text
    assert '<a href="#tbl-fake-3">Table\u00a03</a>' in text
    assert re.search(r'id="tbl-fake-1"', text) and "{#tbl" not in text
    assert "Table\u00a01: Fake table 1" in text and "Figure\u00a03: Fake figure 3" in text
    assert 'data-cites="smith2020"' in text  # a real citation is left for citeproc
    latex = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "latex"], tmp_path, env)
    assert latex.returncode == 0, latex.stderr
    tex = latex.stdout.decode()
    for number in (1, 2, 3):
        assert f"\\label{{fig-fake-{number}}}" in tex
        assert f"\\label{{tbl-fake-{number}}}" in tex
        assert f"Figure~\\ref{{fig-fake-{number}}}" in tex
    assert "Figure 1:" not in tex and "Figure\u00a01:" not in tex  # LaTeX numbers its floats itself


def test_input_in_another_folder_and_stdin(pandoc: str, doc: Path, tmp_path: Path) -> None:
    sub = tmp_path / "sub"
    sub.mkdir()
    shutil.move(str(doc), sub / "doc.md")
    log = tmp_path / "log.jsonl"
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(log))
    done = _run(pandoc, ["sub/doc.md", "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 0, done.stderr
    args = list(_calls(log)[-1]["args"])  # type: ignore[arg-type]
    assert Path(args[args.index("--base-dir") + 1]).resolve() == sub.resolve()
    assert args[args.index("--input") + 1] == "sub/doc.md"
    piped = _run(pandoc, ["--lua-filter", str(LUA), "-f", "markdown", "-t", "html"], tmp_path, env, stdin=DOC)
    assert piped.returncode == 0, piped.stderr
    args = list(_calls(log)[-1]["args"])  # type: ignore[arg-type]
    assert Path(args[args.index("--base-dir") + 1]).resolve() == tmp_path.resolve()
    assert args[args.index("--input") + 1] == "-"


def test_interpreter_comes_from_metadata_then_environment(pandoc: str, doc: Path, tmp_path: Path) -> None:
    log = tmp_path / "log.jsonl"
    meta, own, quarto_py = _fake(tmp_path, "meta"), _fake(tmp_path, "own"), _fake(tmp_path, "quarto")
    base = _env(FAKE_LOG=str(log), PREMISES_PYTHON=str(own), QUARTO_PYTHON=str(quarto_py))
    meta_file = tmp_path / "meta.yml"
    meta_file.write_text(f"premises:\n  python: {meta}\n", encoding="utf-8")
    cases = [
        (["--metadata-file", str(meta_file)], base, "meta"),
        ([], base, "own"),
        ([], {k: v for k, v in base.items() if k != "PREMISES_PYTHON"}, "quarto"),
    ]
    for extra, env, expected in cases:
        done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html", *extra], tmp_path, env)
        assert done.returncode == 0, done.stderr
        assert _calls(log)[-1]["name"] == expected


def test_failure_stops_with_exit_83_and_the_message(pandoc: str, doc: Path, tmp_path: Path) -> None:
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(tmp_path / "log.jsonl"), FAKE_MODE="fail")
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 83
    stderr = done.stderr.decode()
    assert "doc.md:7: block 'a', key 'se': the se key is wrong. Write se: hc3." in stderr
    assert stderr.count("the se key is wrong") == 1  # said once, not once per channel


def test_warn_mode_puts_a_callout_in_place_of_each_block(pandoc: str, doc: Path, tmp_path: Path) -> None:
    log = tmp_path / "log.jsonl"
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(log), FAKE_MODE="fail")
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html", "--metadata-file", _meta(tmp_path, "on-error: warn")], tmp_path, env)
    assert done.returncode == 0, done.stderr
    html = done.stdout.decode()
    assert html.count('class="callout-warning"') == 3
    assert "the se key is wrong" in html
    assert "the se key is wrong" in done.stderr.decode()  # also a warning on the terminal
    assert _calls(log)[-1]["args"][-2:] == ["--on-error", "warn"]


def test_bad_on_error_value_is_refused(pandoc: str, doc: Path, tmp_path: Path) -> None:
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(tmp_path / "log.jsonl"))
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html", "--metadata-file", _meta(tmp_path, "on-error: ignore")], tmp_path, env)
    assert done.returncode == 83
    assert "premises.on-error" in done.stderr.decode() and "fail or warn" in done.stderr.decode()


def test_missing_interpreter_says_how_to_name_one(pandoc: str, doc: Path, tmp_path: Path) -> None:
    env = _env(PREMISES_PYTHON=str(tmp_path / "no-such-python"))
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 83
    stderr = done.stderr.decode()
    assert "no-such-python" in stderr and "PREMISES_PYTHON" in stderr and "premises.python" in stderr


def test_reply_without_a_section_names_the_protocol(pandoc: str, doc: Path, tmp_path: Path) -> None:
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(tmp_path / "log.jsonl"), FAKE_MODE="empty")
    done = _run(pandoc, [doc.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 83
    assert "no section for block 1" in done.stderr.decode()


def test_executable_fence_is_refused_where_pandoc_reads_it_as_code(pandoc: str, tmp_path: Path) -> None:
    if _version(pandoc) >= (3,):
        pytest.skip("pandoc 3 reads ```{premises} as inline code, not a code block")
    source = tmp_path / "exec.md"
    source.write_text("```{premises}\nid: a\n```\n", encoding="utf-8")
    env = _env(PREMISES_PYTHON=str(_fake(tmp_path)), FAKE_LOG=str(tmp_path / "log.jsonl"))
    done = _run(pandoc, [source.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, env)
    assert done.returncode == 83
    assert "```premises or ```{.premises}" in done.stderr.decode()


def test_refs_pass_alone_resolves_only_known_ids(pandoc: str, tmp_path: Path) -> None:
    source = tmp_path / "refs.md"
    source.write_text(
        "See [@fig-a; @fig-b], [-@tbl-c], [see @tbl-c, p. 2] and @fig-unknown.\n\n"
        "![First](a.png){#fig-a}\n\n![Second](b.png){#fig-b}\n\n| x |\n|---|\n| 1 |\n\n: Coefs {#tbl-c}\n",
        encoding="utf-8",
    )
    done = _run(pandoc, [source.name, "--lua-filter", str(REFS), "-t", "html"], tmp_path, _env())
    assert done.returncode == 0, done.stderr
    html = done.stdout.decode()
    assert '<a href="#fig-a">Figure\u00a01</a> and <a href="#fig-b">Figure\u00a02</a>' in html
    assert '<a href="#tbl-c">1</a>' in html  # -@ keeps only the number
    assert 'see <a href="#tbl-c">Table\u00a01</a>, p.' in html
    assert 'data-cites="fig-unknown"' in html  # not ours: untouched


# --- end to end: the real package ------------------------------------------------------------


def _copy_example(folder: Path) -> Path:
    shutil.copytree(EXAMPLE / "data", folder / "data")
    shutil.copy2(EXAMPLE / "report.qmd", folder / "report.qmd")
    return folder / "report.qmd"


def _block_span(text: str) -> tuple[int, int, int]:
    from premises.documents.markdown import find_blocks

    block = find_blocks(text)[0]
    return block.start, block.end, block.line


TEE = '''\
#!{python}
import os, subprocess, sys
done = subprocess.run([{python!r}, *sys.argv[1:]], input=sys.stdin.buffer.read(), capture_output=True, check=False)
with open(os.environ["TEE_LOG"], "wb") as log:
    log.write(done.stdout)
sys.stdout.buffer.write(done.stdout)
sys.stderr.buffer.write(done.stderr)
sys.exit(done.returncode)
'''


@pytest.fixture(scope="module")
def cli_section(tmp_path_factory: pytest.TempPathFactory) -> str:
    """The section `premises render --flavor pandoc` writes for the example report."""
    folder = tmp_path_factory.mktemp("cli")
    report = _copy_example(folder)
    out = folder / "report.premises.md"
    done = subprocess.run(
        [sys.executable, "-m", "premises", "render", "report.qmd", "--flavor", "pandoc", "-o", out.name],
        cwd=folder, capture_output=True, check=False, text=True, timeout=600,
    )
    assert done.returncode == 0, done.stderr
    source = report.read_text(encoding="utf-8")
    start, end, _ = _block_span(source)
    rendered = out.read_text(encoding="utf-8")
    return rendered[start : len(rendered) - (len(source) - end)]


def _reply_section(reply: str, number: int) -> str:
    match = re.search(r"^(:{3,}) \{#premises-out-" + str(number) + r"\}\n(.*?)\n\1\n", reply, re.MULTILINE | re.DOTALL)
    assert match, reply[:500]
    return match.group(2)


def test_example_report_through_the_filter(pandoc: str, tmp_path: Path, cli_section: str) -> None:
    report = _copy_example(tmp_path)
    tee = tmp_path / "tee"
    tee.write_text(TEE.format(python=sys.executable), encoding="utf-8")
    tee.chmod(0o755)
    env = _env(PREMISES_PYTHON=str(tee), TEE_LOG=str(tmp_path / "reply.md"))
    done = _run(pandoc, [report.name, "--lua-filter", str(LUA), "-s", "-o", "out.html"], tmp_path, env)
    assert done.returncode == 0, done.stderr
    # the filter splices exactly the section the command line writes
    assert _reply_section((tmp_path / "reply.md").read_text(encoding="utf-8"), 1).strip("\n") == cli_section.strip("\n")
    html = (tmp_path / "out.html").read_text(encoding="utf-8")
    figure_ids = sorted(set(re.findall(r"\{#(fig-[a-z0-9-]+)", cli_section)))
    table_ids = sorted(set(re.findall(r"\{#(tbl-[a-z0-9-]+)", cli_section)))
    assert figure_ids, "the section has figures"
    for identifier in figure_ids + table_ids:
        assert f'id="{identifier}"' in html, identifier
    for path in re.findall(r"\]\((report-figures/[^)\s]+)", cli_section):
        assert (tmp_path / path).is_file(), path  # figures land beside the document
    assert not re.search(r'data-cites="(fig|tbl)-', html), "every figure and table reference is resolved"
    for referenced in set(re.findall(r"@((?:fig|tbl)-[a-z0-9-]+)", cli_section)):
        assert f'href="#{referenced}"' in html


def test_example_report_to_latex_labels_every_float(pandoc: str, tmp_path: Path, cli_section: str) -> None:
    report = _copy_example(tmp_path)
    env = _env(PREMISES_PYTHON=sys.executable)
    done = _run(pandoc, [report.name, "--lua-filter", str(LUA), "-t", "latex"], tmp_path, env)
    assert done.returncode == 0, done.stderr
    tex = done.stdout.decode()
    for identifier in set(re.findall(r"\{#((?:fig|tbl)-[a-z0-9-]+)", cli_section)):
        assert f"\\label{{{identifier}}}" in tex, identifier


def _broken_report(folder: Path, warn: bool) -> tuple[Path, int]:
    report = _copy_example(folder)
    text = report.read_text(encoding="utf-8").replace("se: auto", "se: hc4")
    if warn:
        text = text.replace("premises:\n", "premises:\n  on-error: warn\n", 1)
    report.write_text(text, encoding="utf-8")
    line = text.splitlines().index("se: hc4") + 1
    return report, line


def test_real_failure_names_file_line_block_and_key(pandoc: str, tmp_path: Path) -> None:
    report, line = _broken_report(tmp_path, warn=False)
    done = _run(pandoc, [report.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, _env(PREMISES_PYTHON=sys.executable))
    assert done.returncode == 83
    stderr = done.stderr.decode()
    assert f"report.qmd:{line}: block 'basil', key 'se'" in stderr
    assert "hc3" in stderr  # the hint travels too


def test_real_warn_mode_shows_the_located_message(pandoc: str, tmp_path: Path) -> None:
    report, line = _broken_report(tmp_path, warn=True)
    done = _run(pandoc, [report.name, "--lua-filter", str(LUA), "-t", "html"], tmp_path, _env(PREMISES_PYTHON=sys.executable))
    assert done.returncode == 0, done.stderr
    html = done.stdout.decode()
    assert 'class="callout-warning"' in html
    assert f"report.qmd:{line}: block" in html
    assert "Discussion" in html  # the rest of the document is intact


def test_cli_refuses_another_protocol() -> None:
    done = subprocess.run(
        [sys.executable, "-m", "premises", "filter", "--protocol", str(PROTOCOL_VERSION + 98)],
        input="", capture_output=True, check=False, text=True, timeout=120,
    )
    assert done.returncode == 2
    assert f"protocol {PROTOCOL_VERSION + 98}" in done.stdout and f"protocol {PROTOCOL_VERSION}" in done.stdout


def test_lua_filter_command_prints_the_packaged_file() -> None:
    done = subprocess.run([sys.executable, "-m", "premises", "lua-filter"], capture_output=True, check=False, text=True, timeout=120)
    assert done.returncode == 0
    assert Path(done.stdout.strip()) == LUA and LUA.is_file()


def test_filter_declares_its_minimum_pandoc() -> None:
    text = LUA.read_text(encoding="utf-8")
    assert "PANDOC_VERSION:must_be_at_least '2.17'" in text
    assert f"local PROTOCOL = '{PROTOCOL_VERSION}'" in text
