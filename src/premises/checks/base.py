"""The check registry (a table) and the context every check reads."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from premises.fit import FitResult, Influence
from premises.results import Finding
from premises.spec import BlockSpec

__all__ = ["REGISTRY", "CheckContext", "CheckEntry", "run_checks"]


@dataclass(frozen=True)
class CheckContext:
    """What a check may look at: the fit, its influence, the analysed rows, the block."""

    spec: BlockSpec
    fit: FitResult
    influence: Influence
    frame: pd.DataFrame
    """Analysed rows (after transforms, exclusions, missing), in design order."""
    ids: np.ndarray
    """(n,) str ids of the analysed rows."""
    rows: np.ndarray
    """(n,) 1-based row numbers in the data file."""
    seed: int


@dataclass(frozen=True)
class CheckEntry:
    """A registered check."""

    name: str
    """Assumption name (key in ``checks:``)."""
    function: Callable[[CheckContext], Finding]
    title: str
    """Human name, e.g. "Equal variance"."""
    template: str
    """Template that writes its sentence, e.g. ``checks/variance.md.j2``."""
    has_figure: bool = True


REGISTRY: dict[str, CheckEntry] = {}
"""Filled by ``premises.checks.registry``; keys in reporting order."""


def run_checks(ctx: CheckContext, names: tuple[str, ...]) -> tuple[Finding, ...]:
    """Run the named checks in registry order."""
    from premises.checks import registry  # noqa: F401  (fills REGISTRY)

    return tuple(REGISTRY[name].function(ctx) for name in REGISTRY if name in names)
