"""The result store: fingerprints, cached block results and each block's last render.

A block's fingerprint hashes everything that can change a byte of its section:
the result-format version, the data file's bytes, the canonical spec, the
template set, the flavour and detail, and the versions of the package and of
the libraries that compute its numbers. Computing it needs only YAML parsing
and hashing, so a render whose blocks are all in the store imports no
statistics library.

Layout of the store (``.premises/`` in the project root by default)::

    blocks/<key>/manifest.json      files of the entry and their SHA-256 (written last)
    blocks/<key>/result.json        the block's result JSON, without a change log
    blocks/<key>/section.md         its section, rendered without a change log
    blocks/<key>/figures/<files>    its figures
    blocks/<key>/<extra>            optional files added later (diagnostics tables)
    last/<document>--<block>.json   the last render of each block: key parts,
                                    result, change log, section, render options

An entry is built in a temporary folder and renamed into place, so a reader
sees a whole entry or none; an entry whose manifest or files do not check out
counts as a miss. Two processes storing the same entry at once both succeed:
the second rename fails and its copy is dropped.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import sys
import types
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, fields, is_dataclass
from pathlib import Path
from typing import Any, Union, get_args, get_origin, get_type_hints

from premises._version import __version__
from premises.files import atomic_write_bytes, atomic_write_text
from premises.results import BlockResult

__all__ = [
    "LAYOUT_VERSION",
    "VERSIONED_LIBRARIES",
    "BlockCache",
    "CachedBlock",
    "KeyParts",
    "LastRender",
    "block_from_json",
    "file_sha256",
    "library_versions",
    "read_sections",
    "read_stamps",
    "section_sha256",
    "text_sha256",
]

LAYOUT_VERSION = 1
"""Version of the store's layout; part of every key, so a new layout never reads an old entry."""

VERSIONED_LIBRARIES = ("numpy", "pandas", "scipy", "statsmodels", "patsy", "matplotlib", "jinja2")
"""Libraries whose version can change a number or a byte of the output."""

_KEY = re.compile(r"[0-9a-f]{64}")
_BEGIN = re.compile(r"<!-- premises:begin id=(?P<id>\S+) fingerprint=(?P<fp>\S*) format=\S+ -->")
_END = "<!-- premises:end id={id} -->"


def library_versions() -> tuple[tuple[str, str], ...]:
    """Versions that can change a number in the output (read from metadata, nothing imported).

    The same list as :func:`premises.analysis.library_versions`, which stamps
    the provenance; a test keeps the two equal.
    """
    # sys.version's first word is what platform.python_version() returns; platform costs an import.
    out = [("premises", __version__), ("premises-code", code_fingerprint()), ("python", sys.version.split()[0])]
    out += [(name, _installed_version(name)) for name in VERSIONED_LIBRARIES]
    return tuple(out)


def code_fingerprint() -> str:
    """Short hash of the package's own Python files.

    The version number alone does not change while the code is edited (an
    editable install, a development checkout); a result computed by other code
    must not be served from the store as if it were current.
    """
    package = Path(__file__).resolve().parent
    digest = hashlib.sha256()
    for path in sorted(package.rglob("*.py")):
        digest.update(path.relative_to(package).as_posix().encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:12]


def _installed_version(name: str) -> str:
    """``importlib.metadata.version(name)``, found without importing ``importlib.metadata``.

    The first ``<name>-<version>.dist-info`` folder along ``sys.path`` is the
    distribution ``importlib.metadata`` would pick; only the header lines of
    its METADATA are read. Importing ``importlib.metadata`` and parsing whole
    METADATA files with the email parser costs more than the rest of a cached
    render; it remains the fallback for other layouts (eggs, zip files).
    """
    wanted = re.sub(r"[-_.]+", "_", name).lower()
    for entry in sys.path:
        try:
            names = os.listdir(entry or ".")
        except OSError:
            continue
        for found in names:
            stem, dot, suffix = found.rpartition(".")
            if suffix != "dist-info" or not dot:
                continue
            dist_name, _, _ = stem.partition("-")
            if re.sub(r"[-_.]+", "_", dist_name).lower() == wanted:
                header = _metadata_version(Path(entry or ".") / found / "METADATA")
                if header is not None:
                    return header
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(name)
    except PackageNotFoundError:
        return "absent"


