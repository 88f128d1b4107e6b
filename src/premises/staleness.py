"""Keeping a report current: cached block renders, change logs, status and diff.

:func:`render_block` is what :func:`premises.pipeline.render_text` runs for
each block. It fingerprints the block from its spec, data bytes, templates and
versions (nothing heavier than YAML and hashing); on a store hit it returns the
stored section and result JSON and copies the stored figures, without importing
any statistics library. On a miss it analyses the block and stores the result.
When the inputs changed since the block's last render, it compares the two
results (:mod:`premises.changes`), enforces ``pin: true`` guards, and puts the
change log into the result before the section is rendered.

``premises status``, ``diff`` and ``ledger`` (:mod:`premises.exports`) read
the same records.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from premises._version import FORMAT_VERSION
from premises.cache import (
    BlockCache,
    KeyParts,
    LastRender,
    file_sha256,
    library_versions,
    read_sections,
    read_stamps,
    text_sha256,
)
from premises.errors import DataError, DriftError, SpecError
from premises.files import atomic_write_bytes
from premises.rules import parse_rule
from premises.spec import BlockSpec, canonical_spec

if TYPE_CHECKING:
    from premises.pipeline import RenderOptions

__all__ = [
    "BlockJob",
    "BlockStatus",
    "block_status",
    "document_label",
    "key_parts",
    "open_cache",
    "recorded_changes",
    "render_block",
]


@dataclass(frozen=True)
class BlockJob:
    """One block of one render: where its inputs are and where its outputs go."""

    spec: BlockSpec
    document: Path
    output: Path
    figure_dir: Path
    figure_rel: str
    template_dirs: tuple[Path, ...]
    templates: str
    """Fingerprint of the template set (:func:`premises.pipeline.template_fingerprint`)."""


@dataclass(frozen=True)
class BlockStatus:
    """Whether a block's rendered section matches its inputs."""

    document: Path
    block: str
    state: str
    """``current``, ``stale`` or ``never rendered``."""
    reasons: tuple[str, ...] = ()


def project_root(document: Path) -> Path:
    """The project folder of ``document`` (nearest ``_quarto.yml``, else its folder)."""
    from premises.data import find_project_root

    return find_project_root(document.resolve().parent)


def open_cache(document: Path, options: RenderOptions) -> BlockCache | None:
    """The store a render of ``document`` uses: ``--cache-dir``, else ``.premises/`` in the project; None when off."""
    if not options.use_cache:
        return None
    return BlockCache(options.cache_dir or project_root(document) / ".premises")


def document_label(document: Path) -> str:
    """The document's path relative to its project, naming its records in the store."""
    resolved = document.resolve()
    root = project_root(document)
    return resolved.relative_to(root).as_posix() if resolved.is_relative_to(root) else resolved.as_posix()


def key_parts(job: BlockJob, options: RenderOptions, versions: tuple[tuple[str, str], ...]) -> KeyParts:
    """The block's fingerprint parts; raises DataError when the data file cannot be reached."""
    from premises.data import resolve_data_path

    spec = job.spec
    path = resolve_data_path(spec.data, job.document.parent, spec.locate("data"), allow_outside=options.allow_outside_data)
    return KeyParts(
        format_version=FORMAT_VERSION,
        data_sha256=file_sha256(path),
        spec_sha256=text_sha256(canonical_spec(spec)),
        templates=job.templates,
        flavor=options.flavor,
        detail=spec.detail,
        versions=versions,
        figure_rel=job.figure_rel,
    )


def _lookup_parts(job: BlockJob, options: RenderOptions, versions: tuple[tuple[str, str], ...]) -> KeyParts | None:
    try:
        parts = key_parts(job, options, versions)
    except (DataError, OSError):
        return None  # the analysis reports the problem in its usual order
    return parts


def _render(block_json: Mapping[str, Any], job: BlockJob, options: RenderOptions) -> str:
    from premises.render import render_section

    return render_section({**block_json, "format_version": FORMAT_VERSION}, flavor=options.flavor, detail=job.spec.detail, template_dirs=job.template_dirs)


def _analyse(job: BlockJob, options: RenderOptions) -> tuple[dict[str, Any], str, dict[str, bytes]]:
    import tempfile

    from premises.analysis import AnalysisOptions, analyse_block
    from premises.results import to_jsonable

    analysis = AnalysisOptions(
        allow_outside_data=options.allow_outside_data,
        max_data_bytes=options.max_data_bytes,
        template_fingerprint=job.templates + f"|flavor={options.flavor}|detail={job.spec.detail}",
    )
    # Figures go to a private folder first: the store must hold exactly this render's files,
    # even when another render writes the same figure folder at the same time.
    with tempfile.TemporaryDirectory(prefix="premises-figures-") as tmp:
        result = analyse_block(job.spec, job.document.parent, Path(tmp), job.figure_rel, analysis)
        figures = {p.name: p.read_bytes() for p in sorted(Path(tmp).iterdir()) if p.is_file()}
    block_json: dict[str, Any] = to_jsonable(result)
    return block_json, _render(block_json, job, options), figures


