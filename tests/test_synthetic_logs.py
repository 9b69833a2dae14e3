"""The Ostwyn Mutual demo scenario: files, planted faults and planted judge models."""

from __future__ import annotations

import tomllib
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from synthetic_logs.ostwyn import day_files, generate, load_truth, true_judge_weights
from synthetic_logs.ostwyn_truth import DESIGN_COLUMNS

CONFIG = Path(__file__).resolve().parents[1] / "config" / "ostwyn.toml"
SMALL = {"start": date(2024, 11, 1), "days": 91, "n_handlers": 6,
         "outcome_horizon": date(2025, 4, 30)}  # fmt: skip


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    out = tmp_path_factory.mktemp("ostwyn")
    truth = generate(out, seed=11, **SMALL)
    return out, truth


def _read(folder: Path) -> pd.DataFrame:
    frames = [
        pd.read_csv(p, dtype=str, keep_default_na=False).assign(_file=f"{folder.name}/{p.name}")
        for p in sorted(folder.glob("*.csv"))
    ]
    return pd.concat(frames, ignore_index=True)


def _config_columns() -> tuple[list[str], list[str]]:
    # Source: the demo configuration the monitor reads (config/ostwyn.toml).
    cfg = tomllib.loads(CONFIG.read_text())
    d, o = cfg["decisions"], cfg["outcomes"]
    decisions = [d["id"], d["decided_at"], d["decision_maker"], d["team"], d["judgment"]]
    decisions += [c.get("column", name) for name, c in cfg["cues"].items()]
    return decisions, [o["id"], o["observed_at"], o["criterion"]]


def _clean_design(decisions: pd.DataFrame, bad_ids: set[str]) -> pd.DataFrame:
    """Decode clean rows with the config's codes and reference levels."""
    cfg = tomllib.loads(CONFIG.read_text())
    rows = decisions[~decisions["claim_id"].isin(bad_ids)].copy()
    out = pd.DataFrame({"priority": rows["priority"].astype(float)})
    out["handler_id"] = rows["handler_id"]
    out["day"] = pd.to_datetime(rows["scored_at"]).dt.date
    for name, cue in cfg["cues"].items():
        if cue["type"] == "numeric":
            out[name] = rows[name].astype(float)
        elif cue["type"] == "binary":
            out[name] = rows[name].map(cue["values"]).astype(float)
        else:
            for level in cue["levels"]:
                if level != cue["reference"]:
                    out[f"{name}={level}"] = (rows[name] == level).astype(float)
    return out


def test_same_seed_gives_identical_files_and_another_seed_does_not(scenario, tmp_path):
    out, _ = scenario
    again = tmp_path / "again"
    generate(again, seed=11, **SMALL)
    other = tmp_path / "other"
    generate(other, seed=12, **SMALL)
    files = sorted(p.relative_to(out) for p in out.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(again) for p in again.rglob("*") if p.is_file())
    assert all((out / f).read_bytes() == (again / f).read_bytes() for f in files)
    first = Path("decisions") / "decisions_2024-11-01.csv"
    assert (out / first).read_bytes() != (other / first).read_bytes()


def test_files_have_exactly_the_config_columns(scenario):
    out, _ = scenario
    want_decisions, want_outcomes = _config_columns()
    for path in (out / "decisions").glob("*.csv"):
        assert list(pd.read_csv(path, nrows=0).columns) == want_decisions, path
    for path in (out / "outcomes").glob("*.csv"):
        assert list(pd.read_csv(path, nrows=0).columns) == want_outcomes, path


def test_decisions_fall_on_weekdays_in_working_hours(scenario):
    out, truth = scenario
    decisions = _read(out / "decisions")
    clean = decisions[~decisions["claim_id"].isin({b.claim_id for b in truth.bad_rows})]
    stamps = pd.to_datetime(clean["scored_at"], format="%Y-%m-%d %H:%M:%S")
    assert (stamps.dt.day_of_week < 5).all()
    minutes = stamps.dt.hour * 60 + stamps.dt.minute
    assert minutes.min() >= 9 * 60 and minutes.max() < 17 * 60 + 30  # brief: working hours
    assert stamps.min().date() >= SMALL["start"]
    assert stamps.max().date() < SMALL["start"] + timedelta(SMALL["days"])


