"""Golden Markdown of the example project, for every flavour and detail.

The example is copied to a temporary folder and rendered by the command line
(``--no-cache``, so no change log) once per flavour (quarto, pandoc, gfm) and
detail (full, brief). Before the comparison the fields that change with the
machine rather than the analysis are replaced by placeholders: the library
versions (from the render's own JSON) and the hashes and fingerprints in the
begin stamp, the reproducibility line and the brief section's pointer.

Regenerate with ``PREMISES_UPDATE_GOLDEN=1 pytest tests/test_example_golden.py``
and read the diff before committing it: every changed number or sentence in the
example's section shows up there.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import shutil
from pathlib import Path
from typing import Any

import pytest

from premises.cli import main

HERE = Path(__file__).resolve().parent
EXAMPLE = HERE.parent / "example_project"
GOLDEN = HERE / "golden"
UPDATE = os.environ.get("PREMISES_UPDATE_GOLDEN") == "1"
FLAVORS = ("quarto", "pandoc", "gfm")
DETAILS = ("full", "brief")
COMBOS = [pytest.param(f, d, id=f"{f}-{d}") for f in FLAVORS for d in DETAILS]
LEAVE_BEHIND = shutil.ignore_patterns(
    ".premises", "report-figures", "report.premises.*", "_site", ".quarto", "*.html", "__pycache__"
)
NUMBER = re.compile(r"[\u2212-]?(?:\d[\d,]*(?:\.\d+)?|\.\d+)")


def _run(*args: object) -> None:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    assert code == 0, err.getvalue()


def strip_volatile(text: str, versions: dict[str, str]) -> str:
    """Replace versions, hashes and fingerprints by placeholders."""
    text = re.sub(r"fingerprint=[0-9a-f]{16,64}", "fingerprint=<fingerprint>", text)
    text = re.sub(r"`[0-9a-f]{12,64}`", "`<hash>`", text)
    for name, version in versions.items():
        text = re.sub(rf"\b({re.escape(name)}) {re.escape(version)}(?!\.?\w)", r"\1 <version>", text, flags=re.IGNORECASE)
    return text


def section_of(markdown: str) -> str:
    return markdown[markdown.index("<!-- premises:begin id=basil ") : markdown.index("<!-- premises:end id=basil -->")]


@pytest.fixture(scope="module")
def rendered(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, str], str]:
    """Each flavour and detail of the example, volatile fields stripped."""
    project = tmp_path_factory.mktemp("golden") / "project"
    shutil.copytree(EXAMPLE, project, ignore=LEAVE_BEHIND)
    out: dict[tuple[str, str], str] = {}
    for flavor in FLAVORS:
        for detail in DETAILS:
            target = project / f"report.{flavor}.{detail}.md"
            json_path = project / f"{flavor}.{detail}.json"
            _run("render", project / "report.qmd", "--no-cache", "--flavor", flavor, "--detail", detail,
                 "-o", target, "--json", json_path)
            block: dict[str, Any] = json.loads(json_path.read_text(encoding="utf-8"))["blocks"][0]
            out[(flavor, detail)] = strip_volatile(target.read_text(encoding="utf-8"), block["provenance"]["versions"])
    return out


@pytest.mark.parametrize(("flavor", "detail"), COMBOS)
def test_example_matches_its_golden_file(rendered: dict[tuple[str, str], str], flavor: str, detail: str) -> None:
    text = rendered[(flavor, detail)]
    path = GOLDEN / f"example.{flavor}.{detail}.md"
    if UPDATE:
        path.write_text(text, encoding="utf-8")
    assert path.exists(), f"no golden file {path.name}; run with PREMISES_UPDATE_GOLDEN=1 and review it"
    expected = path.read_text(encoding="utf-8")
    assert text == expected, f"{path.name} differs; if the change is intended, regenerate with PREMISES_UPDATE_GOLDEN=1"


def test_stripping_leaves_no_hash_or_version_behind(rendered: dict[tuple[str, str], str]) -> None:
    for text in rendered.values():
        assert not re.search(r"[0-9a-f]{12,}", text)
        named = re.search(r"\b(premises|python|numpy|pandas|scipy|statsmodels|patsy|matplotlib|jinja2) \d", text, flags=re.IGNORECASE)
        assert named is None, f"a version left in: {named}"
        assert "<version>" in text and "fingerprint=<fingerprint>" in text


@pytest.mark.parametrize("flavor", FLAVORS)
def test_brief_states_no_number_that_full_does_not(rendered: dict[tuple[str, str], str], flavor: str) -> None:
    brief = section_of(rendered[(flavor, "brief")])
    full = section_of(rendered[(flavor, "full")])
    missing = set(NUMBER.findall(brief)) - set(NUMBER.findall(full))
    assert not missing, f"numbers in the brief {flavor} section that the full one does not state: {sorted(missing)}"
    assert len(brief) < len(full)


@pytest.mark.parametrize("flavor", FLAVORS)
def test_brief_coefficient_rows_appear_verbatim_in_full(rendered: dict[tuple[str, str], str], flavor: str) -> None:
    brief = section_of(rendered[(flavor, "brief")])
    full = section_of(rendered[(flavor, "full")])
    rows = [line for line in brief.splitlines() if line.startswith("| `")]
    assert len(rows) == 3, "one row per coefficient"
    for row in rows:
        assert row in full.splitlines()


def test_flavours_differ_only_in_markup(rendered: dict[tuple[str, str], str]) -> None:
    # Same analysis, same numbers: the sets of numbers outside figure/table numbering agree.
    def numbers(text: str) -> set[str]:
        text = re.sub(r"(?:Table|Figure|Figures)\s+[\d, and]+", "", text)
        return set(NUMBER.findall(section_of(text)))

    for detail in DETAILS:
        quarto = numbers(rendered[("quarto", detail)])
        assert numbers(rendered[("pandoc", detail)]) == quarto
        assert numbers(rendered[("gfm", detail)]) == quarto
