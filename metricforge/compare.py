"""Comparing two result folders: the same experiment under two filter versions, or two runs.

Rows are matched on (metric, variant) and compared on the columns both scorecards have,
so a scorecard that gained columns still compares. Two results are *not comparable* when
their stamps differ in the experiment, the bot filter or the metric definitions.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import ManifestError
from metricforge.manifest import MANIFEST_NAME
from metricforge.provenance import Stamp
from metricforge.report.files import SEGMENTS_FILE, dump_json, parquet_bytes, write_folder

SCORECARD = "scorecard.parquet"
SCORECARD_JSON = "scorecard.json"
KEY = ("metric", "variant")
# Columns that stamp a row rather than measure something: checked for comparability.
STAMP_COLUMNS = frozenset(f.name for f in dataclasses.fields(Stamp))
NOT_COMPARABLE_EXIT = 4  # compare without --force: the stamps differ in filter or definitions


@dataclass(frozen=True)
class ResultFolder:
    folder: Path
    table: pa.Table
    card: dict[str, Any]  # scorecard.json
    manifest: dict[str, Any] | None

    @property
    def stamp(self) -> dict[str, Any]:
        stamp: dict[str, Any] = self.card.get("stamp", {})
        return stamp

    @property
    def filter_ref(self) -> str:
        s = self.stamp
        return f"{s.get('bot_filter')}@{s.get('bot_filter_version')}"


def read_result(folder: Path) -> ResultFolder:
    """A result folder written by ``run`` or ``rerun`` (a path to a file in it also works)."""
    if folder.is_file():
        folder = folder.parent
    parquet, card_path = folder / SCORECARD, folder / SCORECARD_JSON
    for path in (parquet, card_path):
        if not path.is_file():
            raise ManifestError("not a result folder: file missing", file=str(path))
    try:
        table = pq.read_table(parquet)
        card = json.loads(card_path.read_bytes().decode("utf-8"))
    except (pa.ArrowException, OSError, ValueError) as err:
        first = (str(err).splitlines() or [type(err).__name__])[0]
        raise ManifestError(f"cannot read the scorecard: {first}", file=str(folder)) from None
    missing = [c for c in KEY if c not in table.column_names]
    if missing:
        raise ManifestError(f"not a scorecard: no column '{missing[0]}'", file=str(parquet))
    if not (isinstance(card, dict) and isinstance(card.get("stamp"), dict)):
        raise ManifestError("not a scorecard: no stamp", file=str(card_path), key="stamp")
    manifest = None
    try:
        manifest = json.loads((folder / MANIFEST_NAME).read_bytes().decode("utf-8"))
    except (OSError, ValueError):
        manifest = None
    return ResultFolder(folder, table, card, manifest if isinstance(manifest, dict) else None)


def _numeric(t: pa.DataType) -> bool:
    return bool(pa.types.is_integer(t) or pa.types.is_floating(t))


def shared_columns(a: pa.Schema, b: pa.Schema) -> list[pa.Field]:
    """The value columns both scorecards have with the same type, in A's order."""
    return [
        f
        for f in a
        if f.name not in KEY
        and f.name not in STAMP_COLUMNS
        and f.name in b.names
        and b.field(f.name).type == f.type
    ]