def test_every_planted_bad_row_is_in_its_file_and_nothing_else_is_bad(scenario):
    out, truth = scenario
    decisions = _read(out / "decisions")
    assert len(truth.bad_rows) >= 8
    for bad in truth.bad_rows:
        rows = decisions[decisions["claim_id"] == bad.claim_id]
        assert (rows["_file"] == bad.file).all()
        assert bad.value in rows[bad.column].tolist()
        if bad.kind == "duplicate_claim_id":
            assert len(rows) == 2 and rows.drop(columns="_file").nunique().max() == 2
    # An independent check with the config's rules: the faulty rows are exactly those listed.
    cfg = tomllib.loads(CONFIG.read_text())
    priority = pd.to_numeric(decisions["priority"], errors="coerce")
    amount = pd.to_numeric(decisions["claim_amount"], errors="coerce")
    stamps = pd.to_datetime(decisions["scored_at"], format="%Y-%m-%d %H:%M:%S", errors="coerce")
    faulty = (
        priority.isna()
        | ~priority.between(*cfg["decisions"]["judgment_range"])
        | ~amount.between(*cfg["cues"]["claim_amount"]["range"])
        | ~decisions["claimant_gender"].isin(cfg["cues"]["claimant_gender"]["levels"])
        | (decisions["handler_id"] == "")
        | stamps.isna()
        | ~decisions["police_report"].isin(list(cfg["cues"]["police_report"]["values"]))
        | decisions["claim_id"].duplicated(keep="first")
    )
    assert sorted(decisions.loc[faulty, "claim_id"]) == sorted(b.claim_id for b in truth.bad_rows)


def test_outcomes_fall_after_their_decision_and_before_the_horizon(scenario):
    out, truth = scenario
    decisions = _read(out / "decisions").drop_duplicates("claim_id")
    outcomes = _read(out / "outcomes")
    closed = pd.to_datetime(outcomes["closed_at"], format="%Y-%m-%d %H:%M:%S")
    assert closed.dt.date.max() <= truth.outcome_horizon
    scored = pd.to_datetime(
        outcomes["claim_id"].map(decisions.set_index("claim_id")["scored_at"]),
        format="%Y-%m-%d %H:%M:%S",
    )
    assert scored.notna().all()  # every verdict belongs to a claim in the files
    assert (closed.dt.day_of_week < 5).all()  # verdicts are recorded on working days
    lag = (closed - scored).dt.days
    assert lag.min() >= 19 and lag.max() <= 180 + 3  # brief: 20-180 days (+ weekend shift)
    assert set(outcomes["fraud_confirmed"]) == {"Yes", "No"}
    # Each file holds the verdicts observed on the day in its name.
    assert (outcomes["_file"].str[-14:-4] == outcomes["closed_at"].str[:10]).all()


def test_corrections_restate_outcomes_later_and_the_latest_is_listed_in_truth(scenario):
    out, truth = scenario
    outcomes = _read(out / "outcomes")
    assert truth.corrections
    for fix in truth.corrections:
        rows = outcomes[outcomes["claim_id"] == fix.claim_id].sort_values("closed_at")
        assert len(rows) == 2
        assert rows.iloc[0][["closed_at", "fraud_confirmed"]].tolist() == [
            fix.first_closed_at,
            fix.first_value,
        ]
        assert rows.iloc[-1][["closed_at", "fraud_confirmed"]].tolist() == [
            fix.corrected_closed_at,
            fix.corrected_value,
        ]
        assert rows.iloc[-1]["_file"] == fix.file
    assert outcomes["claim_id"].duplicated().sum() == len(truth.corrections)


def test_recorded_priority_stays_inside_the_scale(scenario):
    out, truth = scenario
    decisions = _read(out / "decisions")
    clean = decisions[~decisions["claim_id"].isin({b.claim_id for b in truth.bad_rows})]
    priority = clean["priority"].astype(float)
    assert priority.between(0, 100).all()
    assert (clean["priority"].str.fullmatch(r"\d{1,3}\.\d")).all()  # rounded to 0.1


def test_error_bounds_keep_every_handler_inside_the_scale_on_every_day(scenario):
    _, truth = scenario
    day = truth.start
    while day <= truth.last_decision_day:
        for h in truth.handlers:
            p = true_judge_weights(truth, h.handler_id, day)
            lo = hi = p["intercept"]
            for col in DESIGN_COLUMNS:
                a, b = (p[col] * v for v in truth.cue_bounds[col])
                lo, hi = lo + min(a, b), hi + max(a, b)
            assert lo - h.noise_bound >= 0 and hi + h.noise_bound <= 100, (h.handler_id, day)
            assert p["noise_sd"] < h.noise_bound
        day += timedelta(7)


