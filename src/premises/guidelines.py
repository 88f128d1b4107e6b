"""Reporting guidelines: which of their items the generated section addresses, and where.

For each guideline a block lists under ``guidelines`` (``jars``, ``sampl``,
``strobe``), :func:`map_guidelines` walks a table of items and gives each a
status read from the result JSON:

- ``met``: the section reports it; ``where`` names the table, figure or part;
- ``not applicable``: the result shows the item has nothing to report
  (no transforms, no exclusions, no interaction terms);
- ``not declared``: only the author knows (a pre-registration, the alpha of
  the hypotheses, how missingness arose) and the block does not say;
- ``not addressed``: the tool could have reported it but this run did not
  (the check was switched off).

The tool never guesses a fact the author did not declare. A declaration is
written in the block as a mapping from item code to text under the guideline's
name (``guidelines: {sampl: {"10": "No adjustment: one primary coefficient."}}``),
and reaches the result JSON as ``guidelines[<name>][<code>]``.

Items are from NEEDS.md section 1 (project research notes):
JARS-Quant, Appelbaum et al. (2018), *Am Psychol* 73:3-25, Table 1;
SAMPL, Lang & Altman (2013/2015) and Lang (2007), *Chest* 131:628-632 for the
regression items (from memory); STROBE, von Elm et al. (2007), items 11-17.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from premises.errors import RenderError

__all__ = [
    "GUIDELINE_ITEMS",
    "GUIDELINE_NAMES",
    "GuidelineItem",
    "GuidelineRow",
    "map_guidelines",
]

Block = Mapping[str, Any]
Assessment = tuple[str, tuple[str, ...], str]
"""(status, where, note): ``where`` holds cross-reference ids (``tbl-…``,
``fig-…``) or part names (``methods``, ``reproducibility``, ``cautions``)."""

GUIDELINE_NAMES: dict[str, str] = {
    "jars": "JARS-Quant",
    "sampl": "SAMPL",
    "strobe": "STROBE",
}
"""Display name of each guideline key."""


@dataclass(frozen=True, slots=True)
class GuidelineItem:
    """One item of a reporting guideline and how to tell whether the section meets it."""

    guideline: str
    code: str
    """The item's number or short code, as the guideline numbers it."""
    text: str
    """What the item asks for, in a few words."""
    assess: Callable[[Block], Assessment]


@dataclass(frozen=True, slots=True)
class GuidelineRow:
    """One line of the guideline map."""

    guideline: str
    """Display name (``JARS-Quant``)."""
    code: str
    text: str
    status: str
    """``met``, ``not applicable``, ``not declared`` or ``not addressed``."""
    where: tuple[str, ...]
    note: str = ""


# --- what the result shows ------------------------------------------------------------


def _tbl(block: Block, name: str) -> str:
    return f"tbl-{block['id']}-{name}"


def _steps(block: Block, kind: str) -> list[Mapping[str, Any]]:
    return [s for s in block.get("ledger", ()) if s.get("kind") == kind]


def _finding(block: Block, assumption: str) -> Mapping[str, Any] | None:
    for finding in block.get("checks", ()):
        if finding.get("assumption") == assumption:
            found: Mapping[str, Any] = finding
            return found
    return None


def _check_item(assumption: str, *extra_where: str) -> Callable[[Block], Assessment]:
    """Met where the check ran; not addressed where it was off or could not run."""

    def assess(block: Block) -> Assessment:
        finding = _finding(block, assumption)
        if finding is None:
            return ("not addressed", (), f"the {assumption} check was not run")
        if finding.get("verdict") == "not-assessed":
            return ("not addressed", (_tbl(block, "assumptions"),), finding.get("reason") or "")
        where = [_tbl(block, "assumptions")]
        if finding.get("figure"):
            where.append(str(finding["figure"]))
        where += [w.format(id=block["id"]) for w in extra_where]
        return ("met", tuple(where), "")

    return assess


def _always(*where: str, note: str = "") -> Callable[[Block], Assessment]:
    def assess(block: Block) -> Assessment:
        return ("met", tuple(w.format(id=block["id"]) for w in where), note)

    return assess


def _declared_only(block: Block) -> Assessment:
    return ("not declared", (), "")


