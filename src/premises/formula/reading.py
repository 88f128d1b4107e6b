"""Reading a formula: its tokens, patsy's terms, and the whitelist check of every term.

1. The formula is tokenized (Python's ``tokenize``; nothing is run) to count
   ``~``, bound the nesting and refuse ``lambda`` and stray characters. Column
   names that are Python keywords (``yield``, ``class``) are quoted as
   ``Q("yield")`` so that patsy can read them.
2. patsy's own formula parser splits it into terms; the code of every factor
   is checked by :class:`premises.formula.terms.TermReader`.

The result, :class:`Reading`, holds patsy's model description, which
:func:`premises.formula.design.build_design` evaluates (not the text again).
"""

from __future__ import annotations

import ast
import io
import tokenize
from dataclasses import dataclass
from typing import Any, NoReturn

from premises.errors import DataError, Location, SpecError
from premises.formula.terms import (
    MAX_FORMULA_DEPTH,
    MAX_FORMULA_LENGTH,
    QUOTABLE_KEYWORDS,
    VOCABULARY_HINT,
    FormulaTransform,
    TermReader,
    shorten,
    suggest_column,
)


@dataclass(frozen=True)
class Reading:
    """A formula after all checks: patsy's model description and what each term reads."""

    formula: str
    outcome: str
    description: Any
    """patsy.ModelDesc, built from the (keyword-quoted) formula."""
    factor_columns: tuple[tuple[str, tuple[str, ...]], ...]
    """(factor code, data columns it reads)."""
    outcome_columns: tuple[str, ...]
    predictor_columns: tuple[str, ...]
    outcome_column: str | None
    """The outcome's column when the outcome is a bare column."""
    transforms: tuple[FormulaTransform, ...]


def _prepare_text(formula: str, location: Location | None) -> tuple[str, str]:
    """Checks on the raw tokens; returns (text for patsy, outcome as written)."""

    def fail(problem: str, hint: str) -> NoReturn:
        raise SpecError(f"The model formula `{shorten(formula)}` {problem}", location, hint)

    text = " ".join(formula.split())  # YAML may fold a long formula over lines
    try:
        tokens = list(tokenize.generate_tokens(io.StringIO(text).readline))
    except (tokenize.TokenError, SyntaxError) as exc:
        raise SpecError(
            f"The model formula `{shorten(formula)}` has an unclosed quote or bracket.",
            location,
            "Close every quote and bracket.",
        ) from exc
    depth, tildes, pieces, last = 0, [], [], 0
    for token in tokens:
        if token.type == tokenize.ERRORTOKEN and not token.string.isspace():
            if token.string in "'\"":
                fail("has a quote without its closing quote.", "Close every quote.")
            hint = (
                "Write Q('odd name') for a column with spaces or symbols."
                if token.string == "`"
                else "Check the formula for a stray character."
            )
            fail(f"has the character {token.string!r}, which formulas do not use.", hint)
        if token.type == tokenize.OP:
            depth += token.string in "([{"
            depth -= token.string in ")]}"
            if depth > MAX_FORMULA_DEPTH:
                fail(f"is nested deeper than {MAX_FORMULA_DEPTH} levels.", "Simplify the formula.")
            if token.string == "~":
                tildes.append(token.start[1])
        if token.type == tokenize.NAME and token.string == "lambda":
            fail("uses a lambda, which formulas do not allow.", VOCABULARY_HINT)
        if token.type == tokenize.NAME and token.string in QUOTABLE_KEYWORDS:
            pieces += [text[last : token.start[1]], f'Q("{token.string}")']
            last = token.end[1]
    if len(tildes) != 1:
        fail(
            "needs exactly one `~` between the outcome and the predictors"
            + (f"; it has {len(tildes)}." if tildes else "."),
            "Write it as `outcome ~ term + term`, e.g. `yield ~ log2(water) + ph + C(district)`.",
        )
    return "".join(pieces) + text[last:], text[: tildes[0]].strip()


