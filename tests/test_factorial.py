"""Factorial designs: main effects and interactions from per-variant moments.

Reference library: statsmodels OLS of the saturated model (every main effect and
interaction, each factor coded −1/2 and +1/2). Its coefficients are the cell-mean
contrasts exactly, whatever the cell sizes; with HC2 standard errors (leverage 1/n_cell)
its covariance is Σ w² s²/n, the variance the contrasts use; per event with standard
errors clustered by unit (no correction) it is the delta method for ratio metrics.
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats as sst
from statsmodels.stats.multitest import multipletests
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.errors import SpecError
from metricforge.spec.experiment import load_spec
from metricforge.stats import Moments
from metricforge.stats.contrasts import contrast, factorial_terms
from tests.conftest import ROOT, SPEC, event, exposure, write_case


def _design(k: int) -> tuple[list[str], dict[str, list[int]]]:
    names = [f"f{i}" for i in range(k)]
    levels = {
        "v" + "".join(map(str, cell)): list(cell) for cell in itertools.product((0, 1), repeat=k)
    }
    return names, levels


def _ols_columns(levels: dict[str, list[int]], cell_of: list[str], k: int) -> np.ndarray:
    """Saturated model columns: intercept, then every subset of factors (same order as
    factorial_terms) as the product of the factors' ±1/2 codes. Its coefficients are on
    the contrast scale: main effect = difference of the level means, two-factor
    interaction in a 2×2 = difference of differences."""
    coded = np.array([[levels[v][f] - 0.5 for f in range(k)] for v in cell_of])
    cols = [np.ones(len(cell_of))]
    for size in range(1, k + 1):
        for subset in itertools.combinations(range(k), size):
            cols.append(np.prod(coded[:, subset], axis=1))
    return np.column_stack(cols)


@pytest.mark.parametrize(("k", "seed"), [(2, 1), (3, 2)])
def test_mean_contrasts_equal_saturated_ols(k: int, seed: int) -> None:
    """Per-unit values, unequal cell sizes, a real interaction: contrast estimates =
    OLS coefficients and standard errors = OLS HC2 (statsmodels), to 1e-10."""
    rng = np.random.default_rng(seed)
    names, levels = _design(k)
    values, cell_of = [], []
    for variant, cell in levels.items():
        n = int(rng.integers(40, 120))
        shift = 0.3 * cell[0] + 0.2 * cell[1] + 0.5 * cell[0] * cell[1]
        values.append(rng.gamma(2.0, 1.0, n) + shift)
        cell_of += [variant] * n
    y = np.concatenate(values)
    fit = sm.OLS(y, _ols_columns(levels, cell_of, k)).fit(cov_type="HC2")
    moments = {
        v: Moments.of_mean(x.size, float(x.mean()), float(x.var(ddof=1)))
        for v, x in zip(levels, values, strict=True)
    }
    terms = factorial_terms(names, levels)
    assert len(terms) == 2**k - 1
    for i, term in enumerate(terms, start=1):
        res = contrast([moments[v] for v in term.weights], list(term.weights.values()))
        assert res.estimate == pytest.approx(fit.params[i], rel=1e-10, abs=1e-12)
        se = (res.ci_high - res.ci_low) / 2
        assert res.method == "welch"
        # the CI uses Student's t with Welch–Satterthwaite df; back out the standard error
        df = _satterthwaite(term.weights, moments)
        assert se / sst.t.ppf(0.975, df) == pytest.approx(fit.bse[i], rel=1e-10)
        assert res.positive - res.negative == pytest.approx(res.estimate, rel=1e-12)


def _satterthwaite(weights: dict[str, float], moments: dict[str, Moments]) -> float:
    terms = [w * w * moments[v].var_x / moments[v].n for v, w in weights.items()]
    pairs = zip(terms, weights, strict=True)
    return sum(terms) ** 2 / sum(t * t / (moments[v].n - 1) for t, v in pairs)


def test_ratio_contrasts_equal_clustered_ols() -> None:
    """A ratio metric (events per unit, outcome per event): the delta-method contrast =
    per-event OLS of the saturated model clustered by unit, no correction (statsmodels)."""
    rng = np.random.default_rng(5)
    names, levels = _design(2)
    y_parts, cells, groups, moments = [], [], [], {}
    unit0 = 0
    for variant, cell in levels.items():
        n = int(rng.integers(150, 250))
        k = 1 + rng.poisson(2.0, n)
        unit = np.repeat(np.arange(n), k)
        level = rng.normal(0, 0.5, n)[unit]
        y = rng.normal(1.0 + 0.2 * cell[0] - 0.1 * cell[1] + 0.3 * cell[0] * cell[1], 1.0)
        y = y + level + rng.normal(0, 1, unit.size)
        x_unit, k_unit = np.bincount(unit, weights=y), np.bincount(unit).astype(float)
        c = np.cov(x_unit, k_unit, ddof=0)  # divisor n, as the sandwich without correction
        moments[variant] = Moments(n, x_unit.mean(), k_unit.mean(), c[0, 0], c[1, 1], c[0, 1])
        y_parts.append(y)
        cells += [variant] * unit.size
        groups.append(unit + unit0)
        unit0 += n
    fit = sm.OLS(np.concatenate(y_parts), _ols_columns(levels, cells, 2)).fit(
        cov_type="cluster", cov_kwds={"groups": np.concatenate(groups), "use_correction": False}
    )
    for i, term in enumerate(factorial_terms(names, levels), start=1):
        res = contrast([moments[v] for v in term.weights], list(term.weights.values()))
        assert res.method == "delta"
        assert res.estimate == pytest.approx(fit.params[i], rel=1e-10)
        assert (res.ci_high - res.ci_low) / 2 / 1.959963984540054 == pytest.approx(
            fit.bse[i], rel=1e-10
        )


def test_terms_name_and_weigh_a_two_by_two() -> None:
    terms = factorial_terms(
        ["size", "colour"], {"c": [0, 0], "a": [1, 0], "b": [0, 1], "ab": [1, 1]}
    )
    assert [t.name for t in terms] == ["main:size", "main:colour", "interaction:size*colour"]
    assert terms[0].weights == {"c": -0.5, "a": 0.5, "b": -0.5, "ab": 0.5}
    assert terms[2].weights == {"c": 1.0, "a": -1.0, "b": -1.0, "ab": 1.0}


# --------------------------------------------------------------------------- spec

VARIANTS = "control = 25, big_photo = 25, red_button = 25, big_red = 25"


def factorial_spec(factors: str, variants: str = VARIANTS) -> str:
    """The shared small case's spec with four variants, a guardrail and ``[factors]``."""
    text = SPEC.replace("control = 50, treatment = 50", variants).format(
        defs=(ROOT / "metric_defs").as_posix(),
        decision="revenue",
        diagnostics='["purchases", "buyer_share"]',
    )
    return text.replace("guardrails = []", 'guardrails = ["refunds"]') + "\n[factors]\n" + factors