def _exclusion_criteria(block: Block) -> Assessment:
    steps = _steps(block, "exclude")
    if not steps:
        return ("not applicable", (_tbl(block, "ledger"),), "no exclusion rules")
    if any(not s.get("reason") for s in steps):
        return ("not declared", (_tbl(block, "ledger"),), "a rule has no reason")
    return ("met", (_tbl(block, "ledger"),), "")


def _prespecification(block: Block) -> Assessment:
    # Pre-registration status is the author's fact: absent means "not declared".
    steps = _steps(block, "exclude") + _steps(block, "transform")
    if not steps:
        return ("not applicable", (), "no exclusions or transforms")
    undeclared = [s for s in steps if s.get("prespecified") is None]
    if undeclared:
        rules = ", ".join(str(s.get("rule", "")) for s in undeclared)
        return (
            "not declared",
            (_tbl(block, "ledger"),),
            f"pre-specification not declared for: {rules}",
        )
    return ("met", (_tbl(block, "ledger"),), "")


def _transformations(block: Block) -> Assessment:
    steps = _steps(block, "transform")
    if not steps:
        return ("not applicable", (), "no transformations")
    if any(not s.get("reason") for s in steps):
        rules = ", ".join(str(s.get("rule", "")) for s in steps if not s.get("reason"))
        return (
            "not declared",
            (_tbl(block, "ledger"), "methods"),
            f"reason not declared for: {rules}",
        )
    return ("met", (_tbl(block, "ledger"), "methods"), "")


def _missing_per_variable(block: Block) -> Assessment:
    steps = _steps(block, "missing")
    if not steps:
        return ("met", (_tbl(block, "ledger"),), "no rows were lost to missing values")
    return ("met", (_tbl(block, "ledger"),), "")


def _sensitivity(block: Block) -> Assessment:
    if not block.get("sensitivity"):
        return ("not addressed", (), "no sensitivity analyses in this run")
    return ("met", (_tbl(block, "sensitivity"),), "data-driven rows are labelled")


def _outliers(block: Block) -> Assessment:
    status, where, note = _check_item("influence")(block)
    if status != "met":
        return (status, where, note)
    extra = [_tbl(block, "flagged")] if block.get("flagged") else []
    extra += [_tbl(block, "sensitivity")] if block.get("sensitivity") else []
    return ("met", where + tuple(extra), "flagged points are reported, not removed")


def _interactions(block: Block) -> Assessment:
    formula = str(block.get("model", ""))
    rhs = formula.split("~", 1)[-1]
    if ":" in rhs or "*" in rhs:
        return ("met", ("methods", _tbl(block, "coefficients")), "")
    return ("not applicable", ("methods",), "the model has no interaction terms")


def _sidedness(block: Block) -> Assessment:
    # The coefficient p values are two-sided t tests: a fact of the tool, not a guess.
    return ("met", (_tbl(block, "coefficients"),), "p values are two-sided")


# --- the items --------------------------------------------------------------------------

