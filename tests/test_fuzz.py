"""Arbitrary input gets a value or the tool's own error, never another exception.

Each property runs 2000 generated inputs through one entry point that reads
text from a document: the fence scanner, the block parser, whole documents
through ``pipeline.parse_document``, the rule language, formulas (checked and
evaluated on a small frame) and data files read by ``data.load_table``. The
only exception allowed out is :class:`premises.errors.PremisesError`; a
``ValueError``, ``KeyError``, ``RecursionError`` or a third-party error is a
bug that would reach the user as "internal error".

Rules and formulas are also run with ``eval``, ``exec`` and ``compile`` made to
fail for anything but patsy's own evaluation of an already checked term, so a
rule that reached Python would be noticed.
"""

from __future__ import annotations

import builtins
import string
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from premises.data import load_table
from premises.documents.markdown import find_blocks, splice
from premises.errors import Location, PremisesError, SpecError
from premises.formula import build_design, check_formula
from premises.pipeline import parse_document
from premises.rules import evaluate_rule, parse_rule
from premises.spec import KEYS, BlockSpec, parse_block

FUZZ = settings(max_examples=2000, deadline=None, suppress_health_check=[HealthCheck.too_slow])


# --- building blocks of documents --------------------------------------------------------

FENCES = ["```premises", "~~~premises", "```{.premises #b}", "```{premises}", "````markdown",
          "```", "````", "~~~", "```python", "   ```premises", "    ```premises", "``` ```"]
SCALARS = ["a", "d.csv", "y ~ x", "y ~ x ~ z", "hc3", "3", "-1", "1e400", "true", "null", "~",
           "[a, b]", "{k: v}", "'quoted'", '"x\\0y"', "&a x", "*a", "!!python/object:os.system",
           "|", ">", "- item", "[", "{", "'", "@", "`", "%", "\t", "\u2028", "\x85", "\ufeff"]
KEY_NAMES = [*KEYS, "formula", "colour", "when", "reason", "ids", "cooks", "op", "column", "<<"]
yaml_lines = st.builds(
    lambda indent, key, value: " " * indent + (f"{key}: {value}" if key else value),
    st.sampled_from([0, 0, 0, 2, 4, 1]),
    st.sampled_from([*KEY_NAMES, "", "- ", "  - when"]),
    st.sampled_from(SCALARS),
)
block_text = st.lists(yaml_lines, max_size=12).map(lambda lines: "\n".join(lines) + "\n")
doc_lines = st.one_of(st.sampled_from([*FENCES, "---", "...", "", "text", "premises:", "  se: hc3"]), yaml_lines)
documents = st.tuples(st.lists(doc_lines, max_size=24), st.sampled_from(["\n", "\r\n", "\r"])).map(
    lambda parts: parts[1].join(parts[0]) + parts[1]
)
VALID = "id: a\ndata: d.csv\nmodel: y ~ x\n"


def plain_values() -> st.SearchStrategy[Any]:
    """Any value YAML can hold (safe types), nested."""
    leaves = st.one_of(
        st.none(), st.booleans(), st.integers(), st.floats(allow_nan=True),
        st.text(max_size=12), st.sampled_from(["y ~ x", "x > 3", "hc3", "4/n", "log", "a"]),
    )
    return st.recursive(
        leaves,
        lambda inner: st.one_of(
            st.lists(inner, max_size=4),
            st.dictionaries(st.one_of(st.sampled_from(KEY_NAMES), st.text(max_size=6)), inner, max_size=5),
        ),
        max_leaves=20,
    )


# --- the fence scanner -------------------------------------------------------------------


@FUZZ
@given(st.one_of(st.text(), documents))
@example("```premises\n```premises\n```\n")
@example("\ufeff---\n```premises\n---\n```premises\nid: a\n```\n")
def test_scanner_returns_blocks_or_a_spec_error(text: str) -> None:
    try:
        blocks = find_blocks(text, "doc.md")
    except SpecError as error:
        assert error.location.file == "doc.md"
        return
    for block in blocks:
        # A block spans its fence lines exactly: it starts at a line start with the fence.
        assert block.start == 0 or text[block.start - 1] in "\r\n"
        assert text[block.start : block.end].lstrip(" ").startswith(block.fence)
        assert text[block.start : block.end].rstrip(" \t").endswith(block.fence[0] * len(block.fence))


