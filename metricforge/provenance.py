"""Provenance: hashes of definitions, spec and filter; the stamp carried by every output."""

from __future__ import annotations

import hashlib
import json
import platform
from dataclasses import asdict, dataclass

from metricforge import __version__
from metricforge.spec.model import Plan


def definitions_sha256(plan: Plan) -> str:
    """Hash over the used metric definitions' content (name, kind and every key), sorted."""
    payload = {m.name: m.raw for m in sorted(plan.metrics, key=lambda m: m.name)}
    text = json.dumps(payload, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class Stamp:
    experiment: str
    bot_filter: str
    bot_filter_version: int
    bot_filter_sha256: str
    definitions_sha256: str
    spec_sha256: str
    inputs_fingerprint: str
    engine: str
    engine_version: str
    tool_version: str

    def as_dict(self) -> dict[str, object]:
        return asdict(self)


def make_stamp(plan: Plan, inputs_fingerprint: str, engine: str, engine_version: str) -> Stamp:
    return Stamp(
        experiment=plan.spec.name,
        bot_filter=plan.bot_filter.name,
        bot_filter_version=plan.bot_filter.version,
        bot_filter_sha256=plan.bot_filter.sha256,
        definitions_sha256=definitions_sha256(plan),
        spec_sha256=plan.spec.sha256,
        inputs_fingerprint=inputs_fingerprint,
        engine=engine,
        engine_version=engine_version,
        tool_version=__version__,
    )


def library_versions() -> dict[str, str]:
    import duckdb
    import numpy
    import pyarrow
    import scipy
    import sqlglot

    return {
        "python": platform.python_version(),
        "duckdb": str(duckdb.__version__),
        "numpy": numpy.__version__,
        "pyarrow": pyarrow.__version__,
        "scipy": scipy.__version__,
        "sqlglot": str(getattr(sqlglot, "__version__", "unknown")),
    }
