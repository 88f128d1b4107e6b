"""The section as text: templates, flavours, cross-references, golden files.

``tests/data/result_example.json`` is a hand-built result of one block (every
field of ``results.BlockResult``). Golden files live in ``tests/golden/``;
regenerate them with ``PREMISES_UPDATE_GOLDEN=1 pytest tests/test_render.py``
and read the diff before committing it.
"""

from __future__ import annotations

import copy
import dataclasses
import json
import math
import os
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from premises import results
from premises.errors import RenderError
from premises.render import (
    FLAVORS,
    PACKAGE_TEMPLATES,
    build_environment,
    code_span,
    escape_markdown,
    log_effects,
    render_error_callout,
    render_section,
    summarise_ids,
    xref_id,
)

HERE = Path(__file__).parent
EXAMPLE = HERE / "data" / "result_example.json"
GOLDEN = HERE / "golden"
UPDATE = os.environ.get("PREMISES_UPDATE_GOLDEN") == "1"
COMBOS = [(f, d) for f in ("quarto", "pandoc", "gfm") for d in ("brief", "full")]
NUMBER = re.compile(r"[\u2212-]?(?:\d[\d,]*(?:\.\d+)?|\.\d+)")
REF = re.compile(r"(?<![\w\\])@((?:fig|tbl)-[a-z0-9-]+)")
DEF = re.compile(r"\{#((?:fig|tbl)-[^\s}]+)")


@pytest.fixture()
def block() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(EXAMPLE.read_text(encoding="utf-8"))
    return data


def _render(block: dict[str, Any], flavor: str = "quarto", detail: str = "full", **kw: Any) -> str:
    return render_section(block, flavor=flavor, detail=detail, **kw)


# --- the fixture ------------------------------------------------------------------------


def _missing_fields(cls: Any, value: Any, path: str) -> list[str]:
    missing = []
    for f in dataclasses.fields(cls):
        if f.name not in value:
            missing.append(f"{path}.{f.name}")
    return missing


def test_example_has_every_result_field(block: dict[str, Any]) -> None:
    missing = _missing_fields(results.BlockResult, block, "block")
    missing += _missing_fields(results.DataInfo, block["data"], "data")
    missing += _missing_fields(results.FitSummary, block["fit"], "fit")
    missing += _missing_fields(results.Provenance, block["provenance"], "provenance")
    for kind, key in (
        (results.LedgerStep, "ledger"),
        (results.Coefficient, "coefficients"),
        (results.Finding, "checks"),
        (results.FlaggedPoint, "flagged"),
        (results.FigureRef, "figures"),
        (results.SensitivityRow, "sensitivity"),
    ):
        for i, item in enumerate(block[key]):
            missing += _missing_fields(kind, item, f"{key}[{i}]")
    assert not missing, f"regenerate tests/data/result_example.json: missing {missing}"


def test_example_has_the_shape_the_brief_asks_for(block: dict[str, Any]) -> None:
    assert len(block["ledger"]) == 3
    assert len(block["checks"]) == 7
    assert [f["verdict"] for f in block["checks"]].count("not-assessed") == 1
    assert len(block["coefficients"]) == 4
    assert len(block["flagged"]) == 2 and sum(p["undefined"] for p in block["flagged"]) == 1
    assert len(block["sensitivity"]) == 4
    assert sum(len(r["changed"]) for r in block["sensitivity"]) == 1
    assert len(block["figures"]) == 8


# --- golden files -----------------------------------------------------------------------


@pytest.mark.parametrize(("flavor", "detail"), COMBOS)
def test_golden(block: dict[str, Any], flavor: str, detail: str) -> None:
    path = GOLDEN / f"result_example.{flavor}.{detail}.md"
    text = _render(block, flavor, detail)
    if UPDATE:
        path.parent.mkdir(exist_ok=True)
        path.write_text(text, encoding="utf-8", newline="\n")
    assert path.exists(), (
        f"no golden file {path.name}; run with PREMISES_UPDATE_GOLDEN=1 and review it"
    )
    assert text == path.read_text(encoding="utf-8"), (
        f"{path.name} differs; if intended, regenerate and review the diff"
    )


@pytest.mark.parametrize(("flavor", "detail"), COMBOS)
def test_rendering_is_deterministic(block: dict[str, Any], flavor: str, detail: str) -> None:
    assert _render(block, flavor, detail) == _render(copy.deepcopy(block), flavor, detail)


