"""The premises block: its schema as frozen dataclasses, and YAML -> BlockSpec.

The block's keys are declared once, in ``KEYS`` (:mod:`premises.keys`, a table
naming each key's type and allowed values); one validator
(:mod:`premises.validation`) writes every message, in one template:
"The 'se' key must be one of classical, hc3, cluster, auto; got 'hc4'."
Every message is located: document line (fence line plus the YAML mark inside
the block, :mod:`premises.source`), block id and key path.

Threshold cut-offs may be expressions in n (rows) and p (parameters), read by a
small whitelist parser (:mod:`premises.thresholds`); nothing is ever evaluated
by Python. The names of those modules are re-exported here.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, fields, is_dataclass
from typing import Any, Literal

from premises.config import merge_settings
from premises.errors import Location, SpecError
from premises.keys import (
    ALIASES,
    ALTERNATIVES,
    ASSUMPTIONS,
    BLOCK,
    DETAIL_CHOICES,
    EXCLUDE_KEYS,
    FIGURE_FORMATS,
    FIGURE_KEYS,
    FLAVORS,
    GUIDELINES,
    ID_PATTERN,
    KEYS,
    MAX_BLOCK_CHARS,
    MAX_BLOCK_ITEMS,
    MISSING_CHOICES,
    SE_CHOICES,
    THRESHOLD_KEYS,
    TRANSFORM_KEYS,
    TRANSFORM_OPS,
    Key,
    Kind,
    block_schema,
    block_schema_text,
)
from premises.source import Context, SourceRef, load_yaml
from premises.thresholds import F_MEDIAN, Expr, evaluate_threshold, parse_threshold
from premises.validation import PROBE_N, PROBE_P, attribute_layer, check_layer, require, same_id

__all__ = [
    "ALIASES",
    # re-exported from premises.keys, premises.thresholds and premises.validation
    "ALTERNATIVES",
    "ASSUMPTIONS",
    "DETAIL_CHOICES",
    "EXCLUDE_KEYS",
    "FIGURE_FORMATS",
    "FIGURE_KEYS",
    "FLAVORS",
    "F_MEDIAN",
    "GUIDELINES",
    "ID_PATTERN",
    "KEYS",
    "MAX_BLOCK_CHARS",
    "MAX_BLOCK_ITEMS",
    "MISSING_CHOICES",
    "PROBE_N",
    "PROBE_P",
    "SE_CHOICES",
    "THRESHOLD_KEYS",
    "TRANSFORM_KEYS",
    "TRANSFORM_OPS",
    "BlockSpec",
    "ExclusionSpec",
    "Expr",
    "FigureOptions",
    "Key",
    "Kind",
    "SourceRef",
    "Thresholds",
    "TransformSpec",
    "block_schema",
    "block_schema_text",
    "canonical_spec",
    "check_unique_ids",
    "evaluate_threshold",
    "parse_block",
    "parse_threshold",
]

Verdict = Literal["holds", "concern", "violated", "not-assessed"]


@dataclass(frozen=True, slots=True)
class TransformSpec:
    """One entry of ``transforms``: a column changed before fitting, with its reason."""

    column: str
    """Source column."""
    op: str
    """One of ``TRANSFORM_OPS``."""
    reason: str | None = None
    """Why (printed in the ledger; "not declared" when absent)."""
    as_: str | None = None
    """Name of the new column; default replaces ``column`` in place."""
    limits: tuple[float, float] | None = None
    """Winsorize: lower and upper quantiles, e.g. (0.01, 0.99)."""
    prespecified: bool | None = None
    """Was the transform chosen before seeing the outcome? None = not declared."""
    registration: str | None = None
    """Pre-registration reference, if any."""
    key: str = ""
    """Key path in the block (``transforms[0]``) for messages."""

    @property
    def target(self) -> str:
        """Column the result is written to."""
        return self.as_ or self.column


@dataclass(frozen=True, slots=True)
class ExclusionSpec:
    """One entry of ``exclude``: rows removed by a rule or by id, with the reason."""

    reason: str
    """Why these rows are excluded (required)."""
    when: str | None = None
    """Rule in the premises rule language (see ``rules``)."""
    ids: tuple[str, ...] | None = None
    """Explicit row ids (values of ``id_column``, else 1-based row numbers)."""
    expect: int | None = None
    """Rows the rule must match; another count is an error."""
    pin: bool = False
    """Fail when the set of matched ids changes from the last render."""
    prespecified: bool | None = None
    """Was the rule fixed before seeing the outcome? None = not declared."""
    registration: str | None = None
    """Pre-registration reference, if any."""
    category: str | None = None
    """data-error, invalid-response, out-of-population, outlier (free text allowed)."""
    key: str = ""
    """Key path in the block (``exclude[1]``) for messages."""

    @property
    def rule_text(self) -> str:
        """The rule as shown in the ledger."""
        if self.when is not None:
            return self.when
        return "id in [" + ", ".join(self.ids or ()) + "]"


@dataclass(frozen=True, slots=True)
class Thresholds:
    """Cut-offs for flags. Expressions may use n (rows) and p (parameters)."""

    cooks: str = "4/n"
    """Cook's distance; common practice, usually credited to Bollen & Jackman (1990)."""
    leverage: str = "2p/n"
    """Hat value; Hoaglin & Welsch (1978)."""
    dffits: str = "2*sqrt(p/n)"
    """|DFFITS|; Belsley, Kuh & Welsch (1980)."""
    dfbetas: str = "2/sqrt(n)"
    """|DFBETAS|; Belsley, Kuh & Welsch (1980)."""
    vif: float = 10.0
    """Variance inflation factor; Marquardt (1970), common practice."""
    condition: float = 30.0
    """Condition number of the scaled design; Belsley, Kuh & Welsch (1980)."""
    alpha: float = 0.05
    """Level for the formal tests and the Bonferroni outlier test."""


