"""The data ledger: every step from rows read to rows analysed, applied and recorded.

Order, and why:

1. **Exclusions**, in the order declared, on the data *as read* — a rule about a
   data-entry error should see the value that was entered, not its logarithm.
2. **Missing values** in any column the model needs (formula, weights, groups,
   order): dropped and counted per column, or an error under ``missing: error``.
3. **Transforms** from the ``transforms`` key, computed on the rows that remain
   (a z-score or winsorizing limits depend on which rows are analysed), then the
   transforms written inside the formula, recorded with the reason a matching
   ``transforms`` entry gives.
"""

from __future__ import annotations

from dataclasses import dataclass
from difflib import get_close_matches
from itertools import compress
from typing import TYPE_CHECKING

import numpy as np

from premises.errors import DataError, DriftError
from premises.results import LedgerStep
from premises.rules import evaluate_rule, parse_rule
from premises.spec import BlockSpec, ExclusionSpec, TransformSpec

if TYPE_CHECKING:
    import pandas as pd

    from premises.formula import FormulaTransform

__all__ = ["TRANSFORMS", "LedgerOutcome", "apply_ledger", "check_columns"]


@dataclass(frozen=True)
class LedgerOutcome:
    """The analysed rows and the record of how they were reached."""

    frame: pd.DataFrame
    """Analysed rows, transformed columns included, in file order."""
    ids: tuple[str, ...]
    """Id of each analysed row."""
    rows: np.ndarray
    """1-based file row number of each analysed row."""
    steps: tuple[LedgerStep, ...]
    matched_ids: tuple[tuple[str, tuple[str, ...]], ...]
    """(exclusion key path, ids the rule matched) for drift guards."""


def _log(x: np.ndarray) -> np.ndarray:
    return np.asarray(np.log(x), dtype=float)


def _log2(x: np.ndarray) -> np.ndarray:
    return np.asarray(np.log2(x), dtype=float)


def _log10(x: np.ndarray) -> np.ndarray:
    return np.asarray(np.log10(x), dtype=float)


def _sqrt(x: np.ndarray) -> np.ndarray:
    return np.asarray(np.sqrt(x), dtype=float)


def _rank(x: np.ndarray) -> np.ndarray:
    from scipy.stats import rankdata

    return np.asarray(rankdata(x, method="average"), dtype=float)


def _zscore(x: np.ndarray) -> np.ndarray:
    sd = float(np.std(x, ddof=1)) if len(x) > 1 else 0.0
    if sd == 0.0:
        raise ValueError("the column is constant, so it has no z-score")
    return (x - float(np.mean(x))) / sd


TRANSFORMS: dict[str, tuple[str, str]] = {
    # op: (domain check, how the ledger writes it)
    "log": ("positive", "log({c})"),
    "log2": ("positive", "log2({c})"),
    "log10": ("positive", "log10({c})"),
    "sqrt": ("non-negative", "sqrt({c})"),
    "rank": ("any", "rank({c})"),
    "zscore": ("any", "zscore({c})"),
    "winsorize": ("any", "winsorize({c}, {lo}, {hi})"),
}
"""Transform ops: the domain they need and how the ledger writes them."""

_FUNCTIONS = {"log": _log, "log2": _log2, "log10": _log10, "sqrt": _sqrt, "rank": _rank, "zscore": _zscore}


def check_columns(spec: BlockSpec, frame: pd.DataFrame, needed: tuple[str, ...]) -> None:
    """Every column the block names must exist; list the ones that do when not."""
    named: list[tuple[str, str]] = [(c, "model") for c in needed]
    for key in ("id_column", "groups", "order", "weights"):
        value = getattr(spec, key)
        if value is not None:
            named.append((value, key))
    created = {t.target for t in spec.transforms}
    for i, t in enumerate(spec.transforms):
        named.append((t.column, t.key or f"transforms[{i}].column"))
    for column, key in named:
        if column in frame.columns or (key == "model" and column in created):
            continue
        close = get_close_matches(column, list(map(str, frame.columns)), n=1)
        hint = (f"Did you mean '{close[0]}'? " if close else "") + "Columns in the data: " + ", ".join(
            map(str, list(frame.columns)[:30])
        ) + ("…" if len(frame.columns) > 30 else "") + "."
        raise DataError(f"the column '{column}' is not in the data.", spec.locate(key), hint=hint)


