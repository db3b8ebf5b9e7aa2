"""The command line: thin commands that call the library and render its results."""

from __future__ import annotations

import sys
from collections.abc import Callable
from enum import StrEnum
from pathlib import Path
from typing import Annotated, TypeVar

import typer
from rich.console import Console

from metricforge.engines.choose import EngineName
from metricforge.errors import MetricforgeError

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
    from metricforge.engines.choose import open_engine
    from metricforge.report.files import write_outputs
    from metricforge.report.scorecard import build
    from metricforge.report.terminal import render
    from metricforge.runner import execute
    from metricforge.spec import load_plan

    def action() -> bool:
        plan = load_plan(pipeline, bot_filter=bot_filter)
        with open_engine(
            engine, threads=threads, spark_master=spark_master, spark_settings=spark_conf or ()
        ) as chosen:
            data = execute(plan, chosen)
        card = build(data)
        write_outputs(out, data, card)
        render(card, out_console)
        out_console.print(f"wrote {out}/scorecard.parquet, scorecard.json, manifest.json")
        return bool(card.trust["verdict"] == "pass")

    trusted = _guard(action)
    if strict and not trusted:
        err_console.print("error: a trust check failed (see the trust section)", markup=False)
        raise typer.Exit(STRICT_EXIT)


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
        _, files = gather_inputs(plan)
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


if __name__ == "__main__":
    app()
