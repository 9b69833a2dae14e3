"""The oversight dashboard: every page run with streamlit's AppTest on a store built by the
real pipeline from the Ostwyn Mutual scenario, checked against the scenario's planted
truth, against the store read with plain SQL, and against statsmodels on raw rows."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import time
from collections import Counter
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from helpers.monthly_demo import APP, HELD_BACK_FROM, REASON_OF_KIND, build_demo, copy_store
from helpers.monthly_demo import run_page as app
from helpers.store_rows import design_frame, read_store
from streamlit.testing.v1 import AppTest

from monitor.config import load_config
from monitor.dashboard import data as dd
from monitor.dashboard import download, start
from monitor.dashboard.health import data_health


@pytest.fixture(scope="session")
def demo_config(tmp_path_factory) -> Path:
    return build_demo(tmp_path_factory.getbasetemp() / "dashboard_demo")


@pytest.fixture(scope="session")
def truth(demo_config) -> dict:
    # Source: the scenario generator's record of what it planted (synthetic_logs/ostwyn.py).
    return json.loads((demo_config.parent / "gen" / "truth.json").read_text())


def planted(truth: dict, kind: str) -> str:
    return next(c for c in truth["changes"] if c["kind"] == kind)["handler_ids"][0]


def markdown_text(at: AppTest) -> str:
    """The pages' Markdown with data escapes undone (CommonMark: a backslash before ASCII
    punctuation stands for that character), so ids and cue levels read as shown."""
    return re.sub(r"\\([!-/:-@\[-`{-~])", r"\1", "\n".join(m.value for m in at.markdown))


# --- Team at a glance -------------------------------------------------------------------


def test_overview_names_the_planted_handlers_without_a_click(demo_config, truth, monkeypatch):
    at = app(demo_config, monkeypatch)
    assert at.title[0].value == "Team at a glance"
    text = markdown_text(at)
    for kind in ("forbidden_cue_direct", "proxy_cue", "consistency_loss"):
        assert f"**{planted(truth, kind)}**" in text, kind
    flagged = {line.split("**")[1] for line in text.splitlines() if line.startswith("- **")}
    # Source: the store's alerts table, read with plain SQL.
    expect = read_store(
        demo_config,
        "SELECT DISTINCT decision_maker FROM alerts WHERE scope = 'decision_maker' "
        "AND state IN ('open', 'acknowledged')",
    )["decision_maker"]
    assert flagged == set(expect)


def test_overview_figures_equal_the_stored_latest_windows(demo_config, monkeypatch):
    at = app(demo_config, monkeypatch)
    shown = at.dataframe[0].value
    # Source: the store's own fits table, read with plain SQL.
    stored = read_store(
        demo_config,
        "SELECT scope, decision_maker, n_decisions, n_linked, R_s, r_a FROM fits "
        "QUALIFY window_end = max(window_end) OVER (PARTITION BY scope, decision_maker)",
    )
    assert len(shown) == len(stored) == 12 + 3 + 1
    merged = shown.merge(stored, left_on="who", right_on="decision_maker")
    assert len(merged) == len(stored)
    assert (merged["n_decisions_x"] == merged["n_decisions_y"]).all()
    assert (merged["n_linked_x"] == merged["n_linked_y"]).all()
    np.testing.assert_allclose(merged["R_s_x"], merged["R_s_y"], rtol=1e-12)
    np.testing.assert_allclose(merged["r_a_x"], merged["r_a_y"], rtol=1e-12)
    assert set(shown["level"]) == {"person", "team", "overall"}


def test_team_filter_keeps_that_team_and_the_overall_row(demo_config, truth, monkeypatch):
    at = app(demo_config, monkeypatch)
    team = truth["teams"][1]
    at.selectbox(key="team").select(team).run()
    assert not at.exception
    shown = at.dataframe[0].value
    members = {h["handler_id"] for h in truth["handlers"] if h["team"] == team}
    assert set(shown.loc[shown["level"] == "person", "who"]) == members
    assert list(shown.loc[shown["level"] == "team", "who"]) == [team]
    assert list(shown.loc[shown["level"] == "overall", "who"]) == ["all"]


def test_period_picks_the_latest_window_inside_it_and_trends_over_it(demo_config):
    cfg = load_config(demo_config)
    period = (date(2025, 1, 1), date(2025, 3, 31))
    view = dd.overview(cfg, period)
    # Source: the fits table, counted with plain SQL.
    expect = read_store(
        demo_config,
        "SELECT decision_maker, max(window_end) AS last, "
        "count(*) FILTER (WHERE isfinite(R_s)) AS windows FROM fits "
        "WHERE scope = 'decision_maker' AND window_end BETWEEN ? AND ? GROUP BY 1",
        list(period),
    ).set_index("decision_maker")
    people = view.rows[view.rows["scope"] == "decision_maker"].set_index("decision_maker")
    assert (people["window_end"] == expect.loc[people.index, "last"]).all()
    assert (people["R_s_trend"].map(len) == expect.loc[people.index, "windows"]).all()


# --- One decision-maker -------------------------------------------------------------------


def test_person_page_shows_the_stored_figures_and_charts(demo_config, truth, monkeypatch):
    at = app(demo_config, monkeypatch, "page_person.py")
    who = planted(truth, "forbidden_cue_direct")
    at.selectbox(key="who").select(who).run()
    assert not at.exception
    latest = read_store(
        demo_config,
        "SELECT n_decisions, n_linked, R_s, r_a FROM fits WHERE scope = 'decision_maker' "
        "AND decision_maker = ? ORDER BY window_end DESC LIMIT 1",
        [who],
    ).iloc[0]
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Decisions (latest window)"] == str(int(latest["n_decisions"]))
    assert metrics["Linked outcomes"] == str(int(latest["n_linked"]))
    assert metrics["Consistency R_s"] == f"{latest['R_s']:.2f}"
    assert metrics["Achievement r_a"] == f"{latest['r_a']:.2f}"
    charts = at.get("vega_lite_chart")
    assert len(charts) == 2
    table = at.dataframe[0].value
    assert table.loc[table["cue"] == "claimant_gender=male", "forbidden"].item()
    assert any("forbidden cue is a statistical association" in w.value for w in at.warning)


def test_weight_intervals_match_statsmodels_on_the_windows_raw_rows(demo_config, truth):
    cfg = load_config(demo_config)
    who = planted(truth, "forbidden_cue_direct")
    hist = dd.person_history(cfg, who)
    end = hist.latest["window_end"].iloc[0]
    start = end - pd.Timedelta(days=cfg.windows.length_days - 1)
    rows = read_store(
        demo_config,
        "SELECT * FROM decisions WHERE decision_maker = ? AND decided_day BETWEEN ? AND ?",
        [who, start.date(), end.date()],
    )
    assert len(rows) == hist.latest["n_decisions"].iloc[0]
    x = design_frame(cfg, rows)
    # Source: statsmodels OLS with t intervals, standardised by sd(x)/sd(y).
    fit = sm.OLS(rows["judgment"], sm.add_constant(x)).fit()
    scale = x.std(ddof=1) / rows["judgment"].std(ddof=1)
    ci = fit.conf_int(0.05).loc[x.columns]
    got = hist.latest.set_index("cue").loc[x.columns]
    np.testing.assert_allclose(got["std_weight"], fit.params[x.columns] * scale, rtol=1e-6)
    np.testing.assert_allclose(got["std_ci_low"], ci[0] * scale, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(got["std_ci_high"], ci[1] * scale, rtol=1e-6, atol=1e-9)


def test_team_median_is_the_median_over_the_teams_decision_makers(demo_config, truth):
    cfg = load_config(demo_config)
    who = planted(truth, "proxy_cue")
    hist = dd.person_history(cfg, who)
    team = next(h["team"] for h in truth["handlers"] if h["handler_id"] == who)
    members = [h["handler_id"] for h in truth["handlers"] if h["team"] == team]
    raw = read_store(
        demo_config,
        "SELECT decision_maker, window_end, cue, std_weight FROM cue_weights "
        "WHERE scope = 'decision_maker'",
    )
    # Source: pandas' median over the team members (common practice for a reference line).
    expect = raw[raw["decision_maker"].isin(members)].groupby(["window_end", "cue"])["std_weight"]
    got = hist.weights.set_index(["window_end", "cue"])["team_median"]
    np.testing.assert_allclose(got, expect.median().loc[got.index], rtol=1e-12)


# --- Forbidden-cue evidence -----------------------------------------------------------------


def test_forbidden_page_flags_the_planted_direct_and_proxy_handlers(
    demo_config, truth, monkeypatch
):
    at = app(demo_config, monkeypatch, "page_forbidden.py")
    assert any("not proof of intent" in w.value for w in at.warning)
    assert any("compliance and legal advisers" in w.value for w in at.warning)
    text = markdown_text(at)
    direct = next(c for c in truth["changes"] if c["kind"] == "forbidden_cue_direct")
    proxy = next(c for c in truth["changes"] if c["kind"] == "proxy_cue")
    direct_line = next(x for x in text.splitlines() if f"**{direct['handler_ids'][0]}**" in x)
    assert direct["parameter"] in direct_line and "direct" in direct_line
    proxy_line = next(x for x in text.splitlines() if f"**{proxy['handler_ids'][0]}**" in x)
    assert proxy["forbidden_cue"] in proxy_line and "through proxies" in proxy_line
    table = at.dataframe[0].value
    assert table["n"].notna().all() and (table["n"] > 0).all()


def test_disparity_is_the_difference_in_means_on_raw_rows(demo_config, truth):
    cfg = load_config(demo_config)
    who = planted(truth, "forbidden_cue_direct")
    row = (
        dd.forbidden_evidence(cfg)
        .rows.query("decision_maker == @who and cue == 'claimant_gender'")
        .iloc[0]
    )
    raw = read_store(
        demo_config,
        "SELECT judgment, claimant_gender FROM decisions WHERE decision_maker = ? "
        "AND decided_day BETWEEN ? AND ?",
        [who, row["window_start"].date(), row["window_end"].date()],
    )
    assert len(raw) == row["n"]
    means = raw.groupby("claimant_gender")["judgment"].mean()
    # Source: DESIGN.md - for a binary cue the zero-order slope is the difference in means;
    # and disparity = direct + indirect is the omitted-variable identity, exact for OLS.
    assert row["disparity"] == pytest.approx(means["male"] - means["female"], rel=1e-9)
    assert row["disparity"] == pytest.approx(row["direct"] + row["indirect"], rel=1e-9)


# --- Alerts -------------------------------------------------------------------------------------


def test_alerts_page_shows_evidence_and_acknowledges_with_a_note(
    demo_config, tmp_path, monkeypatch
):
    cfg = copy_store(demo_config, tmp_path)
    at = app(cfg, monkeypatch, "page_alerts.py")
    open_alerts = read_store(cfg, "SELECT alert_id FROM alerts WHERE state = 'open' ORDER BY 1")
    open_ids = open_alerts["alert_id"]
    assert len(open_ids) > 0
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Open"] == str(len(open_ids))
    target = int(open_ids.iloc[0])
    evidence = read_store(cfg, "SELECT evidence FROM alerts WHERE alert_id = ?", [target])
    n = evidence["evidence"].item()
    assert f"n = {json.loads(n)['n']}" in markdown_text(at)
    at.text_input(key=f"by-{target}").input("R. Okafor")
    at.text_area(key=f"note-{target}").input("Reviewed with the team lead.")
    at.button(key=f"ack-btn-{target}").click().run()
    assert not at.exception
    assert any(f"Alert {target} acknowledged" in s.value for s in at.success)
    row = read_store(
        cfg, "SELECT state, acknowledged_by, note FROM alerts WHERE alert_id = ?", [target]
    )
    assert row.iloc[0].tolist() == ["acknowledged", "R. Okafor", "Reviewed with the team lead."]


def test_acknowledging_while_the_writer_holds_the_store_says_busy(demo_config, tmp_path):
    cfg_path = copy_store(demo_config, tmp_path)
    cfg = load_config(cfg_path)
    target = int(
        read_store(cfg_path, "SELECT min(alert_id) AS a FROM alerts WHERE state = 'open'")["a"][0]
    )
    from monitor.store.connection import Store

    with Store(cfg).writer():
        result = dd.acknowledge_alert(cfg, target, "R. Okafor", "busy?")
    assert not result.ok and result.message == dd.BUSY_MESSAGE
    assert (
        read_store(cfg_path, "SELECT state FROM alerts WHERE alert_id = ?", [target])["state"][0]
        == "open"
    )


# --- Data health and audit pack ---------------------------------------------------------------------


def test_data_health_counts_the_planted_bad_rows_and_the_nightly_run(
    demo_config, truth, monkeypatch
):
    at = app(demo_config, monkeypatch, "page_health.py")
    health = data_health(load_config(demo_config))
    landed = [b for b in truth["bad_rows"] if b["file"].split("_")[1][:7] < HELD_BACK_FROM]
    expect = Counter(REASON_OF_KIND[b["kind"]] for b in landed)
    assert dict(zip(health.quarantine["reason"], health.quarantine["rows"], strict=True)) == expect
    assert set(health.quarantine_sample["reason"]) == set(expect)
    run = read_store(
        demo_config, "SELECT finished_at FROM runs WHERE command = 'nightly' AND status = 'ok'"
    )
    metrics = {m.label: m.value for m in at.metric}
    assert metrics["Last successful nightly run"] == str(run["finished_at"].max())[:16]
    assert metrics["Rows quarantined"] == f"{sum(expect.values()):,}"
    cov = health.coverage
    # Source: the store's decisions_with_outcome view, counted with plain SQL.
    linked = read_store(demo_config, "SELECT count(criterion) AS n FROM decisions_with_outcome")[
        "n"
    ][0]
    assert cov["linked"].sum() == linked and (cov["share_linked"] <= 1).all()


def test_audit_page_builds_a_zip_or_says_it_is_not_installed(demo_config, monkeypatch):
    at = app(demo_config, monkeypatch, "page_audit.py")
    if not download.audit_available():
        assert any("not installed" in i.value for i in at.info)
        return
    at.selectbox[0].select("2025Q2")
    at.button[0].click().run()
    assert not at.exception, [e.value for e in at.exception]
    assert not at.error, [e.value for e in at.error]
    assert any("Audit pack for 2025Q2" in s.value for s in at.success)
    assert len(at.get("download_button")) == 1


def test_audit_page_degrades_without_the_audit_module(demo_config, monkeypatch):
    monkeypatch.setattr(download, "audit_available", lambda: False)
    at = app(demo_config, monkeypatch, "page_audit.py")
    assert any("not installed" in i.value for i in at.info)


# --- reading while the store is busy, and launching -------------------------------------------------


def test_a_page_waits_out_a_busy_store_without_an_exception(demo_config, tmp_path, monkeypatch):
    cfg = copy_store(demo_config, tmp_path)
    store = load_config(cfg).store.path
    hold = (
        "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); "
        "print('held', flush=True); time.sleep(float(sys.argv[2]))"
    )
    proc = subprocess.Popen([sys.executable, "-c", hold, str(store), "30"], stdout=subprocess.PIPE)
    try:
        assert proc.stdout.readline().strip() == b"held"
        started = time.monotonic()
        monkeypatch.setenv("CUEWATCH_CONFIG", str(cfg))
        at = AppTest.from_file(str(APP), default_timeout=60)
        at.run()
        assert not at.exception
        assert any("store is still busy" in w.value for w in at.warning)
        assert time.monotonic() - started < 25
    finally:
        proc.kill()
        proc.wait()
    at.button[0].click().run()  # "Try again" once the writer has gone
    assert not at.exception and at.title[0].value == "Team at a glance"
    assert len(at.dataframe) == 1


def test_launch_runs_streamlit_on_localhost_with_the_config(demo_config):
    cfg = load_config(demo_config)
    cmd = start.launch_command(cfg, 8765)
    assert Path(cmd[cmd.index("run") + 1]) == APP.resolve()
    assert cmd[cmd.index("--server.address") + 1] == "127.0.0.1"
    assert cmd[cmd.index("--server.port") + 1] == "8765"
    assert cmd[-3:] == ["--", "--config", str(cfg.source)]
