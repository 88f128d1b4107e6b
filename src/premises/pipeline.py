"""Documents in, documents out: the one place the stages meet.

``render_file`` finds the premises blocks of a Markdown/Quarto document,
analyses each, renders its section through the templates and splices the
sections into a copy of the document. The source is never written.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping, Sequence

from premises._version import FORMAT_VERSION
from premises.errors import Location, PandocError, SpecError
from premises.files import atomic_write_text
from premises.results import DocumentResult, to_jsonable
from premises.spec import BlockSpec

__all__ = [
    "MAX_BLOCKS",
    "RenderOptions",
    "RenderedDocument",
    "check_file",
    "default_output",
    "parse_document",
    "render_file",
    "render_text",
    "write_html",
]

MAX_BLOCKS = 200
"""Most premises blocks one document may hold."""

FILTER_KEYS = ("python", "on-error", "flavor", "cache", "jobs")
"""Front-matter ``premises:`` keys meant for the filter, not for the blocks."""


@dataclass(frozen=True)
class RenderOptions:
    """Command-line choices for a render."""

    flavor: str = "quarto"
    detail: str | None = None
    """Override every block's ``detail``."""
    allow_outside_data: bool = False
    max_data_bytes: int = 2 * 1024**3
    template_dirs: tuple[Path, ...] = ()
    cli_settings: Mapping[str, Any] = field(default_factory=dict)
    """Block keys given on the command line (highest in the merge order)."""
    use_cache: bool = True
    """Read and write the result store (``--no-cache`` turns it off; output bytes are the same)."""
    cache_dir: Path | None = None
    """The result store; None: ``.premises/`` in the project root."""
    change_tolerance: float = 0.5
    """Change log: coefficient moves beyond this many standard errors are listed (``--tolerance``)."""


@dataclass(frozen=True)
class RenderedDocument:
    """A rendered document: its text, results and where things were written."""

    text: str
    result: DocumentResult
    output: Path | None
    figure_dir: Path
    blocks_json: tuple[dict[str, Any], ...] = ()
    """Each block's result JSON (what ``--json`` writes; a cache hit has only this)."""


def default_output(path: Path) -> Path:
    """``report.qmd`` -> ``report.premises.md``, beside the source (never the source itself)."""
    return path.with_name(f"{path.stem}.premises.md")


def _figure_dir(document: Path, output: Path) -> Path:
    # Named after the document, not Quarto's <stem>_files/ (Quarto's clean-up removes that).
    return output.parent / f"{document.stem}-figures"


def parse_document(text: str, file: str | None, *, document_dir: Path | None = None, cli_settings: Mapping[str, Any] | None = None) -> tuple[list[Any], list[BlockSpec]]:
    """Find and parse every block; duplicate ids are an error at the second one."""
    from premises.config import merge_settings, read_project_settings
    from premises.documents.markdown import find_blocks, read_front_matter
    from premises.spec import parse_block

    front, front_lines = read_front_matter(text, file)
    if not isinstance(front.get("premises") or {}, Mapping):
        raise SpecError("the front matter key 'premises' must be a mapping of block defaults.", Location(file, _front_key_line(text, "premises", front_lines), None, "premises"), hint="Write e.g. premises: {se: hc3}.")
    front_defaults = dict(front.get("premises") or {})
    for key in FILTER_KEYS:
        front_defaults.pop(key, None)
    project = read_project_settings(document_dir) if document_dir is not None else {}
    defaults = merge_settings(project, front_defaults, cli_settings or {})
    raws = list(find_blocks(text, file))
    if len(raws) > MAX_BLOCKS:
        raise SpecError(
            f"The document has {len(raws)} premises blocks, more than the {MAX_BLOCKS} allowed.",
            Location(file, raws[MAX_BLOCKS].line),
            hint="Split the document into several documents.",
        )
    specs: list[BlockSpec] = []
    seen: dict[str, int] = {}
    for raw in raws:
        spec = parse_block(raw.body, file=file, line=raw.line, defaults=defaults, attrs=getattr(raw, "attrs", None))
        if spec.id in seen:
            raise SpecError(
                f"the block id '{spec.id}' is already used by the block at line {seen[spec.id]}.",
                spec.locate("id"),
                hint="Give every block in a document its own id.",
            )
        seen[spec.id] = raw.line
        specs.append(spec)
    return raws, specs