@FUZZ
@given(st.one_of(st.text(), documents))
def test_splicing_copies_every_byte_outside_the_blocks(text: str) -> None:
    try:
        blocks = find_blocks(text)
    except SpecError:
        return
    marks = [f"<{i}>" for i in range(len(blocks))]
    out = splice(text, blocks, marks)
    # Walking the output: the text between blocks comes back byte for byte, each
    # block replaced by its mark.
    offset, cursor = 0, 0
    for block, mark in zip(blocks, marks):
        between = text[cursor : block.start]
        assert out[offset : offset + len(between)] == between
        offset += len(between)
        assert out[offset : offset + len(mark)] == mark
        offset += len(mark)
        cursor = block.end
    assert out[offset:] == text[cursor:]
    # A replacement without fences leaves no block behind, and no error.
    assert find_blocks(splice(text, blocks, ["x"] * len(blocks))) == ()


# --- the block parser --------------------------------------------------------------------


@FUZZ
@given(st.one_of(st.text(), block_text, block_text.map(lambda t: VALID + t)), st.integers(1, 10_000))
@example("a: &x [*x]\n", 1)
@example("id: a\ndata: d.csv\nmodel: y ~ x\nthresholds: {cooks: '9' }\n", 3)
def test_block_parser_returns_a_spec_or_a_spec_error(body: str, line: int) -> None:
    try:
        spec = parse_block(body, file="doc.md", line=line)
    except SpecError as error:
        assert error.location.file == "doc.md"
        if error.location.line is not None:
            assert line <= error.location.line <= line + 1 + body.count("\n") + body.count("\r")
        return
    assert isinstance(spec, BlockSpec)


@FUZZ
@given(plain_values(), st.sampled_from(KEY_NAMES))
def test_any_yaml_value_gives_a_spec_or_a_spec_error(value: Any, key: str) -> None:
    """Every key given every kind of value: the one validator answers each with a SpecError."""
    for shape in (value, {"id": "a", "data": "d.csv", "model": "y ~ x", key: value}):
        try:
            spec = parse_block(yaml.safe_dump(shape), file=None, line=1)
        except SpecError:
            continue
        assert isinstance(spec, BlockSpec)


# --- whole documents ---------------------------------------------------------------------


@FUZZ
@given(documents)
@example("---\npremises: hc3\n---\n")
@example("---\npremises: [se]\n---\n```premises\nid: a\ndata: d.csv\nmodel: y ~ x\n```\n")
@example("```{.premises #a}\nid: b\n```\n")
def test_documents_parse_or_raise_the_tools_own_error(text: str) -> None:
    try:
        raws, specs = parse_document(text, "doc.md")
    except PremisesError as error:
        assert error.message and "\n" not in error.message
        return
    assert len(raws) == len(specs)
    assert len({s.id for s in specs}) == len(specs)


# --- rules -------------------------------------------------------------------------------

RULE_PIECES = ["x", "y", "`odd name`", "cat", "3", "-1.5e3", "'a'", '"b"', "true", "missing",
               "and", "or", "not", "in", "is", "==", "!=", "<", "<=", ">", ">=", "+", "-", "*", "/",
               "%", "**", "(", ")", "[", "]", ",", ".", "__class__", "__import__", "lambda", ":",
               "for", "if", "import", "os", "eval", "open", ";", "=", ":=", "f'", "\\", "#"]
rule_text = st.one_of(
    st.text(max_size=120),
    st.lists(st.sampled_from(RULE_PIECES), max_size=30).map(" ".join),
    st.lists(st.sampled_from(RULE_PIECES), max_size=30).map("".join),
    st.integers(0, 80).map(lambda k: "(" * k + "x > 1" + ")" * k),
    st.integers(0, 80).map(lambda k: "not " * k + "x > 1"),
    st.integers(0, 80).map(lambda k: "-" * k + "x > 1"),
)
FRAME = pd.DataFrame(
    {"x": [1.0, 2.0, np.nan, 4.0], "y": [0.0, -1.0, 2.5, 3.0], "cat": ["a", "b", None, "a"],
     "odd name": [1, 2, 3, 4]}
)


