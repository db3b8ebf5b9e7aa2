"""One run: plan → checked inputs → one scan of the events → sufficient statistics."""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa

from metricforge.adjustments import Extras, read_extras
from metricforge.compile.expressions import columns_of
from metricforge.compile.query import compile_plan, result_columns
from metricforge.data_errors import run_naming_failures
from metricforge.engines.base import Engine, EngineInputs
from metricforge.errors import InputDataError
from metricforge.inputs import (
    InputFile,
    Where,
    check_columns,
    fingerprint,
    inspect_all,
    parquet_files,
    within,
)
from metricforge.locations import StorageError, Uri, connect
from metricforge.locations import parquet_files as uri_parquet_files
from metricforge.partitions import event_window, exposure_window, inside_window, prune
from metricforge.provenance import Stamp, make_stamp
from metricforge.quality import summarise
from metricforge.schema import EVENT_COLUMNS, EXPOSURE_COLUMNS
from metricforge.spec.model import ExperimentSpec, MetricDef, Plan, RuleKind
from metricforge.spec.tomlfile import TomlFile
from metricforge.stats import Moments


@dataclass(frozen=True)
class VariantCounts:
    variant: str
    units: int  # analysed: not bots, not contaminated
    events: int
    bot_units: int
    bot_events: int
    contaminated_units: int

    @property
    def exposed(self) -> int:
        """Every unit with a first exposure, before the bot filter and contamination rules."""
        return self.units + self.bot_units + self.contaminated_units


@dataclass
class RunData:
    """What the engine returned, reshaped: per-variant moments of every metric."""

    plan: Plan
    stamp: Stamp
    inputs: list[InputFile]
    counts: dict[str, VariantCounts]
    moments: dict[str, dict[str, Moments]] = field(default_factory=dict)  # metric -> variant
    # Extra sections for manifest.json (how inputs were hashed, what a rerun started from).
    provenance: dict[str, Any] = field(default_factory=dict)
    tables: dict[str, pa.Table] = field(default_factory=dict)  # every result query's table
    extras: Extras = field(default_factory=Extras)  # caps, CUPED moments, quantile summaries
    quality: dict[str, Any] = field(default_factory=dict)  # the data_quality section


def needed_event_columns(plan: Plan) -> tuple[str, ...]:
    cols = {"ts", "event", "session_id", plan.spec.unit}  # sessions are the first grouping
    if plan.spec.stitch_to:
        cols.add(plan.spec.stitch_to)
    for metric in plan.metrics:
        for tree in (metric.where, metric.value):
            if tree is not None:
                cols |= columns_of(tree)
    if plan.spec.segments is not None:
        cols |= set(plan.spec.segments.by)
    for rule in plan.bot_filter.rules:
        if rule.kind is RuleKind.USER_AGENT:
            cols.add("user_agent")
        elif rule.kind is RuleKind.DENY_IP:
            cols.add("ip_hash")
    return tuple(c for c in EVENT_COLUMNS if c in cols)


def gather_inputs(
    plan: Plan, storage: Mapping[str, str] | None = None
) -> tuple[EngineInputs, list[InputFile]]:
    """The checked input files of a run and what its engine reads.

    ``storage``: the settings of remote file systems (Hadoop keys such as ``fs.s3a.endpoint``;
    see locations.py) for an engine that reads URIs; None for an engine that reads only
    local files (paths and ``file:`` URIs), which refuses remote data."""
    base = plan.spec.path.parent
    event_root = open_location(plan.spec, "events", storage)
    exposure_root = open_location(plan.spec, "exposures", storage)
    # only the date partitions that can hold rows of the analysis window (partitions.py)
    event_files = list_files(plan.spec, "events", event_root)
    event_paths = prune(event_files, *event_window(plan), folder=event_root)
    exposure_files = list_files(plan.spec, "exposures", exposure_root)
    exposure_paths = prune(exposure_files, *exposure_window(plan), folder=exposure_root)
    events = inspect_all(event_paths, base)
    exposures = inspect_all(exposure_paths, base)
    cols = needed_event_columns(plan)
    check_columns(events, {c: EVENT_COLUMNS[c] for c in cols}, "event")
    check_columns(exposures, dict(EXPOSURE_COLUMNS), "exposure")
    hive = any("=" in part for p in event_paths for part in _folders(p))
    engine_inputs = EngineInputs(
        _local(event_paths),
        _local(exposure_paths),
        cols,
        hive,
        event_uris=_uris(event_paths),
        exposure_uris=_uris(exposure_paths),
    )
    return engine_inputs, events + exposures


def _folders(path: Where) -> tuple[str, ...]:
    return path.segments if isinstance(path, Uri) else path.parts


def _local(paths: Sequence[Where]) -> list[Path]:
    """The files as local paths (those of ``file:`` URIs); none when the data is remote."""
    local = [p.local_path() if isinstance(p, Uri) else p for p in paths]
    return [p for p in local if p is not None]


def _uris(paths: Sequence[Where]) -> tuple[str, ...]:
    return tuple(p.spark for p in paths if isinstance(p, Uri))


def location_error(spec: ExperimentSpec, key: str, message: str) -> InputDataError:
    """An error about the data location ``[data] key``, naming the spec's line."""
    line = TomlFile(spec.path, spec.text, {}).line_of("data", key)
    return InputDataError(message, file=str(spec.path), line=line, key=f"data.{key}")


