"""The recursive-descent parser of the rule language, and :func:`parse_rule`.

The grammar, lowest precedence first, is given in :mod:`premises.rules`.
Parsing checks the shape of the tree too (conditions where and/or/not need
them, numbers where arithmetic needs them) and never touches data. Standard
library only.
"""

from __future__ import annotations

from premises.errors import Location, RuleError
from premises.rules.nodes import (
    CONDITIONS,
    BinOp,
    BoolOp,
    Column,
    Compare,
    InList,
    IsMissing,
    Literal,
    Node,
    Not,
    Rule,
    Unary,
    children,
    describe_node,
    tree_depth,
)
from premises.rules.tokens import (
    COMPARISONS,
    MAX_RULE_DEPTH,
    MAX_RULE_LENGTH,
    STATEMENT_WORDS,
    WORDS,
    Token,
    TokenStream,
    shorten,
)


class _Reader(TokenStream):
    """Parser of one rule over its token stream."""

    # grammar

    def parse(self) -> Node:
        self.tokenize()
        if self.at("end"):
            self.fail("is empty.", "Write a condition, e.g. `speed > 100`.")
        node = self.parse_or()
        if not self.at("end"):
            self.unexpected(self.peek())
        return node

    def parse_or(self) -> Node:
        operands = [self.parse_and()]
        while self.at_word("or"):
            self.advance()
            operands.append(self.parse_and())
        return operands[0] if len(operands) == 1 else BoolOp("or", tuple(operands))

    def parse_and(self) -> Node:
        operands = [self.parse_not()]
        while self.at_word("and"):
            self.advance()
            operands.append(self.parse_not())
        return operands[0] if len(operands) == 1 else BoolOp("and", tuple(operands))

    def parse_not(self) -> Node:
        if not self.at_word("not"):
            return self.parse_comparison()
        self.advance()
        self.enter()
        operand = self.parse_not()
        self.leave()
        return Not(operand)

    def parse_comparison(self) -> Node:
        left = self.parse_sum()
        node: Node
        if self.at("op", *COMPARISONS):
            ops: list[str] = []
            comparators: list[Node] = []
            while self.at("op", *COMPARISONS):
                ops.append(self.advance().text)
                comparators.append(self.parse_sum())
            node = Compare(left, tuple(ops), tuple(comparators))
        elif self.at_word("in") or (self.at_word("not") and self.at_word("in", ahead=1)):
            negated = self.advance().text == "not"
            if negated:
                self.advance()
            node = InList(left, self.parse_list(), negated)
        elif self.at_word("is"):
            self.advance()
            negated = self.at_word("not")
            if negated:
                self.advance()
            if not self.at_word("missing"):
                self.fail(
                    "uses `is` other than in `is missing` / `is not missing`.",
                    "Compare values with == or !=; test for a missing value with `x is missing`.",
                )
            self.advance()
            node = IsMissing(left, negated)
        else:
            return left
        if (
            self.at("op", *COMPARISONS)
            or self.at_word("in", "is")
            or (self.at_word("not") and self.at_word("in", ahead=1))
        ):
            self.fail(
                "chains `in` or `is missing` with another comparison.",
                "Join the conditions with `and`, e.g. `x > 0 and x in [1, 2]`.",
            )
        return node

    def parse_sum(self) -> Node:
        node = self.parse_term()
        while self.at("op", "+", "-"):
            op = self.advance().text
            node = BinOp(op, node, self.parse_term())
        return node

    def parse_term(self) -> Node:
        node = self.parse_unary()
        while self.at("op", "*", "/", "%"):
            op = self.advance().text
            node = BinOp(op, node, self.parse_unary())
        return node

    def parse_unary(self) -> Node:
        if not self.at("op", "-", "+"):
            return self.parse_power()
        op = self.advance().text
        self.enter()
        operand = self.parse_unary()
        self.leave()
        return Unary(op, operand)

    def parse_power(self) -> Node:
        base = self.parse_atom()
        self.refuse_postfix(base)
        if not self.at("op", "**"):
            return base
        self.advance()
        self.enter()
        exponent = self.parse_unary()
        self.leave()
        return BinOp("**", base, exponent)

    def parse_atom(self) -> Node:
        token = self.peek()
        if token.kind in ("num", "str"):
            self.advance()
            assert token.value is not None
            return Literal(token.value)
        if token.kind == "qname":
            self.advance()
            return Column(str(token.value))
        if token.kind == "name":
            return self.parse_name(token)
        if token.kind == "end":
            before = self.peek(-1).text if self.index else ""
            self.fail(f"ends where a value was expected (after `{before}`).")
        if token.text == "(":
            self.advance()
            if self.at("op", ")"):
                self.fail(f"has empty parentheses at character {token.pos + 1}.")
            self.enter()
            node = self.parse_or()
            self.leave()
            if self.at("op", ","):
                self.fail(
                    "uses a tuple `(a, b)`, which the rule language does not allow.",
                    "For a set of values write `x in [a, b]` with square brackets.",
                )
            if not self.at("op", ")"):
                self.unexpected(self.peek(), opened=token)
            self.advance()
            return node
        if token.text == "[":
            self.refuse_comprehension()
            self.fail(
                f"has a list at character {token.pos + 1} that does not follow `in`.",
                "A list of values goes after `in` or `not in`: `site in ['a', 'b']`.",
            )
        if token.text == "*":
            self.fail("uses unpacking (`*x`), which the rule language does not allow.")
        if token.text == "**":
            self.fail("uses unpacking (`**x`), which the rule language does not allow.")
        if token.text == "{":
            self.fail("uses a dict or set literal `{...}`, which the rule language does not allow.")
        self.unexpected(token, expected_value=True)

    def parse_name(self, token: Token) -> Node:
        word = token.text
        following = self.peek(1)
        if word in ("true", "True", "false", "False"):
            self.advance()
            return Literal(word in ("true", "True"))
        if word == "missing":
            self.fail(
                "uses `missing` as a value.",
                "Test for a missing value with `x is missing` (or `x is not missing`).",
            )
        if word in ("None", "null", "NULL"):
            self.fail(
                f"uses `{word}`, which is not a value in the rule language.",
                "Test for a missing value with `x is missing` (or `x is not missing`).",
            )
        if word in WORDS:
            self.fail(f"has `{word}` at character {token.pos + 1} where a value was expected.")
        if word == "lambda" and (
            following.kind in ("name", "qname") or following.text in (":", "*", "**", ",")
        ):
            self.fail("uses a lambda, which the rule language does not allow.")
        if (
            word in STATEMENT_WORDS
            and self.index == 0
            and following.kind in ("name", "qname", "num", "str")
        ):
            self.fail(
                f"looks like a statement (`{word} ...`); statements are not allowed.",
                "A rule is a single condition, e.g. `speed > 100 and site in ['a', 'b']`.",
            )
        self.advance()
        return Column(word)

    def parse_list(self) -> tuple[Literal, ...]:
        start = self.peek()
        if not self.at("op", "["):
            self.fail(
                "needs a list in square brackets after `in`.",
                "Write the values in square brackets: `site in ['a', 'b']`.",
            )
        self.refuse_comprehension()
        self.advance()
        items: list[Literal] = []
        while not self.at("op", "]"):
            items.append(self.parse_item(start))
            if self.at("op", ","):
                self.advance()
            elif not self.at("op", "]"):
                if self.at("end"):
                    self.fail(
                        f"has a list starting at character {start.pos + 1} without its closing ]."
                    )
                self.fail(
                    f"has a list starting at character {start.pos + 1} that is not closed properly.",
                    "Separate the values with commas and close the list with ].",
                )
        self.advance()
        return tuple(items)

    def parse_item(self, start: Token) -> Literal:
        sign = 1
        if self.at("op", "-", "+"):
            sign = -1 if self.advance().text == "-" else 1
            if not self.at("num"):
                self.fail("has a sign in a list that is not followed by a number.")
        token = self.advance()
        if token.kind == "num" and isinstance(token.value, (int, float)):
            return Literal(sign * token.value)
        if token.kind == "str":
            return Literal(str(token.value))
        if token.kind == "name" and token.text in ("true", "True", "false", "False"):
            return Literal(token.text in ("true", "True"))
        if token.kind == "end":
            self.fail(f"has a list starting at character {start.pos + 1} without its closing ].")
        self.fail(
            f"has `{token.text}` in a list; list items must be numbers, quoted text or true/false.",
            "Put text in quotes: `site in ['a', 'b']`.",
        )

    def refuse_postfix(self, operand: Node) -> None:
        """Calls, attribute access and indexing look like postfix operators; refuse each by name."""
        token = self.peek()
        shown = operand.name if isinstance(operand, Column) else "(...)"
        if self.at("op", "("):
            self.fail(
                f"calls a function (`{shown}(...)`); function calls are not allowed.",
                "Rules cannot call functions: write the arithmetic directly, or compute a "
                "new column in `transforms` and use that.",
            )
        if self.at("op", "."):
            after = self.peek(1)
            attribute = after.text if after.kind == "name" else ""
            self.fail(
                f"uses attribute access (`{shown}.{attribute}`), which the rule language does not allow."
            )
        if self.at("op", "["):
            self.fail(
                f"uses indexing (`{shown}[...]`) at character {token.pos + 1}, "
                "which the rule language does not allow."
            )


