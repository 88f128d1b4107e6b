"""Readings of a block's result for the section's text: what the templates ask of the JSON.

The templates see the result as JSON; the helpers here read it the way the
prose needs: coefficients of logged terms restated on the original scale,
whether the reported standard error was chosen from the data, the decimals of
the sensitivity table, threshold rows, the change log, how each assumption was
assessed. They are the globals and filters of :mod:`premises.render`. No
statistics library is imported.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from premises.guidelines import GuidelineRow, map_guidelines
from premises.markup import code_span, escape_markdown, phrase, upper_first
from premises.numbers import FILTERS, LogEffect, decimals_for_se, log_effect

ASSUMPTION_TITLES: dict[str, str] = {
    "outcome": "Outcome scale",
    "linearity": "Linearity",
    "normality": "Normality of residuals",
    "variance": "Equal variance",
    "influence": "Influential observations",
    "independence": "Independence",
    "collinearity": "Collinearity",
}
# Graded wording: a verdict reports how much a departure matters, not a pass/fail.
VERDICT_LABELS: dict[str, str] = {
    "holds": "no material departure",
    "concern": "possible departure",
    "violated": "clear departure",
    "not-assessed": "not assessed",
}

_LOG_CALL = re.compile(r"^\s*(log|ln|log2|log10)\s*\(\s*([^()]+?)\s*\)\s*$")
_BASES = {"log": math.e, "ln": math.e, "log2": 2.0, "log10": 10.0}


def _logged_names(block: Mapping[str, Any]) -> dict[str, tuple[float, str]]:
    """Map each model name that holds a logged column to (base, source column).

    Read from the ledger's transform steps: the rule text (``log2(water)``),
    the column written (``target``) and the source ``column``.
    """
    names: dict[str, tuple[float, str]] = {}
    for step in block.get("ledger", ()):
        if step.get("kind") != "transform":
            continue
        match = _LOG_CALL.match(str(step.get("rule", "")))
        if not match:
            continue
        base, column = _BASES[match.group(1)], str(step.get("column") or match.group(2))
        for name in (step.get("rule"), step.get("target")):
            if name:
                names[str(name).replace(" ", "")] = (base, column)
    return names


def _log_of(name: str, logged: Mapping[str, tuple[float, str]]) -> tuple[float, str] | None:
    key = name.replace(" ", "")
    if key in logged:
        return logged[key]
    match = _LOG_CALL.match(name)
    return (_BASES[match.group(1)], match.group(2)) if match else None


def log_effects(block: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Coefficients of logged terms (or of every term when the outcome is logged),
    restated on the original scale.

    Parameters
    ----------
    block
        The result dict; reads ``fit.outcome``, ``ledger`` and ``coefficients``.

    Returns
    -------
    list of dict
        One entry per coefficient that needs restating: ``term``, ``column``
        (the logged source column, or None), ``outcome`` (the outcome column),
        ``outcome_logged``, and the fields of :class:`premises.numbers.LogEffect`.
    """
    logged = _logged_names(block)
    outcome_name = str(block["fit"]["outcome"])
    outcome_log = _log_of(outcome_name, logged)
    out: list[dict[str, Any]] = []
    for coef in block["coefficients"]:
        term = str(coef["term"])
        if term == "Intercept":
            continue
        predictor_log = _log_of(term, logged)
        if coef.get("estimate") is None:
            continue
        low, high = coef.get("ci_low"), coef.get("ci_high")
        has_ci = low is not None and high is not None
        effect: LogEffect | None = log_effect(
            coef["estimate"],
            low if has_ci else coef["estimate"],
            high if has_ci else coef["estimate"],
            outcome_base=outcome_log[0] if outcome_log else None,
            predictor_base=predictor_log[0] if predictor_log else None,
        )
        if effect is None:
            continue
        out.append(
            {
                "term": term,
                "column": predictor_log[1] if predictor_log else None,
                "outcome": outcome_log[1] if outcome_log else outcome_name,
                "outcome_logged": outcome_log is not None,
                "kind": effect.kind,
                "value": effect.value,
                "low": effect.low if has_ci else None,
                "high": effect.high if has_ci else None,
                "factor": effect.factor,
                "doubling_pct": effect.doubling_pct,
            }
        )
    return out


