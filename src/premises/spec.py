"""The premises block: its schema as frozen dataclasses, and YAML -> BlockSpec.

The block's keys are declared once, in ``KEYS`` (a table naming each key's type
and allowed values); one validator writes every message, in one template:
"The 'se' key must be one of classical, hc3, cluster, auto; got 'hc4'."
Every message is located: document line (fence line plus the YAML mark inside
the block), block id and key path.

Threshold cut-offs may be expressions in n (rows) and p (parameters), read by a
small whitelist parser here (numbers, n, p, + - * / **, sqrt, parentheses and
implicit multiplication such as ``2p``); nothing is ever evaluated by Python.
"""

from __future__ import annotations

import difflib
import json
import math
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, fields, is_dataclass, replace
from types import MappingProxyType
from typing import Any, Literal

import yaml

from premises.config import merge_settings
from premises.errors import Location, SpecError

__all__ = [
    "ALIASES",
    "ASSUMPTIONS",
    "KEYS",
    "MAX_BLOCK_CHARS",
    "MAX_BLOCK_ITEMS",
    "BlockSpec",
    "ExclusionSpec",
    "FigureOptions",
    "Key",
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


@dataclass(frozen=True, slots=True)
class SourceRef:
    """Where a block came from, so every later error can point back at it."""

    file: str | None
    """Document path as the user named it (None for a string input)."""
    line: int | None
    """1-based line of the opening fence in the document."""
    key_lines: tuple[tuple[str, int], ...] = ()
    """(dotted key path, 1-based document line) for every key in the block."""

    def line_of(self, key: str) -> int | None:
        """Document line of ``key`` (or of its nearest parent), else the fence line."""
        lines = dict(self.key_lines)
        probe = key
        while probe:
            if probe in lines:
                return lines[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return self.line

    def locate(self, block: str | None, key: str | None = None) -> Location:
        """A :class:`Location` for ``key`` in this block."""
        return Location(self.file, self.line_of(key) if key else self.line, block, key)


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


# ---------------------------------------------------------------------------
# Declared keys
# ---------------------------------------------------------------------------

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
F_MEDIAN = "F-median"
MAX_BLOCK_CHARS = 100_000
"""Longest block body accepted (characters), checked before YAML reads it."""
MAX_BLOCK_ITEMS = 100_000
"""Most keys and list items a block may hold once YAML aliases are expanded; a
block within MAX_BLOCK_CHARS cannot reach it without aliases, so it stops an
alias "bomb" (each alias repeating the one before) before it is walked."""
PROBE_N, PROBE_P = 100, 3
"""A typical size at which a threshold expression must give a positive finite cut-off."""


@dataclass(frozen=True, slots=True)
class Key:
    """One declared key of the block: its type, allowed values and meaning."""

    name: str
    kind: Kind
    """How the value is checked (see ``_CHECKERS``)."""
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

_BLOCK = Key("block", "mapping", "A premises block.", fields=_KEY_LIST)

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
# Threshold expressions: numbers, n, p, + - * / **, sqrt(), parentheses, "2p"
# ---------------------------------------------------------------------------

Expr = tuple[Any, ...]
_EXPR_TOKEN = re.compile(
    r"\s*(?:(?P<num>(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)|(?P<name>[A-Za-z_]\w*)"
    r"|(?P<op>\*\*|[-+*/()^])|(?P<bad>\S))",
    re.ASCII,  # no Unicode digits or spaces: float() would accept some of them
)
_EXPR_HELP = "Expressions may use numbers, n, p, + - * / **, sqrt() and parentheses, e.g. '4/n'."


class _ExprError(ValueError):
    """A threshold expression is malformed; the text says why."""


def _tokenize(text: str) -> list[tuple[str, str]]:
    tokens = []
    for match in _EXPR_TOKEN.finditer(text):
        kind = match.lastgroup
        if kind is None:
            continue
        value = match.group(kind)
        if kind == "bad" or value == "^":
            extra = " (write ** for a power)" if value == "^" else ""
            raise _ExprError(f"'{value}' is not allowed{extra}.")
        if kind == "name" and value not in ("n", "p", "sqrt"):
            raise _ExprError(f"Unknown name '{value}'; only n, p and sqrt are known.")
        tokens.append((kind, value))
    return tokens


class _ExprParser:
    """Recursive descent; implicit multiplication ("2p", "2(p+1)") binds tighter than * and /."""

    def __init__(self, text: str) -> None:
        self.tokens = _tokenize(text)
        self.index = 0

    def peek(self) -> tuple[str, str] | None:
        return self.tokens[self.index] if self.index < len(self.tokens) else None

    def take(self, value: str | None = None) -> tuple[str, str]:
        token = self.peek()
        if token is None:
            raise _ExprError("The expression ends too early.")
        if value is not None and token[1] != value:
            raise _ExprError(f"Expected '{value}' but found '{token[1]}'.")
        self.index += 1
        return token

    def parse(self) -> Expr:
        if not self.tokens:
            raise _ExprError("The expression is empty.")
        tree = self.sum()
        if self.peek() is not None:
            raise _ExprError(f"Unexpected '{self.peek()[1]}'.")  # type: ignore[index]
        return tree

    def sum(self) -> Expr:
        tree = self.term()
        while self.peek() in (("op", "+"), ("op", "-")):
            tree = ("bin", self.take()[1], tree, self.term())
        return tree

    def term(self) -> Expr:
        tree = self.product()
        while self.peek() in (("op", "*"), ("op", "/")):
            tree = ("bin", self.take()[1], tree, self.product())
        return tree

    def product(self) -> Expr:
        tree = self.unary()
        while self._juxtaposed():
            tree = ("bin", "*", tree, self.power())
        return tree

    def _juxtaposed(self) -> bool:
        before = self.tokens[self.index - 1] if self.index else None
        after = self.peek()
        return (
            before is not None
            and after is not None
            and (before[0] == "num" or before == ("op", ")"))
            and (after[0] == "name" or after == ("op", "("))
        )

    def unary(self) -> Expr:
        if self.peek() in (("op", "-"), ("op", "+")):
            sign = self.take()[1]
            operand = self.unary()
            return ("neg", operand) if sign == "-" else operand
        return self.power()

    def power(self) -> Expr:
        base = self.atom()
        if self.peek() == ("op", "**"):
            self.take()
            return ("bin", "**", base, self.unary())
        return base

    def atom(self) -> Expr:
        kind, value = self.take()
        if kind == "num":
            return ("num", float(value))
        if value == "sqrt":
            self.take("(")
            inner = self.sum()
            self.take(")")
            return ("sqrt", inner)
        if kind == "name":
            return ("var", value)
        if value == "(":
            inner = self.sum()
            self.take(")")
            return inner
        raise _ExprError(f"Unexpected '{value}'.")


def _evaluate(tree: Expr, n: float, p: float) -> float:
    head = tree[0]
    if head == "num":
        return float(tree[1])
    if head == "var":
        return n if tree[1] == "n" else p
    if head == "neg":
        return -_evaluate(tree[1], n, p)
    if head == "sqrt":
        inner = _evaluate(tree[1], n, p)
        if inner < 0:
            raise _ExprError(f"sqrt of a negative number ({inner:g}).")
        return math.sqrt(inner)
    left, right = _evaluate(tree[2], n, p), _evaluate(tree[3], n, p)
    try:
        if tree[1] == "+":
            return left + right
        if tree[1] == "-":
            return left - right
        if tree[1] == "*":
            return left * right
        if tree[1] == "/":
            return left / right
        result = left**right
    except ZeroDivisionError as exc:
        raise _ExprError("It divides by zero.") from exc
    except OverflowError as exc:
        raise _ExprError("It overflows.") from exc
    if isinstance(result, complex):
        raise _ExprError("A negative number is raised to a fractional power.")
    return float(result)


def parse_threshold(text: str, *, allow_f_median: bool = False) -> Expr:
    """Parse a threshold expression into a small tree, or raise ``ValueError``.

    Parameters
    ----------
    text
        A number or an expression in n and p: ``"4/n"``, ``"2p/n"``, ``"3*p/n"``,
        ``"2*sqrt(p/n)"``, ``"1"``; ``"F-median"`` where ``allow_f_median``.
    allow_f_median
        Accept ``F-median`` (Cook's distance only).

    Returns
    -------
    tuple
        The expression tree (``("fmedian",)`` for ``F-median``).
    """
    if text.strip() == F_MEDIAN:
        if not allow_f_median:
            raise _ExprError("F-median applies to Cook's distance only.")
        return ("fmedian",)
    return _ExprParser(text).parse()


def evaluate_threshold(expr: str, n: int, p: int, *, location: Location | None = None) -> float:
    """The cut-off an expression gives for ``n`` rows and ``p`` parameters.

    Parameters
    ----------
    expr
        A number or an expression in n and p (see :func:`parse_threshold`), or
        ``F-median``: the median of the F(p, n - p) distribution, Cook (1977).
    n, p
        Rows analysed and parameters (intercept included).
    location
        Where the expression was written, for the error message.

    Returns
    -------
    float
        A positive, finite cut-off.

    Raises
    ------
    SpecError
        When the expression is malformed or gives no positive finite number.

    Examples
    --------
    >>> evaluate_threshold("2p/n", n=50, p=5)
    0.2
    """
    try:
        tree = parse_threshold(expr, allow_f_median=True)
        if tree == ("fmedian",):
            if n <= p:
                raise _ExprError(f"F-median needs more rows than parameters (n={n}, p={p}).")
            from scipy.stats import f as f_distribution  # lazy: scipy is heavy

            value = float(f_distribution.ppf(0.5, p, n - p))  # Cook (1977)
        else:
            value = _evaluate(tree, float(n), float(p))
    except _ExprError as exc:
        raise SpecError(
            f"The threshold '{expr}' cannot be evaluated for n={n}, p={p}: {exc}",
            location,
            _EXPR_HELP,
        ) from exc
    if not math.isfinite(value) or value <= 0:
        raise SpecError(
            f"The threshold '{expr}' gives {value:g} for n={n}, p={p}; a cut-off must be "
            "a positive finite number.",
            location,
            _EXPR_HELP,
        )
    return value


# ---------------------------------------------------------------------------
# YAML with line numbers
# ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Context:
    """Where values being checked came from, so every message can say where."""

    file: str | None
    fence_line: int
    block: str | None = None
    key_lines: tuple[tuple[str, int], ...] = ()
    origin: Literal["block", "attributes", "defaults", "overrides"] = "block"

    def locate(self, path: str) -> Location:
        if self.origin == "block":
            line = SourceRef(self.file, self.fence_line, self.key_lines).line_of(path)
        elif self.origin == "attributes":
            line = self.fence_line
        else:
            line = None
        return Location(self.file, line, self.block, path or None)

    def fail(self, path: str, problem: str, hint: str | None = None) -> SpecError:
        notes = {
            "attributes": "The value comes from the fence's attributes.",
            "defaults": "The value comes from the document's front matter or project settings.",
            "overrides": "The value comes from the command line.",
        }
        extra = notes.get(self.origin)
        if extra:
            hint = f"{hint} {extra}" if hint else extra
        return SpecError(problem, self.locate(path), hint)


_YAML_BREAK = re.compile("\r\n|[\r\n\x85\u2028\u2029]")
"""Line breaks as YAML counts them."""


_OTHER_BREAK = re.compile("[\x85\u2028\u2029]")
"""Characters YAML reads as line breaks but a Markdown document does not."""


def _reject_other_breaks(body: str, ctx: _Context) -> None:
    """Refuse U+0085, U+2028 and U+2029: YAML would break the line there and every
    later line number would disagree with the document's."""
    found = _OTHER_BREAK.search(body)
    if found is not None:
        line = ctx.fence_line + 1 + len(re.findall("\r\n|\r|\n", body[: found.start()]))
        raise SpecError(
            f"The block holds the character U+{ord(found.group()):04X}, which YAML reads as a line "
            "break but the document does not.",
            Location(ctx.file, line, ctx.block),
            "Replace it with a space or an ordinary line break (it often comes from pasted text).",
        )


def _reject_tabs(body: str, ctx: _Context) -> None:
    for number, text in enumerate(_YAML_BREAK.split(body)):
        indent = text[: len(text) - len(text.lstrip(" \t"))]
        if "\t" in indent:
            raise SpecError(
                "This line of the block is indented with a tab.",
                Location(ctx.file, ctx.fence_line + 1 + number, ctx.block),
                "YAML allows only spaces for indentation; replace the tab with spaces.",
            )


def _record_lines(
    node: yaml.Node, path: str, ctx: _Context, lines: dict[str, int], stack: tuple[int, ...] = ()
) -> None:
    """Map every key path below ``node`` to its document line; reject duplicate keys."""
    if id(node) in stack:  # a recursive alias; the validator rejects the value itself
        return
    if len(lines) > MAX_BLOCK_ITEMS:
        raise SpecError(
            f"The block holds more than {MAX_BLOCK_ITEMS:,} keys and list items once its "
            "YAML aliases (*name) are expanded.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "Write the values out instead of repeating anchors; a block needs a few dozen keys.",
        )
    stack = (*stack, id(node))
    if isinstance(node, yaml.MappingNode):
        seen: dict[str, int] = {}
        for key_node, value_node in node.value:
            name = str(key_node.value)
            sub = f"{path}.{name}" if path else name
            line = ctx.fence_line + 1 + key_node.start_mark.line
            if name in seen:
                raise SpecError(
                    f"The key '{sub}' appears twice (first on line {seen[name]}).",
                    Location(ctx.file, line, ctx.block, sub),
                    "Keep one of them; YAML would silently keep only the last.",
                )
            seen[name] = line
            lines.setdefault(sub, line)
            _record_lines(value_node, sub, ctx, lines, stack)
    elif isinstance(node, yaml.SequenceNode):
        for index, item in enumerate(node.value):
            sub = f"{path}[{index}]"
            lines.setdefault(sub, ctx.fence_line + 1 + item.start_mark.line)
            _record_lines(item, sub, ctx, lines, stack)


def _yaml_problem(exc: yaml.MarkedYAMLError) -> str:
    """PyYAML's context and problem as one clause ("while parsing ..., expected ...")."""
    return ", ".join(part for part in (exc.context, exc.problem) if part) or str(exc)


def _error_line(exc: yaml.MarkedYAMLError, body: str, ctx: _Context) -> int:
    """Document line of a YAML error; a mark past the body's end falls back to its context."""
    last = len(_YAML_BREAK.findall(body.rstrip("\r\n")))
    marks = [m for m in (exc.problem_mark, exc.context_mark) if m is not None]
    inside = [m for m in marks if m.line <= last]
    if inside:
        return ctx.fence_line + 1 + int(inside[0].line)
    return ctx.fence_line + 1 + last


def _with_block_id(node: yaml.Node, ctx: _Context) -> _Context:
    """Name the block in messages about its YAML when its 'id' is a plain value."""
    if ctx.block is not None or not isinstance(node, yaml.MappingNode):
        return ctx
    for key_node, value_node in node.value:
        if key_node.value == "id" and isinstance(value_node, yaml.ScalarNode):
            if isinstance(value_node.value, str) and ID_PATTERN.fullmatch(value_node.value):
                return replace(ctx, block=value_node.value)
    return ctx


def _load_yaml(body: str, ctx: _Context) -> tuple[dict[str, Any], tuple[tuple[str, int], ...]]:
    """The block's mapping and the document line of every key path."""
    if len(body) > MAX_BLOCK_CHARS:
        raise SpecError(
            f"The block is {len(body):,} characters long, over the limit of {MAX_BLOCK_CHARS:,}.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "Split it into several blocks, or shorten long titles and reasons.",
        )
    _reject_other_breaks(body, ctx)
    _reject_tabs(body, ctx)
    lines: dict[str, int] = {}
    try:
        loader = yaml.SafeLoader(body)
        try:
            node = loader.get_single_node()
            value = None
            if node is not None:
                ctx = _with_block_id(node, ctx)
                _record_lines(node, "", ctx, lines)
                value = loader.construct_document(node)
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        raise SpecError(
            f"The block is not valid YAML: {_yaml_problem(exc)}.",
            Location(ctx.file, _error_line(exc, body, ctx), ctx.block),
            "Check indentation and quoting near this line; values holding ': ' or ' #' "
            "need quotes.",
        ) from exc
    except yaml.reader.ReaderError as exc:
        line = ctx.fence_line + 1 + len(_YAML_BREAK.findall(body, 0, exc.position))
        raise SpecError(
            f"The block holds a character YAML does not allow (code point {exc.character:#x}).",
            Location(ctx.file, line, ctx.block),
            "Remove the control character from this line.",
        ) from exc
    except yaml.YAMLError as exc:
        raise SpecError(
            f"The block is not valid YAML: {exc}.", Location(ctx.file, ctx.fence_line, ctx.block)
        ) from exc
    if value is None:
        raise SpecError(
            "The block is empty.",
            Location(ctx.file, ctx.fence_line, ctx.block),
            "A block needs at least 'id', 'data' and 'model' keys.",
        )
    if not isinstance(value, dict):
        raise SpecError(
            f"The block must be a YAML mapping of keys to values; got {_show(value)}.",
            Location(
                ctx.file, ctx.fence_line + 1 + (node.start_mark.line if node else 0), ctx.block
            ),
            "Write one 'key: value' per line, e.g. 'id: main', 'data: data.csv'.",
        )
    return value, tuple(lines.items())


# ---------------------------------------------------------------------------
# The one validator
# ---------------------------------------------------------------------------


def _show(value: Any) -> str:
    """A value as a message quotes it."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "nothing (null)"
    if isinstance(value, str):
        return f"'{value}'"
    if isinstance(value, (int, float)):
        return f"{value:g}" if isinstance(value, float) else str(value)
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, dict):
        return "a mapping"
    return f"a {type(value).__name__} value"


def _number_text(value: float) -> str:
    return str(int(value)) if float(value).is_integer() else f"{value:g}"


def _bounds(key: Key) -> str:
    low = None if key.low is None else _number_text(key.low)
    high = None if key.high is None else _number_text(key.high)
    if low is not None and high is not None:
        return f" between {low} and {high}" + (" (exclusive)" if key.exclusive else "")
    if low is not None:
        return f" greater than {low}" if key.exclusive else f" of at least {low}"
    if high is not None:
        return f" less than {high}" if key.exclusive else f" of at most {high}"
    return ""


def _expectation(key: Key) -> str:
    """What a value of ``key`` must be, as the message template fills it in."""
    listed = ", ".join(key.choices)
    phrases: dict[str, str] = {
        "string": "a non-empty string",
        "id": "lower-case letters, digits and hyphens, starting with a letter",
        "model": "a formula with exactly one '~', like 'y ~ x1 + x2'",
        "integer": "an integer" + _bounds(key),
        "number": "a number" + _bounds(key),
        "boolean": "true or false",
        "choice": f"one of {listed}",
        "choices": f"a list of any of {listed}",
        "ids": "a non-empty list of row ids (strings or integers)",
        "threshold": "a positive number or an expression in n and p such as '4/n' or "
        "'2*sqrt(p/n)'" + (" or 'F-median'" if key.name == "cooks" else ""),
        "limits": "two quantiles [lower, upper] with 0 <= lower < upper <= 1",
        "mapping": "a mapping of keys to values",
        "entries": "a list of mappings (one '- ' entry per item)",
    }
    return phrases[key.kind]


def _reject(key: Key, value: Any, path: str, ctx: _Context, detail: str | None = None) -> SpecError:
    """The one message template for a value of the wrong type or out of range."""
    problem = f"The '{path}' key must be {_expectation(key)}; got {_show(value)}."
    hint = detail
    if hint is None and key.kind == "choices" and isinstance(value, str) and value in key.choices:
        hint = f"Write it as a list: '{path}: [{value}]'."
    elif hint is None and isinstance(value, str) and key.choices:
        close = difflib.get_close_matches(value, key.choices, n=1)
        hint = f"Did you mean '{close[0]}'?" if close else None
    return ctx.fail(path, problem, hint or f"'{key.name}': {key.description}")


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _in_bounds(key: Key, value: float) -> bool:
    if not math.isfinite(value):
        return False
    if key.low is not None and (value <= key.low if key.exclusive else value < key.low):
        return False
    return key.high is None or (value < key.high if key.exclusive else value <= key.high)


def _check_string(key: Key, value: Any, path: str, ctx: _Context) -> str:
    if not isinstance(value, str) or not value.strip():
        raise _reject(key, value, path, ctx)
    return value


def _check_id(key: Key, value: Any, path: str, ctx: _Context) -> str:
    if not isinstance(value, str) or ID_PATTERN.fullmatch(value) is None:
        raise _reject(
            key, value, path, ctx, "Ids become figure and table labels; write e.g. 'yield-main'."
        )
    return value


def _check_model(key: Key, value: Any, path: str, ctx: _Context) -> str:
    if not isinstance(value, str) or value.count("~") != 1:
        raise _reject(key, value, path, ctx, "Write the outcome, one '~', then the terms.")
    return value


def _check_integer(key: Key, value: Any, path: str, ctx: _Context) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not _in_bounds(key, value):
        raise _reject(key, value, path, ctx)
    return value


def _check_number(key: Key, value: Any, path: str, ctx: _Context) -> float:
    if not _is_number(value) or not _in_bounds(key, float(value)):
        raise _reject(key, value, path, ctx)
    return float(value)


def _check_boolean(key: Key, value: Any, path: str, ctx: _Context) -> bool:
    if not isinstance(value, bool):
        raise _reject(key, value, path, ctx)
    return value


def _check_choice(key: Key, value: Any, path: str, ctx: _Context) -> str:
    if not isinstance(value, str) or value not in key.choices:
        raise _reject(key, value, path, ctx)
    return value


def _check_choices(key: Key, value: Any, path: str, ctx: _Context) -> tuple[str, ...]:
    if not isinstance(value, list) or (key.nonempty and not value):
        raise _reject(key, value, path, ctx)
    item_key = Key(key.name, "choice", key.description, key.choices)
    chosen = {_check_choice(item_key, item, f"{path}[{i}]", ctx) for i, item in enumerate(value)}
    return tuple(choice for choice in key.choices if choice in chosen)  # canonical order


def _check_ids(key: Key, value: Any, path: str, ctx: _Context) -> tuple[str, ...]:
    valid = (
        isinstance(value, list)
        and value
        and all(isinstance(item, (str, int)) and not isinstance(item, bool) for item in value)
    )
    if not valid:
        raise _reject(key, value, path, ctx)
    return tuple(str(item) for item in value)


def _check_threshold(key: Key, value: Any, path: str, ctx: _Context) -> str:
    if _is_number(value):
        if not math.isfinite(value) or value <= 0:
            raise _reject(key, value, path, ctx)
        return repr(float(value)) if isinstance(value, float) else str(value)
    if not isinstance(value, str):
        raise _reject(key, value, path, ctx)
    try:
        tree = parse_threshold(value, allow_f_median=key.name == "cooks")
        if tree != ("fmedian",):
            probe = _evaluate(tree, PROBE_N, PROBE_P)
            if not math.isfinite(probe) or probe <= 0:
                raise _ExprError(f"It gives {probe:g} for n={PROBE_N}, p={PROBE_P}.")
    except _ExprError as exc:
        raise _reject(key, value, path, ctx, f"{exc} {_EXPR_HELP}") from exc
    return value.strip()


def _check_limits(key: Key, value: Any, path: str, ctx: _Context) -> tuple[float, float]:
    if (
        not isinstance(value, list)
        or len(value) != 2
        or not all(_is_number(v) for v in value)
        or not 0 <= value[0] < value[1] <= 1
    ):
        raise _reject(
            key,
            value,
            path,
            ctx,
            "E.g. 'limits: [0.01, 0.99]' caps values at the 1st and 99th percentiles.",
        )
    return float(value[0]), float(value[1])


def _check_mapping(key: Key, value: Any, path: str, ctx: _Context) -> dict[str, Any]:
    if not isinstance(value, dict):
        raise _reject(key, value, path, ctx)
    owner = "The block" if not path else f"The '{path}' mapping"
    return _check_fields(key, value, path, ctx, owner)


def _check_entries(key: Key, value: Any, path: str, ctx: _Context) -> list[dict[str, Any]]:
    if not isinstance(value, list):
        raise _reject(key, value, path, ctx)
    entries = []
    for index, item in enumerate(value):
        sub = f"{path}[{index}]"
        if not isinstance(item, dict):
            raise ctx.fail(
                sub,
                f"The '{sub}' entry must be a mapping; got {_show(item)}.",
                f"'{key.name}': {key.description}",
            )
        checked = _check_fields(key, item, sub, ctx, f"The '{sub}' entry")
        _require(key, checked, sub, ctx, f"The '{sub}' entry")
        _ENTRY_RULES[key.name](checked, sub, ctx)
        entries.append(checked)
    return entries


def _closest(name: str, table: Mapping[str, Key]) -> str | None:
    """The key a misspelt or differently worded ``name`` most likely meant."""
    alias = ALIASES.get(name.lower().replace("-", "_"))
    if alias in table:
        return alias
    close = difflib.get_close_matches(name, list(table), n=1)
    return close[0] if close else None


def _check_fields(
    key: Key, value: dict[Any, Any], path: str, ctx: _Context, owner: str
) -> dict[str, Any]:
    """Check every sub-key of a mapping against ``key.fields``; unknown keys get a suggestion."""
    table = key.table
    checked: dict[str, Any] = {}
    for raw_name, item in value.items():
        name = str(raw_name)
        sub = f"{path}.{name}" if path else name
        if name not in table:
            close = _closest(name, table)
            hint = f"Did you mean '{close}'?" if close else "Valid keys: " + ", ".join(table) + "."
            raise ctx.fail(sub, f"{owner} has an unknown key '{name}'.", hint)
        checked[name] = _CHECKERS[table[name].kind](table[name], item, sub, ctx)
    return checked


def _require(key: Key, checked: Mapping[str, Any], path: str, ctx: _Context, owner: str) -> None:
    for sub_key in key.fields:
        if sub_key.required and sub_key.name not in checked:
            raise ctx.fail(
                path,
                f"{owner} lacks the required key '{sub_key.name}'.",
                f"Add '{sub_key.name}:' ({sub_key.description})",
            )


def _transform_rules(entry: Mapping[str, Any], path: str, ctx: _Context) -> None:
    if entry["op"] == "winsorize" and "limits" not in entry:
        raise ctx.fail(
            path,
            f"The '{path}' entry winsorizes but gives no 'limits'.",
            "Add e.g. 'limits: [0.01, 0.99]' (lower and upper quantiles).",
        )
    if entry["op"] != "winsorize" and "limits" in entry:
        raise ctx.fail(
            f"{path}.limits",
            f"The 'limits' key applies to op winsorize only; this entry's op is '{entry['op']}'.",
            "Remove 'limits' or use 'op: winsorize'.",
        )


def _exclude_rules(entry: Mapping[str, Any], path: str, ctx: _Context) -> None:
    given = [name for name in ("when", "ids") if name in entry]
    if len(given) != 1:
        state = "both" if given else "neither"
        raise ctx.fail(
            path,
            f"The '{path}' entry must have exactly one of 'when' and 'ids'; it has {state}.",
            "Use one entry per rule: 'when: <rule>' selects rows "
            "by a condition, 'ids: [...]' by their ids.",
        )


_ENTRY_RULES: Mapping[str, Callable[[Mapping[str, Any], str, _Context], None]] = MappingProxyType(
    {"transforms": _transform_rules, "exclude": _exclude_rules}
)

_CHECKERS: Mapping[str, Callable[[Key, Any, str, _Context], Any]] = MappingProxyType(
    {
        "string": _check_string,
        "id": _check_id,
        "model": _check_model,
        "integer": _check_integer,
        "number": _check_number,
        "boolean": _check_boolean,
        "choice": _check_choice,
        "choices": _check_choices,
        "ids": _check_ids,
        "threshold": _check_threshold,
        "limits": _check_limits,
        "mapping": _check_mapping,
        "entries": _check_entries,
    }
)


# ---------------------------------------------------------------------------
# Layers, merge and BlockSpec
# ---------------------------------------------------------------------------


def _attribute_layer(attrs: Mapping[str, str], ctx: _Context) -> dict[str, Any]:
    """Fence attributes (``{.premises #id key=val}``) as typed block values."""
    layer: dict[str, Any] = {}
    for name, text in attrs.items():
        key = KEYS.get(name)
        if key is None:
            close = _closest(name, KEYS)
            raise ctx.fail(
                name,
                f"The fence has an unknown attribute '{name}'.",
                f"Did you mean '{close}'?"
                if close
                else "Fence attributes may set scalar block keys such as id or data.",
            )
        if key.kind in ("choices", "ids", "limits", "mapping", "entries"):
            raise ctx.fail(
                name,
                f"The '{name}' key cannot be set in the fence attributes.",
                "Write it in the block's YAML instead.",
            )
        layer[name] = _typed_attribute(key, text)
    return layer


def _typed_attribute(key: Key, text: str) -> Any:
    """Attributes are text; read integers, numbers and booleans for keys that need them."""
    if key.kind == "integer" and re.fullmatch(r"[-+]?[0-9]+", text):
        return int(text)
    if key.kind == "number" and re.fullmatch(
        r"[-+]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][-+]?[0-9]+)?", text
    ):
        return float(text)
    if key.kind == "boolean" and text.lower() in ("true", "false"):
        return text.lower() == "true"
    return text


def _check_layer(layer: Mapping[str, Any], ctx: _Context) -> dict[str, Any]:
    if ctx.origin == "defaults" and "id" in layer:
        raise ctx.fail(
            "id",
            "The 'id' key cannot be set as a document or project default.",
            "Each block names its own id.",
        )
    return _check_mapping(_BLOCK, dict(layer), "", ctx)


def _same_id(fence_id: Any, block: Mapping[str, Any], ctx: _Context) -> None:
    if fence_id is not None and "id" in block and block["id"] != fence_id:
        raise ctx.fail(
            "id",
            f"The fence names the block '{fence_id}' but its 'id' key says '{block['id']}'.",
            "Give the id once, in the fence or in the YAML.",
        )


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
    raw, key_lines = _load_yaml(body, _Context(file, line, fence_id))
    block_id = raw.get("id") if isinstance(raw.get("id"), str) else fence_id
    ctx = _Context(file, line, block_id, key_lines)
    in_fence = _Context(file, line, block_id, origin="attributes")
    layers = [
        _check_layer(defaults or {}, _Context(file, line, block_id, origin="defaults")),
        _check_layer(_attribute_layer(attrs, in_fence), in_fence),
        _check_layer(raw, ctx),
        _check_layer(overrides or {}, _Context(file, line, block_id, origin="overrides")),
    ]
    _same_id(fence_id, layers[2], ctx)
    merged = merge_settings(*layers)
    _require(_BLOCK, merged, "", ctx, "The block")
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
# Canonical text and JSON Schema
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
    schema = _object_schema(_BLOCK)
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