def _front_key_line(text: str, key: str, length: int) -> int:
    """Document line of a top-level front-matter key (the first line when not found)."""
    for number, line in enumerate(text.splitlines()[1 : max(length - 1, 1)], start=2):
        if re.match(rf"{re.escape(key)}\s*:", line):
            return number
    return 1


def _template_dirs(spec: BlockSpec, document_dir: Path, options: RenderOptions) -> tuple[Path, ...]:
    dirs = list(options.template_dirs)
    if spec.templates:
        from premises.data import find_project_root

        try:
            folder = (document_dir / spec.templates).resolve()
            is_dir = folder.is_dir()
        except (OSError, RuntimeError, ValueError) as exc:  # a link loop, a NUL, a name too long
            raise SpecError(f"the templates folder '{spec.templates}' cannot be used: {exc}.", spec.locate("templates"), hint="Check the path and any links along it.") from exc
        root = find_project_root(document_dir)
        # Templates come from the document like data does: they stay in the project unless allowed.
        if not options.allow_outside_data and not folder.is_relative_to(root):
            raise SpecError(f"the templates folder '{spec.templates}' leads outside the project folder {root}.", spec.locate("templates"), hint="Move the templates into the project, or pass --allow-outside-data if you trust the document.")
        if not is_dir:
            raise SpecError(f"the templates folder '{spec.templates}' does not exist.", spec.locate("templates"), hint="Create it, or remove the key to use the shipped templates.")
        dirs.insert(0, folder)
    return tuple(dirs)


def template_fingerprint(dirs: Sequence[Path]) -> str:
    """Hash of every template file that a render could read (shipped and user)."""
    digest = hashlib.sha256()
    # The shipped templates sit beside this module; importing premises.render (jinja2) is not needed.
    for folder in (*dirs, Path(__file__).parent / "templates"):
        for path in sorted(folder.rglob("*")) if folder.is_dir() else []:
            if path.is_file():
                digest.update(path.relative_to(folder).as_posix().encode())
                digest.update(path.read_bytes())
    return digest.hexdigest()


def render_text(text: str, document: Path, output: Path, options: RenderOptions) -> RenderedDocument:
    """Render ``text`` (the contents of ``document``) as if written to ``output``."""
    from premises.cache import block_from_json, library_versions
    from premises.documents.markdown import splice
    from premises.staleness import BlockJob, open_cache, render_block

    document_dir = document.parent
    raws, specs = parse_document(text, str(document), document_dir=document_dir, cli_settings=options.cli_settings)
    figure_dir = _figure_dir(document, output)
    rel = figure_dir.relative_to(output.parent).as_posix() if figure_dir.is_relative_to(output.parent) else figure_dir.as_posix()
    blocks_json: list[dict[str, Any]] = []
    sections: list[str] = []
    store = open_cache(document, options) if specs else None
    versions = library_versions() if store is not None else None
    for spec in specs:
        if options.detail:
            spec = replace(spec, detail=options.detail)
        dirs = _template_dirs(spec, document_dir, options)
        job = BlockJob(spec, document, output, figure_dir, rel, dirs, template_fingerprint(dirs))
        block_json, section = render_block(job, options, store, versions)
        blocks_json.append(block_json)
        sections.append(section)
    results = [block_from_json(b) for b in blocks_json]
    out_text = splice(text, raws, sections) if raws else text
    return RenderedDocument(
        text=out_text,
        result=DocumentResult(document=document.name, blocks=tuple(results), format_version=FORMAT_VERSION),
        output=output,
        figure_dir=figure_dir,
        blocks_json=tuple(blocks_json),
    )


