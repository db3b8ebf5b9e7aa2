"""Loading the shared metric library (``metric_defs/*.toml``)."""

from __future__ import annotations

import math
import re
from pathlib import Path

from metricforge.compile.expressions import parse_expression
from metricforge.errors import SpecError, closest
from metricforge.schema import EVENT_COLUMNS, EVENT_TYPES
from metricforge.spec.model import PER_UNIT_KINDS, Direction, Kind, MetricDef, Origin
from metricforge.spec.tomlfile import Section, TomlFile, read_toml

NAME = re.compile(r"^[a-z][a-z0-9_]{0,62}$")
MAX_TERMS = 50
MAX_PARTS = 500  # per-unit parts a ratio or composite expands to in the compiled SQL
MAX_NESTING = 10  # ratio parts and composite terms built of other metrics, level upon level
_COMMON = {"kind", "direction", "unit_label", "description"}
_KEYS: dict[Kind, set[str]] = {
    Kind.COUNT: _COMMON | {"event", "where"},
    Kind.SUM: _COMMON | {"event", "where", "value"},
    Kind.MEAN: _COMMON | {"event", "where", "value"},
    Kind.PROPORTION: _COMMON | {"event", "where"},
    Kind.RATIO: _COMMON | {"numerator", "denominator"},
    Kind.DWELL_SUCCESS: _COMMON | {"where", "threshold_s"},
    Kind.COMPOSITE: _COMMON | {"terms"},
    Kind.QUANTILE: _COMMON | {"event", "where", "value", "q"},
}
# Kinds whose per-unit value (a ratio's numerator) may be capped with `winsorise`.
WINSORISED_KINDS = (Kind.COUNT, Kind.SUM, Kind.MEAN, Kind.RATIO, Kind.COMPOSITE)
for _kind in WINSORISED_KINDS:
    _KEYS[_kind] = _KEYS[_kind] | {"winsorise"}


def definition_files(paths: tuple[Path, ...]) -> list[Path]:
    """The TOML files named by ``paths``: files as given, folders' *.toml sorted."""
    files: list[Path] = []
    for path in paths:
        if path.is_dir():
            files.extend(sorted(p for p in path.glob("*.toml") if p.is_file()))
        else:
            files.append(path)
    return files


def load_library(paths: tuple[Path, ...]) -> dict[str, MetricDef]:
    """Every metric defined in ``paths``, checked for references and cycles."""
    library: dict[str, MetricDef] = {}
    files = definition_files(paths)
    if not files:
        raise SpecError("no metric definition files found", file=", ".join(map(str, paths)))
    for path in files:
        toml = read_toml(path)
        extra = set(toml.data) - {"metric"}
        if extra:
            key = sorted(extra)[0]
            raise toml.error("unknown top-level key", key, suggestion=closest(key, ["metric"]))
        metrics = Section(toml, ("metric",), toml.data.get("metric", {}))
        for name in metrics.table:
            if not NAME.match(name):
                raise toml.error(
                    "a metric name is 1 to 63 lower-case letters, digits or _,"
                    " starting with a letter",
                    "metric",
                    name,
                )
            if name in library:
                first = library[name].origin.file
                raise toml.error(f"metric is already defined in {first}", "metric", name)
            library[name] = _load_metric(toml, name)
    for metric in library.values():
        _check_references(metric, library)
    _check_graph(library)
    return library


