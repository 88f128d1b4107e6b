"""One block from spec to result: the stages meet here and nowhere else below the pipeline.

``analyse_block`` reads the data, applies the ledger, fits, runs the checks,
draws the figures, computes the sensitivity rows and stamps the provenance.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from premises._version import FORMAT_VERSION
from premises.errors import DataError, ModelError, PremisesError, SpecError
from premises.results import (
    BlockResult,
    Coefficient,
    Finding,
    FitSummary,
    FlaggedPoint,
    Provenance,
    SensitivityRow,
)
from premises.spec import BlockSpec

if TYPE_CHECKING:
    import pandas as pd

    from premises.checks.base import CheckContext
    from premises.data import Table
    from premises.fit import FitResult
    from premises.formula import Design
    from premises.ledger import LedgerOutcome

__all__ = ["AnalysisOptions", "analyse_block", "library_versions", "prepare_block"]


ANALYSED_IDS_MAX = 100_000
"""Above this many analysed rows the result leaves ``analysed_ids`` empty: 10^6 ids cost
seconds and tens of MB in every result JSON and cache record. The change log then says
how many rows were read and analysed, not which ones entered or left (the ledger's
``removed_ids`` are kept whatever the size)."""


@dataclass(frozen=True)
class AnalysisOptions:
    """Choices that come from the command line rather than the block."""

    allow_outside_data: bool = False
    max_data_bytes: int = 2 * 1024**3
    template_fingerprint: str = ""
    """Hash of the template set, part of the provenance fingerprint."""


@dataclass(frozen=True)
class PreparedBlock:
    """A block whose formula, rules and columns were checked against its data."""

    spec: BlockSpec
    table: Table
    ids: list[str]
    formula_columns: tuple[str, ...]


def library_versions() -> tuple[tuple[str, str], ...]:
    """Versions that can change a number in the output (the same list the cache keys on)."""
    from premises.cache import library_versions as versions

    return versions()


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def prepare_block(spec: BlockSpec, document_dir: Path, options: AnalysisOptions) -> PreparedBlock:
    """Check rules and formula (before any data is read), then read the data and check columns."""
    from premises.data import load_table, row_ids
    from premises.formula import check_formula
    from premises.ledger import check_columns
    from premises.rules import parse_rule

    for rule in spec.exclude:
        if rule.when is not None:
            parse_rule(rule.when, location=spec.locate(rule.key + ".when"))
    try:
        check_formula(spec.model)
    except PremisesError as exc:
        raise type(exc)(exc.problem, spec.locate("model"), hint=exc.hint) from exc
    table = load_table(
        spec.data,
        document_dir,
        spec.locate("data"),
        allow_outside=options.allow_outside_data,
        max_bytes=options.max_data_bytes,
    )
    try:
        columns = check_formula(spec.model, tuple(dict.fromkeys((*table.frame.columns, *(t.target for t in spec.transforms)))))
    except PremisesError as exc:
        raise type(exc)(exc.problem, spec.locate("model"), hint=exc.hint) from exc
    check_columns(spec, table.frame, columns)
    ids = row_ids(table.frame, spec.id_column, spec.locate("id_column"))
    return PreparedBlock(spec=spec, table=table, ids=ids, formula_columns=columns)


def _design_for(spec: BlockSpec, frame: pd.DataFrame) -> Design:
    from premises.formula import build_design

    try:
        return build_design(spec.model, frame)
    except PremisesError as exc:
        raise type(exc)(exc.problem, spec.locate("model"), hint=exc.hint) from exc


def _fit(spec: BlockSpec, outcome: LedgerOutcome) -> tuple[Design, FitResult]:
    from premises.fit import fit_model

    design = _design_for(spec, outcome.frame)
    weights = None
    if spec.weights is not None:
        weights = outcome.frame[spec.weights].to_numpy(dtype=float)
        if np.any(~np.isfinite(weights)) or np.any(weights <= 0):
            bad = [outcome.ids[i] for i in np.flatnonzero(~(np.isfinite(weights) & (weights > 0)))[:5]]
            raise ModelError(
                f"the weights in '{spec.weights}' must be positive and finite; rows {', '.join(bad)} are not.",
                spec.locate("weights"),
                hint="Fix those weights or exclude the rows with a rule and a reason.",
            )
    try:
        return design, fit_model(design, weights)
    except PremisesError as exc:
        raise type(exc)(exc.problem, spec.locate("model"), hint=exc.hint) from exc


def _group_codes(spec: BlockSpec, frame: pd.DataFrame) -> np.ndarray | None:
    import pandas as pd

    if spec.groups is None:
        return None
    codes, _ = pd.factorize(frame[spec.groups], sort=True)
    return np.asarray(codes)


def _coefficients(fit: FitResult, cov: np.ndarray, robust: np.ndarray | None, df: float) -> tuple[Coefficient, ...]:
    from scipy import stats

    se = np.sqrt(np.diag(cov))
    classical = fit.bse
    robust_se = np.sqrt(np.diag(robust)) if robust is not None else None
    crit = float(stats.t.ppf(0.975, df))
    out = []
    for j, term in enumerate(fit.design.column_names):
        est = float(fit.params[j])
        t = est / se[j] if se[j] > 0 else float("nan")
        out.append(
            Coefficient(
                term=term,
                estimate=est,
                se=float(classical[j]),
                se_robust=float(robust_se[j]) if robust_se is not None else None,
                ci_low=est - crit * float(se[j]),
                ci_high=est + crit * float(se[j]),
                p=float(2 * stats.t.sf(abs(t), df)),
                statistic=float(t),
            )
        )
    return tuple(out)


@dataclass(frozen=True)
class _SEChoice:
    used: str
    reason: str
    robust_kind: str | None


def _choose_se(spec: BlockSpec, findings: tuple[Finding, ...]) -> _SEChoice:
    variance = next((f for f in findings if f.assumption == "variance"), None)
    advised = bool(dict(variance.extra).get("hc3_advised")) if variance is not None else False
    if spec.se == "classical":
        return _SEChoice("classical", "they were declared in the block (se: classical)", "hc3" if advised else None)
    if spec.se == "hc3":
        return _SEChoice("hc3", "they were declared in the block (se: hc3)", "hc3")
    if spec.se == "cluster":
        return _SEChoice("cluster", f"they were declared in the block (se: cluster, groups: {spec.groups})", "cluster")
    if spec.groups is not None:
        return _SEChoice(
            "cluster",
            f"groups are declared ({spec.groups}) and rows in the same group may share conditions",
            "cluster",
        )
    if advised:
        return _SEChoice(
            "hc3",
            "the spread of the residuals changes with the fitted values by more than the tool's "
            "threshold (a measured size, not a significance pre-test; Long & Ervin 2000)",
            "hc3",
        )
    return _SEChoice("classical", "the residual spread was close to constant (se: auto)", None)


def _covariances(fit: FitResult, choice: _SEChoice, groups: np.ndarray | None) -> tuple[np.ndarray, np.ndarray | None, float]:
    from premises.fit import robust_cov

    robust = robust_cov(fit, choice.robust_kind.upper() if choice.robust_kind == "hc3" else "cluster", groups) if choice.robust_kind else None
    df = float(fit.df_resid)
    if choice.used == "classical":
        return fit.cov, robust, df
    assert robust is not None
    if choice.used == "cluster" and groups is not None:
        # t with G - 1 degrees of freedom for cluster-robust inference (Cameron & Miller 2015).
        df = float(len(np.unique(groups)) - 1)
    return robust, robust, df


def _changed(reported: tuple[Coefficient, ...], other: tuple[Coefficient, ...]) -> tuple[str, ...]:
    """Terms whose conclusion differs: sign flip, or CI now including/excluding 0."""
    base = {c.term: c for c in reported}
    out = []
    for c in other:
        ref = base.get(c.term)
        if ref is None or c.term == "Intercept":
            continue
        excludes_ref = ref.ci_low > 0 or ref.ci_high < 0
        excludes_alt = c.ci_low > 0 or c.ci_high < 0
        sign_flip = np.sign(ref.estimate) != np.sign(c.estimate) and ref.estimate != 0 and c.estimate != 0
        if sign_flip or excludes_ref != excludes_alt:
            out.append(c.term)
    return tuple(out)


def _refit_row(
    label: str,
    description: str,
    prepared: PreparedBlock,
    choice: _SEChoice,
    reported: tuple[Coefficient, ...],
    **ledger_options: Any,
) -> SensitivityRow:
    from premises.ledger import apply_ledger

    spec = prepared.spec
    try:
        outcome = apply_ledger(
            spec, prepared.table.frame, prepared.ids, prepared.formula_columns,
            _formula_transforms(spec), **ledger_options,
        )
        _, fit = _fit(spec, outcome)
        groups = _group_codes(spec, outcome.frame)
        cov, _, df = _covariances(fit, choice, groups)
        coefs = _coefficients(fit, cov, None, df)
    except PremisesError as exc:
        return SensitivityRow(label=label, description=f"{description} (could not be fitted: {exc.problem})", n=0, coefficients=())
    return SensitivityRow(label=label, description=description, n=fit.n, coefficients=coefs, changed=_changed(reported, coefs))


_ROW_WISE_OPS = frozenset({"log", "log2", "log10", "sqrt"})
_STATEFUL = re.compile(r"\b(center|standardize|scale)\s*\(")


def _rows_refit_exactly(spec: BlockSpec, design: Design) -> bool:
    """Whether dropping rows from the design equals rebuilding it from the ledger without them.

    True when every transform works row by row (rank, z-score, winsorize, and
    the formula's center, standardize and scale depend on which rows remain)
    and no design column codes a factor (a level could vanish with the rows).
    """
    return (
        all(t.op in _ROW_WISE_OPS for t in spec.transforms)
        and _STATEFUL.search(spec.model) is None
        and not any("[" in name for name in design.column_names)
    )


def _subset_row(
    label: str,
    description: str,
    ctx: CheckContext,
    keep: np.ndarray,
    choice: _SEChoice,
    reported: tuple[Coefficient, ...],
    groups: np.ndarray | None,
) -> SensitivityRow:
    """:func:`_refit_row` for rows left out of the reported design (see :func:`_rows_refit_exactly`).

    The same numbers without reading the ledger and building the design again
    (at 10^6 rows the rebuild costs as much as the fit).
    """
    from premises.fit import fit_model

    fit = ctx.fit
    design = replace(fit.design, y=fit.design.y[keep], X=fit.design.X[keep])
    try:
        try:
            sub = fit_model(design, None if fit.weights is None else fit.weights[keep])
        except PremisesError as exc:
            raise type(exc)(exc.problem, ctx.spec.locate("model"), hint=exc.hint) from exc
        cov, _, df = _covariances(sub, choice, None if groups is None else groups[keep])
        coefs = _coefficients(sub, cov, None, df)
    except PremisesError as exc:
        return SensitivityRow(label=label, description=f"{description} (could not be fitted: {exc.problem})", n=0, coefficients=())
    return SensitivityRow(label=label, description=description, n=sub.n, coefficients=coefs, changed=_changed(reported, coefs))


def _formula_transforms(spec: BlockSpec) -> tuple[Any, ...]:
    from premises.formula import (
        check_formula,  # noqa: F401
        formula_transforms,
    )

    return formula_transforms(spec.model)


def _se_rows(fit: FitResult, choice: _SEChoice, groups: np.ndarray | None, reported: tuple[Coefficient, ...]) -> list[SensitivityRow]:
    rows = []
    kinds = ["classical", "hc3"] + (["cluster"] if groups is not None else [])
    for kind in kinds:
        if kind == choice.used:
            continue
        alt = _SEChoice(kind, "", None if kind == "classical" else kind)
        cov, _, df = _covariances(fit, alt, groups)
        coefs = _coefficients(fit, cov, None, df)
        label = {"classical": "classical SE", "hc3": "HC3 SE", "cluster": "cluster-robust SE"}[kind]
        description = {
            "classical": "same fit, standard errors assuming constant variance and independence",
            "hc3": "same fit, heteroscedasticity-consistent HC3 standard errors (MacKinnon & White 1985)",
            "cluster": "same fit, standard errors robust to correlation within groups (CR1)",
        }[kind]
        rows.append(SensitivityRow(label=label, description=description, n=fit.n, coefficients=coefs, changed=_changed(reported, coefs)))
    return rows


def _cautions(spec: BlockSpec, findings: tuple[Finding, ...]) -> tuple[str, ...]:
    out: list[str] = []
    for finding in findings:
        out.extend(finding.notes if finding.assumption in ("outcome",) else ())
    if any(s.prespecified is None for s in spec.exclude):
        out.append(
            "Some exclusion rules do not say whether they were fixed before the outcome was seen "
            "(prespecified: true/false); the section prints them as not declared."
        )
    return tuple(dict.fromkeys(out))


def analyse_block(
    spec: BlockSpec,
    document_dir: Path,
    figure_dir: Path,
    figure_rel: str,
    options: AnalysisOptions,
) -> BlockResult:
    """Run one block end to end and return its result (figures written to ``figure_dir``)."""
    from premises.checks.base import CheckContext, run_checks
    from premises.checks.influence import flag_points
    from premises.fit import compute_influence
    from premises.ledger import apply_ledger

    prepared = prepare_block(spec, document_dir, options)
    outcome = apply_ledger(
        spec, prepared.table.frame, prepared.ids, prepared.formula_columns, _formula_transforms(spec)
    )
    design, fit = _fit(spec, outcome)
    influence = compute_influence(fit)
    ctx = CheckContext(
        spec=spec,
        fit=fit,
        influence=influence,
        frame=outcome.frame,
        ids=np.asarray(outcome.ids, dtype=object),
        rows=outcome.rows,
        seed=spec.seed,
    )
    findings = run_checks(ctx, spec.checks)
    flagged = flag_points(ctx) if "influence" in spec.checks else ()
    choice = _choose_se(spec, findings)
    groups = _group_codes(spec, outcome.frame)
    cov, robust, df = _covariances(fit, choice, groups)
    coefficients = _coefficients(fit, cov, robust, df)
    sensitivity = _sensitivity(prepared, ctx, choice, coefficients, flagged, groups)
    figures = _figures(ctx, findings, figure_dir, figure_rel, spec)
    findings = tuple(replace(f, figure=f.figure if any(r.id == f.figure for r in figures) else None) for f in findings)
    provenance = _provenance(spec, prepared, options)
    return BlockResult(
        id=spec.id,
        title=spec.title,
        model=spec.model,
        data=prepared.table.info,
        ledger=outcome.steps,
        n_used=fit.n,
        fit=_summary(fit, design, spec),
        coefficients=coefficients,
        se_used=choice.used,
        se_reason=choice.reason,
        se_robust_kind=choice.robust_kind,
        se_data_driven=spec.se == "auto" and spec.groups is None and choice.used == "hc3",
        checks=findings,
        flagged=flagged,
        figures=figures,
        sensitivity=sensitivity,
        provenance=provenance,
        cautions=_cautions(spec, findings),
        id_column=spec.id_column,
        groups=spec.groups,
        order=spec.order,
        weights=spec.weights,
        detail=spec.detail,
        analysed_ids=outcome.ids if len(outcome.ids) <= ANALYSED_IDS_MAX else (),
    )


def _sensitivity(
    prepared: PreparedBlock,
    ctx: CheckContext,
    choice: _SEChoice,
    reported: tuple[Coefficient, ...],
    flagged: tuple[FlaggedPoint, ...],
    groups: np.ndarray | None,
) -> tuple[SensitivityRow, ...]:
    from premises.checks.alternatives import fit_alternatives

    spec = prepared.spec
    rows = [SensitivityRow(label="as reported", description=f"the model as specified, {choice.used} standard errors", n=ctx.fit.n, coefficients=reported)]
    if spec.exclude:
        rows.append(_refit_row("exclusions undone", "every declared exclusion put back", prepared, choice, reported, apply_exclusions=False))
    if flagged:
        ids = frozenset(p.id for p in flagged)
        label = "flagged points removed"
        description = f"the {len(ids)} flagged observation{'s' if len(ids) != 1 else ''} left out (a check, not a recommendation)"
        keep = ~np.isin(ctx.rows, [p.row for p in flagged])
        if keep.any() and _rows_refit_exactly(spec, ctx.fit.design):
            rows.append(_subset_row(label, description, ctx, keep, choice, reported, groups))
        else:
            rows.append(_refit_row(label, description, prepared, choice, reported, drop_ids=ids))
    rows += _se_rows(ctx.fit, choice, groups, reported)
    if spec.alternatives:
        for row in fit_alternatives(ctx, spec.alternatives):
            rows.append(row)
    return tuple(rows)


def _figures(ctx: CheckContext, findings: tuple[Finding, ...], figure_dir: Path, figure_rel: str, spec: BlockSpec) -> tuple[Any, ...]:
    from premises.figures import draw_figures

    return tuple(draw_figures(ctx, findings, figure_dir, figure_rel, spec.figures))


def _summary(fit: FitResult, design: Design, spec: BlockSpec) -> FitSummary:
    return FitSummary(
        estimator="WLS" if spec.weights else "OLS",
        n=fit.n,
        p=fit.p,
        df_resid=float(fit.df_resid),
        r_squared=float(fit.r_squared),
        r_squared_adj=float(fit.r_squared_adj),
        sigma=float(np.sqrt(fit.sigma2)),
        f_statistic=fit.f_statistic,
        f_p=fit.f_p,
        condition_number=float(fit.condition_number),
        outcome=design.outcome,
        formula=spec.model,
    )


def _provenance(spec: BlockSpec, prepared: PreparedBlock, options: AnalysisOptions) -> Provenance:
    from premises.spec import canonical_spec

    versions = library_versions()
    spec_sha = _sha(canonical_spec(spec))
    fingerprint = _sha(
        "\n".join(
            [
                f"format={FORMAT_VERSION}",
                f"data={prepared.table.info.sha256}",
                f"spec={spec_sha}",
                f"templates={options.template_fingerprint}",
                *(f"{k}={v}" for k, v in versions),
            ]
        )
    )
    return Provenance(
        data_sha256=prepared.table.info.sha256,
        spec_sha256=spec_sha,
        rows_read=prepared.table.info.rows_read,
        versions=versions,
        fingerprint=fingerprint,
    )


_ = (DataError, SpecError)
