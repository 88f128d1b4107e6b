"""Blocks that live inside something else: notebook cells and filter requests.

``render_fragments`` renders blocks lifted out of a container (a notebook cell,
a request from the Lua filter) one at a time through
:func:`premises.pipeline.render_text`. Each block is placed in a small Markdown
document after the container's front matter; errors are then moved back to the
file, cell and line the user wrote, and in ``warn`` mode a failed block becomes a
warning instead of stopping the others.

``render_notebook`` is ``premises notebook``: it writes a copy of a notebook in
which every block's cell is followed by markdown cells holding its section, the
figures stored as cell attachments.
"""

from __future__ import annotations

import re
import sys
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path

from premises.documents.markdown import RawBlock
from premises.documents.pandoc import warning_callout
from premises.errors import Location, PremisesError, SpecError
from premises.pipeline import RenderOptions, parse_document, render_text
from premises.results import BlockResult

__all__ = [
    "Fragment",
    "FragmentOutcome",
    "FrontMatter",
    "NotebookRender",
    "check_notebook",
    "default_notebook_output",
    "render_fragments",
    "render_notebook",
]

ON_ERROR = ("fail", "warn")


@dataclass(frozen=True, slots=True)
class FrontMatter:
    """The container's front matter, and where it sits for messages."""

    text: str = ""
    """``---`` ... ``---`` lines, newline-terminated, or ''."""
    label: str | None = None
    """File (or ``file [cell 1]``) that holds it."""


@dataclass(frozen=True, slots=True)
class Fragment:
    """A block lifted out of its container."""

    raw: RawBlock
    """The fence: its info string and YAML body."""
    label: str
    """Where it was written: ``report.qmd`` or ``analysis.ipynb [cell 3]``."""
    line: int | None
    """Line of its opening fence in ``label`` (0 when the YAML starts on line 1 with
    no fence, as in a tagged raw cell); None when unknown."""


@dataclass(frozen=True, slots=True)
class FragmentOutcome:
    """A rendered block: its section, and its result or the error it raised."""

    section: str
    result: BlockResult | None
    error: PremisesError | None = None


@dataclass(frozen=True, slots=True)
class _Synthetic:
    text: str
    prefix: str
    fence_line: int


def _synthesise(front: FrontMatter, raw: RawBlock, line: int | None = None) -> _Synthetic:
    """Front matter, blank lines, then the block: a document the pipeline can read.

    When the block's line is known the fence is put on that line, so a block
    read from a Markdown file is parsed exactly where the user wrote it.
    """
    prefix = front.text + ("\n" if front.text else "")
    if line is not None and line > prefix.count("\n") + 1:
        prefix += "\n" * (line - 1 - prefix.count("\n"))
    longest = max((len(run) for run in _backtick_runs(raw.body)), default=0)
    fence = "`" * max(3, longest + 1)
    body = raw.body if raw.body.endswith("\n") or not raw.body else raw.body + "\n"
    text = f"{prefix}{fence}{raw.info}\n{body}{fence}"
    return _Synthetic(text, prefix, prefix.count("\n") + 1)


def _backtick_runs(text: str) -> list[str]:
    return re.findall(r"`+", text)


def _relocate(exc: PremisesError, document: Path, front: FrontMatter, fragment: Fragment, fence_line: int) -> PremisesError:
    """The same error, pointing at the user's file, cell and line instead of the synthetic text."""
    where = exc.location
    if where.file != str(document):
        return exc
    if where.line is not None and where.line < fence_line:
        moved = replace(where, file=front.label or fragment.label)
    else:
        line = None
        if where.line is not None and fragment.line is not None:
            line = fragment.line + (where.line - fence_line)
        moved = replace(where, file=fragment.label, line=line)
    try:
        relocated = type(exc)(exc.problem, moved, exc.hint)
    except TypeError:  # a subclass with another signature: keep the original
        return exc
    relocated.__cause__ = exc.__cause__
    return relocated


