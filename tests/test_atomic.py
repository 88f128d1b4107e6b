"""Nothing is lost: outputs are replaced whole or not at all, sources are never written.

- Every place in ``src/premises`` that writes a file goes through
  :mod:`premises.files` (a temporary file in the destination folder, renamed into
  place); the few others are listed here with the reason they are safe.
- A render killed with SIGKILL while it draws figures, and at several other
  moments, leaves the previous output and figures with the same bytes, no
  half-written file, and a result store from which the next render and
  ``premises status`` work.
- Running the whole catalogue of bad inputs opens no source document and no
  data file for writing (an audit hook watches every ``open``), and their
  bytes are the same afterwards.
"""

from __future__ import annotations

import hashlib
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from premises.files import atomic_write_bytes, atomic_write_text

SRC = Path(__file__).parents[1] / "src" / "premises"
ENV = {**os.environ, "PYTHONPATH": str(SRC.parent)}

# --- 1. every write path ----------------------------------------------------------------

WRITES = re.compile(r"\.write_text\(|\.write_bytes\(|\bopen\([^)]*[\"'][wax]b?\+?[\"']|\.savefig\(|\.to_csv\(|\.to_parquet\(|\bcopytree\(|\bos\.replace\(|\bos\.rename\(")
ALLOWED = {
    # The atomic writer itself (and its docstring).
    ("files.py", "os.replace(tmp, path)"),
    ("files.py", 'The file gets the permissions an ordinary ``open(path, "w")`` would give'),
    # Figures are drawn into memory, then written by atomic_write_bytes.
    ("figures/layers.py", "fig.savefig(buffer, format=fmt, dpi=dpi, metadata=METADATA[fmt])"),
    # A Parquet table is built in memory, then written by atomic_write_bytes.
    ("exports.py", "frame.to_parquet(buffer, index=False)"),
    # A store entry is written into a private temporary folder and published by one
    # rename; a reader checks every file against the manifest, so a torn entry is a miss.
    ("cache.py", "target.write_bytes(data)"),
    ("cache.py", '(tmp / "manifest.json").write_bytes(_json_bytes({"layout": LAYOUT_VERSION, "key": key, "files": digests}))'),
    ("cache.py", "os.rename(tmp, final)"),
    ("cache.py", "os.rename(folder, trash)"),
    # `premises quarto install` copies the packaged extension (not a render output).
    ("quarto.py", 'shutil.copytree(extension_source(), target, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))'),
}


def _write_sites() -> set[tuple[str, str]]:
    found = set()
    for path in sorted(SRC.rglob("*.py")):
        for line in path.read_text(encoding="utf-8").splitlines():
            if WRITES.search(line) and not line.lstrip().startswith("#"):
                found.add((path.relative_to(SRC).as_posix(), line.strip()))
    return found


def test_every_file_write_is_atomic_or_listed_with_its_reason() -> None:
    unexpected = _write_sites() - ALLOWED
    assert not unexpected, f"write these through premises.files (or list them with a reason): {sorted(unexpected)}"


def test_the_write_scanner_finds_writes() -> None:
    # The pattern must see the kinds of writes it is there to catch, or the test above could not fail.
    for line in ('Path("x").write_text("a")', 'open(p, "w")', 'open(p, mode="ab")', "fig.savefig(path)", "df.to_csv(p)"):
        assert WRITES.search(line), line


