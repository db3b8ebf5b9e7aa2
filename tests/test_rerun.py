"""Rerun from a manifest: its own copies, the inputs verified, the verdict explained."""

from __future__ import annotations

import hashlib
import json
import shutil
import struct
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.rerun import RERUN_DIFFERS_EXIT
from metricforge.sample import EVENT_SCHEMA, EXPOSURE_SCHEMA
from tests.conftest import PIPELINES, ROOT, SAMPLE, SPEC, event, exposure

DAYS = ("2026-09-15", "2026-09-16", "2026-09-17")


def day_events(day: int, units: range) -> list[dict[str, Any]]:
    minutes = 24 * 60 * day
    rows = []
    for i in units:
        unit = f"u{i:03d}"
        rows += [
            event(unit, "impression", minutes + 1),
            event(unit, "purchase", minutes + 2, value=10.0 + i % 7 + day),
        ]
    return rows


def write_day(folder: Path, day: int, units: range = range(40), **options: Any) -> Path:
    path = folder / "events" / f"date={DAYS[day]}" / "part-0.parquet"
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(
        pa.Table.from_pylist(day_events(day, units), schema=EVENT_SCHEMA), path, **options
    )
    return path


def partitioned_case(folder: Path, defs: Path, **options: Any) -> Path:
    """A small experiment whose events are a hive-partitioned folder of two days."""
    folder.mkdir(parents=True, exist_ok=True)
    write_day(folder, 0, **options)
    write_day(folder, 1, **options)
    exposures = [exposure(f"u{i:03d}", "control" if i % 2 else "treatment") for i in range(40)]
    pq.write_table(
        pa.Table.from_pylist(exposures, schema=EXPOSURE_SCHEMA), folder / "exposures.parquet"
    )
    spec = folder / "spec.toml"
    text = SPEC.format(defs="../defs", decision="revenue", diagnostics='["purchases"]')
    spec.write_text(text, encoding="utf-8")
    return spec


@pytest.fixture
def case(tmp_path: Path) -> Path:
    shutil.copytree(ROOT / "metric_defs", tmp_path / "defs")
    return partitioned_case(tmp_path / "exp", tmp_path / "defs")


def invoke(*args: str | Path) -> Any:
    return CliRunner().invoke(app, [str(a) for a in args])


def run_ok(*args: str | Path) -> Any:
    result = invoke(*args)
    assert result.exit_code == 0, result.output
    return result


def same_bytes(a: Path, b: Path) -> bool:
    return all(
        (a / n).read_bytes() == (b / n).read_bytes()
        for n in ("scorecard.parquet", "scorecard.json")
    )


def edit_library(defs: Path) -> None:
    """Change today's library: revenue redefined, a broken file, the filter registry gone."""
    shop = defs / "shop.toml"
    shop.write_text(shop.read_text().replace('value = "value"', 'value = "value * 2"', 1))
    (defs / "zz_broken.toml").write_text("[metric.oops]\nkind = 'nonsense'\n")
    (defs / "filters" / "released.toml").write_text("")


def test_rerun_after_library_edit_reproduces_byte_for_byte(case: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "first")
    edit_library(tmp_path / "defs")
    assert invoke("run", case, "--out", results / "today").exit_code == 2  # today's library
    result = run_ok("rerun", results / "first" / "manifest.json", "--out", results / "again")
    assert "REPRODUCED byte for byte" in result.output
    assert same_bytes(results / "first", results / "again")
    shutil.rmtree(tmp_path / "defs")  # not even the folder is needed
    run_ok("rerun", results / "first", "--out", results / "again2")
    assert same_bytes(results / "first", results / "again2")


def test_a_fresh_run_with_the_edited_library_differs(case: Path, tmp_path: Path) -> None:
    """The edit of the test above matters: today's library gives other numbers."""
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "first")
    shop = tmp_path / "defs" / "shop.toml"
    shop.write_text(shop.read_text().replace('value = "value"', 'value = "value * 2"', 1))
    run_ok("run", case, "--out", results / "today")
    assert not same_bytes(results / "first", results / "today")
    run_ok("rerun", results / "first", "--out", results / "again")
    assert same_bytes(results / "first", results / "again")