GOOD_FACTORS = """\
photo_size = { control = "small", big_photo = "large", red_button = "small", big_red = "large" }
button_colour = { control = "blue", big_photo = "blue", red_button = "red", big_red = "red" }
"""


def _spec(folder: Path, factors: str) -> Path:
    path = folder / "spec.toml"
    path.write_text(factorial_spec(factors))
    return path


def test_factors_load(tmp_path: Path) -> None:
    spec = load_spec(_spec(tmp_path, GOOD_FACTORS))
    assert [f.name for f in spec.factors] == ["photo_size", "button_colour"]
    assert [spec.factors[0].coded(v) for v in spec.variant_names] == [0, 1, 0, 1]


@pytest.mark.parametrize(
    ("factors", "message"),
    [
        (GOOD_FACTORS.replace('big_red = "large"', 'big_red = "huge"'), "exactly two levels"),
        (GOOD_FACTORS.replace('big_red = "red" ', 'big_rad = "red" '), "did you mean 'big_red'"),
        (GOOD_FACTORS.replace(', big_red = "red"', ""), "variant 'big_red' has no level"),
        (GOOD_FACTORS.splitlines()[0], "at least two factors"),
        (
            GOOD_FACTORS.replace(
                'red_button = "red", big_red = "red"', 'red_button = "blue", big_red = "red"'
            ),
            "have the same levels",
        ),
        (GOOD_FACTORS.replace('"small"', "1"), "expected a string"),
    ],
    ids=[
        "three-levels",
        "unknown-variant",
        "missing-variant",
        "one-factor",
        "same-cell",
        "not-text",
    ],
)
def test_bad_factors_are_one_line_errors(tmp_path: Path, factors: str, message: str) -> None:
    with pytest.raises(SpecError) as err:
        load_spec(_spec(tmp_path, factors))
    line = err.value.one_line()
    assert "spec.toml" in line and "factors" in line and message in line
    assert "\n" not in line


