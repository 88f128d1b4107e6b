"""The pandoc and Quarto route: the filter protocol, the extension, the pre-render step.

* :func:`run_filter` answers one request of ``premises.lua`` (``premises filter``).
* :func:`install_extension` copies the Quarto extension shipped in the package
  (``premises quarto install``), so the Lua filter always matches the package.
* :func:`prerender` validates every block of a Quarto project before any page
  renders (``premises quarto prerender`` under ``project: pre-render:``).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

from premises._version import PROTOCOL_VERSION, __version__
from premises.documents.markdown import RawBlock, find_blocks, read_front_matter
from premises.documents.pandoc import RequestBlock, read_request, write_reply
from premises.errors import PremisesError, SpecError
from premises.notebooks import Fragment, FrontMatter, check_notebook, render_fragments
from premises.pipeline import RenderOptions, check_file

__all__ = [
    "EXTENSION_NAME",
    "PrerenderReport",
    "check_protocol",
    "extension_source",
    "install_extension",
    "lua_filter_path",
    "prerender",
    "project_inputs",
    "quiet_from_env",
    "run_filter",
    "warm_document",
]

EXTENSION_NAME = "premises"
MARKDOWN_SUFFIXES = (".qmd", ".md", ".markdown", ".rmd")
STDIN_NAME = "stdin.md"
"""Stands in for the document when pandoc reads standard input (figures: ``stdin-figures/``)."""


def _extension_root() -> Path:
    return Path(__file__).parent / "extension"


def lua_filter_path() -> Path:
    """Path of the packaged ``premises.lua`` (for ``pandoc --lua-filter``)."""
    return _extension_root() / "premises.lua"


def extension_source() -> Path:
    """The packaged Quarto extension folder ``_extensions/premises``."""
    return _extension_root() / "_extensions" / EXTENSION_NAME


def check_protocol(requested: int) -> None:
    """Refuse a filter that speaks another protocol than this package.

    Raises
    ------
    SpecError
        Naming both versions and how to bring them in line.
    """
    if requested != PROTOCOL_VERSION:
        raise SpecError(
            f"the Lua filter speaks protocol {requested}, but this premises package "
            f"({__version__}) speaks protocol {PROTOCOL_VERSION}.",
            hint="Use the filter that comes with the installed package: premises lua-filter prints "
            "its path, and premises quarto install refreshes a project's _extensions/premises.",
        )


# --- the filter --------------------------------------------------------------------------


def _normalised(body: str) -> list[str]:
    text = body.replace("\r\n", "\n").replace("\r", "\n").expandtabs(4)
    return [line.strip() for line in text.strip("\n").split("\n")]


def _guess_line(lines: Sequence[str], body: str, start: int) -> int | None:
    """Line of the fence before ``body`` in the source, for blocks the scanner cannot see (in lists, quotes)."""
    wanted = [line for line in _normalised(body) if line]
    if not wanted:
        return None
    stripped = [line.strip().lstrip(">").strip().lstrip("-*+").strip() for line in lines]
    for index in range(start, len(lines)):
        if stripped[index : index + len(wanted)] == wanted:
            return index  # 0-based index of the body's first line == 1-based line of the fence
    return None


@dataclass(frozen=True, slots=True)
class _Source:
    front: FrontMatter
    blocks: tuple[tuple[str, RawBlock, int], ...]
    """(label, block, line of its fence) for each block the source shows."""
    lines: tuple[str, ...]
    label: str


def _read_source(document: Path, label: str) -> _Source:
    """Front matter and block positions of the document the request came from, as far as they can be read."""
    empty = _Source(FrontMatter(), (), (), label)
    if not document.is_file():
        return empty
    try:
        text = document.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return empty
    if document.suffix.lower() == ".ipynb":
        return _read_notebook_source(text, label)
    try:
        _, length = read_front_matter(text, label)
        blocks = find_blocks(text, label)
    except SpecError:
        # The filter sees what pandoc parsed; positions are a courtesy for messages.
        return _Source(FrontMatter(), (), tuple(text.splitlines()), label)
    lines = text.splitlines()
    front = "".join(line + "\n" for line in lines[:length])
    return _Source(FrontMatter(front, label if front else None), tuple((label, raw, raw.line) for raw in blocks), tuple(lines), label)


def _read_notebook_source(text: str, label: str) -> _Source:
    from premises.documents.notebook import (
        cell_label,
        find_notebook_blocks,
        front_matter,
        read_notebook,
    )

    try:
        node = read_notebook(text, label)
        blocks = find_notebook_blocks(node, label, tagged_cells=False)
    except SpecError:
        return _Source(FrontMatter(), (), (), label)
    front_text = front_matter(node)
    front = FrontMatter(front_text, cell_label(label, 0) if front_text else None)
    return _Source(front, tuple((cell_label(label, b.cell), b.raw, b.raw.line) for b in blocks), (), label)


def _fragments(request: Sequence[RequestBlock], source: _Source) -> list[Fragment]:
    """Pair each request block with the block it came from, to report the user's lines."""
    fragments: list[Fragment] = []
    cursor = 0
    search_from = 0
    for block in request:
        wanted = _normalised(block.raw.body)
        match = next((i for i in range(cursor, len(source.blocks)) if _normalised(source.blocks[i][1].body) == wanted), None)
        if match is not None:
            label, _, line = source.blocks[match]
            cursor = match + 1
            fragments.append(Fragment(block.raw, label, line))
            continue
        guess = _guess_line(source.lines, block.raw.body, search_from) if source.lines else None
        if guess is not None:
            search_from = guess
        fragments.append(Fragment(block.raw, source.label, guess))
    return fragments


