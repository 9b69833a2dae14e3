"""policy_findings against outside references: the forbidden-cue rows of the demo store
re-derived with statsmodels OLS from the store's raw rows, the omitted-variable
identity on every stored row, and the false-alarm rate over stable handlers of
several generated scenarios compared with what Benjamini-Hochberg promises.
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.demo_store import build_demo_store
from helpers.store_rows import design_frame, read_store
from statsmodels.stats.multitest import multipletests

from monitor.config import load_config
from synthetic_logs.ostwyn import load_truth


@pytest.fixture(scope="session")
def demo_config(tmp_path_factory) -> Path:
    # Same folder as test_alerts: build_demo_store's marker makes the second build free.
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def _window_rows(config_path, config, handler, start, end) -> pd.DataFrame:
    cues = ", ".join(f'"{c}"' for c in config.cues)
    return read_store(
        config_path,
        f"SELECT judgment, {cues} FROM decisions WHERE decision_maker = ? "
        "AND decided_day BETWEEN ? AND ? ORDER BY decision_id",
        [handler, start, end],
    )


def test_forbidden_rows_match_statsmodels_on_the_raw_rows_of_one_window(demo_config):
    config = load_config(demo_config)
    truth = load_truth(demo_config.parent / "scenario")
    planted = next(c for c in truth.changes if c.kind == "forbidden_cue_direct")
    stored = read_store(
        demo_config, "SELECT * FROM policy_findings WHERE check_kind = 'forbidden_direct'"
    )
    # The first window that lies wholly after the planted change.
    ends = sorted(set(stored["window_end"].dt.date))
    end = next(e for e in ends if e - timedelta(days=config.windows.length_days) > planted.start)
    family = stored[stored["window_end"].dt.date == end]
    p_values, keys = [], []
    for handler, rows_h in family.groupby("decision_maker"):
        start = rows_h["window_start"].iloc[0].date()
        raw = _window_rows(demo_config, config, handler, start, end)
        assert len(raw) == rows_h["n"].iloc[0]
        x = design_frame(config, raw)
        y = raw["judgment"].to_numpy(float)
        full = sm.OLS(y, sm.add_constant(x)).fit()
        for cue in config.policy.forbidden:
            cols = [c for c in x.columns if c == cue or c.startswith(f"{cue}=")]
            alone = sm.OLS(y, sm.add_constant(x[cols])).fit()  # disparity: F alone
            for col in cols:
                row = rows_h[(rows_h["cue"] == cue) & (rows_h["level"] == col.split("=", 1)[1])]
                assert len(row) == 1
                row = row.iloc[0]
                np.testing.assert_allclose(row["disparity"], alone.params[col], rtol=0, atol=1e-8)
                np.testing.assert_allclose(row["direct"], full.params[col], rtol=0, atol=1e-8)
                np.testing.assert_allclose(
                    row["indirect"], alone.params[col] - full.params[col], rtol=0, atol=1e-8
                )
                scale = x[col].std(ddof=1) / np.std(y, ddof=1)  # standardised weight
                lo, hi = full.conf_int(0.05).loc[col] * scale
                np.testing.assert_allclose(
                    [row["std_weight"], row["ci_low"], row["ci_high"]],
                    [full.params[col] * scale, lo, hi], rtol=1e-9, atol=1e-12,
                )  # fmt: skip
            # The evidence behind the q-value: the t-test for one dummy, the joint
            # F-test of all of a categorical cue's dummies (statsmodels).
            if len(cols) == 1:
                p = full.pvalues[cols[0]]
            else:
                names = list(full.params.index)
                restrict = np.eye(len(names))[[names.index(c) for c in cols]]
                p = float(full.f_test(restrict).pvalue)
            p_values.append(p)
            keys.append((handler, cue))
    # BH over all handlers x forbidden cues of one window end (statsmodels fdr_bh).
    q_ref = multipletests(p_values, method="fdr_bh")[1]
    q_stored = [
        family[(family["decision_maker"] == h) & (family["cue"] == c)]["q_value"].iloc[0]
        for h, c in keys
    ]
    np.testing.assert_allclose(q_stored, q_ref, rtol=1e-6, atol=1e-12)


def test_disparity_is_direct_plus_indirect_on_every_stored_row(demo_config):
    f = read_store(
        demo_config,
        "SELECT disparity, direct, indirect FROM policy_findings "
        "WHERE check_kind IN ('forbidden_direct', 'forbidden_proxy') AND disparity IS NOT NULL",
    )
    assert len(f) > 1000
    # The omitted-variable identity, exact for OLS (DESIGN.md, "Forbidden cues").
    np.testing.assert_allclose(f["disparity"], f["direct"] + f["indirect"], rtol=0, atol=1e-10)
    parts = read_store(
        demo_config,
        "SELECT f.indirect, sum(p.part) AS parts FROM policy_proxy_parts p JOIN policy_findings f "
        "ON f.check_kind = 'forbidden_proxy' AND f.decision_maker = p.decision_maker "
        "AND f.cue = p.cue AND f.level IS NOT DISTINCT FROM p.level AND f.window_end = p.window_end "
        "WHERE f.indirect IS NOT NULL GROUP BY ALL",
    )
    assert len(parts) > 100
    # indirect = sum_k b_k delta_k over the permitted cues (same identity, per proxy).
    np.testing.assert_allclose(parts["parts"], parts["indirect"], rtol=0, atol=1e-8)


# --- false alarms over stable handlers -----------------------------------------------------

SEEDS = (1, 2, 3, 4)


def _direct_flags(config_path: Path) -> pd.DataFrame:
    """One row per (window end, handler, forbidden cue) with flagged."""
    f = read_store(
        config_path,
        "SELECT window_end, decision_maker, cue, bool_or(flagged) AS flagged "
        "FROM policy_findings WHERE check_kind = 'forbidden_direct' AND assessable "
        "GROUP BY ALL",
    )
    f["window_end"] = f["window_end"].dt.date
    return f


def test_false_alarms_over_stable_handlers_stay_within_the_fdr_level(tmp_path_factory):
    """What is compared: the mean, over evaluation families (seed x window end), of the
    false discovery proportion V / max(R, 1) among flagged (handler, forbidden cue)
    series, with the truly non-null series being the planted direct handler's cue in
    windows ending after its change.  Benjamini-Hochberg bounds the expectation of
    that proportion by fdr * m0 / m <= fdr in every family (Benjamini & Hochberg 1995,
    Theorem 1; Benjamini & Yekutieli 2001 for positively dependent tests); the size
    threshold only removes flags.  Tolerance 0.05: overlapping windows make the 4 x ~38
    families worth only about a dozen independent ones, and an FDP in [0, 1] with mean
    fdr has a standard deviation near sqrt(fdr (1 - fdr)) ~ 0.22, so about 0.06 per
    mean of a dozen (common practice: about one standard error)."""
    fdps, null_series, null_series_flagged, false_alerts, proxy_false_alerts = [], 0, 0, [], []
    for seed in SEEDS:
        folder = tmp_path_factory.getbasetemp() / f"scenario_seed{seed}"
        cfg_path = build_demo_store(folder, seed=seed, days=270, n_handlers=12)
        truth = load_truth(folder / "scenario")
        direct = [c for c in truth.changes if c.kind == "forbidden_cue_direct"]
        proxy = [c for c in truth.changes if c.kind == "proxy_cue"]
        f = _direct_flags(cfg_path)

        def non_null(r, direct=direct):
            return any(
                r.decision_maker in c.handler_ids and r.cue == c.forbidden_cue
                and r.window_end > c.start
                for c in direct
            )  # fmt: skip

        f["null"] = ~f.apply(non_null, axis=1)
        for _, g in f.groupby("window_end"):
            r = int(g["flagged"].sum())
            v = int((g["flagged"] & g["null"]).sum())
            fdps.append(v / max(r, 1))
        planted_direct = {(h, c.forbidden_cue) for c in direct for h in c.handler_ids}
        keep = [
            (h, c) not in planted_direct
            for h, c in f[["decision_maker", "cue"]].itertuples(index=False)
        ]
        series = f[keep]
        by_series = series.groupby(["decision_maker", "cue"])["flagged"].any()
        null_series += len(by_series)
        null_series_flagged += int(by_series.sum())
        alerts = read_store(cfg_path, "SELECT kind, decision_maker, cue FROM alerts")
        planted_proxy = {(h, c.forbidden_cue) for c in proxy for h in c.handler_ids}
        for a in alerts.itertuples():
            if a.kind == "forbidden_cue" and (a.decision_maker, a.cue) not in planted_direct:
                false_alerts.append((seed, a.decision_maker, a.cue))
            if a.kind == "proxy_use" and (a.decision_maker, a.cue) not in planted_proxy:
                proxy_false_alerts.append((seed, a.decision_maker, a.cue))
    fdr = load_config(cfg_path).policy.fdr
    mean_fdp = float(np.mean(fdps))
    print(
        f"\nfalse alarms over {len(SEEDS)} seeds: mean FDP {mean_fdp:.4f} over {len(fdps)} "
        f"families; null series with any flagged window {null_series_flagged}/{null_series}; "
        f"false forbidden-cue alerts {false_alerts}; false proxy alerts {proxy_false_alerts}"
    )
    assert mean_fdp <= fdr + 0.05
