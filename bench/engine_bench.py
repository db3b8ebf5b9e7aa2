"""Spark (local mode) versus DuckDB on ~10M events: whole `metricforge run` processes.

The events are made by the project's own generator (`metricforge sample`) in a temporary
folder, in chunks of different seeds so that no process needs more than ~1.5 GB: each
chunk's files are moved into one hive-partitioned events folder (part-K.parquet per day)
and one exposures folder. Then the same pipeline runs as whole processes, alternating
DuckDB and Spark, and the medians and their ratio are printed (and, with --results, written
as a section of bench/RESULTS.md). Timings include Python start-up and, for Spark, the JVM.

    python bench/engine_bench.py                       # 390,000 users (~10M events), 3 reps
    python bench/engine_bench.py --users 40000 --reps 1 --data /tmp/mf-small  # a quick try
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parent.parent
SECTION = "## Engines: Spark local versus DuckDB"
CHUNK_USERS = 97_500


def generate(data: Path, users: int) -> None:
    """``users`` people in chunks of at most CHUNK_USERS, seeds 101, 102, ..."""
    (data / "events").mkdir(parents=True)
    (data / "exposures").mkdir()
    chunks = -(-users // CHUNK_USERS)
    for k in range(chunks):
        n = min(CHUNK_USERS, users - k * CHUNK_USERS)
        part = data / f"chunk-{k}"
        command = ["metricforge", "sample", "--out", str(part), "--users", str(n)]
        subprocess.run([*command, "--seed", str(101 + k)], check=True, capture_output=True)
        for day in sorted((part / "events").iterdir()):
            (data / "events" / day.name).mkdir(exist_ok=True)
            (day / "part-0.parquet").rename(data / "events" / day.name / f"part-{k}.parquet")
        (part / "exposures.parquet").rename(data / "exposures" / f"part-{k}.parquet")
        shutil.rmtree(part)
        print(f"generated chunk {k + 1}/{chunks} ({n} users)", file=sys.stderr, flush=True)


def count_events(data: Path) -> int:
    return sum(pq.read_metadata(p).num_rows for p in (data / "events").rglob("*.parquet"))


def write_spec(folder: Path, data: Path, pipeline: str) -> Path:
    text = (ROOT / "pipelines" / f"{pipeline}.toml").read_text(encoding="utf-8")
    text = text.replace('"../sample_data/events"', json.dumps(str(data / "events")))
    text = text.replace('"../sample_data/exposures.parquet"', json.dumps(str(data / "exposures")))
    text = text.replace('"../metric_defs"', json.dumps(str(ROOT / "metric_defs")))
    spec = folder / f"{pipeline}.toml"
    spec.write_text(text, encoding="utf-8")
    return spec


def timed_run(spec: Path, out: Path, engine: str) -> float:
    command = ["metricforge", "run", str(spec), "--out", str(out), "--engine", engine]
    start = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"{engine} failed: {done.stderr.strip().splitlines()[-1:]}")
    return seconds


def same_counts(a: Path, b: Path) -> bool:
    left, right = (json.loads((p / "scorecard.json").read_text()) for p in (a, b))
    return bool(left["variants"] == right["variants"])


def section(events: int, users: int, pipeline: str, times: dict[str, list[float]]) -> str:
    duck, spark = (statistics.median(times[e]) for e in ("duckdb", "spark"))
    load = os.getloadavg()[0]
    runs = ", ".join(f"{e}: " + " ".join(f"{t:.1f}" for t in times[e]) for e in times)
    return f"""{SECTION}

`python bench/engine_bench.py --users {users} --reps {len(times["duckdb"])}`: `metricforge run
pipelines/{pipeline}.toml` over {events:,} events ({users:,} generated users), each run a
whole process (Python start-up, and for Spark the JVM and session start), the two engines
alternating; medians.

| engine | median seconds |
|---|---|
| DuckDB (embedded, all cores) | {duck:.1f} |
| Spark local[2] (pyspark, driver memory 2g) | {spark:.1f} |
| **ratio Spark / DuckDB** | **{spark / duck:.1f}×** |

Runs (s): {runs}. Machine: {os.cpu_count()} cores, Python {platform.python_version()};
shared with other agents' jobs during the run (1-minute load average {load:.1f} at the end), so
single figures are noisy; the ratio is the point. Both engines gave the same per-variant
counts. Spark earns its overhead only past one machine: on a cluster it reads the same
views from distributed storage (README: running against a cluster).
"""


def write_section(results: Path, text: str) -> None:
    """Replace this benchmark's section of RESULTS.md (other sections are kept)."""
    old = results.read_text(encoding="utf-8") if results.exists() else "# Benchmark results\n"
    if SECTION in old:
        head, _, rest = old.partition(SECTION)
        nxt = rest.find("\n## ")
        tail = rest[nxt + 1 :] if nxt >= 0 else ""
        new = head + text + ("\n" + tail if tail else "")
    else:
        new = old.rstrip("\n") + "\n\n" + text
    results.write_text(new, encoding="utf-8")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--users", type=int, default=390_000)
    parser.add_argument("--reps", type=int, default=3)
    parser.add_argument("--pipeline", default="checkout_layout")
    parser.add_argument("--data", type=Path, help="keep the generated data here (reused)")
    parser.add_argument("--results", type=Path, help="write the section into this file")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="metricforge-engine-bench-") as tmp:
        folder = Path(tmp)
        data = args.data or folder / "data"
        if not (data / "events").is_dir():
            generate(data, args.users)
        events = count_events(data)
        spec = write_spec(folder, data, args.pipeline)
        times: dict[str, list[float]] = {"duckdb": [], "spark": []}
        for rep in range(args.reps):
            for engine in ("duckdb", "spark") if rep % 2 == 0 else ("spark", "duckdb"):
                seconds = timed_run(spec, folder / f"{engine}-{rep}", engine)
                times[engine].append(seconds)
                print(f"rep {rep + 1} {engine}: {seconds:.1f} s", file=sys.stderr, flush=True)
        if not same_counts(folder / "duckdb-0", folder / "spark-0"):
            raise SystemExit("the engines disagree on the per-variant counts")
        text = section(events, args.users, args.pipeline, times)
    print(text)
    if args.results:
        write_section(args.results, text)


if __name__ == "__main__":
    main()
