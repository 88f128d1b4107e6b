"""Accuracy of fit_model on the NIST StRD linear regression suite (all 11 datasets).

Certified values: NIST/ITL Statistical Reference Datasets, Linear Least Squares
Regression (tests/data/nist/values.json records the source and how the copy was
verified). Accuracy is the log relative error, LRE = -log10(|est - cert| / |cert|),
in digits, capped at 15 (NIST quotes 15 significant digits); for a certified
value of 0 (Wampler1/2 residual SD) it is -log10(|est|).

Run with ``pytest -s tests/test_fit_nist.py`` to print the table.

Filip: the design holds x, x^2, ..., x^10 rounded to double. Solving *that* matrix
exactly (rational arithmetic, below) agrees with the certified coefficients to
only ~7.6 digits, because rounding each power separately perturbs a design whose
condition number is ~4e9. No solver that receives the design as doubles can
reach 9 digits there; the test holds our fit to that ceiling instead.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from premises.fit import FitResult, fit_model
from premises.formula import Design

DATA = Path(__file__).parent / "data" / "nist"
VALUES = json.loads((DATA / "values.json").read_text(encoding="utf-8"))["datasets"]
DATASETS = tuple(VALUES)

# The fit refines its solution with residuals in numpy.longdouble. Where that
# type is plain double (Windows, macOS on ARM) the refinement gains less; the
# lower targets below were measured with longdouble replaced by double.
EXTENDED = np.finfo(np.longdouble).eps < np.finfo(np.float64).eps

# Minimum LRE (digits) asked of the fit. Wampler5's residuals are huge beside
# its fitted values, which costs digits in any double-precision solver (with
# extended residuals its certified coefficients are still met to 9 here).
# Filip: see the module docstring.
COEF_TARGET = {name: 9.0 for name in DATASETS} | {"Wampler5": 7.0, "Filip": 7.5}
SD_TARGET = {name: 9.0 for name in DATASETS} | {"Filip": 7.0}
RSD_TARGET = {name: 9.0 for name in DATASETS}
if not EXTENDED:
    COEF_TARGET |= {"Wampler4": 7.5, "Wampler5": 6.5, "Filip": 7.0}
    RSD_TARGET |= {"Filip": 8.0}


def make_design(
    y: np.ndarray, x: np.ndarray, names: tuple[str, ...], has_intercept: bool
) -> Design:
    """A Design with one term per column, independent of the formula code."""
    return Design(
        formula="y ~ ...",
        outcome="y",
        outcome_columns=("y",),
        predictor_columns=tuple(n for n in names if n != "Intercept"),
        y=y,
        X=x,
        column_names=names,
        term_slices=tuple((name, j, j + 1) for j, name in enumerate(names)),
        term_columns=tuple((name, (name,)) for name in names),
        has_intercept=has_intercept,
    )


def nist_design(name: str) -> Design:
    """The model NIST certifies for ``name``: Longley's six predictors, else powers of x."""
    info = VALUES[name]
    table = np.loadtxt(DATA / info["csv"], delimiter=",", skiprows=1)
    y = table[:, 0]
    intercept = bool(info["model"]["intercept"])
    if info["model"]["kind"] == "multiple":
        columns = [table[:, j] for j in range(1, table.shape[1])]
        names = tuple(f"x{j}" for j in range(1, table.shape[1]))
    else:
        x = table[:, 1]
        degree = int(info["model"]["degree"])
        columns = [x**k for k in range(1, degree + 1)]
        names = tuple(f"x^{k}" for k in range(1, degree + 1))
    if intercept:
        columns.insert(0, np.ones_like(y))
        names = ("Intercept", *names)
    return make_design(y, np.column_stack(columns), names, intercept)


def lre(estimate: float, certified: float) -> float:
    """Log relative error in digits (NIST StRD convention), capped at 15."""
    if estimate == certified:
        return 15.0
    if certified == 0.0:
        return min(15.0, -math.log10(abs(estimate)))
    return min(15.0, -math.log10(abs(estimate - certified) / abs(certified)))


def measure(name: str, fit: FitResult) -> dict[str, float]:
    """Minimum LRE over each group of certified values."""
    cert = VALUES[name]["certified"]
    row = {
        "coef": min(
            lre(b, c["estimate"]) for b, c in zip(fit.params, cert["parameters"], strict=True)
        ),
        "sd": min(lre(s, c["std_dev"]) for s, c in zip(fit.bse, cert["parameters"], strict=True)),
        "rsd": lre(math.sqrt(fit.sigma2), cert["residual_standard_deviation"]),
        "r2": lre(fit.r_squared, cert["r_squared"]),
        "rss": lre(fit.ss_resid, cert["anova"]["residual"]["sum_of_squares"]),
    }
    f_cert = cert["anova"]["regression"]["F_statistic"]
    # Wampler1/2 fit exactly: NIST certifies no F (it is infinite).
    row["F"] = lre(float(fit.f_statistic), f_cert) if f_cert is not None else float("nan")
    return row