def _exclusion_mask(spec: BlockSpec, rule: ExclusionSpec, frame: pd.DataFrame, ids: list[str]) -> np.ndarray:
    where = spec.locate(rule.key + (".when" if rule.when is not None else ".ids"))
    if rule.when is not None:
        parsed = parse_rule(rule.when, location=where)
        try:
            return np.asarray(evaluate_rule(parsed, frame), dtype=bool)
        except DataError as exc:
            raise DataError(exc.problem, where, hint=exc.hint) from exc
    wanted = set(rule.ids or ())
    known = set(ids)
    unknown = sorted(wanted - known)
    if unknown:
        source = f"'{spec.id_column}' values" if spec.id_column else "row numbers (no id_column is set)"
        raise DataError(
            f"the ids {', '.join(unknown[:5])} are not among the {source}.",
            where,
            hint="Check the ids against the data, or set id_column.",
        )
    return np.fromiter((i in wanted for i in ids), dtype=bool, count=len(ids))


def _apply_exclusions(
    spec: BlockSpec, frame: pd.DataFrame, ids: list[str]
) -> tuple[pd.DataFrame, list[str], list[LedgerStep], list[tuple[str, tuple[str, ...]]]]:
    steps: list[LedgerStep] = []
    matched_all: list[tuple[str, tuple[str, ...]]] = []
    for rule in spec.exclude:
        mask = _exclusion_mask(spec, rule, frame, ids)
        matched = int(mask.sum())
        if rule.expect is not None and matched != rule.expect:
            raise DriftError(
                f"the rule '{rule.rule_text}' matched {matched} rows, but expect: {rule.expect}.",
                spec.locate(rule.key + ".expect"),
                hint="Look at the rows it now matches; update 'expect' only if the change is intended.",
            )
        if matched and matched == len(frame):
            raise DataError(
                f"the rule '{rule.rule_text}' at {rule.key} matches all {matched} remaining rows, "
                "so no rows are left to analyse.",
                spec.locate(rule.key + (".when" if rule.when is not None else ".ids")),
                hint="Check the rule's direction (> or <) and the column's units against the data.",
            )
        removed = tuple(compress(ids, mask))
        matched_all.append((rule.key, removed))
        before = len(frame)
        frame = frame.loc[~mask]
        ids = list(compress(ids, ~mask))
        steps.append(
            LedgerStep(
                kind="exclude",
                rule=rule.rule_text,
                reason=rule.reason,
                rows_before=before,
                rows_after=len(frame),
                removed_ids=removed,
                matched=matched,
                prespecified=rule.prespecified,
                registration=rule.registration,
                category=rule.category,
            )
        )
    return frame, ids, steps, matched_all


def _check_numeric_text(spec: BlockSpec, frame: pd.DataFrame, columns: tuple[str, ...], ids: list[str]) -> None:
    """A numeric column holding a few text entries would silently become a factor."""
    import pandas as pd

    for column in columns:
        series = frame[column]
        if series.dtype != object and not pd.api.types.is_string_dtype(series):
            continue
        present = series.dropna()
        if present.empty:
            continue
        numbers = pd.to_numeric(present, errors="coerce")
        share = float(numbers.notna().mean())
        if share >= 0.8 and share < 1.0:
            bad = present[numbers.isna()]
            where_ids = [ids[frame.index.get_loc(i)] for i in bad.index[:5]]
            example = str(bad.iloc[0])
            rule = f" such as `{column} in [{example!r}]`" if len(example) <= _QUOTE_LIMIT else ""
            raise DataError(
                f"the column '{column}' holds numbers and {len(bad)} text entries "
                f"(e.g. {_quote(example)} in row {where_ids[0]}).",
                spec.locate("model"),
                hint=f"Fix or blank those entries, or exclude them with a rule{rule} and a reason.",
            )


_QUOTE_LIMIT = 40
"""Longest data value quoted whole in a message; longer ones are cut (a message stays one line)."""


def _quote(text: str) -> str:
    if len(text) <= _QUOTE_LIMIT:
        return repr(text)
    return f"'{text[:_QUOTE_LIMIT]}...' ({len(text)} characters)"


def _check_finite(spec: BlockSpec, frame: pd.DataFrame, columns: tuple[str, ...], ids: list[str]) -> None:
    import pandas as pd

    for column in columns:
        series = frame[column]
        if not pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series):
            continue
        values = series.to_numpy(dtype=float, na_value=np.nan)
        bad = np.isinf(values)
        if bad.any():
            rows = [ids[i] for i in np.flatnonzero(bad)[:5]]
            raise DataError(
                f"the column '{column}' holds infinite values (rows {', '.join(rows)}).",
                spec.locate("model"),
                hint="Fix those entries or exclude them with a rule and a reason.",
            )


