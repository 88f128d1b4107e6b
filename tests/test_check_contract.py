"""The contract every registered check keeps (STYLE.md practice 13).

Runs over ``REGISTRY``, so a new check is covered without new tests: it accepts
the default thresholds, is deterministic, returns a Finding with one of the four
verdicts and JSON-able extra data, names its template, and a declared
``order``/``groups`` column that is missing raises DataError (a check that does
not use those columns must ignore them entirely).
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks import REGISTRY, CheckContext, run_checks
from premises.checks import registry as _registry  # noqa: F401  (fills REGISTRY)
from premises.errors import DataError
from premises.fit import compute_influence, fit_model
from premises.formula import build_design
from premises.results import VERDICTS, Finding, to_jsonable
from premises.spec import ASSUMPTIONS, BlockSpec, Thresholds


def make_context(frame: pd.DataFrame, formula: str, **keys: Any) -> CheckContext:
    """Fit ``formula`` on ``frame`` through premises.formula and premises.fit."""
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
        ids=np.array([f"r{i}" for i in range(1, n + 1)], dtype=object),
        rows=np.arange(1, n + 1),
        seed=spec.seed,
    )


def _frame(n: int = 120, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(
        {
            "x": rng.normal(size=n),
            "z": rng.uniform(0, 4, size=n),
            "site": rng.choice(["north", "south", "east"], size=n),
            "week": rng.permutation(n),
            "team": np.arange(n) % 12,
        }
    )
    frame["y"] = 2 + frame.x - 0.5 * frame.z + (frame.site == "east") + rng.normal(size=n)
    return frame


FORMULA = "y ~ x + z + C(site)"


@pytest.fixture(scope="module")
def context() -> CheckContext:
    return make_context(_frame(), FORMULA, order="week", groups="team")


NAMES = list(REGISTRY) or list(ASSUMPTIONS)


def test_registry_lists_every_assumption_in_reporting_order() -> None:
    assert tuple(REGISTRY) == ASSUMPTIONS


@pytest.mark.parametrize("name", NAMES)
def test_entry_is_described(name: str) -> None:
    entry = REGISTRY[name]
    assert entry.name == name
    assert entry.template == f"checks/{name}.md.j2"
    assert entry.title and entry.title[0].isupper()


@pytest.mark.parametrize("name", NAMES)
def test_check_returns_a_finding_with_a_known_verdict(name: str, context: CheckContext) -> None:
    assert context.spec.thresholds == Thresholds()  # the defaults
    finding = REGISTRY[name].function(context)
    assert isinstance(finding, Finding)
    assert finding.assumption == name
    assert finding.verdict in VERDICTS
    if finding.verdict == "not-assessed":
        assert finding.reason
    else:
        assert finding.summary and finding.method and finding.measure is not None
        assert all(t.origin for t in finding.thresholds)
    expected = f"fig-{context.spec.id}-{name}" if REGISTRY[name].has_figure else None
    assert finding.figure == expected


@pytest.mark.parametrize("name", NAMES)
def test_check_is_deterministic(name: str, context: CheckContext) -> None:
    first = REGISTRY[name].function(context)
    second = REGISTRY[name].function(context)
    assert json.dumps(to_jsonable(first)) == json.dumps(to_jsonable(second))


@pytest.mark.parametrize("name", NAMES)
def test_finding_serialises_to_strict_json(name: str, context: CheckContext) -> None:
    finding = REGISTRY[name].function(context)
    text = json.dumps(to_jsonable(finding), allow_nan=False)
    assert json.loads(text)["assumption"] == name
    for key, value in finding.extra:
        assert isinstance(key, str)
        json.dumps(to_jsonable(value), allow_nan=False)


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("key", ["order", "groups"])
def test_missing_declared_column_is_a_data_error_or_ignored(name: str, key: str) -> None:
    frame = _frame()
    without = make_context(frame, FORMULA)
    missing = replace(without, spec=replace(without.spec, **{key: "not_a_column"}))
    try:
        finding = REGISTRY[name].function(missing)
    except DataError as exc:
        assert "not_a_column" in str(exc) and exc.hint
        return
    # A check that does not use the column must not be affected by it at all.
    assert to_jsonable(finding) == to_jsonable(REGISTRY[name].function(without))


def test_independence_needs_its_declared_columns() -> None:
    frame = _frame().drop(columns=["week"])
    ctx = make_context(frame, FORMULA, order="week")
    with pytest.raises(DataError, match="week"):
        REGISTRY["independence"].function(ctx)


def test_run_checks_keeps_registry_order_and_skips_unlisted(context: CheckContext) -> None:
    findings = run_checks(context, ("collinearity", "linearity"))
    assert [f.assumption for f in findings] == ["linearity", "collinearity"]


def test_measures_are_finite_numbers_or_explicitly_missing(context: CheckContext) -> None:
    for finding in run_checks(context, ASSUMPTIONS):
        if finding.measure is not None and finding.measure.value is not None:
            assert math.isfinite(finding.measure.value), finding.assumption