_ITEMS: tuple[tuple[str, str, str, Callable[[Block], Assessment]], ...] = (
    # JARS-Quant, Table 1 (Appelbaum et al. 2018), Method and Results.
    (
        "jars",
        "exclusions",
        "Criteria for post-collection exclusion of observations",
        _exclusion_criteria,
    ),
    (
        "jars",
        "registration",
        "Exclusions and transforms marked pre-specified or not",
        _prespecification,
    ),
    ("jars", "missing", "Amount of missing data and how it was handled", _missing_per_variable),
    ("jars", "outliers", "Definition and processing of statistical outliers", _outliers),
    ("jars", "distributions", "Analyses of data distributions", _check_item("normality")),
    ("jars", "transformations", "Data transformations", _transformations),
    ("jars", "strategy", "Analytic strategy for inferential statistics", _always("methods")),
    ("jars", "hypotheses", "Primary, secondary and exploratory hypotheses", _declared_only),
    ("jars", "sample-size", "Intended sample size and how it was set", _declared_only),
    ("jars", "flow", "Numbers at each stage of the analysis", _always("tbl-{id}-ledger")),
    (
        "jars",
        "assumptions",
        "Problems with assumptions that could affect validity",
        _always("tbl-{id}-assumptions"),
    ),
    ("jars", "effects", "Effect sizes with confidence intervals", _always("tbl-{id}-coefficients")),
    (
        "jars",
        "ancillary",
        "Sensitivity analyses, planned and unplanned distinguished",
        _sensitivity,
    ),
    # SAMPL (Lang & Altman), numbered items, and regression items from Lang (2007).
    (
        "sampl",
        "1",
        "Methods detailed enough to verify the results with the data",
        _always("methods", "reproducibility"),
    ),
    ("sampl", "3", "Transformations of the raw data", _transformations),
    (
        "sampl",
        "9",
        "Data conform to the assumptions of the method",
        _always("tbl-{id}-assumptions"),
    ),
    ("sampl", "9c", "The relationship analysed is linear", _check_item("linearity")),
    ("sampl", "10", "Allowance for multiple comparisons", _declared_only),
    ("sampl", "11", "Treatment of outlying data", _outliers),
    ("sampl", "12", "One- or two-sided tests", _sidedness),
    ("sampl", "13", "Alpha level for the hypotheses", _declared_only),
    ("sampl", "14", "Statistical software", _always("reproducibility")),
    ("sampl", "R1", "Collinearity assessed", _check_item("collinearity")),
    (
        "sampl",
        "R2",
        "Coefficients with CIs and p values; goodness of fit",
        _always("tbl-{id}-coefficients"),
    ),
    ("sampl", "R3", "Whether and how the model was validated", _declared_only),
    # STROBE (von Elm et al. 2007).
    (
        "strobe",
        "11",
        "How quantitative variables were handled",
        _always("methods", "tbl-{id}-ledger"),
    ),
    ("strobe", "12a", "All statistical methods", _always("methods")),
    ("strobe", "12b", "Subgroups and interactions", _interactions),
    ("strobe", "12c", "How missing data were addressed", _missing_per_variable),
    ("strobe", "12c-reasons", "Why data are missing", _declared_only),
    ("strobe", "12d", "Methods accounting for the sampling strategy", _declared_only),
    ("strobe", "12e", "Sensitivity analyses", _sensitivity),
    ("strobe", "13a", "Numbers at each stage", _always("tbl-{id}-ledger")),
    ("strobe", "14b", "Participants with missing data for each variable", _missing_per_variable),
    ("strobe", "16a", "Estimates with their precision", _always("tbl-{id}-coefficients")),
    ("strobe", "17", "Other analyses (sensitivity)", _sensitivity),
)

GUIDELINE_ITEMS: tuple[GuidelineItem, ...] = tuple(GuidelineItem(*row) for row in _ITEMS)
"""Every item the map knows, in reporting order within each guideline."""


def _declaration(declared: Any, code: str) -> str | None:
    if isinstance(declared, Mapping):
        text = declared.get(code)
        return str(text) if text not in (None, "") else None
    return None


def map_guidelines(block: Block, names: Sequence[str] | None = None) -> tuple[GuidelineRow, ...]:
    """Map each item of the listed guidelines to where the section meets it.

    Parameters
    ----------
    block
        The block's result as JSON (``results.to_jsonable(BlockResult)``).
    names
        Guideline keys to map; default the keys of ``block["guidelines"]``.

    Returns
    -------
    tuple of GuidelineRow
        One row per item, guidelines in the order given. An item the author
        declared (``guidelines[<name>][<code>]``) is ``met`` with the
        declaration as its note, whatever the result alone would show.

    Examples
    --------
    >>> rows = map_guidelines({"id": "b", "guidelines": {"sampl": {}}, "ledger": []})
    >>> rows[0].guideline, rows[0].code
    ('SAMPL', '1')
    """
    declared_all = block.get("guidelines") or {}
    keys = list(names) if names is not None else list(declared_all)
    unknown = [k for k in keys if k not in GUIDELINE_NAMES]
    if unknown:
        raise RenderError(
            f"Unknown reporting guideline {', '.join(map(repr, unknown))}.",
            hint=f"Use one of {', '.join(GUIDELINE_NAMES)}.",
        )
    rows: list[GuidelineRow] = []
    for key in keys:
        declared = declared_all.get(key) if isinstance(declared_all, Mapping) else None
        for item in GUIDELINE_ITEMS:
            if item.guideline != key:
                continue
            text = _declaration(declared, item.code)
            status: str
            where: tuple[str, ...]
            note: str
            if text is not None:
                status, where, note = "met", ("declared",), text
            else:
                status, where, note = item.assess(block)
            rows.append(
                GuidelineRow(GUIDELINE_NAMES[key], item.code, item.text, status, where, note)
            )
    return tuple(rows)
