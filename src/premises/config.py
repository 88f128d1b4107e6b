"""Settings as data with one merge order.

Built-in defaults < project file < front matter < block < command line. Each layer
is a plain mapping of block keys; a later layer overrides an earlier one key by
key, except ``thresholds`` and ``figures``, which are merged one sub-key at a
time (a block that sets ``thresholds: {vif: 5}`` keeps a ``cooks`` cut-off set
in the front matter).

The project file is the nearest ``_quarto.yml`` (its ``premises:`` key) or
``pyproject.toml`` (its ``[tool.premises]`` table) found walking up from the
document's folder. Nothing here is global: every function takes and returns data.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import yaml

from premises.errors import Location, SpecError

__all__ = [
    "NESTED_KEYS",
    "PROJECT_FILES",
    "document_defaults",
    "find_project_file",
    "merge_settings",
    "read_project_settings",
]

NESTED_KEYS = ("thresholds", "figures")
"""Keys whose mappings are merged per sub-key rather than replaced."""

PROJECT_FILES = ("_quarto.yml", "_quarto.yaml", "pyproject.toml")
"""Files that may hold project settings, in the order they are tried in one folder."""


def merge_settings(*layers: Mapping[str, Any] | None) -> dict[str, Any]:
    """Merge settings layers; later layers win.

    Parameters
    ----------
    *layers
        Mappings from lowest to highest precedence: built-in defaults, project
        file, front matter, block, command line. ``None`` layers are skipped.

    Returns
    -------
    dict
        A new mapping. ``thresholds`` and ``figures`` are merged per sub-key when
        both sides are mappings; any other key is replaced as a whole.

    Examples
    --------
    >>> merge_settings({"se": "hc3", "thresholds": {"vif": 5}},
    ...                {"thresholds": {"alpha": 0.01}})
    {'se': 'hc3', 'thresholds': {'vif': 5, 'alpha': 0.01}}
    """
    merged: dict[str, Any] = {}
    for layer in layers:
        if layer is None:
            continue
        for key, value in layer.items():
            earlier = merged.get(key)
            if key in NESTED_KEYS and isinstance(earlier, Mapping) and isinstance(value, Mapping):
                merged[key] = {**earlier, **value}
            elif isinstance(value, Mapping):
                merged[key] = dict(value)
            else:
                merged[key] = value
    return merged


def document_defaults(front_matter: Mapping[str, Any], file: str | None = None) -> dict[str, Any]:
    """The ``premises:`` mapping of a document's front matter (empty when absent).

    Raises
    ------
    SpecError
        When ``premises:`` is present but is not a mapping.
    """
    value = front_matter.get("premises")
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise SpecError(
            "The 'premises' key of the front matter must be a mapping of block keys.",
            Location(file, None, None, "premises"),
            "Indent block keys under it, e.g. 'premises:' then '  se: hc3'.",
        )
    return dict(value)


def find_project_file(start_dir: str | Path) -> Path | None:
    """The nearest file, walking up from ``start_dir``, that declares premises settings."""
    folder = Path(start_dir).resolve()
    for candidate_dir in (folder, *folder.parents):
        for name in PROJECT_FILES:
            path = candidate_dir / name
            if path.is_file() and _declares_settings(path):
                return path
    return None


def read_project_settings(start_dir: str | Path) -> dict[str, Any]:
    """Settings from the nearest project file above ``start_dir``.

    Parameters
    ----------
    start_dir
        Folder of the document.

    Returns
    -------
    dict
        The ``premises:`` mapping of ``_quarto.yml`` or the ``[tool.premises]``
        table of ``pyproject.toml``, whichever is nearer (``_quarto.yml`` first
        within one folder); empty when neither exists. On Python 3.10, which has
        no ``tomllib``, ``pyproject.toml`` is not read.

    Raises
    ------
    SpecError
        When that file is malformed or its settings are not a mapping.
    """
    path = find_project_file(start_dir)
    if path is None:
        return {}
    settings = _read_settings(path)
    if not isinstance(settings, Mapping):
        where = "[tool.premises]" if path.name == "pyproject.toml" else "premises"
        raise SpecError(
            f"The '{where}' settings must be a mapping of block keys.",
            Location(str(path)),
            "Write them as key = value lines (TOML) or indented key: value lines (YAML).",
        )
    return dict(settings)


def _declares_settings(path: Path) -> bool:
    """Cheap text test, so malformed unrelated files are never parsed."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return False
    if path.name == "pyproject.toml":
        return (
            _toml_module() is not None
            and re.search(r"^\s*\[\s*tool\s*\.\s*premises\s*[\].]", text, re.MULTILINE) is not None
        )
    return re.search(r"^premises\s*:", text, re.MULTILINE) is not None


def _read_settings(path: Path) -> Any:
    """The premises part of one project file."""
    text = path.read_text(encoding="utf-8")
    if path.name == "pyproject.toml":
        return _read_toml(text, path).get("tool", {}).get("premises", {})
    try:
        data = yaml.safe_load(text)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        raise SpecError(
            f"The project file is not valid YAML: {exc.problem or exc}.",
            Location(str(path), mark.line + 1 if mark is not None else None),
            "Check indentation and quoting near this line.",
        ) from exc
    except yaml.YAMLError as exc:
        raise SpecError(f"The project file is not valid YAML: {exc}.", Location(str(path))) from exc
    return data.get("premises", {}) if isinstance(data, dict) else {}


def _read_toml(text: str, path: Path) -> dict[str, Any]:
    """Parse TOML with the standard library, translating its error."""
    toml = _toml_module()
    if toml is None:  # pragma: no cover - only Python 3.10
        return {}
    try:
        data: dict[str, Any] = toml.loads(text)
    except toml.TOMLDecodeError as exc:
        found = re.search(r"line (\d+)", str(exc))
        raise SpecError(
            f"The project file is not valid TOML: {exc}.",
            Location(str(path), int(found.group(1)) if found else None),
            "Fix the TOML syntax near this line.",
        ) from exc
    return data


def _toml_module() -> Any:
    """``tomllib`` where the standard library has it (Python >= 3.11), else None."""
    try:
        import tomllib
    except ModuleNotFoundError:  # pragma: no cover - only Python 3.10
        return None
    return tomllib