def render_fragments(
    fragments: Sequence[Fragment],
    *,
    document: Path,
    output: Path,
    options: RenderOptions,
    front: FrontMatter = FrontMatter(),
    on_error: str = "fail",
    warn: Callable[[str], None] | None = None,
) -> list[FragmentOutcome]:
    """Render blocks taken out of a container document, one by one.

    Parameters
    ----------
    fragments
        The blocks, in document order.
    document
        The container's path: data paths are relative to its folder and figures
        go to ``<output folder>/<document stem>-figures``.
    output
        Where the rendered text is meant to live (figure links are relative to its folder).
    options
        Flavor and other render choices.
    front
        The container's front matter (document-wide ``premises:`` defaults).
    on_error
        ``fail`` raises the first error; ``warn`` puts a warning callout in the
        block's place, calls ``warn`` with the message and goes on.
    warn
        Receives warning messages (default: standard error).

    Returns
    -------
    list of FragmentOutcome
        One per fragment.

    Raises
    ------
    PremisesError
        In ``fail`` mode, the first block's error, located in the user's file.
    """
    if on_error not in ON_ERROR:
        raise SpecError(f"on-error must be fail or warn; got '{on_error}'.", hint="Write on-error: warn or leave it out.")
    report = warn or _to_stderr
    outcomes: list[FragmentOutcome] = []
    seen: dict[str, str] = {}
    for fragment in fragments:
        synthetic = _synthesise(front, fragment.raw, fragment.line)
        try:
            outcomes.append(_render_one(fragment, synthetic, document, output, options, seen))
        except PremisesError as exc:
            error = _relocate(exc, document, front, fragment, synthetic.fence_line)
            if on_error == "fail":
                raise error from exc
            report(f"premises: warning: {error.message} The block was replaced by a warning.")
            outcomes.append(FragmentOutcome(warning_callout(error.message, options.flavor), None, error))
    return outcomes


def _render_one(
    fragment: Fragment, synthetic: _Synthetic, document: Path, output: Path, options: RenderOptions, seen: dict[str, str]
) -> FragmentOutcome:
    _, specs = parse_document(synthetic.text, str(document), document_dir=document.parent, cli_settings=options.cli_settings)
    spec = specs[0]
    if spec.id in seen:
        raise SpecError(
            f"the block id '{spec.id}' is already used by the block in {seen[spec.id]}.",
            spec.locate("id"),
            hint="Give every block in a document its own id.",
        )
    seen[spec.id] = fragment.label + (f":{fragment.line}" if fragment.line else "")
    rendered = render_text(synthetic.text, document, output, options)
    if not rendered.text.startswith(synthetic.prefix):
        raise RuntimeError("the rendered fragment lost its front matter")  # a bug, not a user error
    return FragmentOutcome(rendered.text[len(synthetic.prefix) :], rendered.result.blocks[0])


def _to_stderr(message: str) -> None:
    print(message, file=sys.stderr)


# --- notebook mode -------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class NotebookRender:
    """What ``premises notebook`` wrote."""

    output: Path
    results: tuple[BlockResult, ...]
    cells_written: int


def default_notebook_output(path: Path) -> Path:
    """``analysis.ipynb`` -> ``analysis.premises.ipynb`` beside it."""
    return path.with_name(f"{path.stem}.premises.ipynb")


def _read(path: Path) -> object:
    from premises.documents.notebook import read_notebook

    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise SpecError(f"the notebook '{path}' does not exist.", hint="Check the path.") from exc
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"the notebook '{path}' cannot be read: {exc}.", Location(str(path)), hint="Check the file.") from exc
    return read_notebook(text, str(path))


def _fragments(node: object, file: str, *, tagged_cells: bool) -> tuple[list[Fragment], list[int]]:
    from premises.documents.notebook import cell_label, find_notebook_blocks

    blocks = find_notebook_blocks(node, file, tagged_cells=tagged_cells)
    fragments = [Fragment(block.raw, cell_label(file, block.cell), block.raw.line) for block in blocks]
    return fragments, [block.cell for block in blocks]


