"""Properties of the fence scanner and the block parser, over generated input."""

from __future__ import annotations

import math
import re

from hypothesis import assume, example, given, settings
from hypothesis import strategies as st
from markdown_it import MarkdownIt

from premises.documents.markdown import find_blocks, splice
from premises.errors import SpecError
from premises.spec import BlockSpec, canonical_spec, evaluate_threshold, parse_block

# Lines from which documents are assembled: fences of both kinds and lengths,
# indentation up to three spaces, info strings, text. No list markers, quotes,
# HTML or setext underlines, whose containers the line scanner does not model.
FENCE_LINES = [
    "```premises",
    "~~~premises",
    "  ```premises",
    "   ~~~~ premises",
    "```{.premises #b k=v}",
    "~~~ {#c .premises}",
    "```",
    "````",
    "~~~",
    "~~~~~",
    " ```",
    "````markdown",
    "```python",
    "``` ```",
    "text",
    "id: a",
    "  indented",
    "",
]
documents = st.tuples(
    st.lists(st.sampled_from(FENCE_LINES), max_size=14),
    st.sampled_from(["\n", "\r\n"]),
    st.booleans(),
).map(lambda parts: parts[1].join(parts[0]) + (parts[1] if parts[2] else ""))


def _is_premises_info(info: str) -> bool:
    info = info.strip()
    if info.startswith("{") and info.endswith("}"):
        return ".premises" in info[1:-1].split()
    return info.split()[:1] == ["premises"]


@settings(max_examples=300, deadline=None)
@given(st.text())
@example("```{premises}\n")
@example("```premises\n")
@example("\r```premises\r```")
def test_any_text_is_scanned_or_refused_with_a_spec_error(text: str) -> None:
    try:
        blocks = find_blocks(text)
    except SpecError:
        return
    for block in blocks:
        assert 0 <= block.start < block.end <= len(text)
        assert block.line <= block.end_line


@settings(max_examples=300, deadline=None)
@given(st.one_of(documents, st.text()))
def test_splicing_each_fence_back_in_is_the_identity(text: str) -> None:
    try:
        blocks = find_blocks(text)
    except SpecError:
        assume(False)
        return
    originals = [text[block.start : block.end] for block in blocks]
    assert splice(text, blocks, originals) == text
    assert splice(text, blocks, ["X"] * len(blocks)).count("X") >= len(blocks)


@settings(max_examples=400, deadline=None)
@given(documents)
def test_blocks_agree_with_a_commonmark_parser(text: str) -> None:
    # markdown-it-py (a CommonMark implementation) is the outside reference for
    # which lines are fenced code and what each fence holds.
    try:
        ours = find_blocks(text)
    except SpecError:
        assume(False)
        return
    tokens = MarkdownIt("commonmark").parse(text)
    theirs = [t for t in tokens if t.type == "fence" and _is_premises_info(t.info)]
    assert [(b.line, b.end_line) for b in ours] == [
        (t.map[0] + 1, t.map[1]) for t in theirs if t.map is not None
    ]
    assert [b.body.replace("\r\n", "\n") for b in ours] == [t.content for t in theirs]


@settings(max_examples=200, deadline=None)
@given(st.text(), st.sampled_from(["", "id: a\ndata: d.csv\nmodel: y ~ x\n"]))
def test_any_block_text_parses_or_raises_a_spec_error(noise: str, prefix: str) -> None:
    try:
        spec = parse_block(prefix + noise, file="r.md", line=1)
    except SpecError as error:
        assert error.location.file == "r.md"
        return
    assert isinstance(spec, BlockSpec)


KEY_LINES = [
    "id: a",
    "data: d.csv",
    "model: y ~ x",
    "se: hc3",
    "seed: 3",
    "checks: [variance, linearity]",
    "thresholds: {cooks: 4/n, vif: 5}",
    "figures:\n  dpi: 200\n  format: svg",
    "exclude:\n  - when: x > 3\n    reason: r",
]


@settings(max_examples=100, deadline=None)
@given(st.permutations(KEY_LINES), st.integers(min_value=1, max_value=10_000))
def test_canonical_spec_ignores_key_order_and_position(order: list[str], line: int) -> None:
    reference = parse_block("\n".join(KEY_LINES) + "\n", file="a.md", line=1)
    shuffled = parse_block("\n".join(order) + "\n", file="b.md", line=line)
    assert canonical_spec(shuffled) == canonical_spec(reference)


# Expression trees rendered twice: in threshold syntax (with implicit
# multiplication where allowed) and in Python syntax, fully parenthesised.
leaves = st.one_of(
    st.integers(min_value=1, max_value=9).map(lambda v: (str(v), str(v))),
    st.sampled_from([("n", "n"), ("p", "p")]),
)


def _combine(children: st.SearchStrategy[tuple[str, str]]) -> st.SearchStrategy[tuple[str, str]]:
    binary = st.tuples(st.sampled_from(["+", "-", "*", "/"]), children, children).map(
        lambda t: (f"({t[1][0]}){t[0]}({t[2][0]})", f"({t[1][1]}){t[0]}({t[2][1]})")
    )
    roots = children.map(lambda c: (f"sqrt({c[0]})", f"sqrt({c[1]})"))
    implicit = st.tuples(st.integers(min_value=1, max_value=9), children).map(
        lambda t: (f"{t[0]}({t[1][0]})", f"({t[0]}*({t[1][1]}))")
    )
    return st.one_of(binary, roots, implicit)


expressions = st.recursive(leaves, _combine, max_leaves=8)


@settings(max_examples=300, deadline=None)
@given(expressions, st.integers(min_value=5, max_value=500), st.integers(min_value=1, max_value=4))
def test_threshold_arithmetic_matches_python(pair: tuple[str, str], n: int, p: int) -> None:
    ours_text, python_text = pair
    try:
        # Python's own arithmetic is the reference; the test alone evaluates code.
        expected = eval(python_text, {"__builtins__": {}}, {"n": n, "p": p, "sqrt": math.sqrt})
    except (ZeroDivisionError, ValueError, OverflowError):
        assume(False)
        return
    assume(math.isfinite(expected) and expected > 0)
    assert evaluate_threshold(ours_text, n, p) == expected


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=30), st.integers(min_value=2, max_value=100))
def test_threshold_text_is_evaluated_or_refused(text: str, n: int) -> None:
    try:
        value = evaluate_threshold(text, n, 1)
    except SpecError as error:
        assert error.problem
        return
    assert math.isfinite(value) and value > 0
    assert text.strip() == "F-median" or re.fullmatch(
        r"[ \t\n\r\f\v0-9.eE+\-*/()np]*", text.replace("sqrt", "")
    )
