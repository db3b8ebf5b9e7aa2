"""A/A replay: bucket merges, the re-randomisation hash, p-values and their calibration.

References: scipy/statsmodels for p-values and the exact binomial interval; the NIST StRD
files (REFERENCES.md, READ) through the bucket query; the fact of the trade (common
practice) that about alpha of A/A comparisons come out significant at level alpha.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.proportion import proportion_confint
from typer.testing import CliRunner

from metricforge.checks.aa import (
    N_BUCKETS,
    Period,
    bucket_arrays,
    compiled_replay,
    quantile_arrays,
    replay,
    replay_plan,
)
from metricforge.cli import app
from metricforge.compile.checks import bucket_moments
from metricforge.compile.query import compile_plan
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from metricforge.spec.model import Kind
from metricforge.stats import Moments, compare
from metricforge.stats.calibration import Verdict, calibration, exact_interval
from metricforge.stats.cuped import PER_UNIT, RATIO, cuped_compare
from metricforge.stats.replay import (
    ArmMoments,
    BucketMoments,
    BucketSplitter,
    assign,
    bucket_hashes,
    p_values,
)
from metricforge.stats.replay_quantiles import QuantileBuckets
from tests.conftest import PIPELINES, event, exposure, write_case
from tests.test_cuped import per_unit_data, ratio_data
from tests.test_cuped import vectors as cuped_vectors
from tests.test_nist_pipeline import nist_values

# --------------------------------------------------------------------------- p-values

finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False)
positive = st.floats(min_value=1e-3, max_value=1e3, allow_nan=False)
hypotheses = st.sampled_from([(0, None), (1, None), (-1, None), (1, 0.05), (-1, 0.2)])


def arm(m: Moments) -> ArmMoments:
    """One replay's arm holding the moments ``m`` (x, and y for a ratio)."""
    if not m.is_ratio:
        return ArmMoments(("x",), np.array([m.n]), np.array([[m.mean_x]]), np.array([[[m.var_x]]]))
    cov = np.array([[[m.var_x, m.cov_xy], [m.cov_xy, m.var_y]]])
    return ArmMoments(("x", "y"), np.array([m.n]), np.array([[m.mean_x, m.mean_y]]), cov)


def assert_scorecard_p_value(
    t: Moments, c: Moments, test: tuple[int, float | None], proportion: bool = False
) -> None:
    side, margin = test
    (got,) = p_values([arm(c), arm(t)], proportion=proportion, side=side, margin=margin)
    expected = compare(t, c, side=side, margin=margin).p_value
    assert got[0] == pytest.approx(expected, rel=1e-9, abs=1e-300)


@settings(max_examples=200, deadline=None)
@given(
    n=st.tuples(st.integers(2, 10**6), st.integers(2, 10**6)),
    mean=st.tuples(finite, finite),
    var=st.tuples(positive, positive),
    test=hypotheses,
)
def test_replay_p_values_of_means_are_the_scorecard_p_values(
    n: tuple[int, int],
    mean: tuple[float, float],
    var: tuple[float, float],
    test: tuple[int, float | None],
) -> None:
    t, c = (Moments.of_mean(n[k], mean[k], var[k]) for k in (0, 1))
    assert_scorecard_p_value(t, c, test)


@settings(max_examples=200, deadline=None)
@given(
    n=st.tuples(st.integers(2, 10**6), st.integers(2, 10**6)),
    mx=st.tuples(positive, positive),
    my=st.tuples(positive, positive),
    vx=st.tuples(positive, positive),
    vy=st.tuples(positive, positive),
    rho=st.tuples(st.floats(-0.99, 0.99), st.floats(-0.99, 0.99)),
    test=hypotheses,
)
def test_replay_p_values_of_ratios_are_the_scorecard_p_values(
    n: tuple[int, int],
    mx: tuple[float, float],
    my: tuple[float, float],
    vx: tuple[float, float],
    vy: tuple[float, float],
    rho: tuple[float, float],
    test: tuple[int, float | None],
) -> None:
    t, c = (
        Moments(n[k], mx[k], my[k], vx[k], vy[k], rho[k] * math.sqrt(vx[k] * vy[k])) for k in (0, 1)
    )
    assert_scorecard_p_value(t, c, test)


