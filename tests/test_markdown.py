"""The Markdown fence scanner: which fences are premises blocks, and splicing."""

from __future__ import annotations

import re
import textwrap

import pytest

import premises.documents
from premises.documents.markdown import RawBlock, find_blocks, read_front_matter, splice
from premises.errors import SpecError


def _doc(text: str) -> str:
    return textwrap.dedent(text)


def test_public_surface() -> None:
    assert premises.documents.__all__ == ["RawBlock", "find_blocks", "read_front_matter", "splice"]
    assert premises.documents.find_blocks is find_blocks


def test_plain_backtick_block() -> None:
    text = _doc(
        """\
        # Results

        ```premises
        id: main
        data: d.csv
        ```

        After.
        """
    )
    (block,) = find_blocks(text, "r.md")
    assert block.info == "premises"
    assert block.body == "id: main\ndata: d.csv\n"
    assert (block.line, block.end_line) == (3, 6)
    assert text[block.start : block.end] == "```premises\nid: main\ndata: d.csv\n```"
    assert block.attrs == ()
    assert block.classes == ("premises",)


def test_tilde_fence() -> None:
    (block,) = find_blocks("~~~premises\nid: a\n~~~\n")
    assert block.fence == "~~~"
    assert block.body == "id: a\n"


def test_longer_fence_needs_a_closing_fence_at_least_as_long() -> None:
    text = "`````premises\nid: a\n```\nnote: b\n``````\ntail\n"
    (block,) = find_blocks(text)
    assert block.body == "id: a\n```\nnote: b\n"
    assert block.end_line == 5


def test_closing_fence_must_use_the_same_character() -> None:
    text = "~~~premises\nid: a\n```\n~~~~\n"
    (block,) = find_blocks(text)
    assert block.body == "id: a\n```\n"


def test_backticks_inside_the_body() -> None:
    text = "```premises\nid: a\ntitle: 'uses `code` and ``more``'\n```\n"
    (block,) = find_blocks(text)
    assert "``more``" in block.body


def test_closing_fence_may_carry_trailing_blanks_but_nothing_else() -> None:
    text = "```premises\nid: a\n``` not a close\n```  \t\n"
    (block,) = find_blocks(text)
    assert block.body == "id: a\n``` not a close\n"


def test_attribute_form_with_id_and_pairs() -> None:
    text = (
        '```{.premises #yield-main data=plots.csv title="Main model" .other}\nmodel: y ~ x\n```\n'
    )
    (block,) = find_blocks(text)
    assert block.attrs == (("id", "yield-main"), ("data", "plots.csv"), ("title", "Main model"))
    assert block.attr_map["id"] == "yield-main"
    assert block.classes == ("premises", "other")


def test_attribute_form_with_premises_among_other_classes() -> None:
    (block,) = find_blocks("``` {#a .yaml .premises}\nid: a\n```\n")
    assert block.classes == ("yaml", "premises")
    assert block.attrs == (("id", "a"),)


def test_braced_premises_is_rejected_with_the_reason() -> None:
    text = "Intro\n\n```{premises}\nid: a\n```\n"
    with pytest.raises(SpecError, match="executable code cell") as caught:
        find_blocks(text, "report.qmd")
    assert caught.value.location.file == "report.qmd"
    assert caught.value.location.line == 3
    assert "```premises or ```{.premises}" in str(caught.value)
    with pytest.raises(SpecError, match="executable"):
        find_blocks("```{premises, echo=false}\nid: a\n```\n")


def test_other_executable_cells_are_not_blocks() -> None:
    text = "```{python}\nx = 1\n```\n\n```{r}\n1\n```\n"
    assert find_blocks(text) == ()


def test_malformed_attributes_are_reported() -> None:
    with pytest.raises(SpecError, match="not '.class', '#id' or 'key=value'") as caught:
        find_blocks("x\n```{.premises =bad}\nid: a\n```\n", "r.md")
    assert caught.value.location.line == 2


def test_indented_fence_strips_its_indentation_from_the_body() -> None:
    text = "   ```premises\n   id: a\n     data: x\n  model: m\n   ```\n"
    (block,) = find_blocks(text)
    assert block.body == "id: a\n  data: x\nmodel: m\n"
    assert block.start == 0
    assert text[block.start : block.end] == text.rstrip("\n")


def test_four_spaces_make_no_fence() -> None:
    assert find_blocks("    ```premises\n    id: a\n    ```\n") == ()


def test_crlf_is_preserved() -> None:
    text = "Intro\r\n\r\n```premises\r\nid: a\r\ndata: d\r\n```\r\nEnd\r\n"
    (block,) = find_blocks(text)
    assert block.body == "id: a\r\ndata: d\r\n"
    assert (block.line, block.end_line) == (3, 6)
    assert splice(text, [block], ["NEW"]) == "Intro\r\n\r\nNEW\r\nEnd\r\n"