def read_formula(
    formula: str, columns: tuple[str, ...] | None, location: Location | None
) -> Reading:
    """Every check of :func:`check_formula`; the result feeds :func:`build_design`."""
    import patsy

    if not isinstance(formula, str):
        raise SpecError(
            f"The model formula must be text; got {type(formula).__name__}.",
            location,
            "Write it as `outcome ~ term + term`.",
        )
    if len(formula) > MAX_FORMULA_LENGTH:
        raise SpecError(
            f"The model formula `{shorten(formula)}` is {len(formula)} characters long, "
            f"more than the {MAX_FORMULA_LENGTH} allowed.",
            location,
            "Shorten the formula.",
        )
    text, outcome = _prepare_text(formula, location)
    try:
        description = patsy.ModelDesc.from_formula(text)
    except patsy.PatsyError as exc:
        raise SpecError(
            f"The model formula `{shorten(formula)}` cannot be read: {str(exc).splitlines()[0].rstrip('.')}.",
            location,
            "Write it as `outcome ~ term + term`, e.g. `yield ~ log2(water) + ph + C(district)`.",
        ) from exc
    except (AssertionError, SyntaxError, ValueError, tokenize.TokenError) as exc:
        # patsy's tokenizer asserts on some symbol runs ("~&") instead of raising PatsyError.
        raise SpecError(
            f"The model formula `{shorten(formula)}` cannot be read: it has symbols in an order "
            "formulas do not use.",
            location,
            "Write it as `outcome ~ term + term`, e.g. `yield ~ log2(water) + ph + C(district)`.",
        ) from exc
    except (RecursionError, MemoryError) as exc:
        raise SpecError(
            f"The model formula `{shorten(formula)}` is nested too deeply to read.",
            location,
            "Simplify the formula.",
        ) from exc
    lhs, rhs = description.lhs_termlist, description.rhs_termlist
    if len(lhs) != 1 or len(lhs[0].factors) != 1:
        raise SpecError(
            f"The model formula `{shorten(formula)}` must have one outcome left of `~`; "
            f"it has `{outcome or 'nothing'}`.",
            location,
            "Write a single column or an expression of one column, e.g. `log(y) ~ x`.",
        )
    if not rhs:
        raise SpecError(
            f"The model formula `{shorten(formula)}` has no terms and no intercept.",
            location,
            "Add a predictor, or write `y ~ 1` for an intercept-only model.",
        )
    readers: dict[str, TermReader] = {}
    for term in [*lhs, *rhs]:
        for factor in term.factors:
            if factor.code not in readers:
                readers[factor.code] = TermReader(formula, factor.code, columns, location)
                readers[factor.code].read()
    outcome_reader = readers[lhs[0].factors[0].code]
    outcome_columns = tuple(outcome_reader.names)
    predictor_columns = tuple(
        dict.fromkeys(
            name for term in rhs for factor in term.factors for name in readers[factor.code].names
        )
    )
    if columns is not None:
        for name in (*outcome_columns, *predictor_columns):
            if name not in columns:
                raise DataError(
                    f"The model formula `{shorten(formula)}` uses column '{name}', "
                    "which the data do not have.",
                    location,
                    suggest_column(name, columns),
                )
    transforms = tuple(dict.fromkeys(t for reader in readers.values() for t in reader.transforms))
    single = outcome_reader.column_of(ast.parse(outcome_reader.code, mode="eval").body)
    return Reading(
        formula=formula,
        outcome=outcome,
        description=description,
        factor_columns=tuple((code, tuple(reader.names)) for code, reader in readers.items()),
        outcome_columns=outcome_columns,
        predictor_columns=predictor_columns,
        outcome_column=single,
        transforms=transforms,
    )


def check_formula(
    formula: str, columns: tuple[str, ...] | None = None, *, location: Location | None = None
) -> tuple[str, ...]:
    """Validate ``formula``; return the data columns it uses.

    Raises :class:`premises.errors.SpecError` (no location; the caller adds it)
    for syntax errors or anything outside the vocabulary, and
    :class:`premises.errors.DataError` for a column not in ``columns``.

    Parameters
    ----------
    formula
        A Wilkinson formula, e.g. ``"yield ~ log2(water) + ph + C(district)"``.
    columns
        Column names of the data; None skips the check that each column exists.
    location
        Where the formula sits; carried by any error.

    Returns
    -------
    tuple of str
        Outcome columns first, then the predictors' columns, each once.

    Examples
    --------
    >>> check_formula("yield ~ log2(water) + ph + C(district)")
    ('yield', 'water', 'ph', 'district')
    """
    reading = read_formula(formula, columns, location)
    return tuple(dict.fromkeys((*reading.outcome_columns, *reading.predictor_columns)))


def formula_columns(formula: str, *, location: Location | None = None) -> tuple[str, ...]:
    """The data columns ``formula`` uses, checked but without needing the data.

    Examples
    --------
    >>> formula_columns("y ~ x1 * x2 + Q('odd name')")
    ('y', 'x1', 'x2', 'odd name')
    """
    return check_formula(formula, None, location=location)


def formula_transforms(
    formula: str, *, location: Location | None = None
) -> tuple[FormulaTransform, ...]:
    """Transforms written inside ``formula`` (``log2(water)``), checked, without the data.

    The ledger records them before the design is built.

    Examples
    --------
    >>> [t.expression for t in formula_transforms("y ~ log2(water) + ph")]
    ['log2(water)']
    """
    return read_formula(formula, None, location).transforms
