"""Large n: the fast paths agree with their references, start-up stays cheap, memory stays linear.

The numbers a large render takes other routes to (normal equations for
auxiliary regressions, refinement in double precision for big well-conditioned
designs, RESET from the fit's factorisation, Breusch-Pagan in one regression,
the Bonferroni tail evaluated where it can matter, refits on rows of the
reported design) are checked against statsmodels, scipy and numpy here, on
data small enough to compare directly. benchmarks/scale.py measures the times.
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.diagnostic import het_breuschpagan, het_white, linear_reset

from premises import analysis, lsq
from premises.changes import _ordered, compare_results
from premises.checks.influence import bonferroni_p
from premises.checks.linearity import reset_from_fit, reset_test
from premises.checks.variance import assess_variance, breusch_pagan, white_test
from premises.fit import fit_model
from premises.formula import Design, build_design
from premises.pipeline import parse_document
from premises.results import to_jsonable

SRC = Path(__file__).resolve().parents[1] / "src"


# ----------------------------------------------------------------------------- helpers


def _design(x: np.ndarray, y: np.ndarray) -> Design:
    """A Design with an intercept first and columns c1..ck."""
    n, k = x.shape
    names = ("Intercept",) + tuple(f"c{j}" for j in range(1, k + 1))
    return Design(
        "y ~ " + " + ".join(names[1:]),
        "y",
        ("y",),
        names[1:],
        y,
        np.column_stack([np.ones(n), x]),
        names,
        tuple((name, j, j + 1) for j, name in enumerate(names)),
        (("Intercept", ()),) + tuple((name, (name,)) for name in names[1:]),
        True,
    )


def _project(tmp: Path, n: int, p: int, seed: int = 3) -> tuple[Path, pd.DataFrame]:
    """A folder with ``data.parquet`` (y, x1..xp, 200 groups in ``site``) and ``doc.md`` with one block."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, p))
    site = rng.integers(0, 200, n)
    y = (
        1.0
        + x @ np.linspace(1.0, -1.0, p)
        + 0.3 * rng.standard_normal(200)[site]
        + rng.standard_normal(n)
    )
    frame = pd.DataFrame(x, columns=[f"x{j}" for j in range(1, p + 1)])
    frame.insert(0, "y", y)
    frame["site"] = site
    frame.to_parquet(tmp / "data.parquet", index=False)
    terms = " + ".join(f"x{j}" for j in range(1, p + 1))
    doc = tmp / "doc.md"
    doc.write_text(
        f"# t\n\n```{{.premises}}\nid: t\ndata: data.parquet\nmodel: y ~ {terms}\ngroups: site\n```\n",
        encoding="utf-8",
    )
    return doc, frame


def _spec(doc: Path):  # type: ignore[no-untyped-def]
    _, specs = parse_document(doc.read_text(encoding="utf-8"), str(doc), document_dir=doc.parent)
    return specs[0]


# ----------------------------------------------------------------------------- start-up


def test_help_takes_under_half_a_second() -> None:
    # What every shell completion and `--help` pays: no pandas, scipy or matplotlib import.
    env = {"PYTHONPATH": str(SRC), "PATH": "/usr/bin:/bin"}
    runs = []
    for _ in range(3):
        start = time.perf_counter()
        done = subprocess.run(
            [sys.executable, "-m", "premises", "--help"], capture_output=True, env=env, check=False
        )
        runs.append(time.perf_counter() - start)
        assert done.returncode == 0, done.stderr
    assert statistics.median(runs) < 0.5, runs


# ----------------------------------------------------------------------------- least squares


def test_gram_lstsq_matches_numpy_and_declines_dependent_columns() -> None:
    rng = np.random.default_rng(0)
    x = np.column_stack([np.ones(500), rng.standard_normal((500, 4)) * [1.0, 1e3, 1e-3, 7.0]])
    y = rng.standard_normal(500)
    reference, *_ = np.linalg.lstsq(x, y, rcond=None)  # numpy's SVD solve as the reference
    np.testing.assert_allclose(lsq.gram_lstsq(x, y), reference, rtol=1e-9)
    assert lsq.well_conditioned(x)
    dependent = np.column_stack([x, x[:, 1] + 2 * x[:, 2]])
    assert lsq.gram_lstsq(dependent, y) is None
    assert not lsq.well_conditioned(dependent)
    assert lsq.gram_lstsq(np.column_stack([x, np.zeros(500)]), y) is None