# --- shape checks after parsing ----------------------------------------------


def _is_condition(node: Node) -> bool:
    return isinstance(node, CONDITIONS) or (
        isinstance(node, Literal) and isinstance(node.value, bool)
    )


def _is_plain_value(node: Node) -> bool:
    return isinstance(node, (BinOp, Unary)) or (
        isinstance(node, Literal) and not isinstance(node.value, bool)
    )


def _check_shape(node: Node, logical: bool, reader: _Reader) -> None:
    """Conditions where and/or/not need them; numbers where arithmetic needs them."""
    if logical and _is_plain_value(node):
        shown = describe_node(node)
        reader.fail(
            f"uses `{shown}`, a value, where a condition is needed.",
            f"Compare it with something, e.g. `{shown} > 0`.",
        )
    if isinstance(node, (BinOp, Unary)):
        for child in children(node):
            if _is_condition(child):
                reader.fail(
                    f"does arithmetic on the condition `{describe_node(child)}`.",
                    "Arithmetic works on numbers; combine conditions with and/or/not.",
                )
    for child in children(node):
        _check_shape(child, isinstance(node, (BoolOp, Not)), reader)


def _collect_columns(node: Node, found: dict[str, None]) -> None:
    if isinstance(node, Column):
        found.setdefault(node.name, None)
    for child in children(node):
        _collect_columns(child, found)


