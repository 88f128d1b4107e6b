"""The one validator of block values: every key checked against its declaration in ``KEYS``.

One message template for every type or range error: "The 'se' key must be one
of classical, hc3, cluster, auto; got 'hc4'." Unknown keys get a "did you
mean". The same checks run on each settings layer (project and front-matter
defaults, fence attributes, the block's YAML, command-line overrides) before
they are merged.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Callable, Mapping
from types import MappingProxyType
from typing import Any

from premises.errors import SpecError
from premises.keys import ALIASES, BLOCK, ID_PATTERN, KEYS, Key
from premises.source import Context, quote_value
from premises.thresholds import EXPRESSION_HELP, ExpressionError, evaluate_tree, parse_threshold

PROBE_N, PROBE_P = 100, 3
"""A typical size at which a threshold expression must give a positive finite cut-off."""


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


def _reject(key: Key, value: Any, path: str, ctx: Context, detail: str | None = None) -> SpecError:
    """The one message template for a value of the wrong type or out of range."""
    problem = f"The '{path}' key must be {_expectation(key)}; got {quote_value(value)}."
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


def _check_string(key: Key, value: Any, path: str, ctx: Context) -> str:
    if not isinstance(value, str) or not value.strip():
        raise _reject(key, value, path, ctx)
    return value


def _check_id(key: Key, value: Any, path: str, ctx: Context) -> str:
    if not isinstance(value, str) or ID_PATTERN.fullmatch(value) is None:
        raise _reject(
            key, value, path, ctx, "Ids become figure and table labels; write e.g. 'yield-main'."
        )
    return value


def _check_model(key: Key, value: Any, path: str, ctx: Context) -> str:
    if not isinstance(value, str) or value.count("~") != 1:
        raise _reject(key, value, path, ctx, "Write the outcome, one '~', then the terms.")
    return value


def _check_integer(key: Key, value: Any, path: str, ctx: Context) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not _in_bounds(key, value):
        raise _reject(key, value, path, ctx)
    return value


def _check_number(key: Key, value: Any, path: str, ctx: Context) -> float:
    if not _is_number(value) or not _in_bounds(key, float(value)):
        raise _reject(key, value, path, ctx)
    return float(value)


def _check_boolean(key: Key, value: Any, path: str, ctx: Context) -> bool:
    if not isinstance(value, bool):
        raise _reject(key, value, path, ctx)
    return value


def _check_choice(key: Key, value: Any, path: str, ctx: Context) -> str:
    if not isinstance(value, str) or value not in key.choices:
        raise _reject(key, value, path, ctx)
    return value


def _check_choices(key: Key, value: Any, path: str, ctx: Context) -> tuple[str, ...]:
    if not isinstance(value, list) or (key.nonempty and not value):
        raise _reject(key, value, path, ctx)
    item_key = Key(key.name, "choice", key.description, key.choices)
    chosen = {_check_choice(item_key, item, f"{path}[{i}]", ctx) for i, item in enumerate(value)}
    return tuple(choice for choice in key.choices if choice in chosen)  # canonical order


def _check_ids(key: Key, value: Any, path: str, ctx: Context) -> tuple[str, ...]:
    valid = (
        isinstance(value, list)
        and value
        and all(isinstance(item, (str, int)) and not isinstance(item, bool) for item in value)
    )
    if not valid:
        raise _reject(key, value, path, ctx)
    return tuple(str(item) for item in value)


def _check_threshold(key: Key, value: Any, path: str, ctx: Context) -> str:
    if _is_number(value):
        if not math.isfinite(value) or value <= 0:
            raise _reject(key, value, path, ctx)
        return repr(float(value)) if isinstance(value, float) else str(value)
    if not isinstance(value, str):
        raise _reject(key, value, path, ctx)
    try:
        tree = parse_threshold(value, allow_f_median=key.name == "cooks")
        if tree != ("fmedian",):
            probe = evaluate_tree(tree, PROBE_N, PROBE_P)
            if not math.isfinite(probe) or probe <= 0:
                raise ExpressionError(f"It gives {probe:g} for n={PROBE_N}, p={PROBE_P}.")
    except ExpressionError as exc:
        raise _reject(key, value, path, ctx, f"{exc} {EXPRESSION_HELP}") from exc
    return value.strip()


def _check_limits(key: Key, value: Any, path: str, ctx: Context) -> tuple[float, float]:
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


def _check_mapping(key: Key, value: Any, path: str, ctx: Context) -> dict[str, Any]:
    if not isinstance(value, dict):
        raise _reject(key, value, path, ctx)
    owner = "The block" if not path else f"The '{path}' mapping"
    return _check_fields(key, value, path, ctx, owner)


def _check_entries(key: Key, value: Any, path: str, ctx: Context) -> list[dict[str, Any]]:
    if not isinstance(value, list):
        raise _reject(key, value, path, ctx)
    entries = []
    for index, item in enumerate(value):
        sub = f"{path}[{index}]"
        if not isinstance(item, dict):
            raise ctx.fail(
                sub,
                f"The '{sub}' entry must be a mapping; got {quote_value(item)}.",
                f"'{key.name}': {key.description}",
            )
        checked = _check_fields(key, item, sub, ctx, f"The '{sub}' entry")
        require(key, checked, sub, ctx, f"The '{sub}' entry")
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
    key: Key, value: dict[Any, Any], path: str, ctx: Context, owner: str
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


def require(key: Key, checked: Mapping[str, Any], path: str, ctx: Context, owner: str) -> None:
    for sub_key in key.fields:
        if sub_key.required and sub_key.name not in checked:
            raise ctx.fail(
                path,
                f"{owner} lacks the required key '{sub_key.name}'.",
                f"Add '{sub_key.name}:' ({sub_key.description})",
            )


def _transform_rules(entry: Mapping[str, Any], path: str, ctx: Context) -> None:
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


def _exclude_rules(entry: Mapping[str, Any], path: str, ctx: Context) -> None:
    given = [name for name in ("when", "ids") if name in entry]
    if len(given) != 1:
        state = "both" if given else "neither"
        raise ctx.fail(
            path,
            f"The '{path}' entry must have exactly one of 'when' and 'ids'; it has {state}.",
            "Use one entry per rule: 'when: <rule>' selects rows "
            "by a condition, 'ids: [...]' by their ids.",
        )


_ENTRY_RULES: Mapping[str, Callable[[Mapping[str, Any], str, Context], None]] = MappingProxyType(
    {"transforms": _transform_rules, "exclude": _exclude_rules}
)

_CHECKERS: Mapping[str, Callable[[Key, Any, str, Context], Any]] = MappingProxyType(
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
# Settings layers
# ---------------------------------------------------------------------------


def attribute_layer(attrs: Mapping[str, str], ctx: Context) -> dict[str, Any]:
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


def check_layer(layer: Mapping[str, Any], ctx: Context) -> dict[str, Any]:
    if ctx.origin == "defaults" and "id" in layer:
        raise ctx.fail(
            "id",
            "The 'id' key cannot be set as a document or project default.",
            "Each block names its own id.",
        )
    return _check_mapping(BLOCK, dict(layer), "", ctx)


def same_id(fence_id: Any, block: Mapping[str, Any], ctx: Context) -> None:
    if fence_id is not None and "id" in block and block["id"] != fence_id:
        raise ctx.fail(
            "id",
            f"The fence names the block '{fence_id}' but its 'id' key says '{block['id']}'.",
            "Give the id once, in the fence or in the YAML.",
        )