def test_incomplete_design_is_an_error(tmp_path: Path) -> None:
    text = factorial_spec(
        'a = { control = "x", big_photo = "y", red_button = "x" }\n'
        'b = { control = "x", big_photo = "x", red_button = "y" }\n',
        variants=VARIANTS.replace(", big_red = 25", ""),
    )
    (tmp_path / "spec.toml").write_text(text)
    with pytest.raises(SpecError, match="need 4 variants"):
        load_spec(tmp_path / "spec.toml")


# --------------------------------------------------------------------------- pipeline


def _factorial_case(folder: Path) -> tuple[Path, dict[str, list[float]]]:
    """A 2×2 of 4 × 40 units with an injected interaction; per-unit revenue returned."""
    rng = np.random.default_rng(11)
    events, exposures, revenue = [], [], {}
    shift = {"control": 0.0, "big_photo": 3.0, "red_button": 1.0, "big_red": 9.0}
    for variant in shift:
        revenue[variant] = []
        for i in range(40):
            unit = f"{variant}-{i:02d}"
            exposures.append(exposure(unit, variant))
            events.append(event(unit, "impression"))
            total = 0.0
            for j in range(int(rng.integers(0, 3))):
                value = round(float(rng.gamma(2.0, 5.0)) + shift[variant], 2)
                events.append(event(unit, "purchase", 2 + j, value=value))
                total += value
            revenue[variant].append(total)
    return write_case(folder, events, exposures, spec_text=factorial_spec(GOOD_FACTORS)), revenue


def _scorecard_rows(
    folder: Path, events: list[dict[str, Any]], exposures: list[dict[str, Any]], text: str
) -> list[dict[str, Any]]:
    """Run the case through the CLI; the scorecard's metric rows."""
    spec = write_case(folder, events, exposures, spec_text=text)
    out = folder / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output
    rows: list[dict[str, Any]] = json.loads((out / "scorecard.json").read_text())["metrics"]
    return rows