def se_data_driven(block: Mapping[str, Any]) -> bool:
    """Was the reported robust SE chosen by looking at the residuals (``se: auto``)?

    Reads an explicit ``se_data_driven`` field when the result has one. Otherwise
    a declared choice is one whose ``se_reason`` starts with "declared", and a
    cluster SE follows from declared groups, so only an HC3 choice whose reason
    is not a declaration counts as data-driven.
    """
    if "se_data_driven" in block:
        return bool(block["se_data_driven"])
    reason = str(block.get("se_reason", "")).strip().lower()
    return block.get("se_used") == "hc3" and not reason.startswith("declared")


def se_ratio_range(block: Mapping[str, Any]) -> tuple[float, float] | None:
    """Smallest and largest robust/classical SE ratio over the coefficients."""
    ratios = [
        c["se_robust"] / c["se"]
        for c in block["coefficients"]
        if c.get("se_robust") is not None and c.get("se")
    ]
    return (min(ratios), max(ratios)) if ratios else None


def _reported_se(block: Mapping[str, Any], coef: Mapping[str, Any]) -> float | None:
    """The SE behind a reported coefficient's interval (robust where the block uses it)."""
    if block.get("se_used") != "classical" and coef.get("se_robust") is not None:
        return float(coef["se_robust"])
    se = coef.get("se")
    return float(se) if se is not None else None


def sensitivity_decimals(block: Mapping[str, Any]) -> dict[tuple[int, str], int]:
    """Decimals for each (row, term) cell of the sensitivity table.

    A cell on the reported scale (its SE within a factor of 10 of the reported
    one) uses the coefficient table's decimals for that term, so the same
    estimate prints the same way in both tables; a cell on another scale (a
    log-outcome alternative) shows its own SE to two significant digits.
    """
    reported = {str(c["term"]): _reported_se(block, c) for c in block["coefficients"]}
    out: dict[tuple[int, str], int] = {}
    for i, row in enumerate(block.get("sensitivity", ())):
        for c in row["coefficients"]:
            term = str(c["term"])
            lo, hi = c.get("ci_low"), c.get("ci_high")
            se = (hi - lo) / 3.92 if lo is not None and hi is not None else c.get("se")
            ref = reported.get(term)
            same_scale = bool(se and ref and 0.1 <= se / ref <= 10)
            out[(i, term)] = decimals_for_se(ref if same_scale else se)
    return out


def by_term(coefficients: Sequence[Mapping[str, Any]]) -> dict[str, Mapping[str, Any]]:
    return {str(c["term"]): c for c in coefficients}


def focal_terms(block: Mapping[str, Any]) -> list[str]:
    """Terms shown in the sensitivity table: every term but the intercept."""
    return [str(c["term"]) for c in block["coefficients"] if c["term"] != "Intercept"]


def figures_for(block: Mapping[str, Any], finding: Mapping[str, Any]) -> list[str]:
    ids = [
        str(f["id"])
        for f in block.get("figures", ())
        if f.get("assumption") == finding["assumption"]
    ]
    if finding.get("figure") and finding["figure"] not in ids:
        ids.insert(0, str(finding["figure"]))
    return ids


def largest_dfbetas(point: Mapping[str, Any]) -> tuple[str, float] | None:
    dfb = point.get("dfbetas") or {}
    term = point.get("largest_term")
    if term is None:
        finite = {k: v for k, v in dfb.items() if v is not None}
        if not finite:
            return None
        term = max(finite, key=lambda k: abs(finite[k]))
    value = dfb.get(term)
    return (str(term), float(value)) if value is not None else None


