"""NIST StRD univariate data through the whole pipeline: Parquet → SQL → statistics, on
each engine (the ``engine`` fixture: DuckDB and Spark).

Source: NIST Statistical Reference Datasets, Univariate Summary Statistics (1999),
certified values in the files' headers (REFERENCES.md, label READ). Tolerances as
REFERENCES.md states: relative 1e-7 for the standard deviation of NumAcc3/NumAcc4
(float64 input limits them to 8–9 digits), 1e-12 elsewhere.
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path

import pytest

from metricforge.engines.base import Engine
from metricforge.runner import execute
from metricforge.spec import load_plan
from tests.conftest import REFERENCE, event, exposure, write_case

CASES = [
    # file, n, certified mean, certified s, rel tol of mean, rel tol of s
    ("NumAcc3.dat", 1001, 1000000.2, 0.1, 1e-12, 1e-7),
    ("NumAcc4.dat", 1001, 10000000.2, 0.1, 1e-12, 1e-7),
    ("Lew.dat", 200, -177.435, 277.332168044316, 1e-12, 1e-12),
    ("Michelso.dat", 100, 299.852400000000, 0.0790105478190518, 1e-12, 1e-9),
    ("Mavro.dat", 50, 2.00185600000000, 0.000429123454003053, 1e-12, 1e-9),
]


def nist_values(name: str) -> list[float]:
    lines = (REFERENCE / "nist" / name).read_text().splitlines()
    start = max(i for i, line in enumerate(lines) if line.strip().startswith("Data:"))
    values = []
    for line in lines[start + 1 :]:
        for token in line.split():
            try:
                values.append(float(token))
            except ValueError:
                continue  # separator lines such as '-------------'
    return values


@pytest.mark.parametrize(
    ("name", "n", "mean", "sd", "tol_mean", "tol_sd"), CASES, ids=[c[0] for c in CASES]
)
def test_certified_values_survive_the_pipeline(
    engine: Engine,
    tmp_path: Path,
    name: str,
    n: int,
    mean: float,
    sd: float,
    tol_mean: float,
    tol_sd: float,
) -> None:
    values = nist_values(name)
    assert len(values) == n
    events, exposures = [], []
    for arm in ("control", "treatment"):
        for i, value in enumerate(values):
            unit = f"{arm[0]}{i:05d}"
            events.append(event(unit, "purchase", value=value))
            exposures.append(exposure(unit, arm))
    spec = write_case(tmp_path, events, exposures, decision="revenue")
    data = execute(load_plan(spec), engine)
    moments = data.moments["revenue"]["control"]
    assert moments.n == len(values)
    assert moments.mean_x == pytest.approx(mean, rel=tol_mean)
    assert math.sqrt(moments.var_x) == pytest.approx(sd, rel=tol_sd)


def test_vendored_files_match_their_published_hashes() -> None:
    folder = REFERENCE / "nist"
    for line in (folder / "SHA256SUMS.txt").read_text().splitlines():
        if line.strip():
            digest, name = line.split()
            assert hashlib.sha256((folder / name).read_bytes()).hexdigest() == digest, name
