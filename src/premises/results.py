"""Typed results of one block: what templates, tests and the cache read.

Every stage hands the next a frozen dataclass from this module. ``to_json``
turns a :class:`DocumentResult` into the public, versioned JSON
(``premises render --json``); its field names are the template variables.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, is_dataclass
from typing import Any, Literal

__all__ = [
    "BlockResult",
    "Coefficient",
    "DataInfo",
    "DocumentResult",
    "FigureRef",
    "Finding",
    "FitSummary",
    "FlaggedPoint",
    "LedgerStep",
    "Provenance",
    "SensitivityRow",
    "Statistic",
    "ThresholdUse",
    "to_jsonable",
]

Verdict = Literal["holds", "concern", "violated", "not-assessed"]
VERDICTS: tuple[str, ...] = ("holds", "concern", "violated", "not-assessed")


@dataclass(frozen=True, slots=True)
class DataInfo:
    """The data file as read."""

    path: str
    """Path relative to the document, as written in the block."""
    sha256: str
    """SHA-256 of the file's bytes."""
    rows_read: int
    columns: tuple[str, ...] = ()
    format: str = ""
    """Reader used: csv, tsv, parquet, xlsx, dta, sav."""


@dataclass(frozen=True, slots=True)
class LedgerStep:
    """One step from rows read to rows analysed."""

    kind: Literal["missing", "exclude", "transform"]
    rule: str
    """The rule text, the transform (``log2(water)``) or ``missing in y, x``."""
    reason: str | None
    """Declared reason; None prints as "not declared"."""
    rows_before: int
    rows_after: int
    removed_ids: tuple[str, ...] = ()
    """Ids of the rows this step removed (id_column value, else 1-based row number)."""
    matched: int = 0
    """Rows the rule matched (for an exclusion, may exceed rows removed when rows were gone already)."""
    column: str | None = None
    """Transform: source column; missing: None."""
    target: str | None = None
    """Transform: the column written."""
    source: Literal["block", "formula", "data"] = "block"
    """Where the step was declared: the ``transforms``/``exclude`` keys, the formula, or implied by the data."""
    prespecified: bool | None = None
    registration: str | None = None
    category: str | None = None
    missing_by_column: tuple[tuple[str, int], ...] = ()
    """Missing step: (column, rows missing in it) for each model column."""


@dataclass(frozen=True, slots=True)
class Coefficient:
    """One model term."""

    term: str
    estimate: float
    se: float
    """Classical standard error."""
    se_robust: float | None
    """Robust SE (HC3 or cluster, see ``BlockResult.se_robust_kind``) where computed."""
    ci_low: float
    ci_high: float
    """Confidence interval from the SE the block reports (``BlockResult.se_used``)."""
    p: float
    statistic: float
    """t statistic from the SE the block reports."""


@dataclass(frozen=True, slots=True)
class Statistic:
    """A number that a check reports, with its provenance."""

    name: str
    value: float | None
    p: float | None = None
    df: tuple[float, ...] | None = None
    source: str = ""
    """Published origin (author, year) or "common practice"."""
    note: str = ""


@dataclass(frozen=True, slots=True)
class ThresholdUse:
    """A threshold applied by a check, with its published origin."""

    name: str
    expression: str
    """As declared, e.g. ``4/n``."""
    value: float
    """Evaluated for this fit."""
    origin: str
    """Published origin or "common practice"."""


@dataclass(frozen=True, slots=True)
class Finding:
    """The result of one assumption check."""

    assumption: str
    verdict: Verdict
    measure: Statistic | None
    """The severity measure in interpretable units that the verdict rests on."""
    statistics: tuple[Statistic, ...] = ()
    summary: str = ""
    """One sentence: what was found, with the measure."""
    consequence: str = ""
    """What this means for the analysis."""
    remedy: str = ""
    """The usual remedy."""
    reason: str | None = None
    """Why the check was not assessed (verdict ``not-assessed``)."""
    thresholds: tuple[ThresholdUse, ...] = ()
    method: str = ""
    """How it was assessed, for the methods paragraph."""
    notes: tuple[str, ...] = ()
    """Cautions specific to this check (sample size, masking, ...)."""
    figure: str | None = None
    """Id of the figure that shows it (``fig-<block>-<assumption>``)."""
    extra: tuple[tuple[str, Any], ...] = ()
    """Check-specific structured data (e.g. per-term VIF) as (name, value) pairs."""


