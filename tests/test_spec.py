"""The block parser: located errors from a fixture file, every key, defaults, schema."""

from __future__ import annotations

import json
import math
import re
import textwrap
from dataclasses import fields
from importlib import resources
from pathlib import Path
from typing import Any

import pytest
import yaml

from premises.config import document_defaults, merge_settings, read_project_settings
from premises.errors import SpecError
from premises.spec import (
    ASSUMPTIONS,
    KEYS,
    BlockSpec,
    ExclusionSpec,
    FigureOptions,
    Thresholds,
    TransformSpec,
    block_schema,
    block_schema_text,
    canonical_spec,
    check_unique_ids,
    evaluate_threshold,
    parse_block,
)

DATA = Path(__file__).parent / "data"
CASES = yaml.safe_load((DATA / "spec_cases.yaml").read_text(encoding="utf-8"))
FENCE_LINE = 10  # the fixture file's convention: the opening fence sits on line 10

FULL_BLOCK = textwrap.dedent(
    """\
    id: yield-main
    title: Yield and irrigation
    data: data/plots.csv
    model: yield ~ log2(water) + ph + C(district)
    id_column: plot
    transforms:
      - column: income
        op: winsorize
        limits: [0.01, 0.99]
        reason: a few recording errors
        as: income_w
        prespecified: true
        registration: osf.io/abcde
      - column: water
        op: log2
    exclude:
      - when: ph < 3
        reason: meter fault
        expect: 2
        pin: true
        prespecified: false
        registration: osf.io/abcde
        category: data-error
      - ids: [p17, 42]
        reason: flooded plots
    missing: error
    groups: district
    order: day
    weights: area
    checks: [influence, linearity]
    thresholds:
      cooks: F-median
      leverage: 3*p/n
      dffits: 1
      dfbetas: 0.5
      vif: 5
      condition: 50
      alpha: 0.01
    se: cluster
    figures:
      format: svg
      dpi: 300
      width: 7.5
    detail: brief
    alternatives: [boxcox, rank]
    guidelines: [strobe, jars]
    templates: my-templates
    seed: 7
    """
)
MINIMAL = "id: a\ndata: d.csv\nmodel: y ~ x\n"


def _parse(body: str, **kwargs: Any) -> BlockSpec:
    return parse_block(body, file="report.qmd", line=FENCE_LINE, **kwargs)


# --- the fixture file of malformed blocks ------------------------------------------------


