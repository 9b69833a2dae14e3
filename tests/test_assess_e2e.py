"""Assess end to end on a planted scenario: a real store built by init -> ingest ->
refit -> assess from files this module writes, and every checked figure re-derived
here from the store's raw rows or stored weights with plain SQL, numpy, scipy and
statsmodels.

The scenario (seeded, 24 weeks, 12 decisions a day each): two steady handlers; one
whose judgments get much noisier half-way (consistency drops); one who judges from a
cue unrelated to the outcome (low achievement from the start); one who stops using a
cue half-way (a weight drifts).  Each planted person must be named by exactly the
check that matches the plant, and nobody else by it.
"""

from __future__ import annotations

from datetime import date, datetime, timedelta
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.configs import DECISION_COLUMNS, OUTCOME_COLUMNS, make_config
from helpers.store_rows import design_frame, query_store
from scipy import stats

from monitor.assess.alerts import assess
from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.stats.design import dummy_name
from monitor.store.connection import Store

START = date(2024, 1, 1)
DAYS = 168  # 24 weeks
PER_DAY = 12  # decisions per handler per day: 336 rows in a 28-day window
CHANGE_DAY = 84  # the noisy and the drifting handler change from this day on
NOW = datetime(2024, 12, 1)
HANDLERS = {  # handler: team
    "steady_a": "t1",
    "steady_b": "t2",
    "noisy": "t1",
    "guesser": "t2",
    "drifter": "t1",
}
CONSISTENCY_FLOOR = 0.8
ACHIEVEMENT_FLOOR = 0.3