def _drop_missing(
    spec: BlockSpec, frame: pd.DataFrame, ids: list[str], columns: tuple[str, ...]
) -> tuple[pd.DataFrame, list[str], list[LedgerStep]]:
    present = [c for c in columns if c in frame.columns]
    if not present:
        return frame, ids, []
    missing = frame[present].isna()
    counts = tuple((c, int(missing[c].sum())) for c in present)
    empty = next((c for c, k in counts if k and k == len(frame)), None)
    if empty is not None:
        left = " left after the exclusions" if spec.exclude else ""
        raise DataError(
            f"the column '{empty}' has no values: it is missing in all {len(frame)} rows{left}.",
            spec.locate(_key_naming(spec, empty)),
            hint="Check the column in the data file (a shifted header or a wrong delimiter?), "
            "or leave it out of the block.",
        )
    row_missing = missing.any(axis=1).to_numpy()
    n_missing = int(row_missing.sum())
    if n_missing and spec.missing == "error":
        detail = ", ".join(f"{c}: {k}" for c, k in counts if k)
        raise DataError(
            f"{n_missing} rows have missing values ({detail}) and missing: error is set.",
            spec.locate("missing"),
            hint="Fill or exclude those rows, or set missing: drop to drop and count them.",
        )
    removed = tuple(compress(ids, row_missing)) if n_missing else ()
    step = LedgerStep(
        kind="missing",
        rule="missing in " + ", ".join(present),
        reason="complete-case analysis (missing: drop)",
        rows_before=len(frame),
        rows_after=len(frame) - n_missing,
        removed_ids=removed,
        matched=n_missing,
        source="data",
        missing_by_column=counts,
    )
    if n_missing:  # else no copy of the frame and no pass over the ids (10^6 rows)
        frame = frame.loc[~row_missing]
        ids = list(compress(ids, ~row_missing))
    return frame, ids, [step]


def _key_naming(spec: BlockSpec, column: str) -> str:
    """The block key that names ``column`` (the model unless a role or a transform does)."""
    for key in ("weights", "groups", "order"):
        if getattr(spec, key) == column:
            return key
    return next((t.key for t in spec.transforms if t.column == column), "model")


def _check_weights(spec: BlockSpec, frame: pd.DataFrame) -> None:
    """Weights must be numbers (text would fail deep in the fit)."""
    import pandas as pd

    if spec.weights is not None:
        series = frame[spec.weights]
        if not pd.api.types.is_numeric_dtype(series):
            example = series.dropna().iloc[0] if series.notna().any() else None
            raise DataError(
                f"the weights column '{spec.weights}' is not numeric (it holds {example!r}).",
                spec.locate("weights"),
                hint="Name a column of positive numbers, such as inverse variances.",
            )


def _check_groups(spec: BlockSpec, frame: pd.DataFrame) -> None:
    """Standard errors that allow for groups (se: auto or cluster with groups) need two groups."""
    if spec.groups is not None and spec.se in ("auto", "cluster") and len(frame):
        values = frame[spec.groups].dropna().unique()
        if len(values) == 1:
            raise DataError(
                f"the groups column '{spec.groups}' has one value ({values[0]!r}) in all "
                f"{len(frame)} analysed rows; standard errors that allow for groups need two at least.",
                spec.locate("groups"),
                hint="Check the column, or remove 'groups:' and choose se: hc3 or classical.",
            )


def _no_rows_left(spec: BlockSpec, steps: list[LedgerStep], read: int) -> DataError:
    excluded = sum(s.matched for s in steps if s.kind == "exclude")
    missing = sum(s.matched for s in steps if s.kind == "missing")
    return DataError(
        f"no rows are left to analyse: of {read} rows read, the exclusions removed {excluded} "
        f"and missing values {missing}.",
        spec.locate("exclude" if spec.exclude and excluded else "model"),
        hint="Check the exclusion rules and the missing-value counts per column "
        "(missing: drop removes a row missing any column the block uses).",
    )


def _transform_values(spec: BlockSpec, t: TransformSpec, frame: pd.DataFrame, ids: list[str]) -> np.ndarray:
    import pandas as pd

    where = spec.locate(t.key)
    series = frame[t.column]
    if not pd.api.types.is_numeric_dtype(series):
        raise DataError(
            f"cannot apply {t.op} to '{t.column}': it is not numeric.",
            where,
            hint="Transforms apply to numeric columns; use C() in the formula for categories.",
        )
    values = series.to_numpy(dtype=float, na_value=np.nan)
    domain = TRANSFORMS[t.op][0]
    bad = (values <= 0) if domain == "positive" else (values < 0) if domain == "non-negative" else None
    if bad is not None and np.any(bad & ~np.isnan(values)):
        hits = [ids[i] for i in np.flatnonzero(bad & ~np.isnan(values))[:5]]
        need = "positive" if domain == "positive" else "non-negative"
        raise DataError(
            f"{t.op} needs {need} values, but '{t.column}' has {int(np.sum(bad))} that are not "
            f"(rows {', '.join(hits)}).",
            where,
            hint="Exclude those rows with a rule and a reason, or choose another transform.",
        )
    if t.op == "winsorize":
        lo, hi = t.limits or (0.05, 0.95)
        low, high = np.nanquantile(values, [lo, hi])
        return np.asarray(np.clip(values, low, high), dtype=float)
    try:
        return _FUNCTIONS[t.op](values)
    except ValueError as exc:
        raise DataError(f"cannot apply {t.op} to '{t.column}': {exc}.", where, hint="Choose another transform.") from exc


