"""The progress bar: the polling logic with a fake progress source and a fake clock, and
no progress output at all unless both stdout and stderr are terminals."""

from __future__ import annotations

import io
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from typer.testing import CliRunner

from metricforge import progress
from metricforge.cli import app
from metricforge.progress import Poller, on_terminal, terminal_display, watch
from tests.conftest import PIPELINES


class FakeSource:
    """Returns the given figures in turn (DuckDB's convention: percent, or -1 unknown)."""

    def __init__(self, *figures: float | Exception) -> None:
        self.figures = list(figures)

    def query_progress(self) -> float:
        figure = self.figures.pop(0) if len(self.figures) > 1 else self.figures[0]
        if isinstance(figure, Exception):
            raise figure
        return figure


class FakeDisplay:
    def __init__(self) -> None:
        self.shown: list[tuple[float | None, float]] = []
        self.closed = False
        self.first = threading.Event()

    def show(self, fraction: float | None, elapsed: float) -> None:
        self.shown.append((fraction, elapsed))
        self.first.set()

    def close(self) -> None:
        self.closed = True


def _poller(source: FakeSource) -> tuple[Poller, list[FakeDisplay]]:
    made: list[FakeDisplay] = []

    def make() -> FakeDisplay:
        made.append(FakeDisplay())
        return made[-1]

    return Poller(source, make, start=100.0, delay=2.0), made


def test_nothing_is_drawn_before_the_delay() -> None:
    poller, made = _poller(FakeSource(50.0))
    for now in (100.0, 101.0, 101.9):
        poller.tick(now)
    assert made == []


def test_bar_never_moves_backwards_and_keeps_the_clock() -> None:
    poller, made = _poller(FakeSource(-1.0, 10.0, 40.0, 30.0, 40.0))
    for now in (102.0, 103.0, 104.0, 105.0, 106.5):
        poller.tick(now)
    assert len(made) == 1  # one display for the whole query
    assert made[0].shown == [(None, 2.0), (0.1, 3.0), (0.4, 4.0), (0.4, 5.0), (0.4, 6.5)]


def test_bar_stops_short_of_full_until_the_query_returns() -> None:
    poller, made = _poller(FakeSource(100.0))
    poller.tick(103.0)
    assert made[0].shown == [(progress.MAX_SHOWN, 3.0)]
    poller.close()
    assert made[0].closed


def test_a_failing_source_shows_elapsed_time_only() -> None:
    poller, made = _poller(FakeSource(RuntimeError("connection busy")))
    poller.tick(102.5)
    assert made[0].shown == [(None, 2.5)]


def test_watch_polls_from_a_thread_and_closes_the_display() -> None:
    display = FakeDisplay()
    with watch(FakeSource(25.0), lambda: display, delay=0.0, interval=0.001):
        assert display.first.wait(timeout=60)  # the body waits for the first poll
    assert display.closed
    assert display.shown[0][0] == 0.25


def test_watch_without_a_display_starts_no_thread() -> None:
    before = threading.active_count()
    with watch(FakeSource(25.0), None):
        assert threading.active_count() == before


class Stream(io.StringIO):
    def __init__(self, tty: bool) -> None:
        super().__init__()
        self.tty = tty

    def isatty(self) -> bool:
        return self.tty


@pytest.mark.parametrize(
    ("stdout", "stderr", "env", "shown"),
    [
        (True, True, {}, True),
        (False, True, {}, False),  # stdout piped (e.g. into a JSON consumer)
        (True, False, {}, False),  # stderr redirected to a log
        (True, True, {"CI": "true"}, False),  # CI runners
        (True, True, {"TERM": "dumb"}, False),
    ],
)
def test_on_terminal_only(
    stdout: bool, stderr: bool, env: dict[str, str], shown: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("CI", raising=False)
    monkeypatch.setenv("TERM", "xterm-256color")
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    assert on_terminal(Stream(stdout), Stream(stderr)) is shown


def test_no_progress_output_when_not_a_terminal(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With no delay at all, only the terminal check keeps a bar from being drawn."""
    drawn: list[str] = []

    class Spy(FakeDisplay):
        def __init__(self, description: str) -> None:
            super().__init__()
            drawn.append(description)

    monkeypatch.setattr(progress, "DELAY_S", 0.0)
    monkeypatch.setattr(progress, "INTERVAL_S", 0.001)
    monkeypatch.setattr(progress, "RichDisplay", Spy)
    monkeypatch.delenv("CI", raising=False)
    assert terminal_display() is None  # pytest captures stdout and stderr: not terminals
    result = CliRunner().invoke(
        app, ["run", str(PIPELINES / "checkout_layout.toml"), "--out", str(tmp_path / "out")]
    )
    assert result.exit_code == 0, result.output
    assert drawn == []
    assert "reading events" not in result.output
    assert "\r" not in result.output and "\x1b[" not in result.output


@pytest.mark.parametrize("wanted", [True, False])
def test_the_engine_polls_its_own_connection_with_progress_tracking_on(
    wanted: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With a display, DuckDB's connection building unit_rows is the polled source, and it
    tracks its progress figure without printing a bar of its own; without one, neither."""
    from metricforge.engines import duckdb as engine_module
    from metricforge.engines.duckdb import DuckDBEngine
    from metricforge.runner import execute
    from metricforge.spec import load_plan

    seen: list[tuple[bool, bool, bool]] = []
    real_watch = engine_module.watch

    @contextmanager
    def spy(source: Any, make_display: Any) -> Iterator[None]:
        bar, printed = source.execute(
            "SELECT current_setting('enable_progress_bar'),"
            " current_setting('enable_progress_bar_print')"
        ).fetchone()
        seen.append((make_display is not None, bar, bar and printed))  # a bar DuckDB draws
        with real_watch(source, make_display):
            yield

    monkeypatch.setattr(engine_module, "watch", spy)
    display = (lambda: FakeDisplay()) if wanted else None
    execute(load_plan(PIPELINES / "homepage_aa.toml"), DuckDBEngine(progress=display))
    assert seen == [(wanted, wanted, False)]
