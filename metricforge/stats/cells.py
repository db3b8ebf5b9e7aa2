"""The minimum cell size of a segment breakdown: which segment values are shown.

A cell is one (segment value, variant). A value is shown on its own when every variant's
cell holds at least ``min_units`` units; the other values (a variant missing counts as an
empty cell) are pooled into one ``(other)`` value, which is shown only when every variant's
pooled cell reaches ``min_units`` too, and is otherwise suppressed entirely.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Generic, TypeVar

K = TypeVar("K", bound=Hashable)


@dataclass(frozen=True)
class CellPlan(Generic[K]):
    shown: tuple[K, ...]  # values shown on their own, in the given order
    pooled: tuple[K, ...]  # values pooled into (other)
    other_shown: bool  # the pooled (other) value reaches min_units in every variant

    @property
    def suppressed(self) -> bool:
        """Whether any unit's figures are withheld: (other) exists but is not shown."""
        return bool(self.pooled) and not self.other_shown


def plan_cells(
    counts: Mapping[K, Mapping[str, int]], variants: Sequence[str], min_units: int
) -> CellPlan[K]:
    """Which values to show, pool and suppress; ``counts[value][variant]``: units."""
    if min_units < 1:
        raise ValueError("min_units must be at least 1")

    def big(cells: Mapping[str, int]) -> bool:
        return all(cells.get(v, 0) >= min_units for v in variants)

    shown = tuple(k for k, cells in counts.items() if big(cells))
    pooled = tuple(k for k, cells in counts.items() if not big(cells))
    other = {v: sum(counts[k].get(v, 0) for k in pooled) for v in variants}
    return CellPlan(shown, pooled, bool(pooled) and big(other))
