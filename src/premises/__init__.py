"""premises: a reproducible methods-and-diagnostics section for linear regression.

The public surface is small and pinned by ``tests/test_public_api.py``. Heavy
libraries are imported only when a function needs them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from premises._version import FORMAT_VERSION, __version__
from premises.errors import (
    DataError,
    DriftError,
    Location,
    ModelError,
    PandocError,
    PremisesError,
    RenderError,
    RuleError,
    SpecError,
)

if TYPE_CHECKING:
    from premises.pipeline import RenderOptions, check_file, render_file, render_text

__all__ = [
    "FORMAT_VERSION",
    "DataError",
    "DriftError",
    "Location",
    "ModelError",
    "PandocError",
    "PremisesError",
    "RenderError",
    "RenderOptions",
    "RuleError",
    "SpecError",
    "__version__",
    "check_file",
    "render_file",
    "render_text",
]


def __getattr__(name: str) -> Any:
    # Lazy: importing premises must not import pandas or statsmodels.
    if name in ("RenderOptions", "check_file", "render_file", "render_text"):
        from premises import pipeline

        return getattr(pipeline, name)
    raise AttributeError(f"module 'premises' has no attribute {name!r}")