def test_atomic_write_keeps_the_old_file_when_writing_fails(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    target = tmp_path / "out.md"
    atomic_write_text(target, "old\n")

    def broken(*args: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", broken)
    with pytest.raises(OSError, match="No space left"):
        atomic_write_bytes(target, b"new but never finished")
    assert target.read_bytes() == b"old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.md"]  # no temporary file left


def test_atomic_write_gives_ordinary_permissions_and_makes_folders(tmp_path: Path) -> None:
    target = tmp_path / "a" / "b" / "out.md"
    atomic_write_text(target, "x\r\ny\n")
    assert target.read_bytes() == b"x\r\ny\n"
    mask = os.umask(0o022)
    os.umask(mask)
    assert target.stat().st_mode & 0o777 == 0o666 & ~mask


# --- 2. a render killed midway ----------------------------------------------------------

TERMS = [f"x{i}" for i in range(1, 9)]
BLOCK = "# Report\n\n```premises\nid: many\ndata: d.csv\nmodel: y ~ " + " + ".join(TERMS) + "\nid_column: id\n```\n\nAfter.\n"


def _data(shift: float) -> str:
    lines = ["id,y," + ",".join(TERMS)]
    for i in range(1, 61):
        xs = [((i * (k + 3)) % 17) / 3 + k for k in range(len(TERMS))]
        y = 2 + sum(xs) / 4 + ((i * 7) % 11) / 5 + shift
        lines.append(f"r{i},{y:.4f}," + ",".join(f"{x:.4f}" for x in xs))
    return "\n".join(lines) + "\n"


def _command(project: Path, *args: str, tmpdir: Path | None = None) -> subprocess.Popen[bytes]:
    env = {**ENV, **({"TMPDIR": str(tmpdir)} if tmpdir else {})}
    return subprocess.Popen(
        [sys.executable, "-m", "premises", *args], cwd=project, env=env,
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )


def _run(project: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "premises", *args], check=False, cwd=project, env=ENV, capture_output=True, text=True, timeout=300)


def _snapshot(folder: Path) -> dict[str, str]:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.rglob("*")) if p.is_file()}


def _complete_png(data: bytes) -> bool:
    return data.startswith(b"\x89PNG\r\n\x1a\n") and data.endswith(b"IEND\xaeB`\x82")


@pytest.fixture()
def rendered(tmp_path: Path) -> Path:
    """A project rendered once (output, figures, store), whose data then changed."""
    project = tmp_path / "project"
    project.mkdir()
    (project / "report.md").write_text(BLOCK, encoding="utf-8")
    (project / "d.csv").write_text(_data(0.0), encoding="utf-8")
    done = _run(project, "render", "report.md")
    assert done.returncode == 0, done.stderr
    assert len(list((project / "report-figures").iterdir())) >= 12  # a block with many figures
    (project / "d.csv").write_text(_data(0.5), encoding="utf-8")
    return project


def _kill_when(process: subprocess.Popen[bytes], ready: Callable[[], bool], timeout: float = 120) -> bool:
    """SIGKILL ``process`` as soon as ``ready()``; False if it ended first."""
    stop = time.monotonic() + timeout
    while time.monotonic() < stop:
        if process.poll() is not None:
            return False
        if ready():
            process.send_signal(signal.SIGKILL)
            process.wait(timeout=30)
            return True
        time.sleep(0.002)
    process.kill()
    raise AssertionError("the render neither drew a figure nor ended")


def _assert_recovers(project: Path) -> None:
    """The store still serves: status answers, the next render succeeds and is then current."""
    status = _run(project, "status", "report.md")
    assert status.returncode in (0, 3), status.stderr
    assert "Traceback" not in status.stderr
    again = _run(project, "render", "report.md")
    assert again.returncode == 0, again.stderr
    assert _run(project, "status", "report.md").returncode == 0
    for png in (project / "report-figures").iterdir():
        assert _complete_png(png.read_bytes()), png.name


@pytest.mark.slow
def test_a_render_killed_while_drawing_figures_loses_nothing(rendered: Path, tmp_path: Path) -> None:
    before = _snapshot(rendered)
    watch = tmp_path / "tmp"
    watch.mkdir()

    def first_figure_drawn() -> bool:
        # The render draws into a private folder under TMPDIR first.
        return any(p.is_file() for d in watch.glob("premises-figures-*") for p in d.iterdir())

    assert _kill_when(_command(rendered, "render", "report.md", tmpdir=watch), first_figure_drawn)
    after = _snapshot(rendered)
    kept = {name: digest for name, digest in after.items() if not name.startswith(".premises/")}
    assert kept == {name: digest for name, digest in before.items() if not name.startswith(".premises/")}
    _assert_recovers(rendered)