@dataclass(frozen=True, slots=True)
class FlaggedPoint:
    """An observation that crossed at least one influence threshold."""

    id: str
    row: int
    """1-based row number in the data file."""
    leverage: float
    studentized: float | None
    """Externally studentized residual; None when undefined (leverage 1)."""
    cooks: float | None
    dffits: float | None
    dfbetas: tuple[tuple[str, float | None], ...]
    """(term, DFBETAS) for every term; None when undefined."""
    rules: tuple[str, ...]
    """Which thresholds flagged it (``cooks > 4/n``, ``leverage > 2p/n`` ...)."""
    largest_term: str | None = None
    """Term whose coefficient this point moves most (in SE units)."""
    undefined: bool = False
    """True when the point's leverage is 1: it alone determines a coefficient."""
    bonferroni_p: float | None = None


@dataclass(frozen=True, slots=True)
class FigureRef:
    """A figure written beside the output."""

    id: str
    """Cross-reference id, ``fig-<block>-<name>``."""
    assumption: str
    path: str
    """Relative to the output document."""
    caption: str
    alt: str


@dataclass(frozen=True, slots=True)
class SensitivityRow:
    """One alternative analysis beside the reported one."""

    label: str
    """``as reported``, ``exclusions undone``, ``flagged points removed``, ``HC3 SE`` ..."""
    description: str
    n: int
    coefficients: tuple[Coefficient, ...]
    changed: tuple[str, ...] = ()
    """Terms whose conclusion differs from the reported fit (sign flip, or CI now
    including/excluding 0)."""
    data_driven: bool = False


@dataclass(frozen=True, slots=True)
class FitSummary:
    """Whole-model statistics."""

    estimator: str
    """OLS or WLS."""
    n: int
    p: int
    df_resid: float
    r_squared: float
    r_squared_adj: float
    sigma: float
    """Residual standard error."""
    f_statistic: float | None
    f_p: float | None
    condition_number: float
    outcome: str
    formula: str


@dataclass(frozen=True, slots=True)
class Provenance:
    """What makes the result reproducible."""

    data_sha256: str
    spec_sha256: str
    rows_read: int
    versions: tuple[tuple[str, str], ...]
    fingerprint: str
    """Hash of data bytes, canonical spec, template set and versions."""


@dataclass(frozen=True, slots=True)
class BlockResult:
    """Everything one block produces."""

    id: str
    title: str | None
    model: str
    data: DataInfo
    ledger: tuple[LedgerStep, ...]
    n_used: int
    fit: FitSummary
    coefficients: tuple[Coefficient, ...]
    se_used: str
    """classical, hc3 or cluster: the SE the coefficient table reports."""
    se_reason: str
    """Why that SE (declared, or the variance check under ``se: auto``)."""
    se_robust_kind: str | None
    checks: tuple[Finding, ...]
    flagged: tuple[FlaggedPoint, ...]
    figures: tuple[FigureRef, ...]
    sensitivity: tuple[SensitivityRow, ...]
    provenance: Provenance
    cautions: tuple[str, ...] = ()
    id_column: str | None = None
    groups: str | None = None
    order: str | None = None
    weights: str | None = None
    detail: str = "full"
    guidelines: tuple[tuple[str, Any], ...] = ()
    change_log: tuple[tuple[str, Any], ...] = ()
    se_data_driven: bool = False
    """True when ``se: auto`` chose HC3 after looking at the residual spread (a data-driven choice)."""
    """Differences from the block's previous render (``premises.changes``); empty on a first render."""
    analysed_ids: tuple[str, ...] = ()
    """Ids of the analysed rows in file order (with the ledger's removed ids: every row read)."""


@dataclass(frozen=True, slots=True)
class DocumentResult:
    """All blocks of a document."""

    document: str
    blocks: tuple[BlockResult, ...]
    format_version: int = 1
    generator: str = "premises"
    extra: dict[str, Any] = field(default_factory=dict)


def _clean_float(value: float) -> float | None:
    return None if (math.isnan(value) or math.isinf(value)) else value


def to_jsonable(value: Any) -> Any:
    """Convert results (dataclasses, tuples, numpy scalars) to plain JSON values.

    Non-finite floats become ``None`` (JSON has no NaN); pairs-tuples named in
    ``_MAPPING_FIELDS`` become objects.
    """
    if is_dataclass(value) and not isinstance(value, type):
        out: dict[str, Any] = {}
        for f in fields(value):
            item = getattr(value, f.name)
            if f.name in _MAPPING_FIELDS and isinstance(item, tuple):
                out[f.name] = {str(k): to_jsonable(v) for k, v in item}
            else:
                out[f.name] = to_jsonable(item)
        return out
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        if all(type(v) is str for v in value):
            return list(value)  # ids: 10^5-10^6 strings, one call instead of one per string
        return [to_jsonable(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        return _clean_float(value)
    # numpy scalars and arrays
    if hasattr(value, "tolist"):
        return to_jsonable(value.tolist())
    return str(value)


_MAPPING_FIELDS = frozenset(
    {"dfbetas", "versions", "missing_by_column", "extra", "guidelines", "change_log"}
)
