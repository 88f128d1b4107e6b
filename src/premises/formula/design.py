"""Building the design matrix: the checked formula evaluated by patsy in a sealed environment.

The checked ``ModelDesc`` (not the formula text) goes to ``patsy.dmatrices``,
in an environment whose namespace holds only the allowed functions and whose
``__builtins__`` is empty, so ``open`` or ``__import__`` cannot be reached even
if a check were missed. Rows are checked first (complete, numeric outcome,
transforms defined), and every design value after.
"""

from __future__ import annotations

import keyword
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from premises.errors import DataError, Location
from premises.formula.reading import Reading, read_formula
from premises.formula.terms import FormulaTransform, shorten

if TYPE_CHECKING:
    import pandas as pd
    import patsy


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


# Where a transform is undefined: log of zero or less, sqrt of a negative number.
_UNDEFINED = {
    "log": ("<=", 0),
    "log2": ("<=", 0),
    "log10": ("<=", 0),
    "log1p": ("<=", -1),
    "sqrt": ("<", 0),
}


def _sealed_environment() -> patsy.EvalEnvironment:
    """patsy's evaluation environment, holding only the allowed functions.

    patsy evaluates a factor with ``eval(code, {}, namespaces)``; Python fills
    the empty globals with the real builtins, so ``open`` or ``__import__``
    would be reachable. This environment evaluates with an empty
    ``__builtins__`` instead, and keeps doing so through patsy's ``subset``.
    """
    import patsy
    from patsy.builtins import C, Diff, Helmert, I, Poly, Q, Sum, Treatment
    from patsy.eval import VarLookupDict
    from patsy.state import center, scale, standardize

    class SealedEnvironment(patsy.EvalEnvironment):  # type: ignore[misc]
        def eval(
            self, expr: str, source_name: str = "<string>", inner_namespace: Any = None
        ) -> Any:
            code = compile(expr, source_name, "eval", self.flags, False)
            lookup = VarLookupDict([inner_namespace or {}, *self._namespaces])
            return eval(
                code, {"__builtins__": {}}, lookup
            )  # only whitelisted factor code gets here

        def subset(self, names: list[str]) -> SealedEnvironment:
            lookup = VarLookupDict(self._namespaces)
            return SealedEnvironment([{name: lookup[name] for name in names}], self.flags)

    namespace: dict[str, object] = {
        "log": np.log,
        "log2": np.log2,
        "log10": np.log10,
        "log1p": np.log1p,
        "sqrt": np.sqrt,
        "exp": np.exp,
        "abs": np.abs,
        "center": center,
        "standardize": standardize,
        "scale": scale,
        "C": C,
        "I": I,
        "Q": Q,
        "Treatment": Treatment,
        "Sum": Sum,
        "Helmert": Helmert,
        "Poly": Poly,
        "Diff": Diff,
    }
    return SealedEnvironment([namespace])