@settings(max_examples=100, deadline=None)
@given(
    n=st.tuples(st.integers(2, 5000), st.integers(2, 5000)),
    share=st.tuples(st.floats(0, 1), st.floats(0, 1)),
    test=hypotheses,
)
def test_replay_p_values_of_proportions_are_the_scorecard_p_values(
    n: tuple[int, int], share: tuple[float, float], test: tuple[int, float | None]
) -> None:
    """Counts from merged means (n · mean), then z, Fisher or Wald as the scorecard."""
    t, c = (Moments.of_proportion(n[k], round(share[k] * n[k])) for k in (0, 1))
    assert_scorecard_p_value(t, c, test, proportion=True)


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("test", [(0, None), (1, None), (-1, 0.1)])
@pytest.mark.parametrize("names", [PER_UNIT, RATIO])
def test_replay_p_values_with_cuped_are_the_scorecard_p_values(
    seed: int, test: tuple[int, float | None], names: tuple[str, ...]
) -> None:
    """Three variants: θ is pooled over all of them, in the replay as in the scorecard."""
    rng = np.random.default_rng(seed)
    data = [
        ratio_data(rng, 400 + 50 * k, 0.02 * k)
        if names == RATIO
        else per_unit_data(rng, 400 + 50 * k, 0.1 * k)
        for k in range(3)
    ]
    vectors = {f"v{k}": cuped_vectors(d, names) for k, d in enumerate(data)}
    arms = [
        ArmMoments(names, np.array([float(v.n)]), np.array([v.mean]), np.array([v.cov]))
        for v in vectors.values()
    ]
    side, margin = test
    got = p_values(arms, side=side, margin=margin)
    for k in (1, 2):
        effect = cuped_compare(vectors, f"v{k}", "v0", side=side, margin=margin).effect
        assert effect.method.endswith("+cuped")
        assert got[k - 1][0] == pytest.approx(effect.p_value, rel=1e-9, abs=1e-300)


@pytest.mark.parametrize(("buyers", "exact"), [((2, 5), True), ((60, 75), False)])
def test_replay_of_a_cuped_proportion_keeps_fisher_for_small_counts(
    buyers: tuple[int, int], exact: bool
) -> None:
    """A CUPED-enabled proportion: with an expected cell count below 5 the scorecard keeps
    Fisher's exact test on the counts (no adjustment), otherwise it adjusts; the replay
    does the same."""
    rng = np.random.default_rng(4)
    data = []
    for k, n in enumerate((300, 320)):
        x = np.zeros(n)
        x[: buyers[k]] = 1.0
        h = (rng.random(n) < 0.5).astype(float)
        data.append(np.column_stack([x, h * (x + rng.random(n)), h]))
    vectors = {f"v{k}": cuped_vectors(d, PER_UNIT) for k, d in enumerate(data)}
    arms = [
        ArmMoments(PER_UNIT, np.array([float(v.n)]), np.array([v.mean]), np.array([v.cov]))
        for v in vectors.values()
    ]
    (got,) = p_values(arms, proportion=True)
    t, c = (Moments.of_proportion(len(d), buyers[k]) for k, d in ((1, data[1]), (0, data[0])))
    if exact:
        expected = compare(t, c)
        assert expected.method.startswith("newcombe+fisher")
    else:
        expected = cuped_compare(vectors, "v1", "v0").effect
    assert got[0] == pytest.approx(expected.p_value, rel=1e-9)


# --------------------------------------------------------------------------- merging


def buckets_of(x: np.ndarray, y: np.ndarray | None, bucket: np.ndarray) -> BucketMoments:
    """Bucket moments computed directly (two-pass, per bucket) with numpy."""
    n = np.bincount(bucket, minlength=N_BUCKETS).astype(float)
    safe = np.maximum(n, 1)
    values = [x] if y is None else [x, y]
    means = [np.bincount(bucket, weights=v, minlength=N_BUCKETS) / safe for v in values]
    k = len(values)
    m2 = np.zeros((N_BUCKETS, k, k))
    for i in range(k):
        for j in range(k):
            product = (values[i] - means[i][bucket]) * (values[j] - means[j][bucket])
            m2[:, i, j] = np.bincount(bucket, weights=product, minlength=N_BUCKETS)
    return BucketMoments(("x",) if y is None else ("x", "y"), n, np.column_stack(means), m2)