@dataclass(frozen=True, slots=True)
class FigureOptions:
    """How figures are written."""

    format: str = "png"
    dpi: int = 150
    width: float = 6.0
    """Width in inches."""


@dataclass(frozen=True, slots=True)
class BlockSpec:
    """A validated premises block."""

    id: str
    data: str
    model: str
    source: SourceRef = field(default_factory=lambda: SourceRef(None, None))
    title: str | None = None
    id_column: str | None = None
    transforms: tuple[TransformSpec, ...] = ()
    exclude: tuple[ExclusionSpec, ...] = ()
    missing: str = "drop"
    groups: str | None = None
    order: str | None = None
    weights: str | None = None
    checks: tuple[str, ...] = ASSUMPTIONS
    thresholds: Thresholds = field(default_factory=Thresholds)
    se: str = "auto"
    figures: FigureOptions = field(default_factory=FigureOptions)
    detail: str = "full"
    alternatives: tuple[str, ...] = ()
    guidelines: tuple[str, ...] = ()
    templates: str | None = None
    """Folder of user templates overriding the shipped ones (relative to the document)."""
    seed: int = 20240601
    """Seed for the simulation envelope and any subsampling."""

    def locate(self, key: str | None = None) -> Location:
        """Location of ``key`` in this block for an error message."""
        return self.source.locate(self.id, key)



