"""Version of the package and of the result JSON it writes."""

__version__ = "0.1.0"

FORMAT_VERSION = 1
"""Version of the result JSON (``premises render --json``); bumped on any breaking change."""

PROTOCOL_VERSION = 1
"""Version of the filter <-> CLI protocol; a mismatch fails loudly."""
