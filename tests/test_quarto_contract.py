"""What Quarto needs from premises, checked without Quarto.

* the extension manifest (shape, strict semver equal to the package version,
  ``at: pre-ast``) and its Lua files, byte-identical to the packaged ones;
* the filter's Quarto code path, driven through a Lua shim that stands in for
  Quarto's ``quarto`` global;
* Quarto's own test for executable cells never claims a supported fence;
* ``premises quarto install`` and ``premises quarto prerender`` (with the
  environment Quarto passes to pre-render scripts, both variants).

Tests marked ``quarto`` run the real thing and are skipped where it is absent.
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
import yaml

from premises import __version__
from premises.quarto import (
    extension_source,
    install_extension,
    lua_filter_path,
    prerender,
    project_inputs,
    quiet_from_env,
)

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "example_project"
EXTENSION = extension_source()
LUA = lua_filter_path()

# Semantic Versioning 2.0.0, the regular expression the specification suggests (semver.org, FAQ).
SEMVER = re.compile(
    r"^(0|[1-9]\d*)\.(0|[1-9]\d*)\.(0|[1-9]\d*)"
    r"(?:-((?:0|[1-9]\d*|\d*[a-zA-Z-][0-9a-zA-Z-]*)(?:\.(?:0|[1-9]\d*|\d*[a-zA-Z-][0-9a-zA-Z-]*))*))?"
    r"(?:\+([0-9a-zA-Z-]+(?:\.[0-9a-zA-Z-]+)*))?$"
)

# Quarto's test for the first line of an executable cell, copied from
# quarto-dev/quarto-cli src/core/lib/break-quarto-md.ts (startCodeCellRegEx).
QUARTO_CELL_START = re.compile(r"^\s*```+\s*\{([=A-Za-z]+)( *[ ,].*)?\}\s*$")


def _manifest() -> dict[str, object]:
    return yaml.safe_load((EXTENSION / "_extension.yml").read_text(encoding="utf-8"))  # type: ignore[no-any-return]


def test_manifest_shape() -> None:
    manifest = _manifest()
    assert set(manifest) == {"title", "author", "version", "quarto-required", "contributes"}
    assert manifest["title"] == "premises"
    assert isinstance(manifest["author"], str) and manifest["author"]
    assert manifest["quarto-required"] == ">=1.4.0"
    assert manifest["contributes"] == {"filters": [{"path": "premises.lua", "at": "pre-ast"}]}


def test_manifest_version_is_strict_semver_and_the_package_version() -> None:
    version = str(_manifest()["version"])
    assert SEMVER.match(version), version
    assert version == __version__
    assert not SEMVER.match("1.2")  # the pattern itself rejects what Quarto rejects


def test_extension_lua_files_are_the_packaged_ones() -> None:
    for name in ("premises.lua", "premises-refs.lua"):
        assert (EXTENSION / name).read_bytes() == (LUA.parent / name).read_bytes(), name
    assert (EXTENSION / "premises.lua").is_file()


def test_quarto_never_takes_a_supported_fence_for_a_code_cell() -> None:
    for fence in ("```premises", "```{.premises}", "```{.premises #basil detail=brief}", "````premises", "``` {.premises}"):
        assert QUARTO_CELL_START.match(fence) is None, fence
    # ... while the form the scanner rejects is one (it would look for a 'premises' engine)
    assert QUARTO_CELL_START.match("```{premises}") is not None


def test_install_copies_the_extension_and_replaces_an_old_copy(tmp_path: Path) -> None:
    target = install_extension(tmp_path)
    assert target == tmp_path / "_extensions" / "premises"
    for source in EXTENSION.iterdir():
        assert (target / source.name).read_bytes() == source.read_bytes()
    (target / "premises.lua").write_text("-- stale\n", encoding="utf-8")
    (target / "leftover.lua").write_text("-- stale\n", encoding="utf-8")
    install_extension(tmp_path)
    assert (target / "premises.lua").read_bytes() == LUA.read_bytes()
    assert not (target / "leftover.lua").exists()


def test_install_command(tmp_path: Path) -> None:
    done = subprocess.run([sys.executable, "-m", "premises", "quarto", "install", str(tmp_path)], capture_output=True, check=False, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "_extensions" / "premises" / "_extension.yml").is_file()
    missing = subprocess.run([sys.executable, "-m", "premises", "quarto", "install", str(tmp_path / "nope")], capture_output=True, check=False, text=True, timeout=120)
    assert missing.returncode == 2 and "does not exist" in missing.stderr


# --- the Quarto code path of the filter, through a shim ------------------------------------

SHIM = """\
-- Stands in for Quarto's `quarto` global (quarto.doc.input_file, add_resource, log).
local function record(path, text)
  local handle = io.open(path, 'a')
  handle:write(text, '\\n')
  handle:close()