def test_factorial_rows_and_adjustments_on_a_small_pipeline(tmp_path: Path) -> None:
    spec, revenue = _factorial_case(tmp_path)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output
    rows = json.loads((out / "scorecard.json").read_text())["metrics"]
    rev = [r for r in rows if r["metric"] == "revenue"]
    assert [r["variant"] for r in rev] == [
        "big_photo", "red_button", "big_red",
        "main:photo_size", "main:button_colour", "interaction:photo_size*button_colour",
    ]  # fmt: skip
    mean = {v: float(np.mean(x)) for v, x in revenue.items()}
    by_name = {r["variant"]: r for r in rev}
    main = by_name["main:photo_size"]
    assert main["abs_effect"] == pytest.approx(
        (mean["big_photo"] + mean["big_red"] - mean["control"] - mean["red_button"]) / 2, rel=1e-9
    )
    assert main["contrast"] == "-0.5 control +0.5 big_photo -0.5 red_button +0.5 big_red"
    assert main["n_units"] == main["n_units_control"] == 80
    inter = by_name["interaction:photo_size*button_colour"]
    assert inter["abs_effect"] == pytest.approx(
        mean["big_red"] - mean["big_photo"] - mean["red_button"] + mean["control"], rel=1e-9
    )
    assert inter["abs_ci_low"] < inter["abs_effect"] < inter["abs_ci_high"]
    assert inter["rel_effect"] is None and inter["p_value_adjusted"] is None
    # decision metric: Holm across the three arms; diagnostics: BH across metrics × arms
    arms = [r for r in rev if r["contrast"] is None]
    holm = multipletests([r["p_value"] for r in arms], method="holm")[1]
    assert [r["p_value_adjusted"] for r in arms] == pytest.approx(holm, rel=1e-12)
    assert all(r["adjustment"] == "holm: decision metric across 3 treatment arm(s)" for r in arms)
    diag = [r for r in rows if r["role"] == "diagnostic" and r["contrast"] is None]
    assert len(diag) == 6
    bh = multipletests([r["p_value"] for r in diag], method="fdr_bh")[1]
    assert [r["p_value_adjusted"] for r in diag] == pytest.approx(bh, rel=1e-12)
    guard = [r for r in rows if r["role"] == "guardrail"]
    assert all(
        r["hypothesis"] == "one-sided harm: higher is worse" for r in guard if not r["contrast"]
    )
    assert all(r["p_value_adjusted"] is None for r in guard)
    assert all(math.isfinite(r["p_value"]) for r in rows if r["metric"] != "refunds")


def test_quantile_metric_contrasts_are_contrasts_of_the_variants_quantiles(
    tmp_path: Path,
) -> None:
    """A quantile metric's main effects and interaction are contrasts of each variant's
    quantile of all its page loads (numpy's linear rule as the reference), with the
    outer-interval standard errors; a main effect's variance is a quarter of the
    interaction's (weights ±1/2 against ±1)."""
    rng = np.random.default_rng(12)
    events, exposures, latencies = [], [], {}
    scale = {"control": 300.0, "big_photo": 360.0, "red_button": 300.0, "big_red": 330.0}
    for variant, median in scale.items():
        latencies[variant] = []
        for i in range(60):
            unit = f"{variant}-{i:02d}"
            exposures.append(exposure(unit, variant))
            for j in range(int(rng.integers(1, 5))):
                value = float(np.round(median * rng.lognormal(0.0, 0.4)))
                events.append(event(unit, "page_load", 1 + j, latency_ms=value))
                latencies[variant].append(value)
    text = factorial_spec(GOOD_FACTORS).replace(
        'diagnostics = ["purchases", "buyer_share"]', 'diagnostics = ["page_latency_p95"]'
    )
    rows = _scorecard_rows(tmp_path, events, exposures, text)
    p95 = {v: float(np.quantile(x, 0.95)) for v, x in latencies.items()}  # metric_defs q
    by_name = {r["variant"]: r for r in rows if r["metric"] == "page_latency_p95"}
    for term in factorial_terms(
        ["photo_size", "button_colour"],
        {"control": [0, 0], "big_photo": [1, 0], "red_button": [0, 1], "big_red": [1, 1]},
    ):
        row = by_name[term.name]
        expected = sum(w * p95[v] for v, w in term.weights.items())
        assert row["abs_effect"] == pytest.approx(expected, rel=1e-9, abs=1e-9), term.name
        assert row["method"] == "outer-ci"
        assert row["abs_ci_low"] < row["abs_effect"] < row["abs_ci_high"]
        assert 0 < row["p_value"] < 1
    main, inter = by_name["main:photo_size"], by_name["interaction:photo_size*button_colour"]
    half = (main["abs_ci_high"] - main["abs_ci_low"]) / 2
    assert half == pytest.approx((inter["abs_ci_high"] - inter["abs_ci_low"]) / 4, rel=1e-9)


# --------------------------------------------------------------------------- CUPED


