"""Property tests: compiled SQL against an independent evaluation; loaders under fuzzing.

1. Random valid metric libraries (count, sum, mean, proportion, ratio, composite; random
   `where` filters and values from a grammar of whitelisted constructs) over random small
   logs give the same per-variant statistics through the compiled SQL on DuckDB as a plain
   Python evaluation of the definitions' meaning (tests/expression_model.py).
2. Random malformed TOML, specs, definitions and filter files make the loaders raise only
   the project's own errors (MetricforgeError), never anything else.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import shutil
import statistics
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from metricforge.compile.query import render
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.errors import MetricforgeError
from metricforge.runner import execute
from metricforge.sample import EVENT_SCHEMA, EXPOSURE_SCHEMA
from metricforge.spec import load_plan
from metricforge.spec.filters import load_filter
from metricforge.spec.metrics import load_library
from metricforge.spec.tomlfile import read_toml
from tests.conftest import ROOT, SPEC, T0
from tests.expression_model import Node, bool_nodes, evaluate, number_nodes, quarters, sql
from tests.hostile_env import toml_str

EVENTS = ("impression", "click", "purchase", "page_load")
BOT_TOKENS = ("bot", "crawler", "spider", "headless")  # bots@1
AGENTS = ("Mozilla/5.0", "Mozilla/5.0 (X11)", "Googlebot/2.1", "HeadlessChrome", None)
WINDOW = dt.timedelta(days=14)

# -- random libraries ------------------------------------------------------------------------


@st.composite
def libraries(draw: st.DrawFn) -> dict[str, dict[str, Any]]:
    """name -> definition; bases first, then optional ratio and composite of them."""
    out: dict[str, dict[str, Any]] = {}
    for i in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["count", "sum", "mean", "proportion"]))
        metric: dict[str, Any] = {
            "kind": kind,
            "event": draw(st.lists(st.sampled_from(EVENTS), max_size=2, unique=True)),
            "where": draw(st.none() | bool_nodes(2)),
        }
        if kind in ("sum", "mean"):
            metric["value"] = draw(number_nodes(1))
        out[f"m{i}"] = metric
    parts = [n for n, m in out.items() if m["kind"] != "mean"]
    if parts and draw(st.booleans()):
        terms = draw(st.lists(st.sampled_from(parts), min_size=1, max_size=3, unique=True))
        weights = draw(st.lists(quarters, min_size=len(terms), max_size=len(terms)))
        out["mix"] = {"kind": "composite", "terms": dict(zip(terms, weights, strict=True))}
        parts.append("mix")
    if parts and draw(st.booleans()):
        out["rate"] = {
            "kind": "ratio",
            "numerator": draw(st.sampled_from(parts)),
            "denominator": draw(st.sampled_from(parts)),
        }
    return out


def library_toml(library: dict[str, dict[str, Any]]) -> str:
    lines = []
    for name, m in library.items():
        lines.append(f"[metric.{name}]\nkind = {toml_str(m['kind'])}")
        if m.get("event"):
            lines.append(f"event = {json.dumps(m['event'])}")
        if m.get("where") is not None:
            lines.append(f"where = {toml_str(sql(m['where']))}")
        if "value" in m:
            lines.append(f"value = {toml_str(sql(m['value']))}")
        if "terms" in m:
            terms = ", ".join(f"{k} = {v!r}" for k, v in m["terms"].items())
            lines.append(f"terms = {{ {terms} }}")
        for key in ("numerator", "denominator"):
            if key in m:
                lines.append(f"{key} = {toml_str(m[key])}")
    return "\n".join(lines) + "\n"


# -- random logs -----------------------------------------------------------------------------


@st.composite
def logs(draw: st.DrawFn) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    events: list[dict[str, Any]] = []
    exposures: list[dict[str, Any]] = []
    for i in range(draw(st.integers(4, 10))):
        unit, arm = f"u{i:02d}", ("control", "treatment")[i % 2]
        first = T0 + dt.timedelta(minutes=draw(st.integers(0, 600)))
        exposures.append({"unit_id": unit, "experiment": "case", "variant": arm, "ts": first})
        if i >= 4 and draw(st.integers(0, 5)) == 0:  # seen in both variants: left out
            other = ("treatment", "control")[i % 2]
            exposures.append(
                {**exposures[-1], "variant": other, "ts": first + dt.timedelta(hours=1)}
            )
        agents = AGENTS[:2] if i < 4 else AGENTS  # two analysable units per variant at least
        for _ in range(draw(st.integers(1 if i < 4 else 0, 6))):
            offset = draw(st.integers(-200, 14 * 24 * 60 + 200))
            events.append(
                {
                    "ts": first + dt.timedelta(minutes=offset),
                    "cookie_id": unit,
                    "session_id": f"s-{unit}-{draw(st.integers(0, 1))}",
                    "event": draw(st.sampled_from(EVENTS)),
                    "value": draw(st.none() | quarters),
                    "latency_ms": draw(st.none() | quarters.map(abs)),
                    "user_agent": draw(st.sampled_from(agents)),
                    "device": draw(st.sampled_from(["mobile", "desktop", "tablet", None])),
                    "country": draw(st.sampled_from(["de", "fr", "us", None])),
                    "page": draw(st.sampled_from(["home", "checkout", "cart", None])),
                }
            )
    return events, exposures


# -- the independent evaluation -----------------------------------------------------------------


def per_unit(
    library: dict[str, dict[str, Any]], name: str, rows: list[dict[str, Any]]
) -> float | None:
    m = library[name]
    if m["kind"] == "composite":
        return sum(w * (per_unit(library, t, rows) or 0.0) for t, w in m["terms"].items())

    def matches(row: dict[str, Any]) -> bool:
        if m["event"] and row["event"] not in m["event"]:
            return False
        return m["where"] is None or evaluate(m["where"], row) is True

    hits = [r for r in rows if matches(r)]
    if m["kind"] == "count":
        return float(len(hits))
    if m["kind"] == "proportion":
        return 1.0 if hits else 0.0
    values = [v for v in (evaluate(m["value"], r) for r in hits) if v is not None]
    if m["kind"] == "sum":
        return float(sum(values))
    return sum(values) / len(values) if values else None


def expected(
    library: dict[str, dict[str, Any]],
    events: list[dict[str, Any]],
    exposures: list[dict[str, Any]],
) -> dict[str, dict[str, dict[str, float]]]:
    """metric -> variant -> n, mean_x (and mean_y for ratios), var_x."""
    analysed: dict[str, list[list[dict[str, Any]]]] = {"control": [], "treatment": []}
    for unit in sorted({e["unit_id"] for e in exposures}):
        mine = [e for e in exposures if e["unit_id"] == unit]
        if len({e["variant"] for e in mine}) > 1:
            continue
        first = min(e["ts"] for e in mine)
        rows = [e for e in events if e["cookie_id"] == unit and first <= e["ts"] < first + WINDOW]
        agents = [(r["user_agent"] or "").lower() for r in rows if r["user_agent"] is not None]
        if any(token in agent for agent in agents for token in BOT_TOKENS):
            continue
        analysed[mine[0]["variant"]].append(rows)
    out: dict[str, dict[str, dict[str, float]]] = {}
    for name, m in library.items():
        out[name] = {}
        for variant, units in analysed.items():
            if m["kind"] == "ratio":
                xs = [per_unit(library, m["numerator"], rows) or 0.0 for rows in units]
                ys = [per_unit(library, m["denominator"], rows) or 0.0 for rows in units]
                out[name][variant] = {
                    "n": len(xs),
                    "mean_x": statistics.fmean(xs),
                    "mean_y": statistics.fmean(ys),
                }
                continue
            xs = [x for x in (per_unit(library, name, rows) for rows in units) if x is not None]
            stats = {"n": len(xs)}
            if xs:
                stats["mean_x"] = statistics.fmean(xs)
                stats["var_x"] = statistics.variance(xs) if len(xs) > 1 else 0.0
            out[name][variant] = stats
    return out


def run_through_sql(
    folder: Path,
    library: dict[str, dict[str, Any]],
    events: list[dict[str, Any]],
    exposures: list[dict[str, Any]],
) -> dict[str, dict[str, Any]]:
    defs = folder / "defs"
    defs.mkdir()
    shutil.copytree(ROOT / "metric_defs" / "filters", defs / "filters")
    (defs / "lib.toml").write_text(library_toml(library), encoding="utf-8")
    (folder / "events").mkdir()
    pq.write_table(
        pa.Table.from_pylist(events, schema=EVENT_SCHEMA), folder / "events" / "part-0.parquet"
    )
    pq.write_table(
        pa.Table.from_pylist(exposures, schema=EXPOSURE_SCHEMA), folder / "exposures.parquet"
    )
    names = list(library)
    spec = folder / "spec.toml"
    spec.write_text(
        SPEC.format(defs=defs.as_posix(), decision=names[0], diagnostics=json.dumps(names[1:])),
        encoding="utf-8",
    )
    data = execute(load_plan(spec), DuckDBEngine(threads=1))
    return {name: {v: data.moments[name][v] for v in ("control", "treatment")} for name in names}


def check_library(
    library: dict[str, dict[str, Any]],
    events: list[dict[str, Any]],
    exposures: list[dict[str, Any]],
) -> None:
    want = expected(library, events, exposures)
    with tempfile.TemporaryDirectory() as tmp:
        got = run_through_sql(Path(tmp), library, events, exposures)
    for name, by_variant in want.items():
        for variant, stats in by_variant.items():
            moments = got[name][variant]
            assert moments.n == stats["n"], (name, variant)
            for key in ("mean_x", "mean_y", "var_x"):
                if key in stats:
                    assert getattr(moments, key) == pytest.approx(stats[key], rel=1e-9, abs=1e-9), (
                        name,
                        variant,
                        key,
                    )


def _engine_settings(examples: int) -> settings:
    checks = [HealthCheck.too_slow, HealthCheck.data_too_large]
    return settings(max_examples=examples, deadline=None, suppress_health_check=checks)


@_engine_settings(15)
@given(libraries(), logs())
def test_compiled_sql_matches_independent_evaluation(
    library: dict[str, dict[str, Any]], data: tuple[list[dict[str, Any]], list[dict[str, Any]]]
) -> None:
    check_library(library, *data)


@pytest.mark.slow
@_engine_settings(120)
@given(libraries(), logs())
def test_compiled_sql_matches_independent_evaluation_many(
    library: dict[str, dict[str, Any]], data: tuple[list[dict[str, Any]], list[dict[str, Any]]]
) -> None:
    check_library(library, *data)


def test_evaluator_follows_sql_null_rules() -> None:
    """The evaluator's NULL rules, on one row, as SQL defines them."""
    row: dict[str, Any] = {"device": None, "value": 2.5, "country": "de"}
    unknown: Node = ("cmp", "=", ("col", "device"), ("str", "mobile"))
    assert evaluate(unknown, row) is None
    assert (
        evaluate(("logic", "OR", unknown, ("cmp", ">", ("col", "value"), ("num", 1.0))), row)
        is True
    )
    assert (
        evaluate(("logic", "AND", unknown, ("cmp", ">", ("col", "value"), ("num", 1.0))), row)
        is None
    )
    assert evaluate(("not", unknown), row) is None
    assert evaluate(("greatest", ("col", "latency_ms"), ("num", -1.0)), row) == -1.0
    assert evaluate(("like", "ILIKE", ("col", "country"), "D_"), row) is True
    assert math.isfinite(evaluate(("abs", ("neg", ("col", "value"))), row))


