"""Write a block's result as a methods-and-diagnostics section, through Jinja2 templates.

Render knows nothing of files, fits or checks: it reads the block's result as
JSON (``results.to_jsonable(BlockResult)``), so every template variable is a
public JSON field. The entry template sees:

``block``
    the result dict (fields of :class:`premises.results.BlockResult`);
``flavor``
    ``quarto``, ``pandoc`` or ``gfm``; ``detail``: ``brief`` or ``full``.

plus the formatting filters of :mod:`premises.numbers` and the helpers in
``_GLOBALS`` / ``_FILTERS`` below. Flavour differences live in
``templates/macros.md.j2`` only.

Cross-references are written by the macros as markers (``⟦ref:id⟧``,
``⟦see:id,id⟧``, ``⟦def:id⟧``) and resolved after rendering: Quarto and pandoc
get ``@id``; plain GFM gets "Figure N"/"Table N" numbered within the section;
a reference to something this section does not contain (the short version
points at no appendix table) is dropped.
"""

from __future__ import annotations

import functools
import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2

from premises._version import FORMAT_VERSION, __version__
from premises.errors import RenderError, SpecError
from premises.guidelines import GUIDELINE_NAMES, GuidelineRow, map_guidelines
from premises.numbers import FILTERS, LogEffect, decimals_for_se, log_effect

__all__ = [
    "DETAILS",
    "FLAVORS",
    "PACKAGE_TEMPLATES",
    "build_environment",
    "code_span",
    "escape_markdown",
    "log_effects",
    "render_error_callout",
    "render_section",
    "summarise_ids",
    "xref_id",
]

FLAVORS = ("quarto", "pandoc", "gfm")
DETAILS = ("brief", "full")
PACKAGE_TEMPLATES = Path(__file__).parent / "templates"
"""Templates shipped in the package; user folders are searched first."""
_ENTRY = {"full": "section", "brief": "brief"}

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

# --- Markdown text ----------------------------------------------------------------------

# Characters that start Markdown or pandoc syntax anywhere in a line: emphasis,
# code, links, raw HTML, math, citations, sub/superscript, attributes, table cells.
_ALWAYS = set("\\`*[]<$@~^{}|")


def escape_markdown(text: Any) -> str:
    """Escape plain text so pandoc and GFM print it literally.

    Backslash escapes of ASCII punctuation are valid in both. ``_`` is escaped
    only at a word edge (inside a word it is literal in both); ``#`` and ``>``
    only at the start (``>`` elsewhere would end a GFM autolink as ``\\>``). ``%`` and ``&`` are left for pandoc's LaTeX writer to escape.
    """
    s = " ".join(str(text).split())
    out: list[str] = []
    for i, ch in enumerate(s):
        if ch in _ALWAYS:
            out.append("\\" + ch)
        elif ch == "_":
            inner = 0 < i < len(s) - 1 and s[i - 1].isalnum() and s[i + 1].isalnum()
            out.append(ch if inner else "\\_")
        elif ch in "#>" and i == 0:  # a heading or a block quote only at the start
            out.append("\\" + ch)
        else:
            out.append(ch)
    return "".join(out)


def code_span(text: Any) -> str:
    """A code span that survives backticks inside the text (CommonMark rule)."""
    s = " ".join(str(text).split())
    runs = [len(m) for m in re.findall(r"`+", s)]
    fence = "`" * (max(runs, default=0) + 1)
    pad = " " if s.startswith("`") or s.endswith("`") else ""
    return f"{fence}{pad}{s}{pad}{fence}"


def _attr(text: Any) -> str:
    """Text for a quoted attribute value: one line, no double quotes."""
    return " ".join(str(text).split()).replace('"', "'").replace("\\", "/")


def _link_target(path: Any) -> str:
    s = str(path)
    return f"<{s}>" if any(ch in s for ch in " ()<>") else s


def xref_id(*parts: Any) -> str:
    """A cross-reference id: lower case, ``-`` for anything not ``[a-z0-9-]``.

    >>> xref_id("tbl", "Yield_2024", "ledger")
    'tbl-yield-2024-ledger'
    """
    raw = "-".join(str(p) for p in parts if str(p))
    return re.sub(r"-{2,}", "-", re.sub(r"[^a-z0-9-]", "-", raw.lower())).strip("-")


def summarise_ids(ids: Sequence[Any], limit: int = 5) -> str:
    """The first ``limit`` ids and "and N more", for the text (the JSON has all)."""
    shown = [escape_markdown(i) for i in list(ids)[:limit]]
    rest = len(ids) - len(shown)
    if not shown:
        return "none"
    if rest <= 0:
        return ", ".join(shown)
    return f"{', '.join(shown)} and {rest:,} more"