def parse_block(
    body: str,
    *,
    file: str | None,
    line: int,
    defaults: Mapping[str, Any] | None = None,
    attrs: Mapping[str, str] | Iterable[tuple[str, str]] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> BlockSpec:
    """Read and validate a premises block.

    Parameters
    ----------
    body
        YAML text inside the fence.
    file
        Document path, for messages.
    line
        1-based document line of the opening fence; the body starts on the next line.
    defaults
        Document defaults (project settings merged with the front matter's
        ``premises:`` mapping, see :func:`premises.config.merge_settings`).
    attrs
        Fence attributes, e.g. ``{"id": "main"}`` from ``{.premises #main}``; a
        mapping or ``RawBlock.attrs`` (pairs) as it is.
    overrides
        Command-line settings, applied last.

    Returns
    -------
    BlockSpec
        With ``source.key_lines`` mapping every key path of the body to its line.

    Raises
    ------
    SpecError
        For malformed YAML, tabs, duplicate or unknown keys, wrong types or
        values, missing required keys; located by file, line, block id and key.

    Examples
    --------
    >>> spec = parse_block("id: a\\ndata: d.csv\\nmodel: y ~ x\\nse: hc3\\n", file=None, line=1)
    >>> spec.se, spec.source.line_of("se")
    ('hc3', 5)
    """
    attrs = dict(attrs or {})
    fence_id = attrs.get("id")
    raw, key_lines = load_yaml(body, Context(file, line, fence_id))
    block_id = raw.get("id") if isinstance(raw.get("id"), str) else fence_id
    ctx = Context(file, line, block_id, key_lines)
    in_fence = Context(file, line, block_id, origin="attributes")
    layers = [
        check_layer(defaults or {}, Context(file, line, block_id, origin="defaults")),
        check_layer(attribute_layer(attrs, in_fence), in_fence),
        check_layer(raw, ctx),
        check_layer(overrides or {}, Context(file, line, block_id, origin="overrides")),
    ]
    same_id(fence_id, layers[2], ctx)
    merged = merge_settings(*layers)
    require(BLOCK, merged, "", ctx, "The block")
    if merged.get("se") == "cluster" and "groups" not in merged:
        raise ctx.fail(
            "se",
            "The 'se' key is 'cluster' but the block names no 'groups' column.",
            "Add 'groups: <column>' naming the clusters, or choose another 'se'.",
        )
    return _build(merged, SourceRef(file, line, key_lines))


def _build(values: Mapping[str, Any], source: SourceRef) -> BlockSpec:
    """BlockSpec from checked, merged values (defaults of the dataclasses fill the rest)."""
    direct = {
        name: values[name]
        for name in (
            "id",
            "data",
            "model",
            "title",
            "id_column",
            "missing",
            "groups",
            "order",
            "weights",
            "checks",
            "se",
            "detail",
            "alternatives",
            "guidelines",
            "templates",
            "seed",
        )
        if name in values
    }
    transforms = tuple(
        TransformSpec(
            column=entry["column"],
            op=entry["op"],
            reason=entry.get("reason"),
            as_=entry.get("as"),
            limits=entry.get("limits"),
            prespecified=entry.get("prespecified"),
            registration=entry.get("registration"),
            key=f"transforms[{index}]",
        )
        for index, entry in enumerate(values.get("transforms", ()))
    )
    exclusions = tuple(
        ExclusionSpec(
            reason=entry["reason"],
            when=entry.get("when"),
            ids=entry.get("ids"),
            expect=entry.get("expect"),
            pin=entry.get("pin", False),
            prespecified=entry.get("prespecified"),
            registration=entry.get("registration"),
            category=entry.get("category"),
            key=f"exclude[{index}]",
        )
        for index, entry in enumerate(values.get("exclude", ()))
    )
    figures = values.get("figures", {})
    return BlockSpec(
        **direct,
        source=source,
        transforms=transforms,
        exclude=exclusions,
        thresholds=Thresholds(**values.get("thresholds", {})),
        figures=FigureOptions(**figures),
    )


def check_unique_ids(specs: Sequence[BlockSpec]) -> None:
    """Raise SpecError when two blocks of one document share an id."""
    first: dict[str, BlockSpec] = {}
    for spec in specs:
        if spec.id in first:
            earlier = first[spec.id].source.line
            raise SpecError(
                f"Two blocks use the id '{spec.id}' (the first on line {earlier}).",
                spec.locate("id"),
                "Block ids must be unique in a document; they prefix figure and table labels.",
            )
        first[spec.id] = spec


# ---------------------------------------------------------------------------
# Canonical text
# ---------------------------------------------------------------------------


def _plain(value: Any) -> Any:
    """Dataclasses as dicts (source and key paths left out), tuples as lists."""
    if is_dataclass(value) and not isinstance(value, type):
        return {
            ("as" if item.name == "as_" else item.name): _plain(getattr(value, item.name))
            for item in fields(value)
            if item.name not in ("source", "key")
        }
    if isinstance(value, (list, tuple)):
        return [_plain(item) for item in value]
    return value


def canonical_spec(spec: BlockSpec) -> str:
    """A canonical JSON text of ``spec`` for fingerprints: sorted keys, no line numbers.

    Two blocks that mean the same (key order, comments, whitespace, the place in
    the document) give the same text.
    """
    return json.dumps(_plain(spec), sort_keys=True, separators=(",", ":"), ensure_ascii=False)