@pytest.mark.parametrize("offset", [0.0, 1e6, 1e9])
def test_merged_bucket_moments_equal_direct_moments(offset: float) -> None:
    """Per replay and arm, n, means, variances and the covariance of the merged buckets
    equal numpy's two-pass values on the units themselves, also far from zero (where the
    float64 inputs themselves hold only about 16 − log10(offset) digits of the noise)."""
    rng = np.random.default_rng(3)
    units = 20_000
    bucket = rng.integers(0, N_BUCKETS, units)
    y = rng.poisson(4.0, units).astype(float)
    x = offset + 0.3 * y + rng.normal(0, 1, units)
    arms = assign(bucket_hashes("merge-test", 0, 3, N_BUCKETS), (0.3, 0.7))
    moments = BucketSplitter({"m": buckets_of(x, y, bucket)}).split(arms, 2)["m"]
    tol = max(1e-11, 2e-15 * offset)
    for r in range(3):
        for v in (0, 1):
            mine = arms[r][bucket] == v
            xs, ys = x[mine], y[mine]
            got = moments[v]
            assert got.n[r] == mine.sum()
            assert got.mean_of("x")[r] == pytest.approx(xs.mean(), rel=1e-14)
            assert got.cov_of("x", "x")[r] == pytest.approx(xs.var(ddof=1), rel=tol)
            assert got.mean_of("y")[r] == pytest.approx(ys.mean(), rel=1e-12)
            assert got.cov_of("y", "y")[r] == pytest.approx(ys.var(ddof=1), rel=1e-9)
            assert got.cov_of("x", "y")[r] == pytest.approx(np.cov(xs, ys)[0, 1], rel=tol)
            assert got.cov_of("y", "x")[r] == got.cov_of("x", "y")[r]
    if offset >= 1e9:  # raw power sums lose the variance entirely here
        raw = (np.sum(x * x) - np.sum(x) ** 2 / units) / (units - 1)
        assert abs(raw / x.var(ddof=1) - 1) > 0.1


@pytest.mark.parametrize(
    ("name", "mean", "sd", "tol_sd"),
    [("NumAcc4.dat", 10000000.2, 0.1, 1e-7), ("Lew.dat", -177.435, 277.332168044316, 1e-12)],
)
def test_nist_values_survive_the_bucket_query_and_the_merge(
    tmp_path: Path, name: str, mean: float, sd: float, tol_sd: float
) -> None:
    """NIST StRD (REFERENCES.md, READ): certified mean and s, fed as per-unit values
    through the engine's bucket query and merged back into one group."""
    values = nist_values(name)
    events, exposures = [], []
    for arm in ("control", "treatment"):  # each arm holds the whole file once
        for i, value in enumerate(values):
            unit = f"{arm[0]}{i:05d}"
            events.append(event(unit, "purchase", value=value))
            exposures.append(exposure(unit, arm))
    plan = load_plan(write_case(tmp_path, events, exposures, decision="revenue"))
    inputs, _ = gather_inputs(plan)
    table = DuckDBEngine().run(compiled_replay(plan, Period.EXPERIMENT, "duckdb"), inputs)
    buckets, units = bucket_arrays(plan, table["buckets"], Period.EXPERIMENT)
    everything = np.zeros((1, N_BUCKETS), dtype=np.int8)
    one = BucketSplitter(buckets).split(everything, 2)["revenue"][0]
    n = len(values)
    assert units == one.n[0] == 2 * n
    assert one.mean_of("x")[0] == pytest.approx(mean, rel=1e-12)
    # the file twice: the sum of squares doubles, the divisor is 2n - 1
    expected = sd**2 * 2 * (n - 1) / (2 * n - 1)
    assert one.cov_of("x", "x")[0] == pytest.approx(expected, rel=2 * tol_sd)