end
quarto = {
  doc = {
    input_file = os.getenv('SHIM_INPUT'),
    add_resource = function(path) record(os.getenv('SHIM_LOG'), 'resource ' .. path) end,
  },
  log = {
    warning = function(message) record(os.getenv('SHIM_LOG'), 'warning ' .. message) end,
  },
}
return dofile(os.getenv('SHIM_FILTER'))
"""

FAKE = """\
#!PYTHON
import json, os, re, sys
request = sys.stdin.read()
with open(os.environ["SHIM_LOG"], "a", encoding="utf-8") as log:
    log.write("args " + json.dumps(sys.argv[1:]) + "\\n")
if os.environ.get("FAKE_MODE") == "fail":
    print("premises: report.qmd:9: block 'a': broken.")
    sys.exit(2)
for n in re.findall(r"premises-out-(\\d+)", request):
    print("::: {#premises-out-" + n + "}")
    print("See @fig-q-" + n + ".")
    print()
    print("![Caption " + n + "](report-figures/q" + n + ".png){#fig-q-" + n + "}")
    print(":::")
"""


def _pandoc() -> str:
    import pypandoc  # type: ignore[import-untyped]

    return str(pypandoc.get_pandoc_path())


def _shim_run(tmp_path: Path, filter_path: Path, *, mode: str = "echo", meta: str = "") -> tuple[subprocess.CompletedProcess[str], list[str], Path]:
    project = tmp_path / "project"
    project.mkdir()
    real = project / "report.qmd"
    real.write_text("---\ntitle: Real\n---\n\n```{.premises}\nid: a\n```\n", encoding="utf-8")
    # Quarto hands pandoc a temporary copy elsewhere; the filter must use quarto.doc.input_file.
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    (scratch / "quarto-input.md").write_text(f"---\ntitle: Real\n{meta}---\n\n```{{.premises}}\nid: a\n```\n", encoding="utf-8")
    shim = tmp_path / "shim.lua"
    shim.write_text(SHIM, encoding="utf-8")
    fake = tmp_path / "fake"
    fake.write_text(FAKE.replace("PYTHON", sys.executable), encoding="utf-8")
    fake.chmod(0o755)
    log = tmp_path / "shim.log"
    env = {k: v for k, v in os.environ.items() if k not in ("QUARTO_PYTHON",)}
    env.update(SHIM_INPUT=str(real), SHIM_LOG=str(log), SHIM_FILTER=str(filter_path), PREMISES_PYTHON=str(fake), FAKE_MODE=mode)
    done = subprocess.run(
        [_pandoc(), "quarto-input.md", "--lua-filter", str(shim), "-t", "json"], cwd=scratch, env=env, capture_output=True, check=False, text=True, timeout=300
    )
    lines = log.read_text(encoding="utf-8").splitlines() if log.exists() else []
    return done, lines, project


@pytest.mark.pandoc
@pytest.mark.parametrize("filter_path", [LUA, EXTENSION / "premises.lua"], ids=["packaged", "extension"])
def test_quarto_path_uses_the_real_input_and_the_quarto_flavor(tmp_path: Path, filter_path: Path) -> None:
    done, log, project = _shim_run(tmp_path, filter_path)
    assert done.returncode == 0, done.stderr
    args = json.loads(next(line for line in log if line.startswith("args "))[5:])
    assert args[args.index("--flavor") + 1] == "quarto"
    assert Path(args[args.index("--base-dir") + 1]) == project
    assert args[args.index("--input") + 1] == str(project / "report.qmd")
    assert "resource report-figures/q1.png" in log  # figures registered with Quarto
    ast = json.loads(done.stdout)
    kinds = [block["t"] for block in ast["blocks"]]
    assert "CodeBlock" not in kinds
    # Quarto resolves cross-references itself: the plain-pandoc pass must not run here.
    assert '"Cite"' in done.stdout and "fig-q-1" in done.stdout
    assert '"Link"' not in done.stdout


@pytest.mark.pandoc
def test_quarto_path_warns_through_quarto_log(tmp_path: Path) -> None:
    done, log, _ = _shim_run(tmp_path, LUA, mode="fail", meta="premises:\n  on-error: warn\n")
    assert done.returncode == 0, done.stderr
    assert any(line.startswith("warning premises: report.qmd:9: block 'a': broken.") for line in log)
    assert "callout-warning" in done.stdout


@pytest.mark.pandoc
def test_quarto_path_fails_with_exit_83(tmp_path: Path) -> None:
    done, _, _ = _shim_run(tmp_path, LUA, mode="fail")
    assert done.returncode == 83
    assert "report.qmd:9: block 'a': broken." in done.stderr


# --- pre-render ----------------------------------------------------------------------------

GOOD = """\
---
title: Good
---