# -- loaders under fuzzing --------------------------------------------------------------------

scalars = st.one_of(
    st.sampled_from([0, -1, 10**9, 10**15, 2**63, -(2**63), 10**400]),
    st.integers(),
    st.integers(-(10**20), 10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.booleans(),
    st.dates(),
    st.datetimes(timezones=st.none() | st.just(dt.UTC)),
)
values = st.one_of(
    scalars,
    st.recursive(
        scalars,
        lambda inner: (
            st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3)
        ),
        max_leaves=6,
    ),
)


def toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return toml_str(value)
    if isinstance(value, float):
        return (
            "nan"
            if math.isnan(value)
            else ("inf" if value > 0 else "-inf")
            if math.isinf(value)
            else repr(value)
        )
    if isinstance(value, dt.datetime):
        return value.isoformat()
    if isinstance(value, dt.date | int):
        return value.isoformat() if isinstance(value, dt.date) else str(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return "{ " + ", ".join(f"{toml_str(k)} = {toml_value(v)}" for k, v in value.items()) + " }"


def toml_tables(tables: dict[str, dict[str, Any]]) -> str:
    out = []
    for name, table in tables.items():
        out.append(f"[{name}]")
        out += [f"{toml_str(k)} = {toml_value(v)}" for k, v in table.items()]
    return "\n".join(out) + "\n"


@st.composite
def _mutate(draw: st.DrawFn, base: dict[str, Any], keys: list[str]) -> dict[str, Any]:
    out = dict(base)
    for key in draw(st.lists(st.sampled_from(keys), max_size=2, unique=True)):
        if draw(st.integers(0, 4)):
            out[key] = draw(values)
        else:
            out.pop(key, None)
    return out


def mutated(base: dict[str, Any], keys: list[str]) -> st.SearchStrategy[dict[str, Any]]:
    """``base`` with up to two of ``keys`` set to random values or dropped."""
    return _mutate(base, keys)


SPEC_KEYS = [
    "name",
    "unit",
    "control",
    "variants",
    "start",
    "end",
    "window_days",
    "pre_period_days",
    "alpha",
    "srm_alpha",
    "bot_filter",
    "typo",
]
GOOD_EXPERIMENT = {
    "name": "case",
    "window_days": 14,
    "alpha": 0.05,
    "unit": "cookie_id",
    "control": "control",
    "variants": {"control": 50, "treatment": 50},
    "start": dt.datetime(2026, 9, 15, tzinfo=dt.UTC),
    "end": dt.datetime(2026, 9, 29, tzinfo=dt.UTC),
    "bot_filter": "bots@1",
}


def _expect_own_errors(action: Any) -> None:
    try:
        action()
    except MetricforgeError as err:
        assert "\n" not in err.one_line()


@settings(max_examples=80, deadline=None)
@given(st.text(max_size=300))
def test_random_text_as_any_file_raises_only_our_errors(text: str) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "x.toml"
        path.write_text(text, encoding="utf-8")
        _expect_own_errors(lambda: read_toml(path))
        _expect_own_errors(lambda: load_library((path,)))
        _expect_own_errors(lambda: load_plan(path))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    mutated(GOOD_EXPERIMENT, SPEC_KEYS),
    mutated(
        {"events": "events", "exposures": "x.parquet"},
        ["events", "exposures", "definitions", "filters"],
    ),
    mutated({"decision": "revenue"}, ["decision", "guardrails", "diagnostics"]),
)
def test_random_specs_raise_only_our_errors(
    experiment: dict[str, Any], data: dict[str, Any], metrics: dict[str, Any]
) -> None:
    data = {**data, "definitions": data.get("definitions", [str(ROOT / "metric_defs")])}
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "spec.toml"
        path.write_text(
            toml_tables({"experiment": experiment, "data": data, "metrics": metrics}),
            encoding="utf-8",
        )
        _expect_own_errors(lambda: [render(load_plan(path), d) for d in ("duckdb", "spark")])


