"""Equal-variance check: Breusch-Pagan, White and Brown-Forsythe against published and library values."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from premises.checks import CheckContext
from premises.checks.variance import (
    SPREAD_CONCERN,
    breusch_pagan,
    assess_variance,
    factor_spread,
    spread_ratio,
    white_test,
)
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.spec import BlockSpec

DATA = Path(__file__).parent / "data" / "breusch_pagan_hprice1"
VALUES = json.loads((DATA / "values.json").read_text())
PUBLISHED = VALUES["published"]
COMPUTED = VALUES["computed_statsmodels"]


def make_context(frame: pd.DataFrame, formula: str, **keys: Any) -> CheckContext:
    frame = frame.reset_index(drop=True)
    design = build_design(formula, frame)
    fit = fit_model(design)
    spec = BlockSpec(id="blk", data="data.csv", model=formula, **keys)
    n = design.n
    return CheckContext(
        spec=spec,
        fit=fit,
        influence=compute_influence(fit),
        frame=frame,
        ids=np.array([str(i) for i in range(1, n + 1)], dtype=object),
        rows=np.arange(1, n + 1),
        seed=spec.seed,
    )


@pytest.fixture(scope="module")
def hprice() -> pd.DataFrame:
    return pd.read_csv(DATA / "hprice1.csv")


def _half_unit(as_printed: str) -> float:
    decimals = len(as_printed.split(".")[1]) if "." in as_printed else 0
    return 0.5 * 10.0**-decimals


def test_breusch_pagan_matches_wooldridge_example_8_4(hprice: pd.DataFrame) -> None:
    ctx = make_context(hprice, "price ~ lotsize + sqrft + bdrms")
    bp = breusch_pagan(ctx.fit.resid, ctx.fit.design.X[:, 1:])
    # Koenker's LM = n R^2 = 14.09, p = .0028, F = 5.34 (Wooldridge 2019, Example 8.4; from memory)
    assert bp["koenker_lm"] == pytest.approx(
        PUBLISHED["koenker_LM"]["value"], abs=_half_unit("14.09")
    )
    assert bp["koenker_p"] == pytest.approx(
        PUBLISHED["koenker_LM_pvalue"]["value"], abs=_half_unit(".0028")
    )
    assert bp["f"] == pytest.approx(PUBLISHED["bp_F"]["value"], abs=_half_unit("5.34"))
    # Original (normal-errors) LM = 30.02 (Stata hettest handout 'Hetero-Stata', not from memory)
    assert bp["original_lm"] == pytest.approx(
        PUBLISHED["bp_original_chi2_3"]["value"], abs=_half_unit("30.02")
    )
    assert bp["df"] == 3
    # statsmodels het_breuschpagan as the general-purpose reference, full precision (values.json)
    assert bp["koenker_lm"] == pytest.approx(COMPUTED["koenker_LM"], rel=1e-9)
    assert bp["original_lm"] == pytest.approx(COMPUTED["bp_original_chi2_3"], rel=1e-9)
    assert bp["f_p"] == pytest.approx(COMPUTED["bp_F_pvalue"], rel=1e-7)


def test_breusch_pagan_on_the_log_model(hprice: pd.DataFrame) -> None:
    ctx = make_context(hprice, "lprice ~ llotsize + lsqrft + bdrms")
    bp = breusch_pagan(ctx.fit.resid, ctx.fit.design.X[:, 1:])
    # LM = 4.22, p = .239 (Wooldridge 2019, Example 8.4, log model; from memory, so within one
    # unit of the last printed digit: the remembered p may be rounded up from .2383)
    assert bp["koenker_lm"] == pytest.approx(
        PUBLISHED["log_model_LM"]["value"], abs=_half_unit("4.22")
    )
    assert bp["koenker_p"] == pytest.approx(
        PUBLISHED["log_model_LM_pvalue"]["value"], abs=2 * _half_unit(".239")
    )
    # statsmodels het_breuschpagan, full precision (values.json)
    assert bp["koenker_p"] == pytest.approx(COMPUTED["log_model_LM_pvalue"], rel=1e-8)


def test_white_test_matches_statsmodels_on_hprice(hprice: pd.DataFrame) -> None:
    ctx = make_context(hprice, "price ~ lotsize + sqrft + bdrms")
    white = white_test(ctx.fit.resid, ctx.fit.design.X[:, 1:])
    # statsmodels het_white on the same model: LM, p, F, F p (values.json, white_full_levels)
    lm, p, f, f_p = COMPUTED["white_full_levels"]
    assert white["lm"] == pytest.approx(lm, rel=1e-8)
    assert white["p"] == pytest.approx(p, rel=1e-6)
    assert white["f"] == pytest.approx(f, rel=1e-8)
    assert white["f_p"] == pytest.approx(f_p, rel=1e-6)
    assert white["df"] == 9


def test_white_test_drops_duplicated_dummy_squares() -> None:
    rng = np.random.default_rng(5)
    n = 300
    g = rng.integers(0, 3, size=n)
    x = np.column_stack([rng.normal(size=n), g == 1, g == 2]).astype(float)
    e = rng.normal(size=n)
    white = white_test(e, x)
    # levels 3, squares of x only (dummy^2 = dummy), cross-products 3 minus the zero d1*d2: 3 + 1 + 2 = 6
    assert white["df"] == 6
    # Reference: n R^2 of e^2 on the same six auxiliary columns (White 1980), via statsmodels OLS
    import statsmodels.api as sm

    aux = np.column_stack([x, x[:, 0] ** 2, x[:, 0] * x[:, 1], x[:, 0] * x[:, 2]])
    r2 = sm.OLS(e**2, sm.add_constant(aux)).fit().rsquared
    assert white["lm"] == pytest.approx(n * r2, rel=1e-9)


def test_brown_forsythe_equals_anova_of_absolute_deviations_from_medians() -> None:
    rng = np.random.default_rng(11)
    groups = np.repeat(["a", "b", "c"], [20, 30, 25])
    e = rng.normal(size=groups.size) * np.where(groups == "c", 3.0, 1.0)
    result = factor_spread(e, groups)
    assert result is not None
    # Brown & Forsythe (1974): one-way ANOVA of |e - group median|, here by scipy.stats.f_oneway
    deviations = [np.abs(e[groups == k] - np.median(e[groups == k])) for k in "abc"]
    reference = stats.f_oneway(*deviations)
    assert result["statistic"] == pytest.approx(reference.statistic, rel=1e-10)
    assert result["p"] == pytest.approx(reference.pvalue, rel=1e-8)
    assert result["ratio"] > 2.0


def test_spread_ratio_reads_the_thirds_of_fitted_values() -> None:
    fitted = np.arange(90.0)
    resid = np.tile([1.0, -1.0, 1.0], 30) * np.repeat([1.0, 2.0, 3.0], 30)
    ratio, side = spread_ratio(fitted, resid)
    assert ratio == pytest.approx(3.0)
    assert side == "top"
    ratio, side = spread_ratio(fitted[::-1].copy(), resid)
    assert side == "bottom"


def _simulated(n: int, growth: float, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    mean = 1 + x
    y = mean + rng.normal(size=n) * np.exp(growth * x)
    return pd.DataFrame({"x": x, "y": y})


def test_variance_growing_with_the_mean_is_flagged_and_hc3_advised() -> None:
    finding = assess_variance(make_context(_simulated(400, 0.5, 1), "y ~ x"))
    assert finding.verdict in ("concern", "violated")
    assert finding.measure is not None and finding.measure.value >= SPREAD_CONCERN
    assert dict(finding.extra)["hc3_advised"] is True
    assert any("Long & Ervin" in note for note in finding.notes)


def test_constant_variance_holds_and_hc3_not_advised() -> None:
    finding = assess_variance(make_context(_simulated(400, 0.0, 2), "y ~ x"))
    assert finding.verdict == "holds"
    assert dict(finding.extra)["hc3_advised"] is False


def test_trivial_heteroscedasticity_at_large_n_is_not_a_violation() -> None:
    # At n = 20000 Breusch-Pagan detects a 10% change in SD, which does not matter (Li et al. 2024).
    finding = assess_variance(make_context(_simulated(20000, 0.05, 3), "y ~ x"))
    statistics = {s.name: s for s in finding.statistics}
    assert statistics["Breusch-Pagan LM (Koenker)"].p < 0.05
    assert finding.verdict == "holds"


def test_white_is_skipped_with_a_note_when_there_are_too_many_terms() -> None:
    rng = np.random.default_rng(4)
    frame = pd.DataFrame(rng.normal(size=(40, 12)), columns=[f"x{i}" for i in range(12)])
    frame["y"] = rng.normal(size=40)
    finding = assess_variance(make_context(frame, "y ~ " + " + ".join(f"x{i}" for i in range(12))))
    assert not any(s.name == "White LM" for s in finding.statistics)
    assert any("White's test was skipped" in note for note in finding.notes)