@contextmanager
def python_evaluation_refused() -> Iterator[None]:
    """Make eval, exec and compile fail while a rule is parsed and evaluated."""
    evaluate_rule(parse_rule("x > 1 and cat in ['a'] or `odd name` is missing"), FRAME)  # lazy imports first
    saved = builtins.eval, builtins.exec, builtins.compile

    def refuse(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError("a rule reached Python's eval/exec/compile")

    builtins.eval, builtins.exec, builtins.compile = refuse, refuse, refuse  # type: ignore[assignment]
    try:
        yield
    finally:
        builtins.eval, builtins.exec, builtins.compile = saved


@FUZZ
@given(rule_text)
@example("__import__('os').system('touch /tmp/pwned_fuzz') == 0")
@example("x." + "__class__." * 30 + "x")
def test_rules_parse_and_evaluate_or_raise_the_tools_own_error(text: str) -> None:
    with python_evaluation_refused():
        try:
            where = Location("doc.md", 3, "a", "exclude[0].when")
            mask = evaluate_rule(parse_rule(text, where), FRAME, where)
        except PremisesError as error:
            assert error.location.key == "exclude[0].when"
            return
    assert mask.dtype == bool and mask.shape == (len(FRAME),)


# --- formulas ----------------------------------------------------------------------------

FORMULA_PIECES = ["y", "x", "z", "cat", "~", "+", "-", "*", ":", "/", "**", "(", ")", "1", "0",
                  "2.5", "log", "log2", "sqrt", "exp", "C", "I", "Q", "center", "scale", "np",
                  ".", "'cat'", '"z"', ",", "Treatment", "Sum", "__class__", "open", "lambda",
                  "[", "]", "{", "}", "%", "|", "yield", "class", "if", "else", "==", "@"]
formula_text = st.one_of(
    st.text(max_size=80),
    st.lists(st.sampled_from(FORMULA_PIECES), max_size=20).map(" ".join),
    st.lists(st.sampled_from(FORMULA_PIECES), max_size=20).map("".join),
    st.lists(st.sampled_from(FORMULA_PIECES), max_size=12).map(lambda p: "y ~ " + " ".join(p)),
)
DESIGN_FRAME = pd.DataFrame(
    {"y": [1.0, 2.0, 4.0, 3.0, 5.0, 7.0], "x": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
     "z": [0.0, 1.0, 0.5, 2.0, -1.0, 3.0], "cat": ["a", "b", "a", "c", "b", "a"]}
)


@FUZZ
@given(formula_text)
@example("y ~ x + I(x.__class__)")
@example("y ~ " + "(" * 60 + "x" + ")" * 60)
@example("y ~ C(cat, Treatment(reference='zz'))")
@example("y ~ log(z)")
def test_formulas_build_or_raise_the_tools_own_error(text: str) -> None:
    try:
        check_formula(text)
        design = build_design(text, DESIGN_FRAME)
    except PremisesError:
        return
    assert design.X.shape[0] == len(DESIGN_FRAME)


# --- data files --------------------------------------------------------------------------

csv_bytes = st.one_of(
    st.binary(max_size=300),
    st.text(alphabet=string.printable + "é\u00a0\ufeff", max_size=300).map(lambda t: t.encode("utf-8")),
    st.lists(
        st.lists(st.sampled_from(["1", "2.5", "", "x", "inf", "NaN", '"a,b"', '"', "y", "-", "1e999"]), min_size=1, max_size=5).map(",".join),
        max_size=8,
    ).map(lambda rows: ("\n".join(rows) + "\n").encode("utf-8")),
)


@settings(max_examples=2000, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(csv_bytes, st.sampled_from(["d.csv", "d.tsv", "d.parquet", "d.xlsx"]))
def test_data_files_load_or_raise_a_data_error(tmp_path: Path, data: bytes, name: str) -> None:
    (tmp_path / name).write_bytes(data)
    try:
        table = load_table(name, tmp_path, Location("doc.md", 7, "a", "data"))
    except PremisesError as error:
        assert error.location.key == "data"
        assert "\n" not in error.message
        return
    assert table.info.rows_read == len(table.frame) > 0
    assert len(set(table.frame.columns)) == len(table.frame.columns)


def test_the_fuzz_settings_are_the_advertised_ones() -> None:
    assert FUZZ.max_examples == 2000
    assert FUZZ.deadline is None


@pytest.mark.parametrize("text", ["x > 1", "cat in ['a', 'b']", "`odd name` is missing"])
def test_the_refusing_guard_lets_valid_rules_through(text: str) -> None:
    # The guard must not make every rule fail, or the fuzz test above could not fail.
    with python_evaluation_refused():
        mask = evaluate_rule(parse_rule(text), FRAME)
    assert mask.dtype == bool
