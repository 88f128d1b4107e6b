"""Find premises blocks in a Jupyter notebook and build the cells that replace them.

Blocks live in two places:

* a ```` ```premises ```` fence in a markdown (or raw) cell, which also reaches
  the Lua filter when Quarto renders the notebook;
* a raw cell tagged ``premises`` (``metadata.tags``) whose whole source is the
  block's YAML, read only by ``premises notebook``.

Cells written by ``premises notebook`` carry ``metadata.premises =
{generated: true, block: <id>, source_hash: <sha256>}``; they are skipped when
blocks are looked for and dropped before a notebook is rendered again, so a
re-run replaces them instead of adding more. Nothing here knows statistics.
"""

from __future__ import annotations

import base64
import hashlib
import json
import re
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from premises.documents.markdown import RawBlock, find_blocks
from premises.errors import Location, SpecError

__all__ = [
    "BLOCK_TAG",
    "GENERATED_KEY",
    "NotebookBlock",
    "attach_figures",
    "cell_label",
    "cell_source",
    "cells_after",
    "find_notebook_blocks",
    "front_matter",
    "generated_cell",
    "is_generated",
    "read_notebook",
    "remove_generated",
    "source_hash",
    "split_cells",
]

BLOCK_TAG = "premises"
"""Tag of a raw cell whose whole source is a block's YAML."""
GENERATED_KEY = "premises"
"""Cell metadata key that marks cells written by premises."""
MIME_TYPES = {".png": "image/png", ".svg": "image/svg+xml", ".jpg": "image/jpeg", ".jpeg": "image/jpeg"}
"""Figure formats Jupyter can show as cell attachments."""

_HEADING = re.compile(r"^ {0,3}#{1,6}(\s|$)")
_FENCE = re.compile(r"^ {0,3}(`{3,}|~{3,})")
_DIV = re.compile(r"^ {0,3}(:{3,})\s*(\S*)")
_CELL_ID = re.compile(r"[^A-Za-z0-9_-]")


@dataclass(frozen=True, slots=True)
class NotebookBlock:
    """A premises block found in a notebook cell."""

    cell: int
    """0-based index of its cell."""
    raw: RawBlock
    """The block; ``raw.line`` counts lines within the cell (0 for a tagged raw cell,
    whose YAML starts on line 1)."""
    whole_cell: bool
    """True for a raw cell tagged ``premises`` (no fence)."""


def cell_source(cell: Mapping[str, Any]) -> str:
    """A cell's source as one string (files may store it as a list of lines)."""
    source = cell.get("source", "")
    return "".join(source) if isinstance(source, list) else str(source)


def cell_label(file: str, index: int) -> str:
    """How messages name a cell: ``analysis.ipynb [cell 3]`` (1-based)."""
    return f"{file} [cell {index + 1}]"


def is_generated(cell: Mapping[str, Any]) -> bool:
    """Was this cell written by premises?"""
    marker = cell.get("metadata", {}).get(GENERATED_KEY)
    return isinstance(marker, Mapping) and bool(marker.get("generated"))


def read_notebook(text: str, file: str) -> Any:
    """Parse notebook JSON into an ``nbformat`` v4.5 node.

    Older v4 minors are upgraded: cells without an ``id`` get a stable one
    (``cell-<n>``), so the output is the same on every run.

    Raises
    ------
    SpecError
        When the text is not JSON or not a notebook nbformat can read.
    """
    import nbformat
    from nbformat.v4.rwbase import rejoin_lines

    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SpecError(
            f"the notebook '{file}' is not valid JSON ({exc.msg}).", Location(file, exc.lineno), hint="Open and save it again in Jupyter."
        ) from exc
    if not isinstance(data, dict) or not isinstance(data.get("cells", []), list):
        raise SpecError(f"'{file}' is not a Jupyter notebook.", Location(file), hint="Give a .ipynb file.")
    try:
        with warnings.catch_warnings():
            # nbformat warns about missing cell ids; the ids are set below, deterministically.
            warnings.simplefilter("ignore")
            if data.get("nbformat") == 4:
                node = rejoin_lines(nbformat.from_dict(data))  # type: ignore[no-untyped-call]
            else:
                node = nbformat.reads(text, as_version=4)  # type: ignore[no-untyped-call]
    except Exception as exc:  # nbformat raises several unrelated types for bad input
        raise SpecError(f"the notebook '{file}' cannot be read: {exc}.", Location(file), hint="Open and save it again in Jupyter.") from exc
    _ensure_cell_ids(node)
    return node


def _ensure_cell_ids(node: Any) -> None:
    """Give every cell an id (required from nbformat 4.5) without randomness."""
    node["nbformat_minor"] = max(int(node.get("nbformat_minor", 0)), 5)
    used = {cell.get("id") for cell in node.cells if cell.get("id")}
    for index, cell in enumerate(node.cells):
        if not cell.get("id"):
            candidate, suffix = f"cell-{index + 1}", 1
            while candidate in used:
                suffix += 1
                candidate = f"cell-{index + 1}-{suffix}"
            cell["id"] = candidate
            used.add(candidate)


def remove_generated(node: Any) -> Any:
    """A copy of the notebook without the cells premises wrote earlier."""
    import copy

    clean = copy.deepcopy(node)
    clean.cells = [cell for cell in clean.cells if not is_generated(cell)]
    return clean


def front_matter(node: Any) -> str:
    """The YAML front matter Quarto reads from the first raw cell (``---`` ... ``---``), or ''."""
    for cell in node.cells:
        if cell.get("cell_type") != "raw":
            return ""
        source = cell_source(cell)
        if source.lstrip("\ufeff").startswith("---"):
            return source if source.endswith("\n") else source + "\n"
        return ""
    return ""


