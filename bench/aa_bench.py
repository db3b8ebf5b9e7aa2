"""A/A replay cost: `metricforge aa --replays 1000` against one `metricforge run`, same data.

Whole processes, side by side and alternating (the order swaps every round, so a slow
moment of a shared machine hits both), timed by wall clock and by CPU time (user + system
of the child, from getrusage). Prints a Markdown table with the medians and the ratios.

    python bench/aa_bench.py [--pipeline pipelines/homepage_aa.toml] [--rounds 7]
                             [--replays 1000] [--period pre]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def timed(command: list[str]) -> tuple[float, float]:
    """Wall and CPU seconds of one child process; a failure stops the benchmark."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if done.returncode != 0:
        sys.exit(f"failed ({done.returncode}): {' '.join(command)}\n{done.stderr}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pipeline", default="pipelines/homepage_aa.toml")
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--replays", type=int, default=1000)
    parser.add_argument("--period", default="pre", choices=["pre", "experiment"])
    args = parser.parse_args()
    tool = shutil.which("metricforge") or sys.exit("metricforge is not on PATH")
    out = Path(tempfile.mkdtemp(prefix="aa-bench-"))
    commands = {
        "run": [tool, "run", args.pipeline, "--out", str(out / "card")],
        "aa": [tool, "aa", args.pipeline, "--replays", str(args.replays), "--period", args.period],
    }
    for command in commands.values():  # warm the file cache and the imports once
        timed(command)
    times: dict[str, list[tuple[float, float]]] = {name: [] for name in commands}
    for k in range(args.rounds):
        order = ("run", "aa") if k % 2 == 0 else ("aa", "run")
        for name in order:
            times[name].append(timed(commands[name]))
    shutil.rmtree(out)
    wall = {n: statistics.median(t[0] for t in ts) for n, ts in times.items()}
    cpu = {n: statistics.median(t[1] for t in ts) for n, ts in times.items()}
    python = platform.python_version()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {python}")
    print(
        f"pipeline {args.pipeline}, {args.rounds} rounds,"
        f" aa --replays {args.replays} --period {args.period}\n"
    )
    print("| process | median wall s | median CPU s | all wall s |")
    print("|---|---|---|---|")
    for name in commands:
        runs = ", ".join(f"{w:.2f}" for w, _ in times[name])
        print(f"| {' '.join(commands[name][1:2])} | {wall[name]:.2f} | {cpu[name]:.2f} | {runs} |")
    print(
        f"\nratio aa / run: wall {wall['aa'] / wall['run']:.2f}, CPU {cpu['aa'] / cpu['run']:.2f}"
        " (target: below 1.5)"
    )


if __name__ == "__main__":
    main()