def _place_figures(figure_dir: Path, figures: Mapping[str, bytes]) -> None:
    for name, data in figures.items():
        target = figure_dir / name
        try:
            same = target.read_bytes() == data
        except OSError:
            same = False
        if not same:
            atomic_write_bytes(target, data)


def _check_pins(spec: BlockSpec, before: Mapping[str, Any], after: Mapping[str, Any]) -> None:
    from premises.changes import pin_drift

    for rule in spec.exclude:
        if not rule.pin:
            continue
        drift = pin_drift(before, after, rule.rule_text)
        if drift is None:
            continue
        added, removed = drift
        parts = []
        if added:
            parts.append("now also matches " + ", ".join(added))
        if removed:
            parts.append("no longer matches " + ", ".join(removed))
        raise DriftError(
            f"the pinned rule '{rule.rule_text}' " + " and ".join(parts) + " (compared with the last render).",
            spec.locate(rule.key + ".pin"),
            hint="Look at those rows. If the change is intended, remove 'pin: true', render once, and put it back.",
        )


def _change_log(spec: BlockSpec, last: LastRender | None, key: str, new: Mapping[str, Any], tolerance: float) -> tuple[tuple[str, Any], ...]:
    if last is None:
        return ()
    if last.key == key:
        return last.change_log
    from premises.changes import compare_results

    _check_pins(spec, last.result, new)
    changes = compare_results(last.result, new, tolerance)
    # A re-render that changed nothing the log reports (a new output folder, say) keeps the last log.
    return changes.log() if changes.any else last.change_log


def _record_options(job: BlockJob, options: RenderOptions) -> dict[str, Any]:
    root = project_root(job.document)
    output = job.output.resolve()
    return {
        "flavor": options.flavor,
        "detail": options.detail,
        "template_dirs": [p.as_posix() for p in options.template_dirs],
        "output": output.relative_to(root).as_posix() if output.is_relative_to(root) else output.as_posix(),
    }


def _check_rules(spec: BlockSpec) -> None:
    """Parse every exclusion rule, so a hostile rule is refused before the data file is even hashed."""
    for rule in spec.exclude:
        if rule.when is not None:
            parse_rule(rule.when, location=spec.locate(rule.key + ".when"))


def render_block(job: BlockJob, options: RenderOptions, store: BlockCache | None, versions: tuple[tuple[str, str], ...] | None = None) -> tuple[dict[str, Any], str]:
    """Render one block through the store: its result JSON and its section.

    Parameters
    ----------
    job
        The block, its document, output and figure folder, template set.
    options
        The render's options (flavor, tolerance for the change log, ...).
    store
        The result store; None renders without reading or writing any record
        (same bytes as a first render with a store).
    versions
        :func:`premises.cache.library_versions`, computed once per render.

    Raises
    ------
    DriftError
        When a ``pin: true`` rule matches other rows than at the last render.
    """
    _check_rules(job.spec)
    parts = _lookup_parts(job, options, versions or library_versions()) if store is not None else None
    if store is None or parts is None:
        block_json, section, figures = _analyse(job, options)
        _place_figures(job.figure_dir, figures)
        return block_json, section
    key = parts.key()
    label = document_label(job.document)
    entry = store.lookup(key)
    if entry is None:
        block_json, section, figures = _analyse(job, options)
        if block_json.get("provenance", {}).get("fingerprint") == parts.fingerprint():
            _store_quietly(store, key, block_json, section, figures)
    else:
        block_json, section, figures = entry.result, entry.section, dict(entry.figures)
    last = store.read_last(label, job.spec.id)
    change_log = _change_log(job.spec, last, key, block_json, options.change_tolerance)
    if change_log:
        block_json = {**block_json, "change_log": dict(change_log)}
        reuse = last is not None and last.key == key and last.change_log == change_log
        section = last.section if reuse and last is not None else _render(block_json, job, options)
    _place_figures(job.figure_dir, figures)
    record = LastRender(key=key, parts=parts, result=block_json, section=section, change_log=change_log, options=_record_options(job, options))
    if last is None or (last.key, last.section, last.options) != (record.key, record.section, record.options):
        try:
            store.write_last(label, job.spec.id, record)
        except OSError:
            pass  # a read-only store costs the next change log, not this render
    return block_json, section


def _store_quietly(store: BlockCache, key: str, block_json: Mapping[str, Any], section: str, figures: Mapping[str, bytes]) -> None:
    try:
        store.store(key, block_json, section, figures)
    except OSError:
        pass  # the store is an optimisation: a full disk or a read-only folder must not fail the render


# ---------------------------------------------------------------------------
# status and diff
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class BlockPlace:
    """A block of a document with the options and record of its last render."""

    job: BlockJob
    options: RenderOptions
    last: LastRender | None


