"""Broken logs: each case has a defined outcome, never a traceback or a partial output.

Either the run is refused with one line naming the file and the column (exit 2, nothing
written), or the run goes on with a documented handling that is counted in the
`data_quality` section of scorecard.json (README: "Broken data"). Handled cases are checked
against a run on the same logs without the defect: the defect must leave the scorecard
unchanged, apart from what the handling says.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import shutil
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.sample import EVENT_SCHEMA, EXPOSURE_SCHEMA
from tests.conftest import ROOT, T0, event, exposure, write_case
from tests.hostile_env import snapshot

Rows = list[dict[str, Any]]


def logs() -> tuple[Rows, Rows]:
    """20 units, two arms; every unit has impressions, clicks and a purchase."""
    events: Rows = []
    exposures: Rows = []
    for i in range(20):
        arm = "control" if i % 2 else "treatment"
        unit = f"u{i:03d}"
        events += [
            event(unit, "impression", 1),
            event(unit, "impression", 2),
            event(unit, "click", 3),
            event(unit, "purchase", 4, value=10.0 + i),
            event(unit, "page_load", 5, latency_ms=100.0 + 3 * i),
        ]
        exposures.append(exposure(unit, arm))
    return events, exposures


DIAGNOSTICS = ("purchases", "click_through", "page_latency", "buyer_share")


def run(folder: Path, events: Rows, exposures: Rows) -> tuple[int, str, dict[str, Any] | None]:
    spec = write_case(folder, events, exposures, diagnostics=DIAGNOSTICS)
    return run_spec(spec, folder)


def run_spec(spec: Path, folder: Path) -> tuple[int, str, dict[str, Any] | None]:
    out = folder / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert "Traceback" not in result.output
    card = None
    if result.exit_code == 0:
        card = json.loads((out / "scorecard.json").read_text(encoding="utf-8"))
    return result.exit_code, result.stderr.strip(), card


def values(card: dict[str, Any]) -> dict[str, tuple[Any, ...]]:
    keys = ("value", "control_value", "n_units", "n_units_control", "p_value")
    return {r["metric"]: tuple(r[k] for k in keys) for r in card["metrics"]}


@pytest.fixture(scope="module")
def baseline(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    code, err, card = run(tmp_path_factory.mktemp("baseline"), *logs())
    assert code == 0, err
    assert card is not None
    return card


def rewrite(path: Path, change: Callable[[pa.Table], pa.Table]) -> None:
    pq.write_table(change(pq.read_table(path)), path)


def set_column(table: pa.Table, name: str, array: pa.Array) -> pa.Table:
    return table.set_column(table.schema.get_field_index(name), name, array)


# -- refused: one line naming the file and the column --------------------------------------


def _drop(column: str, file: str = "events/part-0.parquet") -> Callable[[Path], None]:
    return lambda f: rewrite(f / file, lambda t: t.drop_columns([column]))


def _as_strings(column: str, file: str = "events/part-0.parquet") -> Callable[[Path], None]:
    def change(t: pa.Table) -> pa.Table:
        return set_column(
            t, column, pa.array([None if v is None else str(v) for v in t[column].to_pylist()])
        )

    return lambda f: rewrite(f / file, change)


def _unit_ids_as_numbers(folder: Path) -> None:
    rewrite(
        folder / "exposures.parquet",
        lambda t: set_column(t, "unit_id", pa.array(range(t.num_rows), pa.int64())),
    )


def _second_file(folder: Path, change: Callable[[pa.Table], pa.Table]) -> None:
    table = pq.read_table(folder / "events" / "part-0.parquet")
    pq.write_table(change(table.slice(0, 10)), folder / "events" / "part-1.parquet")


def _empty_events(folder: Path) -> None:
    rewrite(folder / "events" / "part-0.parquet", lambda t: t.slice(0, 0))


def _zero_bytes(folder: Path) -> None:
    (folder / "events" / "part-1.parquet").write_bytes(b"")


def _truncated(folder: Path) -> None:
    path = folder / "events" / "part-0.parquet"
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def _garbled_pages(folder: Path) -> None:
    """Intact footer, scrambled compressed data pages: only decoding the data finds it."""
    path = folder / "events" / "part-0.parquet"
    footer = pq.read_metadata(path).serialized_size
    data = bytearray(path.read_bytes())
    for i in range(8, len(data) - footer - 16):
        data[i] = (data[i] * 7 + 13) % 256
    path.write_bytes(bytes(data))


def _exposures(change: Callable[[Rows], Rows]) -> Callable[[Path], None]:
    def edit(folder: Path) -> None:
        rows = pq.read_table(folder / "exposures.parquet").to_pylist()
        pq.write_table(
            pa.Table.from_pylist(change(rows), schema=EXPOSURE_SCHEMA), folder / "exposures.parquet"
        )

    return edit


def _all_bots(folder: Path) -> None:
    rewrite(
        folder / "events" / "part-0.parquet",
        lambda t: set_column(t, "user_agent", pa.array(["Googlebot/2.1"] * t.num_rows)),
    )


REFUSED: list[tuple[str, Callable[[Path], None], list[str]]] = [
    ("missing_value_column", _drop("value"), ["events/part-0.parquet", "value", "lacks column"]),
    (
        "missing_unit_column",
        _drop("cookie_id"),
        ["events/part-0.parquet", "cookie_id", "lacks column"],
    ),
    (
        "missing_exposure_column",
        _drop("variant", "exposures.parquet"),
        ["exposures.parquet", "variant"],
    ),
    ("value_as_text", _as_strings("value"), ["events/part-0.parquet", "value", "expected double"]),
    (
        "timestamps_as_text",
        _as_strings("ts"),
        ["events/part-0.parquet", "ts", "expected timestamp"],
    ),
    ("exposure_time_as_text", _as_strings("ts", "exposures.parquet"), ["exposures.parquet", "ts"]),
    ("numeric_unit_ids", _unit_ids_as_numbers, ["exposures.parquet", "unit_id", "expected string"]),
    (
        "schema_differs_missing",
        lambda f: _second_file(f, lambda t: t.drop_columns(["latency_ms"])),
        ["events/part-1.parquet", "latency_ms", "lacks column"],
    ),
    (
        "schema_differs_type",
        lambda f: _second_file(
            f,
            lambda t: set_column(
                t, "latency_ms", pa.array([str(v) for v in t["latency_ms"].to_pylist()])
            ),
        ),
        ["events/part-1.parquet", "latency_ms", "expected double"],
    ),
    ("all_event_files_empty", _empty_events, ["events/part-0.parquet", "event log has no rows"]),
    ("exposures_empty", _exposures(lambda rows: []), ["exposures.parquet", "no rows"]),
    ("zero_byte_file", _zero_bytes, ["events/part-1.parquet", "not a Parquet file"]),
    ("truncated_file", _truncated, ["events/part-0.parquet", "not a Parquet file"]),
    ("garbled_data_pages", _garbled_pages, ["events/part-0.parquet", "cannot read Parquet data"]),
    ("all_units_bots", _all_bots, ["exposures.parquet", "variant", "no analysable units"]),
    (
        "control_without_units",
        _exposures(lambda rows: [r for r in rows if r["variant"] != "control"]),
        ["exposures.parquet", "variant 'control' has no analysable units"],
    ),
    (
        "exposures_outside_dates",
        _exposures(lambda rows: [{**r, "ts": T0 - dt.timedelta(days=30)} for r in rows]),
        ["exposures.parquet", "no exposures"],
    ),
    (
        "variant_not_in_spec",
        _exposures(
            lambda rows: [
                {**r, "variant": "treatmnt"} if r["variant"] == "treatment" else r for r in rows
            ]
        ),
        ["exposures.parquet", "variant 'treatmnt' is in the exposure log but not in the spec"],
    ),
    (
        "null_variants_only",
        _exposures(lambda rows: [{**r, "variant": None} for r in rows]),
        ["exposures.parquet", "no exposures"],
    ),
]


@pytest.mark.parametrize(("edit", "needles"), [c[1:] for c in REFUSED], ids=[c[0] for c in REFUSED])
def test_broken_data_is_refused(
    tmp_path: Path, edit: Callable[[Path], None], needles: list[str]
) -> None:
    spec = write_case(tmp_path, *logs(), diagnostics=DIAGNOSTICS)
    edit(tmp_path)
    before = snapshot(tmp_path)
    code, message, _ = run_spec(spec, tmp_path)
    assert code == 2, message
    assert len(message.splitlines()) == 1 and message.startswith("error: "), message
    for needle in needles:
        assert needle in message, message
    assert snapshot(tmp_path) == before


# -- handled: counted in data_quality, scorecard otherwise unchanged --------------------------


def quality(card: dict[str, Any]) -> dict[str, Any]:
    section: dict[str, Any] = card["data_quality"]
    return section


def test_clean_logs_have_a_quiet_data_quality_section(baseline: dict[str, Any]) -> None:
    q = quality(baseline)
    assert q["notes"] == []
    assert q["inputs"]["null_values"]["events"] == {
        "cookie_id": 0,
        "ts": 0,
        "event": 0,
        "session_id": 0,
    }
    zero = {"ignored": 0, "negative": 0}
    assert q["values"] == {"revenue": zero, "page_latency": zero}
    assert q["duplicate_exposure_rows"] == {"control": 0, "treatment": 0}


def _unchanged(card: dict[str, Any], baseline: dict[str, Any]) -> None:
    assert values(card) == values(baseline)


def _extra_events(rows: Rows) -> Callable[[Rows, Rows], tuple[Rows, Rows]]:
    return lambda events, exposures: (events + rows, exposures)


def _revenue_card(tmp_path: Path, extra: Rows) -> dict[str, Any]:
    events, exposures = logs()
    spec = write_case(tmp_path, events + extra, exposures, diagnostics=("page_latency",))
    code, err, card = run_spec(spec, tmp_path)
    assert code == 0, err
    assert card is not None
    return card


def test_null_unit_ids_in_events_are_counted_and_ignored(
    tmp_path: Path, baseline: dict[str, Any]
) -> None:
    events, exposures = logs()
    extra = [{**event("u001", "purchase", 6, value=999.0), "cookie_id": None} for _ in range(3)]
    code, err, card = run(tmp_path, events + extra, exposures)
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)
    assert quality(card)["inputs"]["null_values"]["events"]["cookie_id"] == 3
    assert "3 event rows with a null cookie_id" in " ".join(quality(card)["notes"])


def test_null_timestamps_in_events_are_counted_and_ignored(
    tmp_path: Path, baseline: dict[str, Any]
) -> None:
    events, exposures = logs()
    extra = [{**event("u001", "purchase", 6, value=999.0), "ts": None}]
    code, err, card = run(tmp_path, events + extra, exposures)
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)
    assert quality(card)["inputs"]["null_values"]["events"]["ts"] == 1


@pytest.mark.parametrize("column", ["unit_id", "variant"])
def test_null_ids_in_exposures_are_counted_and_left_out(
    tmp_path: Path, baseline: dict[str, Any], column: str
) -> None:
    events, exposures = logs()
    extra = [
        {**exposure("u900", "control"), column: None},
        {**exposure("u901", "treatment"), column: None},
    ]
    code, err, card = run(tmp_path, events, exposures + extra)
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)
    assert quality(card)["inputs"]["null_values"]["exposures"][column] == 2


def test_duplicate_exposure_rows_are_counted_once(tmp_path: Path, baseline: dict[str, Any]) -> None:
    events, exposures = logs()
    code, err, card = run(tmp_path, events, exposures + exposures[:3] + exposures[:1])
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)
    assert quality(card)["duplicate_exposure_rows"] == {"control": 1, "treatment": 3}


def test_units_with_events_only_before_exposure_count_as_zero(tmp_path: Path) -> None:
    events, exposures = logs()
    early = [event(f"u9{i:02d}", "purchase", -60 * 24, value=50.0) for i in range(4)]
    late = [exposure(f"u9{i:02d}", "control" if i % 2 else "treatment") for i in range(4)]
    code, err, card = run(tmp_path, events + early, exposures + late)
    assert code == 0 and card is not None, err
    assert quality(card)["units_without_events"] == {"control": 2, "treatment": 2}
    assert [v["units"] for v in card["variants"]] == [12, 12]
    revenue = next(r for r in card["metrics"] if r["metric"] == "revenue")
    assert revenue["n_units"] == 12  # the four units are analysed with a revenue of zero


@pytest.mark.parametrize(
    "bad",
    [math.nan, math.inf, -math.inf, 1e19, -1e300],
    ids=["nan", "inf", "-inf", "1e19", "-1e300"],
)
def test_non_finite_and_out_of_range_values_are_left_out(tmp_path: Path, bad: float) -> None:
    clean = _revenue_card(tmp_path / "clean", [])
    extra = [
        event("u001", "purchase", 6, value=bad),
        event("u002", "page_load", 6, latency_ms=bad),
    ]
    card = _revenue_card(tmp_path / "bad", extra)
    assert values(card) == values(clean)
    assert quality(card)["values"]["revenue"]["ignored"] == 1
    assert quality(card)["values"]["page_latency"]["ignored"] == 1


def test_large_values_below_the_limit_are_used(tmp_path: Path) -> None:
    card = _revenue_card(tmp_path, [event("u001", "purchase", 6, value=1e17)])
    assert quality(card)["values"]["revenue"] == {"ignored": 0, "negative": 0}
    revenue = next(r for r in card["metrics"] if r["metric"] == "revenue")
    assert revenue["control_value"] > 1e15


def test_negative_revenue_is_kept_and_counted(tmp_path: Path) -> None:
    clean = _revenue_card(tmp_path / "clean", [])
    card = _revenue_card(tmp_path / "neg", [event("u001", "purchase", 6, value=-10.0)] * 2)
    assert quality(card)["values"]["revenue"] == {"ignored": 0, "negative": 2}
    revenue, before = (
        next(r for r in c["metrics"] if r["metric"] == "revenue") for c in (card, clean)
    )
    assert revenue["control_value"] < before["control_value"]  # u001 is in control


def test_ignored_and_negative_values_are_told_apart_within_one_session(tmp_path: Path) -> None:
    # The data-quality definition (compile/quality.py): a value is ignored when it is NULL-free
    # but not finite or too large; negative counts only values that were used. So -inf and
    # -1e300 are ignored, not negative; -1e-11 is used (it rounds to 0 at ten decimals) and,
    # being below zero, negative; a NULL value is neither.
    mix = [math.nan, -math.inf, -1e300, -10.0, -1e-11, None, 1e17, 3.0]
    extra = [event("u001", "purchase", 6 + i, value=v) for i, v in enumerate(mix)]
    extra += [event("u001", "page_load", 6 + i, latency_ms=v) for i, v in enumerate(mix)]
    card = _revenue_card(tmp_path, extra)
    expected = {"ignored": 3, "negative": 2}
    assert quality(card)["values"] == {"revenue": expected, "page_latency": expected}


def test_empty_file_among_others_is_counted(tmp_path: Path, baseline: dict[str, Any]) -> None:
    events, exposures = logs()
    write_case(tmp_path, events, exposures, diagnostics=DIAGNOSTICS)
    pq.write_table(
        pa.Table.from_pylist([], schema=EVENT_SCHEMA), tmp_path / "events" / "part-1.parquet"
    )
    code, err, card = run_spec(tmp_path / "spec.toml", tmp_path)
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)
    assert quality(card)["inputs"]["empty_files"] == ["events/part-1.parquet"]


def test_other_files_in_a_data_folder_are_not_read(
    tmp_path: Path, baseline: dict[str, Any]
) -> None:
    events, exposures = logs()
    write_case(tmp_path, events, exposures, diagnostics=DIAGNOSTICS)
    (tmp_path / "events" / "_SUCCESS").write_text("", encoding="utf-8")
    (tmp_path / "events" / "part-0.parquet.crc").write_bytes(b"\x00\x01")
    code, err, card = run_spec(tmp_path / "spec.toml", tmp_path)
    assert code == 0 and card is not None, err
    _unchanged(card, baseline)


def run_split(folder: Path, change: Callable[[pa.Table], pa.Table]) -> dict[str, Any]:
    """The clean logs as two event files, the second changed by ``change``; the run's card."""
    write_case(folder, *logs(), diagnostics=DIAGNOSTICS)
    path = folder / "events" / "part-0.parquet"
    table = pq.read_table(path)
    pq.write_table(table.slice(0, 50), path)
    pq.write_table(change(table.slice(50)), folder / "events" / "part-1.parquet")
    code, err, card = run_spec(folder / "spec.toml", folder)
    assert code == 0 and card is not None, err
    return card


