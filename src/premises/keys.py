"""The declared keys of a block, and the JSON Schema generated from them.

The block's keys are declared once, in ``KEYS`` (a table naming each key's type
and allowed values); :mod:`premises.validation` checks values against it with
one message template, and :func:`block_schema` turns it into the JSON Schema
shipped for editors.
"""

from __future__ import annotations

import json
import re
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any, Literal

from premises.thresholds import F_MEDIAN

TRANSFORM_OPS = ("log", "log2", "log10", "sqrt", "rank", "zscore", "winsorize")
ASSUMPTIONS = (
    "outcome",
    "linearity",
    "normality",
    "variance",
    "influence",
    "independence",
    "collinearity",
)
SE_CHOICES = ("classical", "hc3", "cluster", "auto")
MISSING_CHOICES = ("drop", "error")
FIGURE_FORMATS = ("png", "svg", "pdf")
DETAIL_CHOICES = ("brief", "full")
FLAVORS = ("quarto", "pandoc", "gfm")
GUIDELINES = ("jars", "sampl", "strobe")
ALTERNATIVES = ("rank", "log-outcome", "boxcox")


Kind = Literal[
    "string",
    "id",
    "model",
    "integer",
    "number",
    "boolean",
    "choice",
    "choices",
    "ids",
    "threshold",
    "limits",
    "mapping",
    "entries",
]

ID_PATTERN = re.compile(r"[a-z][a-z0-9-]*")
MAX_BLOCK_CHARS = 100_000
"""Longest block body accepted (characters), checked before YAML reads it."""
MAX_BLOCK_ITEMS = 100_000
"""Most keys and list items a block may hold once YAML aliases are expanded; a
block within MAX_BLOCK_CHARS cannot reach it without aliases, so it stops an
alias "bomb" (each alias repeating the one before) before it is walked."""


@dataclass(frozen=True, slots=True)
class Key:
    """One declared key of the block: its type, allowed values and meaning."""

    name: str
    kind: Kind
    """How the value is checked (see ``premises.validation``)."""
    description: str
    """One line, used in hints and in the JSON Schema."""
    choices: tuple[str, ...] = ()
    """Allowed values of a ``choice`` or of the items of a ``choices`` list."""
    required: bool = False
    low: float | None = None
    """Lowest allowed number (inclusive unless ``exclusive``)."""
    high: float | None = None
    """Highest allowed number (inclusive unless ``exclusive``)."""
    exclusive: bool = False
    nonempty: bool = False
    """A list that must have at least one item."""
    fields: tuple[Key, ...] = ()
    """Sub-keys of a ``mapping`` or of each entry of ``entries``."""

    @property
    def table(self) -> Mapping[str, Key]:
        """``fields`` by name."""
        return {key.name: key for key in self.fields}


def _threshold(name: str, description: str) -> Key:
    return Key(name, "threshold", description)


THRESHOLD_KEYS = (
    # Defaults and their sources are documented on the Thresholds dataclass.
    _threshold("cooks", "Cook's distance cut-off: number, expression in n and p, or F-median."),
    _threshold("leverage", "Hat-value cut-off: number or expression in n and p (e.g. 2p/n)."),
    _threshold("dffits", "|DFFITS| cut-off: number or expression (e.g. 2*sqrt(p/n))."),
    _threshold("dfbetas", "|DFBETAS| cut-off: number or expression (e.g. 2/sqrt(n))."),
    Key(
        "vif",
        "number",
        "Variance inflation factor above which a term is flagged.",
        low=1,
        exclusive=True,
    ),
    Key(
        "condition",
        "number",
        "Condition number of the scaled design above which it is flagged.",
        low=1,
        exclusive=True,
    ),
    Key("alpha", "number", "Level of the formal tests.", low=0, high=1, exclusive=True),
)

FIGURE_KEYS = (
    Key("format", "choice", "Image format of the figures.", FIGURE_FORMATS),
    Key("dpi", "integer", "Resolution of raster figures in dots per inch.", low=50, high=600),
    Key("width", "number", "Figure width in inches.", low=2, high=20),
)