def _load_metric(toml: TomlFile, name: str) -> MetricDef:
    sec = Section(toml, ("metric", name), toml.data["metric"][name])
    kind = sec.choice("kind", Kind, "metric kind")
    sec.check_keys(_KEYS[kind])
    direction = sec.choice("direction", Direction, "direction", default="higher")
    origin = Origin(toml.name, toml.line_of("metric", name, "kind"))
    fields: dict[str, object] = {}
    if kind in (Kind.COUNT, Kind.SUM, Kind.MEAN, Kind.PROPORTION, Kind.QUANTILE):
        events = tuple(sec.str_list("event", []))
        for event in events:
            if event not in EVENT_TYPES:
                raise sec.error(
                    f"unknown event type '{event}'", "event", suggestion=closest(event, EVENT_TYPES)
                )
        fields["events"] = events
    if sec.has("where"):
        text = sec.text("where")
        fields["where_text"] = text
        fields["where"] = parse_expression(
            text,
            columns=EVENT_COLUMNS,
            file=toml.name,
            key=f"metric.{name}.where",
            line=toml.line_of("metric", name, "where"),
            expect="boolean",
        )
    if kind in (Kind.SUM, Kind.MEAN, Kind.QUANTILE):
        text = sec.req_str("value")
        tree = parse_expression(
            text,
            columns=EVENT_COLUMNS,
            file=toml.name,
            key=f"metric.{name}.value",
            line=toml.line_of("metric", name, "value"),
            expect="number",
        )
        fields["value_text"] = text
        fields["value"] = tree
    if kind is Kind.RATIO:
        fields["numerator"] = sec.req_str("numerator")
        fields["denominator"] = sec.req_str("denominator")
    if kind is Kind.DWELL_SUCCESS:
        threshold = sec.number("threshold_s", 30.0)
        if not 0 < threshold <= 86_400:
            raise sec.error("threshold_s must be in (0, 86400] seconds", "threshold_s")
        fields["threshold_s"] = threshold
    if kind is Kind.QUANTILE:
        q = sec.number("q")
        if q is None:
            raise sec.error("required key is missing: the quantile's level, e.g. q = 0.95", "q")
        if not 0 < q < 1:
            raise sec.error("q must lie strictly between 0 and 1", "q")
        fields["q"] = q
    if sec.has("winsorise"):
        level = sec.number("winsorise")
        if not 0.5 <= level < 1:
            raise sec.error(
                "winsorise is the quantile to cap at, between 0.5 and 1 (e.g. 0.999)", "winsorise"
            )
        fields["winsorise"] = level
    if kind is Kind.COMPOSITE:
        terms = sec.sub("terms")
        if not terms.table:
            raise terms.error("a composite needs at least one term")
        parsed: list[tuple[str, float]] = []
        if len(terms.table) > MAX_TERMS:
            raise terms.error(f"a composite has at most {MAX_TERMS} terms")
        for term in terms.table:
            weight = terms.number(term)
            if not (math.isfinite(weight) and abs(weight) <= 1e12):
                raise terms.error("a weight must be a finite number of size at most 1e12", term)
            parsed.append((term, weight))
        fields["terms"] = tuple(parsed)
    return MetricDef(
        name=name,
        kind=kind,
        origin=origin,
        direction=direction,
        unit_label=sec.text("unit_label", "") or "",
        description=sec.text("description", "") or "",
        raw=dict(sec.table),
        **fields,  # type: ignore[arg-type]
    )


def _check_references(metric: MetricDef, library: dict[str, MetricDef]) -> None:
    key = {"ratio": "numerator", "composite": "terms"}.get(metric.kind.value, "")
    for dep in metric.dependencies():
        where = f"metric.{metric.name}.{key}"
        if dep not in library:
            raise SpecError(
                f"unknown metric '{dep}'",
                file=metric.origin.file,
                line=metric.origin.line,
                key=where,
                suggestion=closest(dep, library),
            )
        if library[dep].kind not in PER_UNIT_KINDS:
            raise SpecError(
                f"'{dep}' is a {library[dep].kind.value} metric; ratio parts and composite terms"
                " must be count, sum, proportion or composite",
                file=metric.origin.file,
                line=metric.origin.line,
                key=where,
            )


def _check_graph(library: dict[str, MetricDef]) -> None:
    """No cycles, at most MAX_NESTING levels, and a bounded compiled size per metric.

    Each metric is visited once (memoised), so a library shaped as a wide diamond of
    composites cannot make this check, or the compiled SQL, grow exponentially.
    """
    depth: dict[str, int] = {}
    size: dict[str, int] = {}

    def fail(message: str, first: str) -> SpecError:
        metric = library[first]
        return SpecError(
            message, file=metric.origin.file, line=metric.origin.line, key=f"metric.{first}"
        )

    def visit(name: str, trail: tuple[str, ...]) -> None:
        if name in trail:
            cycle = " -> ".join((*trail, name))
            raise fail(f"metrics refer to each other in a cycle: {cycle}", trail[0])
        if name not in depth:
            deps = library[name].dependencies()
            for dep in deps:
                visit(dep, (*trail, name))
            depth[name] = 1 + max((depth[d] for d in deps), default=0)
            size[name] = sum(size[d] for d in deps) if deps else 1
        first = trail[0] if trail else name
        if len(trail) + depth[name] > MAX_NESTING + 1:
            raise fail(
                f"metrics are built of other metrics more than {MAX_NESTING} levels deep", first
            )
        if size[name] > MAX_PARTS:
            raise fail(f"metric expands to more than {MAX_PARTS} per-unit parts", name)

    for name in library:
        visit(name, ())
