"""The direction of dependencies (STYLE.md) and the start-up cost it buys.

Static part: every ``premises`` import inside a module must point at an allowed
layer. Dynamic part: importing a front-end module in a fresh interpreter must not
pull heavy libraries in.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

SRC = Path(__file__).resolve().parents[1] / "src" / "premises"

FOUNDATION = ("premises.errors", "premises._version", "premises.files")
VALUES = ("premises.spec", "premises.results", "premises.config")
ENGINES_FIT = ("premises.formula", "premises.fit", "premises.influence", "premises.lsq")

# module prefix -> premises modules it may import (prefix match)
ALLOWED: dict[str, tuple[str, ...]] = {
    "premises.errors": (),
    "premises._version": (),
    "premises.files": (),
    "premises.config": FOUNDATION,
    "premises.thresholds": FOUNDATION,
    "premises.keys": FOUNDATION + ("premises.thresholds",),
    "premises.source": FOUNDATION + ("premises.keys",),
    "premises.validation": FOUNDATION + ("premises.keys", "premises.source", "premises.thresholds"),
    "premises.spec": FOUNDATION + ("premises.config", "premises.keys", "premises.source", "premises.thresholds", "premises.validation"),
    "premises.results": FOUNDATION,
    "premises.documents": FOUNDATION + ("premises.documents",),
    "premises.rules": FOUNDATION + VALUES + ("premises.rules",),
    "premises.data": FOUNDATION + VALUES,
    "premises.ledger": FOUNDATION + VALUES + ("premises.rules", "premises.data", "premises.formula"),
    "premises.formula": FOUNDATION + VALUES + ("premises.formula",),
    "premises.lsq": FOUNDATION + VALUES + ("premises.formula",),
    "premises.influence": FOUNDATION + VALUES + ENGINES_FIT,
    "premises.fit": FOUNDATION + VALUES + ENGINES_FIT,
    "premises.checks": FOUNDATION + VALUES + ENGINES_FIT + ("premises.checks",),
    "premises.figures": FOUNDATION + VALUES + ENGINES_FIT + ("premises.checks", "premises.figures"),
    "premises.numbers": FOUNDATION,
    "premises.guidelines": FOUNDATION + VALUES,
    "premises.markup": FOUNDATION,
    "premises.section": FOUNDATION + VALUES + ("premises.numbers", "premises.guidelines", "premises.markup"),
    "premises.render": FOUNDATION + VALUES + ("premises.numbers", "premises.guidelines", "premises.markup", "premises.section"),
    "premises.cache": FOUNDATION + VALUES,
    "premises.changes": FOUNDATION + VALUES,
}
TOP = ("premises.analysis", "premises.exports", "premises.pipeline", "premises.notebooks", "premises.quarto", "premises.staleness", "premises.cli", "premises.__main__", "premises")


def _module_name(path: Path) -> str:
    rel = path.relative_to(SRC.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _premises_imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0 and node.module.startswith("premises"):
            found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("premises"))
    return found


MODULES = sorted(SRC.rglob("*.py"))


@pytest.mark.parametrize("path", MODULES, ids=lambda p: _module_name(p))
def test_imports_point_down_only(path: Path) -> None:
    name = _module_name(path)
    if name in TOP:
        return
    rule = next((allowed for prefix, allowed in sorted(ALLOWED.items(), key=lambda kv: -len(kv[0])) if name == prefix or name.startswith(prefix + ".")), None)
    assert rule is not None, f"{name} is not assigned to a layer in tests/test_layers.py"
    bad = [m for m in _premises_imports(path) if m != name and not any(m == a or m.startswith(a + ".") for a in rule)]
    assert not bad, f"{name} imports {bad}, which sit above it or beside it against the layering"


def _loaded_after(code: str) -> set[str]:
    out = subprocess.run(
        [sys.executable, "-c", code + "\nimport sys; print(' '.join(sorted(sys.modules)))"],
        capture_output=True, text=True, check=True,
    )
    return set(out.stdout.split())


HEAVY = {"pandas", "statsmodels", "matplotlib", "scipy"}


def test_help_imports_no_heavy_library() -> None:
    loaded = _loaded_after("from premises.cli import build_parser; build_parser().format_help()")
    assert not (HEAVY | {"numpy", "jinja2", "yaml"}) & loaded


def test_package_import_is_light() -> None:
    assert not (HEAVY | {"numpy"}) & _loaded_after("import premises")


def test_render_and_documents_do_not_import_statistics() -> None:
    loaded = _loaded_after("import premises.render, premises.documents.markdown")
    assert not HEAVY & loaded


def test_parsing_a_rule_loads_no_data_library() -> None:
    # a hostile rule must be refused before numpy or pandas (or any data) is touched
    loaded = _loaded_after('import premises.rules; premises.rules.parse_rule("x > 1")')
    assert not {"numpy", "pandas"} & loaded


def test_checks_and_fit_do_not_import_drawing_or_templates() -> None:
    loaded = _loaded_after("import premises.fit, premises.checks.registry")
    assert not {"matplotlib", "jinja2"} & loaded


def test_no_module_imports_pyplot() -> None:
    for path in MODULES:
        text = path.read_text(encoding="utf-8")
        assert "matplotlib.pyplot" not in text and "import pylab" not in text, path
