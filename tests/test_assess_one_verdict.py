"""One verdict everywhere: assess's stored findings, the alerts, the dashboard and the
audit pack agree row for row, and the findings keep their history for the pack's as-of.

One store (the demo scenario, a year, 12 handlers: a planted direct user and a proxy
user of forbidden cues, one of them categorical with three levels) is read four ways:
the stored findings (``policy_findings``), the alerts (``alerts``), the dashboard's
forbidden-cue evidence (``monitor.dashboard.data``) and the pack's ``window_findings``
table written to CSV by ``cuewatch export``.
"""

from __future__ import annotations

import re
import shutil
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from helpers.demo_store import build_demo_store
from helpers.store_rows import query_store

from monitor.assess.alerts import ALERT_KINDS, assess
from monitor.audit.pack import export
from monitor.config import load_config
from monitor.dashboard import data as dd
from monitor.stats.episodes import episodes
from monitor.store.rules import utc_now

KEY = ["check_kind", "scope", "decision_maker", "cue", "level", "window_end"]


@pytest.fixture(scope="module")
def demo_config(tmp_path_factory) -> Path:
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


@pytest.fixture
def store_copy(demo_config, tmp_path) -> Path:
    target = tmp_path / "demo"
    shutil.copytree(demo_config.parent, target, ignore=shutil.ignore_patterns("scenario", "*.lock"))
    return target / demo_config.name


def _quarter_of(day: date) -> tuple[str, date, date]:
    q = (day.month - 1) // 3 + 1
    first = date(day.year, 3 * q - 2, 1)
    last = (pd.Timestamp(date(day.year, 3 * q, 1)) + pd.offsets.MonthEnd(0)).date()
    return f"{day.year}Q{q}", first, last


def _pack_findings(config, quarter: str, out: Path, as_of: str | None = None) -> pd.DataFrame:
    result = export(config, quarter=quarter, out_dir=out, formats=["csv"], as_of=as_of)
    # The summary counts the quarter table's verdicts, direct and through proxies.
    fc = pd.read_csv(out / "forbidden_cues.csv")
    direct = int((fc["flagged"].astype(str).str.lower() == "true").sum())
    proxy = int((fc["proxy_flagged"].astype(str).str.lower() == "true").sum())
    assert f"{direct} flagged for direct use, {proxy} through proxies" in result["summary"]
    t = pd.read_csv(out / "window_findings.csv", dtype={"level": str})
    t["window_end"] = pd.to_datetime(t["window_end"]).dt.date
    for col in ("flagged", "assessable", "level_detail"):
        t[col] = t[col].map({True: True, False: False, "true": True, "false": False})
    return t


def _stored(config, first: date | None = None, last: date | None = None) -> pd.DataFrame:
    where = "" if first is None else "WHERE window_end BETWEEN ? AND ?"
    f = query_store(
        config, f"SELECT * FROM policy_findings {where}", [] if first is None else [first, last]
    )
    f["window_end"] = pd.to_datetime(f["window_end"]).dt.date
    return f


def test_categorical_cue_has_one_verdict_with_its_levels_beneath(demo_config):
    config = load_config(demo_config)
    f = _stored(config)
    cats = [c for c in config.policy.forbidden if len(config.cues[c].levels or []) > 2]
    assert cats, "the demo needs a categorical forbidden cue with three or more levels"
    for kind in ("forbidden_direct", "forbidden_proxy", "drift"):
        rows = f[(f["check_kind"] == kind) & f["cue"].isin(cats)]
        verdict, detail = rows[~rows["level_detail"]], rows[rows["level_detail"]]
        # One verdict row per (series, cue, window), level NULL, carrying the verdict;
        # the level rows beneath carry their own figures and no verdict.
        assert verdict["level"].isna().all() and verdict["flagged"].notna().all()
        assert not verdict.duplicated(["scope", "decision_maker", "cue", "window_end"]).any()
        assert detail["flagged"].isna().all() and detail["level"].notna().all()
        keys = ["scope", "decision_maker", "cue", "window_end"]
        assert set(map(tuple, detail[keys].to_numpy())) == set(map(tuple, verdict[keys].to_numpy()))
        # The verdict's size is the reference-invariant spread sd(sum_j b_j d_j) / sd(Ys)
        # (tests/test_stats_policy.py checks it against two codings): non-negative and
        # finite wherever the window was assessed.
        size = "std_indirect" if kind == "forbidden_proxy" else "std_weight"
        ok = verdict[verdict["assessable"]]
        assert (ok[size] >= 0).all() and np.isfinite(ok[size]).all()


def test_alerts_are_the_episodes_of_the_stored_verdict_rows(demo_config):
    """Every alert (open or resolved) is an episode of the stored verdict rows of its
    series, and every episode there is an alert (the rule: ``stats.episodes``)."""
    config = load_config(demo_config)
    f = _stored(config)
    f = f[f["check_kind"].isin(ALERT_KINDS) & ~f["level_detail"] & (f["cue"] != "(all cues)")]
    alerts = query_store(
        config, "SELECT kind, scope, decision_maker, cue, opened_window_end, "
        "resolved_window_end FROM alerts",
    )  # fmt: skip
    got = {
        (r.kind, r.scope, r.decision_maker, r.cue, pd.Timestamp(r.opened_window_end).date(),
         None if pd.isna(r.resolved_window_end) else pd.Timestamp(r.resolved_window_end).date())
        for r in alerts.itertuples(index=False)
    }  # fmt: skip
    want = set()
    for (kind, scope, maker, cue), g in f.groupby(["check_kind", "scope", "decision_maker", "cue"]):
        g = g.sort_values("window_end").reset_index(drop=True)
        states = [
            bool(x) if a else None for x, a in zip(g["flagged"], g["assessable"], strict=True)
        ]
        for ep in episodes(states, config.policy.consecutive_windows):
            end = None if ep.resolve_index is None else g.loc[ep.resolve_index, "window_end"]
            want.add(
                (ALERT_KINDS[kind], scope, maker, cue, g.loc[ep.open_index, "window_end"], end)
            )
    assert want, "the demo's planted users should give alert episodes"
    assert got == want


