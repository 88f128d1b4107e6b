"""What changed between two renders of a block: a pure comparison of two result JSON dicts.

The change log answers the questions a reader of a refreshed report asks: did
the data file change, which rows arrived or left, which exclusion rules now
match other rows (a rule that starts matching rows, or stops matching any, is
how drift shows), which observations became or stopped being flagged, which
coefficients moved by more than a tolerance in standard-error units, and which
verdicts changed. It reads only the public result JSON, so it works on cached
results as well as fresh ones.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = [
    "DEFAULT_TOLERANCE",
    "Changes",
    "CoefficientMove",
    "RuleChange",
    "VerdictChange",
    "compare_results",
    "format_change_log",
    "pin_drift",
]

DEFAULT_TOLERANCE = 0.5
"""Coefficient moves at or below this many standard errors are not reported (common practice
for a "material" shift is 0.5-1 SE; the tolerance is configurable with ``--tolerance``)."""

ID_LIMIT = 25
"""Longest id list written into a change log; longer lists end with "... and N more"."""


@dataclass(frozen=True)
class RuleChange:
    """A ledger step (exclusion rule or missing-value drop) that matched other rows."""

    rule: str
    kind: str
    """``exclude`` or ``missing``."""
    matched_before: int | None
    """None: the rule is new."""
    matched_after: int | None
    """None: the rule was removed."""
    newly_matched: tuple[str, ...]
    no_longer_matched: tuple[str, ...]

    @property
    def note(self) -> str | None:
        """The drift in words, when a rule starts or stops matching rows."""
        if self.matched_before is None:
            return "new rule"
        if self.matched_after is None:
            return "rule removed"
        if self.matched_before == 0 and self.matched_after > 0:
            return "now matches rows"
        if self.matched_before > 0 and self.matched_after == 0:
            return "no longer matches any row"
        return None


@dataclass(frozen=True)
class CoefficientMove:
    """A coefficient that moved by more than the tolerance (in the earlier render's SEs)."""

    term: str
    before: float
    after: float
    shift_se: float
    """(after - before) / SE before, with the SE the earlier render reported."""


@dataclass(frozen=True)
class VerdictChange:
    """An assumption whose verdict changed."""

    assumption: str
    before: str
    after: str


@dataclass(frozen=True)
class Changes:
    """Every difference between an earlier and a later result of one block."""

    previous_fingerprint: str
    data_before: str
    data_after: str
    spec_changed: bool
    rows_read: tuple[int, int]
    rows_analysed: tuple[int, int]
    rows_added: tuple[str, ...] | None
    """None when an earlier result does not list its analysed ids."""
    rows_removed: tuple[str, ...] | None
    rules: tuple[RuleChange, ...]
    flagged_appeared: tuple[str, ...]
    flagged_disappeared: tuple[str, ...]
    moved: tuple[CoefficientMove, ...]
    terms_added: tuple[str, ...]
    terms_removed: tuple[str, ...]
    verdicts: tuple[VerdictChange, ...]
    se_used: tuple[str, str]
    tolerance: float

    @property
    def any(self) -> bool:
        """True when the inputs or the results differ in any way the log reports."""
        return bool(
            self.data_before != self.data_after
            or self.spec_changed
            or self.rows_read[0] != self.rows_read[1]
            or self.rows_analysed[0] != self.rows_analysed[1]
            or self.rows_added
            or self.rows_removed
            or self.rules
            or self.flagged_appeared
            or self.flagged_disappeared
            or self.moved
            or self.terms_added
            or self.terms_removed
            or self.verdicts
            or self.se_used[0] != self.se_used[1]
        )

    def log(self) -> tuple[tuple[str, Any], ...]:
        """The change log as (name, JSON value) pairs, for ``BlockResult.change_log``.

        Only what changed is listed, except the coefficient line, which says
        "none" when nothing moved beyond the tolerance (that is news too).
        """
        out: list[tuple[str, Any]] = [("previous_fingerprint", self.previous_fingerprint[:12])]
        if self.data_before != self.data_after:
            out.append(("data_file", {"before": self.data_before[:12], "after": self.data_after[:12]}))
        if self.spec_changed:
            out.append(("spec", "changed"))
        for name, (a, b) in (("rows_read", self.rows_read), ("rows_analysed", self.rows_analysed)):
            if a != b:
                out.append((name, {"before": a, "after": b}))
        if self.rows_added:
            out.append(("rows_added", _cap(self.rows_added)))
        if self.rows_removed:
            out.append(("rows_removed", _cap(self.rows_removed)))
        if self.rules:
            out.append(("rules_matching_other_rows", [_rule_json(r) for r in self.rules]))
        if self.flagged_appeared:
            out.append(("newly_flagged", _cap(self.flagged_appeared)))
        if self.flagged_disappeared:
            out.append(("no_longer_flagged", _cap(self.flagged_disappeared)))
        out.append(
            (
                "coefficients_moved",
                [{"term": m.term, "before": m.before, "after": m.after, "shift_in_se": m.shift_se} for m in self.moved],
            )
        )
        out.append(("tolerance_in_se", self.tolerance))
        if self.terms_added:
            out.append(("terms_added", list(self.terms_added)))
        if self.terms_removed:
            out.append(("terms_removed", list(self.terms_removed)))
        if self.verdicts:
            out.append(("verdicts_changed", [{"assumption": v.assumption, "before": v.before, "after": v.after} for v in self.verdicts]))
        if self.se_used[0] != self.se_used[1]:
            out.append(("standard_errors", {"before": self.se_used[0], "after": self.se_used[1]}))
        return tuple(out)


def _cap(ids: Sequence[str]) -> list[str]:
    if len(ids) <= ID_LIMIT:
        return list(ids)
    return [*ids[:ID_LIMIT], f"... and {len(ids) - ID_LIMIT} more"]


def _rule_json(change: RuleChange) -> dict[str, Any]:
    out: dict[str, Any] = {
        "rule": change.rule,
        "matched_before": change.matched_before,
        "matched_after": change.matched_after,
    }
    if change.newly_matched:
        out["newly_matched"] = _cap(change.newly_matched)
    if change.no_longer_matched:
        out["no_longer_matched"] = _cap(change.no_longer_matched)
    if change.note:
        out["note"] = change.note
    return out


def _steps(result: Mapping[str, Any], kind: str) -> list[Mapping[str, Any]]:
    return [s for s in result.get("ledger") or () if s.get("kind") == kind]


def _all_ids(result: Mapping[str, Any]) -> set[str] | None:
    """Ids of every row read: analysed plus removed by a ledger step (None if not recorded)."""
    analysed = result.get("analysed_ids")
    if not analysed and result.get("n_used"):
        return None
    out = set(analysed or ())
    for step in result.get("ledger") or ():
        out.update(step.get("removed_ids") or ())
    return out


def _ordered(ids: set[str], *orders: Sequence[str]) -> tuple[str, ...]:
    """``ids`` in the order they appear in ``orders`` (file order), then sorted for the rest."""
    # dict keys: ordered, with O(1) membership (a list made this quadratic in the ids changed)
    seen: dict[str, None] = {}
    for order in orders:
        for i in order:
            if i in ids and i not in seen:
                seen[i] = None
    return tuple(seen) + tuple(sorted(ids - seen.keys()))


def _file_order(result: Mapping[str, Any]) -> list[str]:
    out = list(result.get("analysed_ids") or ())
    for step in result.get("ledger") or ():
        out.extend(step.get("removed_ids") or ())
    return out


def _pair_steps(before: Mapping[str, Any], after: Mapping[str, Any]) -> list[tuple[Mapping[str, Any] | None, Mapping[str, Any] | None]]:
    """Match exclusion steps by rule text (in order for repeated texts); missing steps by kind."""
    pairs: list[tuple[Mapping[str, Any] | None, Mapping[str, Any] | None]] = []
    old = _steps(before, "exclude")
    used: set[int] = set()
    for step in _steps(after, "exclude"):
        match = next((i for i, s in enumerate(old) if i not in used and s.get("rule") == step.get("rule")), None)
        if match is not None:
            used.add(match)
        pairs.append((old[match] if match is not None else None, step))
    pairs += [(s, None) for i, s in enumerate(old) if i not in used]
    old_missing, new_missing = _steps(before, "missing"), _steps(after, "missing")
    if old_missing or new_missing:
        pairs.append((old_missing[0] if old_missing else None, new_missing[0] if new_missing else None))
    return pairs


def _rule_changes(before: Mapping[str, Any], after: Mapping[str, Any]) -> tuple[RuleChange, ...]:
    out = []
    for old, new in _pair_steps(before, after):
        old_ids = tuple(old.get("removed_ids") or ()) if old else ()
        new_ids = tuple(new.get("removed_ids") or ()) if new else ()
        old_count = _matched(old)
        new_count = _matched(new)
        if old is not None and new is not None and set(old_ids) == set(new_ids) and old_count == new_count:
            continue
        step = new or old
        assert step is not None
        out.append(
            RuleChange(
                rule=str(step.get("rule", "")),
                kind=str(step.get("kind", "")),
                matched_before=old_count,
                matched_after=new_count,
                newly_matched=tuple(i for i in new_ids if i not in set(old_ids)),
                no_longer_matched=tuple(i for i in old_ids if i not in set(new_ids)),
            )
        )
    return tuple(out)


def _matched(step: Mapping[str, Any] | None) -> int | None:
    if step is None:
        return None
    if step.get("kind") == "exclude":
        return int(step.get("matched") or len(step.get("removed_ids") or ()))
    return len(step.get("removed_ids") or ())


def _reported_se(coef: Mapping[str, Any], se_used: str) -> float | None:
    se = coef.get("se") if se_used == "classical" else coef.get("se_robust")
    if se is None:
        se = coef.get("se")
    return float(se) if se is not None else None


def _moves(before: Mapping[str, Any], after: Mapping[str, Any], tolerance: float) -> tuple[CoefficientMove, ...]:
    old = {c["term"]: c for c in before.get("coefficients") or ()}
    se_used = str(before.get("se_used", "classical"))
    out = []
    for coef in after.get("coefficients") or ():
        ref = old.get(coef["term"])
        if ref is None or ref.get("estimate") is None or coef.get("estimate") is None:
            continue
        se = _reported_se(ref, se_used)
        delta = float(coef["estimate"]) - float(ref["estimate"])
        if se is None or not math.isfinite(se) or se <= 0:
            continue
        shift = delta / se
        if abs(shift) > tolerance:
            out.append(CoefficientMove(str(coef["term"]), float(ref["estimate"]), float(coef["estimate"]), shift))
    return tuple(out)


def _terms(result: Mapping[str, Any]) -> list[str]:
    return [str(c["term"]) for c in result.get("coefficients") or ()]


def _verdicts(before: Mapping[str, Any], after: Mapping[str, Any]) -> tuple[VerdictChange, ...]:
    old = {f["assumption"]: f.get("verdict") for f in before.get("checks") or ()}
    out = []
    for finding in after.get("checks") or ():
        name = finding["assumption"]
        if name in old and old[name] != finding.get("verdict"):
            out.append(VerdictChange(str(name), str(old[name]), str(finding.get("verdict"))))
    return tuple(out)


def _flagged(result: Mapping[str, Any]) -> list[str]:
    return [str(p["id"]) for p in result.get("flagged") or ()]


def compare_results(before: Mapping[str, Any], after: Mapping[str, Any], tolerance: float = DEFAULT_TOLERANCE) -> Changes:
    """Compare two result JSON dicts of the same block (earlier first).

    Parameters
    ----------
    before, after
        ``results.to_jsonable(BlockResult)`` of the earlier and the later render.
    tolerance
        Coefficient moves of more than this many standard errors (the SE the
        earlier render reported) are listed.

    Examples
    --------
    >>> changes = compare_results(last_json, new_json)  # doctest: +SKIP
    >>> dict(changes.log())["rows_added"]  # doctest: +SKIP
    ['P181', 'P182']
    """
    old_prov, new_prov = before.get("provenance") or {}, after.get("provenance") or {}
    old_ids, new_ids = _all_ids(before), _all_ids(after)
    order = _file_order(after) + _file_order(before)
    added = _ordered(new_ids - old_ids, order) if old_ids is not None and new_ids is not None else None
    removed = _ordered(old_ids - new_ids, order) if old_ids is not None and new_ids is not None else None
    old_flags, new_flags = _flagged(before), _flagged(after)
    old_terms, new_terms = _terms(before), _terms(after)
    return Changes(
        previous_fingerprint=str(old_prov.get("fingerprint", "")),
        data_before=str((before.get("data") or {}).get("sha256", "")),
        data_after=str((after.get("data") or {}).get("sha256", "")),
        spec_changed=old_prov.get("spec_sha256") != new_prov.get("spec_sha256"),
        rows_read=(int((before.get("data") or {}).get("rows_read", 0)), int((after.get("data") or {}).get("rows_read", 0))),
        rows_analysed=(int(before.get("n_used", 0)), int(after.get("n_used", 0))),
        rows_added=added,
        rows_removed=removed,
        rules=_rule_changes(before, after),
        flagged_appeared=tuple(i for i in new_flags if i not in set(old_flags)),
        flagged_disappeared=tuple(i for i in old_flags if i not in set(new_flags)),
        moved=_moves(before, after, tolerance),
        terms_added=tuple(t for t in new_terms if t not in old_terms),
        terms_removed=tuple(t for t in old_terms if t not in new_terms),
        verdicts=_verdicts(before, after),
        se_used=(str(before.get("se_used", "")), str(after.get("se_used", ""))),
        tolerance=tolerance,
    )


def pin_drift(before: Mapping[str, Any], after: Mapping[str, Any], rule: str) -> tuple[tuple[str, ...], tuple[str, ...]] | None:
    """Ids a pinned rule newly matches and no longer matches, or None when the set is unchanged.

    The rule is found by its text in both ledgers; a rule absent from the
    earlier result has nothing to be pinned to (None).
    """
    old = next((s for s in _steps(before, "exclude") if s.get("rule") == rule), None)
    new = next((s for s in _steps(after, "exclude") if s.get("rule") == rule), None)
    if old is None or new is None:
        return None
    old_ids, new_ids = list(old.get("removed_ids") or ()), list(new.get("removed_ids") or ())
    added = tuple(i for i in new_ids if i not in set(old_ids))
    removed = tuple(i for i in old_ids if i not in set(new_ids))
    return (added, removed) if added or removed else None


def _text(value: Any) -> str:
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, Mapping):
        return ", ".join(f"{str(k).replace('_', ' ')} {_text(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return "; ".join(_text(v) for v in value) if value else "none"
    return str(value)


def format_change_log(log: Sequence[tuple[str, Any]] | Mapping[str, Any]) -> list[str]:
    """The change log as plain text lines, one per entry (``premises diff``).

    >>> format_change_log([("rows_added", ["P181", "P182"])])
    ['Rows added: P181; P182']
    """
    items = list(log.items()) if isinstance(log, Mapping) else list(log)
    return [f"{name.replace('_', ' ').capitalize()}: {_text(value)}" for name, value in items]
