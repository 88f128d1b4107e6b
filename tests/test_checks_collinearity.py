"""Collinearity check: VIFs on Longley's data, generalised VIFs, harmless structural VIFs."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks import CheckContext
from premises.checks.collinearity import assess_collinearity, generalised_vif, vif_from_correlation
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.spec import BlockSpec

DATA = Path(__file__).parent / "data" / "vif"
VALUES = json.loads((DATA / "values.json").read_text())
NAMES = [
    "x1 GNP deflator",
    "x2 GNP",
    "x3 unemployed",
    "x4 armed forces",
    "x5 population",
    "x6 year",
]


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
def longley() -> pd.DataFrame:
    return pd.read_csv(DATA / "Longley.csv")


def test_longley_vifs_match_the_published_values(longley: pd.DataFrame) -> None:
    vif = vif_from_correlation(longley[[f"x{i}" for i in range(1, 7)]].to_numpy(float))
    for value, name in zip(vif, NAMES):
        published = VALUES["published"][name]
        # Longley (1967) VIFs as reproduced in regression texts (from memory): to the printed digits
        decimals = len(published["as_printed"].split(".")[1])
        assert value == pytest.approx(published["value"], abs=0.5 * 10.0**-decimals), name


def test_longley_vifs_match_statsmodels(longley: pd.DataFrame) -> None:
    import statsmodels.api as sm
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    x = longley[[f"x{i}" for i in range(1, 7)]].to_numpy(float)
    ours = vif_from_correlation(x)
    # statsmodels variance_inflation_factor (p auxiliary regressions) as the general-purpose reference
    exog = sm.add_constant(x)
    reference = [variance_inflation_factor(exog, j) for j in range(1, 7)]
    assert ours == pytest.approx(reference, rel=1e-7)


def test_check_reports_the_largest_vif_and_warns_against_dropping(longley: pd.DataFrame) -> None:
    ctx = make_context(longley, "y ~ x1 + x2 + x3 + x4 + x5 + x6")
    finding = assess_collinearity(ctx)
    vif = dict(finding.extra)["vif"]
    assert finding.verdict == "violated"  # VIF 1789 >= 10 x 10
    assert finding.measure is not None
    assert finding.measure.value == pytest.approx(
        VALUES["computed_diag_inverse_correlation_matrix"]["x2 GNP"], rel=1e-6
    )
    assert max(vif, key=vif.get) == "x2"
    assert any("O'Brien" in note for note in finding.notes)
    # Belsley, Kuh & Welsch (1980): condition number of the scaled, uncentred design, from the fit
    assert dict(finding.extra)["condition_number"] == pytest.approx(ctx.fit.condition_number)


def test_generalised_vif_equals_fox_monette_determinant_ratio() -> None:
    rng = np.random.default_rng(4)
    n = 300
    base = rng.normal(size=(n, 5))
    base[:, 3] += 0.8 * base[:, 0]
    r = np.corrcoef(base, rowvar=False)
    groups = [[0], [1, 2], [3, 4]]
    ours = generalised_vif(r, groups)
    # Fox & Monette (1992): GVIF = det(R11) det(R22) / det(R), with separate determinants
    for value, group in zip(ours, groups):
        rest = [k for k in range(5) if k not in group]
        expected = (
            np.linalg.det(r[np.ix_(group, group)])
            * np.linalg.det(r[np.ix_(rest, rest)])
            / np.linalg.det(r)
        )
        assert value == pytest.approx(expected, rel=1e-10)
    # one column: GVIF is the ordinary VIF
    assert ours[0] == pytest.approx(np.linalg.inv(r)[0, 0], rel=1e-12)


def test_factor_terms_get_one_generalised_vif() -> None:
    rng = np.random.default_rng(7)
    n = 200
    site = rng.choice(["a", "b", "c", "d"], size=n)
    frame = pd.DataFrame(
        {"x": rng.normal(size=n) + (site == "d"), "site": site, "z": rng.normal(size=n)}
    )
    frame["y"] = frame.x + rng.normal(size=n)
    finding = assess_collinearity(make_context(frame, "y ~ x + C(site) + z"))
    extra = dict(finding.extra)
    assert set(extra["vif"]) == {"x", "C(site)", "z"}
    assert extra["df"]["C(site)"] == 3
    assert finding.verdict == "holds"


def test_high_vifs_of_a_power_and_its_base_are_explained_as_harmless() -> None:
    rng = np.random.default_rng(8)
    frame = pd.DataFrame({"age": rng.uniform(40, 60, size=150), "w": rng.normal(size=150)})
    frame["y"] = frame.age + rng.normal(size=150)
    finding = assess_collinearity(make_context(frame, "y ~ age + I(age**2) + w"))
    extra = dict(finding.extra)
    assert extra["vif"]["age"] > 100
    assert extra["structural"] is True
    assert finding.verdict == "holds"
    assert any("Allison 2012" in note for note in finding.notes)


def test_a_single_predictor_is_not_assessed() -> None:
    frame = pd.DataFrame({"x": np.arange(10.0), "y": np.arange(10.0) ** 1.1})
    finding = assess_collinearity(make_context(frame, "y ~ x"))
    assert finding.verdict == "not-assessed"
    assert finding.reason == "fewer than two predictor terms"


def test_declared_vif_threshold_is_used() -> None:
    from premises.spec import Thresholds

    rng = np.random.default_rng(9)
    a = rng.normal(size=300)
    frame = pd.DataFrame({"a": a, "b": 0.9 * a + np.sqrt(1 - 0.81) * rng.normal(size=300)})
    frame["y"] = frame.a + rng.normal(size=300)
    default = assess_collinearity(make_context(frame, "y ~ a + b"))
    strict = assess_collinearity(make_context(frame, "y ~ a + b", thresholds=Thresholds(vif=2.5)))
    assert default.verdict == "holds"  # VIF about 5 < 10 (Marquardt 1970)
    assert strict.verdict == "concern"  # 5 >= 2.5 (Allison 2012's stricter convention)
