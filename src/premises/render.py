"""Write a block's result as a methods-and-diagnostics section, through Jinja2 templates.

Render knows nothing of files, fits or checks: it reads the block's result as
JSON (``results.to_jsonable(BlockResult)``), so every template variable is a
public JSON field. The entry template sees:

``block``
    the result dict (fields of :class:`premises.results.BlockResult`);
``flavor``
    ``quarto``, ``pandoc`` or ``gfm``; ``detail``: ``brief`` or ``full``.

plus the formatting filters of :mod:`premises.numbers` and the helpers in
``_GLOBALS`` / ``_FILTERS`` below (from :mod:`premises.markup` and
:mod:`premises.section`). Flavour differences live in
``templates/macros.md.j2`` only.

Cross-references are written by the macros as markers (``⟦ref:id⟧``,
``⟦see:id,id⟧``, ``⟦def:id⟧``) and resolved after rendering: Quarto and pandoc
get ``@id``; plain GFM gets "Figure N"/"Table N" numbered within the section;
a reference to something this section does not contain (the short version
points at no appendix table) is dropped.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2

from premises._version import FORMAT_VERSION, __version__
from premises.errors import RenderError, SpecError
from premises.guidelines import GUIDELINE_NAMES
from premises.markup import (
    attribute_value,
    code_span,
    count_word,
    escape_markdown,
    join_words,
    link_target,
    paragraph,
    phrase,
    sentence,
    summarise_ids,
    upper_first,
    xref_id,
)
from premises.numbers import FILTERS, decimals_for_se
from premises.section import (
    ASSUMPTION_TITLES,
    VERDICT_LABELS,
    by_term,
    change_items,
    citation,
    evidence,
    figures_for,
    focal_terms,
    guideline_rows,
    largest_dfbetas,
    log_effects,
    method_sentence,
    se_data_driven,
    se_label,
    se_ratio_range,
    sensitivity_decimals,
    threshold_rule,
    threshold_value,
)

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


_FILTERS: dict[str, Any] = {
    **FILTERS,
    "md": escape_markdown,
    "code": code_span,
    "attr": attribute_value,
    "link_target": link_target,
    "xref": xref_id,
    "summarise_ids": summarise_ids,
    "count_word": count_word,
    "join_words": join_words,
    "phrase": phrase,
    "sentence": sentence,
    "upper_first": upper_first,
    "paragraph": paragraph,
    "decimals_for_se": decimals_for_se,
    "by_term": by_term,
    "threshold_rule": threshold_rule,
    "threshold_value": threshold_value,
    "citation": citation,
    "evidence": evidence,
    "se_label": se_label,
    "verdict_label": lambda v: VERDICT_LABELS.get(str(v), str(v)),
    "assumption_title": lambda a: ASSUMPTION_TITLES.get(
        str(a), str(a).replace("-", " ").capitalize()
    ),
}
_GLOBALS: dict[str, Any] = {
    "method_sentence": method_sentence,
    "log_effects": log_effects,
    "se_data_driven": se_data_driven,
    "se_ratio_range": se_ratio_range,
    "sensitivity_decimals": sensitivity_decimals,
    "focal_terms": focal_terms,
    "figures_for": figures_for,
    "largest_dfbetas": largest_dfbetas,
    "change_items": change_items,
    "guideline_rows": guideline_rows,
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
            (f"{name}s " if len(nums) > 1 else f"{name} ") + join_words(nums)
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
        return f'::: {{.callout-important title="{attribute_value(title)}"}}\n{text}\n:::\n'
    if flavor == "pandoc":
        return f"::: {{.callout-important}}\n**{title}.** {text}\n:::\n"
    return f"> **{title}.** {text}\n"