def _scenario(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Decision and outcome rows as the files hold them (text), in time order.

    Outcome: a noisy threshold on amount, age_days, report and witness (band and region
    play no part).  Steady judges weigh those cues (plus band) with noise sd 5, which
    gives R_s near 0.92; the noisy judge's noise goes to sd 15 (R_s near 0.6, below the
    0.8 floor, while r_a stays near 0.5, above the 0.3 floor); the guesser judges from
    band alone (R_s near 0.94, r_a near 0); the drifter drops the report cue.  The
    margins leave room for a floor crossed only when the interval lies wholly below it
    (DESIGN.md, "Trust in alerts") as well as for a plain comparison of the figure."""
    decisions, outcomes = [], []
    for d in range(DAYS):
        day = START + timedelta(days=d)
        for h, team in HANDLERS.items():
            n = PER_DAY
            amount = rng.uniform(0, 1000, n)
            age = rng.integers(0, 366, n).astype(float)
            report = rng.random(n) < 0.5
            witness = rng.random(n) < 0.3
            region = np.where(rng.random(n) < 0.5, "north", "south")
            band = rng.choice(np.array(["a", "b", "c"]), n)
            b, c = band == "b", band == "c"
            latent = 0.03 * amount + 0.05 * age + 8 * report + 5 * witness + rng.normal(0, 8, n)
            fraud = latent > 29.6
            w_report = 0.0 if (h == "drifter" and d >= CHANGE_DAY) else 8.0
            noise = 15.0 if (h == "noisy" and d >= CHANGE_DAY) else 5.0
            if h == "guesser":
                score = 50 + 5 * b + 10 * c + rng.normal(0, 1.5, n)
            else:
                score = (
                    50 + 0.03 * amount + 0.05 * age + w_report * report + 5 * witness
                    + 4 * b + 6 * c + rng.normal(0, noise, n)
                )  # fmt: skip
            seconds = np.sort(rng.integers(8 * 3600, 18 * 3600, n))
            for i in range(n):
                at = datetime(day.year, day.month, day.day) + timedelta(seconds=int(seconds[i]))
                case = f"{h}-{d:03d}-{i:02d}"
                decisions.append({
                    "case_id": case, "decided": at.isoformat(sep=" "), "handler": h,
                    "team": team, "score": f"{score[i]:.6f}", "amount": f"{amount[i]:.2f}",
                    "age_days": f"{age[i]:.0f}", "report": "Y" if report[i] else "N",
                    "witness": str(int(witness[i])), "region": region[i], "band": band[i],
                })  # fmt: skip
                seen = at + timedelta(days=10)
                outcomes.append(
                    {"case_id": case, "seen": seen.isoformat(sep=" "), "result": "Yes" if fraud[i] else "No"}
                )  # fmt: skip
    return pd.DataFrame(decisions), pd.DataFrame(outcomes)


@pytest.fixture(scope="module")
def planted(tmp_path_factory) -> SimpleNamespace:
    root = tmp_path_factory.mktemp("assess_e2e")
    cfg_path = make_config(
        root,
        decisions__judgment_range=None,
        windows={"length_days": 28, "step_days": 7, "min_rows": 40},
        policy={
            "forbidden": ["region"],
            "min_rows": 100,
            "consistency_floor": CONSISTENCY_FLOOR,
            "achievement_floor": ACHIEVEMENT_FLOOR,
            "achievement_min_linked": 100,
            "consecutive_windows": 2,
        },
    )
    config = load_config(cfg_path)
    Store(config).init()
    decisions, outcomes = _scenario(np.random.default_rng(20240101))
    for kind, frame, columns in (
        ("decisions", decisions, DECISION_COLUMNS),
        ("outcomes", outcomes, OUTCOME_COLUMNS),
    ):
        (root / "landing" / kind).mkdir(parents=True)
        frame[columns].to_csv(root / "landing" / kind / f"{kind}.csv", index=False)
    summary = ingest(config, now=NOW)  # the landing folders, decisions first
    assert summary.quarantined == 0 and summary.accepted == 2 * len(decisions)
    refit(config)
    assess(config)
    findings = query_store(config, "SELECT * FROM policy_findings")
    for col in ("window_start", "window_end"):
        findings[col] = findings[col].dt.date
    return SimpleNamespace(config=config, findings=findings)


# --- drift: against the previous non-overlapping window ---------------------------------


def test_drift_compares_each_window_with_the_latest_one_ending_a_full_length_earlier(planted):
    """For every stored per-cue drift finding, the earlier window is found here with
    plain SQL (same series, ending at least windows.length_days before, the latest
    such), and the Wald statistic is recomputed from the two windows' stored weights
    and standard errors: z = (b_now - b_then) / sqrt(se_now^2 + se_then^2), p two-sided
    normal (DESIGN.md, "Drift: a Wald test of the change in a weight between two
    non-overlapping windows").  A finding paired with any other window - an
    overlapping one, or an older one - gives another change and another z."""
    config = planted.config
    length = config.windows.length_days
    pairs = query_store(
        config,
        """SELECT f.scope, f.decision_maker, f.window_end,
                  (SELECT max(p.window_end) FROM fits p
                    WHERE p.scope = f.scope AND p.decision_maker = f.decision_maker
                      AND p.window_end <= f.window_end - ?::INTEGER) AS earlier_end
           FROM fits f WHERE f.scope IN ('decision_maker', 'team')""",
        [length],
    )
    pairs = pairs.dropna(subset=["earlier_end"])
    weights = query_store(
        config,
        "SELECT scope, decision_maker, window_end, cue, weight, std_error FROM cue_weights "
        "WHERE scope IN ('decision_maker', 'team')",
    )
    now = pairs.merge(weights, on=["scope", "decision_maker", "window_end"])
    then = weights.rename(
        columns={"window_end": "earlier_end", "weight": "w_then", "std_error": "se_then"}
    )
    ref = now.merge(then, on=["scope", "decision_maker", "earlier_end", "cue"])
    ref["change"] = ref["weight"] - ref["w_then"]
    ref["z"] = ref["change"] / np.hypot(ref["std_error"], ref["se_then"])
    ref["p"] = 2 * stats.norm.sf(ref["z"].abs())
    ref["window_end"] = ref["window_end"].dt.date

    f = planted.findings
    # The per-design-column rows: a numeric or binary cue's verdict row, a categorical
    # cue's level rows (its verdict row is the joint test, tests/test_assess_verdicts.py).
    per_column = f["level"].notna() | (f["cue"] != "(all cues)") & ~f["cue"].isin(
        [c for c, spec in config.cues.items() if spec.type == "categorical"]
    )
    drift = f[(f["check_kind"] == "drift") & per_column].copy()
    drift["cue"] = [
        c if pd.isna(lv) else dummy_name(c, lv)
        for c, lv in zip(drift["cue"], drift["level"], strict=True)
    ]
    # One finding per (series, cue, window) that has an earlier non-overlapping window.
    keys = ["scope", "decision_maker", "window_end", "cue"]
    assert len(drift) == len(ref) and not drift.duplicated(keys).any()
    got = drift.merge(ref, on=keys, how="left", validate="one_to_one")
    assessable = got["assessable"].astype(bool)
    assert assessable.sum() > 200, "too few comparable windows to say anything"
    a = got[assessable]
    np.testing.assert_allclose(a["direct"], a["change"], rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(a["statistic"], a["z"], rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(a["p_value"], a["p"], rtol=1e-6, atol=1e-12)
    # The planted change is found: the drifter's report weight (8 -> 0) in every
    # window after the change compared with one before it.  (Other series may show a
    # chance flag: about 900 overlapping tests at drift_alpha 0.001.)
    # Flags of that series only where the two windows lie on either side of the change.
    change = START + timedelta(days=CHANGE_DAY)
    series = got[
        (got["scope"] == "decision_maker") & (got["decision_maker"] == "drifter")
        & (got["cue"] == "report")
    ]  # fmt: skip
    earlier_end = series["earlier_end"].dt.date
    before_after = (series["window_start"] >= change) & (earlier_end < change + timedelta(days=7))
    spans_change = (earlier_end - timedelta(days=length - 1) < change) & (
        series["window_end"] >= change
    )
    assert before_after.sum() >= 1 and series.loc[before_after, "flagged"].astype(bool).all()
    assert not series.loc[~spans_change, "flagged"].astype(bool).any()


# --- consistency and achievement floors --------------------------------------------------


def _window_rows(config, who: str, start: date, end: date) -> pd.DataFrame:
    cues = ", ".join(f'd."{c}"' for c in config.cues)
    return query_store(
        config,
        f"SELECT d.judgment, o.criterion, {cues} FROM decisions d "
        "LEFT JOIN current_outcomes o USING (decision_id) "
        "WHERE d.decision_maker = ? AND d.decided_day BETWEEN ? AND ? ORDER BY d.decision_id",
        [who, start, end],
    )


def _floor_rows(planted, kind: str) -> pd.DataFrame:
    f = planted.findings
    return f[(f["check_kind"] == kind) & (f["scope"] == "decision_maker")]


def test_consistency_floor_names_exactly_the_handler_who_became_noisy(planted):
    config = planted.config
    rows = _floor_rows(planted, "consistency")
    assert len(rows) == len(HANDLERS) * rows["window_end"].nunique()
    # The floor figure is R_s: the multiple correlation of the judge's OLS model, here
    # from statsmodels on the window's raw rows (every window of every handler).
    for r in rows.itertuples():
        raw = _window_rows(config, r.decision_maker, r.window_start, r.window_end)
        assert len(raw) == r.n
        if not r.assessable:
            continue
        fit = sm.OLS(
            raw["judgment"].to_numpy(float), sm.add_constant(design_frame(config, raw))
        ).fit()
        np.testing.assert_allclose(r.statistic, np.sqrt(fit.rsquared), rtol=1e-9)
    assessed = rows[rows["assessable"].astype(bool)]
    assert len(assessed) > 80
    flagged = assessed[assessed["flagged"].astype(bool)]
    assert set(flagged["decision_maker"]) == {"noisy"}
    # Every window lying wholly after the change is flagged, none wholly before it.
    noisy = assessed[assessed["decision_maker"] == "noisy"]
    change = START + timedelta(days=CHANGE_DAY)
    after = noisy["window_start"] >= change
    before = noisy["window_end"] < change
    assert after.sum() >= 8 and before.sum() >= 8
    assert noisy.loc[after, "flagged"].astype(bool).all()
    assert not noisy.loc[before, "flagged"].astype(bool).any()
    assert (flagged["statistic"] < CONSISTENCY_FLOOR).all()
    alerts = query_store(config, "SELECT decision_maker FROM alerts WHERE kind = 'consistency'")
    assert set(alerts["decision_maker"]) == {"noisy"}


def test_achievement_floor_names_exactly_the_handler_who_judges_from_an_irrelevant_cue(planted):
    config = planted.config
    rows = _floor_rows(planted, "achievement")
    assert len(rows) == len(HANDLERS) * rows["window_end"].nunique()
    # The floor figure is r_a = r(Ys, Ye) on the window's linked rows (numpy).
    for r in rows.itertuples():
        raw = _window_rows(config, r.decision_maker, r.window_start, r.window_end)
        linked = raw.dropna(subset=["criterion"])
        assert len(linked) == r.n
        if not r.assessable:
            continue
        r_a = np.corrcoef(linked["judgment"], linked["criterion"])[0, 1]
        np.testing.assert_allclose(r.statistic, r_a, rtol=1e-9)
    assessed = rows[rows["assessable"].astype(bool)]
    assert len(assessed) > 80
    flagged = assessed[assessed["flagged"].astype(bool)]
    assert set(flagged["decision_maker"]) == {"guesser"}
    assert (flagged["statistic"] < ACHIEVEMENT_FLOOR).all()
    guesser = assessed[assessed["decision_maker"] == "guesser"]
    assert guesser["flagged"].astype(bool).mean() >= 0.8  # low from the start
    alerts = query_store(config, "SELECT decision_maker FROM alerts WHERE kind = 'achievement'")
    assert set(alerts["decision_maker"]) == {"guesser"}