def run_filter(
    request: str,
    *,
    protocol: int,
    flavor: str,
    base_dir: Path,
    input_name: str,
    on_error: str = "fail",
    options: RenderOptions | None = None,
    warn: Callable[[str], None] | None = None,
) -> str:
    """Answer one request of the Lua filter.

    Parameters
    ----------
    request
        The request Markdown (block *N* inside div ``premises-out-N``).
    protocol
        The protocol the filter speaks; must equal ``PROTOCOL_VERSION``.
    flavor
        Markdown dialect of the sections (``quarto`` under Quarto, else ``pandoc``).
    base_dir
        The document's folder: data paths and ``<stem>-figures/`` are relative to it.
    input_name
        The document as pandoc or Quarto named it (``-`` for standard input). Its
        front matter supplies document-wide defaults and messages give its lines.
    on_error
        ``fail`` or ``warn`` (a failed block becomes a warning callout).
    options
        Other render choices; ``flavor`` here wins over ``options.flavor``.
    warn
        Receives warnings (default: standard error).

    Returns
    -------
    str
        The reply Markdown: div ``premises-out-N`` holds block *N*'s section.

    Raises
    ------
    PremisesError
        A protocol mismatch, or (in ``fail`` mode) the first block's error with
        the file and line the user wrote.
    """
    check_protocol(protocol)
    base_dir = base_dir.resolve()
    if input_name in ("", "-"):
        document, label = base_dir / STDIN_NAME, "<stdin>"
    else:
        document, label = base_dir / Path(input_name).name, input_name
    options = replace(options or RenderOptions(), flavor=flavor)
    blocks = read_request(request)
    source = _read_source(document, label)
    fragments = _fragments(blocks, source)
    # Figure links are relative to the document's folder, where pandoc and Quarto run.
    outcomes = render_fragments(
        fragments, document=document, output=document, options=options, front=source.front, on_error=on_error, warn=warn
    )
    return write_reply([(block.number, outcome.section) for block, outcome in zip(blocks, outcomes)])


# --- the extension -------------------------------------------------------------------------


