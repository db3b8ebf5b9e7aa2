"""The optional ``[segments]`` table of an experiment spec.

```toml
[segments]
by = ["device", "country"]   # event columns that describe a unit, not identify it
min_units = 100              # minimum analysed units of every shown (value, variant) cell
```

Only attribute columns of the events may segment (``SEGMENT_COLUMNS``): id columns
(cookies, accounts, sessions, IP hashes) and free text such as the user agent are
refused, so that no output can carry a unit id.
"""

from __future__ import annotations

from metricforge.errors import closest
from metricforge.spec.model import Segments
from metricforge.spec.tomlfile import Section

SEGMENT_COLUMNS = ("country", "device", "page")
DEFAULT_MIN_UNITS = 100
MAX_MIN_UNITS = 1_000_000_000


def load_segments(sec: Section, unit: str) -> Segments:
    """The checked ``[segments]`` table (``unit``: the spec's randomisation unit)."""
    sec.check_keys({"by", "min_units"})
    by = sec.table.get("by")
    if by is None:
        raise sec.error(f"required key is missing; one or more of {list(SEGMENT_COLUMNS)}", "by")
    columns = sec.str_list("by")
    if not columns:
        raise sec.error(f"must list at least one of {list(SEGMENT_COLUMNS)}", "by")
    for column in columns:
        if column not in SEGMENT_COLUMNS:
            what = "the randomisation unit" if column == unit else "not a segment column"
            raise sec.error(
                f"'{column}' is {what}; segments may use {list(SEGMENT_COLUMNS)}",
                "by",
                suggestion=closest(column, SEGMENT_COLUMNS),
            )
    repeated = [c for c in columns if columns.count(c) > 1]
    if repeated:
        raise sec.error(f"'{repeated[0]}' is listed twice", "by")
    min_units = sec.integer("min_units", DEFAULT_MIN_UNITS)
    if not 1 <= min_units <= MAX_MIN_UNITS:
        raise sec.error(f"min_units must be between 1 and {MAX_MIN_UNITS:,}", "min_units")
    return Segments(by=tuple(columns), min_units=min_units)