def _ols_within_4_se(frame, truth, handler_id, first, last):
    rows = frame[(frame["handler_id"] == handler_id) & frame["day"].between(first, last)]
    x = sm.add_constant(rows[list(DESIGN_COLUMNS)], has_constant="add")
    fit = sm.OLS(rows["priority"], x).fit()  # statsmodels OLS is the outside reference
    want = true_judge_weights(truth, handler_id, first)
    assert want == true_judge_weights(truth, handler_id, last)  # the period is stable
    for name in DESIGN_COLUMNS:
        z = (fit.params[name] - want[name]) / fit.bse[name]
        assert abs(z) < 4, (handler_id, name, fit.params[name], want[name])
    assert abs((fit.params["const"] - want["intercept"]) / fit.bse["const"]) < 4
    # Residual sd estimates noise_sd; its relative sampling sd is about 1/sqrt(2n).
    assert abs(np.sqrt(fit.scale) / want["noise_sd"] - 1) < 4 / np.sqrt(2 * len(rows))
    return fit


def test_ols_recovers_a_stable_handlers_planted_weights(scenario):
    out, truth = scenario
    frame = _clean_design(_read(out / "decisions"), {b.claim_id for b in truth.bad_rows})
    handler = truth.stable_handlers()[0]
    fit = _ols_within_4_se(frame, truth, handler, truth.start, truth.last_decision_day)
    assert fit.nobs > 500


def test_ols_recovers_the_planted_gender_weight_after_onset(scenario):
    out, truth = scenario
    change = next(c for c in truth.changes if c.kind == "forbidden_cue_direct")
    (handler,) = change.handler_ids
    assert true_judge_weights(truth, handler, change.start - timedelta(1))[change.parameter] == 0
    frame = _clean_design(_read(out / "decisions"), {b.claim_id for b in truth.bad_rows})
    fit = _ols_within_4_se(frame, truth, handler, change.start, truth.last_decision_day)
    assert fit.params[change.parameter] > 0


def test_planted_noise_and_drift_follow_their_schedules(scenario):
    _, truth = scenario
    loss = next(c for c in truth.changes if c.kind == "consistency_loss")
    (handler,) = loss.handler_ids
    sd = [true_judge_weights(truth, handler, d)["noise_sd"] for d in (loss.start, loss.end)]
    assert sd == [6.0, 18.0]  # brief: from ~6 to ~18
    drift = next(c for c in truth.changes if c.kind == "team_drift")
    for hid in drift.handler_ids:
        base = truth.handler(hid).weights[drift.parameter]
        end = true_judge_weights(truth, hid, drift.end)[drift.parameter]
        assert end == pytest.approx(2 * base)  # brief: drifts to about double
        assert truth.handler(hid).team == drift.team


def test_fraud_base_rate_is_plausible(scenario):
    out, _ = scenario
    latest = _read(out / "outcomes").sort_values("closed_at").groupby("claim_id").last()
    rate = (latest["fraud_confirmed"] == "Yes").mean()
    assert 0.03 < rate < 0.12  # brief: around 5-10%; wide for a small sample


def test_truth_round_trips_through_json(scenario):
    out, truth = scenario
    assert load_truth(out) == truth


def test_day_files_lists_each_days_arrivals_decisions_first(scenario):
    out, _ = scenario
    listing = day_files(out)
    days = [d for d, _ in listing]
    assert days == sorted(days) and len(days) == len(set(days))
    every = [p for _, paths in listing for p in paths]
    assert sorted(every) == sorted(out.glob("*/*.csv"))
    for day, paths in listing:
        assert all(day.isoformat() in p.name for p in paths)
        assert [p.parent.name for p in paths] == sorted(p.parent.name for p in paths)


def test_committed_sample_is_what_the_generator_writes(tmp_path):
    # The arguments README.md gives for regenerating synthetic_logs/sample.
    sample = Path(__file__).resolve().parents[1] / "synthetic_logs" / "sample"
    generate(tmp_path, seed=7, days=28, n_handlers=6, outcome_horizon=date(2025, 3, 31))
    files = sorted(p.relative_to(sample) for p in sample.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*") if p.is_file())
    assert all((sample / f).read_bytes() == (tmp_path / f).read_bytes() for f in files)
