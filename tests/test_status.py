"""Keeping a report current, end to end: the store, change logs, pins, status, diff, ledger export.

The example project is copied to a temporary folder and rendered through the
command line; the data file is then changed the way a refreshed data set
changes (a value corrected, rows appended).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from premises.cache import BlockCache, read_stamps
from premises.cli import EXIT_INPUT, EXIT_OK, EXIT_STALE, main

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "example_project"
SRC = ROOT / "src"
IGNORE = shutil.ignore_patterns(".premises", "*.premises.*", "*-figures", "_site", ".quarto", "*.html")

pytestmark = pytest.mark.slow


def _copy(target: Path, *, expect: bool = True, pin: bool = False) -> Path:
    shutil.copytree(EXAMPLE, target, ignore=IGNORE)
    doc = target / "report.qmd"
    text = doc.read_text(encoding="utf-8")
    if not expect:
        # The example pins the count of its decimal-slip rule; the refresh below changes that count on purpose.
        assert "    expect: 1\n" in text
        text = text.replace("    expect: 1\n", "")
    if pin:
        text = text.replace("    category: data-error\n    prespecified: true\n", "    category: data-error\n    prespecified: true\n    pin: true\n", 1)
        assert "pin: true" in text
    doc.write_text(text, encoding="utf-8")
    return doc


def _cli(*args: str | Path) -> int:
    return main([str(a) for a in args])


@pytest.fixture(scope="module")
def rendered(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A copy of the example (no ``expect``) rendered once with the store, JSON beside it."""
    doc = _copy(tmp_path_factory.mktemp("rendered") / "project", expect=False)
    assert _cli("render", doc, "--json", doc.with_name("first.json")) == EXIT_OK
    return doc.parent


@pytest.fixture()
def project(rendered: Path, tmp_path: Path) -> Path:
    """A private copy of the rendered project (store and outputs included)."""
    shutil.copytree(rendered, tmp_path / "project")
    return tmp_path / "project"


def _csv_rows(path: Path) -> list[list[str]]:
    return [line.split(",") for line in path.read_text(encoding="utf-8").splitlines()]


def _refresh_data(project: Path) -> None:
    """Correct P041's slipped decimal, and append a batch: 12 plants on strong nutrient solution
    with heavy harvests, and two rows with slipped decimals in light."""
    path = project / "data" / "basil_trial.csv"
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    frame.loc[frame["plant_id"] == "P041", "light_dli"] = "19.2"
    new = [
        {"plant_id": f"P{181 + i}", "bench": "B13", "position": str(i + 1), "light_dli": "30.0", "ec_ms": "3.2", "mass_g": "480.0"}
        for i in range(12)
    ]
    new += [
        {"plant_id": "P193", "bench": "B13", "position": "13", "light_dli": "250.0", "ec_ms": "1.5", "mass_g": "190.0"},
        {"plant_id": "P194", "bench": "B13", "position": "14", "light_dli": "310.0", "ec_ms": "1.8", "mass_g": "210.0"},
    ]
    frame = pd.concat([frame, pd.DataFrame(new)], ignore_index=True)
    path.write_text(frame.to_csv(index=False, lineterminator="\n"), encoding="utf-8")


def test_unchanged_render_reuses_the_store_and_writes_the_same_bytes(project: Path, tmp_path: Path) -> None:
    doc, out = project / "report.qmd", project / "report.premises.md"
    first = out.read_bytes()
    figures = {p.name: p.read_bytes() for p in (project / "report-figures").iterdir()}
    assert _cli("render", doc, "--json", project / "hit.json") == EXIT_OK
    assert out.read_bytes() == first
    assert (project / "hit.json").read_bytes() == (project / "first.json").read_bytes()
    # Without the store: the same document and figures, byte for byte.
    (project / "report-figures").rename(project / "kept-figures")
    out.unlink()
    assert _cli("render", doc, "--no-cache", "--json", project / "plain.json") == EXIT_OK
    assert out.read_bytes() == first
    assert (project / "plain.json").read_bytes() == (project / "first.json").read_bytes()
    assert {p.name: p.read_bytes() for p in (project / "report-figures").iterdir()} == figures
    # The stamp is the provenance fingerprint, and the store holds the entry under it.
    result = json.loads((project / "first.json").read_text(encoding="utf-8"))["blocks"][0]
    assert read_stamps(first.decode("utf-8")) == {"basil": result["provenance"]["fingerprint"]}
    assert len(list((project / ".premises" / "blocks").iterdir())) == 1


