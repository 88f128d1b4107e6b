"""Documents in, documents out: the one place the stages meet.

``render_file`` finds the premises blocks of a Markdown/Quarto document,
analyses each, renders its section through the templates and splices the
sections into a copy of the document. The source is never written.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping, Sequence

from premises._version import FORMAT_VERSION
from premises.errors import Location, OutputError, PandocError, PremisesError, SpecError
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
    "worker_count",
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
    jobs: int = 1
    """Worker processes for a document's blocks (``--jobs``); 0: one per CPU. Output bytes do not depend on it."""


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


def render_text(text: str, document: Path, output: Path, options: RenderOptions, *, figure_stage: Path | None = None) -> RenderedDocument:
    """Render ``text`` (the contents of ``document``) as if written to ``output``.

    Figures go to the figure folder beside ``output``, or to ``figure_stage``
    when given (the caller moves them once every block has rendered).
    """
    from premises.cache import block_from_json, library_versions
    from premises.documents.markdown import splice
    from premises.staleness import BlockJob, open_cache

    document_dir = document.parent
    raws, specs = parse_document(text, str(document), document_dir=document_dir, cli_settings=options.cli_settings)
    figure_dir = _figure_dir(document, output)
    rel = figure_dir.relative_to(output.parent).as_posix() if figure_dir.is_relative_to(output.parent) else figure_dir.as_posix()
    store = open_cache(document, options) if specs else None
    versions = library_versions() if store is not None else None
    jobs = []
    for spec in specs:
        if options.detail:
            spec = replace(spec, detail=options.detail)
        dirs = _template_dirs(spec, document_dir, options)
        jobs.append(BlockJob(spec, document, output, figure_stage or figure_dir, rel, dirs, template_fingerprint(dirs)))
    rendered = _render_blocks(jobs, options, store, versions)
    blocks_json = [block_json for block_json, _ in rendered]
    sections = [section for _, section in rendered]
    results = [block_from_json(b) for b in blocks_json]
    out_text = splice(text, raws, sections) if raws else text
    return RenderedDocument(
        text=out_text,
        result=DocumentResult(document=document.name, blocks=tuple(results), format_version=FORMAT_VERSION),
        output=output,
        figure_dir=figure_dir,
        blocks_json=tuple(blocks_json),
    )


def worker_count(jobs: int, blocks: int) -> int:
    """Worker processes for ``blocks`` blocks: ``jobs`` (0: one per CPU), never more than the blocks."""
    wanted = jobs if jobs > 0 else (os.cpu_count() or 1)
    return max(1, min(wanted, blocks))


@dataclass(frozen=True)
class _Failure:
    """A user error raised in a worker, carried back field by field (its pickled form loses them)."""

    kind: type[PremisesError]
    problem: str
    location: Location
    hint: str | None

    def rebuild(self) -> PremisesError:
        return self.kind(self.problem, self.location, hint=self.hint)


def _render_in_worker(job: Any, options: RenderOptions, versions: tuple[tuple[str, str], ...] | None) -> tuple[dict[str, Any], str] | _Failure:
    """One block in a worker process (top level, so it pickles): the store is opened here."""
    from premises.staleness import open_cache, render_block

    try:
        return render_block(job, options, open_cache(job.document, options), versions)
    except PremisesError as exc:
        return _Failure(type(exc), exc.problem, exc.location, exc.hint)