def _metadata_version(path: Path) -> str | None:
    try:
        with path.open(encoding="utf-8", errors="replace") as handle:
            for line in handle:
                if not line.strip():
                    return None  # end of the header block
                if line.startswith("Version:"):
                    return line.removeprefix("Version:").strip()
    except OSError:
        return None
    return None


def text_sha256(text: str) -> str:
    """SHA-256 of UTF-8 text, in hex."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def file_sha256(path: Path) -> str:
    """SHA-256 of a file's bytes, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


@dataclass(frozen=True)
class KeyParts:
    """What a block's section depends on; equal parts give equal bytes."""

    format_version: int
    data_sha256: str
    spec_sha256: str
    """SHA-256 of :func:`premises.spec.canonical_spec`."""
    templates: str
    """Fingerprint of the template set (:func:`premises.pipeline.template_fingerprint`)."""
    flavor: str
    detail: str
    versions: tuple[tuple[str, str], ...]
    figure_rel: str = ""
    """Figure folder as the output refers to it; figure paths in the section depend on it."""

    def fingerprint(self) -> str:
        """The block's fingerprint, as stamped in its section and its provenance."""
        lines = [
            f"format={self.format_version}",
            f"data={self.data_sha256}",
            f"spec={self.spec_sha256}",
            f"templates={self.templates}|flavor={self.flavor}|detail={self.detail}",
            *(f"{name}={value}" for name, value in self.versions),
        ]
        return text_sha256("\n".join(lines))

    def key(self) -> str:
        """The store key: the fingerprint, the store layout and where figures are referred to."""
        return text_sha256(f"{self.fingerprint()}\nlayout={LAYOUT_VERSION}\nfigures={self.figure_rel}")

    def changed(self, other: KeyParts) -> tuple[str, ...]:
        """Plain-words reasons why ``other`` (newer) differs from ``self`` (older)."""
        out = []
        if self.data_sha256 != other.data_sha256:
            out.append("data changed")
        if self.spec_sha256 != other.spec_sha256:
            out.append("spec changed")
        if self.templates != other.templates:
            out.append("templates changed")
        if (self.flavor, self.detail) != (other.flavor, other.detail):
            out.append(f"flavor/detail changed ({self.flavor}/{self.detail} -> {other.flavor}/{other.detail})")
        old, new = dict(self.versions), dict(other.versions)
        moved = [f"{k} {old.get(k, 'absent')} -> {new.get(k, 'absent')}" for k in sorted(set(old) | set(new)) if old.get(k) != new.get(k)]
        if moved:
            out.append("versions changed (" + ", ".join(moved) + ")")
        if self.format_version != other.format_version:
            out.append(f"result format changed ({self.format_version} -> {other.format_version})")
        return tuple(out)

    def to_json(self) -> dict[str, Any]:
        """Plain JSON (versions as an object)."""
        out = asdict(self)
        out["versions"] = dict(self.versions)
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> KeyParts:
        """Inverse of :meth:`to_json`; raises KeyError/TypeError/ValueError on a malformed record."""
        return cls(
            format_version=int(data["format_version"]),
            data_sha256=str(data["data_sha256"]),
            spec_sha256=str(data["spec_sha256"]),
            templates=str(data["templates"]),
            flavor=str(data["flavor"]),
            detail=str(data["detail"]),
            versions=tuple((str(k), str(v)) for k, v in dict(data["versions"]).items()),
            figure_rel=str(data.get("figure_rel", "")),
        )


@dataclass(frozen=True)
class CachedBlock:
    """A stored entry: the block's result JSON, its section and its figures."""

    key: str
    result: dict[str, Any]
    section: str
    figures: tuple[tuple[str, bytes], ...]
    """(file name, bytes) of every figure."""


@dataclass(frozen=True)
class LastRender:
    """A block's last render, kept to explain staleness and to write change logs."""

    key: str
    parts: KeyParts
    result: dict[str, Any]
    """Its result JSON, change log included."""
    section: str
    """Its section as written (change log included)."""
    change_log: tuple[tuple[str, Any], ...] = ()
    options: dict[str, Any] = field(default_factory=dict)
    """Render options that status needs to recompute the fingerprint (flavor, detail, template_dirs, output)."""

    @property
    def fingerprint(self) -> str:
        """Fingerprint stamped in that render's section."""
        return self.parts.fingerprint()


def read_stamps(text: str) -> dict[str, str]:
    """Block id -> fingerprint, from the ``<!-- premises:begin ... -->`` stamps of a rendered text.

    Examples
    --------
    >>> read_stamps("<!-- premises:begin id=yield fingerprint=ab12 format=1 -->\\n")
    {'yield': 'ab12'}
    """
    return {m.group("id"): m.group("fp") for m in _BEGIN.finditer(text)}


