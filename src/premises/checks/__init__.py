"""Assumption checks: one module per assumption, registered in ``REGISTRY``.

Each check is a function ``(CheckContext) -> Finding``. A violated assumption
is a result, never an exception; a check raises only ``DataError`` (a column it
needs is missing) or ``ModelError``.
"""

from __future__ import annotations

from premises.checks.base import REGISTRY, CheckContext, CheckEntry, run_checks

__all__ = ["REGISTRY", "CheckContext", "CheckEntry", "run_checks"]
