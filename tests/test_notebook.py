"""Notebooks: finding blocks in cells, ``premises notebook``, and the live filter route.

Fixtures in tests/data/notebooks: ``blocks.ipynb`` (front matter in a raw cell, a
fence in a markdown cell, a fence shown as an example inside a longer fence, a
raw cell tagged ``premises``, an untagged raw cell), ``v4_2_no_ids.ipynb`` (an
older minor without cell ids, with a bad block) and ``trial.csv`` (invented
data: 40 rows, y = 3 + 0.8 x + N(0, 1) noise, numpy seed 7, four sites).
"""

from __future__ import annotations

import base64
import json
import shutil
import subprocess
import sys
from pathlib import Path

import nbformat
import pytest

from premises.documents.notebook import (
    GENERATED_KEY,
    attach_figures,
    find_notebook_blocks,
    front_matter,
    is_generated,
    read_notebook,
    remove_generated,
    source_hash,
    split_cells,
)
from premises.errors import SpecError
from premises.notebooks import check_notebook, render_notebook
from premises.pipeline import RenderOptions

DATA = Path(__file__).resolve().parent / "data" / "notebooks"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _read(path: Path) -> nbformat.NotebookNode:
    return read_notebook(path.read_text(encoding="utf-8"), path.name)


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    for name in ("blocks.ipynb", "v4_2_no_ids.ipynb", "trial.csv"):
        shutil.copy2(DATA / name, tmp_path / name)
    return tmp_path


# --- finding blocks ----------------------------------------------------------------------------


def test_blocks_in_markdown_cells_and_tagged_raw_cells(folder: Path) -> None:
    node = _read(folder / "blocks.ipynb")
    blocks = find_notebook_blocks(node, "blocks.ipynb")
    assert [(b.cell, b.whole_cell) for b in blocks] == [(1, False), (4, True)]
    fenced, whole = blocks
    assert fenced.raw.line == 5  # the fence's line within its cell
    assert fenced.raw.body.startswith("id: nb-first\n")
    assert whole.raw.line == 0 and whole.raw.body.startswith("id: nb-second\n")
    # Quarto shows a tagged raw cell as text, so the filter route does not take it
    assert [b.cell for b in find_notebook_blocks(node, "blocks.ipynb", tagged_cells=False)] == [1]


def test_front_matter_comes_from_the_first_raw_cell(folder: Path) -> None:
    node = _read(folder / "blocks.ipynb")
    assert front_matter(node).startswith("---\ntitle: Notebook fixture\n")
    node.cells.insert(0, nbformat.v4.new_markdown_cell("# no front matter first"))
    assert front_matter(node) == ""


def test_older_minor_gets_stable_ids(folder: Path) -> None:
    first = _read(folder / "v4_2_no_ids.ipynb")
    second = _read(folder / "v4_2_no_ids.ipynb")
    assert first.nbformat_minor == 5
    assert [c.id for c in first.cells] == [c.id for c in second.cells] == ["cell-1", "cell-2"]
    nbformat.validate(first)


def test_unreadable_notebooks_are_user_errors(tmp_path: Path) -> None:
    with pytest.raises(SpecError, match="not valid JSON"):
        read_notebook("{not json", "broken.ipynb")
    with pytest.raises(SpecError, match="not a Jupyter notebook"):
        read_notebook("[1, 2]", "list.ipynb")


def test_split_cells_keeps_callouts_and_code_whole() -> None:
    section = (
        "<!-- begin -->\n## Title\n\nText.\n\n### Ledger\n\n| a |\n|---|\n\n"
        "::: {.callout-note}\n## Inside a callout\nKept.\n:::\n\n```text\n# not a heading\n```\n\n### Last\nEnd.\n"
    )
    pieces = split_cells(section)
    assert pieces[0].startswith("<!-- begin -->\n## Title")
    assert pieces[1].startswith("### Ledger") and "## Inside a callout" in pieces[1] and "# not a heading" in pieces[1]
    assert pieces[2] == "### Last\nEnd."
    assert "\n\n".join(pieces).replace("\n", "") == section.replace("\n", "")  # nothing lost


def test_attach_figures_rewrites_links_and_embeds_bytes(tmp_path: Path) -> None:
    png = tmp_path / "fig-a.png"
    png.write_bytes(PNG_SIGNATURE + b"rest")
    text, attachments = attach_figures("![A](figs/fig-a.png){#fig-a}\n\n<img src=\"figs/fig-a.png\">\n", {"figs/fig-a.png": png, "figs/unused.png": png})
    assert text == "![A](attachment:fig-a.png){#fig-a}\n\n<img src=\"attachment:fig-a.png\">\n"
    assert list(attachments) == ["fig-a.png"]
    assert base64.b64decode(attachments["fig-a.png"]["image/png"]) == png.read_bytes()
    pdf = tmp_path / "fig-b.pdf"
    pdf.write_bytes(b"%PDF")
    with pytest.raises(SpecError, match="format: png"):
        attach_figures("![B](figs/fig-b.pdf)", {"figs/fig-b.pdf": pdf})


