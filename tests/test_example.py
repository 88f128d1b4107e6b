"""End to end: the example project rendered by the command line, read as a reader would.

Every test copies ``example_project/`` into a temporary folder first (without
its result store, figures or rendered output) and renders the copy; nothing is
written into the repository. The numbers are checked against statsmodels fitted
independently to the same rows (statsmodels is the reference named beside each
assertion); the section is checked for every part the design lists; the ledger
table against the JSON; renders against each other byte for byte; and broken
or hostile blocks against the promise of one located message and no output.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import re
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.outliers_influence import OLSInfluence

from premises.cli import main

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "example_project"
# Outputs and the result store of earlier renders stay behind: each test starts clean.
LEAVE_BEHIND = shutil.ignore_patterns(
    ".premises", "report-figures", "report.premises.*", "_site", ".quarto", "*.html", "__pycache__"
)
MODEL_COLUMNS = ["mass_g", "light_dli", "ec_ms", "bench"]
# statsmodels spells the formula with numpy's log2; the block writes log2 without a prefix.
REFERENCE_FORMULA = "mass_g ~ np.log2(light_dli) + ec_ms"
TERMS = ["Intercept", "log2(light_dli)", "ec_ms"]
RTOL = 1e-9
BLOCK_LINE = 20  # the ```{.premises} fence in example_project/report.qmd


# --- helpers -----------------------------------------------------------------------------


def copy_example(dest: Path) -> Path:
    """A clean copy of the example project; returns its folder."""
    shutil.copytree(EXAMPLE, dest, ignore=LEAVE_BEHIND)
    return dest


def edit_report(project: Path, old: str, new: str, name: str = "report.qmd") -> Path:
    """Write a variant of report.qmd with one text replaced; returns its path."""
    text = (EXAMPLE / "report.qmd").read_text(encoding="utf-8")
    assert old in text, f"the example no longer contains {old!r}; update this test"
    target = project / name
    target.write_text(text.replace(old, new, 1), encoding="utf-8")
    return target


def run_premises(*args: object) -> tuple[int, str, str]:
    """Run the command line in this process: exit code, stdout, stderr."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def render_ok(document: Path, *args: object) -> None:
    code, _, err = run_premises("render", document, *args)
    assert code == 0, err
    assert "Traceback" not in err


def load_block(json_path: Path) -> dict[str, Any]:
    payload = json.loads(json_path.read_text(encoding="utf-8"))
    assert payload["format_version"] == 1
    (block,) = payload["blocks"]
    return dict(block)


def section_of(markdown: str, block_id: str = "basil") -> str:
    start = markdown.index(f"<!-- premises:begin id={block_id} ")
    end = markdown.index(f"<!-- premises:end id={block_id} -->")
    return markdown[start:end]


def split_row(line: str) -> list[str]:
    body = line.strip()
    body = body.removeprefix("|")
    body = body[:-1] if body.endswith("|") and not body.endswith("\\|") else body
    return [cell.strip() for cell in re.split(r"(?<!\\)\|", body)]


def pipe_table(markdown: str, table_id: str) -> tuple[list[str], list[list[str]]]:
    """Header and body rows of the pipe table captioned ``{#table_id}``."""
    lines = markdown.splitlines()
    caption = next(
        (i for i, line in enumerate(lines) if line.startswith(": ") and line.rstrip().endswith(f"{{#{table_id}}}")),
        None,
    )
    assert caption is not None, f"no table captioned {{#{table_id}}}"
    last = caption - 1
    while not lines[last].strip():
        last -= 1
    first = last
    while first > 0 and lines[first - 1].startswith("|"):
        first -= 1
    rows = [split_row(line) for line in lines[first : last + 1]]
    assert len(rows) >= 3, f"table {table_id} has no body"
    assert all(set(c) <= set(":-") for c in rows[1]), f"table {table_id}: second line is not a separator"
    return rows[0], rows[2:]


def column(header: list[str], name: str) -> int:
    return next(i for i, h in enumerate(header) if h == name)


def plain(cell: str) -> str:
    """A cell without emphasis, code ticks, thousands separators or Unicode minus."""
    return cell.replace("**", "").replace("`", "").replace(",", "").replace("\u2212", "-").strip()