def _share_threads(workers: int) -> None:
    """Worker initializer: split the CPUs between the workers' BLAS threads (before numpy loads)."""
    share = str(max(1, (os.cpu_count() or 1) // workers))
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, share)


def _render_blocks(jobs: Sequence[Any], options: RenderOptions, store: Any, versions: tuple[tuple[str, str], ...] | None) -> list[tuple[dict[str, Any], str]]:
    """Each block's (result JSON, section), in document order; in worker processes when ``options.jobs`` allows.

    Workers write their figures and store records atomically, under names of
    their own block; the document is assembled here, in order, so its bytes
    do not depend on the number of workers. The first failing block in
    document order raises its error, as a serial render would.
    """
    from premises.staleness import render_block

    workers = worker_count(options.jobs, len(jobs))
    if workers == 1:
        return [render_block(job, options, store, versions) for job in jobs]
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    # spawn: fresh interpreters, safe whatever threads the parent (BLAS, a host program) runs.
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"), initializer=_share_threads, initargs=(workers,))
    out: list[tuple[dict[str, Any], str]] = []
    try:
        for outcome in pool.map(_render_in_worker, jobs, [options] * len(jobs), [versions] * len(jobs)):
            if isinstance(outcome, _Failure):
                raise outcome.rebuild()
            out.append(outcome)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
    return out


def _read_document(path: Path) -> str:
    try:
        raw = path.read_bytes()
    except FileNotFoundError as exc:
        raise SpecError(f"the document '{path}' does not exist.", hint="Check the path.") from exc
    except IsADirectoryError as exc:
        raise SpecError(f"the document '{path}' is a folder.", hint="Name the Markdown or Quarto file itself.") from exc
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
    import tempfile

    from premises.staleness import _place_figures

    options = options or RenderOptions()
    output = output or default_output(path)
    if output.resolve() == path.resolve():
        raise SpecError(f"the output '{output}' is the source document.", Location(str(path)), hint="Choose another output path (-o); the source is never overwritten.")
    if json_path is not None and json_path.resolve() == path.resolve():
        raise SpecError(f"the JSON output '{json_path}' is the source document.", Location(str(path)), hint="Choose another path for --json; the source is never overwritten.")
    for target, what in ((output, "output"), (json_path, "JSON output"), (_figure_dir(path, output), "figures folder")):
        if target is not None:
            _check_writable(target, what, folder=what == "figures folder")
    text = _read_document(path)
    # Nothing is written until every block has rendered: a failing block leaves the
    # previous output and its figures as they were.
    with tempfile.TemporaryDirectory(prefix="premises-staged-") as staged:
        rendered = render_text(text, path, output, options, figure_stage=Path(staged))
        _refuse_data_targets(rendered, path, output, json_path)
        try:
            _place_figures(rendered.figure_dir, {p.name: p.read_bytes() for p in sorted(Path(staged).iterdir()) if p.is_file()})
            if json_path is not None:
                write_json(rendered.result, json_path, rendered.blocks_json)
            atomic_write_text(output, rendered.text)
        except OSError as exc:
            folder = Path(exc.filename).parent if exc.filename else output.parent  # the file itself is a temporary name
            raise OutputError(f"cannot write the outputs in '{folder}': {exc.strerror or exc}.", hint="Check that the folder is writable and has space.") from exc
    return rendered


def _check_writable(target: Path, what: str, *, folder: bool = False) -> None:
    """Refuse an output path that is a folder (or, for a folder, a file) or lies below a file."""
    if not folder and target.is_dir():
        raise OutputError(f"cannot write the {what} '{target}': it is a folder.", hint="Give a file name, e.g. -o report.premises.md.")
    if folder and target.exists() and not target.is_dir():
        raise OutputError(f"cannot write the {what} '{target}': a file of that name is in the way.", hint="Move the file, or choose another output name (-o).")
    for parent in target.parents:
        if parent.exists():
            if not parent.is_dir():
                raise OutputError(f"cannot write the {what} '{target}': '{parent}' is a file, not a folder.", hint="Choose an output path in a folder.")
            return


def _refuse_data_targets(rendered: RenderedDocument, document: Path, output: Path, json_path: Path | None) -> None:
    """A data file is never overwritten, even when -o or --json names it."""
    data = {(document.parent / b["data"]["path"]).resolve() for b in rendered.blocks_json if isinstance(b.get("data"), Mapping) and b["data"].get("path")}
    for target in (output, json_path):
        if target is not None and target.resolve() in data:
            raise SpecError(f"the output '{target}' is a data file of the document.", Location(str(document)), hint="Choose another output path; data files are never overwritten.")


def write_json(result: DocumentResult, path: Path, blocks_json: Sequence[Mapping[str, Any]] = ()) -> None:
    """Write the public result JSON (sorted keys, stable bytes); ``blocks_json`` replaces the blocks when given."""
    payload = to_jsonable(result)
    if blocks_json:
        payload["blocks"] = [dict(b) for b in blocks_json]
    atomic_write_text(path, json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False) + "\n")


def check_file(path: Path, options: RenderOptions | None = None) -> list[BlockSpec]:
    """Validate every block and its data without fitting.

    Columns, rules, formula and templates; then the ledger runs (exclusions and
    their guards, missing values, transforms) and the formula is evaluated on the
    rows that remain, so a rule on a missing column or a log of zero is found here
    rather than at render time.
    """
    from premises.analysis import AnalysisOptions, prepare_block
    from premises.formula import build_design, formula_transforms
    from premises.ledger import apply_ledger

    options = options or RenderOptions()
    text = _read_document(path)
    _, specs = parse_document(text, str(path), document_dir=path.parent, cli_settings=options.cli_settings)
    analysis = AnalysisOptions(allow_outside_data=options.allow_outside_data, max_data_bytes=options.max_data_bytes)
    for spec in specs:
        _template_dirs(spec, path.parent, options)
        prepared = prepare_block(spec, path.parent, analysis)
        outcome = apply_ledger(spec, prepared.table.frame, prepared.ids, prepared.formula_columns, formula_transforms(spec.model))
        build_design(spec.model, outcome.frame, location=spec.locate("model"))
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
        import pypandoc

        return str(pypandoc.get_pandoc_path())
    except (ImportError, OSError):
        found = shutil.which("pandoc")
        if found:
            return found
    raise PandocError("no pandoc was found for HTML output.", hint="Install the extra: pip install 'premises[html]', or put pandoc on PATH.")