def test_fixture_file_holds_enough_cases() -> None:
    assert len(CASES) >= 25
    assert len({case["title"] for case in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=[case["title"] for case in CASES])
def test_malformed_block_is_reported_where_it_is(case: dict[str, Any]) -> None:
    with pytest.raises(SpecError, match=re.escape(case["message"])) as caught:
        _parse(case["block"], defaults=case.get("defaults"), attrs=case.get("attrs"))
    error = caught.value
    assert error.location.line == case["line"]
    assert error.location.file == "report.qmd"
    if "key" in case:
        assert error.location.key == case["key"]
    assert error.hint, "every message carries a hint on how to fix it"
    assert "Traceback" not in str(error)


def test_message_names_file_line_and_block() -> None:
    with pytest.raises(SpecError) as caught:
        _parse(MINIMAL + "se: hc4\n")
    assert str(caught.value).startswith("report.qmd:14: block 'a', key 'se': The 'se' key")


def test_yaml_errors_keep_their_cause() -> None:
    with pytest.raises(SpecError) as caught:
        _parse("id: [a\n")
    assert isinstance(caught.value.__cause__, yaml.YAMLError)


# --- every key, read correctly ------------------------------------------------------------


def test_full_block_sets_every_key() -> None:
    spec = _parse(FULL_BLOCK)
    assert (spec.id, spec.data, spec.title) == (
        "yield-main",
        "data/plots.csv",
        "Yield and irrigation",
    )
    assert spec.model == "yield ~ log2(water) + ph + C(district)"
    assert spec.id_column == "plot"
    assert spec.transforms == (
        TransformSpec(
            "income",
            "winsorize",
            "a few recording errors",
            "income_w",
            (0.01, 0.99),
            True,
            "osf.io/abcde",
            "transforms[0]",
        ),
        TransformSpec("water", "log2", key="transforms[1]"),
    )
    assert spec.transforms[0].target == "income_w"
    assert spec.exclude == (
        ExclusionSpec(
            "meter fault",
            "ph < 3",
            None,
            2,
            True,
            False,
            "osf.io/abcde",
            "data-error",
            "exclude[0]",
        ),
        ExclusionSpec("flooded plots", ids=("p17", "42"), key="exclude[1]"),
    )
    assert spec.exclude[1].rule_text == "id in [p17, 42]"
    assert (spec.missing, spec.groups, spec.order, spec.weights) == (
        "error",
        "district",
        "day",
        "area",
    )
    assert spec.checks == ("linearity", "influence")  # canonical order, not the written one
    assert spec.thresholds == Thresholds("F-median", "3*p/n", "1", "0.5", 5.0, 50.0, 0.01)
    assert spec.se == "cluster"
    assert spec.figures == FigureOptions("svg", 300, 7.5)
    assert spec.detail == "brief"
    assert spec.alternatives == ("rank", "boxcox")
    assert spec.guidelines == ("jars", "strobe")
    assert (spec.templates, spec.seed) == ("my-templates", 7)


def test_full_block_mentions_every_declared_key() -> None:
    written = yaml.safe_load(FULL_BLOCK)
    assert set(written) == set(KEYS)
    assert set(written["thresholds"]) == set(KEYS["thresholds"].table)
    assert set(written["figures"]) == set(KEYS["figures"].table)
    assert set(written["transforms"][0]) == set(KEYS["transforms"].table)
    assert set(written["exclude"][0]) | {"ids"} == set(KEYS["exclude"].table)


def test_declared_keys_match_the_dataclasses() -> None:
    spec_fields = {f.name for f in fields(BlockSpec)} - {"source"}
    assert spec_fields == set(KEYS)
    assert {f.name for f in fields(Thresholds)} == set(KEYS["thresholds"].table)
    assert {f.name for f in fields(FigureOptions)} == set(KEYS["figures"].table)
    transform = {f.name for f in fields(TransformSpec)} - {"key", "as_"} | {"as"}
    assert transform == set(KEYS["transforms"].table)
    assert {f.name for f in fields(ExclusionSpec)} - {"key"} == set(KEYS["exclude"].table)


def test_minimal_block_takes_the_dataclass_defaults() -> None:
    spec = _parse(MINIMAL)
    default = BlockSpec("a", "d.csv", "y ~ x", source=spec.source)
    assert spec == default
    assert spec.checks == ASSUMPTIONS


def test_key_lines_point_at_document_lines() -> None:
    spec = _parse(FULL_BLOCK)
    body_lines = FULL_BLOCK.splitlines()

    def document_line(text: str) -> int:
        return FENCE_LINE + 1 + next(i for i, line in enumerate(body_lines) if text in line)

    lines = dict(spec.source.key_lines)
    assert lines["id"] == FENCE_LINE + 1
    assert lines["thresholds.alpha"] == document_line("alpha: 0.01")
    assert lines["exclude[1]"] == document_line("- ids: [p17, 42]")
    assert lines["exclude[1].reason"] == document_line("reason: flooded plots")
    assert spec.source.line_of("exclude[0].when") == document_line("when: ph < 3")
    assert spec.locate("transforms[1].op").line == document_line("op: log2")
    # A key the block did not write falls back to its nearest parent, then the fence.
    assert spec.source.line_of("figures.missing") == document_line("figures:")
    assert spec.source.line_of("nowhere") == FENCE_LINE


def test_crlf_body_reads_like_lf() -> None:
    lf = _parse(FULL_BLOCK)
    crlf = _parse(FULL_BLOCK.replace("\n", "\r\n"))
    assert canonical_spec(crlf) == canonical_spec(lf)
    assert crlf.source.key_lines == lf.source.key_lines


def test_integer_row_ids_become_text() -> None:
    spec = _parse(MINIMAL + "exclude:\n  - ids: [3, 10]\n    reason: typos\n")
    assert spec.exclude[0].ids == ("3", "10")


# --- defaults, fence attributes, command line --------------------------------------------


def test_block_overrides_defaults_and_thresholds_merge_per_key() -> None:
    defaults = {
        "se": "hc3",
        "thresholds": {"cooks": "1", "vif": 4},
        "figures": {"dpi": 72},
        "detail": "brief",
    }
    spec = _parse(MINIMAL + "se: classical\nthresholds:\n  vif: 8\n", defaults=defaults)
    assert spec.se == "classical"
    assert spec.detail == "brief"
    assert spec.thresholds.cooks == "1"
    assert spec.thresholds.vif == 8.0
    assert spec.figures.dpi == 72


def test_defaults_may_supply_data_and_model() -> None:
    spec = _parse("id: b\n", defaults={"data": "shared.csv", "model": "y ~ x"})
    assert (spec.data, spec.model) == ("shared.csv", "y ~ x")


def test_command_line_overrides_the_block() -> None:
    spec = _parse(MINIMAL + "se: classical\n", overrides={"se": "hc3"})
    assert spec.se == "hc3"
    with pytest.raises(SpecError, match="comes from the command line"):
        _parse(MINIMAL, overrides={"seed": -1})


def test_fence_attributes_supply_id_and_scalars() -> None:
    spec = _parse(
        "data: d.csv\nmodel: y ~ x\n",
        attrs={"id": "from-fence", "seed": "12", "title": "A title: with colon"},
    )
    assert spec.id == "from-fence"
    assert spec.seed == 12
    assert spec.title == "A title: with colon"
    same = _parse(MINIMAL, attrs={"id": "a"})
    assert same.id == "a"
    as_pairs = _parse("data: d.csv\nmodel: y ~ x\n", attrs=(("id", "p"), ("seed", "5")))
    assert (as_pairs.id, as_pairs.seed) == ("p", 5)


def test_fence_attributes_cannot_hold_lists() -> None:
    with pytest.raises(SpecError, match="cannot be set in the fence attributes"):
        _parse(MINIMAL, attrs={"checks": "linearity"})


def test_unique_ids_are_enforced() -> None:
    first = _parse(MINIMAL)
    second = parse_block(MINIMAL, file="report.qmd", line=40)
    check_unique_ids([first, _parse(MINIMAL.replace("id: a", "id: b"))])
    with pytest.raises(SpecError, match=r"Two blocks use the id 'a' \(the first on line 10\)"):
        check_unique_ids([first, second])


# --- canonical text -----------------------------------------------------------------------


def test_canonical_spec_ignores_order_comments_and_position() -> None:
    shuffled = "model: y ~ x   # the outcome\n\n# data next\ndata: d.csv\nid: a\n"
    elsewhere = parse_block(shuffled, file="other.qmd", line=200)
    assert canonical_spec(elsewhere) == canonical_spec(_parse(MINIMAL))


def test_canonical_spec_changes_with_meaning() -> None:
    base = canonical_spec(_parse(MINIMAL))
    assert canonical_spec(_parse(MINIMAL + "se: hc3\n")) != base
    assert canonical_spec(_parse(MINIMAL + "thresholds: {alpha: 0.01}\n")) != base


def test_canonical_spec_is_sorted_json_without_lines() -> None:
    text = canonical_spec(_parse(FULL_BLOCK))
    value = json.loads(text)
    assert text == json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert "source" not in value and "key_lines" not in text
    assert value["transforms"][0]["as"] == "income_w"


# --- threshold expressions ----------------------------------------------------------------


@pytest.mark.parametrize(
    ("expr", "n", "p", "expected"),
    [
        ("4/n", 50, 3, 4 / 50),  # Bollen & Jackman (1990) form, computed by hand
        ("2p/n", 50, 5, 2 * 5 / 50),  # Hoaglin & Welsch (1978)
        ("3*p/n", 60, 4, 3 * 4 / 60),
        ("2*sqrt(p/n)", 100, 4, 2 * math.sqrt(4 / 100)),  # Belsley, Kuh & Welsch (1980)
        ("2/sqrt(n)", 64, 3, 0.25),
        ("1", 10, 2, 1.0),
        ("4/(n-p-1)", 30, 4, 4 / 25),
        ("1/2p", 10, 2, 1 / (2 * 2)),  # implicit multiplication binds tighter than /
        ("2(p+1)/n", 20, 3, 2 * 4 / 20),
        ("p**2/n", 50, 3, 9 / 50),
        ("2**-1", 5, 2, 0.5),
        ("-(-4)/n", 8, 2, 0.5),
        ("1e-1 * n", 10, 2, 1.0),
    ],
)
def test_threshold_expressions_evaluate(expr: str, n: int, p: int, expected: float) -> None:
    assert evaluate_threshold(expr, n, p) == pytest.approx(expected, rel=1e-12)


def test_f_median_is_the_median_of_f() -> None:
    from scipy import stats

    # Cook (1977): compare D with the 50th percentile of F(p, n - p); scipy as reference.
    for n, p in [(20, 3), (100, 5), (1000, 10)]:
        expected = stats.f(p, n - p).median()
        assert evaluate_threshold("F-median", n, p) == pytest.approx(expected, rel=1e-10)


@pytest.mark.parametrize(
    ("expr", "n", "p", "phrase"),
    [
        ("F-median", 3, 3, "more rows than parameters"),
        ("4/(n-p-1)", 4, 3, "divides by zero"),
        ("sqrt(p-n)", 10, 2, "sqrt of a negative number"),
        ("10**10**10", 10, 2, "overflows"),
        ("p-n", 10, 2, "a cut-off must be a positive finite number"),
        ("n p", 10, 2, "Unexpected 'p'"),
        ("", 10, 2, "The expression is empty"),
        ("os.system", 10, 2, "Unknown name 'os'"),
    ],
)
def test_bad_threshold_evaluation_raises(expr: str, n: int, p: int, phrase: str) -> None:
    with pytest.raises(SpecError, match=re.escape(phrase)):
        evaluate_threshold(expr, n, p)


def test_default_thresholds_are_valid_expressions() -> None:
    defaults = Thresholds()
    for name in ("cooks", "leverage", "dffits", "dfbetas"):
        assert evaluate_threshold(getattr(defaults, name), 100, 4) > 0


# --- JSON Schema --------------------------------------------------------------------------


def test_shipped_schema_equals_the_generated_one() -> None:
    shipped = resources.files("premises").joinpath("schema/block.schema.json")
    assert shipped.read_text(encoding="utf-8") == block_schema_text(), (
        'Regenerate with: PYTHONPATH=src python -c "from premises.spec import '
        "block_schema_text as t; open('src/premises/schema/block.schema.json', 'w')"
        '.write(t())"'
    )


def test_schema_is_valid_and_agrees_with_the_parser() -> None:
    jsonschema = pytest.importorskip("jsonschema")
    schema = block_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    assert list(validator.iter_errors(yaml.safe_load(FULL_BLOCK))) == []
    assert list(validator.iter_errors(yaml.safe_load(MINIMAL))) == []
    rejected = [
        MINIMAL + "se: hc4\n",
        MINIMAL + "tresholds: {}\n",
        "id: a\ndata: d.csv\n",
        MINIMAL.replace("id: a", "id: Main_1"),
        MINIMAL + "se: cluster\n",
        MINIMAL + "exclude:\n  - when: x > 1\n",
        MINIMAL + "exclude:\n  - when: x > 1\n    ids: [1]\n    reason: r\n",
        MINIMAL + "transforms:\n  - {column: x, op: winsorize}\n",
        MINIMAL + "transforms:\n  - {column: x, op: log, limits: [0.1, 0.9]}\n",
        MINIMAL + "thresholds: {cooks: 4/m}\n",
        MINIMAL + "thresholds: {alpha: 1}\n",
        MINIMAL + "figures: {dpi: 1000}\n",
    ]
    for body in rejected:
        assert list(validator.iter_errors(yaml.safe_load(body))), body
        with pytest.raises(SpecError):
            _parse(body)


def test_schema_describes_every_key() -> None:
    properties = block_schema()["properties"]
    assert set(properties) == set(KEYS)
    assert all(value["description"] for value in properties.values())
    assert properties["se"]["enum"] == ["classical", "hc3", "cluster", "auto"]


# --- settings layers (config.py) ----------------------------------------------------------


def test_merge_settings_order_and_nested_keys() -> None:
    builtin = {"se": "auto", "thresholds": {"alpha": 0.05, "vif": 10}, "figures": {"dpi": 150}}
    project = {"se": "hc3", "thresholds": {"vif": 5}}
    front = {"figures": {"format": "svg"}, "checks": ["linearity"]}
    block = {"checks": ["normality"], "thresholds": {"alpha": 0.01}}
    command_line = {"se": "classical"}
    merged = merge_settings(builtin, project, front, None, block, command_line)
    assert merged == {
        "se": "classical",
        "thresholds": {"alpha": 0.01, "vif": 5},
        "figures": {"dpi": 150, "format": "svg"},
        "checks": ["normality"],
    }
    assert builtin["thresholds"] == {"alpha": 0.05, "vif": 10}  # inputs untouched


def test_document_defaults_reads_the_premises_key() -> None:
    assert document_defaults({"title": "x", "premises": {"se": "hc3"}}) == {"se": "hc3"}
    assert document_defaults({"title": "x"}) == {}
    with pytest.raises(SpecError, match="must be a mapping"):
        document_defaults({"premises": "hc3"}, file="r.qmd")


def test_project_settings_from_nearest_pyproject(tmp_path: Path) -> None:
    (tmp_path / "pyproject.toml").write_text(
        '[project]\nname = "x"\n\n[tool.premises]\nse = "hc3"\n\n'
        "[tool.premises.thresholds]\nvif = 5\n",
        encoding="utf-8",
    )
    nested = tmp_path / "chapters" / "two"
    nested.mkdir(parents=True)
    assert read_project_settings(nested) == {"se": "hc3", "thresholds": {"vif": 5}}


def test_project_settings_prefer_the_nearer_quarto_file(tmp_path: Path) -> None:
    (tmp_path / "pyproject.toml").write_text("[tool.premises]\nse = 'hc3'\n", encoding="utf-8")
    book = tmp_path / "book"
    book.mkdir()
    (book / "_quarto.yml").write_text(
        "project:\n  type: book\npremises:\n  detail: brief\n", encoding="utf-8"
    )
    assert read_project_settings(book) == {"detail": "brief"}
    assert read_project_settings(tmp_path) == {"se": "hc3"}


def test_project_files_without_premises_settings_are_skipped(tmp_path: Path) -> None:
    (tmp_path / "pyproject.toml").write_text("[tool.premises]\nseed = 3\n", encoding="utf-8")
    inner = tmp_path / "inner"
    inner.mkdir()
    (inner / "pyproject.toml").write_text("[project]\nname = 'y'\n", encoding="utf-8")
    (inner / "_quarto.yml").write_text("project:\n  type: website\n", encoding="utf-8")
    assert read_project_settings(inner) == {"seed": 3}


def test_malformed_project_files_are_located(tmp_path: Path) -> None:
    (tmp_path / "pyproject.toml").write_text("[tool.premises]\nse = \n", encoding="utf-8")
    with pytest.raises(SpecError, match="not valid TOML") as caught:
        read_project_settings(tmp_path)
    assert caught.value.location.file == str(tmp_path / "pyproject.toml")
    assert caught.value.location.line == 2
    quarto = tmp_path / "q"
    quarto.mkdir()
    (quarto / "_quarto.yml").write_text("premises:\n  se: [hc3\n", encoding="utf-8")
    with pytest.raises(SpecError, match="not valid YAML"):
        read_project_settings(quarto)
    listed = tmp_path / "l"
    listed.mkdir()
    (listed / "_quarto.yml").write_text("premises:\n  - se\n", encoding="utf-8")
    with pytest.raises(SpecError, match="must be a mapping"):
        read_project_settings(listed)


# --- scanner and parser together ----------------------------------------------------------


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_key_lines_are_document_lines_end_to_end(newline: str) -> None:
    from premises.documents.markdown import find_blocks, read_front_matter

    document = newline.join(
        [
            "---",
            "title: Report",
            "premises:",
            "  se: hc3",
            "  thresholds: {alpha: 0.01}",
            "---",
            "",
            "```{.premises #first}",
            "data: d.csv",
            "model: y ~ x",
            "```",
            "",
            "  ~~~~premises",
            "  id: second",
            "  data: d.csv",
            "  model: y ~ x + z",
            "  thresholds:",
            "    vif: 4",
            "  ~~~~",
            "",
        ]
    )
    front, _ = read_front_matter(document, "doc.qmd")
    defaults = document_defaults(front, "doc.qmd")
    specs = [
        parse_block(b.body, file="doc.qmd", line=b.line, defaults=defaults, attrs=b.attrs)
        for b in find_blocks(document, "doc.qmd")
    ]
    check_unique_ids(specs)
    lines = document.split(newline)
    first, second = specs
    assert first.id == "first" and first.se == "hc3" and first.thresholds.alpha == 0.01
    assert lines[first.source.line_of("model") - 1] == "model: y ~ x"
    assert second.thresholds.vif == 4.0 and second.thresholds.alpha == 0.01
    assert lines[second.source.line_of("thresholds.vif") - 1] == "    vif: 4"
    assert lines[second.source.line_of("id") - 1] == "  id: second"
