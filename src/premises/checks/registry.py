"""The check table: one row per assumption, in reporting order.

Importing this module fills :data:`premises.checks.base.REGISTRY`. A new check
is one module with a ``check_<name>(ctx) -> Finding`` function, one template
and one row here; the contract tests (tests/test_check_contract.py) cover it
without new tests.
"""

from __future__ import annotations

from premises.checks.base import REGISTRY, CheckEntry
from premises.checks.collinearity import check_collinearity
from premises.checks.independence import check_independence
from premises.checks.influence import check_influence
from premises.checks.linearity import check_linearity
from premises.checks.normality import check_normality
from premises.checks.outcome import check_outcome
from premises.checks.variance import check_variance

__all__ = ["ENTRIES"]

ENTRIES: tuple[CheckEntry, ...] = (
    CheckEntry("outcome", check_outcome, "Outcome type", "checks/outcome.md.j2", has_figure=False),
    CheckEntry("linearity", check_linearity, "Linearity", "checks/linearity.md.j2"),
    CheckEntry("normality", check_normality, "Normality of residuals", "checks/normality.md.j2"),
    CheckEntry("variance", check_variance, "Equal variance", "checks/variance.md.j2"),
    CheckEntry("influence", check_influence, "Influential observations", "checks/influence.md.j2"),
    CheckEntry("independence", check_independence, "Independence", "checks/independence.md.j2"),
    CheckEntry("collinearity", check_collinearity, "Collinearity", "checks/collinearity.md.j2"),
)
"""Registered checks in reporting order."""

for _entry in ENTRIES:
    REGISTRY.setdefault(_entry.name, _entry)
