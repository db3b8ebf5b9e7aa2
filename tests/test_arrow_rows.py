"""Rows → Arrow from buffers (report/arrow_rows.py) gives pyarrow's own table, and so the
same scorecard.parquet bytes."""

from __future__ import annotations

import math
from typing import Any

import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from metricforge.report.arrow_rows import table_from_rows
from metricforge.report.files import parquet_bytes

SCHEMA = pa.schema([("name", pa.string()), ("n", pa.int64()), ("x", pa.float64())])
ROWS = st.lists(
    st.fixed_dictionaries(
        {
            "name": st.one_of(st.none(), st.text()),
            "n": st.one_of(st.none(), st.integers(-(2**63), 2**63 - 1)),
            "x": st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True)),
        }
    ),
    max_size=40,
)


def _same(a: pa.Table, b: pa.Table) -> bool:
    if a.schema != b.schema or a.num_rows != b.num_rows:
        return False
    for col_a, col_b in zip(a.columns, b.columns, strict=True):
        for u, v in zip(col_a.to_pylist(), col_b.to_pylist(), strict=True):
            nan = isinstance(u, float) and isinstance(v, float) and math.isnan(u) and math.isnan(v)
            if not (nan or (u == v and type(u) is type(v))):
                return False
    return True


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ROWS)
def test_rows_give_pyarrows_table_and_parquet_bytes(rows: list[dict[str, Any]]) -> None:
    ours, theirs = table_from_rows(rows, SCHEMA), pa.Table.from_pylist(rows, schema=SCHEMA)
    assert _same(ours, theirs)
    assert parquet_bytes(ours) == parquet_bytes(theirs)


def test_a_missing_key_is_null_and_an_unsupported_type_is_refused() -> None:
    table = table_from_rows([{"name": "a"}], SCHEMA)
    assert table.to_pylist() == [{"name": "a", "n": None, "x": None}]
    with pytest.raises(TypeError):
        table_from_rows([{"flag": True}], pa.schema([("flag", pa.bool_())]))
