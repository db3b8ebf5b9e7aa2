"""A metric expression that fails on the data, named in one line.

Checked expressions cannot read or write anything, but a few can still fail on a value of
the data while the engine runs: a CAST of a string that is not a number, a ``%`` by zero,
an integer that overflows. The engine reports such a failure as a ``DataValueError`` (with
its kind); this module names the definition whose expression can fail that way (file,
line, ``metric.NAME.where`` or ``.value``) instead of a bare engine message. Quoted values
of the data are left out of the message (they may be unit ids), and so is the engine's
advice to change settings or wrap the expression (neither is open to a definition).
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING

import sqlglot.expressions as exp

from metricforge.errors import EngineError
from metricforge.spec.model import Plan

if TYPE_CHECKING:
    import pyarrow as pa

    from metricforge.compile.query import CompiledRun
    from metricforge.engines.base import Engine, EngineInputs

# The failure kinds an engine reports, and the expression nodes that can fail that way.
CAST, DIVISION, OVERFLOW = "cast", "division", "overflow"
_ARITHMETIC = (exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Neg)
_CAN_FAIL: dict[str, tuple[type[exp.Expr], ...]] = {
    CAST: (exp.Cast,),
    DIVISION: (exp.Mod, exp.Div),
    OVERFLOW: (exp.Cast, *_ARITHMETIC),
}
_QUOTED = re.compile(r"'[^']*'")
_ADVICE = re.compile(r"\s+(Use TRY\(|Use `try_|If necessary set ).*$")


class DataValueError(EngineError):
    """The engine stopped on a value of the data (``kind``: cast, division or overflow)."""

    def __init__(self, message: str, kind: str) -> None:
        super().__init__(message)
        self.kind = kind


def _can_fail(tree: exp.Expr, kind: str) -> bool:
    nodes = _CAN_FAIL[kind]
    # TRY_CAST (a Cast subclass) gives NULL instead of failing
    return any(isinstance(n, nodes) and not isinstance(n, exp.TryCast) for n in tree.walk())


def name_failing_expression(plan: Plan, err: DataValueError) -> EngineError:
    """The error naming the first metric expression that can fail as ``err`` did (and how
    many others could), or ``err`` itself when no expression can."""
    suspects = [
        (metric, key)
        for metric in plan.metrics
        for key, tree in (("where", metric.where), ("value", metric.value))
        if tree is not None and _can_fail(tree, err.kind)
    ]
    if not suspects:
        return err
    metric, key = suspects[0]
    others = len(suspects) - 1
    also = f" ({others} other expression(s) could fail the same way)" if others else ""
    reason = _QUOTED.sub("'…'", _ADVICE.sub("", err.message))
    return EngineError(
        f"the expression fails on a value of the data{also}: {reason}",
        file=metric.origin.file,
        line=metric.origin.line,
        key=f"metric.{metric.name}.{key}",
    )


def run_naming_failures(
    plan: Plan, engine: Engine, compiled: CompiledRun, inputs: EngineInputs
) -> dict[str, pa.Table]:
    """``engine.run``; a failure on a value of the data names the expression (see above)."""
    try:
        return engine.run(compiled, inputs)
    except DataValueError as err:
        raise name_failing_expression(plan, err) from None