@pytest.mark.slow
@pytest.mark.parametrize("fraction", [0.2, 0.5, 0.8, 0.9, 0.97])
def test_a_render_killed_at_any_moment_leaves_whole_files(rendered: Path, fraction: float) -> None:
    """Killed at a fraction of a normal render's time: each output is the old or the new, whole."""
    old_output = (rendered / "report.md").read_bytes(), (rendered / "report.premises.md").read_bytes()
    started = time.monotonic()
    probe = _run(rendered, "render", "report.md", "--no-cache", "-o", "probe/report.md")
    assert probe.returncode == 0, probe.stderr
    duration = time.monotonic() - started
    new_stamp = _stamp((rendered / "probe" / "report.md").read_bytes())
    process = _command(rendered, "render", "report.md")
    deadline = time.monotonic() + fraction * duration
    _kill_when(process, lambda: time.monotonic() >= deadline)
    assert (rendered / "report.md").read_bytes() == old_output[0]
    written = (rendered / "report.premises.md").read_bytes()
    # The old output, or the whole new one (its stamp is the new fingerprint and it ends
    # with the document's last line); the new one also carries a change log, so its bytes
    # differ from the probe's.
    assert written == old_output[1] or (_stamp(written) == new_stamp and written.endswith(b"\n\nAfter.\n"))
    leftovers = [p.name for p in rendered.rglob("*.tmp") if ".premises" not in p.parts]
    for png in (rendered / "report-figures").iterdir():
        if not png.name.startswith("."):
            assert _complete_png(png.read_bytes()), png.name
    _assert_recovers(rendered)
    # An interrupted rename leaves at most its temporary file, never a torn output.
    assert all(name.startswith(".") for name in leftovers)


def _stamp(text: bytes) -> str:
    from premises.cache import read_stamps

    return read_stamps(text.decode("utf-8"))["many"]


# --- 3. sources are never opened for writing ----------------------------------------------

_WATCHED: set[str] = set()
_WRITTEN: list[str] = []
_HOOKED: list[bool] = []
_WRITE_FLAGS = os.O_WRONLY | os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_TRUNC


def _audit(event: str, args: tuple[object, ...]) -> None:
    if event != "open" or not _WATCHED:
        return
    path, mode, flags = args
    writing = (isinstance(mode, str) and any(c in mode for c in "wax+")) or (isinstance(flags, int) and flags & _WRITE_FLAGS)
    if writing and isinstance(path, (str, bytes, os.PathLike)):
        name = os.path.realpath(os.fsdecode(path))
        if name in _WATCHED:
            _WRITTEN.append(name)


def _sources(folders: list[Path]) -> dict[str, str]:
    found = {}
    for folder in folders:
        for path in folder.rglob("*"):
            if path.is_file() and not path.is_symlink() and os.access(path, os.R_OK):
                found[os.path.realpath(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
    return found


def test_the_catalogue_never_writes_a_source(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    sys.path.insert(0, str(Path(__file__).parent))
    try:
        import test_catalogue as catalogue
    finally:
        sys.path.pop(0)
    from premises.cli import main

    if not _HOOKED:
        sys.addaudithook(_audit)  # cannot be removed; it is idle while _WATCHED is empty
        _HOOKED.append(True)
    runs = []
    for case in catalogue.CASES:
        if case.raw.get("root_skip") and os.geteuid() == 0:
            continue
        root = tmp_path / case.test_id
        root.mkdir()
        project, outside, document, args = catalogue.build_case(case, root)
        runs.append((document, root, args, [project, outside]))
    before = _sources([folder for *_, folders in runs for folder in folders])
    assert len(before) >= len(runs)  # every case has at least its document or a data file
    _WATCHED.update(before)
    try:
        for document, root, args, _ in runs:
            main(["render", str(document), "-o", str(root / "out" / "doc.premises.md"), "--cache-dir", str(root / "cache"), *args])
    finally:
        _WATCHED.clear()
    capsys.readouterr()
    assert _WRITTEN == []
    assert _sources([folder for *_, folders in runs for folder in folders]) == before
    print(f"{len(before)} source files of {len(runs)} catalogue cases checked")


def test_the_audit_hook_notices_a_write(tmp_path: Path) -> None:
    # Without this the test above could pass with a hook that sees nothing.
    if not _HOOKED:
        sys.addaudithook(_audit)
        _HOOKED.append(True)
    source = tmp_path / "d.csv"
    source.write_text("y\n1\n")
    _WATCHED.add(os.path.realpath(source))
    try:
        with source.open("a") as handle:
            handle.write("2\n")
    finally:
        _WATCHED.clear()
    assert _WRITTEN == [os.path.realpath(source)]
    _WRITTEN.clear()