def read_sections(text: str) -> dict[str, str]:
    """Block id -> its section text from the begin stamp to the end marker (newlines as LF).

    A section whose end marker is missing is left out.
    """
    text = text.replace("\r\n", "\n")
    out: dict[str, str] = {}
    for match in _BEGIN.finditer(text):
        end = _END.format(id=match.group("id"))
        stop = text.find(end, match.end())
        if stop >= 0:
            out[match.group("id")] = text[match.start() : stop + len(end)]
    return out


def section_sha256(section: str) -> str:
    """Hash of a section's text between its markers, to notice hand edits of the output."""
    found = read_sections(section)
    return text_sha256("\n".join(found[k] for k in sorted(found)) if found else section.replace("\r\n", "\n"))


STALE_TEMP_SECONDS = 3600
"""A temporary entry folder older than this was left by a render that died; it is removed."""


def _sweep(blocks: Path) -> None:
    import shutil
    import time

    cutoff = time.time() - STALE_TEMP_SECONDS
    for folder in blocks.iterdir():
        try:
            if folder.name.startswith((".tmp-", ".trash-")) and folder.stat().st_mtime < cutoff:
                shutil.rmtree(folder, ignore_errors=True)
        except OSError:
            continue  # another render removed it first


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-") or "document"


def _json_bytes(value: Any) -> bytes:
    # Key order is kept (not sorted) so a round trip gives the same dict the templates saw.
    return (json.dumps(value, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")


@dataclass(frozen=True)
class BlockCache:
    """A result store in ``root``; pass ``None`` where a cache is optional to turn it off.

    Examples
    --------
    >>> store = BlockCache(Path(".premises"))  # doctest: +SKIP
    >>> store.lookup(parts.key()) is None      # doctest: +SKIP
    True
    """

    root: Path

    def _entry(self, key: str) -> Path:
        if not _KEY.fullmatch(key):
            raise ValueError(f"not a store key: {key!r}")
        return self.root / "blocks" / key

    def lookup(self, key: str) -> CachedBlock | None:
        """The entry stored under ``key``, or None when it is absent or does not check out."""
        folder = self._entry(key)
        try:
            manifest = json.loads((folder / "manifest.json").read_bytes())
            files: dict[str, bytes] = {}
            for name, digest in dict(manifest["files"]).items():
                data = (folder / name).read_bytes()
                if hashlib.sha256(data).hexdigest() != digest:
                    return None
                files[name] = data
            result = json.loads(files.pop("result.json"))
            section = files.pop("section.md").decode("utf-8")
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            return None
        figures = tuple(sorted((name.removeprefix("figures/"), data) for name, data in files.items() if name.startswith("figures/")))
        return CachedBlock(key=key, result=result, section=section, figures=figures)

    def store(self, key: str, result: Mapping[str, Any], section: str, figures: Mapping[str, bytes]) -> None:
        """Store an entry atomically; a valid entry already there is kept."""
        final = self._entry(key)
        blocks = final.parent
        import shutil
        import tempfile

        blocks.mkdir(parents=True, exist_ok=True)
        _sweep(blocks)
        tmp = Path(tempfile.mkdtemp(prefix=f".tmp-{key[:12]}-", dir=blocks))
        try:
            payload = {"result.json": _json_bytes(result), "section.md": section.encode("utf-8")}
            payload.update({f"figures/{name}": data for name, data in figures.items()})
            for name, data in payload.items():
                target = tmp / name
                target.parent.mkdir(parents=True, exist_ok=True)
                target.write_bytes(data)
            digests = {name: hashlib.sha256(data).hexdigest() for name, data in sorted(payload.items())}
            (tmp / "manifest.json").write_bytes(_json_bytes({"layout": LAYOUT_VERSION, "key": key, "files": digests}))
            self._publish(tmp, final)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

    def _publish(self, tmp: Path, final: Path) -> None:
        if final.exists():
            if self.lookup(final.name) is not None:
                return  # another render stored the same entry first
            self._discard(final)
        try:
            os.rename(tmp, final)
        except OSError:
            # Another process renamed its copy into place between our check and rename.
            if self.lookup(final.name) is None:
                raise

    def _discard(self, folder: Path) -> None:
        trash = folder.with_name(f".trash-{folder.name[:12]}-{os.getpid()}-{id(folder)}")
        try:
            os.rename(folder, trash)
        except OSError:
            return  # someone else moved it already
        import shutil

        shutil.rmtree(trash, ignore_errors=True)

    def read_extra(self, key: str, name: str) -> bytes | None:
        """An optional file added to an entry later (None when absent)."""
        try:
            return (self._entry(key) / name).read_bytes()
        except OSError:
            return None

    def write_extra(self, key: str, name: str, data: bytes) -> None:
        """Add an optional file to an existing entry (atomically); nothing happens without the entry."""
        folder = self._entry(key)
        if (folder / "manifest.json").is_file() and "/" not in name and name not in ("manifest.json", "result.json", "section.md"):
            atomic_write_bytes(folder / name, data)

    def _last_path(self, document: str, block: str) -> Path:
        return self.root / "last" / f"{_slug(document)}--{_slug(block)}.json"

    def read_last(self, document: str, block: str) -> LastRender | None:
        """The last render of ``block`` in ``document`` (a path relative to the project), if recorded."""
        try:
            data = json.loads(self._last_path(document, block).read_bytes())
            return LastRender(
                key=str(data["key"]),
                parts=KeyParts.from_json(data["parts"]),
                result=dict(data["result"]),
                section=str(data["section"]),
                change_log=tuple((str(k), v) for k, v in data["change_log"]),
                options=dict(data.get("options") or {}),
            )
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            return None

    def write_last(self, document: str, block: str, last: LastRender) -> None:
        """Record ``last`` as the block's last render (atomic; the last writer wins)."""
        record = {
            "layout": LAYOUT_VERSION,
            "document": document,
            "block": block,
            "key": last.key,
            "fingerprint": last.fingerprint,
            "parts": last.parts.to_json(),
            "options": last.options,
            "change_log": [[k, v] for k, v in last.change_log],
            "section_sha256": section_sha256(last.section),
            "section": last.section,
            "result": last.result,
        }
        atomic_write_text(self._last_path(document, block), _json_bytes(record).decode("utf-8"))


def block_from_json(data: Mapping[str, Any]) -> BlockResult:
    """Rebuild a :class:`BlockResult` from its JSON (``results.to_jsonable``).

    ``to_jsonable(block_from_json(j)) == j``: JSON ``null`` in a field typed
    ``float`` (a NaN before serialising) comes back as NaN.
    """
    value = _rebuild(BlockResult, data, "", {})
    assert isinstance(value, BlockResult)
    return value


_MAPPINGS = frozenset({"dfbetas", "versions", "missing_by_column", "extra", "guidelines", "change_log"})


def _rebuild(tp: Any, value: Any, name: str, hints: dict[type, dict[str, Any]]) -> Any:
    """Rebuild ``value`` as type ``tp``; ``hints`` memoises type hints per class (they are slow to evaluate)."""
    origin = get_origin(tp)
    if is_dataclass(tp) and isinstance(tp, type):
        if tp not in hints:
            hints[tp] = get_type_hints(tp)
        known = hints[tp]
        kwargs = {f.name: _rebuild(known[f.name], value[f.name], f.name, hints) for f in fields(tp) if f.name in value}
        return tp(**kwargs)
    if name in _MAPPINGS and isinstance(value, Mapping):
        args = get_args(get_args(tp)[0]) if get_args(tp) else ()
        inner = args[1] if len(args) == 2 else Any
        return tuple((str(k), _rebuild(inner, v, "", hints)) for k, v in value.items())
    if origin in (Union, types.UnionType):
        options = [a for a in get_args(tp) if a is not type(None)]
        if value is None:
            return None
        return _rebuild(options[0], value, name, hints) if len(options) == 1 else value
    if origin is tuple:
        args = get_args(tp)
        if len(args) == 2 and args[1] is Ellipsis:
            if args[0] is str:
                return tuple(value)  # ids: up to 10^6 strings, nothing to rebuild
            return tuple(_rebuild(args[0], v, "", hints) for v in value)
        return tuple(_rebuild(a, v, "", hints) for a, v in zip(args, value))
    if tp is float:
        return float("nan") if value is None else float(value)
    if tp is Any:
        return _freeze(value)
    return value


def _freeze(value: Any) -> Any:
    # Free-form values (Finding.extra, change logs) stay JSON-shaped; lists become tuples as to_jsonable made them lists.
    if isinstance(value, list):
        return tuple(_freeze(v) for v in value)
    return value