def _check_rows(reading: Reading, frame: pd.DataFrame, location: Location | None) -> None:
    """Complete rows, a numeric outcome, and transforms defined on every row."""
    import pandas as pd

    shown = shorten(reading.formula)
    for name in dict.fromkeys((*reading.outcome_columns, *reading.predictor_columns)):
        if isinstance(frame[name], pd.DataFrame):
            raise DataError(
                f"Column '{name}' appears more than once in the data.",
                location,
                "Give every column in the data file a distinct name.",
            )
        missing = int(frame[name].isna().sum())
        if missing:
            raise DataError(
                f"Column '{name}' has {missing} missing values, but the model "
                f"`{shown}` needs complete rows.",
                location,
                "Drop rows with missing values first (missing: drop).",
            )
    if reading.outcome_column is not None:
        outcome = frame[reading.outcome_column]
        if pd.api.types.is_bool_dtype(outcome.dtype) or not pd.api.types.is_numeric_dtype(
            outcome.dtype
        ):
            raise DataError(
                _not_numeric(reading.outcome_column, _kind_words(outcome.dtype)),
                location,
                _NOT_NUMERIC_HINT,
            )
    for transform in reading.transforms:
        if transform.function not in _UNDEFINED:
            continue
        values = frame[transform.column]
        if not pd.api.types.is_numeric_dtype(values.dtype) or pd.api.types.is_bool_dtype(
            values.dtype
        ):
            raise DataError(
                f"The term '{transform.expression}' in `{shown}` needs numbers, but column "
                f"'{transform.column}' holds {_kind_words(values.dtype)}.",
                location,
                "Use a numeric column, or C() for labels.",
            )
        op, bound = _UNDEFINED[transform.function]
        bad = int(((values <= bound) if op == "<=" else (values < bound)).sum())
        if bad:
            rule = f"{_rule_name(transform.column)} {op} {bound}"
            raise DataError(
                f"The term '{transform.expression}' in `{shown}` is undefined for {bad} "
                f"row{'s' if bad != 1 else ''} where {transform.column} {op} {bound}.",
                location,
                f'Exclude those rows with a reason (exclude: [{{when: "{rule}", reason: ...}}]) '
                f"or use another transform (e.g. log1p or sqrt).",
            )


_NOT_NUMERIC_HINT = (
    "A linear model needs a numeric outcome; a model for that outcome type, "
    "e.g. logistic regression, is needed. If the values are numbers stored as "
    "text, clean the column in the data."
)


def _not_numeric(column: str, kind: str) -> str:
    return f"The outcome '{column}' is not numeric (it holds {kind})."


def _kind_words(dtype: object) -> str:
    """What a column holds, in words, for messages."""
    import pandas as pd

    if pd.api.types.is_bool_dtype(dtype):
        return "true/false values"
    if isinstance(dtype, pd.CategoricalDtype):
        return "categories"
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return "dates"
    return (
        "text"
        if pd.api.types.is_object_dtype(dtype) or pd.api.types.is_string_dtype(dtype)
        else f"{dtype} values"
    )


def _rule_name(column: str) -> str:
    """A column as the rule language writes it."""
    return column if column.isidentifier() and not keyword.iskeyword(column) else f"`{column}`"


def _check_finite(name: str, values: np.ndarray, formula: str, location: Location | None) -> None:
    """Every design value defined: log(0), log of a negative number or exp overflow are errors."""
    rows = ~np.isfinite(values if values.ndim == 2 else values[:, None]).all(axis=1)
    bad = int(rows.sum())
    if bad:
        raise DataError(
            f"The term '{name}' in `{shorten(formula)}` gives an undefined or infinite value in "
            f"{bad} row{'s' if bad != 1 else ''} (such as the log of zero or of a negative number, "
            "or an overflow).",
            location,
            "Exclude those rows with a reason (exclude: [{when: ..., reason: ...}]) "
            "or use another transform (e.g. log1p or sqrt).",
        )


def _plain_columns(builders: Any, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray] | None:
    """(y, X) without patsy's matrix builder when every term is a bare numeric column or the intercept.

    patsy's design infos (built from the data by ``design_matrix_builders``)
    fix the columns, their order and names; for ``y ~ x1 + x2 + ...`` the
    matrix is then the intercept and the columns stacked, the same numbers in
    the same (row-major) layout. patsy fills it column by column in Python,
    about 1 s at 10^6 rows and 10 columns against 0.25 s here. None for any
    other term (a function, an interaction, a factor): patsy builds those.
    """
    outcome_info, design_info = builders
    columns: list[str | None] = []
    for info, allowed_intercept in ((outcome_info, False), (design_info, True)):
        for term in info.terms:
            if not term.factors and allowed_intercept:
                columns.append(None)
                continue
            if len(term.factors) != 1:
                return None
            factor = term.factors[0]
            found = info.factor_infos[factor]
            if found.type != "numerical" or found.num_columns != 1 or factor.code not in frame.columns:
                return None
            columns.append(factor.code)
    if len(outcome_info.terms) != 1 or len(columns) != 1 + len(design_info.column_names):
        return None
    y = frame[columns[0]].to_numpy(dtype=np.float64, copy=True)
    stacked = [np.ones(len(frame)) if c is None else frame[c].to_numpy(dtype=np.float64) for c in columns[1:]]
    return y, np.column_stack(stacked) if stacked else np.empty((len(frame), 0))


