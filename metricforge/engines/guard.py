"""What an engine may execute: the checked statements of a compiled run, nothing else.

Every statement is checked as a syntax tree before it is rendered:

- the materialisation is exactly ``CREATE TEMPORARY TABLE unit_rows AS <SELECT>`` (Spark:
  ``CACHE TABLE unit_rows AS <SELECT>``) whose SELECT reads only the registered views
  ``events`` and ``exposures`` (and its own CTEs);
- every result query is exactly one SELECT that reads only ``unit_rows`` (and its CTEs);
- no statement holds a node that could reach outside the run: table functions, file
  readers, settings, statements such as COPY or ATTACH, placeholders, or functions that
  sqlglot does not know (``Anonymous``: the way a name like read_text would arrive).
  UNNEST / EXPLODE / LATERAL may only spread a column's list into rows (e.g. the values of
  a quantile metric), never a computed list such as range(n).

The rendered text is parsed again and must give back one statement of the same kind.
"""

from __future__ import annotations

import sqlglot
import sqlglot.expressions as exp
from sqlglot.errors import ParseError

from metricforge.compile.query import CompiledRun
from metricforge.compile.sqlparts import UNIT_TABLE
from metricforge.errors import EngineError

SOURCE_VIEWS = frozenset({"events", "exposures"})

_FORBIDDEN: tuple[type[exp.Expr], ...] = (
    exp.Anonymous,
    exp.ReadCSV,
    exp.ReadParquet,
    exp.ToFile,
    exp.Secret,
    exp.GenerateTable,
    exp.TableFromRows,
    exp.Command,
    exp.Copy,
    exp.Attach,
    exp.Detach,
    exp.Install,
    exp.Pragma,
    exp.Set,
    exp.Insert,
    exp.Update,
    exp.Delete,
    exp.Drop,
    exp.Merge,
    exp.Use,
    exp.Describe,
    exp.Export,
    exp.Summarize,
    exp.Transaction,
    exp.Commit,
    exp.Rollback,
    exp.Placeholder,
    exp.Parameter,
    exp.Kill,
    exp.Grant,
    exp.Revoke,
    exp.Analyze,
    exp.Uncache,
    exp.LoadData,
    exp.Refresh,
    exp.Alter,
    exp.GenerateSeries,
    exp.ExplodingGenerateSeries,
    exp.Create,
    exp.Cache,
)


def _refuse(name: str, message: str) -> EngineError:
    return EngineError(f"refusing to run statement '{name}': {message}")


def check_select(name: str, query: exp.Expr, tables: frozenset[str]) -> exp.Select:
    """``query`` as a SELECT that reads only ``tables`` and its own CTEs."""
    if type(query) is not exp.Select:
        raise _refuse(name, f"expected a single SELECT, got {type(query).__name__}")
    ctes = {cte.alias_or_name for cte in query.find_all(exp.CTE)}
    for node in query.walk():
        if isinstance(node, _FORBIDDEN) or (
            isinstance(node, exp.Func) and type(node).__name__.startswith("Current")
        ):
            raise _refuse(name, f"it uses {type(node).__name__}, which is not allowed")
        if isinstance(node, exp.Unnest | exp.Explode) and not all(
            isinstance(part, exp.Column) for part in [node.this, *node.expressions] if part
        ):
            raise _refuse(name, f"{type(node).__name__} may spread only a column into rows")
        if isinstance(node, exp.Table):
            if not isinstance(node.this, exp.Identifier) or node.args.get("db"):
                raise _refuse(name, f"'{node.sql()[:60]}' is not a plain table name")
            if node.name not in tables and node.name not in ctes:
                raise _refuse(name, f"it reads '{node.name}'; allowed: {sorted(tables)}")
    return query


def check_materialisation(statement: exp.Expr, dialect: str) -> exp.Expr:
    """The one statement that stores ``unit_rows``, checked to be exactly ours."""
    table = statement.this if isinstance(statement, exp.Create | exp.Cache) else None
    if not (
        isinstance(table, exp.Table)
        and isinstance(table.this, exp.Identifier)
        and table.name == UNIT_TABLE
        and not table.args.get("db")
    ):
        raise _refuse(UNIT_TABLE, f"the materialisation must store the table {UNIT_TABLE}")
    if dialect == "spark":
        if type(statement) is not exp.Cache:
            raise _refuse(UNIT_TABLE, "expected CACHE TABLE ... AS SELECT")
    else:
        properties = statement.args.get("properties")
        props = properties.expressions if properties is not None else []
        if not (
            type(statement) is exp.Create
            and statement.args.get("kind") == "TABLE"
            and len(props) == 1
            and type(props[0]) is exp.TemporaryProperty
            and not statement.args.get("replace")
        ):
            raise _refuse(UNIT_TABLE, "expected CREATE TEMPORARY TABLE ... AS SELECT")
    check_select(UNIT_TABLE, statement.expression, SOURCE_VIEWS)
    return statement


def _rendered(name: str, tree: exp.Expr, dialect: str) -> str:
    """SQL text of ``tree`` that parses back to one statement of the same kind."""
    sql = tree.sql(dialect=dialect)
    try:
        again = [s for s in sqlglot.parse(sql, read=dialect) if s is not None]
    except ParseError:
        raise _refuse(name, "its SQL does not parse back") from None
    if len(again) != 1 or type(again[0]) is not type(tree):
        raise _refuse(name, "its SQL does not parse back to one statement of the same kind")
    return sql


def checked_statements(compiled: CompiledRun, dialect: str) -> list[tuple[str, str]]:
    """Every statement of ``compiled`` in execution order as (name, SQL), all checked."""
    store = check_materialisation(compiled.materialise(dialect), dialect)
    out = [(UNIT_TABLE, _rendered(UNIT_TABLE, store, dialect))]
    names: set[str] = set()
    for name, query in compiled.results:
        if name in names or name == UNIT_TABLE:
            raise _refuse(name, "result names must be unique")
        names.add(name)
        check_select(name, query, frozenset({UNIT_TABLE}))
        out.append((name, _rendered(name, query, dialect)))
    return out
