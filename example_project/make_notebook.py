"""Write ``analysis.ipynb``: the basil trial analysed from a notebook.

The notebook holds two premises blocks over ``data/basil_trial.csv``:

* a ```` ```premises ```` fence in a markdown cell (read by ``premises notebook``
  and, when Quarto renders the notebook with the extension enabled, by the Lua
  filter);
* a raw cell tagged ``premises`` whose whole source is a block's YAML (read by
  ``premises notebook`` only).

Run ``python make_notebook.py``; the cell ids are fixed, so the file is the same
every time. Then ``premises notebook analysis.ipynb`` writes
``analysis.premises.ipynb`` with each block followed by its section.
"""

from __future__ import annotations

from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook, new_raw_cell

HERE = Path(__file__).resolve().parent

FRONT_MATTER = """\
---
title: "Basil trial: the light model from a notebook"
premises:
  figures:
    format: png
    dpi: 110
---
"""

INTRO = """\
## The light-and-nutrient model

The block below is the same model as in `report.qmd`. Run
`premises notebook analysis.ipynb` and a section with the assumption checks
appears after this cell; run it again and that section is replaced, not repeated.

```premises
id: basil-nb
title: Assumption checks for the light-and-nutrient model
data: data/basil_trial.csv
model: mass_g ~ log2(light_dli) + ec_ms
id_column: plant_id
groups: bench
exclude:
  - when: light_dli > 100
    reason: "data-entry error: above the lamps' maximum output of 60 mol/m²/day"
    expect: 1
    category: data-error
    prespecified: true
  - ids: [P118]
    reason: "data-entry error: the harvest notebook records 192.1 g"
    category: data-error
    prespecified: false
se: auto
```
"""

CODE = """\
import pandas as pd

trial = pd.read_csv("data/basil_trial.csv")
trial.describe()
"""

SECOND_INTRO = """\
## A simpler model for comparison

The raw cell below is tagged `premises`: its whole text is a block. Jupyter
shows it as plain text, and only `premises notebook` reads it.
"""

SECOND_BLOCK = """\
id: basil-linear
title: Checks for a model with light on its original scale
data: data/basil_trial.csv
model: mass_g ~ light_dli + ec_ms
id_column: plant_id
exclude:
  - when: light_dli > 100
    reason: "data-entry error: above the lamps' maximum output"
    expect: 1
    category: data-error
    prespecified: true
detail: brief
"""


def build() -> nbformat.NotebookNode:
    """Return the example notebook (nbformat 4.5, fixed cell ids)."""
    front = new_raw_cell(FRONT_MATTER)
    intro = new_markdown_cell(INTRO)
    code = new_code_cell(CODE)
    second_intro = new_markdown_cell(SECOND_INTRO)
    second = new_raw_cell(SECOND_BLOCK, metadata={"tags": ["premises"]})
    cells = [front, intro, code, second_intro, second]
    for number, cell in enumerate(cells, start=1):
        cell["id"] = f"analysis-{number}"
    notebook = new_notebook(cells=cells)
    notebook.metadata["kernelspec"] = {"display_name": "Python 3", "language": "python", "name": "python3"}
    notebook.metadata["language_info"] = {"name": "python"}
    return notebook


def main() -> None:
    """Write analysis.ipynb beside this script."""
    notebook = build()
    nbformat.validate(notebook)
    (HERE / "analysis.ipynb").write_text(nbformat.writes(notebook) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
