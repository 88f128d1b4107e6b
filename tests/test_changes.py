"""The change log: a pure comparison of two result JSON dicts."""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import pytest

from premises.changes import DEFAULT_TOLERANCE, compare_results, format_change_log, pin_drift

EXAMPLE = Path(__file__).parent / "data" / "result_example.json"


def _result(
    *,
    sha: str = "a" * 64,
    spec: str = "s" * 64,
    analysed: list[str],
    excluded: dict[str, list[str]] | None = None,
    missing: list[str] | None = None,
    coefs: dict[str, tuple[float, float, float | None]] | None = None,
    se_used: str = "classical",
    verdicts: dict[str, str] | None = None,
    flagged: list[str] | None = None,
) -> dict[str, Any]:
    ledger: list[dict[str, Any]] = []
    for rule, ids in (excluded or {}).items():
        ledger.append({"kind": "exclude", "rule": rule, "matched": len(ids), "removed_ids": ids})
    if missing is not None:
        ledger.append({"kind": "missing", "rule": "missing in y, x", "matched": 0, "removed_ids": missing})
    rows = len(analysed) + sum(len(s["removed_ids"]) for s in ledger)
    return {
        "id": "b",
        "data": {"sha256": sha, "rows_read": rows},
        "ledger": ledger,
        "n_used": len(analysed),
        "analysed_ids": analysed,
        "coefficients": [
            {"term": t, "estimate": e, "se": se, "se_robust": rob} for t, (e, se, rob) in (coefs or {"x": (1.0, 1.0, None)}).items()
        ],
        "se_used": se_used,
        "checks": [{"assumption": a, "verdict": v} for a, v in (verdicts or {"normality": "holds"}).items()],
        "flagged": [{"id": i} for i in flagged or []],
        "provenance": {"fingerprint": "f" * 64, "spec_sha256": spec, "data_sha256": sha},
    }


def test_identical_results_report_nothing() -> None:
    example = json.loads(EXAMPLE.read_text(encoding="utf-8"))
    changes = compare_results(example, copy.deepcopy(example))
    assert not changes.any
    assert changes.rules == () and changes.moved == () and changes.verdicts == ()


def test_appended_rows_and_a_rule_that_starts_matching_are_named() -> None:
    before = _result(analysed=["p1", "p2", "p3"], excluded={"x > 100": []})
    after = _result(sha="b" * 64, analysed=["p1", "p2", "p3", "p4"], excluded={"x > 100": ["p5"]})
    changes = compare_results(before, after)
    assert changes.rows_added == ("p4", "p5")
    assert changes.rows_removed == ()
    assert changes.rows_read == (3, 5)
    (rule,) = changes.rules
    assert (rule.rule, rule.matched_before, rule.matched_after, rule.newly_matched) == ("x > 100", 0, 1, ("p5",))
    assert rule.note == "now matches rows"
    log = dict(changes.log())
    assert log["data_file"] == {"before": "a" * 12, "after": "b" * 12}
    assert log["rows_added"] == ["p4", "p5"]
    assert log["rules_matching_other_rows"][0]["note"] == "now matches rows"


def test_a_rule_that_no_longer_matches_and_removed_rows() -> None:
    before = _result(analysed=["p1", "p2"], excluded={"x > 100": ["p3"]}, missing=["p4"])
    after = _result(sha="b" * 64, analysed=["p1", "p2"], excluded={"x > 100": []}, missing=["p4"])
    changes = compare_results(before, after)
    assert changes.rows_removed == ("p3",)
    (rule,) = changes.rules  # the unchanged missing step is not listed
    assert rule.no_longer_matched == ("p3",) and rule.note == "no longer matches any row"


def test_missing_step_changes_are_listed_like_rules() -> None:
    before = _result(analysed=["p1", "p2", "p3"], missing=[])
    after = _result(sha="b" * 64, analysed=["p1", "p2"], missing=["p3"])
    (rule,) = compare_results(before, after).rules
    assert (rule.kind, rule.matched_before, rule.matched_after, rule.newly_matched) == ("missing", 0, 1, ("p3",))


