"""The audit pack's forbidden_cues table against an outside reference: its q-values are
Benjamini-Hochberg over the pack's family, recomputed here with statsmodels from the
exported p-values, and its flags follow from them.

The store is built by the real pipeline (init, ingest, refit, assess) from the
committed Ostwyn sample (4 weeks of 2024Q4, 6 handlers) and exported as CSV twice: under
the default alert rule and under ``alert_rule = "per_window_fdr"``, where a flag is
BH's verdict (the q-values are the same under both rules).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from helpers.configs import REPO
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.assess.alerts import assess
from monitor.audit.pack import export
from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import Store

SAMPLE = REPO / "synthetic_logs" / "sample"


RULES = ("default", "per_window_fdr")


@pytest.fixture(scope="module")
def exported(tmp_path_factory) -> dict[str, tuple[object, pd.DataFrame]]:
    """{rule: (config, exported forbidden_cues table)} from one store."""
    root = tmp_path_factory.mktemp("audit_forbidden")
    raw = (REPO / "config" / "ostwyn.toml").read_text(encoding="utf-8")
    raw = raw.replace("../demo_run", str(root / "run"))
    configs = {}
    for rule in RULES:
        text = (
            raw
            if rule == "default"
            else raw.replace("[policy]", f'[policy]\nalert_rule = "{rule}"')
        )
        (root / f"{rule}.toml").write_text(text, encoding="utf-8")
        configs[rule] = load_config(root / f"{rule}.toml")
    config = configs["default"]
    Store(config).init()
    for kind in ("decisions", "outcomes"):
        frames = [pd.read_csv(f, dtype=str) for f in sorted((SAMPLE / kind).glob("*.csv"))]
        path = root / f"{kind}.csv"
        pd.concat(frames, ignore_index=True).to_csv(path, index=False)
        ingest(config, [str(path)], kind=kind)
    refit(config)
    assess(config)
    packs = {}
    for rule, cfg in configs.items():
        export(cfg, quarter="2024Q4", out_dir=root / rule, formats=["csv"])
        packs[rule] = (cfg, pd.read_csv(root / rule / "forbidden_cues.csv"))
    return packs


def _bool(col: pd.Series) -> np.ndarray:
    return col.astype(str).str.lower().map({"true": True, "false": False}).to_numpy(bool)


@pytest.mark.parametrize("rule", RULES)
def test_forbidden_cue_q_values_are_benjamini_hochberg_over_the_pack_family(exported, rule):
    """The family is every assessable decision-maker x forbidden cue level of the export
    (DEVELOPERS.md, "Audit pack"); its q-values must be statsmodels' fdr_bh of the
    exported p-values.  Under the per-window FDR rule a row is flagged exactly when it
    is assessable, its |std_weight| reaches the policy tolerance and its q is at most
    the policy's fdr."""
    config, all_rows = exported[rule]
    # A row's own p: the two-sided t test of the direct weight, checked from the exported
    # weight and standard error (df = n - k - 1; k design columns) on every row that
    # has a direct weight (verdict rows of one-column cues and level-detail rows).
    k = len(config.design_columns())
    own = all_rows[_bool(all_rows["assessable"]) & all_rows["direct_se"].notna()]
    p_ref = 2 * stats.t.sf(np.abs(own["direct"] / own["direct_se"]), own["n"] - k - 1)
    np.testing.assert_allclose(own["p_value"], p_ref, rtol=1e-6, atol=1e-12)
    # The family: one verdict row per decision-maker x forbidden cue (a categorical
    # cue's levels are detail beneath its joint test, never tested on their own).
    detail = _bool(all_rows["level_detail"])
    assert detail.any() and all_rows.loc[detail, "q_value"].isna().all()
    assert all_rows.loc[detail, "flagged"].isna().all()
    t = all_rows[~detail].reset_index(drop=True)
    assessable = _bool(t["assessable"])
    p = t["p_value"].to_numpy(float)
    assert assessable.sum() >= 12 and np.isfinite(p[assessable]).all()
    a = t[assessable]

    # Source: statsmodels.stats.multitest.multipletests(method="fdr_bh").
    q_ref = multipletests(p[assessable], method="fdr_bh")[1]
    q = t["q_value"].to_numpy(float)
    np.testing.assert_allclose(q[assessable], q_ref, rtol=1e-9, atol=1e-12)
    assert np.isnan(q[~assessable]).all()
    # BH moves these p-values: a q-value equal to the raw p would fail above.
    assert np.abs(q_ref - p[assessable]).max() > 0.01

    if rule != "per_window_fdr":
        return
    policy = config.policy
    want = np.zeros(len(t), dtype=bool)
    want[assessable] = (np.abs(a["std_weight"].to_numpy(float)) >= policy.tolerance) & (
        q_ref <= policy.fdr
    )
    np.testing.assert_array_equal(_bool(t["flagged"]), want)
    # Some row is material with p <= fdr but q > fdr: flagging on raw p would differ.
    raw_flags = (np.abs(a["std_weight"].to_numpy(float)) >= policy.tolerance) & (
        p[assessable] <= policy.fdr
    )
    assert (raw_flags & ~want[assessable]).any()


def test_intervals_stand_on_the_scale_of_the_figure_beside_them(exported):
    # ci_low / ci_high bracket the standardised weight; direct_ci_* the raw weight; the
    # ratio of the two scales is the column's sd(x) / sd(Ys) = std_weight / direct.
    _, t = exported["default"]
    a = t[_bool(t["assessable"]) & t["direct"].notna()]
    scale = a["std_weight"] / a["direct"]
    np.testing.assert_allclose(a["ci_low"], a["direct_ci_low"] * scale, rtol=1e-9)
    np.testing.assert_allclose(a["ci_high"], a["direct_ci_high"] * scale, rtol=1e-9)
    assert ((a["ci_low"] <= a["std_weight"]) & (a["std_weight"] <= a["ci_high"])).all()
    assert (
        (a["indirect_ci_low"] <= a["std_indirect"]) & (a["std_indirect"] <= a["indirect_ci_high"])
    ).all()


@pytest.mark.parametrize("rule", RULES)
def test_proxy_verdict_follows_the_same_rule_in_its_own_family(exported, rule):
    # Source: statsmodels multipletests (fdr_bh) over the assessable rows' indirect p.
    config, t = exported[rule]
    t = t[~_bool(t["level_detail"])].reset_index(drop=True)
    ok = _bool(t["assessable"])
    q_ref = multipletests(t["indirect_p"].to_numpy(float)[ok], method="fdr_bh")[1]
    np.testing.assert_allclose(t["indirect_q_value"].to_numpy(float)[ok], q_ref, rtol=1e-9)
    policy = config.policy
    size = np.abs(t["std_indirect"].to_numpy(float)[ok]) >= (
        policy.proxy_tolerance or policy.tolerance
    )
    if rule == "per_window_fdr":
        want = size & (q_ref <= policy.fdr)
    else:
        from monitor.stats.monitoring import forbidden_cue_limit

        limit = forbidden_cue_limit(policy, config.windows)
        want = size & (t["indirect_p"].to_numpy(float)[ok] <= limit.p_limit)
    np.testing.assert_array_equal(_bool(t["proxy_flagged"])[ok], want)
    assert not _bool(t["proxy_flagged"])[~ok].any()