def parse_rule(text: str, location: Location | None = None) -> Rule:
    """Parse and check an exclusion rule, without touching any data.

    Parameters
    ----------
    text
        The rule as written in the block, e.g. ``"speed > 100 and site in ['a', 'b']"``.
    location
        Where the rule sits (file, line, block, key); carried by any error.

    Returns
    -------
    Rule
        The rule with its node tree and the columns it reads.

    Raises
    ------
    RuleError
        The rule is empty, too long, too deeply nested, does not parse, or uses
        anything outside the rule language (calls, attributes, indexing, ...).

    Examples
    --------
    >>> parse_rule("0 < dose <= 5 and site not in ['x']").columns
    ('dose', 'site')
    """
    if not isinstance(text, str):
        raise RuleError(
            f"A rule must be text; got {type(text).__name__}.",
            location,
            'Write the rule as a quoted string, e.g. when: "speed > 100".',
        )
    if len(text) > MAX_RULE_LENGTH:
        raise RuleError(
            f"The rule `{shorten(text)}` is {len(text)} characters long, more than the "
            f"{MAX_RULE_LENGTH} allowed.",
            location,
            "Split it into several shorter rules.",
        )
    reader = _Reader(text, location)
    try:
        root = reader.parse()
    except (RecursionError, MemoryError) as exc:  # a guard, should the depth counters miss a path
        raise RuleError(
            f"The rule `{shorten(text)}` is nested too deeply to read.",
            location,
            "Split it into simpler rules.",
        ) from exc
    if tree_depth(root) > MAX_RULE_DEPTH:
        reader.fail(
            f"is nested deeper than {MAX_RULE_DEPTH} levels of operators.",
            "Split it into simpler rules, or use `x in [...]` for long lists of values.",
        )
    _check_shape(root, True, reader)
    found: dict[str, None] = {}
    _collect_columns(root, found)
    return Rule(text, root, tuple(found))
