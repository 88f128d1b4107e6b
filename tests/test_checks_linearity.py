"""Linearity check and the smoothers: RESET, Harvey-Collier, binned means, the share measure."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks import CheckContext
from premises.checks.linearity import (
    SHARE_CONCERN,
    assess_linearity,
    harvey_collier,
    predictor_curves,
    reset_test,
)
from premises.checks.smoothing import bin_means, broken_line_share, smooth_share
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.spec import BlockSpec

DATA = Path(__file__).parent / "data" / "anscombe"


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


def _curved(n: int, curvature: float, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x1, x2 = rng.normal(size=n), rng.normal(size=n)
    y = 1 + x1 + 0.5 * x2 + curvature * (x1**2 - 1) + rng.normal(size=n)
    return pd.DataFrame({"y": y, "x1": x1, "x2": x2, "t": rng.permutation(n)})


def test_reset_matches_statsmodels_linear_reset() -> None:
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import linear_reset

    frame = _curved(150, 0.3, 1)
    ctx = make_context(frame, "y ~ x1 + x2")
    ours = reset_test(ctx.fit.design.y, ctx.fit.design.X, ctx.fit.fitted)
    # Ramsey (1969) RESET with fitted^2 and fitted^3, F form, as computed by statsmodels
    reference = linear_reset(sm.OLS(ctx.fit.design.y, ctx.fit.design.X).fit(), power=3, use_f=True)
    assert ours["f"] == pytest.approx(float(reference.fvalue), rel=1e-7)
    assert ours["p"] == pytest.approx(float(reference.pvalue), rel=1e-6)
    assert (ours["df1"], ours["df2"]) == (2, 150 - 5)


def test_the_check_reports_the_same_reset_as_statsmodels() -> None:
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import linear_reset

    rng = np.random.default_rng(9)
    frame = _curved(300, 0.2, 9)
    frame["g"] = rng.choice(["a", "b", "c"], size=300)
    ctx = make_context(frame, "y ~ x1 + x2 + C(g)")
    finding = assess_linearity(ctx)
    reset = next(s for s in finding.statistics if s.name.startswith("RESET"))
    # Ramsey (1969) via statsmodels linear_reset on the same design (the check's own route differs)
    reference = linear_reset(sm.OLS(ctx.fit.design.y, ctx.fit.design.X).fit(), power=3, use_f=True)
    assert reset.value == pytest.approx(float(reference.fvalue), rel=1e-7)
    assert reset.p == pytest.approx(float(reference.pvalue), rel=1e-6)


def test_harvey_collier_matches_statsmodels_when_it_is_defined() -> None:
    import statsmodels.api as sm
    from statsmodels.stats.diagnostic import linear_harvey_collier

    frame = _curved(120, 0.3, 2)
    ctx = make_context(frame, "y ~ x1 + x2")
    order = frame["x1"].to_numpy()
    ours = harvey_collier(ctx.fit.design.y, ctx.fit.design.X, order)
    index = np.argsort(order)
    # Harvey & Collier (1977) via statsmodels (its slicing is right when p <= 3)
    reference = linear_harvey_collier(
        sm.OLS(ctx.fit.design.y[index], ctx.fit.design.X[index]).fit()
    )
    assert ours["t"] == pytest.approx(float(reference.statistic), rel=1e-8)
    assert ours["p"] == pytest.approx(float(reference.pvalue), rel=1e-6)


def test_harvey_collier_is_defined_with_factor_dummies() -> None:
    rng = np.random.default_rng(3)
    n = 100
    frame = pd.DataFrame(
        {"x": rng.normal(size=n), "g": rng.choice(list("abcd"), size=n), "t": np.arange(n)}
    )
    frame["y"] = frame.x + rng.normal(size=n)
    finding = assess_linearity(make_context(frame, "y ~ x + C(g)", order="t"))
    hc = next(s for s in finding.statistics if s.name.startswith("Harvey-Collier"))
    assert hc.value is not None and np.isfinite(hc.value)


def test_bin_means_equal_pandas_quantile_groups() -> None:
    rng = np.random.default_rng(4)
    x, y = rng.normal(size=500), rng.normal(size=500)
    smooth = bin_means(x, y, 10)
    # Reference: pandas.qcut into 10 quantile bins, then groupby means
    groups = pd.Series(y).groupby(pd.qcut(x, 10, labels=False))
    assert smooth.mean == pytest.approx(groups.mean().to_numpy(), rel=1e-12)
    assert smooth.count.tolist() == groups.size().tolist()
    assert smooth.se == pytest.approx((groups.std() / np.sqrt(groups.size())).to_numpy(), rel=1e-12)
    assert np.all(smooth.lower < smooth.mean) and np.all(smooth.upper > smooth.mean)


@pytest.mark.parametrize("share", [smooth_share, broken_line_share])
def test_shares_of_noise_are_about_zero(share: Any) -> None:
    rng = np.random.default_rng(5)
    values = []
    for _ in range(300):
        x = rng.normal(size=200)
        y = 1 + x + rng.normal(size=200)
        X = np.column_stack([np.ones(200), x])
        e = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
        values.append(share(x, e, None, 2).share)
    # adjusted for the smooth's degrees of freedom: mean 0 within its Monte Carlo error
    assert abs(np.mean(values)) < 3 * np.std(values) / np.sqrt(len(values))


def test_broken_line_recovers_most_of_a_quadratic() -> None:
    x = np.linspace(-2, 2, 400)
    curve = x**2 - np.mean(x**2)
    assert broken_line_share(x, curve, 3).share > 0.97
    assert smooth_share(x, curve, 10).share > 0.9


def test_predictor_curves_use_linear_numeric_terms_only() -> None:
    rng = np.random.default_rng(6)
    frame = pd.DataFrame(
        {
            "w": rng.uniform(1, 5, size=60),
            "v": rng.normal(size=60),
            "g": rng.choice(["a", "b"], size=60),
            "d": rng.integers(0, 2, size=60),
        }
    )
    frame["y"] = frame.v + rng.normal(size=60)
    ctx = make_context(frame, "y ~ log(w) + I(w**2) + v + C(g) + d + v:d")
    assert [term for term, _ in predictor_curves(ctx)] == ["log(w)", "v"]


def test_anscombe_ii_curvature_is_violated() -> None:
    wide = pd.read_csv(DATA / "anscombe.csv")
    frame = pd.DataFrame({"x": wide.x2.astype(float), "y": wide.y2})
    finding = assess_linearity(make_context(frame, "y ~ x"))
    # Anscombe (1973) set II: a smooth curve that a straight line misses
    assert finding.verdict == "violated"
    assert finding.measure is not None and finding.measure.value > 0.9


def test_curvature_is_flagged_and_named() -> None:
    finding = assess_linearity(make_context(_curved(400, 0.35, 7), "y ~ x1 + x2"))
    assert finding.verdict in ("concern", "violated")
    assert dict(finding.extra)["worst"] == "x1"
    assert "x1" in finding.remedy


def test_straight_line_holds_even_when_reset_rejects_a_trivial_curve() -> None:
    finding = assess_linearity(make_context(_curved(20000, 0.05, 8), "y ~ x1 + x2"))
    reset = next(s for s in finding.statistics if s.name.startswith("RESET"))
    assert reset.p is not None and reset.p < 0.05
    assert finding.measure is not None and finding.measure.value < SHARE_CONCERN
    assert finding.verdict == "holds"
    assert any("Li et al. 2024" in note for note in finding.notes)
