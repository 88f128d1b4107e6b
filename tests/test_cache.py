"""The result store: fingerprints, entries, last-render records, stamps."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from dataclasses import replace
from pathlib import Path

import pytest

from premises.cache import (
    BlockCache,
    KeyParts,
    LastRender,
    block_from_json,
    file_sha256,
    library_versions,
    read_sections,
    read_stamps,
    section_sha256,
)
from premises.results import to_jsonable

EXAMPLE = Path(__file__).parent / "data" / "result_example.json"
SRC = Path(__file__).resolve().parents[1] / "src"

PARTS = KeyParts(
    format_version=1,
    data_sha256="d" * 64,
    spec_sha256="s" * 64,
    templates="t" * 64,
    flavor="quarto",
    detail="full",
    versions=(("premises", "0.1.0"), ("numpy", "2.0")),
    figure_rel="report-figures",
)
SECTION = "<!-- premises:begin id=b fingerprint=abc format=1 -->\n\ntext\n\n<!-- premises:end id=b -->\n"


def test_every_part_moves_the_fingerprint() -> None:
    base = PARTS.fingerprint()
    changed = [
        replace(PARTS, format_version=2),
        replace(PARTS, data_sha256="e" * 64),
        replace(PARTS, spec_sha256="r" * 64),
        replace(PARTS, templates="u" * 64),
        replace(PARTS, flavor="gfm"),
        replace(PARTS, detail="brief"),
        replace(PARTS, versions=(("premises", "0.1.0"), ("numpy", "2.1"))),
    ]
    prints = {p.fingerprint() for p in changed}
    assert base not in prints and len(prints) == len(changed)
    # Where figures are referred to changes the store key, not the stamped fingerprint.
    moved = replace(PARTS, figure_rel="elsewhere")
    assert moved.fingerprint() == base and moved.key() != PARTS.key()


def test_changed_names_the_reasons() -> None:
    newer = replace(PARTS, data_sha256="e" * 64, versions=(("premises", "0.1.0"), ("numpy", "2.1")))
    reasons = PARTS.changed(newer)
    assert reasons[0] == "data changed"
    assert "numpy 2.0 -> 2.1" in reasons[1]
    assert PARTS.changed(PARTS) == ()
    assert KeyParts.from_json(json.loads(json.dumps(PARTS.to_json()))) == PARTS


def test_library_versions_match_the_provenance_list() -> None:
    from premises.analysis import library_versions as stamped

    assert library_versions() == stamped()


def test_file_sha256_matches_hashlib(tmp_path: Path) -> None:
    import hashlib

    path = tmp_path / "x.bin"
    data = os.urandom(3 * (1 << 20) + 17)  # spans several read chunks
    path.write_bytes(data)
    assert file_sha256(path) == hashlib.sha256(data).hexdigest()  # reference: hashlib over the whole bytes


def test_store_and_lookup_round_trip(tmp_path: Path) -> None:
    store = BlockCache(tmp_path / ".premises")
    key = PARTS.key()
    assert store.lookup(key) is None
    result = {"id": "b", "z": 1.5, "a": [1, None]}
    store.store(key, result, SECTION, {"fig-b-one.png": b"\x89PNG1", "fig-b-two.png": b"\x89PNG2"})
    hit = store.lookup(key)
    assert hit is not None
    assert hit.result == result and list(hit.result) == ["id", "z", "a"]  # key order kept
    assert hit.section == SECTION
    assert dict(hit.figures) == {"fig-b-one.png": b"\x89PNG1", "fig-b-two.png": b"\x89PNG2"}
    assert not [p for p in (tmp_path / ".premises" / "blocks").iterdir() if p.name.startswith(".")]


def test_a_damaged_or_half_created_entry_is_a_miss_and_is_replaced(tmp_path: Path) -> None:
    store = BlockCache(tmp_path)
    key = PARTS.key()
    store.store(key, {"id": "b"}, SECTION, {"f.png": b"abc"})
    entry = tmp_path / "blocks" / key
    (entry / "figures" / "f.png").write_bytes(b"abd")  # one byte changed
    assert store.lookup(key) is None
    (entry / "manifest.json").unlink()  # as if a writer died before the manifest
    assert store.lookup(key) is None
    store.store(key, {"id": "b"}, SECTION, {"f.png": b"abc"})
    hit = store.lookup(key)
    assert hit is not None and dict(hit.figures) == {"f.png": b"abc"}


def test_stores_racing_for_one_key_both_succeed(tmp_path: Path) -> None:
    store = BlockCache(tmp_path)
    key = PARTS.key()
    errors: list[BaseException] = []
    barrier = threading.Barrier(4)

    def write(n: int) -> None:
        try:
            barrier.wait()
            store.store(key, {"id": "b"}, SECTION, {"f.png": b"x" * 100_000})
        except BaseException as exc:  # noqa: BLE001 - collected for the assertion
            errors.append(exc)

    threads = [threading.Thread(target=write, args=(n,)) for n in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert store.lookup(key) is not None
    assert [p.name for p in (tmp_path / "blocks").iterdir()] == [key]


def test_extras_need_an_entry(tmp_path: Path) -> None:
    store = BlockCache(tmp_path)
    key = PARTS.key()
    store.write_extra(key, "diagnostics.json", b"{}")
    assert store.read_extra(key, "diagnostics.json") is None
    store.store(key, {"id": "b"}, SECTION, {})
    store.write_extra(key, "diagnostics.json", b"{}")
    assert store.read_extra(key, "diagnostics.json") == b"{}"
    assert store.lookup(key) is not None  # an extra does not spoil the manifest check


def test_keys_are_checked(tmp_path: Path) -> None:
    with pytest.raises(ValueError):
        BlockCache(tmp_path).lookup("../../etc")


def test_last_render_round_trip_and_malformed_records(tmp_path: Path) -> None:
    store = BlockCache(tmp_path)
    last = LastRender(
        key=PARTS.key(),
        parts=PARTS,
        result={"id": "b", "change_log": {"rows_added": ["p1"]}},
        section=SECTION,
        change_log=(("rows_added", ["p1"]), ("previous_fingerprint", "x")),
        options={"flavor": "quarto", "output": "report.premises.md"},
    )
    store.write_last("chapters/report.qmd", "b", last)
    assert store.read_last("chapters/report.qmd", "b") == last
    assert store.read_last("chapters/other.qmd", "b") is None
    path = next((tmp_path / "last").iterdir())
    assert path.name == "chapters-report.qmd--b.json"
    path.write_text("{not json", encoding="utf-8")
    assert store.read_last("chapters/report.qmd", "b") is None


def test_stamps_and_sections() -> None:
    text = "intro\r\n" + SECTION.replace("\n", "\r\n") + "outro\n<!-- premises:begin id=c fingerprint=def format=1 -->\nunclosed\n"
    assert read_stamps(text) == {"b": "abc", "c": "def"}
    sections = read_sections(text)
    assert list(sections) == ["b"]  # c has no end marker
    assert sections["b"] == SECTION.rstrip("\n")
    assert section_sha256(SECTION) == section_sha256(SECTION.replace("\n", "\r\n"))
    assert section_sha256(SECTION) != section_sha256(SECTION.replace("text", "edited"))


def test_block_from_json_round_trips_the_public_json() -> None:
    data = json.loads(EXAMPLE.read_text(encoding="utf-8"))
    rebuilt = block_from_json(data)
    out = to_jsonable(rebuilt)
    assert {k: out[k] for k in data} == data
    assert rebuilt.coefficients[0].term == data["coefficients"][0]["term"]
    assert isinstance(rebuilt.ledger, tuple) and rebuilt.ledger[0].kind == data["ledger"][0]["kind"]


def test_cache_and_changes_import_no_heavy_library() -> None:
    code = "import premises.cache, premises.changes, sys; print(' '.join(sorted(sys.modules)))"
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    loaded = set(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env).stdout.split())
    assert not {"numpy", "pandas", "scipy", "statsmodels", "matplotlib", "jinja2"} & loaded


def test_temporary_folders_left_by_a_dead_render_are_swept(tmp_path: Path) -> None:
    store = BlockCache(tmp_path)
    old = tmp_path / "blocks" / ".tmp-deadbeef0000-x"
    young = tmp_path / "blocks" / ".tmp-deadbeef0001-y"
    for folder in (old, young):
        (folder / "figures").mkdir(parents=True)
    os.utime(old, (0, 0))
    store.store(PARTS.key(), {"id": "b"}, SECTION, {})
    assert not old.exists() and young.exists()  # a young one may belong to a render still running