_PROVENANCE_KEYS = (
    Key("prespecified", "boolean", "Whether it was fixed before seeing the outcome."),
    Key("registration", "string", "Pre-registration reference."),
)

TRANSFORM_KEYS = (
    Key("column", "string", "Column to transform.", required=True),
    Key("op", "choice", "Transformation to apply.", TRANSFORM_OPS, required=True),
    Key("reason", "string", "Why the column is transformed (printed in the ledger)."),
    Key("as", "string", "Name of the new column; default replaces the column."),
    Key("limits", "limits", "Winsorize only: lower and upper quantiles, e.g. [0.01, 0.99]."),
    *_PROVENANCE_KEYS,
)

EXCLUDE_KEYS = (
    Key("when", "string", "Rule in the premises rule language selecting rows to exclude."),
    Key("ids", "ids", "Row ids (id_column values, else 1-based row numbers) to exclude."),
    Key("reason", "string", "Why these rows are excluded (printed in the ledger).", required=True),
    Key(
        "expect", "integer", "Number of rows the rule must match; another count is an error.", low=0
    ),
    Key("pin", "boolean", "Fail when the matched ids change from the last render."),
    *_PROVENANCE_KEYS,
    Key("category", "string", "data-error, invalid-response, out-of-population, outlier, ..."),
)

_KEY_LIST = (
    Key(
        "id",
        "id",
        "Block id: lower-case letters, digits and hyphens, starting with a letter.",
        required=True,
    ),
    Key("data", "string", "Data file, relative to the document.", required=True),
    Key("model", "model", "Wilkinson formula, e.g. 'y ~ x1 + log(x2)'.", required=True),
    Key("title", "string", "Heading text of the generated section."),
    Key("id_column", "string", "Column naming rows in the ledger and flagged-point tables."),
    Key(
        "transforms",
        "entries",
        "Columns changed before fitting, each with its reason.",
        fields=TRANSFORM_KEYS,
    ),
    Key(
        "exclude",
        "entries",
        "Rows excluded by a rule or by id, each with its reason.",
        fields=EXCLUDE_KEYS,
    ),
    Key("missing", "choice", "What to do with rows missing a model variable.", MISSING_CHOICES),
    Key("groups", "string", "Grouping column: independence check and cluster-robust SE."),
    Key("order", "string", "Ordering column (time, sequence): autocorrelation check."),
    Key("weights", "string", "Column of weights (weighted least squares)."),
    Key(
        "checks",
        "choices",
        "Assumptions to check; default all that apply.",
        ASSUMPTIONS,
        nonempty=True,
    ),
    Key("thresholds", "mapping", "Cut-offs for flags and tests.", fields=THRESHOLD_KEYS),
    Key(
        "se",
        "choice",
        "Standard errors; auto turns robust where the variance check calls for it.",
        SE_CHOICES,
    ),
    Key("figures", "mapping", "How figures are written.", fields=FIGURE_KEYS),
    Key("detail", "choice", "Length of the generated section.", DETAIL_CHOICES),
    Key("alternatives", "choices", "Alternative models shown beside the main one.", ALTERNATIVES),
    Key("guidelines", "choices", "Reporting guidelines to map the section against.", GUIDELINES),
    Key("templates", "string", "Folder of templates overriding the shipped ones."),
    Key("seed", "integer", "Seed for simulation envelopes and subsampling.", low=0, high=2**32 - 1),
)

KEYS: Mapping[str, Key] = MappingProxyType({key.name: key for key in _KEY_LIST})
"""Every top-level key of a block, by name."""

BLOCK = Key("block", "mapping", "A premises block.", fields=_KEY_LIST)
"""The block itself, as a mapping whose fields are ``KEYS``."""