@pytest.mark.parametrize("seed", [3, 4])
def test_cuped_contrasts_equal_saturated_ols_with_the_covariates(seed: int) -> None:
    """With CUPED the contrasts are those of the variants' adjusted values (θ the
    within-variant slope pooled over all variants): the coefficients of statsmodels OLS of
    the saturated model plus the pre-period covariate and its indicator, to 1e-10."""
    from metricforge.stats.cuped import PER_UNIT, cuped_arms
    from tests.test_cuped import per_unit_data, vectors

    rng = np.random.default_rng(seed)
    names, levels = _design(2)
    data, cell_of = {}, []
    for variant, cell in levels.items():
        n = int(rng.integers(60, 160))
        data[variant] = per_unit_data(rng, n, 0.3 * cell[0] + 0.2 * cell[1] + 0.4 * np.prod(cell))
        cell_of += [variant] * n
    both = np.vstack(list(data.values()))
    design = np.column_stack([_ols_columns(levels, cell_of, 2), both[:, 1], both[:, 2]])
    fit = sm.OLS(both[:, 0], design).fit()
    cuped = cuped_arms({v: vectors(d, PER_UNIT) for v, d in data.items()}, list(levels))
    for i, term in enumerate(factorial_terms(names, levels), start=1):
        res = contrast([cuped.adjusted[v] for v in term.weights], list(term.weights.values()))
        assert res.estimate == pytest.approx(fit.params[i], abs=1e-10)
    assert cuped.theta == pytest.approx(tuple(fit.params[4:]), rel=1e-10)


def test_factorial_rows_are_cuped_adjusted_on_a_pipeline(tmp_path: Path) -> None:
    """A 2×2 with CUPED on: the arm rows and the contrast rows are both adjusted; the
    interaction equals OLS on the per-unit values (statsmodels, saturated model plus the
    pre-period covariate and indicator) and reports its variance reduction."""
    rng = np.random.default_rng(12)
    events, exposures = [], []
    shift = {"control": 0.0, "big_photo": 3.0, "red_button": 1.0, "big_red": 9.0}
    cells = {"control": (0, 0), "big_photo": (1, 0), "red_button": (0, 1), "big_red": (1, 1)}
    value, pre, has, cell_of = [], [], [], []
    for variant in shift:
        for i in range(40):
            unit = f"{variant}-{i:02d}"
            exposures.append(exposure(unit, variant))
            level = float(rng.gamma(2.0, 5.0))
            spend = round(level + shift[variant] + float(rng.normal(0, 1)), 2)
            events.append(event(unit, "purchase", 2, value=spend))
            before = round(level + float(rng.normal(0, 1)), 2) if i % 3 else 0.0
            if i % 3:  # two thirds of the units bought before their exposure
                events.append(event(unit, "purchase", -60 * 24, value=before))
            value.append(spend)
            pre.append(before)
            has.append(1.0 if i % 3 else 0.0)
            cell_of.append(variant)
    text = factorial_spec(GOOD_FACTORS).replace(
        "window_days = 14\n", "window_days = 14\npre_period_days = 7\ncuped = true\n"
    )
    rows = _scorecard_rows(tmp_path, events, exposures, text)
    rev = {r["variant"]: r for r in rows if r["metric"] == "revenue"}
    assert {r["method"] for r in rev.values()} == {"welch+cuped"}
    levels = {v: list(c) for v, c in cells.items()}
    design = np.column_stack([_ols_columns(levels, cell_of, 2), pre, has])
    fit = sm.OLS(np.array(value), design).fit()
    inter = rev["interaction:photo_size*button_colour"]
    assert inter["abs_effect"] == pytest.approx(fit.params[3], rel=1e-9)
    assert rev["main:photo_size"]["abs_effect"] == pytest.approx(fit.params[1], rel=1e-9)
    assert 0 < inter["variance_reduction"] < 1
    assert inter["abs_ci_low"] < inter["abs_effect"] < inter["abs_ci_high"]