def test_a_hit_copies_missing_figures_back(project: Path) -> None:
    shutil.rmtree(project / "report-figures")
    assert _cli("render", project / "report.qmd") == EXIT_OK
    assert sorted(p.name for p in (project / "report-figures").iterdir())


def test_a_cached_render_imports_no_statistics_library(project: Path) -> None:
    code = (
        "import sys; from pathlib import Path; from premises.pipeline import render_file; "
        f"render_file(Path({str(project / 'report.qmd')!r})); "
        "print(' '.join(sorted(sys.modules)))"
    )
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
    loaded = set(done.stdout.split())
    assert not {"statsmodels", "scipy", "matplotlib", "pandas", "numpy"} & loaded


def test_two_renders_started_together_both_succeed(tmp_path: Path) -> None:
    doc = _copy(tmp_path / "project")
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    command = [sys.executable, "-m", "premises", "render", str(doc)]
    procs = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env) for _ in range(2)]
    outcomes = [p.communicate(timeout=600) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [err.decode() for _, err in outcomes]
    out = doc.with_name("report.premises.md").read_bytes()
    blocks = [p for p in (tmp_path / "project" / ".premises" / "blocks").iterdir()]
    assert [p.name for p in blocks if not p.name.startswith(".")] == [p.name for p in blocks]  # no temp folders left
    (entry,) = blocks
    assert BlockCache(tmp_path / "project" / ".premises").lookup(entry.name) is not None
    # A third render is a hit on what they stored and writes the same bytes.
    assert _cli("render", doc) == EXIT_OK
    assert doc.with_name("report.premises.md").read_bytes() == out


def test_refreshed_data_is_stale_then_logged_then_current(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc = project / "report.qmd"
    assert _cli("status", doc) == EXIT_OK
    assert "basil: current" in capsys.readouterr().out
    _refresh_data(project)
    assert _cli("status", doc) == EXIT_STALE
    assert "basil: stale (data changed)" in capsys.readouterr().out
    assert _cli("render", doc, "--json", project / "second.json") == EXIT_OK
    capsys.readouterr()
    before = json.loads((project / "first.json").read_text(encoding="utf-8"))["blocks"][0]
    after = json.loads((project / "second.json").read_text(encoding="utf-8"))["blocks"][0]
    log = after["change_log"]
    # Rows added: the 14 appended ids (P181-P194), read from the data file rather than typed here.
    appended = [f"P{i}" for i in range(181, 195)]
    assert log["rows_added"] == appended
    assert log["rows_read"] == {"before": before["data"]["rows_read"], "after": after["data"]["rows_read"]}
    (rule,) = [r for r in log["rules_matching_other_rows"] if r["rule"] == "light_dli > 100"]
    assert (rule["matched_before"], rule["matched_after"]) == (1, 2)
    assert rule["newly_matched"] == ["P193", "P194"] and rule["no_longer_matched"] == ["P041"]
    # The coefficient of ec_ms moved: the change log's numbers are the two JSON results' estimates.
    moved = {m["term"]: m for m in log["coefficients_moved"]}
    assert "ec_ms" in moved
    old = {c["term"]: c for c in before["coefficients"]}["ec_ms"]
    new = {c["term"]: c for c in after["coefficients"]}["ec_ms"]
    assert moved["ec_ms"]["before"] == old["estimate"] and moved["ec_ms"]["after"] == new["estimate"]
    se = old["se"] if before["se_used"] == "classical" else old["se_robust"]
    assert moved["ec_ms"]["shift_in_se"] == pytest.approx((new["estimate"] - old["estimate"]) / se)
    assert abs(moved["ec_ms"]["shift_in_se"]) > 0.5
    # The section prints the log: the added rows, the rule and the term.
    section = doc.with_name("report.premises.md").read_text(encoding="utf-8")
    assert "P193" in section and "light_dli > 100" in section and "ec_ms" in section
    assert "Rows added" in section
    # Now current; rendering again keeps the same log (it describes the last change).
    assert _cli("status", doc) == EXIT_OK
    capsys.readouterr()
    assert _cli("render", doc, "--json", project / "third.json") == EXIT_OK
    assert (project / "third.json").read_bytes() == (project / "second.json").read_bytes()
    capsys.readouterr()
    assert _cli("diff", doc) == EXIT_OK
    printed = capsys.readouterr().out
    assert "Rows added: P181; P182" in printed and "light_dli > 100" in printed
    assert _cli("diff", doc, "--json") == EXIT_OK
    assert json.loads(capsys.readouterr().out)["basil"] == log


def test_notebook_blocks_have_a_status(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    shutil.copytree(EXAMPLE, tmp_path / "project", ignore=IGNORE)
    notebook = tmp_path / "project" / "analysis.ipynb"
    if not notebook.is_file():
        pytest.skip("the example project has no notebook")
    assert _cli("status", notebook) == EXIT_STALE
    assert "never rendered" in capsys.readouterr().out
    assert _cli("notebook", notebook) == EXIT_OK
    capsys.readouterr()
    assert _cli("status", notebook) == EXIT_OK
    states = capsys.readouterr().out.splitlines()
    assert states and all(line.endswith(": current") for line in states)


def test_status_names_each_kind_of_staleness(project: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc, out = project / "report.qmd", project / "report.premises.md"
    rendered = out.read_text(encoding="utf-8")
    start = rendered.index("<!-- premises:begin")
    out.write_text(rendered[: start + 200] + "hand edit " + rendered[start + 200 :], encoding="utf-8")
    assert _cli("status", doc) == EXIT_STALE
    assert "output edited" in capsys.readouterr().out
    out.unlink()
    assert _cli("status", doc) == EXIT_STALE
    assert "output missing" in capsys.readouterr().out
    out.write_text(rendered, encoding="utf-8")
    doc.write_text(doc.read_text(encoding="utf-8").replace("reason: the trial protocol", "reason: as the trial protocol"), encoding="utf-8")
    assert _cli("status", doc) == EXIT_STALE
    assert "spec changed" in capsys.readouterr().out
    fresh = _copy(tmp_path / "fresh")
    assert _cli("status", fresh) == EXIT_STALE
    assert "basil: never rendered" in capsys.readouterr().out
    plain = tmp_path / "notes.md"
    plain.write_text("# Notes\n\nNo blocks here.\n", encoding="utf-8")
    assert _cli("status", plain) == EXIT_OK


def test_a_pinned_rule_that_matches_other_rows_fails_the_render(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc = _copy(tmp_path / "project", expect=False, pin=True)
    assert _cli("render", doc) == EXIT_OK
    out = doc.with_name("report.premises.md").read_bytes()
    capsys.readouterr()
    _refresh_data(tmp_path / "project")
    assert _cli("render", doc) == EXIT_INPUT
    message = capsys.readouterr().err
    assert "pinned rule 'light_dli > 100'" in message
    assert "now also matches P193, P194" in message and "no longer matches P041" in message
    assert doc.with_name("report.premises.md").read_bytes() == out  # the previous output is left as it was


def test_ledger_csv_lists_exactly_the_excluded_rows(project: Path) -> None:
    doc = project / "report.qmd"
    assert _cli("ledger", doc, "--csv", project / "ledger.csv", "--diagnostics", project / "diag.csv") == EXIT_OK
    result = json.loads((project / "first.json").read_text(encoding="utf-8"))["blocks"][0]
    said = {(s["kind"], i) for s in result["ledger"] if s["kind"] in ("exclude", "missing") for i in s["removed_ids"]}
    ledger = pd.read_csv(project / "ledger.csv", dtype={"id": str})
    assert set(zip(ledger["step"], ledger["id"])) == said and len(ledger) == len(said)
    reasons = {s["rule"]: s["reason"] for s in result["ledger"] if s["kind"] == "exclude"}
    for _, row in ledger[ledger["step"] == "exclude"].iterrows():
        assert row["reason"] == reasons[row["rule"]]
    diag = pd.read_csv(project / "diag.csv", dtype={"id": str})
    assert list(diag["id"]) == result["analysed_ids"]
    # A second export reads the tables kept beside the store entry and writes the same bytes.
    first = (project / "ledger.csv").read_bytes()
    assert _cli("ledger", doc, "--csv", project / "ledger.csv") == EXIT_OK
    assert (project / "ledger.csv").read_bytes() == first
    assert _cli("ledger", doc, "--diagnostics", project / "diag.parquet") == EXIT_OK
    parquet = pd.read_parquet(project / "diag.parquet")
    np.testing.assert_array_equal(parquet["cooks"].to_numpy(), diag["cooks"].to_numpy())


def _statsmodels_influence(frame: pd.DataFrame) -> pd.DataFrame:
    import statsmodels.formula.api as smf

    fit = smf.ols("mass_g ~ np.log2(light_dli) + ec_ms", data=frame).fit()
    influence = fit.get_influence()
    return pd.DataFrame(
        {
            "leverage": influence.hat_matrix_diag,
            "studentized": influence.resid_studentized_external,
            "cooks": influence.cooks_distance[0],
            "dffits": influence.dffits[0],
            "dfbetas_ec_ms": influence.dfbetas[:, 2],
            "fitted": fit.fittedvalues.to_numpy(),
        },
        index=frame["plant_id"],
    )


def test_exported_diagnostics_agree_with_statsmodels(project: Path) -> None:
    doc = project / "report.qmd"
    assert _cli("ledger", doc, "--csv", project / "ledger.csv", "--diagnostics", project / "diag.csv") == EXIT_OK
    data = pd.read_csv(project / "data" / "basil_trial.csv")
    complete = data.dropna(subset=["mass_g", "light_dli", "ec_ms", "bench"])
    # Reference: statsmodels' OLSInfluence (leave-one-out definitions) on the same rows.
    analysed = _statsmodels_influence(complete[(complete["light_dli"] <= 100) & (complete["plant_id"] != "P118")])
    diag = pd.read_csv(project / "diag.csv", dtype={"id": str}).set_index("id")
    for column in analysed.columns:
        np.testing.assert_allclose(diag.loc[analysed.index, column], analysed[column], rtol=1e-8, atol=1e-10)
    # Excluded rows: diagnostics from the refit with the exclusions put back.
    undone = _statsmodels_influence(complete)
    ledger = pd.read_csv(project / "ledger.csv", dtype={"id": str}).set_index("id")
    excluded = ledger[ledger["step"] == "exclude"].index
    for column in ("leverage", "studentized", "cooks", "dffits"):
        np.testing.assert_allclose(ledger.loc[excluded, column], undone.loc[excluded, column], rtol=1e-8)
    assert ledger.loc[ledger["step"] == "missing", "cooks"].isna().all()


def test_unknown_block_and_bad_table_type_are_input_errors(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc = project / "report.qmd"
    assert _cli("ledger", doc, "--block", "nope", "--csv", project / "x.csv") == EXIT_INPUT
    assert "no block with id 'nope'" in capsys.readouterr().err
    assert _cli("ledger", doc, "--diagnostics", project / "x.xlsx") == EXIT_INPUT
    assert "unknown table type" in capsys.readouterr().err
