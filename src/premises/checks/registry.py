"""The check table: one row per assumption, in reporting order.

Importing this module fills :data:`premises.checks.base.REGISTRY`. A new check
is one module with a ``assess_<name>(ctx) -> Finding`` function, one template
and one row here; the contract tests (tests/test_check_contract.py) cover it
without new tests.
"""

from __future__ import annotations

from premises.checks.base import REGISTRY, CheckEntry
from premises.checks.collinearity import assess_collinearity
from premises.checks.independence import assess_independence
from premises.checks.influence import assess_influence
from premises.checks.linearity import assess_linearity
from premises.checks.normality import assess_normality
from premises.checks.outcome import assess_outcome
from premises.checks.variance import assess_variance

__all__ = ["ENTRIES"]

ENTRIES: tuple[CheckEntry, ...] = (
    CheckEntry("outcome", assess_outcome, "Outcome type", "checks/outcome.md.j2", has_figure=False),
    CheckEntry("linearity", assess_linearity, "Linearity", "checks/linearity.md.j2"),
    CheckEntry("normality", assess_normality, "Normality of residuals", "checks/normality.md.j2"),
    CheckEntry("variance", assess_variance, "Equal variance", "checks/variance.md.j2"),
    CheckEntry("influence", assess_influence, "Influential observations", "checks/influence.md.j2"),
    CheckEntry("independence", assess_independence, "Independence", "checks/independence.md.j2"),
    CheckEntry("collinearity", assess_collinearity, "Collinearity", "checks/collinearity.md.j2"),
)
"""Registered checks in reporting order."""

for _entry in ENTRIES:
    REGISTRY.setdefault(_entry.name, _entry)
