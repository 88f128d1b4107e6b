"""Wilkinson formulas: checked against a whitelist, then turned into a design matrix.

A formula comes from a document, and patsy evaluates the Python inside a term.
So every term is parsed with ``ast`` and checked against a small vocabulary
(column names, numbers, arithmetic, and the functions in ``FORMULA_FUNCTIONS``)
before patsy sees it. Nothing else is ever evaluated.

Three layers keep it that way:

1. The formula is tokenized (Python's ``tokenize``; nothing is run) to count
   ``~``, bound the nesting and refuse ``lambda`` and stray characters. Column
   names that are Python keywords (``yield``, ``class``) are quoted as
   ``Q("yield")`` so that patsy can read them.
2. patsy's own formula parser splits it into terms; the code of every factor
   is parsed with ``ast`` and walked by a whitelist (:class:`~premises.formula.terms.TermReader`).
3. The checked ``ModelDesc`` itself (not the text again) goes to
   ``patsy.dmatrices``, in an environment whose namespace holds only the
   allowed functions and whose ``__builtins__`` is empty, so ``open`` or
   ``__import__`` cannot be reached even if a check were missed.

Modules: :mod:`premises.formula.terms` (the vocabulary and the whitelist walk),
:mod:`premises.formula.reading` (layers 1 and 2; no data needed) and
:mod:`premises.formula.design` (layer 3, with the checks on the rows).
"""

from __future__ import annotations

from premises.formula.design import Design, _sealed_environment, build_design  # noqa: F401 (tests use the environment)
from premises.formula.reading import check_formula, formula_columns, formula_transforms
from premises.formula.terms import (
    CONTRASTS,
    FORMULA_FUNCTIONS,
    MAX_FORMULA_DEPTH,
    MAX_FORMULA_LENGTH,
    TRANSFORM_FUNCTIONS,
    FormulaTransform,
)

__all__ = [
    "CONTRASTS",
    "FORMULA_FUNCTIONS",
    "MAX_FORMULA_DEPTH",
    "MAX_FORMULA_LENGTH",
    "TRANSFORM_FUNCTIONS",
    "Design",
    "FormulaTransform",
    "build_design",
    "check_formula",
    "formula_columns",
    "formula_transforms",
]
