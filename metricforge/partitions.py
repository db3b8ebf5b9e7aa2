"""Reading only what a run needs: date partitions outside the analysis window are skipped.

Inputs may be hive-partitioned by day (``events/date=2026-09-15/part-0.parquet``). A run
lists only the partitions whose day can hold an event it reads, so the engine never opens
the others, and the input fingerprint and manifest describe exactly the files read. The
engine is handed the kept files, so this works the same for every engine.

Contract: a ``date=YYYY-MM-DD`` folder holds the events whose ``ts`` falls on that UTC day.
Each kept file's ``ts`` statistics (from its Parquet footer) are checked against its day;
when a kept file breaks the contract (e.g. partitions by local time), the names cannot be
trusted and every file is read. Files outside any ``date=`` folder are always read. The same
holds for data URIs (``s3a://bucket/events/date=2026-09-15/part-0.parquet``): their folders
are the URI's path segments, and the footers are read through the URI's file system.
"""

from __future__ import annotations

import datetime as dt
import functools
import re
from collections.abc import Sequence
from pathlib import Path

from metricforge.errors import InputDataError
from metricforge.inputs import Where, read_metadata
from metricforge.locations import Uri
from metricforge.spec.model import Plan

_DAY = re.compile(r"date=(\d{4}-\d{2}-\d{2})")
ONE_DAY = dt.timedelta(days=1)


def partition_day(path: Where) -> dt.date | None:
    """The day of the innermost ``date=YYYY-MM-DD`` folder holding ``path``, if any."""
    folders = path.segments[:-1] if isinstance(path, Uri) else path.parent.parts
    for part in reversed(folders):
        match = _DAY.fullmatch(part)
        if match:
            try:
                return dt.date.fromisoformat(match.group(1))
            except ValueError:
                return None
    return None


def event_window(plan: Plan) -> tuple[dt.datetime, dt.datetime]:
    """[first, last) of every event a run can read: from the experiment start (minus the
    pre-period) to the end plus each unit's analysis window."""
    spec = plan.spec
    first = spec.start - dt.timedelta(days=plan.pre_period_days)
    return first, _cut(plan, spec.end + dt.timedelta(days=spec.window_days))


def exposure_window(plan: Plan) -> tuple[dt.datetime, dt.datetime]:
    return plan.spec.start, _cut(plan, plan.spec.end)


def _cut(plan: Plan, last: dt.datetime) -> dt.datetime:
    """``last``, or the plan's cut-off time (``Plan.as_of``) when that is earlier."""
    return last if plan.as_of is None else max(plan.spec.start, min(last, plan.as_of))


def _midnight(day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time())


def _in_window(day: dt.date | None, first: dt.datetime, last: dt.datetime) -> bool:
    return day is None or (_midnight(day) + ONE_DAY > first and _midnight(day) < last)


def _ts_range(path: Where) -> tuple[dt.datetime, dt.datetime] | None:
    """Min and max of ``ts`` over the file's row groups, from the footer; None if unknown
    (also for an unreadable footer: the file's inspection names it). A local file's answer
    is kept while its modification time and size stay the same."""
    if isinstance(path, Uri):
        return _ts_range_read(path)
    info = path.stat()
    return _ts_range_of(path, info.st_mtime_ns, info.st_size)


@functools.lru_cache(maxsize=4096)
def _ts_range_of(path: Path, mtime_ns: int, size: int) -> tuple[dt.datetime, dt.datetime] | None:
    return _ts_range_read(path)


def _ts_range_read(path: Where) -> tuple[dt.datetime, dt.datetime] | None:
    try:
        meta = read_metadata(path)
    except InputDataError:
        return None
    names = [meta.schema.column(i).name for i in range(meta.num_columns)]
    if "ts" not in names:
        return None
    column = names.index("ts")
    lows, highs = [], []
    for g in range(meta.num_row_groups):
        stats = meta.row_group(g).column(column).statistics
        if meta.row_group(g).num_rows == 0:
            continue
        if stats is None or not stats.has_min_max:
            return None
        lows.append(stats.min)
        highs.append(stats.max)
    if not lows or not all(isinstance(v, dt.datetime) for v in (*lows, *highs)):
        return None
    return _naive_utc(min(lows)), _naive_utc(max(highs))


def _naive_utc(value: dt.datetime) -> dt.datetime:
    return value.astimezone(dt.UTC).replace(tzinfo=None) if value.tzinfo else value


def _keeps_contract(path: Where, day: dt.date) -> bool:
    found = _ts_range(path)
    return found is None or (found[0] >= _midnight(day) and found[1] < _midnight(day) + ONE_DAY)


def inside_window(files: Sequence[Where], first: dt.datetime, last: dt.datetime) -> bool:
    """Whether every file's ``ts`` range (from its footer) lies in [first, last). Then a
    bound on ``ts`` in the scan cannot leave out a row, and would only cost a comparison per
    row (the analysis window itself is decided per unit)."""
    for path in files:
        found = _ts_range(path)
        if found is None or found[0] < first or found[1] >= last:
            return False
    return True


def prune(
    files: Sequence[Where], first: dt.datetime, last: dt.datetime, *, folder: Path | Uri
) -> list[Where]:
    """The files that can hold rows with ``ts`` in [first, last), in their given order."""
    kept = [f for f in files if _in_window(partition_day(f), first, last)]
    if len(kept) == len(files):
        return list(files)
    for f in kept:
        day = partition_day(f)
        if day is not None and not _keeps_contract(f, day):
            return list(files)  # partition names cannot be trusted: read everything
    if not kept:
        raise InputDataError(
            f"no date= partition between {first:%Y-%m-%d} and"
            f" {last - dt.timedelta(microseconds=1):%Y-%m-%d}"
            " (the analysis window)",
            file=str(folder),
            key="date",
        )
    return kept
