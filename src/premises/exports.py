"""Ledger and per-observation diagnostics export: ``premises ledger`` and its tables.

For each block of a document, the excluded and missing rows with their rule,
reason and declarations, and the closed-form influence measures of every
analysed row (and of the refit with every exclusion put back). The tables are
kept beside the block's store entry, so a second export reads them instead of
refitting; they are written as CSV or Parquet, atomically.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from premises.cache import BlockCache, library_versions
from premises.errors import SpecError
from premises.files import atomic_write_bytes
from premises.spec import BlockSpec
from premises.staleness import BlockPlace, block_places, key_parts, open_cache

if TYPE_CHECKING:
    from premises.pipeline import RenderOptions

__all__ = [
    "DIAGNOSTIC_COLUMNS",
    "LEDGER_COLUMNS",
    "Observations",
    "compute_observations",
    "diagnostics_rows",
    "ledger_rows",
    "write_table",
]

DIAGNOSTIC_COLUMNS = ("id", "row", "fitted", "residual", "leverage", "studentized", "cooks", "dffits")
"""Leading columns of a diagnostics table; one ``dfbetas_<term>`` column per term follows."""
LEDGER_COLUMNS = ("block", "step", "id", "rule", "reason", "prespecified", "category", "registration")
_EXTRA = "observations.npz"
"""Name of the store extra that holds a block's per-observation tables: NumPy arrays
(ids as text, row numbers as integers, measures as floats with NaN for blank), not
JSON, which at 10^6 rows took tens of seconds and hundreds of MB to write and read."""


@dataclass(frozen=True)
class Observations:
    """Per-observation tables of one block: the reported fit and the fit with exclusions undone."""

    ids_read: tuple[str, ...]
    """Every row's id in file order (row number = position + 1)."""
    ledger: tuple[dict[str, Any], ...]
    """The ledger steps as in the result JSON."""
    columns: tuple[str, ...]
    analysed: tuple[tuple[Any, ...], ...]
    """One row per analysed observation, in ``columns`` order."""
    undone: tuple[tuple[Any, ...], ...] | None
    """The same for the refit with every exclusion put back; None when there are no exclusions or it cannot be fitted."""
    undone_columns: tuple[str, ...] = ()

    def to_json(self) -> dict[str, Any]:
        """Plain JSON (NaN as null)."""
        return {
            "ids_read": list(self.ids_read),
            "ledger": list(self.ledger),
            "columns": list(self.columns),
            "analysed": [list(r) for r in self.analysed],
            "undone_columns": list(self.undone_columns),
            "undone": [list(r) for r in self.undone] if self.undone is not None else None,
        }

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> Observations:
        """Inverse of :meth:`to_json`."""
        undone = data.get("undone")
        return cls(
            ids_read=tuple(data["ids_read"]),
            ledger=tuple(data["ledger"]),
            columns=tuple(data["columns"]),
            analysed=tuple(tuple(r) for r in data["analysed"]),
            undone=tuple(tuple(r) for r in undone) if undone is not None else None,
            undone_columns=tuple(data.get("undone_columns") or ()),
        )


    def to_npz(self) -> bytes:
        """The tables as an uncompressed ``.npz`` (no pickles): what the store keeps."""
        import io
        import json

        import numpy as np

        arrays: dict[str, Any] = {
            "ids_read": np.array(self.ids_read, dtype=str),
            "ledger": np.array(json.dumps(list(self.ledger), allow_nan=False)),
            "columns": np.array(self.columns, dtype=str),
            "undone_columns": np.array(self.undone_columns, dtype=str),
        }
        tables = (("analysed", self.analysed, self.columns), ("undone", self.undone, self.undone_columns))
        for name, table, columns in tables:
            if table is None:
                continue
            arrays[f"{name}_ids"] = np.array([r[0] for r in table], dtype=str)
            arrays[f"{name}_rows"] = np.array([r[1] for r in table], dtype=np.int64)
            # None (a blank measure) becomes NaN in a float array.
            arrays[f"{name}_values"] = np.array([r[2:] for r in table], dtype=float).reshape(len(table), max(len(columns) - 2, 0))
        buffer = io.BytesIO()
        np.savez(buffer, **arrays)
        return buffer.getvalue()

    @classmethod
    def from_npz(cls, data: bytes) -> Observations:
        """Inverse of :meth:`to_npz` (NaN back to None)."""
        import io
        import json

        import numpy as np

        with np.load(io.BytesIO(data), allow_pickle=False) as found:

            def table(name: str) -> tuple[tuple[Any, ...], ...] | None:
                if f"{name}_ids" not in found:
                    return None
                values = found[f"{name}_values"].tolist()
                return tuple(
                    (ident, row, *(v if math.isfinite(v) else None for v in rest))
                    for ident, row, rest in zip(found[f"{name}_ids"].tolist(), found[f"{name}_rows"].tolist(), values)
                )

            return cls(
                ids_read=tuple(found["ids_read"].tolist()),
                ledger=tuple(json.loads(str(found["ledger"]))),
                columns=tuple(found["columns"].tolist()),
                analysed=table("analysed") or (),
                undone=table("undone"),
                undone_columns=tuple(found["undone_columns"].tolist()),
            )


