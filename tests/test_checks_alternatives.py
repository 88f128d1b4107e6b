"""Declared alternative analyses: ranks, log outcome, Box-Cox (profile likelihood against scipy)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from premises.checks import CheckContext
from premises.checks.alternatives import boxcox_profile, fit_alternatives, profile_loglik
from premises.errors import SpecError
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.spec import BlockSpec


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


def _lognormal(n: int = 150, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    group = rng.choice(["a", "b"], size=n)
    y = np.exp(0.5 + 0.4 * x + 0.3 * (group == "b") + 0.5 * rng.normal(size=n))
    return pd.DataFrame({"y": y, "x": x, "group": group})


def test_profile_loglik_with_only_an_intercept_equals_scipy_boxcox_llf() -> None:
    y = _lognormal().y.to_numpy()
    ones = np.ones((y.size, 1))
    for lam in (-1.0, -0.3, 0.0, 0.5, 1.7):
        # scipy.stats.boxcox_llf (Box & Cox 1964) for the mean-only model
        assert profile_loglik(y, ones, lam) == pytest.approx(stats.boxcox_llf(lam, y), rel=1e-10)


def test_boxcox_lambda_and_interval_match_scipy_for_the_mean_only_model() -> None:
    y = _lognormal(seed=2).y.to_numpy()
    profile = boxcox_profile(y, np.ones((y.size, 1)))
    # scipy.stats.boxcox maximises the same likelihood; its alpha=0.05 interval inverts the LR test
    _, lam, (low, high) = stats.boxcox(y, alpha=0.05)
    assert profile.lam == pytest.approx(lam, abs=1e-4)
    assert profile.ci_low == pytest.approx(low, abs=1e-4)
    assert profile.ci_high == pytest.approx(high, abs=1e-4)


def test_boxcox_row_rounds_lambda_and_is_labelled_data_driven() -> None:
    ctx = make_context(_lognormal(400, 3), "y ~ x + C(group)")
    (row,) = fit_alternatives(ctx, ("boxcox",))
    assert row.data_driven is True
    assert "rounded to 0 (log)" in row.description  # log-normal errors: lambda near 0
    # With lambda rounded to 0 the refit is the regression of log(y), here by statsmodels
    import statsmodels.api as sm

    reference = sm.OLS(np.log(ctx.fit.design.y), ctx.fit.design.X).fit()
    assert [c.estimate for c in row.coefficients] == pytest.approx(list(reference.params), rel=1e-9)
    assert row.n == 400


def test_rank_row_equals_ols_on_ranks() -> None:
    import statsmodels.api as sm

    ctx = make_context(_lognormal(120, 4), "y ~ x + C(group)")
    (row,) = fit_alternatives(ctx, ("rank",))
    assert row.data_driven is False
    X = ctx.fit.design.X.copy()
    X[:, 2] = stats.rankdata(X[:, 2])  # x; the intercept and the dummy stay (Iman & Conover 1979)
    reference = sm.OLS(stats.rankdata(ctx.fit.design.y), X).fit()
    names = ctx.fit.design.column_names
    assert names[2] == "x"
    assert [c.estimate for c in row.coefficients] == pytest.approx(list(reference.params), rel=1e-9)
    assert [c.se for c in row.coefficients] == pytest.approx(list(reference.bse), rel=1e-9)


def test_log_row_needs_a_positive_outcome() -> None:
    frame = _lognormal(60, 5)
    frame.loc[0, "y"] = 0.0
    (row,) = fit_alternatives(make_context(frame, "y ~ x"), ("log-outcome",))
    assert row.coefficients == () and row.n == 0
    assert "not fitted" in row.description and "zero or negative" in row.description


def test_changed_flags_a_conclusion_that_flips() -> None:
    # One huge outcome drives the raw-scale slope's CI above 0; on the log scale the CI covers 0.
    rng = np.random.default_rng(7)
    x = rng.normal(size=40)
    y = np.exp(rng.normal(size=40))
    y[np.argmax(x)] = 500.0
    ctx = make_context(pd.DataFrame({"x": x, "y": y}), "y ~ x", se="classical")
    crit = stats.t.ppf(0.975, 38)
    assert ctx.fit.params[1] - crit * ctx.fit.bse[1] > 0
    (row,) = fit_alternatives(ctx, ("log-outcome",))
    log_fit = next(c for c in row.coefficients if c.term == "x")
    assert log_fit.ci_low < 0 < log_fit.ci_high
    assert row.changed == ("x",)


def test_unknown_alternative_is_a_spec_error() -> None:
    with pytest.raises(SpecError, match="sqrt-outcome"):
        fit_alternatives(make_context(_lognormal(30, 7), "y ~ x"), ("sqrt-outcome",))


def test_rows_come_in_the_declared_order() -> None:
    rows = fit_alternatives(make_context(_lognormal(80, 8), "y ~ x"), ("log-outcome", "rank"))
    assert [r.label for r in rows] == ["log outcome", "ranks"]