def _tagged(cell: Mapping[str, Any]) -> bool:
    tags = cell.get("metadata", {}).get("tags", [])
    return isinstance(tags, list) and BLOCK_TAG in tags


def _whole_cell_block(source: str) -> RawBlock:
    body = source if source.endswith("\n") or not source else source + "\n"
    return RawBlock(info=BLOCK_TAG, body=body, line=0, end_line=source.count("\n") + 1, start=0, end=len(source))


def _cell_blocks(index: int, cell: Mapping[str, Any], file: str, tagged_cells: bool) -> Iterator[NotebookBlock]:
    source = cell_source(cell)
    fenced = find_blocks(source, cell_label(file, index))
    for raw in fenced:
        yield NotebookBlock(index, raw, whole_cell=False)
    if not fenced and tagged_cells and cell.get("cell_type") == "raw" and _tagged(cell) and source.strip():
        yield NotebookBlock(index, _whole_cell_block(source), whole_cell=True)


def find_notebook_blocks(node: Any, file: str, *, tagged_cells: bool = True) -> tuple[NotebookBlock, ...]:
    """Find the premises blocks of a notebook, in cell order.

    Parameters
    ----------
    node
        The notebook (from :func:`read_notebook`).
    file
        Its path, for messages.
    tagged_cells
        Also take raw cells tagged ``premises`` as whole-cell blocks
        (``premises notebook`` does; Quarto would show such a cell as text).

    Returns
    -------
    tuple of NotebookBlock

    Raises
    ------
    SpecError
        For a malformed fence; the message names the cell and line.
    """
    found: list[NotebookBlock] = []
    for index, cell in enumerate(node.cells):
        if cell.get("cell_type") in ("markdown", "raw") and not is_generated(cell):
            found.extend(_cell_blocks(index, cell, file, tagged_cells))
    return tuple(found)


def source_hash(body: str) -> str:
    """SHA-256 of a block's YAML with line endings normalised."""
    text = body.replace("\r\n", "\n").replace("\r", "\n")
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def split_cells(markdown: str) -> list[str]:
    """Split a section into cell-sized pieces before each heading.

    A heading inside a code fence or a ``:::`` div does not split, so callouts
    and code stay whole.

    Examples
    --------
    >>> split_cells("<!-- begin -->\\n## A\\ntext\\n\\n## B\\nmore\\n")
    ['<!-- begin -->\\n## A\\ntext', '## B\\nmore']
    """
    pieces: list[list[str]] = [[]]
    fence: str | None = None
    depth = 0
    for line in markdown.splitlines():
        if fence is not None:
            if line.strip().startswith(fence) and line.strip().strip(fence[0]) == "":
                fence = None
        elif (opening := _FENCE.match(line)) is not None:
            fence = opening.group(1)
        elif (div := _DIV.match(line)) is not None:
            depth = depth + 1 if div.group(2) else max(depth - 1, 0)
        elif depth == 0 and _HEADING.match(line) and any(_is_content(text) for text in pieces[-1]):
            pieces.append([])
        pieces[-1].append(line)
    return [chunk for chunk in ("\n".join(lines).strip("\n") for lines in pieces) if chunk.strip()]


def _is_content(line: str) -> bool:
    """Text a reader sees: not blank, not a lone HTML comment such as the section markers."""
    text = line.strip()
    return bool(text) and not (text.startswith("<!--") and text.endswith("-->"))


def attach_figures(markdown: str, figures: Mapping[str, Path]) -> tuple[str, dict[str, dict[str, str]]]:
    """Point figure links at cell attachments and build the attachments.

    Parameters
    ----------
    markdown
        A cell's Markdown.
    figures
        Link target as written in the Markdown -> file holding the figure.

    Returns
    -------
    (str, dict)
        The Markdown with ``(path)`` / ``"path"`` turned into ``attachment:name``,
        and the cell's ``attachments`` mapping (name -> {mime: base64}).

    Raises
    ------
    SpecError
        For a figure format Jupyter cannot show (e.g. pdf).
    """
    attachments: dict[str, dict[str, str]] = {}
    for link, path in figures.items():
        pattern = re.compile(r"(?<=[(\"'])" + re.escape(link) + r"(?=[)\"'\s])")
        if not pattern.search(markdown):
            continue
        mime = MIME_TYPES.get(path.suffix.lower())
        if mime is None:
            raise SpecError(
                f"the figure '{path.name}' is a {path.suffix} file, which a notebook cannot show.",
                hint="Set figures: {format: png} (or svg) for blocks rendered into notebooks.",
            )
        markdown = pattern.sub(f"attachment:{path.name}", markdown)
        attachments[path.name] = {mime: base64.b64encode(path.read_bytes()).decode("ascii")}
    return markdown, attachments


def generated_cell(
    source: str, attachments: Mapping[str, Mapping[str, str]], *, block: str, digest: str, number: int
) -> Any:
    """A markdown cell marked as written by premises, with a stable id."""
    import nbformat

    cell = nbformat.v4.new_markdown_cell(source)  # type: ignore[no-untyped-call]
    cell["id"] = _CELL_ID.sub("-", f"premises-{block}-{number}")[:64]
    cell["metadata"] = {GENERATED_KEY: {"generated": True, "block": block, "source_hash": digest}}
    if attachments:
        cell["attachments"] = {name: dict(bundle) for name, bundle in attachments.items()}
    return cell


def cells_after(node: Any, index: int, new_cells: Sequence[Any]) -> None:
    """Insert ``new_cells`` right after cell ``index`` (in place)."""
    node.cells[index + 1 : index + 1] = list(new_cells)
