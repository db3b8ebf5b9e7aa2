"""One exception root, one subclass per stage.

Every error renders as a single line: ``file:line: key: message (did you mean 'x'?)``.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable


def closest(name: str, candidates: Iterable[str]) -> str | None:
    """The closest candidate to ``name``, or None when nothing is close."""
    matches = difflib.get_close_matches(name, list(candidates), n=1, cutoff=0.6)
    return matches[0] if matches else None


class MetricforgeError(Exception):
    """Root of every error the tool raises on purpose."""

    exit_code = 2

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        line: int | None = None,
        key: str | None = None,
        suggestion: str | None = None,
    ) -> None:
        self.message = message
        self.file = file
        self.line = line
        self.key = key
        self.suggestion = suggestion
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = ""
        if self.file:
            where = self.file if self.line is None else f"{self.file}:{self.line}"
        parts = [p for p in (where, self.key) if p]
        head = ": ".join(parts)
        text = f"{head}: {self.message}" if head else self.message
        if self.suggestion:
            text += f" (did you mean '{self.suggestion}'?)"
        return " ".join(text.split())


class SpecError(MetricforgeError):
    """A definition, filter or experiment spec is malformed or inconsistent."""


class ExpressionError(SpecError):
    """A user expression failed to parse or uses something off the whitelist."""


class FilterRegistryError(SpecError):
    """A released bot-filter version does not match its registered hash."""


class InputDataError(MetricforgeError):
    """An input log is missing, empty, corrupt or lacks a needed column."""


class CompileError(MetricforgeError):
    """The compiler cannot build a query for the plan."""


class EngineError(MetricforgeError):
    """The engine failed while running a compiled query."""


class StatsError(MetricforgeError):
    """The statistics cannot be computed from the sufficient statistics."""


class OutputError(MetricforgeError):
    """Writing results failed."""


class ManifestError(MetricforgeError):
    """A manifest.json, scorecard or history file cannot be read or does not match itself."""