def _count_word(n: int) -> str:
    # APA 7, 6.32 (from memory): words for zero to nine in running text.
    words = ("no", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine")
    return words[n] if 0 <= n < 10 else f"{n:,}"


def _join_words(items: Sequence[str], conjunction: str = "and") -> str:
    items = list(items)
    if len(items) <= 2:
        return f" {conjunction} ".join(items)
    return ", ".join(items[:-1]) + f" {conjunction} " + items[-1]


def _phrase(text: Any) -> str:
    """A clause for the middle of a sentence: no final period, first letter lowered
    unless the first word is an acronym (``RESET``)."""
    s = " ".join(str(text).split()).rstrip(".")
    if len(s) > 1 and s[0].isupper() and s[1].islower():
        s = s[0].lower() + s[1:]
    return s


def _upper_first(text: Any) -> str:
    s = str(text)
    return s[:1].upper() + s[1:]


def _paragraph(text: Any) -> str:
    """Join a template's lines into one paragraph line; no space before , ; : or a final period."""
    s = " ".join(str(text).split())
    return re.sub(r"\s+([.,;:])(?=\s|$)", r"\1", s)


def _sentence(text: Any) -> str:
    """Text ending in one period (or ? / !); the case of its first letter is kept."""
    s = " ".join(str(text).split())
    if not s:
        return ""
    return s if s[-1] in ".?!" else s + "."


# --- readings of the result -------------------------------------------------------------

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


def _se_data_driven(block: Mapping[str, Any]) -> bool:
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


def _se_ratio_range(block: Mapping[str, Any]) -> tuple[float, float] | None:
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


def _sensitivity_decimals(block: Mapping[str, Any]) -> dict[tuple[int, str], int]:
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


def _by_term(coefficients: Sequence[Mapping[str, Any]]) -> dict[str, Mapping[str, Any]]:
    return {str(c["term"]): c for c in coefficients}


def _focal_terms(block: Mapping[str, Any]) -> list[str]:
    """Terms shown in the sensitivity table: every term but the intercept."""
    return [str(c["term"]) for c in block["coefficients"] if c["term"] != "Intercept"]


def _figures_for(block: Mapping[str, Any], finding: Mapping[str, Any]) -> list[str]:
    ids = [
        str(f["id"])
        for f in block.get("figures", ())
        if f.get("assumption") == finding["assumption"]
    ]
    if finding.get("figure") and finding["figure"] not in ids:
        ids.insert(0, str(finding["figure"]))
    return ids


def _largest_dfbetas(point: Mapping[str, Any]) -> tuple[str, float] | None:
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


def _change_items(block: Mapping[str, Any]) -> list[tuple[str, str]]:
    log = block.get("change_log") or {}
    return [(str(k).replace("_", " ").capitalize(), _change_value(v)) for k, v in log.items()]


def _se_label(kind: Any) -> str:
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


def _threshold_rule(threshold: Mapping[str, Any]) -> str:
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


def _threshold_value(threshold: Mapping[str, Any]) -> str:
    """The threshold's value for this fit, or a dash when the rule already states it."""
    expression = str(threshold["expression"]).strip()
    match = _COMPARISON.match(expression)
    if _is_number(match.group(2) if match else expression):
        return "\u2014"
    return FILTERS["fmt_num"](threshold.get("value"))


def _citation(origin: Any) -> str:
    """An origin for a table cell or parentheses: "Hoaglin & Welsch (1978)" becomes
    "Hoaglin & Welsch, 1978" (APA inside parentheses)."""
    return escape_markdown(re.sub(r"\s\((\d{4}[a-z]?)\)", r", \1", str(origin or "")))


_METHOD_SUBJECTS: dict[str, str] = {"influence": "The influence of single observations"}


def _method_sentence(assumption: str, method: Any) -> str:
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
        return _upper_first(text) + "."
    return f"{subject} was assessed by {_phrase(text)}."


def _evidence(finding: Mapping[str, Any]) -> list[Mapping[str, Any]]:
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


def _guideline_rows(block: Mapping[str, Any]) -> tuple[GuidelineRow, ...]:
    return map_guidelines(block)


_FILTERS: dict[str, Any] = {
    **FILTERS,
    "md": escape_markdown,
    "code": code_span,
    "attr": _attr,
    "link_target": _link_target,
    "xref": xref_id,
    "summarise_ids": summarise_ids,
    "count_word": _count_word,
    "join_words": _join_words,
    "phrase": _phrase,
    "sentence": _sentence,
    "upper_first": _upper_first,
    "paragraph": _paragraph,
    "decimals_for_se": decimals_for_se,
    "by_term": _by_term,
    "threshold_rule": _threshold_rule,
    "threshold_value": _threshold_value,
    "citation": _citation,
    "evidence": _evidence,
    "se_label": _se_label,
    "verdict_label": lambda v: VERDICT_LABELS.get(str(v), str(v)),
    "assumption_title": lambda a: ASSUMPTION_TITLES.get(
        str(a), str(a).replace("-", " ").capitalize()
    ),
}
_GLOBALS: dict[str, Any] = {
    "method_sentence": _method_sentence,
    "log_effects": log_effects,
    "se_data_driven": _se_data_driven,
    "se_ratio_range": _se_ratio_range,
    "sensitivity_decimals": _sensitivity_decimals,
    "focal_terms": _focal_terms,
    "figures_for": _figures_for,
    "largest_dfbetas": _largest_dfbetas,
    "change_items": _change_items,
    "guideline_rows": _guideline_rows,
    "guideline_names": GUIDELINE_NAMES,
    "max_flagged_rows": 25,
    "premises_version": __version__,
}


# --- environment and entry points -------------------------------------------------------


def _check_folders(template_dirs: Sequence[Path | str]) -> None:
    for folder in template_dirs:
        if not Path(folder).is_dir():
            raise RenderError(
                f"The template folder '{folder}' does not exist.",
                hint="Point 'templates' at a folder holding .md.j2 files, relative to the document.",
            )


def build_environment(template_dirs: Sequence[Path | str] = ()) -> jinja2.Environment:
    """The Jinja2 environment: user folders first, then the shipped templates.

    Shipped templates are also reachable as ``premises/<name>`` so a user
    template can include or extend the one it replaces.
    """
    _check_folders(template_dirs)
    shipped = jinja2.FileSystemLoader(str(PACKAGE_TEMPLATES))
    loaders: list[jinja2.BaseLoader] = [jinja2.FileSystemLoader([str(d) for d in template_dirs])]
    loaders += [shipped, jinja2.PrefixLoader({"premises": shipped})]
    from jinja2.sandbox import SandboxedEnvironment

    # Sandboxed: a template comes from the project (the block's `templates:` key), and a
    # plain environment lets `{{ self.__init__.__globals__ ... }}` run any Python.
    env = SandboxedEnvironment(
        loader=jinja2.ChoiceLoader(loaders),
        undefined=jinja2.StrictUndefined,
        autoescape=False,  # Markdown, not HTML: text is escaped by the `md` filter instead
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        auto_reload=True,  # a template edited between renders is recompiled
    )
    env.filters.update(_FILTERS)
    env.globals.update(_GLOBALS)
    return env


@functools.lru_cache(maxsize=8)
def _environment(template_dirs: tuple[str, ...]) -> jinja2.Environment:
    # Compiling the ~25 templates costs most of a render; an environment holds
    # only compiled templates and fixed filters, so it is reused per folder list.
    return build_environment(template_dirs)


def _check_choice(name: str, value: str, choices: Sequence[str]) -> None:
    if value not in choices:
        raise RenderError(
            f"The {name} must be one of {', '.join(choices)}; got {value!r}.",
            hint=f"Pass {name}={choices[0]!r} or another of the listed values.",
        )


_MARK = re.compile(r"\u27e6(ref|see|def):([^\u27e7]*)\u27e7")
_KIND_NAMES = {"fig": "Figure", "tbl": "Table"}


def _resolve_references(text: str, flavor: str) -> str:
    """Number the targets defined in ``text`` and turn reference markers into text."""
    numbers: dict[str, int] = {}
    counts: dict[str, int] = {}
    for kind, ident in ((m.group(1), m.group(2)) for m in _MARK.finditer(text)):
        if kind == "def" and ident not in numbers:
            prefix = ident.split("-", 1)[0]
            counts[prefix] = counts.get(prefix, 0) + 1
            numbers[ident] = counts[prefix]

    def label(ident: str) -> str:
        if flavor != "gfm":
            return "@" + ident
        return f"{_KIND_NAMES.get(ident.split('-', 1)[0], 'Item')} {numbers[ident]}"

    def replace(match: re.Match[str]) -> str:
        kind, body = match.group(1), match.group(2)
        if kind == "def":
            return str(numbers[body]) if flavor == "gfm" else ""
        known = [i for i in body.split(",") if i in numbers]
        if kind == "ref":
            return label(body) if body in numbers else "the full diagnostics"
        if not known:
            return ""
        if flavor != "gfm":
            return " (" + "; ".join(label(i) for i in known) + ")"
        # GFM: "Figures 2, 3 and 4; Table 1", kinds in order of first mention.
        by_kind: dict[str, list[str]] = {}
        for ident in known:
            name = _KIND_NAMES.get(ident.split("-", 1)[0], "Item")
            by_kind.setdefault(name, []).append(str(numbers[ident]))
        groups = [
            (f"{name}s " if len(nums) > 1 else f"{name} ") + _join_words(nums)
            for name, nums in by_kind.items()
        ]
        return " (" + "; ".join(groups) + ")"

    return _MARK.sub(replace, text)


def _tidy(text: str) -> str:
    """Trailing spaces off, at most one blank line in a row, one final newline."""
    lines = [line.rstrip() for line in text.splitlines()]
    tidy = re.sub(r"\n{3,}", "\n\n", "\n".join(lines)).strip("\n")
    return tidy + "\n"


def render_section(
    block: Mapping[str, Any],
    *,
    flavor: str = "quarto",
    detail: str = "full",
    template_dirs: Sequence[Path] = (),
    to: str = "md",
) -> str:
    """Render one block's result as a Markdown section.

    Parameters
    ----------
    block
        The block's result as JSON (``results.to_jsonable(BlockResult)``).
    flavor
        ``quarto`` (attributes, ``fig-alt``, callout titles), ``pandoc``
        (``alt``, callout title as a bold first sentence) or ``gfm`` (no
        attributes or ids; italic captions; "Figure N" instead of ``@`` refs).
    detail
        ``full`` (everything) or ``brief`` (methods, a one-line assumption
        summary, the coefficient table and a pointer to the full diagnostics).
    template_dirs
        Folders searched before the shipped templates.
    to
        Output kind: the suffix of the entry template (``section.<to>.j2``).

    Returns
    -------
    str
        The section, between ``<!-- premises:begin … -->`` and
        ``<!-- premises:end … -->`` comment lines, ending in a newline.

    Raises
    ------
    RenderError
        For an unknown flavour, detail or output kind, a missing template, or
        a template that fails (a field it needs is absent from ``block``).

    Examples
    --------
    >>> text = render_section(result, flavor="gfm")          # doctest: +SKIP
    >>> text.splitlines()[0]                                  # doctest: +SKIP
    '<!-- premises:begin id=yield fingerprint=… format=1 -->'
    """
    _check_choice("flavor", flavor, FLAVORS)
    _check_choice("detail", detail, DETAILS)
    _check_folders(template_dirs)
    env = _environment(tuple(str(Path(d).resolve()) for d in template_dirs))
    name = f"{_ENTRY[detail]}.{to}.j2"
    try:
        template = env.get_template(name)
        body = template.render(block=block, flavor=flavor, detail=detail)
    except jinja2.TemplateNotFound as exc:
        raise RenderError(
            f"No template '{exc.name}' for output kind {to!r}.",
            hint="The shipped templates write Markdown (to='md'); add the template to a template folder.",
        ) from exc
    except jinja2.exceptions.SecurityError as exc:
        raise SpecError(
            f"Template '{name}' (or one it includes) reaches for Python internals: {str(exc).rstrip('.')}.",
            hint="Templates may use the result's fields, filters and loops only; remove that expression.",
        ) from exc
    except jinja2.UndefinedError as exc:
        raise RenderError(
            f"Template '{name}' needs a field the result does not have: {exc.message}.",
            hint="Render the JSON of a BlockResult (results.to_jsonable), or fix the template.",
        ) from exc
    except jinja2.TemplateError as exc:
        raise RenderError(
            f"Template '{name}' failed: {exc}.",
            hint="Check the template named in the message (a user template overrides the shipped one).",
        ) from exc
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise RenderError(
            f"The result could not be rendered: {type(exc).__name__}: {exc}.",
            hint="Render the JSON of a BlockResult (results.to_jsonable), unchanged.",
        ) from exc
    ident = str(block.get("id", ""))
    fingerprint = str(block.get("provenance", {}).get("fingerprint", ""))
    fmt = block.get("format_version", FORMAT_VERSION)
    begin = f"<!-- premises:begin id={ident} fingerprint={fingerprint} format={fmt} -->"
    end = f"<!-- premises:end id={ident} -->"
    return _tidy(f"{begin}\n\n{_resolve_references(body, flavor)}\n\n{end}")


def render_error_callout(message: str, flavor: str) -> str:
    """A visible callout for a block that failed (the filter's warn mode).

    >>> render_error_callout("No column 'x'.", "gfm")
    "> **premises could not render this block.** No column 'x'.\\n"
    """
    _check_choice("flavor", flavor, FLAVORS)
    title = "premises could not render this block"
    text = escape_markdown(message)
    if flavor == "quarto":
        return f'::: {{.callout-important title="{_attr(title)}"}}\n{text}\n:::\n'
    if flavor == "pandoc":
        return f"::: {{.callout-important}}\n**{title}.** {text}\n:::\n"
    return f"> **{title}.** {text}\n"