def printed_number(text: str) -> float:
    text = plain(text)
    return float(text.removesuffix("%"))


def assert_rounds_to(printed: str, value: float) -> None:
    """``printed`` is ``value`` rounded to the digits shown (".038" for 0.03797...)."""
    text = plain(printed)
    decimals = len(text.split(".")[1]) if "." in text else 0
    assert abs(float(text) - value) <= 0.5 * 10.0**-decimals + 1e-12, f"{printed} does not round {value}"


def assert_close(actual: Any, reference: Any, what: str) -> None:
    np.testing.assert_allclose(np.asarray(actual, dtype=float), np.asarray(reference, dtype=float), rtol=RTOL, atol=0, err_msg=what)


def reference_rows(project: Path, *, exclusions: bool = True, drop_ids: frozenset[str] = frozenset()) -> pd.DataFrame:
    """The rows the example analyses, selected with plain pandas (not premises)."""
    frame = pd.read_csv(project / "data" / "basil_trial.csv")
    if exclusions:
        frame = frame[~(frame["light_dli"] > 100) & (frame["plant_id"] != "P118")]
    frame = frame[~frame["plant_id"].isin(drop_ids)]
    return frame.dropna(subset=MODEL_COLUMNS).reset_index(drop=True)


def cluster_se(rows: pd.DataFrame) -> np.ndarray:
    # Reference: statsmodels' cluster covariance (CR1: G/(G-1) * (n-1)/(n-k), its defaults).
    fitted = smf.ols(REFERENCE_FORMULA, data=rows).fit(
        cov_type="cluster", cov_kwds={"groups": pd.factorize(rows["bench"])[0]}
    )
    return np.asarray(fitted.bse)


# --- renders shared by the tests of this module ------------------------------------------


