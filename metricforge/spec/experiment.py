"""Loading one experiment's analysis spec (``pipelines/<experiment>.toml``) into a Plan."""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

from metricforge.errors import SpecError, closest
from metricforge.locations import Uri, UriError, is_uri, parse_uri
from metricforge.schema import EVENT_COLUMNS
from metricforge.spec.filters import load_filter
from metricforge.spec.metrics import load_library
from metricforge.spec.model import ExperimentSpec, Factor, MetricDef, Plan, TwoVariantPolicy
from metricforge.spec.segments import load_segments
from metricforge.spec.sequential import load_sequential
from metricforge.spec.tomlfile import Section, TomlFile, read_toml

FIRST_YEAR, LAST_YEAR = 1970, 9000
MAX_WINDOW_DAYS = 366
MAX_VARIANTS = 20
MAX_NAME = 200


def _datetime(sec: Section, key: str) -> dt.datetime:
    value = sec.table.get(key)
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None:
            try:
                value = value.astimezone(dt.UTC).replace(tzinfo=None)
            except (OverflowError, ValueError):
                raise sec.error("date-time out of range", key) from None
    elif isinstance(value, dt.date):
        value = dt.datetime(value.year, value.month, value.day)
    elif value is None:
        raise sec.error("required key is missing", key)
    else:
        raise sec.error("expected a TOML date or date-time (UTC)", key)
    if not FIRST_YEAR <= value.year <= LAST_YEAR:
        raise sec.error(f"the year must be between {FIRST_YEAR} and {LAST_YEAR}", key)
    return value


def plain_name(sec: Section, key: str, value: str, limit: int = MAX_NAME) -> str:
    """``value`` if it is 1 to ``limit`` characters without control characters."""
    if not value or len(value) > limit or not value.isprintable():
        raise sec.error(f"must be 1 to {limit} printable characters (no control characters)", key)
    return value


def _data_path(sec: Section, key: str, base: Path) -> Path | Uri:
    """A data location: a path (relative to the spec's folder, or absolute) or a URI."""
    text = plain_name(sec, key, sec.req_str(key), 4096)
    if not is_uri(text):
        return base / text
    try:
        return parse_uri(text)
    except UriError as err:
        raise sec.error(err.message, key, suggestion=err.suggestion) from None


def _local_path(sec: Section, key: str, text: str, base: Path) -> Path:
    """A location of definitions or filters: always a path on this machine."""
    if is_uri(text):
        raise sec.error(
            "definitions and filters are read from local paths; URIs are accepted only for"
            " events and exposures",
            key,
        )
    return base / plain_name(sec, key, text, 4096)


