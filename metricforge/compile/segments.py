"""Segment columns of the one scan (``[segments] by``) and the names of their results.

A unit's segment value for a column is the column's value on the unit's earliest event in
its analysis window (from its first exposure on) that carries a non-NULL value; events in
the same millisecond are decided by the smallest value. The scan computes it without a
second pass: every such event makes the key ``LPAD(epoch milliseconds, 20, '0') || value``
(UnixMillis: a function every engine, and the golden files' parser, knows), whose
minimum over the unit's sessions (and, with stitching, over an account's cookies) is its
earliest value, ties broken by the smallest value. ``unit_rows`` carries the value as
``seg_<column>`` (NULL for a unit without any value).

Each column adds one result query, ``segments_<column>``: the moments query over
``unit_rows``, grouped by variant and segment value, analysed units only.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.sqlparts import all_of, case, col, lit
from metricforge.spec.model import Plan

_DIGITS = 20  # epoch milliseconds of any year up to 9000 fit in 20 digits


def segment_columns(plan: Plan) -> tuple[str, ...]:
    """The spec's ``[segments] by`` columns (none without a ``[segments]`` table)."""
    return plan.spec.segments.by if plan.spec.segments is not None else ()


def key_column(column: str) -> str:
    return f"segkey_{column}"


def value_column(column: str) -> str:
    """The unit_rows column holding a unit's segment value."""
    return f"seg_{column}"


def result_name(column: str) -> str:
    return f"segments_{column}"


def session_keys(plan: Plan, e: str, in_window: exp.Expr | None) -> list[exp.Expr]:
    """Per (unit, session): the smallest key of the session's events in the window."""
    out: list[exp.Expr] = []
    for column in segment_columns(plan):
        value = col(column, e)
        millis = exp.cast(exp.UnixMillis(this=col("ts", e)), "VARCHAR")
        padded = exp.Pad(this=millis, expression=lit(_DIGITS), fill_pattern=lit("0"), is_left=True)
        key = exp.Concat(expressions=[padded, value.copy()])
        usable = all_of(
            in_window.copy() if in_window is not None else None, value.is_(exp.null()).not_()
        )
        out.append(exp.alias_(exp.Min(this=case(usable, key)), key_column(column)))
    return out


def merged_keys(plan: Plan, table: str | None = None) -> list[exp.Expr]:
    """The smallest key over rows being merged (a unit's sessions, an account's cookies)."""
    return [
        exp.alias_(exp.Min(this=col(key_column(c), table)), key_column(c))
        for c in segment_columns(plan)
    ]


def unit_values(plan: Plan) -> list[exp.Expr]:
    """The unit select's ``seg_<column>``: the value part of the unit's smallest key."""
    return [
        exp.alias_(exp.Substring(this=col(key_column(c)), start=lit(_DIGITS + 1)), value_column(c))
        for c in segment_columns(plan)
    ]
