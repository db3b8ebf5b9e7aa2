"""A progress bar for long engine queries: polled from a thread, drawn on a terminal only.

The engine's own figure (DuckDB's ``query_progress()``, a percentage or -1 while unknown)
counts finished work of the scan-heavy stages and can stall well before the end, so the
bar never moves backwards, stops short of 100% until the query has returned, and always
shows the elapsed time. Nothing is drawn for queries shorter than ``delay`` seconds, and
nothing at all unless both stdout and stderr are terminals (never in CI logs, pipes or
JSON output).
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Protocol, TextIO

DELAY_S = 2.0  # show a bar only for queries running longer than this
INTERVAL_S = 0.1
MAX_SHOWN = 0.99  # the last percent is shown only when the query returned


class ProgressSource(Protocol):
    """What is polled: DuckDB's connection has this method."""

    def query_progress(self) -> float: ...


class Display(Protocol):
    def show(self, fraction: float | None, elapsed: float) -> None:
        """Draw: ``fraction`` in [0, 1], or None while the engine gives no figure."""
        ...

    def close(self) -> None: ...


DisplayFactory = Callable[[], Display]


class Poller:
    """The logic, free of threads and clocks: call ``tick`` with the current time."""

    def __init__(
        self, source: ProgressSource, make_display: DisplayFactory, start: float, *, delay: float
    ) -> None:
        self.source = source
        self.make_display = make_display
        self.start = start
        self.delay = delay
        self.display: Display | None = None
        self.shown: float | None = None  # the highest fraction shown so far

    def tick(self, now: float) -> None:
        elapsed = now - self.start
        if elapsed < self.delay:
            return
        try:
            raw = float(self.source.query_progress())
        except Exception:  # noqa: BLE001 - a progress figure is never worth failing a run
            raw = -1.0
        if raw >= 0:
            fraction = min(raw / 100.0, MAX_SHOWN)
            self.shown = fraction if self.shown is None else max(self.shown, fraction)
        if self.display is None:
            self.display = self.make_display()
        self.display.show(self.shown, elapsed)

    def close(self) -> None:
        if self.display is not None:
            self.display.close()
            self.display = None


@contextmanager
def watch(
    source: ProgressSource,
    make_display: DisplayFactory | None,
    *,
    delay: float | None = None,
    interval: float | None = None,
) -> Iterator[None]:
    """Poll ``source`` from a daemon thread while the body runs (a no-op without a display)."""
    if make_display is None:
        yield
        return
    wait = INTERVAL_S if interval is None else interval
    start = time.monotonic()
    poller = Poller(source, make_display, start, delay=DELAY_S if delay is None else delay)
    stop = threading.Event()

    def loop() -> None:
        while not stop.wait(wait):
            poller.tick(time.monotonic())

    thread = threading.Thread(target=loop, name="metricforge-progress", daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join()
        poller.close()


class RichDisplay:
    """A transient rich bar on stderr: description, bar, percentage, elapsed time."""

    def __init__(self, description: str) -> None:
        from rich.console import Console
        from rich.progress import BarColumn, Progress, TaskProgressColumn

        self.progress = Progress(
            "[progress.description]{task.description}",
            BarColumn(),
            TaskProgressColumn(),
            "{task.fields[clock]}",
            console=Console(stderr=True),
            transient=True,
            redirect_stdout=False,
            redirect_stderr=False,
        )
        self.task = self.progress.add_task(description, total=None, clock="")
        self.progress.start()

    def show(self, fraction: float | None, elapsed: float) -> None:
        minutes, seconds = divmod(int(elapsed), 60)
        clock = f"{minutes}:{seconds:02d}"
        if fraction is None:
            self.progress.update(self.task, total=None, clock=clock)
        else:
            done = round(fraction * 100, 1)
            self.progress.update(self.task, total=100, completed=done, clock=clock)

    def close(self) -> None:
        self.progress.stop()


def on_terminal(stdout: TextIO | None = None, stderr: TextIO | None = None) -> bool:
    """True when a person watches: stdout and stderr are terminals, not CI, not TERM=dumb."""
    streams = (stdout or sys.stdout, stderr or sys.stderr)
    if not all(s is not None and s.isatty() for s in streams):
        return False
    return not os.environ.get("CI") and os.environ.get("TERM") != "dumb"


def terminal_display(description: str = "reading events") -> DisplayFactory | None:
    """A display factory when on a terminal, else None (no progress output at all)."""
    if not on_terminal():
        return None
    return lambda: RichDisplay(description)
