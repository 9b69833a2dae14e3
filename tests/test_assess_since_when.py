"""Drift alerts say since when: the change-point estimate stored with a drift finding
and carried into the alert, checked against the day the scenario planted the change."""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import pytest
from helpers.demo_store import build_demo_store

from monitor.assess.alerts import list_alerts
from monitor.config import load_config
from monitor.stats.design import cue_of
from synthetic_logs.ostwyn import load_truth


@pytest.fixture(scope="session")
def demo_config(tmp_path_factory) -> Path:
    # Same folder as the other assess tests: build_demo_store's marker reuses the build.
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def test_drift_alert_on_a_planted_step_dates_the_change(demo_config):
    # Source: the scenario's own record of what it planted (synthetic_logs, truth.json):
    # one handler starts weighting a permitted cue (the proxy) much more on a given day
    # (a step).  A forbidden cue's step is the forbidden-cue check's, not drift's.
    truth = load_truth(demo_config.parent / "scenario")
    step = next(c for c in truth.changes if c.kind == "proxy_cue")
    assert step.start == step.end and step.mode == "set", "a step, not a ramp"
    alerts = [
        a
        for a in list_alerts(load_config(demo_config))
        if a["kind"] == "drift"
        and a["decision_maker"] in step.handler_ids
        and a["cue"] == cue_of(step.parameter)
    ]
    assert alerts, "the planted step should raise a drift alert on its cue"
    forbidden = load_config(demo_config).policy.forbidden
    assert not any(
        a["kind"] == "drift" and a["cue"] in forbidden
        for a in list_alerts(load_config(demo_config))
    ), "a forbidden cue's weight is watched by the forbidden-cue check, not by drift"
    since = alerts[0]["evidence"]["since"]
    estimate = date.fromisoformat(since["estimate"])
    low, high = date.fromisoformat(since["low"]), date.fromisoformat(since["high"])
    assert low <= estimate <= high
    # Within three weeks of the planted day, and the interval is at most a window long.
    assert abs((estimate - step.start).days) <= 21, (estimate, step.start)
    assert high - low <= timedelta(days=90)
