"""Typed, immutable objects that the loaders produce and the compiler consumes."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from enum import StrEnum
from pathlib import Path

import sqlglot.expressions as exp

from metricforge.locations import Uri


class Kind(StrEnum):
    COUNT = "count"
    SUM = "sum"
    MEAN = "mean"
    PROPORTION = "proportion"
    RATIO = "ratio"
    DWELL_SUCCESS = "dwell_success"
    COMPOSITE = "composite"
    QUANTILE = "quantile"  # a quantile of the event-level values, e.g. p95 page latency


# Kinds whose per-unit value is a plain number (denominator 1 per unit), so they
# may serve as ratio parts and composite terms.
PER_UNIT_KINDS = frozenset({Kind.COUNT, Kind.SUM, Kind.PROPORTION, Kind.COMPOSITE})


class Direction(StrEnum):
    HIGHER = "higher"
    LOWER = "lower"


class TwoVariantPolicy(StrEnum):
    """What happens to a unit exposed to more than one variant."""

    EXCLUDE = "exclude"  # counted, then left out of the analysis (the default)
    FIRST_EXPOSURE = "first_exposure"  # analysed in the variant of its first exposure


class Role(StrEnum):
    DECISION = "decision"
    GUARDRAIL = "guardrail"
    DIAGNOSTIC = "diagnostic"


@dataclass(frozen=True)
class Origin:
    """Where a definition came from, for error messages."""

    file: str
    line: int | None = None


@dataclass(frozen=True)
class MetricDef:
    name: str
    kind: Kind
    origin: Origin
    events: tuple[str, ...] = ()  # event types that count; empty = any event
    where: exp.Expr | None = None  # parsed, whitelisted event filter
    where_text: str | None = None
    value: exp.Expr | None = None  # parsed value expression (sum, mean)
    value_text: str | None = None
    numerator: str | None = None  # ratio parts: names of per-unit metrics
    denominator: str | None = None
    terms: tuple[tuple[str, float], ...] = ()  # composite: (metric, weight)
    threshold_s: float = 30.0  # dwell_success
    q: float = 0.5  # quantile: the level, e.g. 0.95
    winsorise: float | None = None  # cap the per-unit value (a ratio's numerator) at this
    # quantile of the pooled per-unit distribution of all analysed units
    direction: Direction = Direction.HIGHER
    unit_label: str = ""
    description: str = ""
    raw: dict[str, object] = field(default_factory=dict, compare=False, hash=False)

    @property
    def is_ratio(self) -> bool:
        return self.kind in (Kind.RATIO, Kind.DWELL_SUCCESS)

    def dependencies(self) -> tuple[str, ...]:
        if self.kind is Kind.RATIO:
            assert self.numerator is not None and self.denominator is not None
            return (self.numerator, self.denominator)
        if self.kind is Kind.COMPOSITE:
            return tuple(name for name, _ in self.terms)
        return ()


class RuleKind(StrEnum):
    USER_AGENT = "user_agent"  # case-insensitive substring tokens
    SESSION_EVENTS = "session_events"  # more events than `max` in one session
    DENY_IP = "deny_ip_hash"
    DENY_UNIT = "deny_unit"


@dataclass(frozen=True)
class BotRule:
    kind: RuleKind
    tokens: tuple[str, ...] = ()
    max_events: int = 0


@dataclass(frozen=True)
class BotFilter:
    name: str
    version: int
    path: Path
    sha256: str
    released: str
    rules: tuple[BotRule, ...]
    text: str

    @property
    def ref(self) -> str:
        return f"{self.name}@{self.version}"


@dataclass(frozen=True)
class Factor:
    """One factor of a factorial design: every variant's level; level 0 is the control's."""

    name: str
    levels: tuple[tuple[str, str], ...]  # (variant, level name)
    baseline: str  # the control's level

    def coded(self, variant: str) -> int:
        return 0 if dict(self.levels)[variant] == self.baseline else 1


@dataclass(frozen=True)
class Segments:
    """[segments]: break the effects down by unit attributes taken from the events."""

    by: tuple[str, ...]  # event columns; a unit's value: see compile/segments.py
    min_units: int  # minimum analysed units of every shown (segment value, variant) cell


@dataclass(frozen=True)
class Sequential:
    """[sequential]: always-valid p-values and confidence sequences (stats/sequential.py).

    The mixing variance of a metric is τ² = (effect · |scale|)², the scale being the
    metric's ``baseline`` when the spec gives one (fixed before the data: the guarantee
    holds exactly) or else the pooled value of the two compared variants at the look."""

    effect: float  # the relative effect the test is most sensitive to, e.g. 0.05
    baselines: tuple[tuple[str, float], ...] = ()  # metric -> its expected control value

    def record(self) -> dict[str, object]:
        """The settings as plain data (lock file, scorecard)."""
        return {"effect": self.effect, "baseline": dict(self.baselines)}


@dataclass(frozen=True)
class ExperimentSpec:
    name: str
    path: Path
    sha256: str
    text: str
    unit: str
    variants: tuple[tuple[str, float], ...]  # (variant, planned share), control first
    control: str
    start: dt.datetime
    end: dt.datetime
    window_days: int
    alpha: float
    bot_filter_ref: str
    events_path: Path | Uri  # a local path, or a URI ([data] events = "s3a://...")
    exposures_path: Path | Uri
    definition_paths: tuple[Path, ...]
    decision: str
    guardrails: tuple[str, ...]
    diagnostics: tuple[str, ...]
    srm_alpha: float = 0.001
    description: str = ""
    pre_period_days: int = 0  # days before each unit's first exposure to read (0: none)
    # relative non-inferiority margin per guardrail ([metrics] guardrail_margins)
    guardrail_margins: tuple[tuple[str, float], ...] = ()
    factors: tuple[Factor, ...] = ()  # [factors]: a full 2^k factorial design, or none
    # Identity stitching: an id column of the events (e.g. account_id); cookies whose events
    # carry exactly one such id are merged into one unit per id before analysis.
    stitch_to: str | None = None
    two_variant_units: TwoVariantPolicy = TwoVariantPolicy.EXCLUDE
    max_two_variant_share: float = 0.05  # trust check: share of exposed units in 2+ variants
    cuped: bool = False  # adjust each metric by its own pre-period value (needs pre_period_days)
    segments: Segments | None = None  # [segments]: per-segment breakdowns, or none
    sequential: Sequential | None = None  # [sequential], or None: no always-valid section

    @property
    def variant_names(self) -> tuple[str, ...]:
        return tuple(v for v, _ in self.variants)

    def roles(self) -> tuple[tuple[str, Role], ...]:
        out = [(self.decision, Role.DECISION)]
        out += [(m, Role.GUARDRAIL) for m in self.guardrails]
        out += [(m, Role.DIAGNOSTIC) for m in self.diagnostics]
        return tuple(out)


@dataclass(frozen=True)
class Plan:
    """Everything the compiler needs: the spec, the filter, and the metrics in order."""

    spec: ExperimentSpec
    bot_filter: BotFilter
    metrics: tuple[MetricDef, ...]  # the reported metrics plus their dependencies
    reported: tuple[tuple[str, Role], ...]
    # Days before each unit's first exposure read as its pre-period (0: none). With a
    # pre-period, `unit_rows` also holds every metric's pre-period values (`xpre_<name>`,
    # `ypre_<name>`) and `has_pre`; experiment-period columns are unchanged.
    pre_period_days: int = 0
    # Planning only (needs pre_period_days > 0): `unit_rows` also holds `first_day` (whole
    # days from the experiment start to the unit's first exposure) and every metric's
    # values over the earlier and the later half of the pre-period (`xpre1_`, `ypre1_`,
    # `xpre2_`, `ypre2_`).
    history_split: bool = False
    # The lock file the run compares with (None: `<spec stem>.lock.json` beside the spec).
    # A rerun points it at the manifest's copy, so today's lock file is never read.
    lock_file: Path | None = None
    # A cut-off time (`metricforge looks`): only exposures and events with ts < as_of are
    # read, as an analyst looking at that moment would have seen them. None: no cut-off.
    as_of: dt.datetime | None = None
    # A/A replay of the pre-period only (needs pre_period_days > 0): `unit_rows` also holds
    # every quantile metric's pre-period values (`vpre_<name>`), as `v_<name>` holds the
    # experiment period's.
    pre_values: bool = False

    def lists_values(self, period: str) -> bool:
        """Whether ``unit_rows`` holds a quantile metric's list of values for ``period``
        ("" the experiment, "pre" the pre-period)."""
        return not period or (period == "pre" and self.pre_values)

    def metric(self, name: str) -> MetricDef:
        for m in self.metrics:
            if m.name == name:
                return m
        raise KeyError(name)
