"""The rule language of ``exclude: [{when: ...}]``, parsed by hand and never run as Python.

A rule comes from a document, so it is read by a small tokenizer and a
recursive-descent parser written here; no rule text ever reaches ``eval``,
``exec``, ``compile`` or ``DataFrame.query``. The grammar, lowest precedence
first (Python's precedence, so rules read the way they look)::

    rule       := and ('or' and)*
    and        := not ('and' not)*
    not        := 'not' not | comparison
    comparison := sum (CMP sum)*                  CMP: == != < <= > >=, chains allowed
                | sum ['not'] 'in' list
                | sum 'is' ['not'] 'missing'
    sum        := term (('+' | '-') term)*
    term       := unary (('*' | '/' | '%') unary)*
    unary      := ('-' | '+') unary | power
    power      := atom ['**' unary]
    atom       := NUMBER | 'text' | "text" | true | false | name | `odd name` | '(' rule ')'
    list       := '[' [item (',' item)* [',']] ']'    item: number, text, true or false

Missing values follow three-valued (Kleene) logic: a comparison with a missing
value is *unknown*, ``not`` and ``and``/``or`` keep it unknown, and a row whose
rule ends unknown is not excluded. Only ``is missing`` matches missing values.
So ``x > 5`` and ``not (x <= 5)`` both leave rows with a missing ``x`` alone.
An undefined arithmetic result (``0 / 0``) counts as missing; ``1 / 0`` is infinity.

Values have kinds (numbers, text, true/false, dates); comparing different kinds
(text with a number) or doing arithmetic on text is a DataError, raised when the
data are known. A date column compares with a quoted date: ``day >= '2024-01-31'``.

The parser (:mod:`premises.rules.parser`, over :mod:`premises.rules.tokens`)
builds the frozen node tree of :mod:`premises.rules.nodes` with the standard
library alone, so a rule is checked before any data library is loaded;
:func:`evaluate_rule` walks the tree with vectorised numpy/pandas operations
(:mod:`premises.rules.evaluation`, imported on first use).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from premises.rules.nodes import (
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
    describe_rule,
)
from premises.rules.parser import parse_rule
from premises.rules.tokens import MAX_RULE_DEPTH, MAX_RULE_LENGTH

if TYPE_CHECKING:
    import numpy as np
    import pandas as pd

    from premises.errors import Location

__all__ = [
    "MAX_RULE_DEPTH",
    "MAX_RULE_LENGTH",
    "BinOp",
    "BoolOp",
    "Column",
    "Compare",
    "InList",
    "IsMissing",
    "Literal",
    "Node",
    "Not",
    "Rule",
    "Unary",
    "describe_rule",
    "evaluate_rule",
    "parse_rule",
]


def evaluate_rule(rule: Rule, frame: pd.DataFrame, location: Location | None = None) -> np.ndarray:
    """Rows of ``frame`` that ``rule`` matches, as a boolean mask.

    Parameters
    ----------
    rule
        A rule from :func:`parse_rule`.
    frame
        The data; columns are looked up by name.
    location
        Where the rule sits; carried by any error.

    Returns
    -------
    numpy.ndarray
        ``(len(frame),)`` bool array; True marks a row the rule excludes. A row
        whose rule is unknown because of a missing value is not matched.

    Raises
    ------
    DataError
        The rule names a column the data lack, compares values of different
        kinds (text with a number), or does arithmetic on text.

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"x": [1.0, None, 7.0]})
    >>> evaluate_rule(parse_rule("x > 5"), frame).tolist()
    [False, False, True]
    """
    # imported here so that parsing a rule never loads numpy or pandas
    from premises.rules.evaluation import evaluate_rule as evaluate

    return evaluate(rule, frame, location)
