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

from monitor.assess.alerts import assess
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


def _direct_findings(config_path: Path) -> pd.DataFrame:
    """The assessable forbidden_direct rows (one per window end, handler, cue level)."""
    f = read_store(
        config_path,
        "SELECT window_end, decision_maker, cue, level, p_value, std_weight, flagged "
        "FROM policy_findings WHERE check_kind = 'forbidden_direct' AND assessable",
    )
    f["window_end"] = f["window_end"].dt.date
    return f


def _assess_per_window_fdr(cfg_path: Path) -> Path:
    """Re-assess the store under ``alert_rule = "per_window_fdr"`` (Benjamini-Hochberg
    within each window end: the rule whose promise this test checks); returns that
    configuration, written beside the demo one."""
    text = cfg_path.read_text(encoding="utf-8")
    fdr_path = cfg_path.with_name("per_window_fdr.toml")
    fdr_path.write_text(
        text.replace("[policy]", '[policy]\nalert_rule = "per_window_fdr"', 1), encoding="utf-8"
    )
    config = load_config(fdr_path)
    assert config.policy.alert_rule == "per_window_fdr"
    assess(config, force=True)
    return fdr_path


def test_false_alarms_over_stable_handlers_stay_within_the_fdr_level(tmp_path_factory):
    """Benjamini-Hochberg against flagging on raw p, on the same innocent data.

    Innocent: every (window end, handler, forbidden cue) except the planted direct
    handler's cue in windows ending after its change.  Raw-p flagging is the same rule
    with the q-value replaced by the p-value (assessable, |standardised weight| >=
    tolerance, p <= fdr); it is computed here for the single-column forbidden cue
    (claimant_gender), whose size and p are the stored std_weight and p_value.  BH's
    q >= p, so its flags are a subset of raw-p's; they must be strictly fewer on the
    innocent series (else BH did nothing - e.g. flags on raw p).

    The false-flag share: the mean, over evaluation families (seed x window end), of
    the false discovery proportion V / max(R, 1).  BH bounds its expectation by
    fdr * m0 / m <= fdr (Benjamini & Hochberg 1995, Theorem 1; Benjamini & Yekutieli
    2001 for positively dependent tests); the size threshold only removes flags.  Bound
    from the simulation size: windows of 90 days overlap, so only the non-overlapping
    ones are independent, n_eff = seeds x floor(days / length_days) = 4 x 3 = 12
    families; an FDP in [0, 1] with mean mu <= fdr has variance <= mu (1 - mu) <=
    fdr (1 - fdr), so the mean of 12 has a standard error <= sqrt(0.05 x 0.95 / 12)
    ~ 0.063, and the bound is fdr + 2 standard errors (a one-sided ~2.5 % chance of a
    false failure for a correct BH)."""
    fdps, false_bh, false_raw, false_alerts = [], 0, 0, []
    days = 270
    for seed in SEEDS:
        folder = tmp_path_factory.getbasetemp() / f"scenario_seed{seed}"
        cfg_path = _assess_per_window_fdr(
            build_demo_store(folder, seed=seed, days=days, n_handlers=12)
        )
        config = load_config(cfg_path)
        policy = config.policy
        truth = load_truth(folder / "scenario")
        direct = [c for c in truth.changes if c.kind == "forbidden_cue_direct"]
        f = _direct_findings(cfg_path)

        def non_null(r, direct=direct):
            return any(
                r.decision_maker in c.handler_ids and r.cue == c.forbidden_cue
                and r.window_end > c.start
                for c in direct
            )  # fmt: skip

        series = f.groupby(["window_end", "decision_maker", "cue"], as_index=False).agg(
            flagged=("flagged", "any"), levels=("level", "size"),
            p=("p_value", "first"), size=("std_weight", "first"),
        )  # fmt: skip
        series["null"] = ~series.apply(non_null, axis=1)
        for _, g in series.groupby("window_end"):
            r = int(g["flagged"].sum())
            v = int((g["flagged"] & g["null"]).sum())
            fdps.append(v / max(r, 1))
        single = series[(series["levels"] == 1) & series["null"]]
        raw = (single["size"].abs() >= policy.tolerance) & (single["p"] <= policy.fdr)
        assert not (single["flagged"] & ~raw).any(), "a BH flag that raw p would not give"
        false_bh += int(single["flagged"].sum())
        false_raw += int(raw.sum())
        planted = {(h, c.forbidden_cue) for c in direct for h in c.handler_ids}
        alerts = read_store(
            cfg_path, "SELECT decision_maker, cue FROM alerts WHERE kind = 'forbidden_cue'"
        )
        false_alerts += [
            (seed, a.decision_maker, a.cue)
            for a in alerts.itertuples()
            if (a.decision_maker, a.cue) not in planted
        ]
    n_eff = len(SEEDS) * (days // config.windows.length_days)
    bound = policy.fdr + 2 * np.sqrt(policy.fdr * (1 - policy.fdr) / n_eff)
    mean_fdp = float(np.mean(fdps))
    print(
        f"\nfalse alarms over {len(SEEDS)} seeds: mean FDP {mean_fdp:.4f} over {len(fdps)} "
        f"families (bound {bound:.3f}); false flags on innocent single-column series: "
        f"BH {false_bh}, raw p {false_raw}; false forbidden-cue alerts {false_alerts}"
    )
    assert false_raw > 0, "the innocent data gave raw p nothing to over-flag: no contrast"
    assert false_bh < false_raw
    assert mean_fdp <= bound