def block_places(document: Path, options: RenderOptions, flavor: str | None) -> list[BlockPlace]:
    """Each block as its last render saw it (flavor, detail, templates, output), for status and diff."""
    from premises.pipeline import (
        _figure_dir,
        _read_document,
        _template_dirs,
        default_output,
        parse_document,
        template_fingerprint,
    )

    if document.suffix.lower() == ".ipynb":
        specs = _notebook_specs(document, options)
    else:
        _, specs = parse_document(_read_document(document), str(document), document_dir=document.parent, cli_settings=options.cli_settings)
    store = open_cache(document, options)
    label = document_label(document)
    root = project_root(document)
    out: list[BlockPlace] = []
    for spec in specs:
        last = store.read_last(label, spec.id) if store is not None else None
        seen = last.options if last is not None else {}
        block_options = replace(
            options,
            flavor=flavor or str(seen.get("flavor") or options.flavor),
            detail=options.detail or seen.get("detail"),
            template_dirs=options.template_dirs or tuple(Path(p) for p in seen.get("template_dirs") or ()),
        )
        output = root / seen["output"] if seen.get("output") else default_output(document)
        if document.suffix.lower() == ".ipynb":
            from premises.notebooks import default_notebook_output

            output = default_notebook_output(document)  # a notebook renders through a scratch Markdown file
        if block_options.detail:
            spec = replace(spec, detail=block_options.detail)
        dirs = _template_dirs(spec, document.parent, block_options)
        figure_dir = _figure_dir(document, output)
        rel = figure_dir.relative_to(output.parent).as_posix() if figure_dir.is_relative_to(output.parent) else figure_dir.as_posix()
        job = BlockJob(spec, document, output, figure_dir, rel, dirs, template_fingerprint(dirs))
        out.append(BlockPlace(job, block_options, last))
    return out


def _notebook_specs(document: Path, options: RenderOptions) -> list[BlockSpec]:
    """The blocks of a notebook, parsed as ``premises notebook`` parses them."""
    from premises.notebooks import _fragments, _front, _read, _synthesise
    from premises.pipeline import parse_document

    node = _read(document)
    fragments, _ = _fragments(node, str(document), tagged_cells=True)
    front = _front(node, str(document))
    specs = []
    for fragment in fragments:
        synthetic = _synthesise(front, fragment.raw, fragment.line)
        specs += parse_document(synthetic.text, str(document), document_dir=document.parent, cli_settings=options.cli_settings)[1]
    return specs


def block_status(document: Path, options: RenderOptions, *, flavor: str | None = None) -> tuple[BlockStatus, ...]:
    """Whether each block of ``document`` is current, stale (and why) or never rendered.

    The fingerprint is recomputed with the options of the block's last render
    (flavor, detail, templates, output) unless ``flavor`` or ``options`` say
    otherwise, and compared with the stamp in the output.

    Examples
    --------
    >>> [s.state for s in block_status(Path("report.qmd"), RenderOptions())]  # doctest: +SKIP
    ['stale']
    """
    places = block_places(document, options, flavor)
    versions = library_versions()
    outputs: dict[Path, str | None] = {}
    found = []
    for place in places:
        job, last = place.job, place.last
        if job.output not in outputs:
            outputs[job.output] = job.output.read_text(encoding="utf-8") if job.output.is_file() else None
        text = outputs[job.output]
        stamp = read_stamps(text).get(job.spec.id) if text is not None else None
        if stamp is None and last is None:
            found.append(BlockStatus(document, job.spec.id, "never rendered"))
            continue
        parts = key_parts(job, place.options, versions)
        reasons = _stale_reasons(job, text, stamp, parts, last)
        found.append(BlockStatus(document, job.spec.id, "stale" if reasons else "current", reasons))
    return tuple(found)


def _stale_reasons(job: BlockJob, text: str | None, stamp: str | None, parts: KeyParts, last: LastRender | None) -> tuple[str, ...]:
    fingerprint = parts.fingerprint()
    if text is None:
        return (f"output missing ({job.output.name})",)
    if stamp is None:
        return (f"section missing from {job.output.name}",)
    if stamp != fingerprint:
        if last is not None:
            why = last.parts.changed(parts)
            if last.fingerprint != stamp:
                why += (f"{job.output.name} was written by another render than the last one recorded",)
            return why or ("fingerprint differs from the output's stamp",)
        return ("inputs changed since the output was written (no record of the last render says which)",)
    # A notebook's section is split over cells inside JSON: only its stamp is compared.
    if last is not None and last.fingerprint == fingerprint and job.output.suffix.lower() != ".ipynb":
        written = read_sections(text).get(job.spec.id)
        if written != read_sections(last.section).get(job.spec.id):
            return (f"output edited: the section in {job.output.name} differs from what was rendered",)
    return ()


def recorded_changes(document: Path, options: RenderOptions, block: str | None = None) -> list[tuple[str, LastRender | None]]:
    """(block id, last render record) for each block (or the one named), for ``premises diff``."""
    places = block_places(document, options, None)
    found = [(p.job.spec.id, p.last) for p in places if block is None or p.job.spec.id == block]
    if block is not None and not found:
        ids = ", ".join(p.job.spec.id for p in places) or "none"
        raise SpecError(f"the document has no block with id '{block}'.", hint=f"Block ids in {document.name}: {ids}.")
    return found