def _describe_transform(t: TransformSpec) -> str:
    lo, hi = t.limits or (0.05, 0.95)
    return TRANSFORMS[t.op][1].format(c=t.column, lo=lo, hi=hi)


def _formula_matches(t: TransformSpec, formula_transforms: tuple[FormulaTransform, ...]) -> bool:
    return t.as_ is None and any(f.function == t.op and f.column == t.column for f in formula_transforms)


def _apply_transforms(
    spec: BlockSpec,
    frame: pd.DataFrame,
    ids: list[str],
    formula_transforms: tuple[FormulaTransform, ...],
) -> tuple[pd.DataFrame, list[LedgerStep]]:
    steps: list[LedgerStep] = []
    if any(not _formula_matches(t, formula_transforms) for t in spec.transforms):
        frame = frame.copy()  # only when a column is written (a whole copy at 10^6 rows otherwise)
    annotations: dict[tuple[str, str], TransformSpec] = {}
    for t in spec.transforms:
        if _formula_matches(t, formula_transforms):
            # The formula applies it; this entry only attaches the reason.
            annotations[(t.op, t.column)] = t
            continue
        frame[t.target] = _transform_values(spec, t, frame, ids)
        steps.append(_transform_step(t.column, t.target, _describe_transform(t), t, "block", len(frame)))
    for f in formula_transforms:
        note = annotations.get((f.function, f.column))
        steps.append(_transform_step(f.column, f.expression, f.expression, note, "formula", len(frame)))
    return frame, steps


def _transform_step(
    column: str, target: str, rule: str, declared: TransformSpec | None, source: str, n: int
) -> LedgerStep:
    return LedgerStep(
        kind="transform",
        rule=rule,
        reason=declared.reason if declared else None,
        rows_before=n,
        rows_after=n,
        column=column,
        target=target,
        source=source,  # type: ignore[arg-type]
        prespecified=declared.prespecified if declared else None,
        registration=declared.registration if declared else None,
    )


def apply_ledger(
    spec: BlockSpec,
    frame: pd.DataFrame,
    ids: list[str],
    model_columns: tuple[str, ...],
    formula_transforms: tuple[FormulaTransform, ...] = (),
    *,
    apply_exclusions: bool = True,
    drop_ids: frozenset[str] = frozenset(),
) -> LedgerOutcome:
    """Apply exclusions, missing-value handling and transforms in order, recording each.

    Parameters
    ----------
    model_columns
        Data columns the formula uses.
    formula_transforms
        Transforms written inside the formula (recorded, not applied here).
    apply_exclusions
        False undoes every exclusion (the sensitivity row "exclusions undone").
    drop_ids
        Extra ids to drop after the declared steps (the sensitivity row
        "flagged points removed"); not recorded as a declared step.
    """
    frame = frame.reset_index(drop=True)
    frame.index = np.arange(1, len(frame) + 1)  # 1-based file row numbers
    created = {t.target for t in spec.transforms} - set(frame.columns)
    data_columns = tuple(c for c in model_columns if c not in created)
    needed = data_columns + tuple(
        c for c in (spec.weights, spec.groups, spec.order) if c is not None and c not in data_columns
    )
    _check_numeric_text(spec, frame, needed, ids)
    _check_weights(spec, frame)
    read = len(frame)
    steps: list[LedgerStep] = []
    matched: list[tuple[str, tuple[str, ...]]] = []
    if apply_exclusions:
        frame, ids, exclusion_steps, matched = _apply_exclusions(spec, frame, ids)
        steps += exclusion_steps
    _check_finite(spec, frame, needed, ids)
    transform_sources = tuple(t.column for t in spec.transforms if t.column not in needed)
    frame, ids, missing_steps = _drop_missing(spec, frame, ids, needed + transform_sources)
    steps += missing_steps
    if drop_ids:
        keep = np.fromiter((i not in drop_ids for i in ids), dtype=bool, count=len(ids))
        frame = frame.loc[keep]
        ids = list(compress(ids, keep))
    if len(frame) == 0:
        raise _no_rows_left(spec, steps, read)
    _check_groups(spec, frame)
    frame, transform_steps = _apply_transforms(spec, frame, ids, formula_transforms)
    steps += transform_steps
    rows = frame.index.to_numpy(dtype=np.int64)
    return LedgerOutcome(
        frame=frame.reset_index(drop=True),
        ids=tuple(ids),
        rows=rows,
        steps=tuple(steps),
        matched_ids=tuple(matched),
    )
