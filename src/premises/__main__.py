"""``python -m premises``."""

from premises.cli import entry

entry()