METRIC_KEYS = [
    "kind",
    "event",
    "where",
    "value",
    "numerator",
    "denominator",
    "terms",
    "threshold_s",
    "direction",
    "unit_label",
]
KINDS = st.sampled_from(
    ["count", "sum", "mean", "proportion", "ratio", "composite", "dwell_success", "quantile"]
)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(
        st.tuples(
            st.sampled_from(["a", "b", "revenue", "A b", ""]), KINDS, mutated({}, METRIC_KEYS)
        ),
        max_size=4,
    )
)
def test_random_definitions_raise_only_our_errors(
    metrics: list[tuple[str, str, dict[str, Any]]],
) -> None:
    tables = {f"metric.{toml_str(name)}": {"kind": kind, **body} for name, kind, body in metrics}
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "defs.toml"
        try:
            path.write_text(toml_tables(tables), encoding="utf-8")
        except UnicodeEncodeError:
            return  # lone surrogates cannot be written as UTF-8: not a file anyone can have
        _expect_own_errors(lambda: load_library((path,)))


RULE_KEYS = ["kind", "tokens", "max", "description"]


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(mutated({"kind": "user_agent", "tokens": ["bot"]}, RULE_KEYS), max_size=3),
    mutated({"name": "bots", "version": 7}, ["name", "version", "description"]),
    st.sampled_from(["7", "x", "07", "99999999999"]),
)
def test_random_filters_raise_only_our_errors(
    rules: list[dict[str, Any]], top: dict[str, Any], version: str
) -> None:
    body = "\n".join(f"{toml_str(k)} = {toml_value(v)}" for k, v in top.items()) + "\n"
    for rule in rules:
        body += (
            "[[rule]]\n"
            + "\n".join(f"{toml_str(k)} = {toml_value(v)}" for k, v in rule.items())
            + "\n"
        )
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        try:
            (folder / "bots-v7.toml").write_text(body, encoding="utf-8")
        except UnicodeEncodeError:
            return
        import hashlib

        sha = hashlib.sha256(body.encode()).hexdigest()
        (folder / "released.toml").write_text(
            f'[bots."{version}"]\nsha256 = "{sha}"\nreleased = "2026-01-01"\n'
        )
        _expect_own_errors(lambda: load_filter(folder, "bots@7", spec_file="spec.toml"))