def load_spec(path: Path) -> ExperimentSpec:
    toml = read_toml(path)
    top = Section(toml, (), toml.data)
    top.check_keys({"experiment", "data", "metrics", "factors", "segments", "sequential"})
    ex = top.sub("experiment")
    ex.check_keys(
        {
            "name",
            "description",
            "unit",
            "variants",
            "control",
            "start",
            "end",
            "window_days",
            "pre_period_days",
            "cuped",
            "alpha",
            "srm_alpha",
            "bot_filter",
            "stitch_to",
            "two_variant_units",
            "max_two_variant_share",
        }
    )
    data = top.sub("data")
    data.check_keys({"events", "exposures", "definitions", "filters"})
    met = top.sub("metrics")
    met.check_keys({"decision", "guardrails", "diagnostics", "guardrail_margins"})

    unit = ex.req_str("unit")
    ids = [c for c, t in EVENT_COLUMNS.items() if t == "string" and c.endswith("_id")]
    if unit not in EVENT_COLUMNS or EVENT_COLUMNS[unit] != "string":
        raise ex.error(
            f"unit must be an id column of the events, one of {ids}",
            "unit",
            suggestion=closest(unit, ids),
        )
    variants_sec = ex.sub("variants")
    variants: list[tuple[str, float]] = []
    if len(variants_sec.table) > MAX_VARIANTS:
        raise ex.error(f"at most {MAX_VARIANTS} variants", "variants")
    for name in variants_sec.table:
        plain_name(variants_sec, name, name, 100)
        share = variants_sec.number(name)
        if not (math.isfinite(share) and share > 0):
            raise variants_sec.error("planned share must be a positive number", name)
        variants.append((name, share))
    if len(variants) < 2:
        raise ex.error("an experiment needs at least two variants", "variants")
    total = sum(s for _, s in variants)
    control = ex.req_str("control")
    names = [v for v, _ in variants]
    if control not in names:
        raise ex.error(
            f"control '{control}' is not among the variants {names}",
            "control",
            suggestion=closest(control, names),
        )
    variants.sort(key=lambda v: (v[0] != control, names.index(v[0])))
    start, end = _datetime(ex, "start"), _datetime(ex, "end")
    if end <= start:
        raise ex.error("end must be after start", "end")
    window = ex.integer("window_days", 14)
    if not 1 <= window <= MAX_WINDOW_DAYS:
        raise ex.error(f"window_days must be between 1 and {MAX_WINDOW_DAYS}", "window_days")
    pre_days = ex.integer("pre_period_days", 0)
    if not 0 <= pre_days <= 366:
        raise ex.error("pre_period_days must be between 0 and 366", "pre_period_days")
    cuped = ex.flag("cuped")
    if cuped and pre_days == 0:
        raise ex.error("cuped needs a pre-period: set pre_period_days > 0", "cuped")
    alpha = ex.number("alpha", 0.05)
    srm_alpha = ex.number("srm_alpha", 0.001)
    for key, value in (("alpha", alpha), ("srm_alpha", srm_alpha)):
        if not 0 < value < 0.5:
            raise ex.error(f"{key} must be between 0 and 0.5", key)
    stitch_to = ex.text("stitch_to", None)
    if stitch_to is not None and (stitch_to not in ids or stitch_to in (unit, "session_id")):
        choices = [c for c in ids if c not in (unit, "session_id")]
        raise ex.error(
            f"stitch_to must be another id column of the events, one of {choices}",
            "stitch_to",
            suggestion=closest(stitch_to, choices),
        )
    two_variant = ex.choice(
        "two_variant_units", TwoVariantPolicy, "two_variant_units policy", default="exclude"
    )
    max_two_variant = ex.number("max_two_variant_share", 0.05)
    if not 0 <= max_two_variant <= 1:
        raise ex.error("max_two_variant_share must be between 0 and 1", "max_two_variant_share")
    base = path.parent

    decision = met.req_str("decision")
    guardrails = tuple(met.str_list("guardrails", []))
    diagnostics = tuple(met.str_list("diagnostics", []))
    seen: set[str] = set()
    for name in (decision, *guardrails, *diagnostics):
        if name in seen:
            raise met.error(f"metric '{name}' is listed twice", "guardrails")
        seen.add(name)
    margins = _margins(met, guardrails)
    factors = _factors(top.sub("factors"), control, names) if top.has("factors") else ()
    segments = load_segments(top.sub("segments"), unit) if top.has("segments") else None
    sequential = (
        load_sequential(top.sub("sequential"), (decision, *guardrails, *diagnostics))
        if top.has("sequential")
        else None
    )
    return ExperimentSpec(
        name=plain_name(ex, "name", ex.req_str("name")),
        description=ex.text("description", "") or "",
        path=path,
        sha256=toml.sha256,
        text=toml.text,
        unit=unit,
        variants=tuple((v, s / total) for v, s in variants),
        control=control,
        start=start,
        end=end,
        window_days=window,
        pre_period_days=pre_days,
        cuped=cuped,
        alpha=alpha,
        srm_alpha=srm_alpha,
        stitch_to=stitch_to,
        two_variant_units=two_variant,
        max_two_variant_share=max_two_variant,
        bot_filter_ref=ex.req_str("bot_filter"),
        events_path=_data_path(data, "events", base),
        exposures_path=_data_path(data, "exposures", base),
        definition_paths=tuple(
            _local_path(data, "definitions", p, base)
            for p in data.str_list("definitions", ["../metric_defs"])
        ),
        decision=decision,
        guardrails=guardrails,
        diagnostics=diagnostics,
        guardrail_margins=margins,
        factors=factors,
        segments=segments,
        sequential=sequential,
    )


