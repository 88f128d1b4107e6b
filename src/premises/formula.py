"""Wilkinson formulas: checked against a whitelist, then turned into a design matrix.

A formula comes from a document, and patsy evaluates the Python inside a term.
So every term is parsed with ``ast`` and checked against a small vocabulary
(column names, numbers, arithmetic, and the functions in ``FORMULA_FUNCTIONS``)
before patsy sees it. Nothing else is ever evaluated.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Design", "FormulaTransform", "build_design", "check_formula"]


@dataclass(frozen=True, slots=True)
class FormulaTransform:
    """A transform written inside the formula, e.g. ``log2(water)``."""

    expression: str
    """As written: ``log2(water)``."""
    function: str
    """``log2``."""
    column: str
    """``water``."""


@dataclass(frozen=True)
class Design:
    """The numeric model: outcome, design matrix and how columns map to terms."""

    formula: str
    outcome: str
    """Outcome expression as written (left of ``~``)."""
    outcome_columns: tuple[str, ...]
    """Data columns the outcome uses."""
    predictor_columns: tuple[str, ...]
    """Data columns the right-hand side uses."""
    y: np.ndarray
    """(n,) outcome."""
    X: np.ndarray
    """(n, p) design matrix."""
    column_names: tuple[str, ...]
    """Names of the p design columns (patsy's, e.g. ``C(site)[T.b]``)."""
    term_slices: tuple[tuple[str, int, int], ...]
    """(term name, start, stop) for each model term; a factor spans several columns."""
    term_columns: tuple[tuple[str, tuple[str, ...]], ...]
    """(term name, data columns it uses) for each model term."""
    has_intercept: bool
    transforms: tuple[FormulaTransform, ...] = ()

    @property
    def n(self) -> int:
        return int(self.X.shape[0])

    @property
    def p(self) -> int:
        return int(self.X.shape[1])


FORMULA_FUNCTIONS: tuple[str, ...] = (
    "C", "I", "Q", "center", "standardize", "scale",
    "log", "log2", "log10", "log1p", "sqrt", "exp", "abs",
)
"""Functions a formula may call; everything else is refused before evaluation."""


def check_formula(formula: str, columns: tuple[str, ...] | None = None) -> tuple[str, ...]:
    """Validate ``formula``; return the data columns it uses.

    Raises :class:`premises.errors.SpecError` (no location; the caller adds it)
    for syntax errors or anything outside the vocabulary, and
    :class:`premises.errors.DataError` for a column not in ``columns``.
    """
    raise NotImplementedError


def build_design(formula: str, frame: "object") -> Design:
    """Evaluate a checked formula on ``frame`` (a pandas DataFrame without missing values)."""
    raise NotImplementedError