ALIASES: Mapping[str, str] = MappingProxyType(
    {
        # Words people reach for that spelling similarity alone would not map.
        "exclusions": "exclude",
        "exclusion": "exclude",
        "excludes": "exclude",
        "transformations": "transforms",
        "formula": "model",
        "dataset": "data",
        "file": "data",
        "path": "data",
        "cluster": "groups",
        "clusters": "groups",
        "group": "groups",
        "time": "order",
        "standard_errors": "se",
        "robust": "se",
        "assumptions": "checks",
        "name": "id",
        "label": "id",
        "rule": "when",
        "condition": "when",
        "why": "reason",
        "operation": "op",
        "function": "op",
        "count": "expect",
        "rows": "ids",
        "cooks_distance": "cooks",
        "hat": "leverage",
        "level": "alpha",
        "significance": "alpha",
        "resolution": "dpi",
        "filetype": "format",
    }
)
"""Other names for keys, used only to suggest the right one."""


# ---------------------------------------------------------------------------
# JSON Schema
# ---------------------------------------------------------------------------

_THRESHOLD_PATTERN = r"^(?:[-+*/(). 0-9eEnp]|sqrt)+$"


def _schema_of(key: Key) -> dict[str, Any]:
    schema: dict[str, Any]
    bound_names = (
        ("exclusiveMinimum", "exclusiveMaximum") if key.exclusive else ("minimum", "maximum")
    )
    bounds = {
        name: limit for name, limit in zip(bound_names, (key.low, key.high)) if limit is not None
    }
    if key.kind in ("string", "id", "model"):
        patterns = {"id": "^[a-z][a-z0-9-]*$", "model": "^[^~]*~[^~]*$"}
        schema = {"type": "string", "minLength": 1}
        if key.kind in patterns:
            schema["pattern"] = patterns[key.kind]
    elif key.kind in ("integer", "number"):
        schema = {"type": key.kind, **bounds}
    elif key.kind == "boolean":
        schema = {"type": "boolean"}
    elif key.kind == "choice":
        schema = {"type": "string", "enum": list(key.choices)}
    elif key.kind == "choices":
        schema = {
            "type": "array",
            "items": {"type": "string", "enum": list(key.choices)},
            "minItems": 1 if key.nonempty else 0,
        }
    elif key.kind == "ids":
        schema = {"type": "array", "minItems": 1, "items": {"type": ["string", "integer"]}}
    elif key.kind == "threshold":
        options: list[dict[str, Any]] = [
            {"type": "number", "exclusiveMinimum": 0},
            {"type": "string", "pattern": _THRESHOLD_PATTERN},
        ]
        if key.name == "cooks":
            options.append({"const": F_MEDIAN})
        schema = {"anyOf": options}
    elif key.kind == "limits":
        schema = {
            "type": "array",
            "minItems": 2,
            "maxItems": 2,
            "items": {"type": "number", "minimum": 0, "maximum": 1},
        }
    else:
        schema = _object_schema(key)
        if key.kind == "entries":
            schema = {"type": "array", "items": schema}
    return {"description": key.description, **schema}


def _object_schema(key: Key) -> dict[str, Any]:
    schema: dict[str, Any] = {
        "type": "object",
        "properties": {sub.name: _schema_of(sub) for sub in key.fields},
        "additionalProperties": False,
    }
    required = [sub.name for sub in key.fields if sub.required]
    if required:
        schema["required"] = required
    if key.name == "exclude":
        schema["oneOf"] = [{"required": ["when"]}, {"required": ["ids"]}]
    if key.name == "transforms":
        schema["if"] = {"properties": {"op": {"const": "winsorize"}}}
        schema["then"] = {"required": ["limits"]}
        schema["else"] = {"not": {"required": ["limits"]}}
    return schema


def block_schema() -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) of a block, generated from ``KEYS``.

    The package ships it as ``premises/schema/block.schema.json`` for editors.
    """
    schema = _object_schema(BLOCK)
    schema["if"] = {"properties": {"se": {"const": "cluster"}}, "required": ["se"]}
    schema["then"] = {"required": ["groups"]}
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "premises block",
        "description": "A fenced ```premises block: data, model, transforms, exclusions "
        "and the assumption checks of a linear regression.",
        **schema,
    }


def block_schema_text() -> str:
    """:func:`block_schema` as the exact text of the shipped file."""
    return json.dumps(block_schema(), indent=2, ensure_ascii=False) + "\n"