def test_source_hash_ignores_line_ending_style() -> None:
    assert source_hash("id: a\r\nmodel: y ~ x\r\n") == source_hash("id: a\nmodel: y ~ x\n")
    assert source_hash("id: a\n") != source_hash("id: b\n")


# --- premises notebook ---------------------------------------------------------------------


@pytest.fixture(scope="module")
def rendered(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Path]:
    """blocks.ipynb rendered once, then its output rendered again."""
    folder = tmp_path_factory.mktemp("nb")
    for name in ("blocks.ipynb", "trial.csv"):
        shutil.copy2(DATA / name, folder / name)
    first = render_notebook(folder / "blocks.ipynb", folder / "out.ipynb", RenderOptions(flavor="gfm")).output
    second = render_notebook(first, folder / "again.ipynb", RenderOptions(flavor="gfm")).output
    return folder, first, second


def test_output_is_valid_and_keeps_every_source_cell(rendered: tuple[Path, Path, Path]) -> None:
    folder, first, _ = rendered
    out = nbformat.read(first, as_version=4)
    nbformat.validate(out)
    source = _read(folder / "blocks.ipynb")
    kept = [cell for cell in out.cells if not is_generated(cell)]
    assert [c.id for c in kept] == [c.id for c in source.cells]
    assert [c.source for c in kept] == [c.source for c in source.cells]


def test_generated_cells_follow_their_block_and_are_marked(rendered: tuple[Path, Path, Path]) -> None:
    _, first, _ = rendered
    out = nbformat.read(first, as_version=4)
    kinds = ["gen" if is_generated(c) else c.id for c in out.cells]
    first_block = kinds.index("fixture-2")
    second_block = kinds.index("fixture-5")
    assert kinds[first_block + 1] == "gen" and kinds[second_block + 1] == "gen"
    assert kinds[kinds.index("fixture-3") - 1] == "gen"  # the section sits between its block and the next cell
    blocks = {c.metadata[GENERATED_KEY]["block"] for c in out.cells if is_generated(c)}
    assert blocks == {"nb-first", "nb-second"}
    for cell in out.cells:
        if is_generated(cell):
            marker = cell.metadata[GENERATED_KEY]
            assert cell.cell_type == "markdown" and marker["generated"] is True
            expected = "id: nb-first" if marker["block"] == "nb-first" else "id: nb-second"
            body = next(c.source for c in out.cells if not is_generated(c) and expected in c.source)
            if marker["block"] == "nb-first":
                body = body[body.index("id: nb-first") : body.index("```\n\nText after")]
            assert marker["source_hash"] == source_hash(body)
    assert "not-a-block" not in json.dumps([c.metadata for c in out.cells])


def test_figures_are_attachments_that_jupyter_can_show(rendered: tuple[Path, Path, Path]) -> None:
    folder, first, _ = rendered
    out = nbformat.read(first, as_version=4)
    attached = {name: bundle for c in out.cells if is_generated(c) for name, bundle in c.get("attachments", {}).items()}
    assert attached, "the full section of nb-first has figures"
    for name, bundle in attached.items():
        assert base64.b64decode(bundle["image/png"]).startswith(PNG_SIGNATURE), name
    text = "\n".join(c.source for c in out.cells if is_generated(c))
    for name in attached:
        assert f"(attachment:{name})" in text
    assert "-figures/" not in text  # no link points at a file on disk
    assert not list(folder.glob("*-figures"))  # and no figure folder was left beside the notebook


def test_render_again_replaces_instead_of_adding(rendered: tuple[Path, Path, Path]) -> None:
    _, first, second = rendered
    one = nbformat.read(first, as_version=4)
    two = nbformat.read(second, as_version=4)
    assert [c.id for c in two.cells] == [c.id for c in one.cells]
    assert len({c.id for c in two.cells}) == len(two.cells)
    assert [c.source for c in two.cells] == [c.source for c in one.cells]
    assert first.read_bytes() == second.read_bytes()  # same inputs, same bytes


