"""The engine interface: run one compiled query over two registered inputs."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import pyarrow as pa
import sqlglot.expressions as exp


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

    def run(self, query: exp.Select, inputs: EngineInputs) -> pa.Table: ...