def _change_value(value: Any) -> str:
    """One change-log value as Markdown text, whatever its JSON shape."""
    if value is None:
        return "none"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return FILTERS["fmt_int"](value)
    if isinstance(value, float):
        return FILTERS["fmt_num"](value)
    if isinstance(value, Mapping):
        lead_key = next(
            (k for k in ("term", "rule", "assumption", "column", "id") if k in value), None
        )
        parts = [
            f"{str(k).replace('_', ' ')} {_change_value(v)}"
            for k, v in value.items()
            if k != lead_key
        ]
        lead = code_span(value[lead_key]) + ": " if lead_key else ""
        return lead + ", ".join(parts)
    if isinstance(value, (list, tuple)):
        return "; ".join(_change_value(v) for v in value) if value else "none"
    return escape_markdown(value)


def change_items(block: Mapping[str, Any]) -> list[tuple[str, str]]:
    log = block.get("change_log") or {}
    return [(str(k).replace("_", " ").capitalize(), _change_value(v)) for k, v in log.items()]


def se_label(kind: Any) -> str:
    """Display name of a standard-error kind: ``hc3`` -> ``HC3``, ``cluster`` -> ``cluster-robust``."""
    text = str(kind or "robust")
    if re.fullmatch(r"(?i)hc[0-5]", text):
        return text.upper()
    return {"cluster": "cluster-robust", "classical": "classical"}.get(text.lower(), text)


_COMPARISON = re.compile(r"^\s*(<=|>=|==|!=|<|>|\u2264|\u2265)\s*(.*)$")
_SHOWN_AS = {"<=": "\u2264", ">=": "\u2265", "==": "="}


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def threshold_rule(threshold: Mapping[str, Any]) -> str:
    """A threshold as a rule in Markdown: ``Cook's distance > 4/n``, ``VIF > 10``,
    ``count mean < 10`` (the expression may carry its own comparison)."""
    name, expression = str(threshold["name"]), str(threshold["expression"]).strip()
    match = _COMPARISON.match(expression)
    if match:
        op, rest = match.group(1), match.group(2)
        return f"{escape_markdown(name)} {_SHOWN_AS.get(op, op)} {escape_markdown(rest)}"
    if re.search(r"<=|>=|<|>", expression):
        return f"{escape_markdown(name)}: {escape_markdown(expression)}"
    if name.strip().lower() in ("alpha", "\u03b1"):
        return f"\u03b1 = {escape_markdown(expression)}"
    return f"{escape_markdown(name)} > {escape_markdown(expression)}"


def threshold_value(threshold: Mapping[str, Any]) -> str:
    """The threshold's value for this fit (a fixed cut-off prints as itself)."""
    return FILTERS["fmt_num"](threshold.get("value"))


def citation(origin: Any) -> str:
    """An origin for a table cell or parentheses: "Hoaglin & Welsch (1978)" becomes
    "Hoaglin & Welsch, 1978" (APA inside parentheses)."""
    return escape_markdown(re.sub(r"\s\((\d{4}[a-z]?)\)", r", \1", str(origin or "")))


_METHOD_SUBJECTS: dict[str, str] = {"influence": "The influence of single observations"}


def method_sentence(assumption: str, method: Any) -> str:
    """How an assumption was assessed, as one sentence (plain text, not escaped).

    A check may give a noun phrase ("a Q-Q plot of …") or a whole clause
    ("normality was assessed from …"); both read as a sentence.
    """
    title = ASSUMPTION_TITLES.get(assumption, assumption.replace("-", " ").capitalize())
    subject = _METHOD_SUBJECTS.get(assumption, title)
    text = " ".join(str(method or "").split()).rstrip(".")
    if not text:
        return f"The method used to assess {subject[0].lower() + subject[1:]} was not recorded."
    if re.search(r"\b(was|were|is|are)\b", text):
        return upper_first(text) + "."
    return f"{subject} was assessed by {phrase(text)}."


def evidence(finding: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    """The measure, then the statistics, each (name, value, p) once."""
    out: list[Mapping[str, Any]] = []
    seen: set[tuple[str, Any, Any]] = set()
    for st in [finding.get("measure"), *finding.get("statistics", ())]:
        if not st:
            continue
        key = (str(st.get("name")), st.get("value"), st.get("p"))
        if key not in seen:
            seen.add(key)
            out.append(st)
    return out


def guideline_rows(block: Mapping[str, Any]) -> tuple[GuidelineRow, ...]:
    return map_guidelines(block)