@pytest.fixture(scope="module")
def table() -> dict[str, dict[str, float]]:
    return {name: measure(name, fit_model(nist_design(name))) for name in DATASETS}


@pytest.mark.parametrize("name", DATASETS)
def test_certified_coefficients(table: dict[str, dict[str, float]], name: str) -> None:
    # NIST StRD certified parameter estimates (values.json, "certified.parameters").
    assert table[name]["coef"] >= COEF_TARGET[name]


@pytest.mark.parametrize("name", DATASETS)
def test_certified_standard_deviations(table: dict[str, dict[str, float]], name: str) -> None:
    # NIST StRD certified standard deviations of the estimates.
    assert table[name]["sd"] >= SD_TARGET[name]


@pytest.mark.parametrize("name", DATASETS)
def test_certified_residual_sd_r_squared_and_f(
    table: dict[str, dict[str, float]], name: str
) -> None:
    # NIST StRD certified residual SD, R^2 (uncentred for NoInt1/NoInt2, as
    # values.json notes) and the ANOVA F statistic.
    row = table[name]
    assert row["rsd"] >= RSD_TARGET[name]
    assert row["r2"] >= 9.0
    assert row["rss"] >= RSD_TARGET[name]
    if not math.isnan(row["F"]):
        assert row["F"] >= RSD_TARGET[name]


def test_no_intercept_r_squared_is_uncentred() -> None:
    # NIST StRD NoInt1: certified R^2 = 0.999365492298663 is 1 - RSS / sum(y^2).
    fit = fit_model(nist_design("NoInt1"))
    assert not fit.design.has_intercept
    assert lre(fit.r_squared, VALUES["NoInt1"]["certified"]["r_squared"]) >= 12.0
    assert fit.df_model == 1.0


def exact_least_squares(design: Design) -> tuple[list[float], list[float]]:
    """Coefficients and SDs of the exact least-squares solution of the double-valued design.

    Normal equations solved in rational arithmetic, so every digit lost is the
    design's (its doubles), none the solver's.
    """
    x = [[Fraction(float(v)) for v in row] for row in design.X]
    y = [Fraction(float(v)) for v in design.y]
    n, p = len(x), len(x[0])
    aug = [
        [sum(r[i] * r[j] for r in x) for j in range(p)]
        + [sum(r[i] * v for r, v in zip(x, y, strict=True))]
        + [Fraction(int(i == j)) for j in range(p)]
        for i in range(p)
    ]
    for c in range(p):  # Gauss-Jordan; exact, so no pivoting strategy is needed
        pivot = next(r for r in range(c, p) if aug[r][c] != 0)
        aug[c], aug[pivot] = aug[pivot], aug[c]
        aug[c] = [v / aug[c][c] for v in aug[c]]
        for r in range(p):
            if r != c and aug[r][c] != 0:
                factor = aug[r][c]
                aug[r] = [a - factor * b for a, b in zip(aug[r], aug[c], strict=True)]
    beta = [aug[i][p] for i in range(p)]
    rss = sum(
        (v - sum(b * xv for b, xv in zip(beta, row, strict=True))) ** 2
        for row, v in zip(x, y, strict=True)
    )
    s2 = rss / (n - p)
    return [float(b) for b in beta], [math.sqrt(float(s2 * aug[i][p + 1 + i])) for i in range(p)]


def test_filip_reaches_the_ceiling_of_its_double_design(table: dict[str, dict[str, float]]) -> None:
    design = nist_design("Filip")
    beta, sd = exact_least_squares(design)
    cert = VALUES["Filip"]["certified"]["parameters"]
    ceiling_coef = min(lre(b, c["estimate"]) for b, c in zip(beta, cert, strict=True))
    ceiling_sd = min(lre(s, c["std_dev"]) for s, c in zip(sd, cert, strict=True))
    # The double-valued design itself cannot give 9 digits (NIST Filip certified values).
    assert ceiling_coef < 8.0
    # Our coefficients reach that ceiling; the SDs come within half a digit of it.
    assert table["Filip"]["coef"] >= ceiling_coef - (0.1 if EXTENDED else 0.5)
    assert table["Filip"]["sd"] >= ceiling_sd - 0.5


def test_print_lre_table(table: dict[str, dict[str, float]]) -> None:
    columns = ("coef", "sd", "rsd", "r2", "rss", "F")
    lines = [
        "",
        "NIST StRD, minimum LRE (digits) of fit_model",
        f"{'dataset':<10}" + "".join(f"{c:>7}" for c in columns),
    ]
    for name, row in table.items():
        lines.append(f"{name:<10}" + "".join(f"{row[c]:7.2f}" for c in columns))
    print("\n".join(lines))
    assert list(table) == list(DATASETS) and len(DATASETS) == 11