# --------------------------------------------------------------------------- hashing


def test_the_bucket_is_the_md5_prefix_in_every_dialect(tmp_path: Path) -> None:
    """The engine's bucket of a unit equals the first three hex digits of its MD5 (Python
    hashlib), and the Spark rendering uses functions Spark has."""
    units = [f"unit-{i}" for i in range(300)]
    events = [event(u, "purchase", value=1.0) for u in units]
    exposures = [exposure(u, ("control", "treatment")[i % 2]) for i, u in enumerate(units)]
    plan = load_plan(write_case(tmp_path, events, exposures))
    inputs, _ = gather_inputs(plan)
    table = DuckDBEngine().run(compiled_replay(plan, Period.EXPERIMENT, "duckdb"), inputs)
    expected: dict[int, int] = {}
    for u in units:
        b = int(hashlib.md5(u.encode()).hexdigest()[:3], 16)
        expected[b] = expected.get(b, 0) + 1
    got = dict(
        zip(
            table["buckets"]["bucket"].to_pylist(),
            table["buckets"]["n_units"].to_pylist(),
            strict=True,
        )
    )
    assert got == expected
    spark = bucket_moments(plan, "", ordered=False).sql(dialect="spark")
    assert "MD5(unit)" in spark and "LOCATE(" in spark and "STRPOS" not in spark


@pytest.mark.parametrize("shares", [(0.5, 0.5), (0.2, 0.8), (0.25, 0.25, 0.5)])
def test_assignment_follows_the_planned_split(shares: tuple[float, ...]) -> None:
    arms = assign(bucket_hashes("split", 0, 200, N_BUCKETS), shares)
    total = arms.size
    for v, share in enumerate(shares):
        observed = int((arms == v).sum())
        sd = math.sqrt(total * share * (1 - share))
        assert abs(observed - total * share) < 5 * sd, (v, observed)


def test_replays_are_independent_and_salted() -> None:
    a = assign(bucket_hashes("salt-a", 0, 400, N_BUCKETS), (0.5, 0.5)).astype(float)
    corr = np.corrcoef(a)[np.triu_indices(len(a), 1)]
    assert abs(corr.mean()) < 0.005 and np.abs(corr).max() < 0.12  # sd 1/64 per pair
    again = assign(bucket_hashes("salt-a", 100, 5, N_BUCKETS), (0.5, 0.5))
    assert np.array_equal(again, a[100:105].astype(np.int8))  # replay k is replay k
    other = assign(bucket_hashes("salt-b", 0, 5, N_BUCKETS), (0.5, 0.5))
    assert (other != a[:5]).mean() == pytest.approx(0.5, abs=0.02)


# --------------------------------------------------------------------------- calibration


@pytest.mark.parametrize(("hits", "trials"), [(0, 50), (3, 50), (50, 1000), (1000, 1000)])
def test_exact_interval_equals_statsmodels(hits: int, trials: int) -> None:
    low, high = proportion_confint(hits, trials, alpha=0.01, method="beta")
    assert exact_interval(hits, trials, 0.99) == pytest.approx((low, high), abs=1e-12)


@pytest.mark.parametrize(
    ("power", "verdict"),
    [(1.0, Verdict.CALIBRATED), (2.0, Verdict.TOO_MANY), (0.5, Verdict.TOO_FEW)],
    ids=["uniform", "small-p-excess", "small-p-deficit"],
)
def test_verdicts_on_known_p_value_distributions(power: float, verdict: Verdict) -> None:
    """Uniform p-values (a calibrated test) against p = U**2 (P(p < .05) = .22) and
    p = U**0.5 (P(p < .05) = .0025)."""
    u = np.random.default_rng(11).random(1000)
    result = calibration(u**power, 0.05)
    assert result.verdict is verdict
    assert result.uniform == (power == 1.0)


# --------------------------------------------------------------------------- the demo