@pytest.fixture(scope="module")
def example(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The example rendered as shipped (se: auto), with JSON and the per-row diagnostics."""
    project = copy_example(tmp_path_factory.mktemp("example") / "project")
    document = project / "report.qmd"
    render_ok(document, "--json", project / "out.json")
    code, _, err = run_premises("ledger", document, "--diagnostics", project / "diagnostics.csv")
    assert code == 0, err
    markdown = (project / "report.premises.md").read_text(encoding="utf-8")
    return {
        "project": project,
        "block": load_block(project / "out.json"),
        "markdown": markdown,
        "section": section_of(markdown),
        "diagnostics": pd.read_csv(project / "diagnostics.csv"),
    }


@pytest.fixture(scope="module")
def reference(example: dict[str, Any]) -> dict[str, Any]:
    """statsmodels' OLS on the same rows, with its influence measures."""
    rows = reference_rows(example["project"])
    fitted = smf.ols(REFERENCE_FORMULA, data=rows).fit()
    return {"rows": rows, "fit": fitted, "influence": OLSInfluence(fitted)}


@pytest.fixture(scope="module")
def hc3_block(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The example with ``se: hc3`` declared instead of ``se: auto``."""
    project = copy_example(tmp_path_factory.mktemp("hc3") / "project")
    document = edit_report(project, "se: auto", "se: hc3", name="hc3.qmd")
    render_ok(document, "--no-cache", "--json", project / "hc3.json")
    return load_block(project / "hc3.json")


# --- the numbers, against statsmodels ----------------------------------------------------


def test_analysed_rows_are_those_a_plain_pandas_selection_keeps(example: dict[str, Any], reference: dict[str, Any]) -> None:
    assert example["block"]["analysed_ids"] == reference["rows"]["plant_id"].tolist()
    assert example["block"]["n_used"] == len(reference["rows"]) == 174


def test_coefficients_and_classical_se_match_statsmodels(example: dict[str, Any], reference: dict[str, Any]) -> None:
    coefficients = example["block"]["coefficients"]
    assert [c["term"] for c in coefficients] == TERMS
    fitted = reference["fit"]
    # Reference: statsmodels OLS params and bse on the same 174 rows.
    assert_close([c["estimate"] for c in coefficients], fitted.params, "estimates vs statsmodels")
    assert_close([c["se"] for c in coefficients], fitted.bse, "classical SE vs statsmodels")
    summary = example["block"]["fit"]
    # Reference: statsmodels rsquared, rsquared_adj, scale, fvalue, f_pvalue.
    assert_close(
        [summary["r_squared"], summary["r_squared_adj"], summary["sigma"], summary["f_statistic"], summary["f_p"]],
        [fitted.rsquared, fitted.rsquared_adj, math.sqrt(fitted.scale), fitted.fvalue, fitted.f_pvalue],
        "fit summary vs statsmodels",
    )
    assert summary["n"] == int(fitted.nobs) and summary["df_resid"] == fitted.df_resid


def test_cluster_se_matches_statsmodels_and_ci_uses_g_minus_1_df(example: dict[str, Any], reference: dict[str, Any]) -> None:
    block = example["block"]
    assert block["se_used"] == "cluster" and block["se_robust_kind"] == "cluster"
    coefficients = block["coefficients"]
    robust = cluster_se(reference["rows"])
    # Reference: statsmodels cov_type="cluster" (CR1) standard errors.
    assert_close([c["se_robust"] for c in coefficients], robust, "cluster SE vs statsmodels")
    # The t degrees of freedom differ from statsmodels' by design: G - 1 = 11 for the interval
    # (Cameron & Miller 2015); the quantile is scipy's.
    groups = reference["rows"]["bench"].nunique()
    crit = stats.t.ppf(0.975, groups - 1)
    est = np.array([c["estimate"] for c in coefficients])
    assert_close([c["ci_low"] for c in coefficients], est - crit * robust, "cluster CI low")
    assert_close([c["ci_high"] for c in coefficients], est + crit * robust, "cluster CI high")
    assert_close([c["p"] for c in coefficients], 2 * stats.t.sf(np.abs(est / robust), groups - 1), "cluster p")


def test_hc3_se_matches_statsmodels(hc3_block: dict[str, Any], reference: dict[str, Any]) -> None:
    assert hc3_block["se_used"] == "hc3" and hc3_block["se_robust_kind"] == "hc3"
    coefficients = hc3_block["coefficients"]
    fitted = smf.ols(REFERENCE_FORMULA, data=reference["rows"]).fit(cov_type="HC3")
    # Reference: statsmodels cov_type="HC3" (MacKinnon & White 1985).
    assert_close([c["se_robust"] for c in coefficients], fitted.bse, "HC3 SE vs statsmodels")
    assert_close([c["se"] for c in coefficients], reference["fit"].bse, "classical SE vs statsmodels")
    crit = stats.t.ppf(0.975, reference["fit"].df_resid)
    est = np.asarray(fitted.params)
    assert_close([c["ci_low"] for c in coefficients], est - crit * np.asarray(fitted.bse), "HC3 CI low")
    assert_close([c["ci_high"] for c in coefficients], est + crit * np.asarray(fitted.bse), "HC3 CI high")


def test_hc3_render_shows_the_cluster_se_as_a_sensitivity_row(hc3_block: dict[str, Any], reference: dict[str, Any]) -> None:
    row = next(r for r in hc3_block["sensitivity"] if r["label"] == "cluster-robust SE")
    est = np.array([c["estimate"] for c in row["coefficients"]])
    half = np.array([c["ci_high"] for c in row["coefficients"]]) - est
    # Reference: statsmodels' cluster SE times scipy's t quantile with G - 1 df.
    crit = stats.t.ppf(0.975, reference["rows"]["bench"].nunique() - 1)
    assert_close(half, crit * cluster_se(reference["rows"]), "cluster-robust sensitivity row")


def test_every_analysed_row_diagnostics_match_statsmodels(example: dict[str, Any], reference: dict[str, Any]) -> None:
    table = example["diagnostics"]
    assert table["id"].tolist() == example["block"]["analysed_ids"]
    assert (table["block"] == "basil").all()
    influence, fitted = reference["influence"], reference["fit"]
    # Reference: statsmodels OLSInfluence (its leave-one-out DFBETAS loop included).
    assert_close(table["fitted"], fitted.fittedvalues, "fitted")
    assert_close(table["residual"], fitted.resid, "residual")
    assert_close(table["leverage"], influence.hat_matrix_diag, "hat values")
    assert_close(table["studentized"], influence.resid_studentized_external, "externally studentized residuals")
    assert_close(table["cooks"], influence.cooks_distance[0], "Cook's distance")
    assert_close(table["dffits"], influence.dffits[0], "DFFITS")
    for j, term in enumerate(TERMS):
        assert_close(table[f"dfbetas_{term}"], influence.dfbetas[:, j], f"DFBETAS {term}")


def test_flagged_points_match_statsmodels(example: dict[str, Any], reference: dict[str, Any]) -> None:
    flagged = example["block"]["flagged"]
    assert flagged, "the example is built to flag at least one observation"
    ids = reference["rows"]["plant_id"].tolist()
    influence = reference["influence"]
    n, p = len(ids), len(TERMS)
    read = pd.read_csv(example["project"] / "data" / "basil_trial.csv")["plant_id"].tolist()
    for point in flagged:
        i = ids.index(point["id"])
        assert point["row"] == read.index(point["id"]) + 1, "row is the 1-based data row in the file"
        # Reference: statsmodels OLSInfluence at the same observation.
        assert_close(point["leverage"], influence.hat_matrix_diag[i], f"{point['id']} leverage")
        assert_close(point["studentized"], influence.resid_studentized_external[i], f"{point['id']} studentized")
        assert_close(point["cooks"], influence.cooks_distance[0][i], f"{point['id']} Cook's D")
        assert_close(point["dffits"], influence.dffits[0][i], f"{point['id']} DFFITS")
        assert_close([point["dfbetas"][t] for t in TERMS], influence.dfbetas[i], f"{point['id']} DFBETAS")
        assert point["largest_term"] == TERMS[int(np.argmax(np.abs(influence.dfbetas[i])))]
        # Each cut-off the point is said to cross, crossed by statsmodels' values (common cut-offs).
        crossed = {
            "Cook's distance > 4/n": influence.cooks_distance[0][i] > 4 / n,
            "leverage > 2p/n": influence.hat_matrix_diag[i] > 2 * p / n,
            "|studentized residual| > 2": abs(influence.resid_studentized_external[i]) > 2,
            "|DFFITS| > 2*sqrt(p/n)": abs(influence.dffits[0][i]) > 2 * math.sqrt(p / n),
        }
        for rule in point["rules"]:
            if rule in crossed:
                assert crossed[rule], f"{point['id']} is said to cross {rule}"


def test_sensitivity_refits_match_statsmodels(example: dict[str, Any]) -> None:
    rows = {r["label"]: r for r in example["block"]["sensitivity"]}
    project = example["project"]
    flagged = frozenset(p["id"] for p in example["block"]["flagged"])
    cases = {
        "exclusions undone": reference_rows(project, exclusions=False),
        "flagged points removed": reference_rows(project, drop_ids=flagged),
    }
    for label, data in cases.items():
        row = rows[label]
        fitted = smf.ols(REFERENCE_FORMULA, data=data).fit()
        assert row["n"] == len(data)
        # Reference: statsmodels OLS on the refit's rows; interval from statsmodels' cluster SE
        # and scipy's t with G - 1 df, the reported fit's choice.
        assert_close([c["estimate"] for c in row["coefficients"]], fitted.params, f"{label} estimates")
        crit = stats.t.ppf(0.975, data["bench"].nunique() - 1)
        half = crit * cluster_se(data)
        assert_close([c["ci_low"] for c in row["coefficients"]], np.asarray(fitted.params) - half, f"{label} CI")


def test_exclusions_undone_changes_the_ec_conclusion_by_statsmodels_too(example: dict[str, Any], reference: dict[str, Any]) -> None:
    undone = next(r for r in example["block"]["sensitivity"] if r["label"] == "exclusions undone")
    assert undone["changed"] == ["ec_ms"]
    # Independent of premises: statsmodels' cluster-SE intervals (t with G - 1 df) for ec_ms
    # exclude zero with the exclusions and include it without them.
    def interval(rows: pd.DataFrame) -> tuple[float, float]:
        est = float(smf.ols(REFERENCE_FORMULA, data=rows).fit().params["ec_ms"])
        half = stats.t.ppf(0.975, rows["bench"].nunique() - 1) * cluster_se(rows)[2]
        return est - half, est + half

    low, high = interval(reference["rows"])
    assert low > 0
    low, high = interval(reference_rows(example["project"], exclusions=False))
    assert low < 0 < high


# --- the section: every part the design lists -------------------------------------------

FIGURE = re.compile(
    r"!\[(?P<caption>.+?)\]\((?P<path>[^)\s]+)\)\{#(?P<id>fig-[a-z0-9-]+)\s+(?:fig-)?alt=\"(?P<alt>[^\"]+)\"\}"
)


def test_methods_paragraph_states_model_estimator_and_rows(example: dict[str, Any]) -> None:
    block, section = example["block"], example["section"]
    assert f"{block['n_used']} of the {block['data']['rows_read']} rows read" in section
    assert "ordinary least squares" in section
    assert block["model"] in section
    assert "cluster-robust standard errors" in section  # what was done about the grouping


def test_section_has_ledger_assumption_coefficient_flagged_and_sensitivity_tables(example: dict[str, Any]) -> None:
    section, block = example["section"], example["block"]
    _, assumptions = pipe_table(section, "tbl-basil-assumptions")
    assert len(assumptions) == len(block["checks"])
    _, coefficients = pipe_table(section, "tbl-basil-coefficients")
    assert [plain(r[0]) for r in coefficients] == TERMS
    _, flagged = pipe_table(section, "tbl-basil-flagged")
    assert [r[0] for r in flagged] == [p["id"] for p in block["flagged"]]
    pipe_table(section, "tbl-basil-ledger")
    pipe_table(section, "tbl-basil-sensitivity")


def test_coefficient_table_prints_the_json_numbers(example: dict[str, Any]) -> None:
    header, body = pipe_table(example["section"], "tbl-basil-coefficients")
    for row, coef in zip(body, example["block"]["coefficients"]):
        assert_rounds_to(row[column(header, "Estimate")], coef["estimate"])
        assert_rounds_to(row[column(header, "SE")], coef["se"])
        assert_rounds_to(row[column(header, "Cluster-robust SE")], coef["se_robust"])
        low, high = plain(row[column(header, "95% CI")]).strip("[]").split()
        assert_rounds_to(low, coef["ci_low"])
        assert_rounds_to(high, coef["ci_high"])


def test_flagged_table_prints_the_json_numbers(example: dict[str, Any]) -> None:
    header, body = pipe_table(example["section"], "tbl-basil-flagged")
    for row, point in zip(body, example["block"]["flagged"]):
        assert row[column(header, "Row")] == str(point["row"])
        assert_rounds_to(row[column(header, "Leverage")], point["leverage"])
        assert_rounds_to(row[column(header, "Studentized residual")], point["studentized"])
        assert_rounds_to(row[column(header, "Cook's D")], point["cooks"])
        assert f"`{point['largest_term']}`" in row[column(header, "Largest DFBETAS (term)")]


def test_at_least_six_figures_with_ids_captions_alt_text_and_files(example: dict[str, Any]) -> None:
    found = list(FIGURE.finditer(example["section"]))
    figures = example["block"]["figures"]
    assert len(found) >= 6
    assert [m["id"] for m in found] == [f["id"] for f in figures]
    assert len({m["id"] for m in found}) == len(found)
    for match, figure in zip(found, figures):
        assert match["path"] == figure["path"]
        # Markdown escapes (\| in captions) removed, the caption and alt text are the JSON's.
        assert re.sub(r"\\(.)", r"\1", match["caption"]) == figure["caption"]
        assert match["alt"].replace("\\", "") == figure["alt"].replace("\\", "")
        assert len(figure["caption"]) > 40 and len(figure["alt"]) > 40
        file = example["project"] / figure["path"]
        assert file.is_file() and file.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", figure["path"]
    assessed = {c["assumption"] for c in example["block"]["checks"] if c["verdict"] != "not-assessed"} - {"outcome"}
    assert assessed <= {f["assumption"] for f in figures}, "one figure per assessed assumption"


def test_every_cross_reference_resolves(example: dict[str, Any]) -> None:
    section = example["section"]
    defined = set(re.findall(r"\{#((?:fig|tbl)-[a-z0-9-]+)", section))
    used = set(re.findall(r"(?<![\w\\])@((?:fig|tbl)-[a-z0-9-]+)", section))
    assert used, "the quarto flavour cross-references figures and tables"
    assert used <= defined, f"references without a target: {sorted(used - defined)}"


def test_sensitivity_marks_ec_ms_for_exclusions_undone(example: dict[str, Any]) -> None:
    header, body = pipe_table(example["section"], "tbl-basil-sensitivity")
    rows = {r["label"]: r for r in example["block"]["sensitivity"]}
    assert rows["exclusions undone"]["changed"] == ["ec_ms"]
    terms = [h.strip("`") for h in header[2:]]
    for cells in body:
        label = next(lab for lab in rows if cells[0].lower().startswith(lab.lower()))
        marked = [t for t, cell in zip(terms, cells[2:]) if cell.endswith("†")]
        assert marked == list(rows[label]["changed"]), f"the † marks of row {cells[0]!r}"
    undone = next(c for c in body if c[0].lower().startswith("exclusions undone"))
    assert undone[terms.index("ec_ms") + 2].endswith("†")
    assert "“exclusions undone” (marked †)" in example["section"]


def test_reproducibility_line_names_data_spec_fingerprint_and_versions(example: dict[str, Any]) -> None:
    block = example["block"]
    line = next(x for x in example["section"].splitlines() if x.startswith("*Reproducibility.*"))
    prov = block["provenance"]
    assert f"`{block['data']['path']}`" in line
    assert prov["data_sha256"][:12] in line and prov["spec_sha256"][:12] in line
    assert prov["fingerprint"][:16] in line
    assert f"{block['data']['rows_read']} rows read" in line
    for name, version in prov["versions"].items():
        assert f"{name} {version}" in line
    assert f"fingerprint={prov['fingerprint']}" in example["markdown"]  # the begin stamp


def test_cautions_close_the_section(example: dict[str, Any]) -> None:
    tail = example["section"][example["section"].index("*Reproducibility.*") :]
    assert re.search(r"^::: \{\.callout-warning\b[^}]*\}$", tail, flags=re.MULTILINE), "a warning callout"
    assert "support the analyst's judgement and do not replace it" in tail
    assert "justified on grounds other than its effect on the fit" in tail
    assert "consult a statistician" in tail


# --- the ledger: Markdown against JSON ---------------------------------------------------


def test_ledger_table_counts_match_the_json(example: dict[str, Any]) -> None:
    block = example["block"]
    header, body = pipe_table(example["section"], "tbl-basil-ledger")
    matched, removed, left = (column(header, h) for h in ("Matched", "Removed", "Rows left"))
    first, *steps, last = body
    assert plain(first[0]) == "Rows read" and printed_number(first[left]) == block["data"]["rows_read"]
    assert plain(last[0]) == "Rows analysed" and printed_number(last[left]) == block["n_used"]
    assert len(steps) == len(block["ledger"])
    for cells, step in zip(steps, block["ledger"]):
        assert printed_number(cells[left]) == step["rows_after"]
        assert printed_number(cells[removed]) == step["rows_before"] - step["rows_after"]
        if step["kind"] == "transform":
            assert cells[matched] == "—"
        else:
            assert printed_number(cells[matched]) == step["matched"]
    assert block["ledger"][0]["rows_before"] == block["data"]["rows_read"]
    assert block["ledger"][-1]["rows_after"] == block["n_used"]
    for before, after in zip(block["ledger"], block["ledger"][1:]):
        assert after["rows_before"] == before["rows_after"]


def test_excluded_ids_in_the_text_match_the_json_and_the_data(example: dict[str, Any]) -> None:
    block, section = example["block"], example["section"]
    found = re.findall(r"^Removed (?:by `(.+?)`|for (missing values)): (.+)\.$", section, flags=re.MULTILINE)
    listed = {rule or what: ids for rule, what, ids in found}
    removing = [s for s in block["ledger"] if s["removed_ids"]]
    assert len(listed) == len(removing)
    for step in removing:
        key = "missing values" if step["kind"] == "missing" else step["rule"]
        assert listed[key].split(", ") == step["removed_ids"]
    # Independently of premises: which rows the rules and the missing values remove.
    frame = pd.read_csv(example["project"] / "data" / "basil_trial.csv")
    by_rule = {s["rule"]: s["removed_ids"] for s in block["ledger"] if s["kind"] == "exclude"}
    assert by_rule["light_dli > 100"] == frame.loc[frame["light_dli"] > 100, "plant_id"].tolist()
    assert by_rule["id in [P118]"] == ["P118"]
    left = frame[~frame["plant_id"].isin(["P118", *by_rule["light_dli > 100"]])]
    missing = next(s for s in block["ledger"] if s["kind"] == "missing")
    assert missing["removed_ids"] == left.loc[left[MODEL_COLUMNS].isna().any(axis=1), "plant_id"].tolist()


# --- same inputs, same bytes -------------------------------------------------------------

FORMATS = [
    pytest.param("png", b"\x89PNG\r\n\x1a\n", id="png"),
    pytest.param("svg", b"<?xml", id="svg", marks=pytest.mark.slow),
    pytest.param("pdf", b"%PDF", id="pdf", marks=pytest.mark.slow),
]


def _render_in(project: Path, fmt: str, *extra: object) -> dict[str, bytes]:
    document = edit_report(project, "format: png", f"format: {fmt}", name="report.qmd")
    render_ok(document, "--json", project / "out.json", *extra)
    outputs = {"report.premises.md": (project / "report.premises.md").read_bytes(), "out.json": (project / "out.json").read_bytes()}
    for file in sorted((project / "report-figures").iterdir()):
        outputs[f"report-figures/{file.name}"] = file.read_bytes()
    return outputs


@pytest.mark.parametrize(("fmt", "magic"), FORMATS)
def test_rendering_twice_gives_identical_bytes(tmp_path: Path, fmt: str, magic: bytes) -> None:
    first = _render_in(copy_example(tmp_path / "a"), fmt)
    # A second project folder, no result store: the analysis runs again from scratch.
    second = _render_in(copy_example(tmp_path / "b"), fmt, "--no-cache")
    # The first folder again: its result store answers this time.
    third = _render_in(tmp_path / "a", fmt)
    figures = [name for name in first if name.startswith("report-figures/")]
    assert len(figures) >= 6
    assert all(name.endswith(f".{fmt}") and first[name].startswith(magic) for name in figures)
    assert sorted(first) == sorted(second) == sorted(third)
    for name in first:
        assert first[name] == second[name], f"{name} differs between two renders"
        assert first[name] == third[name], f"{name} differs after a cached render"


# --- hostile and broken blocks -----------------------------------------------------------

HOSTILE = "__import__('os').system('touch {target}')"


def _forbid(monkeypatch: pytest.MonkeyPatch, *targets: str) -> None:
    def fail(*args: Any, **kwargs: Any) -> None:
        pytest.fail("the data file was read before the rule was rejected")

    for target in targets:
        monkeypatch.setattr(target, fail)


def test_hostile_rule_is_rejected_before_the_data_is_read(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    project = copy_example(tmp_path / "project")
    pwned = tmp_path / "pwned"
    document = edit_report(project, "when: light_dli > 100", "when: " + HOSTILE.format(target=pwned), name="hostile.qmd")
    _forbid(monkeypatch, "premises.data.load_table")
    code, out, err = run_premises("render", document, "--no-cache", "--json", project / "hostile.json")
    assert code == 2 and out == ""
    assert not pwned.exists()
    assert "exclude[0].when" in err and "__import__" in err and "Traceback" not in err
    assert not (project / "hostile.premises.md").exists() and not (project / "hostile.json").exists()


def test_hostile_rule_is_rejected_before_the_data_is_hashed_for_the_store(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    project = copy_example(tmp_path / "project")
    pwned = tmp_path / "pwned"
    document = edit_report(project, "when: light_dli > 100", "when: " + HOSTILE.format(target=pwned), name="hostile.qmd")
    _forbid(monkeypatch, "premises.data.load_table", "premises.staleness.file_sha256")
    code, _, err = run_premises("render", document)
    assert code == 2 and not pwned.exists() and "__import__" in err


def test_hostile_rule_in_a_real_process_exits_2_and_creates_nothing(tmp_path: Path) -> None:
    project = copy_example(tmp_path / "project")
    pwned = tmp_path / "pwned"
    document = edit_report(project, "when: light_dli > 100", "when: " + HOSTILE.format(target=pwned), name="hostile.qmd")
    done = subprocess.run(
        [sys.executable, "-m", "premises", "render", str(document)], capture_output=True, text=True, timeout=120, check=False
    )
    assert done.returncode == 2
    assert not pwned.exists()
    assert done.stdout == "" and "Traceback" not in done.stderr
    assert not (project / "hostile.premises.md").exists()


BROKEN = [
    # (name, text in report.qmd, replacement, line, key, words of the fix)
    pytest.param("se: auto", "se: [auto", (42, 43), None, "quotes", id="bad-yaml"),
    pytest.param("se: auto", "sse: auto", (42,), "sse", "Did you mean 'se'?", id="unknown-key"),
    pytest.param(
        "model: mass_g ~ log2(light_dli) + ec_ms", "model: mass_g ~ log2(light_dli) + ec_mss",
        (24,), "model", "Did you mean 'ec_ms'?", id="missing-column-in-model",
    ),
    pytest.param("when: light_dli > 100", "when: light > 100", (33,), "exclude[0].when", "Did you mean 'light_dli'?", id="missing-column-in-rule"),
    pytest.param("data: data/basil_trial.csv", "data: data/basil_trail.csv", (23,), "data", "Check the path", id="missing-file"),
    pytest.param("when: light_dli > 100", "when: light_dli >> 100", (33,), "exclude[0].when", "A rule may use", id="rule-does-not-parse"),
]


@pytest.mark.parametrize(("old", "new", "lines", "key", "fix"), BROKEN)
def test_broken_block_gives_one_located_message_and_no_output(
    tmp_path: Path, old: str, new: str, lines: tuple[int, ...], key: str | None, fix: str
) -> None:
    project = copy_example(tmp_path / "project")
    document = edit_report(project, old, new, name="broken.qmd")
    code, out, err = run_premises("render", document, "--json", project / "broken.json")
    assert code == 2 and out == "", "nothing is reported as written"
    assert "Traceback" not in err and "internal error" not in err
    message = err.strip()
    assert message.count("premises:") == 1 and "\n" not in message, f"one message: {err!r}"
    assert re.search(rf"broken\.qmd:({'|'.join(map(str, lines))})\b", message), message
    if key is not None:
        assert f"block 'basil', key '{key}'" in message
    assert fix in message
    assert not (project / "broken.premises.md").exists()
    assert not (project / "broken.json").exists()
    assert not (project / "broken-figures").exists()


def test_missing_column_message_lists_each_column_once(tmp_path: Path) -> None:
    project = copy_example(tmp_path / "project")
    document = edit_report(project, "+ ec_ms", "+ ec_mss", name="broken.qmd")
    _, _, err = run_premises("render", document)
    listed = err.split("The data have: ")[1].rstrip().rstrip(".").split(", ")
    assert len(listed) == len(set(listed)), err


def test_yaml_error_names_the_block(tmp_path: Path) -> None:
    project = copy_example(tmp_path / "project")
    document = edit_report(project, "se: auto", "se: [auto", name="broken.qmd")
    _, _, err = run_premises("render", document)
    assert "block 'basil'" in err or f"block at line {BLOCK_LINE}" in err


def test_a_failed_render_leaves_the_previous_output_in_place(tmp_path: Path) -> None:
    project = copy_example(tmp_path / "project")
    document = project / "report.qmd"
    render_ok(document, "--json", project / "out.json")
    before = {p: p.read_bytes() for p in (project / "report.premises.md", project / "out.json")}
    edit_report(project, "when: light_dli > 100", "when: light_dli >> 100", name="report.qmd")
    code, _, _ = run_premises("render", document, "--json", project / "out.json")
    assert code == 2
    assert {p: p.read_bytes() for p in before} == before
