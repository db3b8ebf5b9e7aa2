"""The engine interface: run one compiled run over two registered inputs."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import pyarrow as pa

from metricforge.compile.query import CompiledRun


@dataclass(frozen=True)
class EngineInputs:
    events: list[Path]
    exposures: list[Path]
    event_columns: tuple[str, ...]  # only these are read
    hive: bool


class Engine(Protocol):
    name: str
    dialect: str

    def version(self) -> str: ...

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        """Materialise ``compiled.unit_rows``, then return each result query's table by name."""
        ...
