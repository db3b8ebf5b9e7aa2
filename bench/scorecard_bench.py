"""Benchmark: `metricforge run` against hand-written alternatives, each timed as a process.

    python bench/scorecard_bench.py --events 10M [--repeats 3] [--data DIR] [--threads N]

Generates (or reuses) logs of about that many events with the project's own generator
(bench/bench_data.py, in chunks), then, alternating the order in every round, runs:

  a   `metricforge run bench/scorecard.toml` with the tool's defaults (memory limit 3.5GB)
  a0  the same with `--memory-limit none` (DuckDB's own default: 80% of RAM)
  b   bench/fused.sql, the best hand-written fused DuckDB query for the same statistics
  c   one hand-written DuckDB query per metric
  d   polars' streaming engine

It checks that b, c and d give the tool's scorecard (after the tool's own statistics) to a
stated tolerance and that every run of a and a0 wrote byte-identical scorecards, then prints
median wall times, the ratios a/b, c/a, d/a, a/a0, events per second and peak memory (the
child's maximum resident set, from wait4) of each, against the targets.
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
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

import bench_data  # noqa: E402
import contenders  # noqa: E402

REL_TOL, ABS_TOL = 1e-9, 1e-12  # agreement of b, c, d with a: |x - y| <= REL*max(|x|,|y|) + ABS
TARGETS = {"a/b": ("<=", 1.05), "c/a": (">=", 4.0), "d/a": (">=", 1.2), "a/a0": ("<=", 1.3)}
MEMORY_TARGET_BYTES = 4 * 1000**3
LABELS = {
    "a": "metricforge run (defaults: 3.5GB limit)",
    "a0": "metricforge run --memory-limit none",
    "b": "hand-written fused DuckDB query",
    "c": "one DuckDB query per metric",
    "d": "polars streaming",
}
# scorecard fields compared between contenders (the stamp and texts are the tool's own)
SKIP_KEYS = frozenset({"stamp", "figure", "inputs_fingerprint", "spec_sha256"})


@dataclass
class Runs:
    wall: list[float] = field(default_factory=list)
    cpu: list[float] = field(default_factory=list)  # user + system seconds of the child
    peak_kb: list[int] = field(default_factory=list)

    @property
    def median(self) -> float:
        return statistics.median(self.wall)

    @property
    def median_cpu(self) -> float:
        return statistics.median(self.cpu)


def write_spec(data: bench_data.DataSet, folder: Path) -> Path:
    """bench/scorecard.toml with [data] pointing at the generated logs."""
    lines = []
    for line in (HERE / "scorecard.toml").read_text(encoding="utf-8").splitlines():
        key = line.split("=", 1)[0].strip()
        if key == "events":
            line = f'events = "{data.events_path.as_posix()}"'
        elif key == "exposures":
            line = f'exposures = "{data.exposures_path.as_posix()}"'
        elif key == "definitions":
            line = f'definitions = ["{(ROOT / "metric_defs").as_posix()}"]'
        lines.append(line)
    spec = folder / "scorecard.toml"
    spec.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return spec


def check_constants(spec: Path) -> None:
    """The contenders hard-code the bench spec; refuse to run if the two have drifted."""
    from metricforge.spec import load_plan

    plan = load_plan(spec)
    s = plan.spec
    found = (s.name, s.start.replace(tzinfo=None), s.end.replace(tzinfo=None), s.window_days)
    wanted = (contenders.EXPERIMENT, contenders.START, contenders.END, contenders.WINDOW.days)
    reported = tuple(name for name, _ in plan.reported)
    if found != wanted or reported != contenders.METRICS:
        raise SystemExit(f"bench/scorecard.toml {found, reported} != contenders {wanted}")


def commands(spec: Path, data: Path, work: Path, threads: int | None) -> dict[str, list[str]]:
    tool = Path(sys.executable).with_name("metricforge")
    run = [str(tool)] if tool.exists() else [sys.executable, "-m", "metricforge.cli"]
    run += ["run", str(spec)]
    extra = ["--threads", str(threads)] if threads else []
    py = [sys.executable, str(HERE / "contenders.py")]
    hand = ["--data", str(data), *extra]
    return {
        "a": [*run, "--out", str(work / "a"), *extra],
        "a0": [*run, "--out", str(work / "a0"), "--memory-limit", "none", *extra],
        "b": [*py, "fused", "--out", str(work / "b.json"), *hand],
        "c": [*py, "per_metric", "--out", str(work / "c.json"), *hand],
        "d": [*py, "polars", "--out", str(work / "d.json"), *hand],
    }


def measure(cmd: list[str], log: Path) -> tuple[float, float, int]:
    """Wall seconds, CPU seconds and peak resident set (KB) of one child, which must succeed."""
    with log.open("wb") as err:
        start = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        tail = log.read_text(errors="replace")[-2000:]
        raise SystemExit(f"{' '.join(cmd)} exited with {proc.returncode}:\n{tail}")
    return wall, usage.ru_utime + usage.ru_stime, int(usage.ru_maxrss)


def _close(x: Any, y: Any, path: str, worst: list[float]) -> list[str]:
    """Differences between two JSON values beyond the tolerance, as readable lines."""
    if isinstance(x, dict) and isinstance(y, dict):
        out: list[str] = []
        for key in sorted(set(x) | set(y)):
            if key not in SKIP_KEYS:
                out += _close(x.get(key), y.get(key), f"{path}.{key}", worst)
        return out
    if isinstance(x, list) and isinstance(y, list):
        if len(x) != len(y):
            return [f"{path}: {len(x)} != {len(y)} items"]
        return [
            d
            for i, (a, b) in enumerate(zip(x, y, strict=True))
            for d in _close(a, b, f"{path}[{i}]", worst)
        ]
    if isinstance(x, float) or isinstance(y, float):
        if x is None or y is None:
            return [] if x is y else [f"{path}: {x} != {y}"]
        gap = abs(x - y)
        worst.append(gap / max(abs(x), abs(y), 1e-300))
        return [] if gap <= REL_TOL * max(abs(x), abs(y)) + ABS_TOL else [f"{path}: {x} != {y}"]
    return [] if x == y else [f"{path}: {x!r} != {y!r}"]


def scorecard_of(moments: Path, spec: Path) -> dict[str, Any]:
    """A contender's moments through the tool's own statistics, as scorecard.json content."""
    import pyarrow as pa

    from metricforge.provenance import make_stamp
    from metricforge.report.scorecard import build
    from metricforge.runner import reshape
    from metricforge.spec import load_plan

    plan = load_plan(spec)
    rows = json.loads(moments.read_text(encoding="utf-8"))["moments"]
    data = reshape(plan, make_stamp(plan, "-", "-", "-"), [], pa.Table.from_pylist(rows))
    card: dict[str, Any] = json.loads(json.dumps(build(data).as_json(), default=str))
    return card


def agreement(work: Path, spec: Path, names: list[str]) -> tuple[list[str], float]:
    tool = json.loads((work / "a" / "scorecard.json").read_text(encoding="utf-8"))
    problems: list[str] = []
    worst: list[float] = [0.0]
    for name in names:
        if name in ("b", "c", "d"):
            card = scorecard_of(work / f"{name}.json", spec)
            problems += [f"{name}: {d}" for d in _close(tool, card, "scorecard", worst)]
    return problems, max(worst)


def machine() -> dict[str, Any]:
    pages, page = os.sysconf("SC_PHYS_PAGES"), os.sysconf("SC_PAGE_SIZE")
    import duckdb
    import polars

    return {
        "cpus": os.cpu_count(),
        "memory_gb": round(pages * page / 1000**3, 1),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "duckdb": duckdb.__version__,
        "polars": polars.__version__,
    }


def warm_cache(data: bench_data.DataSet) -> None:
    """Read every input file once so that no contender pays for a cold page cache."""
    for path in [*sorted(data.events_path.rglob("*.parquet")), data.exposures_path]:
        with path.open("rb") as fh:
            while fh.read(1 << 22):
                pass


def verdict(name: str, value: float) -> str:
    op, bound = TARGETS[name]
    ok = value <= bound if op == "<=" else value >= bound
    return f"{'PASS' if ok else 'MISS'} (target {op} {bound})"


def report(runs: dict[str, Runs], data: bench_data.DataSet) -> dict[str, Any]:
    print(f"\n{data.events:,} events, {data.users:,} people, {data.days} experiment days")
    rounds = {n: " ".join(f"{w:.2f}" for w in r.wall) for n, r in runs.items()}
    width = max(len("rounds s"), *(len(text) for text in rounds.values())) + 2
    print(
        f"{'':4}{'contender':40}{'median s':>9}{'rounds s':>{width}}{'CPU s':>7}{'peak MB':>8}"
        f"{'Mevents/s':>10}"
    )
    for name, r in runs.items():
        rate = data.events / r.median / 1e6
        peak = max(r.peak_kb) / 1024
        print(
            f"{name:4}{LABELS[name]:40}{r.median:9.2f}{rounds[name]:>{width}}{r.median_cpu:7.2f}"
            f"{peak:8.0f}{rate:10.2f}"
        )
    ratios: dict[str, float] = {}
    cpu_ratios: dict[str, float] = {}
    for key in TARGETS:
        top, bottom = key.split("/")
        if top in runs and bottom in runs:
            ratios[key] = runs[top].median / runs[bottom].median
            cpu_ratios[key] = runs[top].median_cpu / runs[bottom].median_cpu
            print(
                f"{key:5} = {ratios[key]:.3f}  {verdict(key, ratios[key])};"
                f" by CPU time {cpu_ratios[key]:.3f}"
            )
    if "b" in runs:
        gap = runs["a"].median - runs["b"].median
        print(f"a - b = {gap:.2f} s (start-up, input checks, statistics, output files, exact sums)")
    if "a" in runs:
        peak = max(runs["a"].peak_kb) * 1024
        ok = "PASS" if peak <= MEMORY_TARGET_BYTES else "MISS"
        print(f"peak memory of a = {peak / 1000**3:.2f} GB  {ok} (target <= 4 GB)")
    return {"ratios": ratios, "cpu_ratios": cpu_ratios}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", default="10M", help="about this many events: 1M, 10M, 100M")
    parser.add_argument("--repeats", type=int, default=3, help="rounds of every contender")
    parser.add_argument(
        "--data",
        type=Path,
        default=Path(tempfile.gettempdir()) / "metricforge-bench",
        help="cache folder for the generated logs (outside the repository)",
    )
    parser.add_argument("--threads", type=int, default=None, help="threads for every contender")
    parser.add_argument("--only", default="a,a0,b,c,d", help="comma-separated subset of a,a0,b,c,d")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    names = [n for n in args.only.split(",") if n]
    unknown = sorted(set(names) - set(LABELS))
    if unknown or "a" not in names:
        raise SystemExit(f"--only must name a and any of {sorted(LABELS)}; got {unknown}")
    size = bench_data.parse_size(args.events)
    print(f"data: {args.data} (about {size:,} events)", flush=True)
    data = bench_data.ensure(args.data, size, args.events)
    work = Path(tempfile.mkdtemp(prefix="metricforge-bench-run-"))
    try:
        spec = write_spec(data, work)
        check_constants(spec)
        cmds = commands(spec, data.folder, work, args.threads)
        warm_cache(data)
        runs = {n: Runs() for n in names}
        cards: dict[str, set[bytes]] = {"a": set(), "a0": set()}
        for round_ in range(args.repeats):
            order = names[round_ % len(names) :] + names[: round_ % len(names)]
            for name in order:
                wall, cpu, peak = measure(cmds[name], work / f"{name}.log")
                runs[name].wall.append(wall)
                runs[name].cpu.append(cpu)
                runs[name].peak_kb.append(peak)
                if name in cards:
                    cards[name].add((work / name / "scorecard.json").read_bytes())
                print(
                    f"  round {round_ + 1}: {name:3} {wall:7.2f} s {cpu:7.2f} s CPU"
                    f" {peak / 1024:8.0f} MB",
                    flush=True,
                )
        problems, worst = agreement(work, spec, names)
        identical = len(cards["a"] | cards["a0"]) == 1 if "a0" in names else len(cards["a"]) == 1
        figures = report(runs, data)
        print(
            f"agreement of {', '.join(n for n in names if n in 'bcd')} with a:"
            f" {'OK' if not problems else 'FAILED'} (tolerance rel {REL_TOL:g} + abs {ABS_TOL:g};"
            f" worst relative gap {worst:.2g})"
        )
        for line in problems[:20]:
            print("   ", line)
        print(f"a's scorecard.json byte-identical across all runs: {identical}")
        if args.json:
            summary = {
                "events": data.events,
                "people": data.users,
                "machine": machine(),
                "threads": args.threads,
                "medians_s": {n: r.median for n, r in runs.items()},
                "median_cpu_s": {n: r.median_cpu for n, r in runs.items()},
                "runs_s": {n: r.wall for n, r in runs.items()},
                "peak_mb": {n: max(r.peak_kb) / 1024 for n, r in runs.items()},
                "agree": not problems,
                "worst_relative_gap": worst,
                "identical_scorecards": identical,
                **figures,
            }
            args.json.write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
        if problems or not identical:
            raise SystemExit(1)
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