def test_pandoc_reads_the_attachments(rendered: tuple[Path, Path, Path], tmp_path: Path) -> None:
    pypandoc = pytest.importorskip("pypandoc")
    _, first, _ = rendered
    media = tmp_path / "media"
    done = subprocess.run(
        [str(pypandoc.get_pandoc_path()), "-f", "ipynb", "-t", "markdown", f"--extract-media={media}", str(first)],
        capture_output=True, check=False, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    out = nbformat.read(first, as_version=4)
    names = {name for c in out.cells for name in c.get("attachments", {})}
    extracted = [path for path in media.rglob("*.png")]
    assert names
    for name in names:
        # pandoc names an extracted attachment after its cell and its own name
        found = [path for path in extracted if path.name.endswith(name)]
        assert len(found) == 1, name
        assert found[0].read_bytes().startswith(PNG_SIGNATURE)
        assert found[0].name in done.stdout


def test_source_notebook_is_never_overwritten(folder: Path) -> None:
    before = (folder / "blocks.ipynb").read_bytes()
    with pytest.raises(SpecError, match="source notebook"):
        render_notebook(folder / "blocks.ipynb", folder / "blocks.ipynb")
    assert (folder / "blocks.ipynb").read_bytes() == before


def test_bad_block_names_notebook_cell_and_line(folder: Path) -> None:
    with pytest.raises(SpecError) as caught:
        render_notebook(folder / "v4_2_no_ids.ipynb", folder / "out.ipynb")
    # cell 1, line 7 of that cell holds `se: hc4`
    assert caught.value.message.startswith("v4_2_no_ids.ipynb [cell 1]:7: block 'old-one', key 'se'") or (
        f"{folder / 'v4_2_no_ids.ipynb'} [cell 1]:7: block 'old-one', key 'se'" in caught.value.message
    )
    assert not (folder / "out.ipynb").exists()


def test_errors_in_a_tagged_raw_cell_count_lines_from_one(folder: Path) -> None:
    node = _read(folder / "blocks.ipynb")
    node.cells[4].source = "id: nb-second\ndata: trial.csv\nmodel: y ~ x\nse: hc4\n"
    path = folder / "edited.ipynb"
    path.write_text(nbformat.writes(node), encoding="utf-8")
    with pytest.raises(SpecError, match=r"edited\.ipynb \[cell 5\]:4: block 'nb-second', key 'se'"):
        check_notebook(path, tagged_cells=True)


def test_check_notebook_validates_fences_only_by_default(folder: Path) -> None:
    assert check_notebook(folder / "blocks.ipynb") == 1
    assert check_notebook(folder / "blocks.ipynb", tagged_cells=True) == 2


def test_notebook_command(folder: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "premises", "notebook", "blocks.ipynb", "--flavor", "quarto"],
        cwd=folder, capture_output=True, check=False, text=True, timeout=600,
    )
    assert done.returncode == 0, done.stderr
    out = folder / "blocks.premises.ipynb"
    assert f"wrote {out.name}" in done.stdout or f"wrote {out}" in done.stdout
    node = nbformat.read(out, as_version=4)
    text = "\n".join(c.source for c in node.cells if is_generated(c))
    assert "{#fig-nb-first-" in text  # the quarto flavor keeps cross-reference ids
    bad = subprocess.run([sys.executable, "-m", "premises", "notebook", "v4_2_no_ids.ipynb", "-o", "x.ipynb"], cwd=folder, capture_output=True, check=False, text=True, timeout=600)
    assert bad.returncode == 2 and "[cell 1]:7" in bad.stderr


def test_remove_generated_drops_only_marked_cells(rendered: tuple[Path, Path, Path]) -> None:
    folder, first, _ = rendered
    cleaned = remove_generated(_read(first))
    assert [c.id for c in cleaned.cells] == [c.id for c in _read(folder / "blocks.ipynb").cells]


# --- the live route: the Lua filter on a notebook -------------------------------------------------


@pytest.mark.pandoc
def test_lua_filter_renders_a_notebook_read_by_pandoc(folder: Path) -> None:
    pypandoc = pytest.importorskip("pypandoc")
    from premises.quarto import lua_filter_path

    env = {"PATH": "/usr/bin:/bin", "PREMISES_PYTHON": sys.executable}
    done = subprocess.run(
        [str(pypandoc.get_pandoc_path()), "blocks.ipynb", "-f", "ipynb", "--lua-filter", str(lua_filter_path()), "-t", "html", "--wrap=none"],
        cwd=folder, env=env, capture_output=True, check=False, text=True, timeout=600,
    )
    assert done.returncode == 0, done.stderr
    assert "id: nb-first" not in done.stdout  # the block was replaced
    assert "Text after the block." in done.stdout
    assert "fig-nb-first-" in done.stdout and "nb-second" not in done.stdout  # a tagged raw cell is not a block here
    assert list((folder / "blocks-figures").glob("fig-nb-first-*.png"))