def _finite(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def _delta(a: Any, b: Any) -> float | int | None:
    """B − A, or None unless both are finite numbers."""
    if isinstance(a, int) and isinstance(b, int) and not isinstance(a | b, bool):
        return b - a
    return float(b) - float(a) if _finite(a) and _finite(b) else None


def _keyed(result: ResultFolder) -> dict[tuple[str, str], dict[str, Any]]:
    rows: dict[tuple[str, str], dict[str, Any]] = {}
    for row in result.table.to_pylist():
        key = (str(row["metric"]), str(row["variant"]))
        if key in rows:
            raise ManifestError(
                f"metric '{key[0]}', variant '{key[1]}' appears twice", file=str(result.folder)
            )
        rows[key] = row
    return rows


def match_rows(a: ResultFolder, b: ResultFolder) -> tuple[list[pa.Field], list[dict[str, Any]]]:
    """Rows matched on (metric, variant), A's order first, with ``<col>_a``, ``<col>_b`` and,
    for numbers, ``<col>_change`` (B − A) of every shared column."""
    columns = shared_columns(a.table.schema, b.table.schema)
    rows_a, rows_b = _keyed(a), _keyed(b)
    out = []
    for key in [*rows_a, *(k for k in rows_b if k not in rows_a)]:
        ra, rb = rows_a.get(key), rows_b.get(key)
        row: dict[str, Any] = {"metric": key[0], "variant": key[1]}
        row["in_a"], row["in_b"] = ra is not None, rb is not None
        for f in columns:
            va = ra.get(f.name) if ra else None
            vb = rb.get(f.name) if rb else None
            row[f"{f.name}_a"], row[f"{f.name}_b"] = va, vb
            if _numeric(f.type):
                row[f"{f.name}_change"] = _delta(va, vb)
        out.append(row)
    return columns, out


def changed_rows(columns: list[pa.Field], rows: list[dict[str, Any]]) -> list[str]:
    """``metric/variant: col, col`` for each row whose values differ between A and B."""
    out = []
    for row in rows:
        if not (row["in_a"] and row["in_b"]):
            out.append(f"{row['metric']}/{row['variant']}: only in {'A' if row['in_a'] else 'B'}")
            continue
        cols = [f.name for f in columns if not _same(row[f"{f.name}_a"], row[f"{f.name}_b"])]
        if cols:
            out.append(f"{row['metric']}/{row['variant']}: {', '.join(cols)}")
    return out


def _same(a: Any, b: Any) -> bool:
    both_nan = isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b)
    return both_nan or bool(a == b)


def _definition_differences(a: ResultFolder, b: ResultFolder) -> list[str]:
    def metrics(r: ResultFolder) -> dict[str, Any] | None:
        found = (r.manifest or {}).get("definitions", {}).get("metrics")
        return found if isinstance(found, dict) else None

    ma, mb = metrics(a), metrics(b)
    if ma is None or mb is None:
        return []
    names = sorted(set(ma) | set(mb))
    return [n for n in names if ma.get(n, {}).get("definition") != mb.get(n, {}).get("definition")]


def _short(value: Any) -> str:
    return str(value)[:12]


def comparability(a: ResultFolder, b: ResultFolder) -> list[str]:
    """Why A and B are not comparable (empty: comparable)."""
    sa, sb = a.stamp, b.stamp
    reasons = []
    if sa.get("experiment") != sb.get("experiment"):
        reasons.append(f"experiment: A {sa.get('experiment')}, B {sb.get('experiment')}")
    if (a.filter_ref, sa.get("bot_filter_sha256")) != (b.filter_ref, sb.get("bot_filter_sha256")):
        reasons.append(
            f"bot filter: A {a.filter_ref} ({_short(sa.get('bot_filter_sha256'))}),"
            f" B {b.filter_ref} ({_short(sb.get('bot_filter_sha256'))})"
        )
    if sa.get("definitions_sha256") != sb.get("definitions_sha256"):
        which = _definition_differences(a, b)
        reasons.append(
            f"metric definitions: A {_short(sa.get('definitions_sha256'))},"
            f" B {_short(sb.get('definitions_sha256'))}"
            + (f" (differ in {', '.join(which)})" if which else "")
        )
    return reasons


_NOTES = (
    ("spec_sha256", "spec"),
    ("inputs_fingerprint", "inputs"),
    ("tool_version", "tool version"),
    ("engine", "engine"),
    ("engine_version", "engine version"),
)


def notes(a: ResultFolder, b: ResultFolder) -> list[str]:
    """Stamp differences that do not make the pair incomparable but are worth knowing."""
    sa, sb = a.stamp, b.stamp
    return [
        f"{what}: A {_short(sa.get(key))}, B {_short(sb.get(key))}"
        for key, what in _NOTES
        if sa.get(key) != sb.get(key)
    ]