def _read_document(path: Path) -> str:
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise SpecError(f"the document '{path}' does not exist.", hint="Check the path.") from exc
    except OSError as exc:
        raise SpecError(f"the document '{path}' cannot be read: {exc.strerror}.", hint="Check its permissions.") from exc
    try:
        # newline="" semantics: keep CRLF exactly as written.
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SpecError(f"the document '{path}' is not UTF-8 text.", Location(str(path)), hint="Save it as UTF-8.") from exc


def render_file(
    path: Path,
    output: Path | None = None,
    options: RenderOptions | None = None,
    *,
    json_path: Path | None = None,
) -> RenderedDocument:
    """Render a document to ``output`` (default :func:`default_output`) and write it atomically.

    Examples
    --------
    >>> done = render_file(Path("example_project/report.qmd"))  # doctest: +SKIP
    >>> done.output.name  # doctest: +SKIP
    'report.premises.md'
    """
    options = options or RenderOptions()
    output = output or default_output(path)
    if output.resolve() == path.resolve():
        raise SpecError(f"the output '{output}' is the source document.", Location(str(path)), hint="Choose another output path (-o); the source is never overwritten.")
    text = _read_document(path)
    rendered = render_text(text, path, output, options)
    if json_path is not None:
        write_json(rendered.result, json_path, rendered.blocks_json)
    atomic_write_text(output, rendered.text)
    return rendered


def write_json(result: DocumentResult, path: Path, blocks_json: Sequence[Mapping[str, Any]] = ()) -> None:
    """Write the public result JSON (sorted keys, stable bytes); ``blocks_json`` replaces the blocks when given."""
    payload = to_jsonable(result)
    if blocks_json:
        payload["blocks"] = [dict(b) for b in blocks_json]
    atomic_write_text(path, json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False) + "\n")


def check_file(path: Path, options: RenderOptions | None = None) -> list[BlockSpec]:
    """Validate every block and its data (columns, rules, formula) without fitting."""
    from premises.analysis import AnalysisOptions, prepare_block

    options = options or RenderOptions()
    text = _read_document(path)
    _, specs = parse_document(text, str(path), document_dir=path.parent, cli_settings=options.cli_settings)
    analysis = AnalysisOptions(allow_outside_data=options.allow_outside_data, max_data_bytes=options.max_data_bytes)
    for spec in specs:
        prepare_block(spec, path.parent, analysis)
    return specs


def write_html(markdown_path: Path, html_path: Path, title: str | None = None) -> Path:
    """Convert a rendered Markdown file to a standalone HTML page with pandoc."""
    import subprocess

    pandoc = _pandoc_path()
    args = [pandoc, markdown_path.name, "--standalone", "--from", "markdown", "--to", "html5",
            "--output", html_path.resolve().as_posix(), "--metadata", f"pagetitle={title or markdown_path.stem}",
            "--variable", "maxwidth=50em"]  # the default 36em column makes the ledger table scroll sideways
    filter_path = Path(__file__).parent / "extension" / "premises-refs.lua"
    if filter_path.is_file():
        args += ["--lua-filter", filter_path.as_posix()]
    try:
        subprocess.run(args, cwd=markdown_path.parent, check=True, capture_output=True, text=True)
    except subprocess.CalledProcessError as exc:
        raise PandocError(f"pandoc failed converting {markdown_path.name} to HTML: {exc.stderr.strip()}", hint="Check the Markdown it was given.") from exc
    return html_path


def _pandoc_path() -> str:
    import shutil

    try:
        import pypandoc  # type: ignore[import-untyped]

        return str(pypandoc.get_pandoc_path())
    except (ImportError, OSError):
        found = shutil.which("pandoc")
        if found:
            return found
    raise PandocError("no pandoc was found for HTML output.", hint="Install the extra: pip install 'premises[html]', or put pandoc on PATH.")