@pytest.fixture(scope="module")
def demo_buckets() -> tuple[object, dict[str, BucketMoments], dict[str, QuantileBuckets]]:
    """homepage_aa's pre-period reduced to bucket moments and the quantile metric's window
    of values: one scan, used twice."""
    plan = load_plan(PIPELINES / "homepage_aa.toml")
    scan = replay_plan(plan, Period.PRE)
    inputs, _ = gather_inputs(scan)
    tables = DuckDBEngine().run(compiled_replay(scan, Period.PRE, "duckdb"), inputs)
    buckets = bucket_arrays(plan, tables["buckets"], Period.PRE)[0]
    return plan, buckets, quantile_arrays(plan, tables)


@pytest.mark.slow
def test_demo_pre_period_is_calibrated_and_a_wrong_variance_is_not(
    demo_buckets: tuple[object, dict[str, BucketMoments], dict[str, QuantileBuckets]],
) -> None:
    """Common practice: at alpha = 5% about 5% of A/A comparisons are significant."""
    plan, buckets, quantiles = demo_buckets
    right = replay(plan, buckets, replays=1000, seed=1, quantiles=quantiles)  # type: ignore[arg-type]
    p95 = right.pop("page_latency_p95")["treatment"]
    for name, by_variant in right.items():
        assert by_variant["treatment"].verdict is Verdict.CALIBRATED, name
    # The p95 guardrail's one-sided outer-interval test: every replay has a p-value, and
    # its share stays below twice alpha. Measured: 72 of 1,000 (99% interval 5.3–9.6%),
    # called "too many": on this population the outer interval's standard error runs
    # about 4% below the spread of the quantile over splits (README, "A/A replay"); the
    # replay exists to show such a thing.
    assert p95.replays == 1000 and p95.share < 2 * plan.spec.alpha  # type: ignore[attr-defined]
    # click_through as if impressions were independent: the variance ignores that one
    # person's impressions share a click propensity, so it is far too small
    wrong = replay(  # type: ignore[arg-type]
        plan, buckets, replays=1000, seed=1, independent_events=frozenset({"click_through"})
    )
    broken = wrong["click_through"]["treatment"]
    assert broken.verdict is Verdict.TOO_MANY and broken.ci_low > 0.1
    assert wrong["revenue"]["treatment"] == right["revenue"]["treatment"]


def aa_json(pipeline: str, *options: str) -> dict[str, Any]:
    """The JSON report of `metricforge aa` on a demo pipeline."""
    result = CliRunner().invoke(app, ["aa", str(PIPELINES / pipeline), *options, "--json"])
    assert result.exit_code == 0, result.output
    report: dict[str, Any] = json.loads(result.stdout)
    return report


def test_aa_command_prints_every_metric(tmp_path: Path) -> None:
    report = aa_json("homepage_aa.toml", "--replays", "50", "--period", "experiment")
    plan = load_plan(PIPELINES / "homepage_aa.toml")
    shown = [r["metric"] for r in report["rows"]]
    assert sorted(shown) == sorted(name for name, _ in plan.reported)
    assert report["skipped"] == []
    assert report["period"] == "experiment" and report["replays"] == 50
    assert all(r["replays"] == 50 and 0 <= r["share"] <= 1 for r in report["rows"])
    bad = CliRunner().invoke(app, ["aa", str(PIPELINES / "homepage_aa.toml"), "--period", "post"])
    assert bad.exit_code == 2


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
@pytest.mark.parametrize("period", list(Period))
@pytest.mark.parametrize("pipeline", ["checkout_layout", "checkout_accounts", "product_cards"])
def test_the_replay_scans_the_events_as_a_run_does(
    pipeline: str, period: Period, dialect: str
) -> None:
    """The replay builds only the run's unit query (not its results): the same scan."""
    scan = replay_plan(load_plan(PIPELINES / f"{pipeline}.toml"), period)
    mine = compiled_replay(scan, period, dialect)
    quantiles = [f"qreplay_{n}" for n, _ in scan.reported if scan.metric(n).kind is Kind.QUANTILE]
    assert [name for name, _ in mine.results] == ["buckets", *quantiles]
    run_scan = compile_plan(scan, dialect).unit_rows
    assert mine.unit_rows.sql(dialect=dialect) == run_scan.sql(dialect=dialect)