# --- structure shared by every flavour --------------------------------------------------


@pytest.mark.parametrize(("flavor", "detail"), COMBOS)
def test_section_is_wrapped_in_markers(block: dict[str, Any], flavor: str, detail: str) -> None:
    lines = _render(block, flavor, detail).splitlines()
    fp = block["provenance"]["fingerprint"]
    assert lines[0] == f"<!-- premises:begin id=yield fingerprint={fp} format=1 -->"
    assert lines[-1] == "<!-- premises:end id=yield -->"


def test_marker_carries_the_result_format_version(block: dict[str, Any]) -> None:
    block["format_version"] = 7
    assert "format=7 -->" in _render(block).splitlines()[0]


@pytest.mark.parametrize(("flavor", "detail"), [c for c in COMBOS if c[0] != "gfm"])
def test_every_reference_has_a_target_in_the_section(
    block: dict[str, Any], flavor: str, detail: str
) -> None:
    text = _render(block, flavor, detail)
    assert set(REF.findall(text)) <= set(DEF.findall(text))
    assert "\u27e6" not in text  # no unresolved marker


@pytest.mark.parametrize(("flavor", "detail"), COMBOS)
def test_ids_are_lower_case_prefixed_without_underscores(
    block: dict[str, Any], flavor: str, detail: str
) -> None:
    for ident in DEF.findall(_render(block, flavor, detail)):
        assert re.fullmatch(r"(fig|tbl)-[a-z0-9]+(-[a-z0-9]+)*", ident), ident


def test_full_section_has_every_part(block: dict[str, Any]) -> None:
    text = _render(block)
    for ident in (
        "tbl-yield-ledger",
        "tbl-yield-assumptions",
        "tbl-yield-thresholds",
        "tbl-yield-coefficients",
        "tbl-yield-flagged",
        "tbl-yield-sensitivity",
        "tbl-yield-guidelines",
    ):
        assert "{#" + ident + "}" in text
    for fig in block["figures"]:
        assert "{#" + fig["id"] + " " in text
    for heading in (
        "### Data ledger",
        "### Assumption checks",
        "### Coefficients",
        "### Flagged observations",
        "### Sensitivity analyses",
        "### Changes since the last render",
        "### Reporting guidelines",
    ):
        assert heading in text
    assert "*Reproducibility.*" in text and ".callout-warning" in text


def test_brief_section_is_short_and_points_to_the_rest(block: dict[str, Any]) -> None:
    text = _render(block, detail="brief")
    assert "{#tbl-yield-coefficients}" in text
    assert "tbl-yield-ledger" not in text and "fig-yield" not in text
    assert "### " not in text
    assert "supplementary diagnostics" in text
    assert "*Assumption checks.*" in text


@pytest.mark.parametrize("flavor", FLAVORS)
def test_every_number_in_the_brief_is_in_the_full_section(
    block: dict[str, Any], flavor: str
) -> None:
    # Both come from one result through one set of filters, so they cannot disagree.
    brief = _render(block, flavor, "brief")
    full = set(NUMBER.findall(_render(block, flavor, "full")))
    numbers = NUMBER.findall(brief)
    assert len(numbers) > 20
    assert [n for n in numbers if n not in full] == []


# --- prose --------------------------------------------------------------------------------


