"""A grammar of whitelisted expressions for property tests, with an independent evaluator.

Each generated expression is a small tree of tuples. ``sql`` writes it as the text a user
would put in a definition; ``evaluate`` computes it in plain Python with SQL's rules for
NULL (None): comparisons and arithmetic with NULL give NULL, AND/OR/NOT use three-valued
logic, CASE takes the ELSE branch when its condition is NULL, coalesce/greatest/least skip
NULLs. Literals are small multiples of 0.25, so every sum is exact in binary and decimal.
"""

from __future__ import annotations

import re
from typing import Any

from hypothesis import strategies as st

Node = tuple[Any, ...]
STRING_COLUMNS = ("device", "country", "page")
NUMBER_COLUMNS = ("value", "latency_ms")
WORDS = ("mobile", "desktop", "tablet", "de", "fr", "us", "home", "checkout", "cart")

quarters = st.integers(-40, 80).map(lambda q: q / 4)
words = st.sampled_from(WORDS)
patterns = st.lists(
    st.sampled_from(["%", "_", "o", "e", "de", "m", "ck", "T"]), min_size=1, max_size=4
).map("".join)


def number_nodes(depth: int) -> st.SearchStrategy[Node]:
    leaves: st.SearchStrategy[Node] = st.one_of(
        st.sampled_from(NUMBER_COLUMNS).map(lambda c: ("col", c)),
        quarters.map(lambda v: ("num", v)),
        st.sampled_from(STRING_COLUMNS).map(lambda c: ("length", ("col", c))),
    )
    if depth <= 0:
        return leaves
    sub = number_nodes(depth - 1)
    return st.one_of(
        leaves,
        st.tuples(st.sampled_from(["+", "-"]), sub, sub).map(lambda t: ("arith", *t)),
        st.tuples(sub, quarters).map(lambda t: ("arith", "*", t[0], ("num", t[1]))),
        sub.map(lambda n: ("neg", n)),
        sub.map(lambda n: ("abs", n)),
        st.tuples(sub, quarters).map(lambda t: ("coalesce", t[0], ("num", t[1]))),
        st.tuples(st.sampled_from(["greatest", "least"]), sub, sub).map(
            lambda t: (t[0], t[1], t[2])
        ),
        st.tuples(bool_nodes(depth - 1), sub, sub).map(lambda t: ("case", *t)),
    )


def string_nodes(depth: int) -> st.SearchStrategy[Node]:
    column = st.sampled_from(STRING_COLUMNS).map(lambda c: ("col", c))
    if depth <= 0:
        return column
    return st.one_of(
        column,
        st.tuples(st.sampled_from(["lower", "upper"]), column).map(lambda t: (t[0], t[1])),
        st.tuples(column, words).map(lambda t: ("coalesce", t[0], ("str", t[1]))),
    )


def bool_nodes(depth: int) -> st.SearchStrategy[Node]:
    ops = st.sampled_from(["=", "<>", "<", "<=", ">", ">="])
    leaves = st.one_of(
        st.tuples(ops, number_nodes(min(depth, 1)), quarters).map(
            lambda t: ("cmp", t[0], t[1], ("num", t[2]))
        ),
        st.tuples(ops, string_nodes(1), words).map(lambda t: ("cmp", t[0], t[1], ("str", t[2]))),
        st.tuples(string_nodes(1), st.lists(words, min_size=1, max_size=3)).map(
            lambda t: ("in", *t)
        ),
        st.tuples(number_nodes(0), quarters, quarters).map(
            lambda t: ("between", t[0], min(t[1:]), max(t[1:]))
        ),
        st.tuples(st.sampled_from(["LIKE", "ILIKE"]), string_nodes(0), patterns).map(
            lambda t: ("like", *t)
        ),
        st.tuples(st.sampled_from(STRING_COLUMNS + NUMBER_COLUMNS), st.booleans()).map(
            lambda t: ("isnull", ("col", t[0]), t[1])
        ),
        st.tuples(string_nodes(0), st.sampled_from(["m", "de", "ch", "t"])).map(
            lambda t: ("starts", *t)
        ),
    )
    if depth <= 0:
        return leaves
    sub = bool_nodes(depth - 1)
    return st.one_of(
        leaves,
        sub.map(lambda b: ("not", b)),
        st.tuples(st.sampled_from(["AND", "OR"]), sub, sub).map(lambda t: ("logic", *t)),
    )


