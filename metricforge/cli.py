"""The command line: thin commands that call the library and render its results."""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Callable
from enum import StrEnum
from pathlib import Path
from typing import Annotated, TypeVar

import typer
from rich.console import Console

from metricforge.engines.choose import EngineName
from metricforge.errors import MetricforgeError

# Nothing above imports numpy. Its OpenBLAS would start a thread per core on import and spin
# them (about 0.2 s of CPU per command); the statistics here multiply small arrays. A
# setting of the user's own wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

app = typer.Typer(
    help="Stamped, reproducible A/B-test scorecards from raw event logs.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
err_console = Console(stderr=True, highlight=False, soft_wrap=True)
out_console = Console(highlight=False, width=None if sys.stdout.isatty() else 150)

T = TypeVar("T")
STRICT_EXIT = 3  # --strict: the results were written but a trust check failed


class Dialect(StrEnum):
    duckdb = "duckdb"
    spark = "spark"


class InputHashes(StrEnum):
    footer = "footer"
    full = "full"


def _guard(action: Callable[[], T]) -> T:
    """Run ``action``; turn any error into one line on stderr and a non-zero exit."""
    try:
        return action()
    except MetricforgeError as err:
        err_console.print(f"error: {err.one_line()}", markup=False)
        raise typer.Exit(err.exit_code) from None
    except KeyboardInterrupt:
        err_console.print("error: interrupted", markup=False)
        raise typer.Exit(130) from None
    except Exception as err:  # noqa: BLE001 - never a traceback for the user
        first = (str(err).splitlines() or [""])[0]
        err_console.print(f"internal error: {type(err).__name__}: {first}", markup=False)
        raise typer.Exit(70) from None


PipelineArg = Annotated[Path, typer.Argument(help="Experiment spec, e.g. pipelines/x.toml.")]


@app.command()
def run(
    pipeline: PipelineArg,
    out: Annotated[Path, typer.Option("--out", help="Folder for the results.")],
    bot_filter: Annotated[
        str | None, typer.Option("--bot-filter", help="Run under NAME@VERSION instead.")
    ] = None,
    threads: Annotated[int | None, typer.Option(help="Engine threads (default: all).")] = None,
    strict: Annotated[
        bool, typer.Option("--strict", help=f"Exit with {STRICT_EXIT} when a trust check fails.")
    ] = False,
    hash_inputs: Annotated[
        InputHashes,
        typer.Option("--hash-inputs", help="footer: hash each Parquet footer; full: every byte."),
    ] = InputHashes.footer,
    timeout: Annotated[
        float, typer.Option("--timeout", min=0.001, help="Stop the queries after SECONDS.")
    ] = 3600.0,
    memory_limit: Annotated[
        str | None,
        typer.Option(
            help="Engine memory limit (default 3.5GB; spills beyond it); 'none': 80% of RAM."
        ),
    ] = None,
    engine: Annotated[EngineName, typer.Option(help="Engine to run on.")] = EngineName.duckdb,
    spark_master: Annotated[
        str | None,
        typer.Option(help="Spark master URL: local[N] (default local[2]), spark://, yarn, sc://."),
    ] = None,
    spark_conf: Annotated[
        list[str] | None, typer.Option(help="A Spark setting KEY=VALUE (repeatable).")
    ] = None,
) -> None:
    """Compute the scorecard of one experiment and write it to OUT, all or nothing."""
    from metricforge import history
    from metricforge.engines.choose import open_engine
    from metricforge.manifest import hash_contents
    from metricforge.progress import terminal_display
    from metricforge.report.files import prepare_output, write_outputs
    from metricforge.report.scorecard import build
    from metricforge.report.terminal import render
    from metricforge.runner import execute
    from metricforge.spec import load_plan

    def action() -> bool:
        plan = load_plan(pipeline, bot_filter=bot_filter)
        prepare_output(out, plan)
        with open_engine(
            engine,
            threads=threads,
            memory_limit=memory_limit,
            timeout_s=timeout,
            progress=terminal_display(),
            spark_master=spark_master,
            spark_settings=spark_conf or (),
        ) as chosen:
            data = execute(plan, chosen)
        if hash_inputs is InputHashes.full:
            hash_contents(data)
        card = build(data)
        write_outputs(out, data, card)
        render(card, out_console)
        extra = ", segments.parquet" if card.segments is not None else ""
        out_console.print(f"wrote {out}/scorecard.parquet, scorecard.json, manifest.json{extra}")
        out_console.print(history.record(out, "run"), markup=False)
        return bool(card.trust["verdict"] == "pass")

    trusted = _guard(action)
    if strict and not trusted:
        err_console.print("error: a trust check failed (see the trust section)", markup=False)
        raise typer.Exit(STRICT_EXIT)


@app.command()
def plan(
    pipeline: PipelineArg,
    mde: Annotated[
        str | None, typer.Option(help="Relative effect to detect, e.g. 2% or 0.02.")
    ] = None,
    days: Annotated[int | None, typer.Option(help="Print the MDE after this many days.")] = None,
    power: Annotated[float, typer.Option(help="Power to detect the effect.")] = 0.8,
    history_days: Annotated[
        int | None, typer.Option(help="Pre-period days per unit (default: window_days).")
    ] = None,
) -> None:
    """Units and days for --mde at the given power, or the MDE after --days, from the
    pre-period logs, with and without CUPED."""
    from metricforge import planning
    from metricforge.engines.duckdb import DuckDBEngine
    from metricforge.spec import load_plan

    def action() -> None:
        effect = planning.parse_mde(mde) if mde is not None else None
        history = planning.history_plan(load_plan(pipeline), history_days)
        report = planning.estimate(history, DuckDBEngine(), mde=effect, days=days, power=power)
        planning.render(report, out_console)

    _guard(action)


@app.command()
def lock(
    pipeline: PipelineArg,
    force: Annotated[
        bool, typer.Option("--force", help="Replace an existing lock (stamped now).")
    ] = False,
) -> None:
    """Fix the decision metric, guardrails and alpha now: a lock file next to the spec."""
    import datetime as dt

    from metricforge.checks.lock import write_lock
    from metricforge.spec import load_plan

    def action() -> None:
        plan = load_plan(pipeline)
        path = write_lock(plan, dt.datetime.now(dt.UTC), force=force)
        spec = plan.spec
        out_console.print(
            f"locked decision metric {spec.decision}, guardrails"
            f" {', '.join(spec.guardrails) or 'none'} and alpha {spec.alpha:g}: {path}",
            markup=False,
        )

    _guard(action)


@app.command()
def looks(
    pipeline: PipelineArg,
    every: Annotated[str, typer.Option(help="Time between looks: 1d, 12h, ...")] = "1d",
    as_json: Annotated[bool, typer.Option("--json", help="Print the looks as JSON.")] = False,
) -> None:
    """Replay the looks at the experiment over time: ordinary and always-valid p-values."""
    from metricforge.engines.choose import open_engine
    from metricforge.looks import parse_every, render_looks, replay_looks
    from metricforge.report.files import dump_json
    from metricforge.spec import load_plan

    def action() -> None:
        plan, step = load_plan(pipeline), parse_every(every)
        with open_engine(EngineName.duckdb) as engine:
            report = replay_looks(plan, engine, step)
        if as_json:
            sys.stdout.write(dump_json(report).decode("utf-8"))
        else:
            render_looks(report, out_console)

    _guard(action)


class Period(StrEnum):
    pre = "pre"
    experiment = "experiment"


@app.command()
def aa(
    pipeline: PipelineArg,
    replays: Annotated[int, typer.Option(min=2, help="Re-randomisations.")] = 1000,
    period: Annotated[Period, typer.Option(help="Which days to replay.")] = Period.pre,
    seed: Annotated[int, typer.Option(help="Salt of the re-randomisation hash.")] = 1,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead.")] = False,
    threads: Annotated[int | None, typer.Option(help="Engine threads (default: all).")] = None,
) -> None:
    """A/A replay: re-randomise units many times; is every metric's p-value calibrated?"""
    from metricforge.checks import aa as replay
    from metricforge.engines.duckdb import DuckDBEngine
    from metricforge.report.replay import render_replay
    from metricforge.spec import load_plan

    def action() -> None:
        plan = load_plan(pipeline)
        report = replay.run_aa(
            plan,
            DuckDBEngine(threads=threads),
            replays=replays,
            period=replay.Period(period.value),
            seed=seed,
        )
        if as_json:
            sys.stdout.write(json.dumps(report.as_json(), indent=2) + "\n")
        else:
            render_replay(report, out_console)

    _guard(action)


@app.command()
def sql(
    pipeline: PipelineArg,
    dialect: Annotated[Dialect, typer.Option(help="SQL dialect to print.")] = Dialect.duckdb,
) -> None:
    """Print the compiled SQL of a pipeline: the one scan of the events, then the results."""
    from metricforge.compile.query import render
    from metricforge.spec import load_plan

    def action() -> None:
        plan = load_plan(pipeline)
        sys.stdout.write(render(plan, dialect.value) + "\n")

    _guard(action)


@app.command()
def check(pipeline: PipelineArg) -> None:
    """Validate spec, definitions, bot filter and input schemas without running the query."""
    from metricforge.compile.query import compile_plan
    from metricforge.runner import gather_inputs
    from metricforge.spec import load_plan

    def action() -> None:
        plan = load_plan(pipeline)
        compile_plan(plan)
        _, files = gather_inputs(plan, storage={})  # URIs listed with the environment's settings
        out_console.print(
            f"ok: {plan.spec.name}: {len(plan.reported)} metrics, filter {plan.bot_filter.ref},"
            f" {len(files)} input files, {sum(f.rows for f in files)} rows"
        )

    _guard(action)


@app.command()
def filters(
    folder: Annotated[Path, typer.Argument(help="Folder of bot-filter versions.")] = Path(
        "metric_defs/filters"
    ),
) -> None:
    """List the released bot-filter versions with their hashes and release dates."""
    from rich.table import Table

    from metricforge.spec.filters import released_versions

    def action() -> None:
        table = Table("filter", "released", "sha256")
        for entry in released_versions(folder):
            table.add_row(
                f"{entry['name']}@{entry['version']}", str(entry["released"]), str(entry["sha256"])
            )
        out_console.print(table)

    _guard(action)


@app.command()
def sample(
    out: Annotated[Path, typer.Option("--out", help="Folder to write the demo logs to.")],
    users: Annotated[int | None, typer.Option(help="People in the invented shop.")] = None,
    days: Annotated[int, typer.Option(help="Experiment days (after a 14-day pre-period).")] = 14,
    seed: Annotated[int, typer.Option(help="Random seed; same seed, same bytes.")] = 7,
) -> None:
    """Generate the invented shop's event and exposure logs (seeded, byte-reproducible)."""
    from metricforge import sample as generator

    def action() -> None:
        n = users if users is not None else generator.DEFAULT_USERS
        path = generator.generate(out, users=n, days=days, seed=seed)
        out_console.print(f"wrote sample logs to {path}")

    _guard(action)


@app.command()
def rerun(
    manifest: Annotated[Path, typer.Argument(help="A run's manifest.json (or its folder).")],
    out: Annotated[Path, typer.Option("--out", help="Folder for the new results.")],
    allow_changed_inputs: Annotated[
        bool, typer.Option("--allow-changed-inputs", help="Run even if the inputs changed.")
    ] = False,
    spec_folder: Annotated[
        Path | None,
        typer.Option(help="Resolve the spec's relative data paths from here (data moved)."),
    ] = None,
    threads: Annotated[int | None, typer.Option(help="Engine threads (default: all).")] = None,
    engine: Annotated[EngineName, typer.Option(help="Engine to run on.")] = EngineName.duckdb,
    spark_master: Annotated[
        str | None, typer.Option(help="Spark master URL (with --engine spark).")
    ] = None,
    spark_conf: Annotated[
        list[str] | None, typer.Option(help="A Spark setting KEY=VALUE (repeatable).")
    ] = None,
) -> None:
    """Rerun a past run from its manifest's own copies; say whether it reproduces exactly.

    Exits with 2 if the inputs changed (unless --allow-changed-inputs), with 5 if the new
    scorecard is not byte-identical to the old one next to the manifest."""
    from metricforge import history
    from metricforge.engines.choose import open_engine
    from metricforge.report.terminal import render
    from metricforge.report.views import render_rerun
    from metricforge.rerun import RERUN_DIFFERS_EXIT
    from metricforge.rerun import rerun as rerun_run

    def action() -> bool:
        with open_engine(
            engine, threads=threads, spark_master=spark_master, spark_settings=spark_conf or ()
        ) as chosen:
            done = rerun_run(
                manifest,
                out,
                chosen,
                allow_changed_inputs=allow_changed_inputs,
                spec_folder=spec_folder,
            )
        render(done.card, out_console)
        render_rerun(str(done.manifest), done.changes, done.verdict, out_console)
        extra = {"rerun_of": str(done.manifest.absolute()), "reproduced": done.verdict.identical}
        out_console.print(history.record(out, "rerun", extra), markup=False)
        return bool(done.verdict.identical)

    if not _guard(action):
        raise typer.Exit(RERUN_DIFFERS_EXIT)


@app.command()
def compare(
    a: Annotated[Path, typer.Argument(help="Result folder A (the baseline).")],
    b: Annotated[Path, typer.Argument(help="Result folder B.")],
    out: Annotated[
        Path | None, typer.Option("--out", help="Write comparison.parquet and .json here.")
    ] = None,
    force: Annotated[bool, typer.Option("--force", help="Compare even if not comparable.")] = False,
) -> None:
    """Side by side: two scorecards, the change in every value and effect.

    Results that differ in experiment, bot filter or definitions are not comparable: exit 4
    and nothing written, unless --force."""
    from metricforge.compare import NOT_COMPARABLE_EXIT, compare_results, write_comparison
    from metricforge.report.views import render_comparison

    def action() -> int:
        comparison = compare_results(a, b)
        render_comparison(comparison, out_console)
        if not (comparison.comparable or force):
            err_console.print(
                "error: the results are not comparable: "
                + "; ".join(comparison.reasons)
                + " (--force to compare anyway; nothing written)",
                markup=False,
            )
            return NOT_COMPARABLE_EXIT
        if out is not None:
            write_comparison(out, comparison, forced=not comparison.comparable)
            out_console.print(f"wrote {out}/comparison.parquet, comparison.json", markup=False)
        return 0

    code = _guard(action)
    if code:
        raise typer.Exit(code)


@app.command()
def history(
    root: Annotated[
        Path, typer.Argument(help="Output root: the parent folder of the runs' --out.")
    ] = Path("results"),
    experiment: Annotated[str | None, typer.Option(help="Only this experiment.")] = None,
) -> None:
    """List the runs catalogued in ROOT/metricforge-history.jsonl, oldest first."""
    from metricforge.history import read_history
    from metricforge.report.views import render_history

    def action() -> None:
        entries, warnings = read_history(root, experiment)
        for warning in warnings:
            err_console.print(f"warning: {warning}", markup=False)
        render_history(entries, out_console)

    _guard(action)


if __name__ == "__main__":
    app()
