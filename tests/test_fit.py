"""fit_model and robust_cov: agreement with statsmodels, published fits, refusals."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from premises.errors import ModelError, SpecError
from premises.fit import FitResult, fit_model, robust_cov, scaled_solve
from premises.formula import Design

DATA = Path(__file__).parent / "data"
RTOL = 1e-9


def make_design(
    y: np.ndarray, x: np.ndarray, names: tuple[str, ...], has_intercept: bool = True
) -> Design:
    """A Design with one term per column, independent of the formula code."""
    return Design(
        formula="y ~ ...",
        outcome="y",
        outcome_columns=("y",),
        predictor_columns=tuple(n for n in names if n != "Intercept"),
        y=np.asarray(y, dtype=float),
        X=np.asarray(x, dtype=float),
        column_names=names,
        term_slices=tuple((name, j, j + 1) for j, name in enumerate(names)),
        term_columns=tuple((name, (name,)) for name in names),
        has_intercept=has_intercept,
    )


def random_problem(seed: int, n: int, weighted: bool) -> tuple[Design, np.ndarray | None]:
    """Intercept, a three-level factor (two dummies), two numeric predictors; heteroscedastic."""
    rng = np.random.default_rng(seed)
    level = rng.integers(0, 3, n)
    x1 = rng.normal(10.0, 3.0, n)
    x2 = rng.exponential(2.0, n)
    x = np.column_stack([np.ones(n), level == 1, level == 2, x1, x2]).astype(float)
    y = x @ [1.0, 2.0, -1.0, 0.5, 0.3] + rng.normal(size=n) * (1.0 + x2)
    names = ("Intercept", "site[T.b]", "site[T.c]", "x1", "x2")
    weights = 1.0 / (1.0 + x2) ** 2 if weighted else None
    return make_design(y, x, names), weights


def statsmodels_fit(design: Design, weights: np.ndarray | None):  # type: ignore[no-untyped-def]
    model = (
        sm.OLS(design.y, design.X)
        if weights is None
        else sm.WLS(design.y, design.X, weights=weights)
    )
    return model.fit()


CASES = [
    (seed, n, weighted) for seed, n in ((1, 30), (2, 80), (3, 200)) for weighted in (False, True)
]


@pytest.mark.parametrize(("seed", "n", "weighted"), CASES)
def test_matches_statsmodels(seed: int, n: int, weighted: bool) -> None:
    design, weights = random_problem(seed, n, weighted)
    ours = fit_model(design, weights)
    ref = statsmodels_fit(design, weights)  # statsmodels OLS/WLS as reference
    np.testing.assert_allclose(ours.params, ref.params, rtol=RTOL)
    np.testing.assert_allclose(ours.bse, ref.bse, rtol=RTOL)
    np.testing.assert_allclose(
        ours.cov, ref.cov_params(), rtol=RTOL, atol=1e-12 * np.abs(ref.cov_params()).max()
    )
    np.testing.assert_allclose(
        ours.resid, ref.resid, rtol=RTOL, atol=1e-12 * np.abs(ref.resid).max()
    )
    np.testing.assert_allclose(ours.fitted, ref.fittedvalues, rtol=RTOL)
    np.testing.assert_allclose(ours.xtx_inv, ref.normalized_cov_params, rtol=RTOL, atol=1e-15)
    assert ours.sigma2 == pytest.approx(ref.mse_resid, rel=RTOL)
    assert ours.df_resid == ref.df_resid and ours.df_model == ref.df_model
    assert ours.r_squared == pytest.approx(ref.rsquared, rel=RTOL)
    assert ours.r_squared_adj == pytest.approx(ref.rsquared_adj, rel=RTOL)
    assert ours.f_statistic == pytest.approx(ref.fvalue, rel=RTOL)
    assert ours.f_p == pytest.approx(ref.f_pvalue, rel=1e-7)
    assert ours.rank == design.p


@pytest.mark.parametrize(("seed", "n", "weighted"), CASES)
@pytest.mark.parametrize("kind", ["HC0", "HC1", "HC2", "HC3"])
def test_hc_covariances_match_statsmodels(seed: int, n: int, weighted: bool, kind: str) -> None:
    design, weights = random_problem(seed, n, weighted)
    ours = robust_cov(fit_model(design, weights), kind)
    # statsmodels get_robustcov_results(cov_type=HCk) (MacKinnon & White 1985)
    ref = statsmodels_fit(design, weights).get_robustcov_results(cov_type=kind).cov_params()
    np.testing.assert_allclose(ours, ref, rtol=RTOL, atol=1e-12 * np.abs(ref).max())
    assert robust_cov(fit_model(design, weights), kind.lower()) == pytest.approx(ours, rel=0, abs=0)


@pytest.mark.parametrize(("seed", "n", "weighted"), CASES)
def test_cluster_covariance_matches_statsmodels(seed: int, n: int, weighted: bool) -> None:
    design, weights = random_problem(seed, n, weighted)
    labels = np.array([f"g{j}" for j in np.random.default_rng(seed).integers(0, 9, n)])
    ours = robust_cov(fit_model(design, weights), "cluster", labels)
    codes = np.unique(labels, return_inverse=True)[1]
    # statsmodels cov_type="cluster" with its default small-sample correction (CR1)
    ref = statsmodels_fit(design, weights).get_robustcov_results(cov_type="cluster", groups=codes)
    np.testing.assert_allclose(ours, ref.cov_params(), rtol=RTOL, atol=1e-12 * np.abs(ours).max())


def test_no_intercept_matches_statsmodels_uncentred() -> None:
    rng = np.random.default_rng(7)
    x = rng.normal(5.0, 1.0, (40, 2))
    design = make_design(x @ [1.0, -2.0] + rng.normal(size=40), x, ("a", "b"), has_intercept=False)
    ours = fit_model(design)
    ref = sm.OLS(design.y, x).fit()  # statsmodels: no constant -> uncentred R^2, F on all params
    assert ours.r_squared == pytest.approx(ref.rsquared, rel=RTOL)
    assert ours.r_squared == pytest.approx(1 - ours.ss_resid / np.sum(design.y**2), rel=RTOL)
    assert ours.f_statistic == pytest.approx(ref.fvalue, rel=RTOL)
    assert ours.df_model == 2.0
    np.testing.assert_allclose(ours.bse, ref.bse, rtol=RTOL)


def test_full_dummy_coding_without_intercept_is_centred_like_statsmodels() -> None:
    # statsmodels detects the implicit constant by a rank check and then
    # reports centred R^2 and an F test on p - 1 degrees of freedom.
    rng = np.random.default_rng(15)
    level = np.arange(45) % 3
    x = np.column_stack([level == 0, level == 1, level == 2, rng.normal(size=45)]).astype(float)
    names = ("g[a]", "g[b]", "g[c]", "x")
    design = make_design(level + rng.normal(size=45), x, names, has_intercept=False)
    ours, ref = fit_model(design), sm.OLS(design.y, x).fit()
    assert ref.k_constant == 1
    assert ours.df_model == ref.df_model == 3.0
    assert ours.r_squared == pytest.approx(ref.rsquared, rel=RTOL)
    assert ours.r_squared_adj == pytest.approx(ref.rsquared_adj, rel=RTOL)
    assert ours.f_statistic == pytest.approx(ref.fvalue, rel=RTOL)
    np.testing.assert_allclose(ours.params, ref.params, rtol=RTOL)


def test_intercept_in_any_position_matches_statsmodels() -> None:
    design, weights = random_problem(16, 50, True)
    order = [3, 0, 4, 1, 2]  # the constant column second
    x = design.X[:, order]
    names = tuple(design.column_names[j] for j in order)
    ours = fit_model(make_design(design.y, x, names), weights)
    ref = sm.WLS(design.y, x, weights=weights).fit()
    np.testing.assert_allclose(ours.params, ref.params, rtol=RTOL)
    np.testing.assert_allclose(ours.bse, ref.bse, rtol=RTOL)
    assert ours.r_squared == pytest.approx(ref.rsquared, rel=RTOL)


def test_intercept_only_model_has_no_f_test() -> None:
    y = np.array([1.0, 2.0, 4.0, 3.0])
    fit = fit_model(make_design(y, np.ones((4, 1)), ("Intercept",)))
    assert fit.params[0] == pytest.approx(2.5)
    assert fit.f_statistic is None and fit.f_p is None
    assert fit.r_squared == pytest.approx(0.0, abs=1e-15)


def test_equal_weights_give_the_ols_fit() -> None:
    design, _ = random_problem(5, 50, False)
    ols, wls = fit_model(design), fit_model(design, np.full(50, 3.0))
    np.testing.assert_allclose(wls.params, ols.params, rtol=1e-12)
    np.testing.assert_allclose(wls.bse, ols.bse, rtol=1e-12)


def test_fit_is_deterministic() -> None:
    design, weights = random_problem(4, 60, True)
    a, b = fit_model(design, weights), fit_model(design, weights)
    assert a.params.tobytes() == b.params.tobytes()
    assert a.resid.tobytes() == b.resid.tobytes()


def test_condition_number_is_bkw_scaled_not_centred() -> None:
    # Belsley, Kuh & Welsch (1980): columns (intercept included) scaled to unit
    # length, not centred; largest over smallest singular value. Reference: numpy SVD.
    design, _ = random_problem(6, 100, False)
    scaled = design.X / np.linalg.norm(design.X, axis=0)
    sv = np.linalg.svd(scaled, compute_uv=False)
    assert fit_model(design).condition_number == pytest.approx(sv[0] / sv[-1], rel=1e-10)


def test_condition_number_of_a_weighted_and_an_ill_conditioned_design() -> None:
    # BKW (1980) on the weighted design sqrt(w) X; reference: numpy SVD.
    design, weights = random_problem(6, 100, True)
    assert weights is not None
    scaled = design.X * np.sqrt(weights)[:, None]
    sv = np.linalg.svd(scaled / np.linalg.norm(scaled, axis=0), compute_uv=False)
    assert fit_model(design, weights).condition_number == pytest.approx(sv[0] / sv[-1], rel=1e-10)
    # NIST Filip (x, ..., x^10): about 5e9 after scaling; the SVD of the
    # scaled design itself is accurate to about eps times that.
    x = np.loadtxt(DATA / "nist" / "Filip.csv", delimiter=",", skiprows=1)
    powers = np.column_stack([x[:, 1] ** k for k in range(11)])
    names = ("Intercept", *(f"x^{k}" for k in range(1, 11)))
    sv = np.linalg.svd(powers / np.linalg.norm(powers, axis=0), compute_uv=False)
    filip = fit_model(make_design(x[:, 0], powers, names)).condition_number
    assert filip == pytest.approx(sv[0] / sv[-1], rel=1e-4)


def test_near_singular_design_is_fitted_and_its_condition_recorded() -> None:
    rng = np.random.default_rng(8)
    x1 = rng.normal(size=60)
    x2 = x1 + 1e-6 * rng.normal(size=60)
    x = np.column_stack([np.ones(60), x1, x2])
    design = make_design(x1 + rng.normal(size=60), x, ("Intercept", "a", "b"))
    fit = fit_model(design)
    assert fit.rank == 3
    assert fit.condition_number > 1e5
    ref = sm.OLS(design.y, x).fit()  # statsmodels, still well inside double precision here
    np.testing.assert_allclose(fit.params, ref.params, rtol=1e-6)


def collinear_message(x: np.ndarray, names: tuple[str, ...], has_intercept: bool = True) -> str:
    y = np.random.default_rng(9).normal(size=x.shape[0])
    with pytest.raises(ModelError) as info:
        fit_model(make_design(y, x, names, has_intercept))
    return str(info.value)


def test_collinear_columns_are_named_not_dropped() -> None:
    rng = np.random.default_rng(10)
    a, b = rng.normal(size=(2, 40))
    ones = np.ones(40)
    message = collinear_message(np.column_stack([ones, a, b, 2 * a]), ("Intercept", "a", "b", "a2"))
    assert "'a', 'a2'" in message and "'b'" not in message and "Intercept" not in message
    assert "Remove one of them" in message
    # a shifted copy also involves the intercept: a3 = 2a + 3 * 1
    message = collinear_message(
        np.column_stack([ones, a, b, 2 * a + 3]), ("Intercept", "a", "b", "a3")
    )
    assert "'Intercept', 'a'" in message and "'a3'" in message and "'b'" not in message
    message = collinear_message(np.column_stack([a, b, a - 4 * b]), ("a", "b", "c"), False)
    assert "'a', 'b', 'c'" in message


def test_full_set_of_dummies_with_intercept_is_named() -> None:
    level = np.arange(30) % 3
    x = np.column_stack([np.ones(30), level == 0, level == 1, level == 2, np.arange(30.0)])
    message = collinear_message(x, ("Intercept", "g[a]", "g[b]", "g[c]", "t"))
    assert "'Intercept', 'g[a]', 'g[b]', 'g[c]'" in message and "'t'" not in message


def test_constant_predictor_is_named_with_the_intercept() -> None:
    x = np.column_stack([np.ones(20), np.arange(20.0), np.full(20, 0.1)])
    message = collinear_message(x, ("Intercept", "t", "k"))
    assert "'Intercept', 'k'" in message and "'t'" not in message
    zero = np.column_stack([np.arange(20.0), np.zeros(20)])
    assert "'z'" in collinear_message(zero, ("t", "z"), False)


def test_too_few_rows_constant_outcome_and_bad_values_are_refused() -> None:
    x = np.column_stack([np.ones(3), [1.0, 2.0, 3.0], [0.0, 1.0, 0.0]])
    with pytest.raises(ModelError, match="3 rows but 3 parameters"):
        fit_model(make_design([1.0, 2.0, 4.0], x, ("Intercept", "a", "b")))
    x = np.column_stack([np.ones(5), np.arange(5.0)])
    with pytest.raises(ModelError, match="outcome 'y' is constant"):
        fit_model(make_design(np.full(5, 2.0), x, ("Intercept", "a")))
    bad = x.copy()
    bad[2, 1] = np.inf
    with pytest.raises(ModelError, match="infinite or missing values in 'a'"):
        fit_model(make_design(np.arange(5.0) ** 2, bad, ("Intercept", "a")))


@pytest.mark.parametrize(
    "weights", [[1, 1, 0, 1, 1], [1, 1, -2, 1, 1], [1, 1, np.nan, 1, 1], [1, 1, 1]]
)
def test_invalid_weights_are_refused(weights: list[float]) -> None:
    x = np.column_stack([np.ones(5), np.arange(5.0)])
    with pytest.raises(ModelError, match="weights"):
        fit_model(
            make_design([1.0, 3.0, 2.0, 5.0, 4.0], x, ("Intercept", "a")),
            np.array(weights, dtype=float),
        )


def test_robust_cov_refusals() -> None:
    design, _ = random_problem(11, 30, False)
    fit = fit_model(design)
    with pytest.raises(SpecError, match="HC0, HC1, HC2, HC3, cluster; got 'HC4'"):
        robust_cov(fit, "HC4")
    with pytest.raises(ModelError, match="grouping variable"):
        robust_cov(fit, "cluster")
    with pytest.raises(ModelError, match="at least two clusters"):
        robust_cov(fit, "cluster", np.zeros(30))
    with pytest.raises(ModelError, match="29 group labels for 30 rows"):
        robust_cov(fit, "cluster", np.zeros(29))
    labels = np.array(["a", "b"] * 15, dtype=object)
    labels[3] = None
    with pytest.raises(ModelError, match="missing cluster label"):
        robust_cov(fit, "cluster", labels)


def anscombe(set_name: str) -> Design:
    table = np.genfromtxt(DATA / "anscombe" / "anscombe.csv", delimiter=",", names=True)
    k = {"I": 1, "II": 2, "III": 3, "IV": 4}[set_name]
    x = table[f"x{k}"]
    return make_design(table[f"y{k}"], np.column_stack([np.ones_like(x), x]), ("Intercept", "x"))


@pytest.mark.parametrize("set_name", ["I", "II", "III", "IV"])
def test_anscombe_published_fits(set_name: str) -> None:
    # Minitab session output for all four sets (tests/data/anscombe/values.json,
    # "published.per_set"); tolerance half a unit in the last printed digit.
    published = json.loads((DATA / "anscombe" / "values.json").read_text())["published"]["per_set"][
        set_name
    ]
    fit = fit_model(anscombe(set_name))
    got = {
        "intercept": fit.params[0],
        "slope": fit.params[1],
        "residual_std_error": np.sqrt(fit.sigma2),
        "ss_regression": fit.ss_total - fit.ss_resid,
        "ss_residual": fit.ss_resid,
    }
    for key, value in got.items():
        printed = published[key]["as_printed"]
        decimals = len(printed.split(".")[1]) if "." in printed else 0
        assert abs(value - published[key]["value"]) <= 0.5 * 10.0**-decimals, key


def test_anscombe_set_one_full_precision() -> None:
    # S-Plus output for set I printed to full precision (values.json,
    # "published.per_set.I.*_full"): 3.000090909090909, 0.5000909090909091,
    # SEs 1.124746790808644 and 0.1179055005956341.
    fit = fit_model(anscombe("I"))
    np.testing.assert_allclose(fit.params, [3.000090909090909, 0.5000909090909091], rtol=1e-14)
    np.testing.assert_allclose(fit.bse, [1.124746790808644, 0.1179055005956341], rtol=1e-14)


def test_hc3_is_undefined_at_leverage_one() -> None:
    # Anscombe (1973) set IV: observation 8 alone fixes the slope (h = 1), so
    # e_8^2 / (1 - h_8)^2 is 0/0.
    cov = robust_cov(fit_model(anscombe("IV")), "HC3")
    assert np.isnan(cov).any()
    assert np.isfinite(robust_cov(fit_model(anscombe("IV")), "HC0")).all()


def test_wls_is_ols_on_the_transformed_problem() -> None:
    design, weights = random_problem(12, 70, True)
    assert weights is not None
    sw = np.sqrt(weights)
    wls = fit_model(design, weights)
    ref = sm.OLS(design.y * sw, design.X * sw[:, None]).fit()  # textbook WLS definition
    np.testing.assert_allclose(wls.params, ref.params, rtol=RTOL)
    np.testing.assert_allclose(wls.weighted_resid, ref.resid, rtol=RTOL, atol=1e-12)


def test_scaled_solve_matches_lstsq() -> None:
    rng = np.random.default_rng(13)
    x = np.column_stack([np.ones(50), rng.normal(size=(50, 3))])
    y = rng.normal(size=50)
    coef, resid = scaled_solve(x, y)
    ref = np.linalg.lstsq(x, y, rcond=None)[0]  # numpy's SVD solver as reference
    np.testing.assert_allclose(coef, ref, rtol=1e-10)
    np.testing.assert_allclose(resid, y - x @ ref, atol=1e-12)


def test_fit_result_carries_its_design() -> None:
    design, _ = random_problem(14, 40, False)
    fit = fit_model(design)
    assert isinstance(fit, FitResult) and fit.design is design
    assert (fit.n, fit.p) == (40, 5)
    assert fit.weights is None and fit.factor is not None