def test_dashboard_and_pack_show_the_stored_rows(demo_config, tmp_path):
    config = load_config(demo_config)
    stored = _stored(config)
    forbidden = stored[stored["check_kind"].isin(["forbidden_direct", "forbidden_proxy"])]

    # Dashboard: the latest window of every decision-maker, one row per cue level.
    ev = dd.forbidden_evidence(config).rows
    ev["window_end"] = pd.to_datetime(ev["window_end"]).dt.date
    for kind, flag, q in (("forbidden_direct", "flagged_direct", "q_direct"),
                          ("forbidden_proxy", "flagged_indirect", "q_indirect")):  # fmt: skip
        s = forbidden[forbidden["check_kind"] == kind]
        m = ev.merge(s, on=["decision_maker", "cue", "level", "window_end"], how="left",
                     validate="one_to_one", suffixes=("", "_stored"))  # fmt: skip
        assert len(m) == len(ev) and m["check_kind"].notna().all()
        pd.testing.assert_series_equal(
            m[flag].astype("boolean"), m["flagged"].astype("boolean"), check_names=False
        )
        np.testing.assert_array_equal(m[q].to_numpy(float), m["q_value"].to_numpy(float))
    assert ev["flagged_direct"].fillna(False).astype(bool).any()

    # Pack: the quarter holding the latest window, as of now: the same rows and verdicts.
    last_end = max(stored["window_end"])
    label, first, last = _quarter_of(last_end)
    pack = _pack_findings(config, label, tmp_path / "pack")
    here = stored[(stored["window_end"] >= first) & (stored["window_end"] <= last)]
    assert len(pack) == len(here) > 0
    m = pack.merge(here, on=KEY, how="outer", validate="one_to_one", suffixes=("", "_stored"),
                   indicator=True)  # fmt: skip
    assert (m["_merge"] == "both").all()
    for col in ("flagged", "assessable", "level_detail"):
        pd.testing.assert_series_equal(
            m[col].astype("boolean"), m[f"{col}_stored"].astype("boolean"), check_names=False
        )
    # The pack's floats are rounded for the file (audit.formats): 9 significant digits.
    for col in ("std_weight", "q_value", "p_value"):
        np.testing.assert_allclose(m[col], m[f"{col}_stored"], rtol=1e-8, atol=1e-300)


def test_the_pack_shows_the_verdicts_that_stood_at_its_as_of_time(store_copy, tmp_path):
    config = load_config(store_copy)
    before = _stored(config)
    versions = query_store(config, "SELECT count(*) AS n FROM finding_versions")["n"][0]
    # A forced re-assessment that reproduces every figure adds no version.
    assert assess(config, force=True, sleep=lambda s: None).evaluated
    assert query_store(config, "SELECT count(*) AS n FROM finding_versions")["n"][0] == versions
    t1 = utc_now()

    # A stricter tolerance changes verdicts: the changed rows get new versions.
    text = store_copy.read_text(encoding="utf-8")
    tol = config.policy.tolerance
    stricter_text, n = re.subn(r"(?m)^tolerance = .*$", f"tolerance = {tol * 4:g}", text)
    assert n == 1
    store_copy.write_text(stricter_text, encoding="utf-8")
    stricter = load_config(store_copy)
    assert stricter.policy.tolerance == pytest.approx(tol * 4)
    assess(stricter, force=True, sleep=lambda s: None)
    after = _stored(stricter)
    flipped = before.merge(after, on=KEY, suffixes=("_1", "_2"))
    flipped = flipped[
        flipped["flagged_1"].astype("boolean").fillna(False)
        != flipped["flagged_2"].astype("boolean").fillna(False)
    ]
    assert len(flipped) > 0, "a four-fold tolerance should clear some flagged windows"
    superseded = query_store(
        config, "SELECT count(*) AS n FROM finding_versions WHERE superseded_at IS NOT NULL"
    )["n"][0]
    assert superseded >= len(flipped)

    # As of t1 the pack shows the earlier verdicts; as of now the later ones.
    day = flipped["window_end"].iloc[0]
    label, first, last = _quarter_of(day)
    then = _pack_findings(stricter, label, tmp_path / "then", as_of=t1.isoformat())
    now = _pack_findings(stricter, label, tmp_path / "now")
    for pack, stored in ((then, before), (now, after)):
        here = stored[(stored["window_end"] >= first) & (stored["window_end"] <= last)]
        m = pack.merge(here, on=KEY, how="outer", validate="one_to_one", indicator=True,
                       suffixes=("", "_stored"))  # fmt: skip
        assert (m["_merge"] == "both").all()
        pd.testing.assert_series_equal(
            m["flagged"].astype("boolean"), m["flagged_stored"].astype("boolean"),
            check_names=False,
        )  # fmt: skip
