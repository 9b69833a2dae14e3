"""The alerts' operating-characteristics benchmark: its planted truth is what it claims,
a tiny run of the harness finds a large planted direct use within a few weeks under
both alert rules, and its JSON is what the audit pack's methodology reads."""

from __future__ import annotations

import json
import sys
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from monitor.audit.report import OPERATING_CHARACTERISTICS, methodology_text

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:  # benchmarks/ is not installed: import it from the checkout
    sys.path.insert(0, str(REPO))

from benchmarks import alerts_world as world_model  # noqa: E402
from benchmarks import bench_alerts as bench  # noqa: E402
from benchmarks.alerts_checks import make_config  # noqa: E402


@pytest.fixture(scope="module")
def world() -> world_model.World:
    return world_model.World.build()


def _rows(world, weights, sigma, n, seed):
    rng = np.random.default_rng(seed)
    x = world_model.draw_cues(rng, n)
    y = 50.0 + (x - world.mean) @ weights + sigma * rng.standard_normal(n)
    return x, y


def _std(b, x, y):
    return b * x.std(ddof=1) / y.std(ddof=1)


def test_planted_sizes_are_what_an_ols_fit_finds_on_simulated_rows(world):
    # The harness solves the planted weights from the population cue covariance; an
    # ordinary least squares fit (statsmodels) on 400,000 simulated decisions after the
    # change must find the same standardised sizes (sampling error ~0.002).
    rng = np.random.default_rng(7)
    before, sigma = world_model.innocent_policy(world, rng)
    n = 400_000
    x, y = _rows(world, before, sigma, n, 1)
    assert abs(np.corrcoef(x[:, 0], x[:, 1])[0, 1] - 0.44) < 0.01
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    assert 0.69 <= np.sqrt(fit.rsquared) <= 0.86  # R_s of an innocent judge: 0.70-0.85

    direct = world_model.planted_policy(world, before, sigma, world_model.Plant("direct", 0.15))
    x, y = _rows(world, direct, sigma, n, 2)
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    assert abs(_std(fit.params[1], x[:, 0], y) - 0.15) < 0.01

    proxy = world_model.planted_policy(world, before, sigma, world_model.Plant("proxy", 0.25))
    x, y = _rows(world, proxy, sigma, n, 3)
    full = sm.OLS(y, sm.add_constant(x)).fit()
    alone = sm.OLS(y, sm.add_constant(x[:, :1])).fit()
    indirect = alone.params[1] - full.params[1]  # disparity - direct
    assert abs(_std(indirect, x[:, 0], y) - 0.25) < 0.01
    assert abs(_std(full.params[1], x[:, 0], y)) < 0.01  # no direct use

    drift = world_model.planted_policy(world, before, sigma, world_model.Plant("drift", 0.25))
    x0, y0 = _rows(world, before, sigma, n, 4)
    x1, y1 = _rows(world, drift, sigma, n, 5)
    b0 = sm.OLS(y0, sm.add_constant(x0)).fit().params[1 + world_model.DRIFTING]
    b1 = sm.OLS(y1, sm.add_constant(x1)).fit().params[1 + world_model.DRIFTING]
    change = abs(b1 - b0) * x1[:, world_model.DRIFTING].std(ddof=1) / y1.std(ddof=1)
    assert abs(change - 0.25) < 0.01

    # A planted loss of consistency keeps the weights and raises the noise so that the
    # model's multiple correlation (sqrt of statsmodels' R^2) falls to 0.40.
    lost = world_model.Plant("consistency", 0.40)
    same = world_model.planted_policy(world, before, sigma, lost)
    noisier = world_model.planted_noise(world, before, lost)
    assert np.array_equal(same, before) and noisier > sigma
    x, y = _rows(world, before, noisier, n, 6)
    assert abs(np.sqrt(sm.OLS(y, sm.add_constant(x)).fit().rsquared) - 0.40) < 0.01


@pytest.fixture(scope="module")
def tiny() -> dict:
    setup = bench.Setup(
        volumes=(1000,),
        plants=(world_model.Plant("direct", 0.4),),
        orgs_per_plant=1,
        tradeoff=(1.0,),
        tradeoff_volume=1000,
    )
    return bench.run(setup, progress=lambda _line: None)


def test_a_large_direct_use_is_found_within_a_few_weeks(tiny):
    # At 1,000 decisions per 90 days a full window estimates a standardised weight with
    # an error of about sqrt((1 - R_s^2) / (n (1 - R_f^2))) ~ 0.02 (R_s ~ 0.78, the
    # forbidden cue's R^2 on the others ~ 0.19): a weight of 0.4 makes the window's
    # estimate material and beyond |z| = 3.5 once about a quarter of the window (~3
    # weeks) follows the change, and the second look in a row opens the alert.
    for rule in bench.RULES:
        (row,) = tiny["rules"][rule]["detection"]
        assert row["persons"] == world_model.PLANTED_PER_ORG
        assert row["never_share"] == 0.0, rule
        assert row["median_weeks"] <= 6.0, (rule, row)
        assert row["p90_weeks"] <= 8.0, (rule, row)


def _shape(value):
    """The keys of a JSON document, recursively (a list by its first element)."""
    if isinstance(value, dict):
        return {k: _shape(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_shape(value[0])] if value else []
    return None


def _committed() -> dict:
    text = (resources.files("monitor.audit") / OPERATING_CHARACTERISTICS).read_text()
    return json.loads(text)


def test_the_committed_figures_have_the_structure_the_harness_writes(tiny):
    committed = _committed()
    assert _shape(committed) == _shape(tiny)
    assert committed["volumes"] == list(bench.VOLUMES)
    assert set(committed["rules"]) == set(bench.RULES)
    assert not committed["run"]["command"].endswith("--quick")


@pytest.mark.parametrize("rule", bench.RULES)
def test_the_methodology_prints_the_figures_of_the_configured_rule(rule):
    figures = _committed()["rules"][rule]
    other = _committed()["rules"][next(r for r in bench.RULES if r != rule)]
    text = methodology_text(make_config(rule), "2026Q1", "2026-04-01T00:00:00Z")
    assert "SIMULATED" in text
    assert ("old scheme" in text) == (rule == "per_window_fdr")
    for row in figures["false_alerts"]:
        assert f"{row['per_100']:.2f} (<= {row['upper_95']:.2f})" in text
    # The other rule's figures are not what it prints (where they differ).
    assert any(
        f"{row['per_100']:.2f} (<= {row['upper_95']:.2f})" not in text
        for row in other["false_alerts"]
    )
    assert "differs from the simulated settings" not in text


def test_a_configuration_unlike_the_simulation_is_told_so(tiny):
    from monitor.audit.report import operating_characteristics_lines

    config = make_config("calibrated", tolerance=0.2)
    lines = "\n".join(operating_characteristics_lines(config, tiny))
    assert "differs from the simulated settings in policy.tolerance" in lines