def test_missing_closing_fence() -> None:
    text = "# T\n\n```premises\nid: a\n``\n~~~\n"
    with pytest.raises(SpecError, match="no closing fence") as caught:
        find_blocks(text, "r.md")
    assert caught.value.location.describe() == "r.md:3"
    assert "at least 3 '`'" in str(caught.value)


def test_unclosed_other_fence_swallows_the_rest() -> None:
    # CommonMark: an unclosed fence runs to the end, so the premises text is code.
    assert find_blocks("```python\nx = 1\n```premises\nid: a\n") == ()


def test_premises_inside_a_longer_markdown_fence_is_not_a_block() -> None:
    text = _doc(
        """\
        How to write one:

        ````markdown
        ```premises
        id: example
        ```
        ````

        ```premises
        id: real
        ```
        """
    )
    (block,) = find_blocks(text)
    assert block.body == "id: real\n"
    assert block.line == 9


def test_other_code_blocks_are_untouched() -> None:
    text = "```python\nprint(1)\n```\n\n```premises\nid: a\n```\n\n~~~yaml\nk: v\n~~~\n"
    (block,) = find_blocks(text)
    out = splice(text, [block], ["X"])
    assert out == "```python\nprint(1)\n```\n\nX\n\n~~~yaml\nk: v\n~~~\n"


def test_no_blocks_gives_identical_text() -> None:
    text = "---\ntitle: t\n---\n\nNo blocks here.\r\n```python\n1\n```\nno final newline"
    blocks = find_blocks(text)
    assert blocks == ()
    assert splice(text, blocks, []) == text


def test_splice_replaces_several_blocks_and_keeps_the_rest() -> None:
    text = "a\n```premises\nid: x\n```\nb\n~~~ premises\nid: y\n~~~\nc"
    blocks = find_blocks(text)
    assert [b.body for b in blocks] == ["id: x\n", "id: y\n"]
    assert splice(text, blocks, ["<1>", "<2>\nmore"]) == "a\n<1>\nb\n<2>\nmore\nc"


def test_splice_checks_its_arguments() -> None:
    text = "```premises\nid: a\n```\n"
    blocks = find_blocks(text)
    with pytest.raises(ValueError, match="one replacement per block"):
        splice(text, blocks, [])
    with pytest.raises(ValueError, match="in document order"):
        splice(text, blocks * 2, ["a", "b"])


def test_block_at_end_without_final_newline() -> None:
    text = "x\n```premises\nid: a\n```"
    (block,) = find_blocks(text)
    assert block.end == len(text)
    assert splice(text, [block], ["Y"]) == "x\nY"


def test_info_words_after_premises_are_allowed() -> None:
    (block,) = find_blocks("```premises extra words\nid: a\n```\n")
    assert block.info == "premises extra words"


def test_similar_info_strings_are_not_blocks() -> None:
    text = "```premises-old\n1\n```\n```Premises\n2\n```\n```{.premisesx}\n3\n```\n"
    assert find_blocks(text) == ()


def test_backtick_in_backtick_info_is_no_fence() -> None:
    # CommonMark: the info string of a backtick fence may not contain backticks.
    assert find_blocks("```premises `x`\nid: a\n```\n") == ()


def test_fences_inside_front_matter_are_ignored() -> None:
    text = "---\nnote: |\n  ```premises\n  id: a\n  ```\n---\n\n```premises\nid: b\n```\n"
    (block,) = find_blocks(text)
    assert block.body == "id: b\n"
    assert block.line == 8


def test_front_matter_is_read_with_its_length() -> None:
    text = "---\ntitle: T\npremises:\n  se: hc3\n...\n\nBody\n"
    assert read_front_matter(text) == ({"title": "T", "premises": {"se": "hc3"}}, 5)
    assert read_front_matter("No front matter\n") == ({}, 0)
    assert read_front_matter("---\n---\nx\n") == ({}, 2)
    assert read_front_matter("---\r\ntitle: T\r\n---\r\n") == ({"title": "T"}, 3)


def test_unclosed_front_matter_is_not_front_matter() -> None:
    assert read_front_matter("---\ntitle: T\n\nText\n") == ({}, 0)


def test_malformed_front_matter_reports_its_line() -> None:
    text = "---\ntitle: T\nauthor: [a, b\n---\n"
    with pytest.raises(SpecError, match="front matter is not valid YAML") as caught:
        read_front_matter(text, "r.qmd")
    assert caught.value.location.file == "r.qmd"
    assert caught.value.location.line in (3, 4)
    bad_indent = "---\ntitle: T\n  sub: 1\n---\n"
    with pytest.raises(SpecError, match=re.escape("mapping values are not allowed")) as caught:
        read_front_matter(bad_indent)
    assert caught.value.location.line == 3


def test_front_matter_must_be_a_mapping() -> None:
    with pytest.raises(SpecError, match="must be a YAML mapping"):
        read_front_matter("---\n- a\n- b\n---\n")


def test_raw_block_is_frozen() -> None:
    (block,) = find_blocks("```premises\nid: a\n```\n")
    assert isinstance(block, RawBlock)
    with pytest.raises(AttributeError):
        block.line = 3  # type: ignore[misc]