def not_compared(a: ResultFolder, b: ResultFolder) -> str | None:
    """What the comparison leaves out: segment breakdowns ([segments]) are not matched."""
    with_segments = [side for side, r in (("A", a), ("B", b)) if "segments" in r.card]
    if not with_segments:
        return None
    return (
        f"segment breakdowns ({' and '.join(with_segments)}) are not compared;"
        f" see each folder's {SEGMENTS_FILE}"
    )


@dataclass(frozen=True)
class Comparison:
    a: ResultFolder
    b: ResultFolder
    columns: list[pa.Field]
    rows: list[dict[str, Any]]
    variants: list[dict[str, Any]]
    reasons: list[str]  # why not comparable
    notes: list[str]
    left_out: str | None = None  # what is not compared (segment breakdowns), if anything

    @property
    def comparable(self) -> bool:
        return not self.reasons


def _variants(a: ResultFolder, b: ResultFolder) -> list[dict[str, Any]]:
    """Per-variant counts (units analysed, bot units, ...) of A and B and the change."""
    va = {v.get("variant"): v for v in a.card.get("variants", []) if isinstance(v, dict)}
    vb = {v.get("variant"): v for v in b.card.get("variants", []) if isinstance(v, dict)}
    out = []
    for name in [*va, *(n for n in vb if n not in va)]:
        ra, rb = va.get(name, {}), vb.get(name, {})
        row: dict[str, Any] = {"variant": name}
        for key in [k for k in ra if k != "variant" and _finite(ra[k]) and _finite(rb.get(k))]:
            row[f"{key}_a"], row[f"{key}_b"] = ra[key], rb[key]
            row[f"{key}_change"] = _delta(ra[key], rb[key])
        out.append(row)
    return out


def compare_results(a_folder: Path, b_folder: Path) -> Comparison:
    a, b = read_result(a_folder), read_result(b_folder)
    columns, rows = match_rows(a, b)
    return Comparison(
        a, b, columns, rows, _variants(a, b), comparability(a, b), notes(a, b), not_compared(a, b)
    )


def comparison_table(c: Comparison) -> pa.Table:
    fields = [pa.field("metric", pa.string()), pa.field("variant", pa.string())]
    fields += [pa.field("in_a", pa.bool_()), pa.field("in_b", pa.bool_())]
    for f in c.columns:
        fields += [pa.field(f"{f.name}_a", f.type), pa.field(f"{f.name}_b", f.type)]
        if _numeric(f.type):
            kind = pa.int64() if pa.types.is_integer(f.type) else pa.float64()
            fields.append(pa.field(f"{f.name}_change", kind))
    return pa.Table.from_pylist(c.rows, schema=pa.schema(fields))


def _clean(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_clean(v) for v in value]
    return value


def comparison_json(c: Comparison, *, forced: bool) -> dict[str, Any]:
    def side(r: ResultFolder) -> dict[str, Any]:
        return {"folder": r.folder.absolute().as_posix(), "stamp": r.stamp}

    cleaned: dict[str, Any] = _clean(
        {
            "comparable": c.comparable,
            "not_comparable_because": c.reasons,
            "forced": forced,
            "also_differs": c.notes,
            **({"not_compared": c.left_out} if c.left_out is not None else {}),
            "a": side(c.a),
            "b": side(c.b),
            "key": list(KEY),
            "columns": [f.name for f in c.columns],
            "variants": c.variants,
            "rows": c.rows,
        }
    )
    return cleaned


def write_comparison(out: Path, c: Comparison, *, forced: bool) -> None:
    """comparison.parquet and comparison.json into ``out``, all or nothing."""
    write_folder(
        out,
        {
            "comparison.parquet": parquet_bytes(comparison_table(c)),
            "comparison.json": dump_json(comparison_json(c, forced=forced)),
        },
        protected=[c.a.folder.absolute(), c.b.folder.absolute()],
    )