```premises
id: good
data: data/trial.csv
model: y ~ x
```
"""

BAD = """\
---
title: Bad
---

Text.

```premises
id: bad
data: data/trial.csv
model: y ~ x
se: hc4
```
"""

NO_COLUMN = GOOD.replace("id: good", "id: nocol").replace("y ~ x", "y ~ z")


@pytest.fixture
def project(tmp_path: Path) -> Path:
    (tmp_path / "data").mkdir()
    rows = "\n".join(f"{x},{2 + 0.5 * x + (x % 3) * 0.1:.2f}" for x in range(30))
    (tmp_path / "data" / "trial.csv").write_text("x,y\n" + rows + "\n", encoding="utf-8")
    (tmp_path / "good.qmd").write_text(GOOD, encoding="utf-8")
    (tmp_path / "bad.qmd").write_text(BAD, encoding="utf-8")
    (tmp_path / "nocol.qmd").write_text(NO_COLUMN, encoding="utf-8")
    (tmp_path / "plain.qmd").write_text("# No blocks\n", encoding="utf-8")
    (tmp_path / "styles.css").write_text("body {}\n", encoding="utf-8")
    return tmp_path


def test_project_inputs_from_the_variable_and_from_the_list_file(project: Path) -> None:
    listing = "good.qmd\nsub/other.md\n\n"
    from_var = project_inputs({"QUARTO_PROJECT_INPUT_FILES": listing}, project)
    assert from_var == [project / "good.qmd", project / "sub" / "other.md"]
    (project / "inputs.txt").write_text(listing, encoding="utf-8")
    from_file = project_inputs({"QUARTO_USE_FILE_FOR_PROJECT_INPUT_FILES": "inputs.txt", "QUARTO_PROJECT_INPUT_FILES": "ignored.qmd"}, project)
    assert from_file == from_var
    with pytest.raises(Exception, match="QUARTO_PROJECT_INPUT_FILES is not set"):
        project_inputs({}, project)


def test_prerender_reports_every_failing_document_with_its_line(project: Path) -> None:
    paths = [project / name for name in ("good.qmd", "bad.qmd", "nocol.qmd", "plain.qmd", "styles.css")]
    warmed: list[Path] = []
    report = prerender(paths, echo=None, warm=warmed.append)
    messages = [error.message for error in report.errors]
    assert len(messages) == 2
    bad_line = BAD.splitlines().index("se: hc4") + 1
    assert any(f"bad.qmd:{bad_line}: block 'bad', key 'se'" in m for m in messages)
    assert any("nocol.qmd" in m and "'z'" in m for m in messages)  # data columns are checked too
    assert (project / "good.qmd", 1) in report.checked and (project / "plain.qmd", 0) in report.checked
    assert all(path.suffix != ".css" for path, _ in report.checked)
    assert warmed == []  # nothing is prepared for the render while any document fails


def test_prerender_warms_every_document_with_blocks_once_all_pass(project: Path) -> None:
    warmed: list[Path] = []
    lines: list[str] = []
    report = prerender([project / "good.qmd", project / "plain.qmd"], echo=lines.append, warm=warmed.append)
    assert report.errors == ()
    assert warmed == [project / "good.qmd"]
    assert lines == [f"premises: {project / 'good.qmd'}: 1 block ok"]


def _prerender_cli(project: Path, env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    base = {k: v for k, v in os.environ.items() if not k.startswith("QUARTO_")}
    base.update(env)
    return subprocess.run([sys.executable, "-m", "premises", "quarto", "prerender"], cwd=project, env=base, capture_output=True, check=False, text=True, timeout=300)


def test_prerender_command_with_quarto_environment(project: Path) -> None:
    ok = _prerender_cli(project, {"QUARTO_PROJECT_INPUT_FILES": "good.qmd\nplain.qmd", "QUARTO_PROJECT_RENDER_ALL": "1"})
    assert ok.returncode == 0, ok.stderr
    assert "good.qmd: 1 block ok" in ok.stdout
    quiet = _prerender_cli(project, {"QUARTO_PROJECT_INPUT_FILES": "good.qmd", "QUARTO_PROJECT_SCRIPT_QUIET": "1"})
    assert quiet.returncode == 0 and quiet.stdout == ""
    (project / "list.txt").write_text("good.qmd\nbad.qmd\n", encoding="utf-8")
    failing = _prerender_cli(project, {"QUARTO_USE_FILE_FOR_PROJECT_INPUT_FILES": "list.txt", "QUARTO_PROJECT_SCRIPT_QUIET": "1"})
    assert failing.returncode == 2
    assert "bad.qmd:" in failing.stderr and "block 'bad'" in failing.stderr and "nothing was rendered" in failing.stderr
    missing = _prerender_cli(project, {})
    assert missing.returncode == 2 and "QUARTO_PROJECT_INPUT_FILES" in missing.stderr


def test_quiet_follows_quarto() -> None:
    assert quiet_from_env({"QUARTO_PROJECT_SCRIPT_QUIET": "1"})
    assert not quiet_from_env({"QUARTO_PROJECT_SCRIPT_QUIET": "0"})
    assert not quiet_from_env({})


# --- the real Quarto -------------------------------------------------------------------------

QUARTO = shutil.which("quarto")


@pytest.mark.quarto
@pytest.mark.skipif(QUARTO is None, reason="quarto is not on PATH")
def test_quarto_renders_the_example_project(tmp_path: Path) -> None:  # pragma: no cover - needs quarto
    shutil.copytree(EXAMPLE, tmp_path / "project", ignore=shutil.ignore_patterns("*-figures", "*.premises.*", "_site", ".quarto"))
    project = tmp_path / "project"
    install_extension(project)
    env = dict(os.environ, PREMISES_PYTHON=sys.executable)
    done = subprocess.run([str(QUARTO), "render", "report.qmd", "--to", "html"], cwd=project, env=env, capture_output=True, check=False, text=True, timeout=900)
    assert done.returncode == 0, done.stderr
    html = (project / "report.html").read_text(encoding="utf-8")
    assert "Figure\u00a01" in html or "Figure 1" in html
    assert "callout-warning" in html
    assert list((project / "report-figures").glob("*.png"))


# --- the filter protocol, Python side --------------------------------------------------------


def _request(*bodies: str) -> str:
    from premises.documents.pandoc import write_reply

    # a request has the reply's shape: block N in div premises-out-N
    return write_reply([(n, f"``` premises\n{body}```") for n, body in enumerate(bodies, start=1)])


def test_request_and_reply_shapes() -> None:
    from premises.documents.pandoc import read_request, write_reply

    blocks = read_request(_request("id: a\n", "id: b\n"))
    assert [(b.number, b.raw.body) for b in blocks] == [(1, "id: a\n"), (2, "id: b\n")]
    reply = write_reply([(1, "::: {.callout-note}\nIn a callout.\n:::\n")])
    assert reply.startswith(":::: {#premises-out-1}\n") and reply.endswith("\n::::\n")  # outer fence is longer
    with pytest.raises(Exception, match="outside its own"):
        read_request("``` premises\nid: a\n```\n")


def test_filter_refuses_another_protocol(tmp_path: Path) -> None:
    from premises.quarto import run_filter

    with pytest.raises(Exception, match=r"protocol 7.*protocol 1") as caught:
        run_filter("", protocol=7, flavor="pandoc", base_dir=tmp_path, input_name="doc.md")
    assert caught.value.exit_code == 2  # type: ignore[attr-defined]


def test_filter_locates_errors_in_the_users_file(project: Path) -> None:
    from premises.quarto import run_filter

    nested = "---\ntitle: T\n---\n\n- item\n\n    ```premises\n    id: nested\n    data: data/trial.csv\n    model: y ~ x\n    se: hc4\n    ```\n"
    (project / "nested.md").write_text(nested, encoding="utf-8")
    request = _request("id: nested\ndata: data/trial.csv\nmodel: y ~ x\nse: hc4\n")
    with pytest.raises(Exception, match=r"^nested\.md:11: block 'nested', key 'se'"):
        run_filter(request, protocol=1, flavor="pandoc", base_dir=project, input_name="nested.md")
    # the file's front matter reaches the blocks (the request itself carries none)
    front = "---\ntitle: T\npremises:\n  se: hc4\n---\n\n```premises\nid: a\ndata: data/trial.csv\nmodel: y ~ x\n```\n"
    (project / "front.md").write_text(front, encoding="utf-8")
    with pytest.raises(Exception, match=r"^front\.md(:\d+)?: block 'a', key 'se'.*front matter"):
        run_filter(_request("id: a\ndata: data/trial.csv\nmodel: y ~ x\n"), protocol=1, flavor="pandoc", base_dir=project, input_name="front.md")


def test_filter_refuses_a_repeated_block_id(project: Path) -> None:
    from premises.quarto import run_filter

    body = "id: twice\ndata: data/trial.csv\nmodel: y ~ x\nse: hc4\n"
    request = _request(body, body)
    warnings: list[str] = []
    reply = run_filter(request, protocol=1, flavor="pandoc", base_dir=project, input_name="-", on_error="warn", warn=warnings.append)
    assert reply.count("callout-warning") == 2 and len(warnings) == 2
    text = "id: twice\ndata: data/trial.csv\nmodel: y ~ x\n"
    with pytest.raises(Exception, match="already used by the block in <stdin>"):
        run_filter(_request(text, text), protocol=1, flavor="pandoc", base_dir=project, input_name="-")


@pytest.mark.quarto
@pytest.mark.skipif(QUARTO is None, reason="quarto is not on PATH")
def test_quarto_renders_a_notebook_block(tmp_path: Path) -> None:  # pragma: no cover - needs quarto
    shutil.copytree(EXAMPLE / "data", tmp_path / "data")
    notebook = json.loads((EXAMPLE / "analysis.ipynb").read_text(encoding="utf-8"))
    front = notebook["cells"][0]
    front["source"] = "".join(front["source"]).replace("---\n", "---\nfilters: [premises]\n", 1)
    (tmp_path / "analysis.ipynb").write_text(json.dumps(notebook), encoding="utf-8")
    install_extension(tmp_path)
    env = dict(os.environ, PREMISES_PYTHON=sys.executable)
    done = subprocess.run(
        [str(QUARTO), "render", "analysis.ipynb", "--to", "html"],
        cwd=tmp_path, env=env, capture_output=True, check=False, text=True, timeout=900,
    )
    assert done.returncode == 0, done.stderr
    html = (tmp_path / "analysis.html").read_text(encoding="utf-8")
    assert "fig-basil-nb-linearity" in html
    assert list((tmp_path / "analysis-figures").glob("*.png"))


def test_prerender_warms_the_cache_for_the_filter(project: Path) -> None:
    from premises.pipeline import RenderOptions
    from premises.quarto import warm_document

    cache = project / "cache"
    options = RenderOptions(flavor="quarto", cache_dir=cache)
    report = prerender([project / "good.qmd", project / "plain.qmd"], options, warm=lambda path: warm_document(path, options) and None)
    assert report.errors == ()
    assert any(cache.rglob("*")), "the store holds the warmed block"
    assert list((project / "good-figures").glob("*")), "figures sit where the filter will link them"


def test_prerender_command_reports_a_model_that_cannot_be_fitted(project: Path) -> None:
    (project / "data" / "flat.csv").write_text("x,y\n" + "".join(f"{x},1\n" for x in range(5)) + "\n", encoding="utf-8")
    (project / "flat.qmd").write_text(GOOD.replace("trial.csv", "flat.csv").replace("id: good", "id: flat").replace("y ~ x", "y ~ x + I(2 * x)"), encoding="utf-8")
    done = _prerender_cli(project, {"QUARTO_PROJECT_INPUT_FILES": "flat.qmd", "QUARTO_PROJECT_SCRIPT_QUIET": "1"})
    assert done.returncode == 2, done.stdout + done.stderr
    assert "flat.qmd" in done.stderr and "block 'flat'" in done.stderr
