"""A query timeout: a watchdog thread that interrupts the engine once a deadline passes.

Engine-neutral: it only needs a function that interrupts whatever runs now (DuckDB's
``connection.interrupt``). After the deadline it calls that function at once and then
every ``REPEAT_S`` seconds until the work stops, so a statement that starts just after an
interrupt is stopped as well.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from types import TracebackType

from metricforge.errors import EngineError

DEFAULT_TIMEOUT_S = 3600.0
REPEAT_S = 0.05


class QueryTimeoutError(EngineError):
    """The compiled queries ran longer than the timeout and were interrupted."""


class Watchdog:
    """``with Watchdog(con.interrupt, 60) as dog: ...``; ``dog.fired`` tells if it struck."""

    def __init__(self, interrupt: Callable[[], object], seconds: float | None) -> None:
        self._interrupt = interrupt
        self.seconds = seconds
        self._stop = threading.Event()
        self._fired = threading.Event()
        self._thread: threading.Thread | None = None

    @property
    def fired(self) -> bool:
        return self._fired.is_set()

    def _watch(self) -> None:
        assert self.seconds is not None
        if self._stop.wait(self.seconds):
            return
        self._fired.set()
        while True:
            try:
                self._interrupt()
            except Exception:  # noqa: BLE001 - a closed connection: nothing left to stop
                return
            if self._stop.wait(REPEAT_S):
                return

    def __enter__(self) -> Watchdog:
        if self.seconds is not None:
            self._thread = threading.Thread(
                target=self._watch, name="metricforge-timeout", daemon=True
            )
            self._thread.start()
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()

    def timeout_error(self) -> QueryTimeoutError:
        return QueryTimeoutError(
            f"the queries ran longer than the timeout of {self.seconds:g} s and were"
            " interrupted; raise it with --timeout SECONDS"
        )