def _finite(value: float) -> float | None:
    return value if math.isfinite(value) else None


def _table(spec: BlockSpec, outcome: Any) -> tuple[tuple[str, ...], tuple[tuple[Any, ...], ...]]:
    """Fit the ledger's rows as the render does and tabulate the closed-form influence measures."""
    from premises.analysis import _fit
    from premises.fit import compute_influence

    _, fit = _fit(spec, outcome)
    influence = compute_influence(fit)
    import numpy as np

    terms = fit.design.column_names
    columns = DIAGNOSTIC_COLUMNS + tuple(f"dfbetas_{t}" for t in terms)
    # One (n, 6 + p) array turned into Python floats at once: a loop indexing arrays per row
    # took most of the time at 10^6 rows.
    measures = np.column_stack([fit.fitted, fit.resid, influence.hat, influence.studentized_external, influence.cooks, influence.dffits, influence.dfbetas])
    rows = tuple(
        (str(ident), row, *(_finite(v) for v in values))
        for ident, row, values in zip(outcome.ids, np.asarray(outcome.rows, dtype=np.int64).tolist(), measures.tolist())
    )
    return columns, rows


def compute_observations(spec: BlockSpec, document_dir: Path, options: RenderOptions) -> Observations:
    """Recompute a block's per-observation tables (reads the data and fits; imports pandas and numpy)."""
    from premises.analysis import AnalysisOptions, _formula_transforms, prepare_block
    from premises.errors import PremisesError
    from premises.ledger import apply_ledger
    from premises.results import to_jsonable

    prepared = prepare_block(spec, document_dir, AnalysisOptions(allow_outside_data=options.allow_outside_data, max_data_bytes=options.max_data_bytes))
    transforms = _formula_transforms(spec)

    def ledger(**kw: Any) -> Any:
        return apply_ledger(spec, prepared.table.frame, prepared.ids, prepared.formula_columns, transforms, **kw)

    outcome = ledger()
    columns, analysed = _table(spec, outcome)
    undone_columns: tuple[str, ...] = ()
    undone = None
    if spec.exclude:
        try:
            undone_columns, undone = _table(spec, ledger(apply_exclusions=False))
        except PremisesError:
            undone = None  # the rows put back cannot be fitted: their diagnostics stay blank
    return Observations(tuple(prepared.ids), tuple(to_jsonable(outcome.steps)), columns, analysed, undone, undone_columns)


def _observations(place: BlockPlace, store: BlockCache | None) -> Observations:
    """From the store when the block's entry is current, else recomputed (and kept beside the entry)."""
    job = place.job
    key = key_parts(job, place.options, library_versions()).key() if store is not None else None
    if store is not None and key is not None and store.lookup(key) is not None:
        raw = store.read_extra(key, _EXTRA)
        if raw is not None:
            try:
                return Observations.from_npz(raw)
            except (ValueError, KeyError, TypeError, OSError, EOFError):
                pass  # unreadable: recomputed and written again below
        found = compute_observations(job.spec, job.document.parent, place.options)
        try:
            store.write_extra(key, _EXTRA, found.to_npz())
        except (OSError, ValueError):
            pass
        return found
    return compute_observations(job.spec, job.document.parent, place.options)


