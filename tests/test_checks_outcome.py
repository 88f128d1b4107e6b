"""Outcome check: binary and categorical outcomes are refused with advice; counts and bounds cautioned."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks import CheckContext
from premises.checks.outcome import assess_outcome, describe_outcome
from premises.errors import ModelError
from premises.fit import compute_influence, fit_model
from premises.formula import Design, build_design
from premises.spec import BlockSpec


def make_context(
    frame: pd.DataFrame, formula: str, design: Design | None = None, **keys: Any
) -> CheckContext:
    frame = frame.reset_index(drop=True)
    design = design or build_design(formula, frame)
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


def _frame(y: Any, n: int = 80, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"x": rng.normal(size=n), "y": y})


def test_a_continuous_outcome_holds() -> None:
    rng = np.random.default_rng(1)
    finding = assess_outcome(make_context(_frame(rng.normal(size=80)), "y ~ x"))
    assert finding.verdict == "holds"
    assert finding.figure is None  # the outcome check draws no figure of its own


def test_a_binary_outcome_is_refused_with_logistic_advice() -> None:
    rng = np.random.default_rng(2)
    ctx = make_context(_frame(rng.integers(0, 2, size=80).astype(float)), "y ~ x")
    with pytest.raises(ModelError, match="two values") as caught:
        assess_outcome(ctx)
    assert caught.value.hint is not None and "logistic regression" in caught.value.hint


def test_a_categorical_outcome_is_refused_with_multinomial_advice() -> None:
    rng = np.random.default_rng(3)
    frame = _frame(rng.choice(["low", "mid", "high"], size=80))
    codes = pd.Categorical(frame.y).codes.astype(float)
    # The formula layer may refuse text outcomes itself; build the design by hand to reach the check.
    design = Design(
        "y ~ x",
        "y",
        ("y",),
        ("x",),
        codes,
        np.column_stack([np.ones(80), frame.x]),
        ("Intercept", "x"),
        (("Intercept", 0, 1), ("x", 1, 2)),
        (("Intercept", ()), ("x", ("x",))),
        True,
    )
    with pytest.raises(ModelError, match="categorical") as caught:
        assess_outcome(make_context(frame, "y ~ x", design=design))
    assert caught.value.hint is not None and "multinomial" in caught.value.hint


def test_small_counts_are_a_concern_with_poisson_advice() -> None:
    rng = np.random.default_rng(4)
    finding = assess_outcome(make_context(_frame(rng.poisson(2.0, size=80).astype(float)), "y ~ x"))
    assert finding.verdict == "concern"
    assert any("Poisson" in note for note in finding.notes)
    assert "count" in finding.measure.name  # type: ignore[union-attr]


def test_many_values_at_a_bound_are_a_concern() -> None:
    rng = np.random.default_rng(5)
    y = np.clip(rng.normal(60, 25, size=80), 0, 100).round(1)
    y[:15] = 100.0  # a ceiling
    finding = assess_outcome(make_context(_frame(y), "y ~ x"))
    assert finding.verdict == "concern"
    assert any("ceiling" in note for note in finding.notes)


def test_describe_outcome_counts_values_at_each_bound() -> None:
    facts = describe_outcome(np.array([0.0, 0.0, 1.0, 2.0, 7.0]))
    assert facts["count_like"] is True
    assert facts["share_at_minimum"] == pytest.approx(0.4)
    assert facts["share_at_maximum"] == pytest.approx(0.2)
    assert facts["distinct"] == 4
