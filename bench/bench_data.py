"""Benchmark logs at a chosen scale, generated in chunks so that memory stays bounded.

The project's own generator (``metricforge.sample.generate``) builds its whole scenario in
memory, which is fine for the demo but not for 100M events. Here it runs once per chunk
of users, each chunk with its own seed, into a scratch folder; the chunks' daily files
are then appended into one Parquet file per day (``events/date=YYYY-MM-DD/part-0.parquet``)
and one exposure file. Every chunk is a separate invented population (cookie ids are
64-bit random hex, drawn per seed); a check refuses a data set in which two chunks share an
exposed cookie id. Memory: one chunk (about 1.2 GB at 50,000 users) or one row group while
appending. The result is cached: a folder with a complete ``bench-data.json`` is reused.
"""

from __future__ import annotations

import json
import math
import re
import shutil
from dataclasses import asdict, dataclass
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.sample import generate

DAYS = 32  # experiment days after the generator's 14-day pre-period
EVENTS_PER_USER = 47.0  # measured: 80,000 users over 14 + 32 days gave 3.76M events
CHUNK_USERS = 50_000  # about 2.3M events and 1.2 GB of generator memory per chunk
ROW_GROUP = 1 << 20
FIRST_SEED = 1_000
MARKER = "bench-data.json"


@dataclass(frozen=True)
class DataSet:
    folder: Path
    label: str
    users: int
    chunks: int
    days: int
    events: int
    exposures: int

    @property
    def events_path(self) -> Path:
        return self.folder / "events"

    @property
    def exposures_path(self) -> Path:
        return self.folder / "exposures.parquet"


def parse_size(text: str) -> int:
    """'1M' → 1_000_000, '250k' → 250_000, '100M' → 100_000_000, '5000' → 5000."""
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([kKmM]?)\s*", text)
    if not match:
        raise ValueError(f"not an event count: {text!r} (e.g. 1M, 10M, 100M, 250k)")
    scale = {"": 1, "k": 1_000, "m": 1_000_000}[match.group(2).lower()]
    return int(float(match.group(1)) * scale)


def ensure(root: Path, events: int, label: str) -> DataSet:
    """The cached data set of about ``events`` events under ``root``, generated if missing."""
    folder = root / f"events-{label}"
    marker = folder / MARKER
    if marker.is_file():
        found = json.loads(marker.read_text(encoding="utf-8"))
        found["folder"] = Path(found["folder"])
        return DataSet(**found)
    if folder.exists():
        shutil.rmtree(folder)  # an interrupted generation
    users = max(1_000, round(events / EVENTS_PER_USER))
    chunks = math.ceil(users / CHUNK_USERS)
    scratch = folder / "chunks"
    for k in range(chunks):
        share = users // chunks + (1 if k < users % chunks else 0)
        print(f"  generating chunk {k + 1}/{chunks}: {share:,} users", flush=True)
        out = generate(scratch / "tmp", users=share, days=DAYS, seed=FIRST_SEED + k)
        for day in sorted((out / "events").iterdir()):
            target = scratch / "events" / day.name
            target.mkdir(parents=True, exist_ok=True)
            (day / "part-0.parquet").rename(target / f"part-{k:04d}.parquet")
        (scratch / "exposures").mkdir(parents=True, exist_ok=True)
        (out / "exposures.parquet").rename(scratch / "exposures" / f"part-{k:04d}.parquet")
        shutil.rmtree(out)
    _check_distinct_units(scratch / "exposures")
    print("  appending chunks into one file per day", flush=True)
    n_events = 0
    for day in sorted((scratch / "events").iterdir()):
        target = folder / "events" / day.name
        target.mkdir(parents=True)
        n_events += _append(sorted(day.iterdir()), target / "part-0.parquet")
    n_exposures = _append(sorted((scratch / "exposures").iterdir()), folder / "exposures.parquet")
    shutil.rmtree(scratch)
    data = DataSet(folder, label, users, chunks, DAYS, n_events, n_exposures)
    marker.write_text(json.dumps({**asdict(data), "folder": str(folder)}, indent=2) + "\n")
    return data


def _check_distinct_units(folder: Path) -> None:
    """No exposed cookie id may come from two chunks (two populations would merge)."""
    con = duckdb.connect(config={"memory_limit": "2GB"})
    files = [str(p) for p in sorted(folder.iterdir())]
    row = con.execute(
        "SELECT count(*) FROM (SELECT unit_id FROM read_parquet(?, filename = true)"
        " GROUP BY unit_id HAVING count(DISTINCT filename) > 1)",
        [files],
    ).fetchone()
    con.close()
    if row is None or row[0] != 0:
        raise RuntimeError(f"{row[0] if row else '?'} cookie ids appear in two chunks")


def _append(parts: list[Path], target: Path) -> int:
    """Concatenate Parquet files into ``target`` in row groups of at most ROW_GROUP rows."""
    schema = pq.read_schema(parts[0])
    pending: list[pa.Table] = []
    rows = total = 0
    with pq.ParquetWriter(target, schema, compression="zstd") as writer:
        for part in parts:
            table = pq.read_table(part, schema=schema)
            pending.append(table)
            rows += table.num_rows
            total += table.num_rows
            if rows >= ROW_GROUP:
                writer.write_table(pa.concat_tables(pending), row_group_size=ROW_GROUP)
                pending, rows = [], 0
        if pending:
            writer.write_table(pa.concat_tables(pending), row_group_size=ROW_GROUP)
    return total