def test_coefficient_moves_are_measured_in_the_earlier_reported_se() -> None:
    # shift = (after - before) / SE_before: (1.6 - 1.0) / 1.0 = 0.6 > 0.5; (2.4 - 2.0) / 1.0 = 0.4 is not listed.
    before = _result(analysed=["a"], coefs={"x": (1.0, 1.0, None), "z": (2.0, 1.0, None)})
    after = _result(analysed=["a"], coefs={"x": (1.6, 1.0, None), "z": (2.4, 1.0, None)})
    changes = compare_results(before, after)
    assert [m.term for m in changes.moved] == ["x"]
    assert changes.moved[0].shift_se == pytest.approx(0.6)
    # a tighter tolerance lists both
    assert [m.term for m in compare_results(before, after, tolerance=0.3).moved] == ["x", "z"]
    assert DEFAULT_TOLERANCE == 0.5


def test_robust_se_is_the_yardstick_when_the_block_reported_it() -> None:
    # se_used hc3: the robust SE 2.0 makes a move of 0.6 only 0.3 SE.
    before = _result(analysed=["a"], coefs={"x": (1.0, 1.0, 2.0)}, se_used="hc3")
    after = _result(analysed=["a"], coefs={"x": (1.6, 1.0, 2.0)}, se_used="hc3")
    assert compare_results(before, after).moved == ()


def test_verdicts_flags_and_terms() -> None:
    before = _result(analysed=["a"], verdicts={"normality": "holds", "variance": "holds"}, flagged=["p1", "p2"])
    after = _result(
        analysed=["a"],
        verdicts={"normality": "concern", "variance": "holds"},
        flagged=["p2", "p9"],
        coefs={"x": (1.0, 1.0, None), "w": (0.0, 1.0, None)},
    )
    changes = compare_results(before, after)
    assert [(v.assumption, v.before, v.after) for v in changes.verdicts] == [("normality", "holds", "concern")]
    assert changes.flagged_appeared == ("p9",) and changes.flagged_disappeared == ("p1",)
    assert changes.terms_added == ("w",)
    assert changes.any


def test_results_without_analysed_ids_give_no_row_lists() -> None:
    before = _result(analysed=["a"])
    before["analysed_ids"] = []
    changes = compare_results(before, _result(analysed=["a", "b"]))
    assert changes.rows_added is None and "rows_added" not in dict(changes.log())


def test_long_id_lists_are_capped_in_the_log() -> None:
    many = [f"p{i}" for i in range(40)]
    changes = compare_results(_result(analysed=["a"]), _result(analysed=["a", *many]))
    listed = dict(changes.log())["rows_added"]
    assert listed[:25] == many[:25] and listed[-1] == "... and 15 more"
    assert len(changes.rows_added or ()) == 40  # the structured result keeps them all


def test_pin_drift_lists_added_and_removed_ids() -> None:
    before = _result(analysed=["a"], excluded={"x > 1": ["p1", "p2"]})
    after = _result(analysed=["a"], excluded={"x > 1": ["p2", "p3"]})
    assert pin_drift(before, after, "x > 1") == (("p3",), ("p1",))
    assert pin_drift(before, before, "x > 1") is None
    assert pin_drift(before, after, "y < 0") is None  # nothing to be pinned to


def test_log_is_json_and_prints_as_lines() -> None:
    before = _result(analysed=["a"], excluded={"x > 100": []})
    after = _result(sha="b" * 64, analysed=["a", "b"], excluded={"x > 100": ["c"]}, coefs={"x": (3.0, 1.0, None)})
    log = compare_results(before, after).log()
    json.dumps(dict(log), allow_nan=False)
    lines = format_change_log(log)
    assert "Rows added: b; c" in lines
    assert any(line.startswith("Coefficients moved: term x") and "shift in se 2" in line for line in lines)
    assert any("rule x > 100" in line and "note now matches rows" in line for line in lines)
