"""Document formats: find premises blocks in a document and put results back.

Each module handles one format and returns raw blocks (text and positions); none
of them knows statistics. ``markdown`` scans Markdown and Quarto text.
"""

from __future__ import annotations

from premises.documents.markdown import RawBlock, find_blocks, read_front_matter, splice

__all__ = ["RawBlock", "find_blocks", "read_front_matter", "splice"]
