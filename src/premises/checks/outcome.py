"""Is a linear model for the mean of this outcome sensible at all?

A binary or categorical outcome is refused (an exception: the tool cannot do
its job with a linear model); counts with a small mean and outcomes piled up at
a bound are a finding with a caution.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from premises.checks.base import CheckContext
from premises.errors import ModelError
from premises.results import Finding, Statistic, ThresholdUse

__all__ = ["BOUND_SHARE", "SMALL_COUNT_MEAN", "assess_outcome", "describe_outcome"]

SMALL_COUNT_MEAN = 10.0
"""Counts with a mean below this are too skewed and discrete for a normal linear
model to describe well (common practice: the Poisson skewness 1/sqrt(mean) is
still above 0.3)."""

BOUND_SHARE = 0.10
"""Share of values sitting at the minimum or maximum that signals a floor or
ceiling effect (common practice in this tool)."""


def _raw_outcome(ctx: CheckContext) -> pd.Series | None:
    """The outcome's data column when the outcome is a plain column, else None."""
    design = ctx.fit.design
    if len(design.outcome_columns) == 1 and design.outcome.strip() == design.outcome_columns[0]:
        column = design.outcome_columns[0]
        if column in ctx.frame.columns:
            return ctx.frame[column]
    return None


def _refuse_non_numeric(ctx: CheckContext, raw: pd.Series | None) -> None:
    if raw is None:
        return
    if pd.api.types.is_bool_dtype(raw):
        _refuse_binary(ctx)
    if not pd.api.types.is_numeric_dtype(raw):
        distinct = raw.nunique(dropna=True)
        if distinct <= 2:
            _refuse_binary(ctx)
        ordered = isinstance(raw.dtype, pd.CategoricalDtype) and bool(raw.cat.ordered)
        kind = "ordinal" if ordered else "multinomial (or ordinal, if the categories are ordered)"
        raise ModelError(
            f"The outcome '{ctx.fit.design.outcome}' is categorical ({distinct} categories), "
            "so a linear regression of its mean does not apply.",
            ctx.spec.locate("model"),
            f"Use a {kind} regression model, or code the outcome as a number if its "
            "categories are equally spaced scores.",
        )


def _refuse_binary(ctx: CheckContext) -> None:
    raise ModelError(
        f"The outcome '{ctx.fit.design.outcome}' takes only two values, so a linear model "
        "would predict impossible values and its standard errors would be wrong.",
        ctx.spec.locate("model"),
        "Use logistic regression (or another binary-outcome model) for a two-valued outcome.",
    )


def describe_outcome(y: np.ndarray) -> dict[str, float | bool]:
    """Summary of the outcome's values: distinct count, integer counts, share at each bound.

    Examples
    --------
    >>> describe_outcome(np.array([0.0, 1.0, 1.0, 3.0]))["count_like"]
    True
    """
    y = np.asarray(y, dtype=float)
    distinct = int(np.unique(y).size)
    integer = bool(np.all(np.isfinite(y)) and np.all(y == np.round(y)))
    lowest, highest = float(np.min(y)), float(np.max(y))
    return {
        "distinct": float(distinct),
        "count_like": integer and lowest >= 0.0,
        "mean": float(np.mean(y)),
        "minimum": lowest,
        "maximum": highest,
        "share_at_minimum": float(np.mean(y == lowest)),
        "share_at_maximum": float(np.mean(y == highest)),
    }


def assess_outcome(ctx: CheckContext) -> Finding:
    """Check that the outcome suits a linear model for its mean.

    Raises :class:`ModelError` for a two-valued or categorical outcome (with the
    model to use instead). Non-negative integer counts with a small mean, and
    many values at the smallest or largest value (a floor or ceiling), give a
    ``concern`` with a caution; anything else ``holds``.
    """
    design = ctx.fit.design
    _refuse_non_numeric(ctx, _raw_outcome(ctx))
    facts = describe_outcome(design.y)
    distinct = int(facts["distinct"])
    if distinct <= 1:
        raise ModelError(
            f"The outcome '{design.outcome}' has the same value in every analysed row.",
            ctx.spec.locate("model"),
            "Check the data and the exclusion rules: nothing is left to explain.",
        )
    if distinct == 2:
        _refuse_binary(ctx)
    name = None  # the outcome has no figure of its own (has_figure=False)
    method = (
        f"The outcome ({design.outcome}) was inspected for binary, count and bounded values "
        "before a linear model for its mean was accepted."
    )
    small_count = bool(facts["count_like"]) and facts["mean"] < SMALL_COUNT_MEAN
    pile = max(facts["share_at_minimum"], facts["share_at_maximum"])
    at = "smallest" if facts["share_at_minimum"] >= facts["share_at_maximum"] else "largest"
    piled = distinct > 2 and pile >= BOUND_SHARE
    thresholds = (
        ThresholdUse("count mean", f"< {SMALL_COUNT_MEAN:g}", SMALL_COUNT_MEAN, "common practice"),
        ThresholdUse("share at a bound", f">= {BOUND_SHARE:g}", BOUND_SHARE, "common practice"),
    )
    statistics = (
        Statistic("distinct values", float(distinct), source="descriptive"),
        Statistic("outcome mean", facts["mean"], source="descriptive"),
        Statistic(f"share at the {at} value", pile, source="descriptive"),
    )
    extra: tuple[tuple[str, object], ...] = tuple(facts.items())
    notes: list[str] = []
    if small_count:
        notes.append(
            "A count with a small mean is skewed and its variance grows with its mean; "
            "a Poisson or negative binomial regression models it directly."
        )
    if piled:
        notes.append(
            f"{pile:.0%} of the outcomes sit at the {at} value ({facts['minimum' if at == 'smallest' else 'maximum']:g}): "
            "a floor or ceiling compresses effects near the bound, and a linear model can predict "
            "values beyond it (a tobit, beta or ordinal model respects the bound)."
        )
    if small_count or piled:
        what = (
            f"non-negative counts with mean {facts['mean']:.3g}"
            if small_count
            else f"{pile:.0%} of values at the {at} value"
        )
        return Finding(
            assumption="outcome",
            verdict="concern",
            measure=Statistic(
                "count mean" if small_count else f"share at the {at} value",
                facts["mean"] if small_count else pile,
                source="common practice",
            ),
            statistics=statistics,
            summary=f"The outcome has {what}, which a linear model describes only roughly.",
            consequence=(
                "Predictions can fall outside the possible range and the equal-variance and "
                "normality checks are likely to be strained."
            ),
            remedy=(
                "Consider a model for counts (Poisson, negative binomial)"
                if small_count
                else "Consider a model that respects the bound (tobit, beta, ordinal)"
            )
            + ", or report robust standard errors and interpret with care.",
            thresholds=thresholds,
            method=method,
            notes=tuple(notes),
            figure=name,
            extra=extra,
        )
    return Finding(
        assumption="outcome",
        verdict="holds",
        measure=Statistic("distinct values", float(distinct), source="descriptive"),
        statistics=statistics,
        summary=(
            f"The outcome takes {distinct} distinct values with no pile-up at a bound "
            f"(at most {pile:.0%} at one extreme)."
        ),
        consequence="A linear model for its mean is a reasonable starting point.",
        remedy="None needed.",
        thresholds=thresholds,
        method=method,
        figure=name,
        extra=extra,
    )