@pytest.mark.slow
def test_demo_rerun_after_library_edit_reproduces_byte_for_byte(tmp_path: Path) -> None:
    """The demo experiment, from a copy of the repository layout whose library is edited."""
    (tmp_path / "pipelines").mkdir()
    shutil.copy(PIPELINES / "checkout_layout.toml", tmp_path / "pipelines")
    shutil.copytree(ROOT / "metric_defs", tmp_path / "metric_defs")
    (tmp_path / "sample_data").symlink_to(SAMPLE, target_is_directory=True)
    spec = tmp_path / "pipelines" / "checkout_layout.toml"
    results = tmp_path / "results"
    run_ok("run", spec, "--out", results / "before")
    edit_library(tmp_path / "metric_defs")
    result = run_ok("rerun", results / "before" / "manifest.json", "--out", results / "after")
    assert "REPRODUCED" in result.output
    assert same_bytes(results / "before", results / "after")


def _change_day0(folder: Path) -> list[str]:
    write_day(folder, 0, units=range(39))
    return ["changed events/date=2026-09-15/part-0.parquet", "rows 80 → 78", "footer hash differs"]


def _remove_day1(folder: Path) -> list[str]:
    (folder / "events" / "date=2026-09-16" / "part-0.parquet").unlink()
    return ["missing events/date=2026-09-16/part-0.parquet"]


def _add_day2(folder: Path) -> list[str]:
    write_day(folder, 2)
    return ["added events/date=2026-09-17/part-0.parquet"]


def _corrupt_exposures(folder: Path) -> list[str]:
    path = folder / "exposures.parquet"
    path.write_bytes(path.read_bytes()[:-30])
    return ["changed exposures.parquet", "unreadable"]


CHANGES = [_change_day0, _remove_day1, _add_day2, _corrupt_exposures]


@pytest.mark.parametrize("edit", CHANGES, ids=lambda f: f.__name__.strip("_"))
def test_changed_input_is_named_and_refused(case: Path, tmp_path: Path, edit: Any) -> None:
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "first")
    expected = edit(case.parent)
    result = invoke("rerun", results / "first" / "manifest.json", "--out", results / "again")
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ")
    for text in [*expected, "--allow-changed-inputs", "manifest.json"]:
        assert text in result.output
    assert not (results / "again").exists()


def test_every_change_is_listed_and_allowed_run_explains(case: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "first")
    expected = _change_day0(case.parent) + _remove_day1(case.parent) + _add_day2(case.parent)
    refused = invoke("rerun", results / "first", "--out", results / "again")
    assert refused.exit_code == 2
    assert "3 input file(s) differ" in refused.output
    for text in expected:
        assert text in refused.output
    allowed = invoke(
        "rerun", results / "first", "--out", results / "again", "--allow-changed-inputs"
    )
    assert allowed.exit_code == RERUN_DIFFERS_EXIT, allowed.output
    assert "DIFFERENT" in allowed.output
    assert "why: inputs: changed events/date=2026-09-15/part-0.parquet" in allowed.output
    assert "values differ: revenue/treatment" in allowed.output
    assert "bug" not in allowed.output
    manifest = json.loads((results / "again" / "manifest.json").read_text())
    assert len(manifest["rerun_of"]["input_changes"]) == 3


def test_full_content_hash_catches_what_the_footer_cannot(tmp_path: Path) -> None:
    """A same-length edit inside a data page leaves size, rows and footer unchanged."""
    shutil.copytree(ROOT / "metric_defs", tmp_path / "defs")
    plain = {"compression": "none", "use_dictionary": False, "write_statistics": False}
    case = partitioned_case(tmp_path / "exp", tmp_path / "defs", **plain)
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "footer")
    run_ok("run", case, "--out", results / "full", "--hash-inputs", "full")
    path = case.parent / "events" / "date=2026-09-15" / "part-0.parquet"
    blob = path.read_bytes()
    assert blob.count(b"Mozilla/5.0") > 0
    path.write_bytes(blob.replace(b"Mozilla/5.0", b"Mozilla/6.0"))
    assert len(path.read_bytes()) == len(blob)
    run_ok("rerun", results / "footer", "--out", results / "footer_again")
    refused = invoke("rerun", results / "full", "--out", results / "full_again")
    assert refused.exit_code == 2
    assert "changed events/date=2026-09-15/part-0.parquet (content hash differs)" in refused.output