def _lit(value: float) -> str:
    return repr(float(value)) if value >= 0 else f"({value!r})"


def sql(node: Node) -> str:
    kind = node[0]
    if kind == "col":
        return str(node[1])
    if kind == "num":
        return _lit(node[1])
    if kind == "str":
        return "'" + str(node[1]) + "'"
    if kind == "length":
        return f"length({sql(node[1])})"
    if kind == "arith":
        return f"({sql(node[2])} {node[1]} {sql(node[3])})"
    if kind == "neg":
        return f"(-{sql(node[1])})"
    if kind in ("abs", "lower", "upper"):
        return f"{kind}({sql(node[1])})"
    if kind in ("coalesce", "greatest", "least"):
        return f"{kind}({sql(node[1])}, {sql(node[2])})"
    if kind == "case":
        return f"(CASE WHEN {sql(node[1])} THEN {sql(node[2])} ELSE {sql(node[3])} END)"
    if kind == "cmp":
        return f"({sql(node[2])} {node[1]} {sql(node[3])})"
    if kind == "in":
        return f"({sql(node[1])} IN ({', '.join(repr(w) for w in node[2])}))"
    if kind == "between":
        return f"({sql(node[1])} BETWEEN {_lit(node[2])} AND {_lit(node[3])})"
    if kind == "like":
        return f"({sql(node[2])} {node[1]} '{node[3]}')"
    if kind == "isnull":
        return f"({sql(node[1])} IS {'NOT ' if node[2] else ''}NULL)"
    if kind == "starts":
        return f"starts_with({sql(node[1])}, '{node[2]}')"
    if kind == "not":
        return f"(NOT {sql(node[1])})"
    if kind == "logic":
        return f"({sql(node[2])} {node[1]} {sql(node[3])})"
    raise AssertionError(kind)


def _like(text: str, pattern: str, fold: bool) -> bool:
    regex = "".join(".*" if c == "%" else "." if c == "_" else re.escape(c) for c in pattern)
    flags = re.DOTALL | (re.IGNORECASE if fold else 0)
    return re.fullmatch(regex, text, flags) is not None


_CMP = {
    "=": lambda a, b: a == b,
    "<>": lambda a, b: a != b,
    "<": lambda a, b: a < b,
    "<=": lambda a, b: a <= b,
    ">": lambda a, b: a > b,
    ">=": lambda a, b: a >= b,
}


def evaluate(node: Node, row: dict[str, Any]) -> Any:  # noqa: C901 - one branch per node kind
    kind = node[0]
    if kind == "col":
        return row.get(node[1])
    if kind in ("num", "str"):
        return node[1]
    args = [evaluate(n, row) if isinstance(n, tuple) else n for n in node[1:]]
    if kind == "length":
        return None if args[0] is None else len(args[0])
    if kind == "arith":
        a, b = args[1], args[2]
        if a is None or b is None:
            return None
        return {"+": a + b, "-": a - b, "*": a * b}[node[1]]
    if kind == "neg":
        return None if args[0] is None else -args[0]
    if kind == "abs":
        return None if args[0] is None else abs(args[0])
    if kind in ("lower", "upper"):
        return None if args[0] is None else getattr(args[0], kind)()
    if kind == "coalesce":
        return args[0] if args[0] is not None else args[1]
    if kind in ("greatest", "least"):
        known = [a for a in args if a is not None]
        return (max if kind == "greatest" else min)(known) if known else None
    if kind == "case":
        return args[1] if args[0] is True else args[2]
    if kind == "cmp":
        a, b = args[1], args[2]
        return None if a is None or b is None else _CMP[node[1]](a, b)
    if kind == "in":
        return None if args[0] is None else args[0] in node[2]
    if kind == "between":
        return None if args[0] is None else node[2] <= args[0] <= node[3]
    if kind == "like":
        return None if args[1] is None else _like(args[1], node[3], node[1] == "ILIKE")
    if kind == "isnull":
        return (args[0] is not None) if node[2] else (args[0] is None)
    if kind == "starts":
        return None if args[0] is None else args[0].startswith(node[2])
    if kind == "not":
        return None if args[0] is None else not args[0]
    if kind == "logic":
        a, b = args[1], args[2]
        if node[1] == "AND":
            if a is False or b is False:
                return False
            return None if a is None or b is None else True
        if a is True or b is True:
            return True
        return None if a is None or b is None else False
    raise AssertionError(kind)