def _margins(met: Section, guardrails: tuple[str, ...]) -> tuple[tuple[str, float], ...]:
    """[metrics] guardrail_margins = { metric = m }: relative non-inferiority margins."""
    if not met.has("guardrail_margins"):
        return ()
    sec = met.sub("guardrail_margins")
    out = []
    for name in sec.table:
        if name not in guardrails:
            raise sec.error(
                f"'{name}' is not a guardrail {list(guardrails)}",
                name,
                suggestion=closest(name, guardrails),
            )
        margin = sec.number(name)
        if not 0.0 < margin < 1.0:
            raise sec.error("a margin is a fraction of the control value, 0 < m < 1", name)
        out.append((name, margin))
    return tuple(out)


def _factors(sec: Section, control: str, variants: list[str]) -> tuple[Factor, ...]:
    """[factors] name = { variant = "level", ... }: a full two-level factorial design."""
    factors = []
    for name in sec.table:
        table = sec.sub(name)
        for variant in table.table:
            if variant not in variants:
                raise table.error(
                    f"unknown variant '{variant}'", variant, suggestion=closest(variant, variants)
                )
        missing = [v for v in variants if v not in table.table]
        if missing:
            raise sec.error(f"variant '{missing[0]}' has no level of this factor", name)
        levels = tuple((v, table.req_str(v)) for v in variants)
        if len({lv for _, lv in levels}) != 2:
            raise sec.error("a factor needs exactly two levels", name)
        factors.append(Factor(name, levels, dict(levels)[control]))
    if len(factors) < 2:
        raise sec.error("a factorial design needs at least two factors")
    cells: dict[tuple[int, ...], str] = {}
    for variant in variants:
        cell = tuple(f.coded(variant) for f in factors)
        if cell in cells:
            raise sec.error(
                f"variants '{cells[cell]}' and '{variant}' have the same levels of every factor"
            )
        cells[cell] = variant
    if len(cells) != 2 ** len(factors):
        raise sec.error(
            f"{len(factors)} two-level factors need {2 ** len(factors)} variants, one per"
            f" combination of levels; the spec has {len(variants)}"
        )
    return tuple(factors)


def filters_folder(spec: ExperimentSpec) -> Path:
    toml = read_toml(spec.path)
    data = Section(toml, ("data",), toml.data.get("data", {}))
    folder = data.text("filters")
    if folder is not None:
        return _local_path(data, "filters", folder, spec.path.parent)
    return (
        spec.definition_paths[0] / "filters"
        if spec.definition_paths[0].is_dir()
        else (spec.definition_paths[0].parent / "filters")
    )


def load_plan(path: Path, *, bot_filter: str | None = None) -> Plan:
    """Spec + library + filter → the Plan, with every reference checked."""
    spec = load_spec(path)
    return assemble_plan(spec, bot_filter=bot_filter, filters=None)


def assemble_plan(spec: ExperimentSpec, *, bot_filter: str | None, filters: Path | None) -> Plan:
    """The Plan of a loaded spec: its library (``spec.definition_paths``) and the bot filter
    ``bot_filter`` (default: the spec's) from ``filters`` (default: the spec's folder)."""
    path = spec.path
    library = load_library(spec.definition_paths)
    reported = spec.roles()
    for name, role in reported:
        if name not in library:
            key = {"decision": "decision"}.get(role.value, role.value + "s")
            raise SpecError(
                f"unknown metric '{name}'",
                file=str(path),
                key=f"metrics.{key}",
                suggestion=closest(name, library),
                line=TomlFile(path, spec.text, {}).line_of("metrics", key),
            )
    needed: list[MetricDef] = []

    def add(name: str) -> None:
        metric = library[name]
        for dep in metric.dependencies():
            add(dep)
        if metric not in needed:
            needed.append(metric)

    for name, _ in reported:
        add(name)
    ref = bot_filter or spec.bot_filter_ref
    flt = load_filter(filters or filters_folder(spec), ref, spec_file=str(path))
    return Plan(
        spec=spec,
        bot_filter=flt,
        metrics=tuple(needed),
        reported=reported,
        pre_period_days=spec.pre_period_days,
    )