def _footer_sha256(path: Path) -> str:
    """Independent of the tool: the Parquet footer is the `length` bytes before the last 8."""
    blob = path.read_bytes()
    (length,) = struct.unpack("<I", blob[-8:-4])
    assert blob[-4:] == b"PAR1"
    return hashlib.sha256(blob[-8 - length : -8]).hexdigest()


def test_manifest_is_self_contained(case: Path, tmp_path: Path) -> None:
    out = tmp_path / "results" / "first"
    run_ok("run", case, "--out", out, "--hash-inputs", "full")
    man = json.loads((out / "manifest.json").read_text())
    assert (man["format"], man["format_version"]) == ("metricforge-manifest", 1)
    assert man["spec"]["text"] == case.read_text()
    assert man["spec"]["absolute"] == case.as_posix()
    defs = tmp_path / "defs"
    assert [f["text"] for f in man["definitions"]["files"]] == [
        p.read_text() for p in sorted(defs.glob("*.toml"))
    ]
    assert man["definitions"]["metrics"]["revenue"]["definition"]["value"] == "value"
    registry = (defs / "filters" / "released.toml").read_text()
    entry = man["bot_filter"]["registry_entry"]
    assert f"[{entry['name']}.{entry['version']}]" in registry
    assert f'sha256 = "{entry["sha256"]}"' in registry and f'"{entry["released"]}"' in registry
    filter_file = defs / "filters" / "bots-v1.toml"
    assert man["bot_filter"]["text"] == filter_file.read_text()
    assert entry["sha256"] == hashlib.sha256(filter_file.read_bytes()).hexdigest()
    assert man["bot_filter"]["path"] == "../defs/filters/bots-v1.toml"
    files = man["inputs"]["files"]
    assert [f["path"] for f in files] == [
        "events/date=2026-09-15/part-0.parquet",
        "events/date=2026-09-16/part-0.parquet",
        "exposures.parquet",
    ]
    for record in files:
        path = Path(record["absolute"])
        assert path == case.parent / record["path"]
        assert record["size"] == path.stat().st_size
        assert record["rows"] == pq.read_metadata(path).num_rows
        assert record["footer_sha256"] == _footer_sha256(path)
        assert record["content_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert man["inputs"]["roots"]["events"] == {
        "path": "events",
        "absolute": (case.parent / "events").as_posix(),
    }
    assert man["libraries"]["pyarrow"] == pa.__version__
    assert man["engine"]["name"] == "duckdb" and man["tool"]["name"] == "metricforge"


def test_scorecard_does_not_depend_on_the_working_directory(
    case: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(case.parent)
    run_ok("run", "spec.toml", "--out", tmp_path / "results" / "here")
    monkeypatch.chdir(tmp_path)
    run_ok("run", case, "--out", tmp_path / "results" / "there")
    assert same_bytes(tmp_path / "results" / "here", tmp_path / "results" / "there")


def test_moved_data_found_through_spec_folder(case: Path, tmp_path: Path) -> None:
    run_ok("run", case, "--out", tmp_path / "results" / "first")
    moved = tmp_path / "moved"
    shutil.move(case.parent, moved)
    lost = invoke("rerun", tmp_path / "results" / "first", "--out", tmp_path / "results" / "x")
    assert lost.exit_code == 2 and "missing exposures.parquet" in lost.output
    assert "--spec-folder" in lost.output
    result = run_ok(
        "rerun",
        tmp_path / "results" / "first",
        "--out",
        tmp_path / "results" / "again",
        "--spec-folder",
        moved,
    )
    assert "REPRODUCED" in result.output


def _rewrite(path: Path, change: Any) -> None:
    data = json.loads(path.read_text())
    change(data)
    path.write_text(json.dumps(data, indent=2) + "\n")


def test_difference_explained_by_versions(case: Path, tmp_path: Path) -> None:
    """An old run recorded with other tool, engine and library versions."""
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)

    def older(data: dict[str, Any]) -> None:
        data["stamp"].update(tool_version="0.0.9", engine_version="1.9.0")
        if "libraries" in data:
            data["libraries"]["pyarrow"] = "15.0.0"

    _rewrite(old / "manifest.json", older)
    _rewrite(old / "scorecard.json", older)
    result = invoke("rerun", old, "--out", tmp_path / "results" / "new")
    assert result.exit_code == RERUN_DIFFERS_EXIT, result.output
    assert "scorecard.json differs" in result.output
    assert "tool version: metricforge 0.0.9 → " in result.output
    assert "engine: duckdb 1.9.0 → duckdb " in result.output
    assert f"library versions: pyarrow 15.0.0 → {pa.__version__}" in result.output
    assert "why: inputs" not in result.output and "bug" not in result.output


