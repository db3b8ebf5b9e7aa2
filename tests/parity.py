"""Comparing what two engines returned: counts exactly, floating values to a relative bound."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import pyarrow as pa

# Spark sums floats in another order than DuckDB: values agree to this relative bound.
SPARK_REL = 1e-12


def tolerance(engine_name: str) -> float:
    """DuckDB against itself: bit-identical (its aggregates are ordered); Spark: SPARK_REL."""
    return 0.0 if engine_name == "duckdb" else SPARK_REL


def same_value(got: Any, want: Any, rel: float) -> bool:
    """Equal, with floats (also inside dicts and lists) to ``rel`` relative."""
    if isinstance(want, dict) and isinstance(got, dict):
        return got.keys() == want.keys() and all(same_value(got[k], want[k], rel) for k in want)
    if isinstance(want, list | tuple) and isinstance(got, list | tuple):
        return len(got) == len(want) and all(
            same_value(g, w, rel) for g, w in zip(got, want, strict=True)
        )
    if isinstance(want, float) or isinstance(got, float):
        if got is None or want is None:
            return got is None and want is None
        if math.isnan(want) or math.isnan(got):
            return math.isnan(want) and math.isnan(got)
        return bool(got == want) if rel == 0 else math.isclose(got, want, rel_tol=rel, abs_tol=0)
    return bool(got == want)  # counts, flags, names: exactly


def assert_same_rows(got: list[dict[str, Any]], want: list[dict[str, Any]], rel: float) -> None:
    assert len(got) == len(want)
    for i, (g, w) in enumerate(zip(got, want, strict=True)):
        assert g.keys() == w.keys(), i
        for key, value in w.items():
            assert same_value(g[key], value, rel), (i, key, g[key], value)


# Scorecard fields computed as a difference of two means: an error of SPARK_REL in each mean
# becomes SPARK_REL * (|value| + |control_value|) in absolute terms, however small the
# effect (an A/A test's effect is near 0). P-values are compared to an absolute 1e-9.
_DIFFERENCES = ("abs_effect", "abs_ci_low", "abs_ci_high")
_RELATIVE_DIFFERENCES = ("rel_effect", "rel_ci_low", "rel_ci_high")
P_ABS = 1e-9


def assert_same_scorecard(
    got: list[dict[str, Any]], want: list[dict[str, Any]], rel: float
) -> None:
    """Scorecard rows: counts and names exactly, values to ``rel``, effects to the error
    bound of a difference of means whose inputs agree to ``rel``."""
    if rel == 0:
        assert_same_rows(got, want, rel)
        return
    assert len(got) == len(want)
    for i, (g, w) in enumerate(zip(got, want, strict=True)):
        assert g.keys() == w.keys(), i
        scale = abs(w.get("value") or 0.0) + abs(w.get("control_value") or 0.0)
        for key, value in w.items():
            if key in _DIFFERENCES + _RELATIVE_DIFFERENCES + ("p_value",) and all(
                isinstance(v, float) and math.isfinite(v) for v in (g[key], value)
            ):
                bound = 4 * rel * scale
                if key in _RELATIVE_DIFFERENCES:
                    bound /= abs(w["control_value"])
                if key == "p_value":
                    bound = P_ABS
                assert math.isclose(g[key], value, rel_tol=rel, abs_tol=bound), (i, key)
            else:
                assert same_value(g[key], value, rel), (i, key, g[key], value)


def assert_same_tables(
    got: Mapping[str, pa.Table], want: Mapping[str, pa.Table], rel: float
) -> None:
    """Same result names, column names and types (nullability aside), rows and values."""
    assert sorted(got) == sorted(want)
    for name, table in want.items():
        other = got[name]
        assert other.column_names == table.column_names, name
        types = [(f.name, f.type) for f in other.schema]
        assert types == [(f.name, f.type) for f in table.schema], name
        assert_same_rows(other.to_pylist(), table.to_pylist(), rel)
