"""Parameter recovery: the stored window fits find what the demo scenario planted.

The reference is the generator's own record (synthetic_logs.ostwyn: ``truth.json`` and
``true_judge_weights``), which is exact: the judge side is linear in the recorded cues
with symmetric, cue-independent errors, so OLS intervals should cover the planted
weights at their nominal rate.
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers.scenario import concat_csv, scenario_config
from helpers.store_rows import query_store as _table

from monitor.config import Config, load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import Store
from synthetic_logs.ostwyn import ScenarioTruth, generate, true_judge_weights

SEEDS = (7, 8, 9)
HANDLERS = 24  # 13 stable handlers a seed: about 1,400 intervals over the seeds
LENGTH = 90  # config/ostwyn.toml windows.length_days


def _build(root: Path, seed: int) -> tuple[Config, ScenarioTruth]:
    """The scenario's decisions (no outcomes: the judge side is under test) ingested
    as one file, then refit."""
    truth = generate(root / "scenario", seed=seed, days=365, n_handlers=HANDLERS)
    decisions = sorted((root / "scenario" / "decisions").glob("decisions_*.csv"))
    path = concat_csv(decisions, root / "in" / "decisions_all.csv")
    config = load_config(scenario_config(root / "live"))
    Store(config).init()
    assert not ingest(config, [str(path)], kind="decisions").failed_files
    refit(config)
    return config, truth


@pytest.fixture(scope="module")
def stores(tmp_path_factory) -> dict[int, tuple[Config, ScenarioTruth]]:
    return {s: _build(tmp_path_factory.mktemp(f"seed{s}"), s) for s in SEEDS}


def _weights(config: Config, scope: str, who: str) -> pd.DataFrame:
    return _table(
        config,
        "SELECT f.window_start, f.window_end, f.R_s, f.n_decisions, c.cue, c.weight, "
        "c.ci_low, c.ci_high FROM fits f JOIN cue_weights c "
        "USING (scope, decision_maker, window_end) "
        f"WHERE f.scope = '{scope}' AND f.decision_maker = '{who}' ORDER BY f.window_end",
    )


def _disjoint_full_windows(frame: pd.DataFrame, truth: ScenarioTruth) -> pd.DataFrame:
    """Windows wholly inside the scenario, no two sharing a day (ends >= 91 days apart)."""
    frame = frame.assign(
        start=pd.to_datetime(frame["window_start"]).dt.date,
        end=pd.to_datetime(frame["window_end"]).dt.date,
    )
    inside = frame[(frame["start"] >= truth.start) & (frame["end"] <= truth.last_decision_day)]
    keep, last = [], None
    for end in sorted(inside["end"].unique()):
        if last is None or (end - last).days >= LENGTH:
            keep.append(end)
            last = end
    return inside[inside["end"].isin(keep)]


def test_nominal_95_percent_intervals_cover_the_planted_weights(stores):
    covered = total = 0
    for config, truth in stores.values():
        for handler in truth.stable_handlers():
            rows = _disjoint_full_windows(_weights(config, "decision_maker", handler), truth)
            assert len(rows), handler
            true = true_judge_weights(truth, handler, truth.start)
            hit = (rows["ci_low"] <= rows["cue"].map(true)) & (
                rows["cue"].map(true) <= rows["ci_high"]
            )
            covered += int(hit.sum())
            total += len(rows)
    coverage = covered / total
    print(f"coverage of nominal 95% intervals: {coverage:.4f} over {total} intervals")
    # The nominal rate (t intervals, common practice); the band allows about three
    # binomial standard errors at this count (sqrt(.95 * .05 / 1200) ~ 0.006).
    assert total >= 1200
    assert 0.93 <= coverage <= 0.97


def _change(truth: ScenarioTruth, kind: str):
    return next(c for c in truth.changes if c.kind == kind)


def test_planted_consistency_loss_shows_as_falling_R_s(stores):
    config, truth = stores[7]
    change = _change(truth, "consistency_loss")
    (handler,) = change.handler_ids
    fits = _weights(config, "decision_maker", handler).drop_duplicates("window_end")
    start = pd.to_datetime(fits["window_start"]).dt.date
    end = pd.to_datetime(fits["window_end"]).dt.date
    before = fits[(end < change.start) & (start >= truth.start)]["R_s"]
    after = fits[start >= change.end]["R_s"]
    assert len(before) and len(after)
    # The planted error sd triples (truth.json), so consistency must fall clearly.
    assert change.after >= 2 * change.before
    assert after.max() < before.min()
    # A stable handler's R_s over the same period does not fall like that.
    other = truth.stable_handlers()[0]
    ref = _weights(config, "decision_maker", other).drop_duplicates("window_end")
    ref_end = pd.to_datetime(ref["window_end"]).dt.date
    assert ref[ref_end > change.end]["R_s"].mean() > after.mean() + 0.1


def test_team_drift_shows_as_a_rising_team_weight(stores):
    config, truth = stores[7]
    change = _change(truth, "team_drift")
    fits = _weights(config, "team", change.team)
    series = fits[fits["cue"] == change.parameter]
    start = pd.to_datetime(series["window_start"]).dt.date
    end = pd.to_datetime(series["window_end"]).dt.date
    # No full 90-day window fits before the change: the early, partly filled windows
    # (all rows still before the change) estimate the old weight.
    before = series[end < change.start]["weight"]
    after = series[start >= change.end]["weight"]
    assert len(before) and len(after)
    # Planted: the members' weights are scaled from `before` to `after` (truth.json);
    # the team's pooled weight should move by about their claims-weighted average.
    members = [h for h in truth.handlers if h.team == change.team]
    rate = np.array([h.claims_rate for h in members])
    day0 = change.start - timedelta(days=1)
    day1 = change.end + timedelta(days=1)
    w0 = np.average([true_judge_weights(truth, h.handler_id, day0)[change.parameter]
                     for h in members], weights=rate)  # fmt: skip
    w1 = np.average([true_judge_weights(truth, h.handler_id, day1)[change.parameter]
                     for h in members], weights=rate)  # fmt: skip
    assert w1 > w0
    assert after.mean() > before.mean()
    ratio = after.mean() / before.mean()
    assert ratio == pytest.approx(w1 / w0, rel=0.25)