def _chosen(document: Path, options: RenderOptions, block: str | None) -> tuple[list[BlockPlace], BlockCache | None]:
    places = block_places(document, options, None)
    chosen = [p for p in places if block is None or p.job.spec.id == block]
    if block is not None and not chosen:
        ids = ", ".join(p.job.spec.id for p in places) or "none"
        raise SpecError(f"the document has no block with id '{block}'.", hint=f"Block ids in {document.name}: {ids}.")
    return chosen, open_cache(document, options)


def _yes_no(value: Any) -> str:
    return "" if value is None else ("true" if value else "false")


def ledger_rows(document: Path, options: RenderOptions, block: str | None = None) -> tuple[tuple[str, ...], list[dict[str, Any]]]:
    """Every excluded or missing row of each block: its step, rule, reason, declarations and diagnostics.

    Diagnostics come from the refit with every exclusion put back (the
    sensitivity row "exclusions undone"); rows that fit could not use (missing
    values) have them blank.
    """
    chosen, store = _chosen(document, options, block)
    rows: list[dict[str, Any]] = []
    extra: list[str] = []
    for place in chosen:
        found = _observations(place, store)
        undone = {r[0]: dict(zip(found.undone_columns, r)) for r in found.undone or ()}
        extra += [c for c in found.undone_columns[1:] if c not in extra]
        position = {ident: i + 1 for i, ident in enumerate(found.ids_read)}
        for step in found.ledger:
            if step.get("kind") not in ("exclude", "missing"):
                continue
            for ident in step.get("removed_ids") or ():
                row: dict[str, Any] = {
                    "block": place.job.spec.id,
                    "step": step["kind"],
                    "id": ident,
                    "rule": step.get("rule", ""),
                    "reason": step.get("reason") or "",
                    "prespecified": _yes_no(step.get("prespecified")),
                    "category": step.get("category") or "",
                    "registration": step.get("registration") or "",
                    "row": position.get(ident, ""),
                }
                row.update({k: v for k, v in undone.get(ident, {}).items() if k not in ("id", "row")})
                rows.append(row)
    columns = LEDGER_COLUMNS + ("row",) + tuple(c for c in extra if c != "row")
    return columns, rows


def diagnostics_rows(document: Path, options: RenderOptions, block: str | None = None) -> tuple[tuple[str, ...], list[dict[str, Any]]]:
    """The per-observation diagnostics of every analysed row, one table over the chosen blocks."""
    chosen, store = _chosen(document, options, block)
    columns: list[str] = ["block"]
    rows: list[dict[str, Any]] = []
    for place in chosen:
        found = _observations(place, store)
        columns += [c for c in found.columns if c not in columns]
        rows += [{"block": place.job.spec.id, **dict(zip(found.columns, r))} for r in found.analysed]
    return tuple(columns), rows


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)  # shortest text that reads back to the same double
    return str(value)


def write_table(columns: tuple[str, ...], rows: list[dict[str, Any]], path: Path) -> None:
    """Write rows as CSV (``.csv``) or Parquet (``.parquet``), atomically; blanks for absent values."""
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        import io

        import pandas as pd

        frame = pd.DataFrame([[r.get(c) for c in columns] for r in rows], columns=list(columns))
        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        atomic_write_bytes(path, buffer.getvalue())
        return
    if suffix != ".csv":
        raise SpecError(f"cannot write '{path.name}': unknown table type '{suffix or '(none)'}'.", hint="Name the file .csv or .parquet.")
    import csv
    import io

    text = io.StringIO()
    writer = csv.writer(text, lineterminator="\n")
    writer.writerow(columns)
    writer.writerows([_cell(r.get(c)) for c in columns] for r in rows)
    atomic_write_bytes(path, text.getvalue().encode("utf-8"))