def test_same_inputs_and_versions_yet_different_numbers_is_called_a_bug(
    case: Path, tmp_path: Path
) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)
    table = pq.read_table(old / "scorecard.parquet")
    values = pa.array([v * 1.01 for v in table["value"].to_pylist()])
    table = table.set_column(table.schema.get_field_index("value"), "value", values)
    pq.write_table(table, old / "scorecard.parquet", compression="zstd")
    result = invoke("rerun", old, "--out", tmp_path / "results" / "new")
    assert result.exit_code == RERUN_DIFFERS_EXIT
    assert "same inputs and versions yet different numbers" in result.output
    assert "values differ: revenue/treatment: value" in result.output


def test_missing_old_scorecard_is_not_a_confirmation(case: Path, tmp_path: Path) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)
    (old / "scorecard.parquet").unlink()
    result = invoke("rerun", old, "--out", tmp_path / "results" / "new")
    assert result.exit_code == RERUN_DIFFERS_EXIT
    assert "NOT CONFIRMED" in result.output and "no old scorecard.parquet" in result.output


def _tamper_spec(data: dict[str, Any]) -> None:
    data["spec"]["text"] = data["spec"]["text"].replace("alpha = 0.05", "alpha = 0.1")


def _tamper_definitions(data: dict[str, Any]) -> None:
    for record in data["definitions"]["files"]:
        record.pop("sha256")
        record["text"] = record["text"].replace('value = "value"', 'value = "value * 2"', 1)


def _old_format(data: dict[str, Any]) -> None:
    del data["format"]


def _no_stamp(data: dict[str, Any]) -> None:
    del data["stamp"]


@pytest.mark.parametrize(
    ("tamper", "expected"),
    [
        (_tamper_spec, "spec.text: the copy does not match its recorded sha256"),
        (_tamper_definitions, "definitions: the definition copies do not give the recorded"),
        (_old_format, "format: not a metricforge manifest"),
        (_no_stamp, "stamp: required key is missing"),
    ],
)
def test_bad_manifest_is_refused(case: Path, tmp_path: Path, tamper: Any, expected: str) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)
    _rewrite(old / "manifest.json", tamper)
    result = invoke("rerun", old / "manifest.json", "--out", tmp_path / "results" / "new")
    assert result.exit_code == 2, result.output
    assert result.output.startswith("error: ") and len(result.output.strip().splitlines()) == 1
    assert "manifest.json" in result.output and expected in result.output
    assert not (tmp_path / "results" / "new").exists()


def test_rerun_refuses_to_overwrite_its_own_reference(case: Path, tmp_path: Path) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)
    result = invoke("rerun", old, "--out", old)
    assert result.exit_code == 2 and "folder of the manifest" in result.output


def test_manifest_not_json(tmp_path: Path) -> None:
    (tmp_path / "manifest.json").write_text("{not json")
    result = invoke("rerun", tmp_path / "manifest.json", "--out", tmp_path / "x")
    assert result.exit_code == 2 and "not a JSON manifest" in result.output


def test_unreadable_old_scorecard_is_reported_not_crashed(case: Path, tmp_path: Path) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)
    (old / "scorecard.json").write_text("{broken")
    result = invoke("rerun", old, "--out", tmp_path / "results" / "new")
    assert result.exit_code == RERUN_DIFFERS_EXIT, result.output
    assert "the old scorecard cannot be read" in result.output
    assert (tmp_path / "results" / "new" / "scorecard.parquet").is_file()


def test_hostile_filter_name_in_manifest_is_refused(case: Path, tmp_path: Path) -> None:
    old = tmp_path / "results" / "old"
    run_ok("run", case, "--out", old)

    def hostile(data: dict[str, Any]) -> None:
        data["bot_filter"]["registry_entry"]["name"] = "../../escape"
        data["options"]["bot_filter"] = "../../escape@1"

    _rewrite(old / "manifest.json", hostile)
    result = invoke("rerun", old, "--out", tmp_path / "results" / "new")
    assert result.exit_code == 2 and "NAME@VERSION" in result.output
    assert not (Path(tempfile.gettempdir()) / "escape-v1.toml").exists()
