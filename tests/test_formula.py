"""Model formulas: the vocabulary check, the design matrix, and the sealed evaluation.

References: statsmodels' own formula interface (statsmodels 0.15 builds designs
with the formulaic library by default, so it is an independent implementation)
and patsy's ``dmatrices`` run with its default environment.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import patsy
import pytest

from premises.errors import DataError, Location, SpecError
from premises.formula import (
    FORMULA_FUNCTIONS,
    Design,
    FormulaTransform,
    _sealed_environment,
    build_design,
    check_formula,
    formula_columns,
)


@pytest.fixture()
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(7)
    n = 40
    return pd.DataFrame(
        {
            "yield": rng.normal(10, 1, n),
            "water": rng.uniform(1, 5, n),
            "ph": rng.normal(7, 0.3, n),
            "district": rng.choice(["north", "south", "west"], n),
            "y": rng.normal(5, 1, n),
            "x": rng.uniform(1, 3, n),
            "x1": rng.normal(size=n),
            "x2": rng.normal(size=n),
            "g": np.tile(["a", "b", "c", "b"], n // 4),
            "odd name": rng.normal(size=n),
            "label": rng.choice(["yes", "no"], n),
            "flag": rng.random(n) < 0.5,
        }
    )


def _columns(frame: pd.DataFrame) -> tuple[str, ...]:
    return tuple(str(c) for c in frame.columns)


# --- the vocabulary -------------------------------------------------------------------

REFUSED = [
    ("y ~ __import__('os').system('x')", "attribute access"),
    ("y ~ __import__('os')", "double underscores"),
    ("y ~ np.log(x)", "without a module prefix"),
    ("y ~ x.values", "attribute access"),
    ("y ~ I(x).real", "attribute access"),
    ("y ~ open('f')", "calls open()"),
    ("y ~ exec('1')", "calls exec()"),
    ("y ~ eval('x')", "calls eval()"),
    ("y ~ ln(x)", "Did you mean log()"),
    ("y ~ lambda: 1", "lambda"),
    ("y ~ (lambda: 1)()", "lambda"),
    ("y ~ [c for c in x]", "comprehension"),
    ("y ~ x[0]", "indexing"),
    ("y ~ x if x1 else x2", "conditional expression"),
    ("y ~ f'{x}'", "f-string"),
    ("y ~ {1: 2}", "dict literal"),
    ("y ~ I([1, 2])", "list literal"),
    ("y ~ I(x & x1)", "operator `&`"),
    ("y ~ I(~x)", "exactly one `~`"),
    ("y ~ I(not x)", "operator `not`"),
    ("y ~ I(x is x1)", "operator `is`"),
    ("y ~ I(10 ** 10 ** 10)", "large or computed power"),
    ("y ~ I(2 ** 100)", "large or computed power"),
    ("y ~ I('a' * 1000)", "arithmetic on quoted text"),
    ("y ~ Treatment(x)", "outside C()"),
    ("y ~ C(g, foo)", "not a contrast"),
    ("y ~ C(g, open('f'))", "not a contrast"),
    ("y ~ C(g, bar=1)", "passes `bar=` to C()"),
    ("y ~ C(g, Sum(omit=1))", "Only Treatment(reference=...)"),
    ("y ~ C(g, Treatment(reference=x))", "not a number or quoted text"),
    ("y ~ C(g, levels=x)", "not a list"),
    ("y ~ C(g, x, x1)", "one or two arguments"),
    ("y ~ log", "without calling it"),
    ("y ~ log(x, 2)", "other than one argument"),
    ("y ~ center(x, rescale=True)", "other than one argument"),
    ("y ~ log(*x)", "unpacks"),
    ("y ~ Q(x)", "one quoted column name"),
    ("y ~ Q('__class__')", "double underscores"),
    ("y ~ I(None)", "constant"),
    ("y ~ I(1j)", "constant"),
    ("y ~ x ~ x1", "exactly one `~`"),
    ("y", "exactly one `~`"),
    ("y1 + y ~ x", "one outcome"),
    ("~ x", "one outcome"),
    ("y ~ `odd name`", "Q('odd name')"),
    ("y ~ x $ 2", "character '$'"),
    ("y ~ x + 'abc", "without its closing quote"),
    ("y ~ 0", "no terms and no intercept"),
    ("y ~ x +", "cannot be read"),
    ("y ~ " + "(" * 60 + "x" + ")" * 60, "nested deeper than 50"),
    ("y ~ " + " + ".join(["x"] * 700), "characters long"),
]


@pytest.mark.parametrize(("formula", "phrase"), REFUSED, ids=[f[:40] for f, _ in REFUSED])
def test_vocabulary_refusals_are_spec_errors(
    frame: pd.DataFrame, formula: str, phrase: str
) -> None:
    with pytest.raises(SpecError, match=re.escape(phrase)) as info:
        check_formula(formula, _columns(frame))
    assert not isinstance(info.value, DataError)
    assert info.value.hint


def test_refusal_does_not_need_the_data() -> None:
    with pytest.raises(SpecError, match="attribute access"):
        formula_columns("y ~ x.values")


def test_non_text_formula_is_refused() -> None:
    with pytest.raises(SpecError, match="must be text"):
        check_formula(None)  # type: ignore[arg-type]


def test_deep_nesting_inside_a_term_is_refused() -> None:
    deep = "y ~ I(" + "-" * 80 + "x)"
    with pytest.raises(SpecError, match="nested deeper"):
        check_formula(deep)


ACCEPTED = [
    ("yield ~ log2(water) + ph + C(district)", ("yield", "water", "ph", "district")),
    ("y ~ x1 * x2", ("y", "x1", "x2")),
    ("y ~ I(x**2) + center(x)", ("y", "x")),
    ("y ~ C(g, Treatment('b'))", ("y", "g")),
    ("y ~ C(g, Treatment(reference='b'))", ("y", "g")),
    ("y ~ C(g, Sum) + C(district, levels=['west', 'north', 'south'])", ("y", "g", "district")),
    ("y ~ x - 1", ("y", "x")),
    ("log(y) ~ standardize(x) + Q('odd name')", ("y", "x", "odd name")),
    ("y ~ (x1 + x2 + x) ** 2", ("y", "x1", "x2", "x")),
    ("y ~ I(x > 2) + abs(x1) + I(x / 2 ** 3)", ("y", "x", "x1")),
    ("y ~ 1", ("y",)),
]


@pytest.mark.parametrize(("formula", "columns"), ACCEPTED)
def test_accepted_formulas_list_their_columns(
    frame: pd.DataFrame, formula: str, columns: tuple[str, ...]
) -> None:
    assert check_formula(formula, _columns(frame)) == columns
    assert formula_columns(formula) == columns
    design = build_design(formula, frame)
    assert isinstance(design, Design)


def test_unknown_column_is_a_data_error_with_suggestion(frame: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="uses column 'wter'") as info:
        check_formula("yield ~ log2(wter) + ph", _columns(frame))
    assert "Did you mean 'water'?" in str(info.value)
    assert "The data have: yield, water" in str(info.value)
    with pytest.raises(DataError, match="Did you mean 'y'"):
        check_formula("Y ~ x", _columns(frame))
    with pytest.raises(DataError, match="uses column 'np'"):
        check_formula("y ~ np", _columns(frame))


def test_column_that_hides_a_function_is_refused() -> None:
    with pytest.raises(SpecError, match="also have a column named 'log'"):
        check_formula("y ~ log(x)", ("y", "x", "log"))
    assert check_formula("y ~ log", ("y", "log")) == ("y", "log")  # used as a column, it is one


def test_location_is_carried(frame: pd.DataFrame) -> None:
    where = Location("paper.qmd", 4, "main", "model")
    with pytest.raises(SpecError) as info:
        check_formula("y ~ x.values", location=where)
    assert info.value.location == where
    with pytest.raises(DataError) as data_info:
        build_design("y ~ nothing", frame, location=where)
    assert data_info.value.location == where


# --- the design ---------------------------------------------------------------------


def test_design_equals_statsmodels_formula_design(frame: pd.DataFrame) -> None:
    import statsmodels.formula.api as smf

    design = build_design("y ~ log(x) * x2 + C(g)", frame)
    # Reference: statsmodels' formula interface (formulaic engine), with numpy spelled out.
    model = smf.ols("y ~ np.log(x) * x2 + C(g)", frame)
    names = [name.replace("np.log", "log") for name in model.exog_names]
    assert sorted(names) == sorted(design.column_names)
    reference = pd.DataFrame(model.exog, columns=names)[list(design.column_names)]
    np.testing.assert_allclose(design.X, reference.to_numpy(), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(design.y, np.asarray(model.endog), rtol=0, atol=0)


def test_term_slices_match_patsy(frame: pd.DataFrame) -> None:
    formula = "y ~ x1 * x2 + C(district) + center(x)"
    design = build_design(formula, frame)
    # Reference: patsy itself, with its default environment.
    _, x_ref = patsy.dmatrices(formula, frame, return_type="dataframe")
    expected = tuple(
        (name, s.start, s.stop) for name, s in x_ref.design_info.term_name_slices.items()
    )
    assert design.term_slices == expected
    assert design.column_names == tuple(x_ref.columns)
    np.testing.assert_allclose(design.X, x_ref.to_numpy(), rtol=1e-12)


def test_design_shapes_and_term_columns(frame: pd.DataFrame) -> None:
    design = build_design("yield ~ log2(water) + ph + C(district) + ph:water", frame)
    n = len(frame)
    assert design.y.shape == (n,) and design.y.dtype == np.float64
    assert design.X.shape == (n, len(design.column_names)) == (design.n, design.p)
    stops = [stop for _, _, stop in design.term_slices]
    starts = [start for _, start, _ in design.term_slices]
    assert starts[0] == 0 and stops[-1] == design.p and starts[1:] == stops[:-1]
    assert dict(design.term_columns) == {
        "Intercept": (),
        "C(district)": ("district",),
        "log2(water)": ("water",),
        "ph": ("ph",),
        "ph:water": ("ph", "water"),
    }
    assert design.outcome == "yield"
    assert design.outcome_columns == ("yield",)
    assert design.predictor_columns == ("water", "ph", "district")
    assert design.has_intercept
    np.testing.assert_allclose(design.y, frame["yield"].to_numpy())
    column = design.column_names.index("log2(water)")
    np.testing.assert_allclose(design.X[:, column], np.log2(frame["water"].to_numpy()))


def test_treatment_contrast_with_chosen_reference(frame: pd.DataFrame) -> None:
    design = build_design("y ~ C(g, Treatment('b'))", frame)
    # Treatment coding by hand: one indicator per level other than the reference 'b'.
    for level in ("a", "c"):
        column = design.column_names.index(f"C(g, Treatment('b'))[T.{level}]")
        np.testing.assert_array_equal(
            design.X[:, column], (frame["g"] == level).to_numpy(dtype=float)
        )
    assert len(design.column_names) == 3


def test_polynomial_and_centred_terms(frame: pd.DataFrame) -> None:
    design = build_design("y ~ I(x**2) + center(x)", frame)
    x = frame["x"].to_numpy()
    np.testing.assert_allclose(design.X[:, design.column_names.index("I(x ** 2)")], x**2)
    np.testing.assert_allclose(design.X[:, design.column_names.index("center(x)")], x - x.mean())


def test_no_intercept(frame: pd.DataFrame) -> None:
    design = build_design("y ~ x - 1", frame)
    assert not design.has_intercept
    assert design.column_names == ("x",)
    np.testing.assert_allclose(design.X[:, 0], frame["x"].to_numpy())


def test_keyword_column_names_work(frame: pd.DataFrame) -> None:
    design = build_design("yield ~ log(yield + 0) + water", frame.assign(**{"class": 1.0}))
    assert design.outcome == "yield"
    np.testing.assert_allclose(design.y, frame["yield"].to_numpy())
    assert check_formula("y ~ class", ("y", "class")) == ("y", "class")


def test_transforms_are_detected(frame: pd.DataFrame) -> None:
    assert build_design("yield ~ log2(water) + ph + C(district)", frame).transforms == (
        FormulaTransform("log2(water)", "log2", "water"),
    )
    design = build_design(
        "log(y) ~ center(x) + standardize(x2) + sqrt(water) + log10(Q('water')) + exp(x1) + I(x**2) + log(x + 1)",
        frame,
    )
    assert design.transforms == (
        FormulaTransform("log(y)", "log", "y"),
        FormulaTransform("center(x)", "center", "x"),
        FormulaTransform("standardize(x2)", "standardize", "x2"),
        FormulaTransform("sqrt(water)", "sqrt", "water"),
        FormulaTransform("log10(water)", "log10", "water"),
        FormulaTransform("exp(x1)", "exp", "x1"),
    )
    odd = build_design("y ~ scale(Q('odd name'))", frame).transforms
    assert odd == (FormulaTransform("scale(Q('odd name'))", "scale", "odd name"),)


# --- errors on the data ---------------------------------------------------------------


def test_log_of_non_positive_values_names_term_count_and_remedy(frame: pd.DataFrame) -> None:
    bad = frame.copy()
    bad.loc[[0, 5, 9], "water"] = [0.0, -1.0, -0.5]
    count = int((bad["water"] <= 0).sum())
    with pytest.raises(
        DataError, match=rf"'log2\(water\)'.* undefined for {count} rows where water <= 0"
    ) as info:
        build_design("yield ~ log2(water) + ph", bad)
    assert "water <= 0" in str(info.value.hint) and "another transform" in str(info.value.hint)


def test_undefined_values_of_a_compound_term_are_counted(frame: pd.DataFrame) -> None:
    with np.errstate(invalid="ignore", divide="ignore"):
        count = int((~np.isfinite(np.log(frame["x"].to_numpy() - 2))).sum())
    assert count > 0
    with pytest.raises(DataError, match=rf"'log\(x - 2\)'.* in {count} rows"):
        build_design("y ~ log(x - 2)", frame)
    with pytest.raises(DataError, match="undefined or infinite"):
        build_design("y ~ exp(x * 1000)", frame)
    with pytest.raises(DataError, match=r"'log\(y - 100\)'"):
        build_design("log(y - 100) ~ x", frame)


@pytest.mark.parametrize("formula", ["label ~ x", "flag ~ x", "district ~ x", "C(label) ~ x"])
def test_non_numeric_outcome_needs_another_model(frame: pd.DataFrame, formula: str) -> None:
    with pytest.raises(DataError, match="is not numeric") as info:
        build_design(formula, frame)
    assert "logistic regression" in str(info.value)


def test_patsy_errors_are_translated(frame: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="cannot be evaluated on the data") as info:
        build_design("y ~ I(label + 1)", frame)
    assert isinstance(info.value.__cause__, patsy.PatsyError)
    with pytest.raises(DataError, match="needs numbers"):
        build_design("y ~ log(label)", frame)


def test_missing_values_are_refused(frame: pd.DataFrame) -> None:
    holes = frame.copy()
    holes.loc[[1, 2], "x"] = np.nan
    with pytest.raises(DataError, match="Column 'x' has 2 missing values"):
        build_design("y ~ x", holes)


# --- the sealed evaluation ---------------------------------------------------------------


def test_sealed_environment_holds_only_the_allowed_names() -> None:
    env = _sealed_environment()
    names = set(
        env.namespace._dicts[1]
    )  # the one namespace we pass (patsy prepends a scratch dict)
    assert names == set(FORMULA_FUNCTIONS) | {"Treatment", "Sum", "Helmert", "Poly", "Diff"} | {
        "abs"
    }


@pytest.mark.parametrize(
    "code", ["__import__('os')", "open('f')", "eval('1')", "globals()", "print"]
)
def test_python_builtins_cannot_be_reached(code: str) -> None:
    # patsy's default environment reaches Python's builtins (what the sealing prevents):
    assert patsy.EvalEnvironment([{}]).eval("open") is open
    with pytest.raises(NameError):
        _sealed_environment().eval(code)
    assert _sealed_environment().eval("__builtins__") == {}


def test_builtins_stay_sealed_through_patsy_subset_and_dmatrix(frame: pd.DataFrame) -> None:
    # Bypass the whitelist on purpose: even unchecked factor code cannot reach open().
    description = patsy.ModelDesc([], [patsy.Term([patsy.EvalFactor("open('/dev/null')")])])
    with pytest.raises(patsy.PatsyError) as info:
        patsy.dmatrix(description, frame, eval_env=_sealed_environment())
    assert isinstance(info.value.__cause__, NameError)
    assert _sealed_environment().subset(["log"]).eval("log(1.0)") == 0.0
    with pytest.raises(NameError):
        _sealed_environment().subset(["log"]).eval("open")


def test_formula_transforms_without_data() -> None:
    from premises.formula import formula_transforms

    assert formula_transforms("yield ~ log2(water) + sqrt(Q('odd name')) + ph") == (
        FormulaTransform("log2(water)", "log2", "water"),
        FormulaTransform("sqrt(Q('odd name'))", "sqrt", "odd name"),
    )
    with pytest.raises(SpecError):
        formula_transforms("y ~ np.log(x)")
