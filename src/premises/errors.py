"""The one exception tree of premises.

Exceptions are for when the tool cannot do its job. A violated assumption is a
result (a ``Finding``), never an exception.

::

    PremisesError                      base of everything the tool raises on purpose
    ├── SpecError(ValueError)          the block or the document is malformed
    │   └── RuleError                  an exclusion rule does not parse or is not allowed
    ├── DataError(ValueError)          the data file or its columns cannot serve the block
    ├── ModelError(ValueError)         the model cannot be fitted to these rows
    ├── DriftError(ValueError)         an ``expect:`` or ``pin:`` guard no longer holds
    ├── OutputError(OSError)           an output path cannot be written (a folder, below a file, no space)
    ├── RenderError(RuntimeError)      a template failed to render
    └── PandocError(OSError)           pandoc was missing or failed

Every user-facing error carries a :class:`Location` so its message says what is
wrong, where (file, line, block id, key path) and how to fix it.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "DataError",
    "DriftError",
    "Location",
    "ModelError",
    "OutputError",
    "PandocError",
    "PremisesError",
    "RenderError",
    "RuleError",
    "SpecError",
]


@dataclass(frozen=True, slots=True)
class Location:
    """Where in the user's files a problem sits."""

    file: str | None = None
    """Path of the document (or data file) as the user named it."""
    line: int | None = None
    """1-based line in ``file``."""
    block: str | None = None
    """The block's ``id`` if known."""
    key: str | None = None
    """Dotted key path inside the block, e.g. ``exclude[1].when``."""

    def describe(self) -> str:
        """Render as ``file:line: block 'id', key 'k'``; empty parts are left out."""
        head = ""
        if self.file:
            head = self.file + (f":{self.line}" if self.line else "")
        elif self.line:
            head = f"line {self.line}"
        parts = []
        if self.block:
            parts.append(f"block '{self.block}'")
        if self.key:
            parts.append(f"key '{self.key}'")
        tail = ", ".join(parts)
        if head and tail:
            return f"{head}: {tail}"
        return head or tail

    def with_key(self, key: str, line: int | None = None) -> Location:
        """Return a copy pointing at ``key`` (and ``line`` if given)."""
        return Location(self.file, line if line is not None else self.line, self.block, key)


class PremisesError(Exception):
    """Base class: an error the user can act on.

    Parameters
    ----------
    problem
        What was wrong, in one sentence.
    location
        Where it was.
    hint
        How to fix it.
    """

    exit_code = 2

    def __init__(self, problem: str, location: Location | None = None, hint: str | None = None):
        self.problem = problem
        self.location = location or Location()
        self.hint = hint
        super().__init__(self.message)

    @property
    def message(self) -> str:
        """The single line (or short paragraph) shown to the user."""
        where = self.location.describe()
        text = f"{where}: {self.problem}" if where else self.problem
        if self.hint:
            text += f" {self.hint}"
        return text

    def __str__(self) -> str:
        return self.message


class SpecError(PremisesError, ValueError):
    """The block, its YAML or the document around it is malformed."""


class RuleError(SpecError):
    """An exclusion rule does not parse or uses something outside the rule language."""


class DataError(PremisesError, ValueError):
    """The data file cannot be read, or lacks what the block needs."""


class ModelError(PremisesError, ValueError):
    """The model cannot be fitted to the rows that remain."""


class DriftError(PremisesError, ValueError):
    """A guard (``expect:`` or ``pin:``) on an exclusion rule no longer holds."""


class OutputError(PremisesError, OSError):
    """An output (document, JSON, figures) cannot be written where the command line says."""


class RenderError(PremisesError, RuntimeError):
    """A template failed to render."""

    exit_code = 1


class PandocError(PremisesError, OSError):
    """Pandoc could not be found or failed."""

    exit_code = 1