def build_design(formula: str, frame: pd.DataFrame, *, location: Location | None = None) -> Design:
    """Evaluate a checked formula on ``frame`` (a pandas DataFrame without missing values).

    Parameters
    ----------
    formula
        The model formula; it is checked again here, against ``frame``'s columns.
    frame
        The analysed rows.
    location
        Where the formula sits; carried by any error.

    Returns
    -------
    Design
        Outcome, design matrix, column names, the slice of columns of each term
        and the data columns each term reads.

    Raises
    ------
    SpecError
        The formula is malformed or outside the vocabulary.
    DataError
        A column is unknown or incomplete, the outcome is not numeric, a
        transform is undefined on some rows, or patsy cannot evaluate a term.

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"y": [1.0, 2.0, 4.0], "x": [1.0, 2.0, 3.0]})
    >>> build_design("y ~ log(x)", frame).column_names
    ('Intercept', 'log(x)')
    """
    import pandas as pd
    import patsy

    if not isinstance(frame, pd.DataFrame):
        raise TypeError(f"build_design needs a pandas DataFrame, got {type(frame).__name__}")
    reading = read_formula(formula, tuple(str(c) for c in frame.columns), location)
    _check_rows(reading, frame, location)
    try:
        with np.errstate(all="ignore"):  # undefined values are reported per term below
            environment = _sealed_environment()
            description = reading.description
            builders = patsy.design_matrix_builders(
                [description.lhs_termlist, description.rhs_termlist],
                lambda: iter([frame]),
                environment,
                NA_action=patsy.NAAction(NA_types=[]),
            )
            plain = _plain_columns(builders, frame)
            if plain is None:
                y_frame, x_frame = patsy.dmatrices(
                    description,
                    frame,
                    eval_env=environment,
                    NA_action=patsy.NAAction(NA_types=[]),
                    # Plain matrices: a DataFrame wrapper and its to_numpy() cost two more
                    # copies of the design (0.6 s and 160 MB at 10^6 x 10).
                    return_type="matrix",
                )
    except patsy.PatsyError as exc:
        raise DataError(
            f"The model formula `{shorten(formula)}` cannot be evaluated on the data: "
            f"{str(exc).splitlines()[0]}",
            location,
            "Check that each column holds what its term needs: numbers for arithmetic "
            "and logs, labels for C().",
        ) from exc
    if plain is not None:
        y, X = plain
        info = builders[1]
    else:
        if y_frame.shape[1] != 1:
            raise DataError(_not_numeric(reading.outcome, "categories"), location, _NOT_NUMERIC_HINT)
        y = np.array(np.asarray(y_frame)[:, 0], dtype=np.float64)
        X = np.asarray(x_frame, dtype=np.float64).view(np.ndarray)
        info = x_frame.design_info
    term_slices = tuple((name, s.start, s.stop) for name, s in info.term_name_slices.items())
    _check_finite(reading.outcome, y, formula, location)
    for name, start, stop in term_slices:
        _check_finite(name, X[:, start:stop], formula, location)
    factor_columns = dict(reading.factor_columns)
    term_columns = tuple(
        (term.name(), tuple(dict.fromkeys(c for f in term.factors for c in factor_columns[f.code])))
        for term in info.terms
    )
    return Design(
        formula=formula,
        outcome=reading.outcome,
        outcome_columns=reading.outcome_columns,
        predictor_columns=reading.predictor_columns,
        y=y,
        X=X,
        column_names=tuple(str(c) for c in info.column_names),
        term_slices=term_slices,
        term_columns=term_columns,
        has_intercept=any(not term.factors for term in info.terms),
        transforms=reading.transforms,
    )