def install_extension(directory: Path) -> Path:
    """Copy the packaged Quarto extension to ``directory/_extensions/premises``.

    An existing copy is replaced, so the filter always matches the installed package.

    Returns
    -------
    Path
        The extension folder written.

    Raises
    ------
    SpecError
        When ``directory`` does not exist or cannot be written.
    """
    if not directory.is_dir():
        raise SpecError(f"the folder '{directory}' does not exist.", hint="Give the Quarto project folder (default: the current folder).")
    target = directory / "_extensions" / EXTENSION_NAME
    try:
        if target.exists():
            shutil.rmtree(target)
        shutil.copytree(extension_source(), target, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    except OSError as exc:
        raise SpecError(f"the extension cannot be written to '{target}': {exc.strerror}.", hint="Check the folder's permissions.") from exc
    return target


# --- project pre-render --------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PrerenderReport:
    """What ``premises quarto prerender`` found."""

    checked: tuple[tuple[Path, int], ...]
    """(document, number of blocks) for every document that was read."""
    errors: tuple[PremisesError, ...]


def project_inputs(env: Mapping[str, str], project_dir: Path) -> list[Path]:
    """The files Quarto is about to render, from its pre-render environment.

    Quarto passes them newline-separated in ``QUARTO_PROJECT_INPUT_FILES``, or in
    the file named by ``QUARTO_USE_FILE_FOR_PROJECT_INPUT_FILES`` when the user
    set that variable. Paths are relative to the project folder.

    Raises
    ------
    SpecError
        When neither variable is set (the command was not started by Quarto) or
        the list file cannot be read.
    """
    list_file = env.get("QUARTO_USE_FILE_FOR_PROJECT_INPUT_FILES")
    if list_file:
        path = Path(list_file) if Path(list_file).is_absolute() else project_dir / list_file
        try:
            listing = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise SpecError(f"the input list '{path}' cannot be read: {exc.strerror}.", hint="Run the command from Quarto's pre-render step.") from exc
    elif "QUARTO_PROJECT_INPUT_FILES" in env:
        listing = env["QUARTO_PROJECT_INPUT_FILES"]
    else:
        raise SpecError(
            "QUARTO_PROJECT_INPUT_FILES is not set, so there is no list of files to check.",
            hint="Put 'premises quarto prerender' under project: pre-render: in _quarto.yml, "
            "or use 'premises check FILE...' by hand.",
        )
    names = [line.strip() for line in listing.splitlines() if line.strip()]
    return [Path(name) if Path(name).is_absolute() else project_dir / name for name in names]


def prerender(
    paths: Sequence[Path],
    options: RenderOptions | None = None,
    *,
    echo: Callable[[str], None] | None = None,
    warm: Callable[[Path], object] | None = None,
) -> PrerenderReport:
    """Validate every block of every document before Quarto renders any page.

    Parameters
    ----------
    paths
        Documents from :func:`project_inputs`. Files that are neither Markdown
        nor notebooks are skipped.
    options
        Render choices (data limits, template folders).
    echo
        Receives progress lines; None keeps quiet (``QUARTO_PROJECT_SCRIPT_QUIET``).
    warm
        Called for each document with blocks once every document has passed
        (:func:`warm_document` fills the result cache, so that the filter calls
        during the render become cache hits). Its errors are reported too.

    Returns
    -------
    PrerenderReport
        Every document's block count and every error (one per failing document).
    """
    checked: list[tuple[Path, int]] = []
    errors: list[PremisesError] = []
    for path in paths:
        suffix = path.suffix.lower()
        try:
            if suffix == ".ipynb":
                count = check_notebook(path, options)
            elif suffix in MARKDOWN_SUFFIXES:
                count = len(check_file(path, options))
            else:
                continue
        except PremisesError as exc:
            errors.append(exc)
            continue
        checked.append((path, count))
        if echo is not None and count:
            echo(f"premises: {path}: {count} block{'s' if count != 1 else ''} ok")
    if not errors and warm is not None:
        for path, count in checked:
            if count:
                try:
                    warm(path)
                except PremisesError as exc:  # a model that cannot be fitted, a drifted rule
                    errors.append(exc)
    return PrerenderReport(tuple(checked), tuple(errors))


def warm_document(path: Path, options: RenderOptions) -> int:
    """Render a document's blocks the way the filter will, so its calls become cache hits.

    Only useful with the result cache on (``options.use_cache``); the sections
    are thrown away, the figures stay where the filter would write them.

    Returns
    -------
    int
        The number of blocks rendered.
    """
    source = _read_source(path, str(path))
    fragments = [Fragment(raw, label, line) for label, raw, line in source.blocks]
    if fragments:
        render_fragments(fragments, document=path.resolve(), output=path.resolve(), options=options, front=source.front)
    return len(fragments)


def quiet_from_env(env: Mapping[str, str] | None = None) -> bool:
    """Quarto sets ``QUARTO_PROJECT_SCRIPT_QUIET=1`` when the render is quiet."""
    return (env if env is not None else os.environ).get("QUARTO_PROJECT_SCRIPT_QUIET") == "1"
