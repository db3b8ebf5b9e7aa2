"""User expressions: parse with sqlglot, walk the tree, allow only whitelisted nodes.

An expression is accepted only when its text is exactly one expression (no ``;``, no
comments), and every node in the parsed tree is of a whitelisted type (exact type, not a
subclass), sets only the arguments listed for that type, and every function and column is
on a whitelist. Literals are bounded, LIKE patterns are literals with few wildcards, and a
small type check makes sure a ``where`` is a condition and a ``value`` a number. The
compiler embeds the checked tree, never the user's text.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping

import sqlglot
import sqlglot.expressions as exp
from sqlglot import TokenType
from sqlglot.errors import ParseError, TokenError

from metricforge.errors import ExpressionError, closest

MAX_TEXT = 2_000
MAX_DEPTH = 40
MAX_NODES = 400
MAX_STRING_LITERAL = 500
MAX_NUMBER_LITERAL = 30
MAX_NUMBER = 1e18
MAX_LIKE_WILDCARDS = 10
MAX_ROUND_DIGITS = 15

_BINARY = frozenset({"this", "expression"})
_UNARY = frozenset({"this"})

# Every allowed node type (exact type) with the arguments it may set. Anything else a
# parser quirk might attach (ESCAPE, COLLATE, FORMAT, SYMMETRIC, a subquery ...) is refused.
_NODES: dict[type[exp.Expr], frozenset[str]] = {
    exp.Column: _UNARY,
    exp.Identifier: frozenset({"this", "quoted"}),
    exp.Literal: frozenset({"this", "is_string"}),
    exp.Boolean: _UNARY,
    exp.Null: frozenset(),
    exp.Paren: _UNARY,
    exp.EQ: _BINARY,
    exp.NEQ: _BINARY,
    exp.GT: _BINARY,
    exp.GTE: _BINARY,
    exp.LT: _BINARY,
    exp.LTE: _BINARY,
    exp.And: _BINARY,
    exp.Or: _BINARY,
    exp.Not: _UNARY,
    exp.Is: _BINARY,
    exp.In: frozenset({"this", "expressions"}),
    exp.Between: frozenset({"this", "low", "high"}),
    exp.Like: _BINARY,
    exp.ILike: _BINARY,
    exp.Add: _BINARY,
    exp.Sub: _BINARY,
    exp.Mul: _BINARY,
    exp.Div: frozenset({"this", "expression", "typed", "safe"}),
    exp.Mod: _BINARY,
    exp.Neg: _UNARY,
    exp.Case: frozenset({"this", "ifs", "default"}),
    exp.If: frozenset({"this", "true", "false"}),
    exp.Cast: frozenset({"this", "to"}),
    exp.TryCast: frozenset({"this", "to", "safe"}),
    exp.DataType: frozenset({"this", "nested"}),
}

# Scalar functions, by sqlglot node type, with the name users write and allowed arguments.
_FUNCTIONS: dict[type[exp.Expr], tuple[str, frozenset[str]]] = {
    exp.Lower: ("lower", _UNARY),
    exp.Upper: ("upper", _UNARY),
    exp.Length: ("length", _UNARY),
    exp.Abs: ("abs", _UNARY),
    exp.Round: ("round", frozenset({"this", "decimals"})),
    exp.Coalesce: ("coalesce", frozenset({"this", "expressions", "is_nvl", "is_null"})),
    exp.Greatest: ("greatest", frozenset({"this", "expressions", "ignore_nulls"})),
    exp.Least: ("least", frozenset({"this", "expressions", "ignore_nulls"})),
    exp.Sqrt: ("sqrt", _UNARY),
    exp.Ln: ("ln", _UNARY),
    exp.StartsWith: ("starts_with", _BINARY),
}

_CASTS: dict[exp.DType, str] = {
    exp.DataType.Type.DOUBLE: "number",
    exp.DataType.Type.BIGINT: "number",
    exp.DataType.Type.INT: "number",
    exp.DataType.Type.VARCHAR: "string",
    exp.DataType.Type.TEXT: "string",
    exp.DataType.Type.BOOLEAN: "boolean",
}

ALLOWED_FUNCTION_NAMES = tuple(sorted(name for name, _ in _FUNCTIONS.values()))

# Logical types of the schema mapped to the categories of the type check.
_CATEGORY = {"string": "string", "double": "number", "timestamp": "timestamp"}

Fail = Callable[..., ExpressionError]


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


def _tokens_ok(text: str, fail: Fail) -> None:
    """Refuse statement separators and comments before parsing."""
    tokens = sqlglot.tokenize(text, read="duckdb")
    for token in tokens:
        if token.comments:
            raise fail("comments are not allowed in expressions")
        if token.token_type is TokenType.SEMICOLON:
            raise fail("expected exactly one expression, found ';' (several statements)")


def parse_expression(
    text: object,
    *,
    columns: Mapping[str, str],
    file: str,
    key: str,
    line: int | None = None,
    expect: str | None = None,
) -> exp.Expr:
    """Parse ``text`` into a checked sqlglot tree; raise ExpressionError otherwise.

    ``columns`` maps the allowed column names to their logical types; ``expect`` is
    ``"boolean"`` for a filter, ``"number"`` for a value, or None for no type demand.
    """

    def fail(message: str, suggestion: str | None = None) -> ExpressionError:
        return ExpressionError(message, file=file, line=line, key=key, suggestion=suggestion)

    if not isinstance(text, str):
        raise fail(f"expected an expression as a string, got {type(text).__name__}")
    if not text.strip():
        raise fail("expression is empty")
    if len(text) > MAX_TEXT:
        raise fail(f"expression is longer than {MAX_TEXT} characters")
    if any(ord(ch) < 32 and ch not in "\t\n\r" for ch in text):
        raise fail("expression contains a control character")
    try:
        _tokens_ok(text, fail)
        statements = sqlglot.parse(text, read="duckdb")
    except (ParseError, TokenError) as err:
        first = str(err).splitlines()[0] if str(err) else "syntax error"
        raise fail(f"cannot parse expression: {first[:120]}") from None
    except RecursionError:
        raise fail("expression is nested too deeply") from None
    parsed = [s for s in statements if s is not None]
    if len(parsed) != 1:
        raise fail(f"expected exactly one expression, found {len(parsed)} statements")
    tree = parsed[0]
    if _depth(tree) > MAX_DEPTH:
        raise fail(f"expression is nested deeper than {MAX_DEPTH} levels")
    nodes = list(tree.walk())
    if len(nodes) > MAX_NODES:
        raise fail(f"expression has more than {MAX_NODES} parts")
    for node in nodes:
        _check_node(node, columns, fail)
    kind = _type_of(tree, columns, fail)
    if expect is not None and kind not in (expect, "null"):
        what = {"boolean": "a condition (true or false)", "number": "a number"}[expect]
        raise fail(f"expression must be {what}, but it is a {kind}")
    return tree


def _check_args(node: exp.Expr, allowed: frozenset[str], fail: Fail) -> None:
    for arg, required in type(node).arg_types.items():
        if required and node.args.get(arg) is None and arg in allowed and arg != "ignore_nulls":
            raise fail(f"'{node.sql(dialect='duckdb')[:60]}' is incomplete")
    for arg, value in node.args.items():
        if arg not in allowed and value not in (None, False, []):
            raise fail(f"{_name_of(node).upper()} with '{arg}' is not allowed")


def _check_node(node: exp.Expr, columns: Mapping[str, str], fail: Fail) -> None:
    if node.comments:
        raise fail("comments are not allowed in expressions")
    kind = type(node)
    if kind in _FUNCTIONS:
        _check_args(node, _FUNCTIONS[kind][1], fail)
        if isinstance(node, exp.Round) and node.args.get("decimals") is not None:
            digits = node.args["decimals"]
            if not (
                isinstance(digits, exp.Literal)
                and not digits.is_string
                and digits.this.isdigit()
                and int(digits.this) <= MAX_ROUND_DIGITS
            ):
                raise fail(f"round's digits must be a whole number from 0 to {MAX_ROUND_DIGITS}")
        return
    if kind not in _NODES:
        if isinstance(node, exp.Func):
            name = _name_of(node)
            raise fail(
                f"function '{name}' is not allowed; allowed: {', '.join(ALLOWED_FUNCTION_NAMES)}",
                closest(name, ALLOWED_FUNCTION_NAMES),
            )
        raise fail(f"'{node.sql(dialect='duckdb')[:60]}' ({kind.__name__}) is not allowed")
    if isinstance(node, exp.Column) and (
        node.table or node.args.get("db") or node.args.get("catalog")
    ):
        raise fail(f"column '{node.sql()[:60]}' must be a bare column name")
    if isinstance(node, exp.In) and (node.args.get("query") or node.args.get("unnest")):
        raise fail("IN accepts only a list of literals")
    _check_args(node, _NODES[kind], fail)
    parent = node.parent
    if isinstance(node, exp.Identifier) and not isinstance(parent, exp.Column):
        raise fail(f"name '{node.name}' is not allowed here")
    if isinstance(node, exp.DataType) and not (
        isinstance(parent, exp.Cast) and node.arg_key == "to"
    ):
        raise fail(f"type '{node.sql()}' is not allowed here")
    if isinstance(node, exp.Column):
        name = node.name
        if not isinstance(node.this, exp.Identifier):
            raise fail(f"'{node.sql()[:60]}' is not a column name")
        if name not in columns:
            raise fail(f"unknown column '{name}'", closest(name, columns))
    elif isinstance(node, exp.Literal):
        _check_literal(node, fail)
    elif isinstance(node, exp.In):
        for item in node.expressions:
            if not _is_constant(item):
                raise fail("IN accepts only a list of literals")
    elif isinstance(node, exp.Like | exp.ILike):
        pattern = node.expression
        if not (isinstance(pattern, exp.Literal) and pattern.is_string):
            raise fail("a LIKE pattern must be a string literal")
        wildcards = sum(pattern.this.count(ch) for ch in "%_")
        if wildcards > MAX_LIKE_WILDCARDS:
            raise fail(f"a LIKE pattern may hold at most {MAX_LIKE_WILDCARDS} wildcards (% or _)")
    elif isinstance(node, exp.Cast):
        target = node.to
        if type(target) is not exp.DataType or target.this not in _CASTS:
            raise fail(f"cast to {target.sql()} is not allowed")


def _check_literal(node: exp.Literal, fail: Fail) -> None:
    text = str(node.this)
    if node.is_string:
        if len(text) > MAX_STRING_LITERAL:
            raise fail(f"literal longer than {MAX_STRING_LITERAL} characters")
        return
    if len(text) > MAX_NUMBER_LITERAL:
        raise fail(f"literal longer than {MAX_NUMBER_LITERAL} characters")
    try:
        number = float(text)
    except ValueError:
        raise fail(f"'{text}' is not a number") from None
    if not (math.isfinite(number) and abs(number) <= MAX_NUMBER):
        raise fail(f"number {text} is out of range (at most {MAX_NUMBER:.0e} in size)")


def _is_constant(node: exp.Expr) -> bool:
    if isinstance(node, exp.Neg):
        node = node.this
    return isinstance(node, exp.Literal | exp.Null | exp.Boolean)


# -- the type check ----------------------------------------------------------------------


def _unify(kinds: list[str], what: str, fail: Fail) -> str:
    known = sorted({k for k in kinds if k != "null"})
    if len(known) > 1:
        raise fail(f"{what} mixes {' and '.join(known)}")
    return known[0] if known else "null"


def _comparable(left: exp.Expr, right: exp.Expr, columns: Mapping[str, str], fail: Fail) -> None:
    a, b = _type_of(left, columns, fail), _type_of(right, columns, fail)
    if "null" in (a, b) or a == b:
        return
    # A timestamp may be compared with a literal date-time such as '2026-09-15 00:00:00'.
    for kind, node in ((a, left), (b, right)):
        other = b if node is left else a
        if (
            kind == "string"
            and other == "timestamp"
            and isinstance(node, exp.Literal)
            and node.is_string
        ):
            return
    raise fail(
        f"cannot compare a {a} with a {b}: '{left.parent.sql()[:60] if left.parent else ''}'"
    )


def _need(node: exp.Expr, kind: str, columns: Mapping[str, str], fail: Fail) -> None:
    got = _type_of(node, columns, fail)
    if got not in (kind, "null"):
        raise fail(f"'{node.sql()[:60]}' is a {got}, expected a {kind}")


def _type_of(node: exp.Expr | None, columns: Mapping[str, str], fail: Fail) -> str:
    """The category of ``node``: number, string, boolean, timestamp or null."""
    if node is None:
        raise fail("expression is incomplete")
    if isinstance(node, exp.Column):
        return _CATEGORY.get(columns[node.name], "string")
    if isinstance(node, exp.Literal):
        return "string" if node.is_string else "number"
    if isinstance(node, exp.Boolean):
        return "boolean"
    if isinstance(node, exp.Null):
        return "null"
    if isinstance(node, exp.Paren):
        return _type_of(node.this, columns, fail)
    if isinstance(node, exp.EQ | exp.NEQ | exp.GT | exp.GTE | exp.LT | exp.LTE):
        _comparable(node.this, node.expression, columns, fail)
        return "boolean"
    if isinstance(node, exp.And | exp.Or):
        _need(node.this, "boolean", columns, fail)
        _need(node.expression, "boolean", columns, fail)
        return "boolean"
    if isinstance(node, exp.Not):
        _need(node.this, "boolean", columns, fail)
        return "boolean"
    if isinstance(node, exp.Is):
        if isinstance(node.expression, exp.Boolean):
            _need(node.this, "boolean", columns, fail)
        else:
            _type_of(node.this, columns, fail)
        return "boolean"
    if isinstance(node, exp.In):
        for item in node.expressions:
            _comparable(node.this, item, columns, fail)
        return "boolean"
    if isinstance(node, exp.Between):
        _comparable(node.this, node.args["low"], columns, fail)
        _comparable(node.this, node.args["high"], columns, fail)
        return "boolean"
    if isinstance(node, exp.Like | exp.ILike):
        _need(node.this, "string", columns, fail)
        return "boolean"
    if isinstance(node, exp.Add | exp.Sub | exp.Mul | exp.Div | exp.Mod):
        _need(node.this, "number", columns, fail)
        _need(node.expression, "number", columns, fail)
        return "number"
    if isinstance(node, exp.Neg | exp.Abs | exp.Sqrt | exp.Ln | exp.Round):
        _need(node.this, "number", columns, fail)
        return "number"
    if isinstance(node, exp.Lower | exp.Upper):
        _need(node.this, "string", columns, fail)
        return "string"
    if isinstance(node, exp.Length):
        _need(node.this, "string", columns, fail)
        return "number"
    if isinstance(node, exp.StartsWith):
        _need(node.this, "string", columns, fail)
        _need(node.expression, "string", columns, fail)
        return "boolean"
    if isinstance(node, exp.Coalesce | exp.Greatest | exp.Least):
        parts = [node.this, *node.expressions]
        return _unify([_type_of(p, columns, fail) for p in parts], _name_of(node), fail)
    if isinstance(node, exp.Case):
        return _type_of_case(node, columns, fail)
    if isinstance(node, exp.If):
        _need(node.this, "boolean", columns, fail)
        parts = [p for p in (node.args.get("true"), node.args.get("false")) if p is not None]
        return _unify([_type_of(p, columns, fail) for p in parts], "IF", fail)
    if isinstance(node, exp.Cast):
        source = _type_of(node.this, columns, fail)
        target = _CASTS[node.to.this]
        if source == "timestamp" and target != "string":
            raise fail(f"cannot cast a timestamp to a {target}")
        return target
    raise fail(f"'{node.sql()[:60]}' is not allowed")  # unreachable: checked by _check_node


def _type_of_case(node: exp.Case, columns: Mapping[str, str], fail: Fail) -> str:
    subject = node.this
    results: list[str] = []
    for branch in node.args.get("ifs") or []:
        if subject is not None:
            _comparable(subject, branch.this, columns, fail)
        else:
            _need(branch.this, "boolean", columns, fail)
        results.append(_type_of(branch.args["true"], columns, fail))
    if node.args.get("default") is not None:
        results.append(_type_of(node.args["default"], columns, fail))
    return _unify(results, "CASE", fail)


def columns_of(tree: exp.Expr) -> frozenset[str]:
    return frozenset(c.name for c in tree.find_all(exp.Column))


def qualify(tree: exp.Expr, table: str) -> exp.Expr:
    """A copy of ``tree`` with every column qualified by ``table``."""

    def add_table(node: exp.Expr) -> exp.Expr:
        if isinstance(node, exp.Column):
            return exp.column(node.name, table=table)
        return node

    return tree.copy().transform(add_table)
