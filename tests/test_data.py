"""Reading data files: formats, containment, fingerprints, row ids."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import pandas as pd
import pytest

from premises.data import READERS, load_table, row_ids
from premises.errors import DataError, Location

HERE = Location("doc.md", 3, "b", "data")


@pytest.fixture()
def frame() -> pd.DataFrame:
    return pd.DataFrame({"id": ["a", "b", "c"], "x": [1.0, 2.5, 3.0], "y": [2.0, 3.0, 4.5]})


@pytest.mark.parametrize(
    "suffix,writer",
    [
        (".csv", lambda f, p: f.to_csv(p, index=False)),
        (".tsv", lambda f, p: f.to_csv(p, index=False, sep="\t")),
        (".parquet", lambda f, p: f.to_parquet(p, index=False)),
        (".xlsx", lambda f, p: f.to_excel(p, index=False)),
        (".dta", lambda f, p: f.to_stata(p, write_index=False)),
    ],
)
def test_every_format_reads_back_the_same_values(tmp_path: Path, frame: pd.DataFrame, suffix, writer) -> None:
    path = tmp_path / f"d{suffix}"
    writer(frame, path)
    table = load_table(path.name, tmp_path, HERE)
    assert table.info.rows_read == 3
    assert table.info.format == READERS[suffix][0]
    assert list(table.frame["x"]) == [1.0, 2.5, 3.0]
    # The fingerprint is the SHA-256 of the file's bytes (hashlib as the reference).
    assert table.info.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_spss_file_reads(tmp_path: Path, frame: pd.DataFrame) -> None:
    pyreadstat = pytest.importorskip("pyreadstat")
    path = tmp_path / "d.sav"
    pyreadstat.write_sav(frame, str(path))
    assert load_table("d.sav", tmp_path, HERE).info.rows_read == 3


def test_bom_and_crlf_are_read(tmp_path: Path) -> None:
    (tmp_path / "d.csv").write_bytes("\ufeffx,y\r\n1,2\r\n3,4\r\n".encode())
    table = load_table("d.csv", tmp_path, HERE)
    assert list(table.frame.columns) == ["x", "y"]


@pytest.mark.parametrize(
    "content,phrase",
    [
        (b"", "empty"),
        (b"x,y\n", "no rows"),
        (b"x,y\n\x00\x01,2\n", "binary"),
        ("x,y\n1,2\n".encode("utf-16"), "binary|UTF-8"),
        (b"x,y\n\xff\xfe,2\n", "UTF-8"),
    ],
)
def test_bad_files_are_data_errors(tmp_path: Path, content: bytes, phrase: str) -> None:
    (tmp_path / "d.csv").write_bytes(content)
    with pytest.raises(DataError, match=phrase) as info:
        load_table("d.csv", tmp_path, HERE)
    assert "doc.md:3" in str(info.value)


def test_missing_file_lists_nearby_files(tmp_path: Path) -> None:
    (tmp_path / "trial.csv").write_text("x\n1\n")
    with pytest.raises(DataError, match="does not exist.*trial.csv"):
        load_table("trail.csv", tmp_path, HERE)


def test_unknown_extension(tmp_path: Path) -> None:
    (tmp_path / "d.json").write_text("{}")
    with pytest.raises(DataError, match="unknown file type"):
        load_table("d.json", tmp_path, HERE)


def test_paths_may_not_escape_the_project(tmp_path: Path) -> None:
    project = tmp_path / "project"
    project.mkdir()
    (tmp_path / "secret.csv").write_text("x\n1\n")
    with pytest.raises(DataError, match="outside the project"):
        load_table("../secret.csv", project, HERE)
    with pytest.raises(DataError, match="absolute"):
        load_table(str(tmp_path / "secret.csv"), project, HERE)
    os.symlink(tmp_path / "secret.csv", project / "link.csv")
    with pytest.raises(DataError, match="outside the project"):
        load_table("link.csv", project, HERE)
    assert load_table("../secret.csv", project, HERE, allow_outside=True).info.rows_read == 1


def test_quarto_project_root_allows_sibling_folders(tmp_path: Path) -> None:
    (tmp_path / "_quarto.yml").write_text("project: {type: default}\n")
    (tmp_path / "data").mkdir()
    (tmp_path / "chapters").mkdir()
    (tmp_path / "data" / "d.csv").write_text("x\n1\n")
    assert load_table("../data/d.csv", tmp_path / "chapters", HERE).info.rows_read == 1


def test_size_limit(tmp_path: Path) -> None:
    (tmp_path / "d.csv").write_text("x\n" + "1\n" * 100)
    with pytest.raises(DataError, match="over the limit"):
        load_table("d.csv", tmp_path, HERE, max_bytes=50)


def test_row_ids_default_to_one_based_row_numbers(frame: pd.DataFrame) -> None:
    assert row_ids(frame, None, HERE) == ["1", "2", "3"]
    assert row_ids(frame, "id", HERE) == ["a", "b", "c"]


def test_row_ids_reject_duplicates_and_unknown_columns(frame: pd.DataFrame) -> None:
    dup = frame.assign(id=["a", "a", "c"])
    with pytest.raises(DataError, match="repeats ids: a"):
        row_ids(dup, "id", HERE)
    with pytest.raises(DataError, match="Did you mean 'id'"):
        row_ids(frame, "idd", HERE)