def open_location(spec: ExperimentSpec, key: str, storage: Mapping[str, str] | None) -> Path | Uri:
    """The spec's ``[data] key`` ready to list: a path, or a URI with its file system open."""
    root = spec.events_path if key == "events" else spec.exposures_path
    if not isinstance(root, Uri):
        return root
    if root.remote and storage is None:
        raise location_error(
            spec,
            key,
            f"{root.text} is not on this machine: the DuckDB engine reads only local paths"
            " and file:// URIs; run on Spark (metricforge run --engine spark)",
        )
    try:
        return connect(root, storage or {}, os.environ)
    except StorageError as err:
        raise location_error(spec, key, err.message) from None


def list_files(
    spec: ExperimentSpec, key: str, root: Path | Uri, *, absent_ok: bool = False
) -> list[Where]:
    """The Parquet files of an opened location (``open_location``); with ``absent_ok``,
    none when the location holds no data (but a file system that cannot be listed is
    still an error)."""
    if not isinstance(root, Uri):
        try:
            return list(parquet_files(root))
        except InputDataError:
            if absent_ok:
                return []
            raise
    try:
        return list(uri_parquet_files(root))
    except StorageError as err:
        if absent_ok and err.absent:
            return []
        raise location_error(spec, key, err.message) from None


def _f(value: object) -> float:
    return float("nan") if value is None else float(value)  # type: ignore[arg-type]


def execute(plan: Plan, engine: Engine) -> RunData:
    engine_inputs, files = gather_inputs(plan, engine.storage_settings())
    stamp = make_stamp(plan, fingerprint(files), engine.name, engine.version())
    # A scan bound on ts lets the engine skip row groups outside the window; when every
    # file read lies inside it (e.g. day partitions), the bound could skip nothing.
    # Remote data (no local paths) keeps the bound: its footers are not read a second time.
    remote = bool(engine_inputs.event_uris) and not engine_inputs.events
    bounded = remote or not inside_window(engine_inputs.events, *event_window(plan))
    compiled = compile_plan(plan, engine.dialect, ts_bounds=bounded)
    tables = run_naming_failures(plan, engine, compiled, engine_inputs)
    data = reshape(plan, stamp, files, tables["moments"])
    data.tables = tables
    data.extras = read_extras(plan, tables)
    data.quality = summarise(plan, engine_inputs, files, tables.get("data_quality"))
    return data


def reshape(plan: Plan, stamp: Stamp, files: list[InputFile], table: pa.Table) -> RunData:
    rows = table.to_pylist()
    spec = plan.spec
    exposures_file = next(
        (f.label for f in files if within(f.path, spec.exposures_path)),
        str(spec.exposures_path),
    )
    seen = {r["variant"] for r in rows}
    if not rows:
        raise InputDataError(
            f"no exposures of experiment '{spec.name}' between {spec.start} and {spec.end}",
            file=exposures_file,
            key="experiment",
        )
    unknown = sorted(seen - set(spec.variant_names))
    if unknown:
        raise InputDataError(
            f"variant '{unknown[0]}' is in the exposure log but not in the spec"
            f" {list(spec.variant_names)}",
            file=exposures_file,
            key="variant",
        )
    counts: dict[str, VariantCounts] = {}
    clean: dict[str, dict[str, object]] = {}
    for variant in spec.variant_names:
        mine = [r for r in rows if r["variant"] == variant]
        ok = [r for r in mine if not r["is_bot"] and not r["contaminated"]]
        bots = [r for r in mine if r["is_bot"]]
        counts[variant] = VariantCounts(
            variant=variant,
            units=sum(int(r["n_units"]) for r in ok),
            events=sum(int(r["n_events"] or 0) for r in ok),
            bot_units=sum(int(r["n_units"]) for r in bots),
            bot_events=sum(int(r["n_events"] or 0) for r in bots),
            contaminated_units=sum(
                int(r["n_units"]) for r in mine if r["contaminated"] and not r["is_bot"]
            ),
        )
        if not ok:
            raise InputDataError(
                f"variant '{variant}' has no analysable units (after the bot filter and"
                " removing units seen in two variants)",
                file=exposures_file,
                key="variant",
            )
        clean[variant] = ok[0]
    data = RunData(plan=plan, stamp=stamp, inputs=files, counts=counts)
    for name, _role in plan.reported:
        data.moments[name] = {v: row_moments(plan.metric(name), r) for v, r in clean.items()}
    return data


def row_moments(metric: MetricDef, row: dict[str, object]) -> Moments:
    """A metric's Moments from a row of the moments query (or a segment query)."""
    cols = result_columns(metric)
    n = int(row[cols.n] or 0)  # type: ignore[call-overload]
    if cols.successes is not None:
        return Moments.of_proportion(n, int(row[cols.successes] or 0))  # type: ignore[call-overload]
    var_x = _f(row[cols.var_x])
    if metric.is_ratio:
        assert cols.mean_y and cols.var_y and cols.cov_xy
        return Moments(
            n=n,
            mean_x=_f(row[cols.mean_x]),
            mean_y=_f(row[cols.mean_y]),
            var_x=var_x,
            var_y=_f(row[cols.var_y]),
            cov_xy=_f(row[cols.cov_xy]),
        )
    return Moments.of_mean(n, _f(row[cols.mean_x]), var_x if not math.isnan(var_x) else 0.0)


def events_root(path: Path) -> Path:
    return path if path.is_dir() else path.parent