def test_double_precision_refinement_of_a_large_design_matches_statsmodels(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    rng = np.random.default_rng(1)
    n = 20_000
    x = rng.standard_normal((n, 6)) * [1.0, 10.0, 100.0, 1.0, 0.1, 3.0] + 50.0
    y = 3.0 + x @ np.linspace(0.5, -0.5, 6) + rng.standard_normal(n)
    design = _design(x, y)
    monkeypatch.setattr(lsq, "EXTENDED_MAX_CELLS", 0)
    factor = lsq.factorise(design.X, design.column_names)
    assert not factor._needs_extended()
    fast = fit_model(design)
    monkeypatch.setattr(lsq, "EXTENDED_MAX_CELLS", 10**12)
    extended = fit_model(design)
    reference = sm.OLS(y, design.X).fit()  # statsmodels as the reference
    np.testing.assert_allclose(fast.params, reference.params, rtol=1e-9)
    np.testing.assert_allclose(fast.params, extended.params, rtol=1e-11)
    np.testing.assert_allclose(fast.resid, extended.resid, rtol=0, atol=1e-10 * np.std(y))


def test_ill_conditioned_designs_keep_the_extended_refinement(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(lsq, "EXTENDED_MAX_CELLS", 0)
    t = np.linspace(0.0, 1.0, 400)
    x = np.column_stack(
        [t**k for k in range(1, 8)]
    )  # a raw polynomial: condition ~1e7 after scaling
    factor = lsq.factorise(np.column_stack([np.ones(400), x]), tuple(f"c{k}" for k in range(8)))
    assert np.linalg.cond(factor.r) > lsq.EXTENDED_MAX_CONDITION
    assert factor._needs_extended()


@pytest.mark.parametrize("weighted", [False, True])
def test_coef_rows_are_the_rows_of_the_inverse_times_the_design(weighted: bool) -> None:
    rng = np.random.default_rng(2)
    n = 300
    x = np.column_stack(
        [rng.standard_normal(n), np.ones(n), rng.standard_normal((n, 2)) + 5.0]
    )  # intercept not first
    w = rng.uniform(0.5, 2.0, n) if weighted else None
    factor = lsq.factorise(x, ("a", "Intercept", "b", "c"), w)
    sw = np.sqrt(w) if w is not None else np.ones(n)
    xw = x * sw[:, None]
    expected = (np.linalg.inv(xw.T @ xw) @ xw.T).T  # numpy's inverse as the reference, (n, p)
    np.testing.assert_allclose(factor.coef_rows(), expected, rtol=1e-8, atol=1e-12)


def test_residualise_removes_the_design_from_a_vector() -> None:
    rng = np.random.default_rng(4)
    x = np.column_stack([np.ones(200), rng.standard_normal((200, 3))])
    v = rng.standard_normal((200, 2))
    factor = lsq.factorise(x, ("Intercept", "a", "b", "c"))
    expected = (
        v - x @ np.linalg.lstsq(x, v, rcond=None)[0]
    )  # numpy's least squares as the reference
    np.testing.assert_allclose(factor.residualise(v), expected, atol=1e-12)
    np.testing.assert_allclose(factor.residualise(v[:, 0]), expected[:, 0], atol=1e-12)


# ----------------------------------------------------------------------------- checks


def test_reset_from_the_fit_matches_statsmodels() -> None:
    rng = np.random.default_rng(5)
    n = 2000
    x = rng.standard_normal((n, 3))
    y = 1.0 + x @ [2.0, -1.0, 0.5] + 0.2 * x[:, 0] ** 2 + rng.standard_normal(n)
    design = _design(x, y)
    ours = reset_from_fit(fit_model(design))
    reference = linear_reset(
        sm.OLS(y, design.X).fit(), power=3, test_type="fitted", use_f=True
    )  # statsmodels
    assert ours["f"] == pytest.approx(float(reference.fvalue), rel=1e-9)
    assert ours["p"] == pytest.approx(float(reference.pvalue), rel=1e-6)
    assert (ours["df1"], ours["df2"]) == (2.0, n - 6.0)
    w = rng.uniform(0.5, 2.0, n)
    weighted = fit_model(design, w)
    direct = reset_test(y, design.X, weighted.fitted, w)
    assert reset_from_fit(weighted)["f"] == pytest.approx(direct["f"], rel=1e-9)


def test_reset_from_the_fit_drops_powers_the_design_spans() -> None:
    rng = np.random.default_rng(6)
    dummy = rng.integers(0, 2, 150).astype(
        float
    )  # two fitted values: their powers lie in the design
    design = _design(dummy[:, None], 1.0 + dummy + rng.standard_normal(150))
    found = reset_from_fit(fit_model(design))
    assert found["df1"] == 0.0 and np.isnan(found["f"])


def test_breusch_pagan_and_white_match_statsmodels() -> None:
    rng = np.random.default_rng(7)
    x = rng.standard_normal((3000, 3))
    e = rng.standard_normal(3000) * (1.0 + 0.4 * np.abs(x[:, 0]))
    z = np.column_stack([np.ones(3000), x])
    ours = breusch_pagan(e, x)
    robust = het_breuschpagan(e, z, robust=True)  # statsmodels as the reference
    original = het_breuschpagan(e, z, robust=False)
    assert ours["koenker_lm"] == pytest.approx(robust[0], rel=1e-9)
    assert ours["koenker_p"] == pytest.approx(robust[1], rel=1e-7)
    assert ours["f"] == pytest.approx(robust[2], rel=1e-9)
    assert ours["original_lm"] == pytest.approx(original[0], rel=1e-9)
    white = white_test(e, x)
    reference = het_white(e, z)  # statsmodels
    assert white["lm"] == pytest.approx(reference[0], rel=1e-9)
    assert white["df"] == 9.0


def test_white_is_skipped_above_the_cell_budget(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    from premises.checks import variance

    doc, _ = _project(tmp_path, 400, 3)
    monkeypatch.setattr(variance, "WHITE_MAX_CELLS", 1000)
    spec = _spec(doc)
    finding = _finding(spec, doc, assess_variance)
    assert not any(s.name == "White LM" for s in finding.statistics)
    assert any("White's test was skipped" in note and "400 rows" in note for note in finding.notes)


def _finding(spec, doc: Path, check):  # type: ignore[no-untyped-def]
    from premises.checks.base import CheckContext
    from premises.fit import compute_influence
    from premises.ledger import apply_ledger

    prepared = analysis.prepare_block(spec, doc.parent, analysis.AnalysisOptions())
    outcome = apply_ledger(
        spec,
        prepared.table.frame,
        prepared.ids,
        prepared.formula_columns,
        analysis._formula_transforms(spec),
    )
    _, fit = analysis._fit(spec, outcome)
    ctx = CheckContext(
        spec,
        fit,
        compute_influence(fit),
        outcome.frame,
        np.asarray(outcome.ids, dtype=object),
        outcome.rows,
        spec.seed,
    )
    return check(ctx)


def test_bonferroni_p_equals_the_direct_formula() -> None:
    rng = np.random.default_rng(8)
    for n in (12, 80, 5000):
        t = rng.standard_t(3, n) * 2.0
        t[:3] = (np.nan, np.inf, -np.inf)
        raw = 2.0 * stats.t.sf(np.abs(t), n - 4)  # scipy's t tail as the reference
        expected = np.where(np.isnan(t), np.nan, np.minimum(raw * n, 1.0))
        np.testing.assert_array_equal(bonferroni_p(t, n, 3), expected)


# ----------------------------------------------------------------------------- the block


def test_flagged_refit_on_design_rows_equals_the_ledger_refit(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    doc, frame = _project(tmp_path, 300, 3)
    frame.loc[[5, 77, 140], "y"] += 12.0  # outliers, so points are flagged
    frame.to_parquet(tmp_path / "data.parquet", index=False)
    spec = _spec(doc)
    with tempfile.TemporaryDirectory() as out:
        quick = analysis.analyse_block(spec, doc.parent, Path(out), "f", analysis.AnalysisOptions())
    monkeypatch.setattr(analysis, "_rows_refit_exactly", lambda spec, design: False)
    with tempfile.TemporaryDirectory() as out:
        rebuilt = analysis.analyse_block(
            spec, doc.parent, Path(out), "f", analysis.AnalysisOptions()
        )
    assert quick.flagged
    assert any(r.label == "flagged points removed" for r in quick.sensitivity)
    assert quick.sensitivity == rebuilt.sensitivity


def test_refits_rebuild_the_design_when_rows_change_it(tmp_path: Path) -> None:
    doc, frame = _project(tmp_path, 60, 2)
    frame["g"] = np.where(np.arange(60) % 3 == 0, "a", "b")
    design = build_design("y ~ x1 + x2", frame)
    spec = _spec(doc)
    assert analysis._rows_refit_exactly(spec, design)
    assert not analysis._rows_refit_exactly(replace(spec, model="y ~ center(x1) + x2"), design)
    assert not analysis._rows_refit_exactly(spec, build_design("y ~ x1 + C(g)", frame))


def test_analysed_ids_are_left_out_above_the_limit(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    doc, _ = _project(tmp_path, 40, 2)
    spec = _spec(doc)
    with tempfile.TemporaryDirectory() as out:
        small = to_jsonable(
            analysis.analyse_block(spec, doc.parent, Path(out), "f", analysis.AnalysisOptions())
        )
    monkeypatch.setattr(analysis, "ANALYSED_IDS_MAX", 10)
    with tempfile.TemporaryDirectory() as out:
        large = to_jsonable(
            analysis.analyse_block(spec, doc.parent, Path(out), "f", analysis.AnalysisOptions())
        )
    assert len(small["analysed_ids"]) == 40 and large["analysed_ids"] == []
    # The change log then says which rows entered or left only when both renders listed them.
    assert compare_results(small, large).rows_added is None


def test_ordering_changed_ids_is_linear_and_keeps_file_order() -> None:
    ids = {str(i) for i in range(0, 40_000, 2)}
    order = [str(i) for i in range(40_000)]
    start = time.perf_counter()
    found = _ordered(ids | {"zz", "aa"}, order)
    assert time.perf_counter() - start < 2.0  # a list scan per id made this minutes
    assert found[:3] == ("0", "2", "4") and found[-2:] == ("aa", "zz")


@pytest.mark.slow
def test_peak_memory_of_a_block_is_a_few_copies_of_the_design(tmp_path: Path) -> None:
    n, p = 200_000, 10
    doc, _ = _project(tmp_path, n, p)
    spec = _spec(doc)
    with tempfile.TemporaryDirectory() as out:  # imports, font cache and lazy tables first
        analysis.analyse_block(spec, doc.parent, Path(out), "f", analysis.AnalysisOptions())
    tracemalloc.start()
    try:
        with tempfile.TemporaryDirectory() as out:
            analysis.analyse_block(spec, doc.parent, Path(out), "f", analysis.AnalysisOptions())
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    design = n * (p + 1) * 8  # the (n, p + 1) design in bytes
    # Measured: about 10 designs at the peak (n = 5e4 and 2e5 alike), during the refit without
    # the flagged points: the data table and the analysed frame (2.2), the design, the fit's
    # orthogonal factor and the influence measures' (n, p) DFBETAS (about 4 with the n-vectors),
    # then the refit's design rows, their centred copy and, at this size, the extended-precision
    # copy of the refinement (about 4 more). 12 designs plus 40 MB of figures and tables leaves
    # headroom; an n x n matrix (320 GB here) or a few more copies of the design would not fit.
    assert peak < 12 * design + 40e6, f"peak {peak / 1e6:.0f} MB for a {design / 1e6:.0f} MB design"


def test_per_observation_tables_round_trip_through_the_store(tmp_path: Path) -> None:
    from premises.exports import Observations, diagnostics_rows, ledger_rows
    from premises.pipeline import RenderOptions, render_file

    doc, frame = _project(tmp_path, 120, 2)
    frame.loc[3, "x1"] = np.nan  # a missing row, blank in the tables
    frame.to_parquet(tmp_path / "data.parquet", index=False)
    text = doc.read_text(encoding="utf-8").replace(
        "groups: site\n",
        "groups: site\nexclude:\n  - when: x2 > 1.5\n    reason: outside the range studied\n",
    )
    doc.write_text(text, encoding="utf-8")
    options = RenderOptions(cache_dir=tmp_path / "store")
    render_file(doc, options=options)
    fresh = (
        diagnostics_rows(doc, RenderOptions(use_cache=False)),
        ledger_rows(doc, RenderOptions(use_cache=False)),
    )
    first = (
        diagnostics_rows(doc, options),
        ledger_rows(doc, options),
    )  # computed, kept beside the entry
    stored = list((tmp_path / "store").rglob("observations.npz"))
    assert len(stored) == 1
    second = diagnostics_rows(doc, options), ledger_rows(doc, options)  # read back
    assert fresh == first == second
    assert any(
        row.get("studentized") is None for row in second[1][1]
    )  # the missing row: blank measures
    found = Observations.from_npz(stored[0].read_bytes())
    assert Observations.from_npz(found.to_npz()) == found
    empty = Observations(("1",), (), ("id", "row", "fitted"), (), None, ())
    assert Observations.from_npz(empty.to_npz()) == empty