def _front(node: object, file: str) -> FrontMatter:
    from premises.documents.notebook import cell_label, front_matter

    text = front_matter(node)
    return FrontMatter(text, cell_label(file, 0) if text else None)


def check_notebook(path: Path, options: RenderOptions | None = None, *, tagged_cells: bool = False) -> int:
    """Validate every block of a notebook and its data without fitting; return the block count.

    Raises
    ------
    PremisesError
        The first problem, located as ``file [cell N]:line``.
    """
    from premises.analysis import AnalysisOptions, prepare_block

    options = options or RenderOptions()
    node = _read(path)
    fragments, _ = _fragments(node, str(path), tagged_cells=tagged_cells)
    front = _front(node, str(path))
    analysis = AnalysisOptions(allow_outside_data=options.allow_outside_data, max_data_bytes=options.max_data_bytes)
    for fragment in fragments:
        synthetic = _synthesise(front, fragment.raw, fragment.line)
        try:
            _, specs = parse_document(synthetic.text, str(path), document_dir=path.parent, cli_settings=options.cli_settings)
            prepare_block(specs[0], path.parent, analysis)
        except PremisesError as exc:
            raise _relocate(exc, path, front, fragment, synthetic.fence_line) from exc
    return len(fragments)


def render_notebook(source: Path, output: Path | None = None, options: RenderOptions | None = None) -> NotebookRender:
    """Write a copy of a notebook with each block followed by its generated section.

    Parameters
    ----------
    source
        The notebook. It is never written.
    output
        Where to write (default :func:`default_notebook_output`).
    options
        ``options.flavor`` is ``gfm`` (for reading in Jupyter) or ``quarto``
        (for rendering the notebook with Quarto).

    Returns
    -------
    NotebookRender

    Examples
    --------
    >>> done = render_notebook(Path("example_project/analysis.ipynb"))  # doctest: +SKIP
    >>> done.output.name  # doctest: +SKIP
    'analysis.premises.ipynb'
    """
    import nbformat

    from premises.documents.notebook import (
        attach_figures,
        cells_after,
        generated_cell,
        remove_generated,
        source_hash,
        split_cells,
    )
    from premises.files import atomic_write_text

    options = options or RenderOptions(flavor="gfm")
    output = output or default_notebook_output(source)
    if output.resolve() == source.resolve():
        raise SpecError(f"the output '{output}' is the source notebook.", Location(str(source)), hint="Choose another output path (-o); the source is never overwritten.")
    node = remove_generated(_read(source))
    fragments, cells = _fragments(node, str(source), tagged_cells=True)
    written = 0
    results: list[BlockResult] = []
    with tempfile.TemporaryDirectory(prefix="premises-nb-") as scratch:
        # Figures go to a scratch folder: the notebook carries them as attachments.
        scratch_output = Path(scratch) / f"{source.stem}.md"
        outcomes = render_fragments(fragments, document=source, output=scratch_output, options=options, front=_front(node, str(source)))
        new_cells: dict[int, list[object]] = {}
        for fragment, cell, outcome in zip(fragments, cells, outcomes):
            assert outcome.result is not None  # fail mode: every outcome has a result
            results.append(outcome.result)
            links = {figure.path: scratch_output.parent / figure.path for figure in outcome.result.figures}
            digest = source_hash(fragment.raw.body)
            for number, piece in enumerate(split_cells(outcome.section), start=1):
                text, attachments = attach_figures(piece, links)
                new_cells.setdefault(cell, []).append(
                    generated_cell(text, attachments, block=outcome.result.id, digest=digest, number=number)
                )
                written += 1
    for cell in sorted(new_cells, reverse=True):
        cells_after(node, cell, new_cells[cell])
    try:
        nbformat.validate(node)
    except nbformat.ValidationError as exc:
        raise RuntimeError(f"premises wrote an invalid notebook: {exc.message}") from exc  # a bug
    atomic_write_text(output, nbformat.writes(node) + "\n")  # type: ignore[no-untyped-call]
    return NotebookRender(output, tuple(results), written)
