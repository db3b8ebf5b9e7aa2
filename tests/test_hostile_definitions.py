"""Hostile metric definitions, run through `metricforge run`.

Each one is refused with one line naming the file, the key and the reason; the canary
outside the data folder is never read (its content is in no output or error) and nothing
is written anywhere (the whole test folder, including the process's temporary folder, is
unchanged). A few are legitimately harmless and are shown to be: they run, and what looked
like SQL stays a string literal.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import sqlglot.expressions as exp

from metricforge.compile.query import compile_plan
from metricforge.spec import load_plan
from tests.hostile_env import (
    CANARY,
    Env,
    assert_harmless,
    assert_rejected,
    setup_env,
    snapshot,
    toml_str,
)


@pytest.fixture
def env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Env:
    return setup_env(tmp_path, monkeypatch)


# (id, expression, needle). {canary}, {canary_parquet} and {elsewhere} are filled in.
WHERE_CASES = [
    ("read_text", "read_text('{canary}') IS NOT NULL", "function 'read_text' is not allowed"),
    ("read_csv", "read_csv('{canary}') IS NOT NULL", "function 'read_csv' is not allowed"),
    ("read_parquet", "read_parquet('{canary_parquet}') IS NULL", "'read_parquet' is not allowed"),
    ("quoted_reader", "\"read_text\"('{canary}') IS NOT NULL", "'read_text' is not allowed"),
    ("quoted_glob", "\"glob\"('{canary}') IS NULL", "function 'glob' is not allowed"),
    ("subquery", "(SELECT content FROM read_text('{canary}')) = 'x'", "Subquery"),
    ("in_subquery", "device IN (SELECT content FROM read_text('{canary}'))", "list of literals"),
    ("exists_file", "EXISTS (SELECT * FROM '{canary}')", "not allowed"),
    ("scalar_from_file", "device = (FROM '{canary_parquet}' SELECT secret)", "not allowed"),
    ("copy_after", "device = 'a'; COPY (SELECT 1) TO '{elsewhere}'", "several statements"),
    ("copy_alone", "COPY events TO '{elsewhere}'", "not allowed"),
    ("attach", "ATTACH '{elsewhere}' AS other", "not allowed"),
    ("install", "INSTALL httpfs", "not allowed"),
    ("load", "LOAD httpfs", "not allowed"),
    ("pragma", "PRAGMA version", "not allowed"),
    ("set_setting", "SET enable_external_access = true", "not allowed"),
    ("line_comment", "device = 'a' -- '; COPY events TO '{elsewhere}'", "comments"),
    ("block_comment", "device = 'a' /* ; ATTACH '{elsewhere}' */", "comments"),
    ("union", "device = 'a' UNION SELECT content FROM read_text('{canary}')", "not allowed"),
    ("current_setting", "current_setting('allowed_directories') = ''", "'current_setting'"),
    ("getenv", "getenv('HOME') = ''", "function 'getenv' is not allowed"),
    ("settings_table", "device IN (SELECT value FROM duckdb_settings())", "list of literals"),
    ("lambda_filter", "len(list_filter(range(100000000), x -> x > 0)) > 0", "not allowed"),
    ("python_lambda", "len(list_transform(range(9), lambda x: x)) > 0", "not allowed"),
    ("range_explosion", "len(range(1000000000)) > 0", "not allowed"),
    ("unnest_rows", "unnest(range(1000000)) > 0", "not allowed"),
    ("generate_series", "value IN (SELECT * FROM generate_series(1, 1000000000))", "literals"),
    ("repeat_string", "length(repeat(device, 1000000000)) > 0", "'repeat' is not allowed"),
    ("concat_chain", "length(device || device || device) > 0", "DPipe"),
    ("implicit_concat", "device = 'a' 'b'", "'concat' is not allowed"),
    ("deep_nesting", "(" * 300 + "device = 'a'" + ")" * 300, "nested"),
    ("huge_string", "device = '" + "x" * 1900 + "'", "literal longer than 500"),
    ("long_text", "device = 'a' OR " * 200 + "device = 'b'", "longer than 2000"),
    ("huge_number", "value > 1e400", "out of range"),
    ("many_digits", "value > 1" + "0" * 40, "longer than 30"),
    ("cast_blob", "CAST(device AS BLOB) IS NULL", "cast to"),
    ("cast_struct", "CAST(value AS STRUCT(a INT)) IS NULL", "cast to"),
    ("cast_json", "device::JSON IS NULL", "cast to"),
    ("qualified", "events.device = 'x'", "bare column"),
    ("catalog_qualified", "memory.main.events.device = 'x'", "bare column"),
    ("bracket", "device[1] = 'a'", "Bracket"),
    ("placeholder", "device = ?", "Placeholder"),
    ("dollar_param", "device = $1", "Placeholder"),
    ("star", "* IS NOT NULL", "not allowed"),
    ("collate", "device COLLATE NOCASE = 'a'", "'collate' is not allowed"),
    ("like_wildcards", "device LIKE '%a%b%c%d%e%f%g%h%i%j%k%'", "at most 10 wildcards"),
    ("like_column_pattern", "device LIKE page", "pattern must be a string literal"),
    ("like_escape", "device LIKE 'a!%' ESCAPE '!'", "Escape"),
    ("similar_to", "device SIMILAR TO '(a+)+$'", "SimilarTo"),
    ("regex_operator", "device ~ '(a+)+b'", "'regexp_like' is not allowed"),
    ("regexp_function", "regexp_matches(device, '(a+)+b')", "not allowed"),
    ("aggregate", "sum(value) > 0", "function 'sum' is not allowed"),
    ("window", "row_number() OVER () > 0", "not allowed"),
    ("homoglyph", "l\u043ewer(device) = 'a'", "not allowed"),
    ("control_char", "device = 'a\u0000'", "control character"),
    ("extra_argument", "length(device, device) = 1", "'binary'"),
    ("between_symmetric", "value BETWEEN SYMMETRIC 1 AND 2", "'symmetric'"),
    ("round_digits", "round(value, 999999999) > 1", "round's digits"),
    ("not_a_condition", "device", "must be a condition"),
    ("type_confusion", "value > 'x'", "cannot compare a number with a string"),
]


@pytest.mark.parametrize(
    ("text", "needle"), [c[1:] for c in WHERE_CASES], ids=[c[0] for c in WHERE_CASES]
)
def test_hostile_where_is_refused(env: Env, text: str, needle: str) -> None:
    where = text.format(
        canary=env.canary, canary_parquet=env.canary_parquet, elsewhere=env.root / "stolen.db"
    )
    env.define(f'[metric.hostile]\nkind = "count"\nevent = "purchase"\nwhere = {toml_str(where)}\n')
    before = snapshot(env.root)
    result = env.run()
    assert_rejected(env, result, ["hostile.toml", "metric.hostile.where", needle], before)


VALUE_CASES = [
    ("read_text_value", "length(read_text('{canary}'))", "not allowed"),
    ("string_value", "device", "must be a number"),
    ("timestamp_value", "CAST(ts AS DOUBLE)", "cannot cast a timestamp"),
    ("list_value", "len(range(100000000))", "not allowed"),
]


@pytest.mark.parametrize(
    ("text", "needle"), [c[1:] for c in VALUE_CASES], ids=[c[0] for c in VALUE_CASES]
)
def test_hostile_value_is_refused(env: Env, text: str, needle: str) -> None:
    value = text.format(canary=env.canary)
    env.define(f'[metric.hostile]\nkind = "sum"\nevent = "purchase"\nvalue = {toml_str(value)}\n')
    before = snapshot(env.root)
    result = env.run()
    assert_rejected(env, result, ["hostile.toml", "metric.hostile.value", needle], before)


# Checked expressions that can still fail on a value of the data while the query runs.
FAILING_CASES = [
    ("cast_of_a_string", "value", "CAST(session_id AS DOUBLE)", "Could not convert string"),
    ("remainder_by_zero", "value", "CAST(value AS BIGINT) % 0", "Division by zero"),
    ("cast_overflow", "value", "CAST(value * 1e18 AS BIGINT)", "out of range"),
    ("cast_in_where", "where", "CAST(session_id AS BIGINT) > 0", "Could not convert string"),
]


@pytest.mark.parametrize(
    ("key", "text", "needle"), [c[1:] for c in FAILING_CASES], ids=[c[0] for c in FAILING_CASES]
)
def test_an_expression_failing_on_the_data_is_named(
    env: Env, key: str, text: str, needle: str
) -> None:
    """One line naming the definition file and the expression's key, without the data value
    that failed (the session ids hold unit ids) or advice that no definition can follow."""
    body = '[metric.hostile]\nkind = "sum"\nevent = "purchase"\n'
    if key == "value":
        body += f"value = {toml_str(text)}\n"
    else:
        body += f'value = "value"\nwhere = {toml_str(text)}\n'
    env.define(body)
    before = snapshot(env.root)
    result = env.run()
    assert result.exit_code == 2, result.output
    message = result.stderr.strip()
    assert len(message.splitlines()) == 1 and message.startswith("error: "), message
    for part in ("hostile.toml:", f"metric.hostile.{key}", "fails on a value of the data", needle):
        assert part in message, message
    assert "u000" not in message and "TRY(" not in message and "SET " not in message
    assert CANARY not in result.output
    # nothing written: the engine's private temporary folder came and went (only the
    # modification time of the process's temporary folder differs)
    assert not list((env.root / "systmp").iterdir())
    after = snapshot(env.root)
    assert {k: v for k, v in after.items() if k != "systmp"} == {
        k: v for k, v in before.items() if k != "systmp"
    }


def _literals(env: Env) -> list[str]:
    plan = load_plan(env.spec)
    run = compile_plan(plan)
    return [lit.this for lit in run.unit_rows.find_all(exp.Literal) if lit.is_string]


def test_sql_inside_a_string_stays_a_literal(env: Env) -> None:
    """Harmless: quotes, semicolons and SQL words inside a string literal are data."""
    trick = f"a'; COPY events TO '{env.root / 'stolen.csv'}'; --"
    env.define(
        "[metric.hostile]\n"
        'kind = "count"\n'
        'event = "purchase"\n'
        f"where = {toml_str('device <> ' + exp.Literal.string(trick).sql())}\n"
    )
    assert trick in _literals(env)
    before = snapshot(env.root)
    card = assert_harmless(env, env.run(), before)
    assert not (env.root / "stolen.csv").exists()
    assert card["metrics"][0]["n_units"] == 10


@pytest.mark.parametrize(
    "name",
    [
        "a; DROP TABLE events",
        "Revenue",
        "1st_metric",
        "r" * 64,
        "r\u00e9venue",
        'x"y',
        "",
        "x) AS y FROM events --",
    ],
    ids=["statement", "upper_case", "digit_first", "too_long", "unicode", "quote", "empty", "sql"],
)
def test_hostile_metric_name_is_refused(env: Env, name: str) -> None:
    env.define(
        f'[metric.{toml_str(name)}]\nkind = "count"\nevent = "purchase"\n',
        decision=name or "revenue",
    )
    before = snapshot(env.root)
    result = env.run()
    assert_rejected(env, result, ["hostile.toml", "a metric name is 1 to 63"], before)


def test_metric_name_of_63_characters_is_accepted(env: Env) -> None:
    name = "m" + "_x" * 31
    assert len(name) == 63
    env.define(f'[metric.{name}]\nkind = "count"\nevent = "purchase"\n', decision=name or "revenue")
    card = assert_harmless(env, env.run(), snapshot(env.root))
    assert card["metrics"][0]["metric"] == name
