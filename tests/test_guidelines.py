"""The reporting-guideline map: statuses come from the result, never from a guess."""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from premises.errors import RenderError
from premises.guidelines import GUIDELINE_ITEMS, GUIDELINE_NAMES, map_guidelines

EXAMPLE = Path(__file__).parent / "data" / "result_example.json"
STATUSES = {"met", "not applicable", "not declared", "not addressed"}
# Items whose answer only the authors know (NEEDS.md section 1.5, "declare").
DECLARE_ONLY = {
    ("jars", "hypotheses"),
    ("jars", "sample-size"),
    ("sampl", "10"),
    ("sampl", "13"),
    ("sampl", "R3"),
    ("strobe", "12c-reasons"),
    ("strobe", "12d"),
}


@pytest.fixture()
def block() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(EXAMPLE.read_text(encoding="utf-8"))
    return data


def _row(rows: Any, guideline: str, code: str) -> Any:
    name = GUIDELINE_NAMES[guideline]
    return next(r for r in rows if r.guideline == name and r.code == code)


def test_every_listed_guideline_gets_all_its_items(block: dict[str, Any]) -> None:
    rows = map_guidelines(block)
    for key in block["guidelines"]:
        expected = [i.code for i in GUIDELINE_ITEMS if i.guideline == key]
        got = [r.code for r in rows if r.guideline == GUIDELINE_NAMES[key]]
        assert got == expected
    assert {r.status for r in rows} <= STATUSES


def test_only_listed_guidelines_are_mapped(block: dict[str, Any]) -> None:
    block["guidelines"] = {"strobe": {}}
    assert {r.guideline for r in map_guidelines(block)} == {"STROBE"}


def test_undeclared_prespecification_is_not_declared(block: dict[str, Any]) -> None:
    # The example's exclusion rule has prespecified: null.
    row = _row(map_guidelines(block), "jars", "registration")
    assert row.status == "not declared"
    assert "plot_area_ha < 0.1" in row.note


def test_declared_prespecification_is_met(block: dict[str, Any]) -> None:
    for step in block["ledger"]:
        if step["kind"] in ("exclude", "transform"):
            step["prespecified"] = False  # declared post hoc is still declared
    row = _row(map_guidelines(block), "jars", "registration")
    assert row.status == "met"
    assert row.where == ("tbl-yield-ledger",)


def test_nothing_to_report_is_not_applicable(block: dict[str, Any]) -> None:
    block["ledger"] = [s for s in block["ledger"] if s["kind"] == "missing"]
    rows = map_guidelines(block)
    assert _row(rows, "jars", "exclusions").status == "not applicable"
    assert _row(rows, "jars", "transformations").status == "not applicable"
    assert _row(rows, "sampl", "3").status == "not applicable"


def test_declare_only_items_are_never_met_without_a_declaration(block: dict[str, Any]) -> None:
    block["guidelines"] = {"jars": {}, "sampl": {}, "strobe": {}}
    rows = map_guidelines(block)
    for key, code in DECLARE_ONLY:
        assert _row(rows, key, code).status == "not declared", (key, code)


def test_a_declaration_meets_its_item(block: dict[str, Any]) -> None:
    rows = map_guidelines(block)
    row = _row(rows, "sampl", "10")
    assert row.status == "met"
    assert row.where == ("declared",)
    assert row.note == block["guidelines"]["sampl"]["10"]


def test_a_check_that_did_not_run_is_not_addressed(block: dict[str, Any]) -> None:
    block["checks"] = [f for f in block["checks"] if f["assumption"] != "collinearity"]
    assert _row(map_guidelines(block), "sampl", "R1").status == "not addressed"
    linearity = next(f for f in block["checks"] if f["assumption"] == "linearity")
    linearity["verdict"] = "not-assessed"
    assert _row(map_guidelines(block), "sampl", "9c").status == "not addressed"


def test_met_items_point_at_what_the_section_contains(block: dict[str, Any]) -> None:
    rows = map_guidelines(block)
    row = _row(rows, "sampl", "11")
    assert row.where == (
        "tbl-yield-assumptions",
        "fig-yield-influence",
        "tbl-yield-flagged",
        "tbl-yield-sensitivity",
    )
    no_flags = copy.deepcopy(block)
    no_flags["flagged"] = []
    assert "tbl-yield-flagged" not in _row(map_guidelines(no_flags), "sampl", "11").where


def test_interactions_are_read_from_the_formula(block: dict[str, Any]) -> None:
    assert _row(map_guidelines(block), "strobe", "12b").status == "not applicable"
    block["model"] = "yield_t ~ log2(water_mm) * soil_ph"
    assert _row(map_guidelines(block), "strobe", "12b").status == "met"


def test_unknown_guideline_is_a_render_error(block: dict[str, Any]) -> None:
    block["guidelines"] = {"consort": {}}
    with pytest.raises(RenderError, match="Unknown reporting guideline 'consort'"):
        map_guidelines(block)
