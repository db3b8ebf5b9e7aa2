"""Benchmark: `metricforge run` against hand-written alternatives, each timed as a process.

    python bench/scorecard_bench.py --events 10M [--repeats 3] [--data DIR] [--threads N]

Generates (or reuses) logs of about that many events with the project's own generator
(bench/bench_data.py, in chunks), then, alternating the order in every round, runs:

  a   `metricforge run bench/scorecard.toml` with the tool's defaults (memory limit 3.5GB)
  a0  the same with `--memory-limit none` (DuckDB's own default: 80% of RAM)
  b   bench/fused.sql, the best hand-written fused DuckDB query for the same statistics
  c   one hand-written DuckDB query per metric
  d   polars' streaming engine

It checks that b, c and d give the numbers of the tool's scorecard (their moments through
the tool's own `metricforge.stats.compare`) to a stated tolerance and that every run of a
and a0 wrote byte-identical scorecards, then prints
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


def _close(x: Any, y: Any, what: str, worst: list[float]) -> list[str]:
    """``what`` when the two numbers differ beyond the tolerance (None and NaN match)."""
    if x is None or y is None or x != x or y != y:
        same = (x is None or x != x) and (y is None or y != y)
        return [] if same else [f"{what}: {x} != {y}"]
    if isinstance(x, int) and isinstance(y, int):
        return [] if x == y else [f"{what}: {x} != {y}"]
    gap = abs(x - y)
    worst.append(gap / max(abs(x), abs(y), 1e-300))
    return [] if gap <= REL_TOL * max(abs(x), abs(y)) + ABS_TOL else [f"{what}: {x} != {y}"]


def _moments(row: dict[str, Any], metric: str) -> Any:
    from metricforge.stats import Moments

    n = int(row[f"{metric}__n"])
    if metric in contenders.RATIOS:
        keys = ("mean_x", "mean_y", "var_x", "var_y", "cov_xy")
        return Moments(n, *(float(row[f"{metric}__{k}"]) for k in keys))
    return Moments.of_mean(n, float(row[f"{metric}__mean_x"]), float(row[f"{metric}__var_x"]))


def _hypothesis(row: dict[str, Any]) -> dict[str, Any]:
    """The scorecard row's test as arguments of ``compare``: two-sided, or one-sided for a
    guardrail ("... higher is worse": side 1) with its non-inferiority margin if any."""
    text = str(row.get("hypothesis") or "")
    if not text.startswith(("one-sided", "non-inferiority")):
        return {}
    return {"side": 1 if "higher is worse" in text else -1, "margin": row.get("margin")}


def compare_contender(
    tool: dict[str, Any], rows: list[dict[str, Any]]
) -> list[tuple[str, Any, Any]]:
    """(what, tool's figure, contender's figure) for every figure both can state: per-variant
    counts, and per metric and variant the values, effect, CI bounds and p-value (the last
    ones where the tool used the Welch or delta method of ``metricforge.stats.compare``)."""
    from metricforge.stats import compare

    pairs: list[tuple[str, Any, Any]] = []
    clean = {r["variant"]: r for r in rows if not r["is_bot"] and not r["contaminated"]}
    for v in tool["variants"]:
        mine = [r for r in rows if r["variant"] == v["variant"]]
        found = {
            "units": clean[v["variant"]]["n_units"],
            "events": clean[v["variant"]]["n_events"],
            "bot_units": sum(r["n_units"] for r in mine if r["is_bot"]),
            "bot_events": sum(r["n_events"] for r in mine if r["is_bot"]),
        }
        pairs += [(f"{v['variant']}.{k}", v[k], n) for k, n in found.items()]
    for row in tool["metrics"]:
        name = row["metric"]
        if name not in contenders.METRICS:
            continue
        treatment = _moments(clean[row["variant"]], name)
        control = _moments(clean[row["control"]], name)
        effect = compare(treatment, control, alpha=row["alpha"], **_hypothesis(row))
        fields = ["value", "control_value", "abs_effect"]
        if row.get("method") == effect.method:
            fields += ["abs_ci_low", "abs_ci_high", "rel_effect", "rel_ci_low", "rel_ci_high"]
            fields += ["p_value"]
        where = f"{name}[{row['variant']}]"
        pairs += [(f"{where}.n_units", row["n_units"], treatment.n)]
        pairs += [(f"{where}.n_units_control", row["n_units_control"], control.n)]
        pairs += [(f"{where}.{f}", row[f], getattr(effect, f)) for f in fields]
    return pairs


def agreement(work: Path, names: list[str]) -> tuple[list[str], float]:
    tool = json.loads((work / "a" / "scorecard.json").read_text(encoding="utf-8"))
    problems: list[str] = []
    worst: list[float] = [0.0]
    for name in names:
        if name in ("b", "c", "d"):
            rows = json.loads((work / f"{name}.json").read_text(encoding="utf-8"))["moments"]
            for what, x, y in compare_contender(tool, rows):
                problems += [f"{name}: {d}" for d in _close(x, y, what, worst)]
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
    # Generated in a child process: the contenders are forked from this one, and a fork
    # starts with its parent's resident memory, which wait4 would report as theirs.
    code = (
        "import sys, pathlib, bench_data;"
        " bench_data.ensure(pathlib.Path(sys.argv[1]), int(sys.argv[2]), sys.argv[3])"
    )
    subprocess.run(
        [sys.executable, "-c", code, str(args.data), str(size), args.events], cwd=HERE, check=True
    )
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
        problems, worst = agreement(work, names)
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
