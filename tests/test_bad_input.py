"""Bad input: one line naming the file and the key or column, non-zero exit, nothing written."""

from __future__ import annotations

import shutil
from collections.abc import Callable
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from tests.conftest import ROOT, event, exposure, write_case


def _good(folder: Path) -> tuple[list[dict[str, object]], list[dict[str, object]]]:
    events, exposures = [], []
    for i in range(20):
        arm = "control" if i % 2 else "treatment"
        unit = f"u{i:03d}"
        events += [event(unit, "impression"), event(unit, "purchase", 2, value=10.0 + i)]
        exposures.append(exposure(unit, arm))
    return events, exposures


def _defs_copy(folder: Path) -> Path:
    defs = folder / "defs"
    shutil.copytree(ROOT / "metric_defs", defs)
    return defs


def malformed_toml(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    spec.write_text(spec.read_text().replace('name = "case"', 'name = "case'))
    return spec, ["spec.toml:2", "malformed TOML"]


def unknown_metric(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder), decision="revenu")
    return spec, [
        "spec.toml",
        "metrics.decision",
        "unknown metric 'revenu'",
        "did you mean 'revenue'",
    ]


def _with_mobile_filter(folder: Path, where: str) -> Path:
    """A case whose library's `mobile_purchases` filter reads ``where``."""
    defs = _defs_copy(folder)
    shop = defs / "shop.toml"
    shop.write_text(shop.read_text().replace("where = \"device = 'mobile'\"", f'where = "{where}"'))
    return write_case(folder, *_good(folder), defs=defs)


def unknown_column(folder: Path) -> tuple[Path, list[str]]:
    spec = _with_mobile_filter(folder, "devise = 'mobile'")
    return spec, [
        "shop.toml",
        "metric.mobile_purchases.where",
        "unknown column 'devise'",
        "'device'",
    ]


def forbidden_function(folder: Path) -> tuple[Path, list[str]]:
    spec = _with_mobile_filter(folder, "read_text('/etc/passwd') = 'x'")
    return spec, [
        "shop.toml",
        "metric.mobile_purchases.where",
        "function 'read_text' is not allowed",
    ]


def missing_column(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    path = folder / "events" / "part-0.parquet"
    pq.write_table(pq.read_table(path).drop_columns(["value"]), path)
    return spec, ["events/part-0.parquet", "value", "lacks column"]


def empty_exposures(folder: Path) -> tuple[Path, list[str]]:
    events, exposures = _good(folder)
    spec = write_case(folder, events, [])
    return spec, ["exposures.parquet", "no rows"]


def control_not_a_variant(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    spec.write_text(spec.read_text().replace('control = "control"', 'control = "contrl"'))
    return spec, ["spec.toml", "experiment.control", "not among the variants", "'control'"]


def changed_filter(folder: Path) -> tuple[Path, list[str]]:
    defs = _defs_copy(folder)
    flt = defs / "filters" / "bots-v1.toml"
    flt.write_text(flt.read_text().replace('"spider", ', ""))
    spec = write_case(folder, *_good(folder), defs=defs)
    return spec, ["bots-v1.toml", "changed after release", "new version"]


def one_variant_only(folder: Path) -> tuple[Path, list[str]]:
    events, exposures = _good(folder)
    spec = write_case(folder, events, [e for e in exposures if e["variant"] == "control"])
    return spec, ["exposures.parquet", "variant", "'treatment' has no analysable units"]


def corrupt_parquet(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    path = folder / "events" / "part-0.parquet"
    path.write_bytes(path.read_bytes()[:-20])
    return spec, ["events/part-0.parquet", "Parquet"]


def wrong_type(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    path = folder / "events" / "part-0.parquet"
    table = pq.read_table(path)
    table = table.set_column(0, "ts", pa.array([str(v) for v in table["ts"].to_pylist()]))
    pq.write_table(table, path)
    return spec, ["events/part-0.parquet", "ts", "expected timestamp"]


def unknown_two_variant_policy(folder: Path) -> tuple[Path, list[str]]:
    spec = write_case(folder, *_good(folder))
    spec.write_text(
        spec.read_text().replace("alpha = 0.05", 'alpha = 0.05\ntwo_variant_units = "keep"')
    )
    return spec, ["spec.toml", "experiment.two_variant_units", "'exclude'", "first_exposure"]


CASES: list[Callable[[Path], tuple[Path, list[str]]]] = [
    malformed_toml,
    unknown_metric,
    unknown_column,
    forbidden_function,
    missing_column,
    empty_exposures,
    control_not_a_variant,
    changed_filter,
    one_variant_only,
    corrupt_parquet,
    wrong_type,
    unknown_two_variant_policy,
]


@pytest.mark.parametrize("case", CASES, ids=[c.__name__ for c in CASES])
def test_bad_input_gives_one_line_and_writes_nothing(case, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    spec, needles = case(tmp_path)
    before = {p: p.read_bytes() for p in (tmp_path / "events").rglob("*.parquet")}
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 2, result.output
    message = result.stderr.strip()
    assert len(message.splitlines()) == 1, message
    assert message.startswith("error: ")
    for needle in needles:
        assert needle in message, message
    assert not out.exists()
    assert not any(p.name.startswith(".out.") for p in tmp_path.iterdir())
    assert {p: p.read_bytes() for p in (tmp_path / "events").rglob("*.parquet")} == before


def test_check_command_validates_without_output(tmp_path: Path) -> None:
    spec = write_case(tmp_path, *_good(tmp_path))
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 0, result.output
    assert "ok: case" in result.stdout
