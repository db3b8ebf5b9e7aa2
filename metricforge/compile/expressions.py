"""User expressions: parse with sqlglot, walk the tree, allow only whitelisted nodes.

An expression is accepted only when it is exactly one expression, carries no
comments, and every node type, function and column is on the whitelists below.
The compiler embeds the checked tree, never the user's text.
"""

from __future__ import annotations

from collections.abc import Mapping

import sqlglot
import sqlglot.expressions as exp
from sqlglot.errors import ParseError, TokenError

from metricforge.errors import ExpressionError, closest

MAX_TEXT = 2_000
MAX_DEPTH = 40
MAX_STRING_LITERAL = 500
MAX_NUMBER_LITERAL = 30

# Structural nodes: comparisons, boolean logic, arithmetic, literals, CASE.
_ALLOWED_NODES: tuple[type[exp.Expr], ...] = (
    exp.Column,
    exp.Identifier,
    exp.Literal,
    exp.Boolean,
    exp.Null,
    exp.Paren,
    exp.EQ,
    exp.NEQ,
    exp.GT,
    exp.GTE,
    exp.LT,
    exp.LTE,
    exp.And,
    exp.Or,
    exp.Not,
    exp.Is,
    exp.In,
    exp.Between,
    exp.Like,
    exp.ILike,
    exp.Add,
    exp.Sub,
    exp.Mul,
    exp.Div,
    exp.Mod,
    exp.Neg,
    exp.Case,
    exp.If,
    exp.Cast,
    exp.DataType,
)

# Scalar functions, by sqlglot node type, with the name users write.
_ALLOWED_FUNCTIONS: dict[type[exp.Expr], str] = {
    exp.Lower: "lower",
    exp.Upper: "upper",
    exp.Length: "length",
    exp.Abs: "abs",
    exp.Round: "round",
    exp.Coalesce: "coalesce",
    exp.Greatest: "greatest",
    exp.Least: "least",
    exp.Sqrt: "sqrt",
    exp.Ln: "ln",
    exp.StartsWith: "starts_with",
}

_ALLOWED_CASTS = frozenset(
    {
        exp.DataType.Type.DOUBLE,
        exp.DataType.Type.BIGINT,
        exp.DataType.Type.INT,
        exp.DataType.Type.VARCHAR,
        exp.DataType.Type.TEXT,
        exp.DataType.Type.BOOLEAN,
    }
)

ALLOWED_FUNCTION_NAMES = tuple(sorted(_ALLOWED_FUNCTIONS.values()))


def _name_of(node: exp.Expr) -> str:
    if isinstance(node, exp.Anonymous):
        return str(node.name).lower()
    if isinstance(node, exp.Func):
        return node.sql_name().lower()
    return type(node).__name__.lower()


def _depth(node: exp.Expr) -> int:
    deepest = 0
    stack: list[tuple[exp.Expr, int]] = [(node, 1)]
    while stack:
        current, level = stack.pop()
        deepest = max(deepest, level)
        if deepest > MAX_DEPTH:
            return deepest
        stack.extend((child, level + 1) for child in current.iter_expressions())
    return deepest


def parse_expression(
    text: object,
    *,
    columns: Mapping[str, str],
    file: str,
    key: str,
    line: int | None = None,
) -> exp.Expr:
    """Parse ``text`` into a checked sqlglot tree; raise ExpressionError otherwise.

    ``columns`` maps the allowed column names to their logical types.
    """

    def fail(message: str, suggestion: str | None = None) -> ExpressionError:
        return ExpressionError(message, file=file, line=line, key=key, suggestion=suggestion)

    if not isinstance(text, str):
        raise fail(f"expected an expression as a string, got {type(text).__name__}")
    if not text.strip():
        raise fail("expression is empty")
    if len(text) > MAX_TEXT:
        raise fail(f"expression is longer than {MAX_TEXT} characters")
    try:
        statements = sqlglot.parse(text, read="duckdb")
    except (ParseError, TokenError) as err:
        first = str(err).splitlines()[0] if str(err) else "syntax error"
        raise fail(f"cannot parse expression: {first}") from None
    except RecursionError:
        raise fail("expression is nested too deeply") from None
    parsed = [s for s in statements if s is not None]
    if len(parsed) != 1:
        raise fail(f"expected exactly one expression, found {len(parsed)} statements")
    tree = parsed[0]
    if _depth(tree) > MAX_DEPTH:
        raise fail(f"expression is nested deeper than {MAX_DEPTH} levels")
    for node in tree.walk():
        _check_node(node, columns, fail)
    return tree


def _check_node(node: exp.Expr, columns: Mapping[str, str], fail: object) -> None:
    assert callable(fail)
    if node.comments:
        raise fail("comments are not allowed in expressions")
    if type(node) in _ALLOWED_FUNCTIONS:
        return
    if isinstance(node, exp.Func) and not isinstance(node, _ALLOWED_NODES):
        name = _name_of(node)
        raise fail(
            f"function '{name}' is not allowed; allowed: {', '.join(ALLOWED_FUNCTION_NAMES)}",
            closest(name, ALLOWED_FUNCTION_NAMES),
        )
    if not isinstance(node, _ALLOWED_NODES):
        raise fail(f"'{node.sql(dialect='duckdb')[:60]}' ({type(node).__name__}) is not allowed")
    if isinstance(node, exp.Column):
        if node.table or node.args.get("db") or node.args.get("catalog"):
            raise fail(f"column '{node.sql()}' must be a bare column name")
        name = node.name
        if name not in columns:
            raise fail(f"unknown column '{name}'", closest(name, columns))
    elif isinstance(node, exp.Literal):
        limit = MAX_STRING_LITERAL if node.is_string else MAX_NUMBER_LITERAL
        if len(node.this) > limit:
            raise fail(f"literal longer than {limit} characters")
    elif isinstance(node, exp.In) and (node.args.get("query") or node.args.get("unnest")):
        raise fail("IN accepts only a list of literals")
    elif isinstance(node, exp.Cast):
        target = node.to
        if target.this not in _ALLOWED_CASTS:
            raise fail(f"cast to {target.sql()} is not allowed")


def columns_of(tree: exp.Expr) -> frozenset[str]:
    return frozenset(c.name for c in tree.find_all(exp.Column))


def qualify(tree: exp.Expr, table: str) -> exp.Expr:
    """A copy of ``tree`` with every column qualified by ``table``."""

    def add_table(node: exp.Expr) -> exp.Expr:
        if isinstance(node, exp.Column):
            return exp.column(node.name, table=table)
        return node

    return tree.copy().transform(add_table)
