"""Independence check: Durbin-Watson on Wooldridge's Phillips curves; ICC and design effect."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks import CheckContext
from premises.checks.independence import (
    DEFF_CONCERN,
    breusch_godfrey,
    assess_independence,
    cluster_summary,
    serial_summary,
)
from premises.errors import DataError
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.spec import BlockSpec

DATA = Path(__file__).parent / "data" / "durbin_watson"
VALUES = json.loads((DATA / "values.json").read_text())["phillips"]
PUBLISHED, COMPUTED = VALUES["published"], VALUES["computed_statsmodels"]


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
def phillips() -> pd.DataFrame:
    # 'inf' is renamed: patsy reads a bare `inf` in a formula as the number infinity.
    frame = pd.read_csv(DATA / "phillips.csv").rename(columns={"inf": "inflation"})
    return frame[frame.year <= 1996]


def test_durbin_watson_static_phillips_curve(phillips: pd.DataFrame) -> None:
    # Rows shuffled: the check must sort by the declared order, not trust the file order.
    shuffled = phillips.sample(frac=1.0, random_state=7)
    ctx = make_context(shuffled, "inflation ~ unem", order="year")
    finding = assess_independence(ctx)
    extra = dict(finding.extra)
    assert ctx.fit.n == PUBLISHED["static_n"]["value"]
    # d = .80 (Wooldridge 2019, sect. 12.2; from memory); statsmodels durbin_watson 0.8027 (values.json)
    assert extra["durbin_watson"] == pytest.approx(PUBLISHED["static_DW"]["value"], abs=0.005)
    assert extra["durbin_watson"] == pytest.approx(COMPUTED["static_DW"], rel=1e-9)
    # AR(1) regression of u_t on u_(t-1): rho = .573, t = 4.93 (Wooldridge 2019, Example 12.1; from memory)
    assert extra["autocorrelation"] == pytest.approx(
        PUBLISHED["static_rho_hat"]["value"], abs=0.0005
    )
    statistics = {s.name: s for s in finding.statistics}
    assert statistics["lag-1 autocorrelation"].note == f"t = {COMPUTED['static_rho_t']:.2f}"
    assert finding.verdict == "violated"
    assert finding.measure is not None and finding.measure.name == "lag-1 autocorrelation"


def test_durbin_watson_expectations_augmented_curve(phillips: pd.DataFrame) -> None:
    frame = phillips.dropna(subset=["cinf"])
    finding = assess_independence(make_context(frame, "cinf ~ unem", order="year"))
    extra = dict(finding.extra)
    # d = 1.77 (Wooldridge 2019, sect. 12.2; from memory); statsmodels 1.7696 (values.json)
    assert extra["durbin_watson"] == pytest.approx(PUBLISHED["augmented_DW"]["value"], abs=0.005)
    assert extra["durbin_watson"] == pytest.approx(COMPUTED["augmented_DW"], rel=1e-9)
    # rho = -.036 (Wooldridge 2019, Example 12.1; from memory)
    assert extra["autocorrelation"] == pytest.approx(
        PUBLISHED["augmented_rho_hat"]["value"], abs=0.0005
    )
    assert finding.verdict == "holds"


def test_serial_summary_t_matches_the_ar1_regression(phillips: pd.DataFrame) -> None:
    import statsmodels.api as sm

    ctx = make_context(phillips, "inflation ~ unem")
    e = ctx.fit.resid
    summary = serial_summary(e)
    # Reference: statsmodels OLS of u_t on a constant and u_(t-1) (Wooldridge 2019, sect. 12.2)
    ar1 = sm.OLS(e[1:], sm.add_constant(e[:-1])).fit()
    assert summary["rho"] == pytest.approx(ar1.params[1], rel=1e-10)
    assert summary["rho_t"] == pytest.approx(ar1.tvalues[1], rel=1e-10)


def test_breusch_godfrey_matches_statsmodels(phillips: pd.DataFrame) -> None:
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import acorr_breusch_godfrey

    ctx = make_context(phillips, "inflation ~ unem")
    lm, p = breusch_godfrey(ctx.fit.resid, ctx.fit.design.X)
    reference = acorr_breusch_godfrey(
        sm.OLS(ctx.fit.design.y, ctx.fit.design.X).fit(), nlags=1, result_object=False
    )
    assert lm == pytest.approx(reference[0], rel=1e-8)
    assert p == pytest.approx(reference[1], rel=1e-7)


def test_icc_matches_the_anova_estimator_from_statsmodels_anova() -> None:
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    rng = np.random.default_rng(8)
    sizes = rng.integers(4, 15, size=25)
    groups = np.repeat(np.arange(25), sizes)
    e = rng.normal(size=25)[groups] * 0.6 + rng.normal(size=groups.size)
    summary = cluster_summary(e, groups)
    # One-way ANOVA mean squares from statsmodels; ICC = (MSB - MSW) / (MSB + (n0 - 1) MSW) with
    # n0 = (N - sum n_g^2 / N) / (G - 1) (Fisher 1925; the unbalanced-design n0 as in Donner 1986)
    table = anova_lm(smf.ols("e ~ C(g)", data=pd.DataFrame({"e": e, "g": groups})).fit())
    msb, msw = table["mean_sq"].iloc[0], table["mean_sq"].iloc[1]
    n, g = groups.size, 25
    n0 = (n - np.sum(sizes.astype(float) ** 2) / n) / (g - 1)
    assert summary["icc"] == pytest.approx((msb - msw) / (msb + (n0 - 1) * msw), rel=1e-10)
    assert summary["f"] == pytest.approx(table["F"].iloc[0], rel=1e-10)
    # Kish (1965): DEFF = 1 + (mean cluster size - 1) ICC
    assert summary["design_effect"] == pytest.approx(1 + (n / g - 1) * summary["icc"], rel=1e-12)
    assert summary["effective_n"] == pytest.approx(n / summary["design_effect"], rel=1e-12)


def _clustered(icc: float, groups: int, size: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cluster = np.repeat(np.arange(groups), size)
    x = rng.normal(size=cluster.size)
    error = np.sqrt(icc) * rng.normal(size=groups)[cluster] + np.sqrt(1 - icc) * rng.normal(
        size=cluster.size
    )
    return pd.DataFrame({"y": 1 + x + error, "x": x, "school": [f"s{c}" for c in cluster]})


def test_clustered_residuals_are_flagged_with_advice() -> None:
    finding = assess_independence(make_context(_clustered(0.3, 30, 12, 1), "y ~ x", groups="school"))
    extra = dict(finding.extra)
    assert finding.verdict in ("concern", "violated")
    assert extra["design_effect"] >= DEFF_CONCERN
    assert extra["cluster_robust_advised"] is True
    assert extra["few_clusters"] is True  # 30 < 40 (Cameron & Miller 2015)
    assert any("Cameron & Miller" in note for note in finding.notes)
    assert "multilevel" in finding.remedy


def test_independent_groups_hold() -> None:
    finding = assess_independence(make_context(_clustered(0.0, 60, 8, 2), "y ~ x", groups="school"))
    assert finding.verdict == "holds"
    assert dict(finding.extra)["cluster_robust_advised"] is False
    assert dict(finding.extra)["few_clusters"] is False


def test_nothing_declared_is_not_assessed() -> None:
    finding = assess_independence(make_context(_clustered(0.3, 10, 5, 3), "y ~ x"))
    assert finding.verdict == "not-assessed"
    assert finding.reason == "no order or groups declared"
    assert not any(s.name == "Durbin-Watson d" for s in finding.statistics)


def test_missing_values_in_the_order_column_are_a_data_error() -> None:
    frame = _clustered(0.0, 10, 5, 4)
    frame["t"] = np.arange(len(frame), dtype=float)
    frame.loc[3, "t"] = np.nan
    with pytest.raises(DataError, match="missing values"):
        assess_independence(make_context(frame, "y ~ x", order="t"))