def test_integer_and_float_values_across_files_are_unified(
    tmp_path: Path, baseline: dict[str, Any]
) -> None:
    def whole_numbers(t: pa.Table) -> pa.Table:
        rounded = [None if v is None else round(v) for v in t["latency_ms"].to_pylist()]
        return set_column(t, "latency_ms", pa.array(rounded, pa.int64()))

    _unchanged(run_split(tmp_path, whole_numbers), baseline)


def test_naive_and_zoned_timestamps_across_files_mean_the_same_instants(
    tmp_path: Path, baseline: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Naive = UTC by contract; a zoned file is converted; the machine's zone plays no part."""

    def zoned(t: pa.Table) -> pa.Table:
        berlin = pa.timestamp("us", tz="Europe/Berlin")
        return set_column(t, "ts", t["ts"].cast(pa.timestamp("us", tz="UTC")).cast(berlin))

    monkeypatch.setenv("TZ", "America/New_York")
    time.tzset()
    try:
        card = run_split(tmp_path, zoned)
    finally:
        monkeypatch.delenv("TZ")
        time.tzset()
    _unchanged(card, baseline)
    assert quality(card)["inputs"]["zoned_timestamp_files"] == ["events/part-1.parquet"]


def test_unicode_variant_names_in_the_logs(tmp_path: Path) -> None:
    arms = ("Kontrolle \u00fc", "\u5b9f\u9a13 \U0001f680")
    events, exposures = logs()
    exposures = [
        {**e, "variant": arms[0] if e["variant"] == "control" else arms[1]} for e in exposures
    ]
    spec = write_case(tmp_path, events, exposures, diagnostics=DIAGNOSTICS)
    text = spec.read_text(encoding="utf-8").replace(
        'control = "control"\nvariants = { control = 50, treatment = 50 }',
        f'control = "{arms[0]}"\nvariants = {{ "{arms[0]}" = 50, "{arms[1]}" = 50 }}',
    )
    spec.write_text(text, encoding="utf-8")
    code, err, card = run_spec(spec, tmp_path)
    assert code == 0 and card is not None, err
    assert [v["variant"] for v in card["variants"]] == list(arms)
    assert pq.read_table(tmp_path / "out" / "scorecard.parquet")["variant"][0].as_py() == arms[1]


def test_a_metric_without_variance(tmp_path: Path) -> None:
    """Every unit has exactly two impressions: no variance, a known zero difference."""
    code, err, card = run(tmp_path, *logs())
    assert code == 0 and card is not None, err
    write_case(tmp_path, *logs(), diagnostics=("impressions",))
    code, err, card = run_spec(tmp_path / "spec.toml", tmp_path)
    assert code == 0 and card is not None, err
    row = next(r for r in card["metrics"] if r["metric"] == "impressions")
    assert (row["value"], row["control_value"], row["abs_effect"], row["p_value"]) == (
        2.0,
        2.0,
        0.0,
        1.0,
    )
    assert row["abs_ci_low"] == row["abs_ci_high"] == 0.0


def test_a_denominator_that_is_zero_for_every_unit_of_a_variant(tmp_path: Path) -> None:
    events, exposures = logs()
    treated = {e["unit_id"] for e in exposures if e["variant"] == "treatment"}
    events = [e for e in events if not (e["event"] == "impression" and e["cookie_id"] in treated)]
    code, err, card = run(tmp_path, events, exposures)
    assert code == 0 and card is not None, err
    row = next(r for r in card["metrics"] if r["metric"] == "click_through")
    assert row["method"].startswith("not computed: ") and "denominator" in row["method"]
    assert row["value"] is None and row["p_value"] is None
    assert row["control_value"] == 1.0 / 2.0
    table = pq.read_table(tmp_path / "out" / "scorecard.parquet").to_pylist()
    assert math.isnan(next(r for r in table if r["metric"] == "click_through")["p_value"])


def test_zero_rows_after_the_bot_filter_in_one_variant(tmp_path: Path) -> None:
    events, exposures = logs()
    treated = {e["unit_id"] for e in exposures if e["variant"] == "treatment"}
    events = [
        {**e, "user_agent": "HeadlessChrome"} if e["cookie_id"] in treated else e for e in events
    ]
    spec = write_case(tmp_path, events, exposures, diagnostics=DIAGNOSTICS)
    before = snapshot(tmp_path)
    code, message, _ = run_spec(spec, tmp_path)
    assert code == 2
    assert "variant 'treatment' has no analysable units" in message
    assert snapshot(tmp_path) == before


def test_units_without_events_count_zero_whatever_the_filter(tmp_path: Path) -> None:
    """A unit with no event in its window joins one all-NULL row; no metric may count it."""
    defs = tmp_path / "defs"
    shutil.copytree(ROOT / "metric_defs" / "filters", defs / "filters")
    (defs / "lib.toml").write_text(
        '[metric.anything]\nkind = "count"\n\n'
        '[metric.no_device]\nkind = "proportion"\nwhere = "device IS NULL"\n',
        encoding="utf-8",
    )
    events, exposures = logs()
    silent = [exposure(f"u9{i:02d}", ("control", "treatment")[i % 2]) for i in range(6)]
    spec = write_case(
        tmp_path,
        events,
        exposures + silent,
        decision="anything",
        diagnostics=("no_device",),
        defs=defs,
    )
    code, err, card = run_spec(spec, tmp_path)
    assert code == 0 and card is not None, err
    rows = {r["metric"]: r for r in card["metrics"]}
    # 10 units with 5 events each and 3 silent units per arm: 50 / 13 events per unit
    assert rows["anything"]["value"] == rows["anything"]["control_value"] == 50 / 13
    assert rows["no_device"]["value"] == rows["no_device"]["control_value"] == 0.0
    assert quality(card)["units_without_events"] == {"control": 3, "treatment": 3}