def test_methods_paragraph_states_model_rows_and_methods(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "`yield_t ~ log2(water_mm) + soil_ph + C(district)`" in text
    assert "ordinary least squares to 389 of the 412 rows" in text
    assert "Nine rows with a missing value" in text and "4 in `yield_t` and 5 in `soil_ph`" in text
    assert "complete-case analysis assumes" in text
    assert "The rule `plot_area_ha < 0.1` excluded 14 rows" in text
    assert "pre-specification not declared" in text
    for finding in block["checks"]:
        if finding["method"]:
            assert finding["method"] in text
    assert "Independence was not assessed" in text


def test_declared_hc3_says_it_was_not_chosen_by_a_pre_test(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "declared before the analysis rather than chosen by a screening test" in text
    assert "Long and Ervin (2000)" in text


def test_hc3_chosen_from_the_residuals_is_called_data_driven(block: dict[str, Any]) -> None:
    block["se_reason"] = (
        "the spread of the residuals changes with the fitted values by more than the tool's threshold"
    )
    block["se_data_driven"] = True
    text = _render(block)
    assert "data-driven choice" in text
    assert "declared before the analysis" not in text


def test_classical_se_mentions_the_robust_ones_shown(block: dict[str, Any]) -> None:
    block["se_used"] = "classical"
    block["se_reason"] = "declared in the block (se: classical)"
    text = _render(block)
    assert "use classical standard errors; HC3 standard errors are reported beside them" in text
    assert "Long and Ervin" not in text.split("### Data ledger")[0]


def test_undefined_point_is_named_as_such(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "undefined: this observation alone determines a coefficient" in text
    flagged_table = text.split("### Flagged observations")[1]
    assert (
        "| F118 | 122 | 1.000 | undefined: this observation alone determines a coefficient |"
        in flagged_table
    )


def test_excluded_ids_are_summarised_in_the_text(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "Removed by `plot_area_ha < 0.1`: F012, F027, F058, F066, F101 and 9 more." in text
    assert "F398" not in text  # the full list is in the JSON only


def test_changed_conclusions_are_marked(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "0.17 [\u22120.03, 0.37] \u2020" in text
    assert "\u2020 The conclusion for this term differs" in text
    assert "The conclusion about `soil_ph` differs" in text
    assert text.count(" \u2020 |") == 1


def test_no_change_says_so(block: dict[str, Any]) -> None:
    for row in block["sensitivity"]:
        row["changed"] = []
    text = _render(block)
    assert "\u2020 |" not in text
    assert "No term's conclusion" in text


def test_cautions_hold_the_standing_three_and_the_blocks_own(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "support the analyst's judgement and do not replace it" in text
    assert "justified on grounds other than its effect on the fit" in text
    assert "consult a statistician" in text
    assert block["cautions"][0] in text


def test_empty_parts_are_left_out_without_dangling_references(block: dict[str, Any]) -> None:
    for key in ("flagged", "sensitivity", "change_log", "guidelines"):
        block[key] = [] if key in ("flagged", "sensitivity") else {}
    for flavor in FLAVORS:
        text = _render(block, flavor)
        for gone in (
            "### Flagged",
            "### Sensitivity",
            "### Changes",
            "### Reporting",
            "tbl-yield-flagged",
        ):
            assert gone not in text
        assert set(REF.findall(text)) <= set(DEF.findall(text))
        assert "the full diagnostics" not in text


def test_change_log_renders_whatever_keys_it_has(block: dict[str, Any]) -> None:
    block["change_log"] = {
        "new_thing": [{"term": "x_1", "before": 1.5, "after": -2.25}],
        "note": "a*b",
        "flag": False,
    }
    text = _render(block)
    assert "- New thing: `x_1`: before 1.50, after \u22122.25" in text
    assert "- Note: a\\*b" in text
    assert "- Flag: no" in text


def test_thresholds_are_tabled_with_values_and_origins(block: dict[str, Any]) -> None:
    text = _render(block)
    assert "{#tbl-yield-thresholds}" in text
    assert (
        "| Influential observations | Cook's distance > 4/n | 0.0103 | common practice; usually credited to Bollen & Jackman, 1990 |"
        in text
    )
    assert "| Collinearity | VIF > 10 | 10.0 | Marquardt, 1970 |" in text


def test_threshold_expressions_keep_their_own_comparison(block: dict[str, Any]) -> None:
    influence = next(f for f in block["checks"] if f["assumption"] == "influence")
    influence["thresholds"] = [
        {"name": "share at a bound", "expression": ">= 0.1", "value": 0.1, "origin": ""},
        {"name": "alpha", "expression": "0.05", "value": 0.05, "origin": "declared"},
        {
            "name": "Bonferroni outlier test",
            "expression": "n * p < 0.05",
            "value": 0.05,
            "origin": "",
        },
    ]
    text = _render(block)
    assert "| share at a bound \u2265 0.1 | 0.100 | \u2014 |" in text
    assert "| \u03b1 = 0.05 | 0.0500 | declared |" in text
    assert "| Bonferroni outlier test: n \\* p \\< 0.05 | 0.0500 |" in text


def test_no_thresholds_no_table(block: dict[str, Any]) -> None:
    for finding in block["checks"]:
        finding["thresholds"] = []
    assert "tbl-yield-thresholds" not in _render(block)


def test_a_method_given_as_a_clause_reads_as_its_own_sentence(block: dict[str, Any]) -> None:
    block["checks"][1]["method"] = "linearity was assessed from binned means of the residuals"
    text = _render(block)
    assert "Linearity was assessed from binned means of the residuals." in text
    assert "The influence of single observations was assessed by leverage" in text


def test_evidence_lists_each_statistic_once(block: dict[str, Any]) -> None:
    collinearity = block["checks"][6]
    collinearity["statistics"].append(dict(collinearity["measure"]))
    row = next(line for line in _render(block).splitlines() if line.startswith("| Collinearity |"))
    assert row.count("largest variance inflation factor = 1.12") == 1


def test_optional_clauses_keep_their_spaces(block: dict[str, Any]) -> None:
    # trim_blocks eats the newline after a block tag: the templates must not glue words.
    block["weights"] = "plot_weight"
    block["fit"]["estimator"] = "WLS"
    block["se_used"], block["se_robust_kind"], block["groups"], block["order"] = (
        "cluster",
        "cluster",
        "village",
        "survey_date",
    )
    block["se_reason"] = (
        "groups are declared (village), so standard errors allow for correlation within groups"
    )
    text = _render(block)
    assert "weighted least squares with weights from `plot_weight` to 389 of the 412 rows" in text
    assert (
        "with `village` as the cluster (Liang & Zeger, 1986), because groups are declared" in text
    )
    assert "grouped by `village`. Observations are ordered by `survey_date`." in text
    assert "| Cluster-robust SE |" in text.replace(" SE | 95%", " SE |")


def test_alternative_on_another_scale_keeps_its_own_precision(block: dict[str, Any]) -> None:
    log_row = copy.deepcopy(block["sensitivity"][3])
    log_row.update(label="log outcome", description="natural log of the outcome", changed=[])
    for c in log_row["coefficients"]:
        c.update(
            estimate=c["estimate"] / 50,
            ci_low=(c["ci_low"] or 0) / 50,
            ci_high=(c["ci_high"] or 0) / 50,
            se=c["se"] / 50,
        )
    block["sensitivity"].append(log_row)
    row = next(line for line in _render(block).splitlines() if line.startswith("| Log outcome"))
    assert "0.0175 [0.0147, 0.0203]" in row  # its own SE, 0.0014: two significant digits


# --- log-scale interpretation ---------------------------------------------------------


def test_log2_predictor_is_read_as_a_change_per_doubling(block: dict[str, Any]) -> None:
    effects = log_effects(block)
    assert [e["term"] for e in effects] == ["log2(water_mm)"]
    assert effects[0]["kind"] == "log-predictor" and effects[0]["factor"] == 2.0
    assert effects[0]["value"] == pytest.approx(0.874)
    assert (
        "a doubling of `water_mm` is associated with a difference of 0.874 in `yield_t` (95% CI [0.711, 1.037])"
        in _render(block)
    )


def test_named_transform_target_is_matched_to_its_term(block: dict[str, Any]) -> None:
    step = block["ledger"][0]
    step.update(rule="log(water_mm)", target="log_water", source="block")
    block["coefficients"][1]["term"] = "log_water"
    effect = log_effects(block)[0]
    assert effect["term"] == "log_water"
    # natural log: doubling adds b ln 2
    assert effect["value"] == pytest.approx(0.874 * math.log(2))


def test_log_outcome_is_read_as_percent_change(block: dict[str, Any]) -> None:
    block["ledger"] = block["ledger"][1:]
    block["coefficients"][1]["term"] = "water_mm"
    block["fit"]["outcome"] = "log(yield_t)"
    effects = log_effects(block)
    assert [e["term"] for e in effects] == ["water_mm", "soil_ph", "C(district)[T.Ridge]"]
    assert {e["kind"] for e in effects} == {"log-outcome"}
    assert effects[2]["low"] is None  # no interval where the SE is undefined
    soil = next(e for e in effects if e["term"] == "soil_ph")
    assert soil["value"] == pytest.approx(100 * math.expm1(0.213))
    text = _render(block)
    assert "Duan's (1983) smearing estimate" in text
    assert "relative to the reference level" in text


def test_log_outcome_and_log_predictor_give_an_elasticity(block: dict[str, Any]) -> None:
    block["fit"]["outcome"] = "log(yield_t)"
    effect = next(e for e in log_effects(block) if e["term"] == "log2(water_mm)")
    assert effect["kind"] == "elasticity"
    assert effect["value"] == pytest.approx(0.874 / math.log(2))
    assert "is an elasticity of" in _render(block)


def test_no_log_terms_no_interpretation(block: dict[str, Any]) -> None:
    block["ledger"] = block["ledger"][1:]
    block["coefficients"][1]["term"] = "water_mm"
    assert log_effects(block) == []
    assert "associated with" not in _render(block)


# --- flavours -----------------------------------------------------------------------------


def test_quarto_flavour_uses_fig_alt_and_callout_titles(block: dict[str, Any]) -> None:
    text = _render(block, "quarto")
    assert 'fig-alt="' in text and ' alt="' not in text
    assert '::: {.callout-warning title="Reading these diagnostics"}' in text
    assert "(@fig-yield-linearity; @fig-yield-linearity-water; @fig-yield-linearity-ph)" in text


def test_pandoc_flavour_uses_alt_and_a_bold_title(block: dict[str, Any]) -> None:
    text = _render(block, "pandoc")
    assert ' alt="' in text and "fig-alt" not in text
    assert "::: {.callout-warning}\n**Reading these diagnostics.** The verdicts" in text
    assert "@fig-yield-outcome" in text


def test_gfm_flavour_has_no_attributes_ids_or_divs(block: dict[str, Any]) -> None:
    text = _render(block, "gfm")
    assert "{#" not in text and ":::" not in text and "@fig-" not in text and "@tbl-" not in text
    assert "(Figures 2, 3 and 4)" in text
    assert "*Figure 1. Distribution of yield_t" in text
    assert "*Table 1. Data ledger" in text
    assert "> **Reading these diagnostics.**" in text
    # references agree with the numbering of the captions
    assert "their diagnostics (Table 5)" in text and "*Table 5. Observations that crossed" in text


def test_error_callout_in_each_flavour() -> None:
    assert render_error_callout("No column 'x_y'.", "quarto").startswith(
        '::: {.callout-important title="premises could not render this block"}'
    )
    assert "**premises could not render this block.** No column 'x_y'." in render_error_callout(
        "No column 'x_y'.", "pandoc"
    )
    assert (
        render_error_callout("a <b>", "gfm")
        == "> **premises could not render this block.** a \\<b>\n"
    )


# --- templates ----------------------------------------------------------------------------


def test_every_shipped_template_compiles() -> None:
    env = build_environment()
    names = [p.relative_to(PACKAGE_TEMPLATES).as_posix() for p in PACKAGE_TEMPLATES.rglob("*.j2")]
    assert len(names) >= 20
    for name in names:
        env.get_template(name)


def test_every_assumption_has_its_sentence_template() -> None:
    from premises.spec import ASSUMPTIONS

    for name in ASSUMPTIONS:
        assert (PACKAGE_TEMPLATES / "checks" / f"{name}.md.j2").is_file(), name


def test_a_user_template_replaces_the_shipped_one(block: dict[str, Any], tmp_path: Path) -> None:
    (tmp_path / "coefficients.md.j2").write_text(
        "CUSTOM TABLE of {{ block.coefficients | length }} terms\n", encoding="utf-8"
    )
    for detail in ("brief", "full"):
        text = _render(block, detail=detail, template_dirs=[tmp_path])
        assert "CUSTOM TABLE of 4 terms" in text
        assert "tbl-yield-coefficients" not in text


def test_a_user_template_can_extend_the_shipped_one(block: dict[str, Any], tmp_path: Path) -> None:
    (tmp_path / "cautions.md.j2").write_text(
        '{% include "premises/cautions.md.j2" %}\nLocal note.\n', encoding="utf-8"
    )
    text = _render(block, template_dirs=[tmp_path])
    assert "consult a statistician" in text and "Local note." in text


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"flavor": "docx"}, "flavor must be one of quarto, pandoc, gfm"),
        ({"detail": "short"}, "detail must be one of brief, full"),
        ({"to": "tex"}, "No template 'section.tex.j2'"),
    ],
)
def test_bad_choices_are_render_errors(
    block: dict[str, Any], change: dict[str, str], match: str
) -> None:
    with pytest.raises(RenderError, match=match):
        render_section(block, **change)


def test_a_missing_field_is_a_render_error(block: dict[str, Any]) -> None:
    del block["fit"]
    with pytest.raises(RenderError, match="needs a field the result does not have") as info:
        _render(block)
    assert info.value.hint and "to_jsonable" in info.value.hint


def test_a_broken_user_template_is_a_render_error(block: dict[str, Any], tmp_path: Path) -> None:
    (tmp_path / "ledger.md.j2").write_text("{% if %}\n", encoding="utf-8")
    with pytest.raises(RenderError, match="failed"):
        _render(block, template_dirs=[tmp_path])


def test_a_missing_template_folder_is_a_render_error(block: dict[str, Any], tmp_path: Path) -> None:
    with pytest.raises(RenderError, match="does not exist"):
        _render(block, template_dirs=[tmp_path / "nope"])


# --- text helpers -------------------------------------------------------------------------


def test_ids_are_normalised() -> None:
    assert xref_id("tbl", "Yield_2024", "ledger") == "tbl-yield-2024-ledger"
    assert xref_id("fig-a__b") == "fig-a-b"


def test_ids_are_summarised_after_five() -> None:
    ids = [f"F{i:03d}" for i in range(14)]
    assert summarise_ids(ids) == "F000, F001, F002, F003, F004 and 9 more"
    assert summarise_ids(ids[:2]) == "F000, F001"
    assert summarise_ids([]) == "none"


def test_code_span_survives_backticks() -> None:
    assert code_span("a`b") == "``a`b``"
    assert code_span("`x") == "`` `x ``"


def test_render_imports_nothing_heavy() -> None:
    code = (
        "import json, sys; import premises; before = set(sys.modules); import premises.render; "
        "print(json.dumps(sorted(set(sys.modules) - before)))"
    )
    env = dict(os.environ, PYTHONPATH=str(HERE.parent / "src"))
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True
    ).stdout
    new = json.loads(out)
    assert not [
        m
        for m in new
        if m.split(".")[0] in ("numpy", "pandas", "scipy", "statsmodels", "matplotlib")
    ]
    allowed = {
        "premises.render",
        "premises.markup",
        "premises.section",
        "premises.numbers",
        "premises.guidelines",
        "premises.errors",
        "premises._version",
    }
    assert {m for m in new if m.startswith("premises.")} <= allowed


# --- checked by pandoc, the reference Markdown reader ------------------------------------


def _pandoc() -> str:
    pypandoc = pytest.importorskip("pypandoc", reason="pypandoc-binary provides the pandoc binary")
    path: str = pypandoc.get_pandoc_path()
    return path


def _ast(text: str, reader: str = "markdown") -> Any:
    run = subprocess.run(
        [_pandoc(), "-f", reader, "-t", "json"],
        input=text,
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(run.stdout)


def _walk(node: Any) -> Any:
    if isinstance(node, dict):
        yield node
        for value in node.values():
            yield from _walk(value)
    elif isinstance(node, list):
        for item in node:
            yield from _walk(item)


def _text(node: Any) -> str:
    """Plain text of inlines or blocks (pandoc's stringify, enough for these tests)."""
    out: list[str] = []
    for item in node if isinstance(node, list) else [node]:
        if not isinstance(item, dict):
            continue
        kind, content = item.get("t"), item.get("c")
        if kind == "Str":
            out.append(content.replace("\u2019", "'"))  # pandoc's smart apostrophe
        elif kind in ("Space", "SoftBreak", "LineBreak"):
            out.append(" ")
        elif kind in ("Code", "Math", "RawInline"):
            out.append(content[1])
        elif kind in (
            "Para",
            "Plain",
            "Emph",
            "Strong",
            "Span",
            "Superscript",
            "Subscript",
            "Strikeout",
        ):
            out.append(_text(content if kind not in ("Span",) else content[1]))
        elif kind in ("Quoted", "Link"):
            out.append(_text(content[1]))  # GFM autolinks a bare URL: its text is unchanged
    return "".join(out)


@pytest.mark.pandoc
@pytest.mark.parametrize("flavor", ["quarto", "pandoc"])
def test_pandoc_reads_figures_with_ids_captions_and_alt_text(
    block: dict[str, Any], flavor: str
) -> None:
    doc = _ast(_render(block, flavor))
    figures = {n["c"][0][0]: n for n in _walk(doc) if n.get("t") == "Figure"}
    assert list(figures) == [f["id"] for f in block["figures"]]
    for fig in block["figures"]:
        node = figures[fig["id"]]
        assert _text(node["c"][1][1]) == fig["caption"]
        image = next(n for n in _walk(node["c"][2]) if n.get("t") == "Image")
        attrs = dict(image["c"][0][2])
        if flavor == "quarto":
            assert attrs["fig-alt"] == fig["alt"]  # Quarto reads fig-alt itself
        else:
            assert _text(image["c"][1]) == fig["alt"]  # pandoc moves alt= into the description
        assert image["c"][2][0] == fig["path"]


@pytest.mark.pandoc
@pytest.mark.parametrize(("flavor", "detail"), [c for c in COMBOS if c[0] != "gfm"])
def test_pandoc_reads_tables_with_ids_and_captions(
    block: dict[str, Any], flavor: str, detail: str
) -> None:
    doc = _ast(_render(block, flavor, detail))
    tables = {n["c"][0][0]: _text(n["c"][1][1]) for n in _walk(doc) if n.get("t") == "Table"}
    expected = (
        ["tbl-yield-coefficients"]
        if detail == "brief"
        else [
            "tbl-yield-ledger",
            "tbl-yield-assumptions",
            "tbl-yield-thresholds",
            "tbl-yield-coefficients",
            "tbl-yield-flagged",
            "tbl-yield-sensitivity",
            "tbl-yield-guidelines",
        ]
    )
    assert list(tables) == expected
    for caption in tables.values():
        assert caption and "{#" not in caption
    assert tables["tbl-yield-coefficients"] == "Coefficients of the model for yield_t"


@pytest.mark.pandoc
@pytest.mark.parametrize("flavor", ["quarto", "pandoc"])
def test_pandoc_reads_the_cautions_callout(block: dict[str, Any], flavor: str) -> None:
    doc = _ast(_render(block, flavor))
    divs = [n for n in _walk(doc) if n.get("t") == "Div" and "callout-warning" in n["c"][0][1]]
    assert len(divs) == 1
    first = _text(divs[0]["c"][1][0])
    assert first.startswith(
        "The verdicts" if flavor == "quarto" else "Reading these diagnostics. The verdicts"
    )


@pytest.mark.pandoc
def test_pandoc_reads_the_gfm_flavour_as_plain_gfm(block: dict[str, Any]) -> None:
    doc = _ast(_render(block, "gfm"), reader="gfm")
    assert not [n for n in _walk(doc) if n.get("t") == "Figure" and n["c"][0][0]]
    tables = [n for n in _walk(doc) if n.get("t") == "Table"]
    assert len(tables) == 7
    quotes = [n for n in _walk(doc) if n.get("t") == "BlockQuote"]
    assert _text(quotes[-1]["c"][0]).startswith("Reading these diagnostics.")


NASTY = [
    "a*b*c and **d**",
    "_under_ score and x_y",
    "[link](http://example.org) and ![img](x.png)",
    "<b>bold</b> & <http://example.org>",
    "$x$ and $y$ cost $5",
    "@cite and [@key]",
    "H~2~O and x^2^",
    "{#id .class} and {=latex}",
    "a | b | c",
    "`code` and ``more``",
    "# not a heading",
    "> not a quote",
    "100% of 3 < 4 > 2",
    "back\\slash",
]


@pytest.mark.pandoc
@pytest.mark.parametrize("reader", ["markdown", "gfm"])
def test_escaped_text_reads_back_literally(reader: str) -> None:
    # pandoc as the reference reader: escaped user text must come back unchanged.
    doc = _ast("\n\n".join(escape_markdown(s) for s in NASTY), reader=reader)
    assert [_text(p) for p in doc["blocks"]] == NASTY


@pytest.mark.pandoc
def test_user_text_in_table_cells_stays_in_its_cell(block: dict[str, Any]) -> None:
    block["ledger"][2]["reason"] = "a | b and *c* with $d"
    doc = _ast(_render(block, "pandoc"))
    ledger = next(
        n for n in _walk(doc) if n.get("t") == "Table" and n["c"][0][0] == "tbl-yield-ledger"
    )
    # TableBody = [attr, row-head columns, head rows, body rows]; Row = [attr, cells];
    # Cell = [attr, alignment, row span, column span, blocks]
    cells = [_text(cell[4]) for body in ledger["c"][4] for row in body[3] for cell in row[1]]
    assert "a | b and *c* with $d (outside target population)" in cells
