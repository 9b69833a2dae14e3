"""Reviewing the store from the command line: `people`, `fits` (names checked, fitted to
the terminal, forbidden cues always shown, intervals, windows labelled by their data)
and `weights` (one person's weight history as CSV / XLSX), on the demo store."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest
import statsmodels.api as sm
from helpers.cli import run_cli, text
from helpers.demo_store import build_demo_store
from helpers.store_rows import design_frame, read_store
from scipy import stats

from monitor.audit.formats import restore
from monitor.config import load_config


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    # Same folder as the assess tests: build_demo_store's marker makes the build shared.
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def test_people_lists_decision_makers_and_teams(demo):
    proc = run_cli(demo, "people", "--json")
    out, err = text(proc)
    assert proc.returncode == 0, err
    doc = json.loads(out)
    # Reference: the same figures straight from the store's tables.
    raw = read_store(
        demo,
        "SELECT decision_maker, count(*) AS n, min(decided_day) AS lo, max(decided_day) AS hi "
        "FROM decisions GROUP BY 1 ORDER BY 1",
    )
    people = doc["decision_makers"]
    assert [p["decision_maker"] for p in people] == raw["decision_maker"].tolist()
    assert [p["n_decisions"] for p in people] == raw["n"].tolist()
    assert people[0]["first_day"] == str(raw["lo"].iloc[0].date())
    open_alerts = read_store(
        demo,
        "SELECT decision_maker, count(*) AS n FROM alerts WHERE scope = 'decision_maker' "
        "AND state IN ('open', 'acknowledged') GROUP BY 1",
    )
    expected = dict(zip(open_alerts["decision_maker"], open_alerts["n"], strict=True))
    assert {p["decision_maker"]: p["open_alerts"] for p in people if p["open_alerts"]} == expected
    latest = read_store(
        demo,
        "SELECT R_s FROM fits WHERE scope = 'decision_maker' AND decision_maker = ? "
        "ORDER BY window_end DESC LIMIT 1",
        [people[0]["decision_maker"]],
    )
    assert people[0]["latest_R_s"] == pytest.approx(latest["R_s"].iloc[0])
    assert {t["team"] for t in doc["teams"]} == {p["team"] for p in people}
    proc = run_cli(demo, "people", env={"COLUMNS": "90"})
    out, _ = text(proc)
    assert proc.returncode == 0 and "Decision-makers (12)" in out and "Teams (3)" in out
    assert max(map(len, out.splitlines()[:-1])) <= 90


@pytest.mark.parametrize(
    ("name", "message"),
    [
        ("H999", "cuewatch: there is no decision-maker or team 'H999' in the store; "
                 "'cuewatch people' lists them."),
        ("H0012", "cuewatch: there is no decision-maker or team 'H0012' in the store; "
                  "did you mean 'H012'?"),
        ("h012", "cuewatch: there is no decision-maker or team 'h012' in the store (names are "
                 "case-sensitive): did you mean 'H012'?"),
    ],
)  # fmt: skip
def test_fits_of_an_unknown_name_is_a_user_error(demo, name, message):
    proc = run_cli(demo, "fits", "--decision-maker", name)
    out, err = text(proc)
    assert proc.returncode == 2 and out == ""
    assert err.strip() == message


def test_fits_table_fits_the_terminal_and_shows_forbidden_cues(demo):
    cfg = load_config(demo)
    proc = run_cli(demo, "fits", "--latest", "--decision-maker", "H004", env={"COLUMNS": "100"})
    out, err = text(proc)
    assert proc.returncode == 0, err
    table = [line for line in out.splitlines() if line.startswith(("┃", "│", "┏", "└"))]
    assert table and max(map(len, table)) <= 100
    # The last column's cells, joined across the lines rich wrapped them over.
    flat = "".join(line.split("│")[-2].strip() for line in table if line.startswith("│"))
    # The demo's planted gender weight, and every other forbidden design column.
    doc = json.loads(
        text(run_cli(demo, "fits", "--latest", "--decision-maker", "H004", "--json"))[0]
    )
    forbidden = [c for c in doc[0]["cues"] if c["cue"].split("=")[0] in cfg.policy.forbidden]
    assert len(forbidden) == 4
    for c in forbidden:
        assert f"!{c['cue']}{c['std_weight']:+.2f}" in flat.replace(" ", "")
    assert "not proof of intent" in out


def test_fits_intervals_and_window_labels_against_the_raw_rows(demo):
    cfg = load_config(demo)
    (latest,) = json.loads(
        text(run_cli(demo, "fits", "--json", "--latest", "--decision-maker", "H002"))[0]
    )
    rows = read_store(
        demo,
        "SELECT * FROM decisions_with_outcome WHERE decision_maker = 'H002' "
        "AND decided_day BETWEEN ? AND ? ORDER BY decision_id",
        [latest["window_start"], latest["window_end"]],
    )
    # Reference: statsmodels' adjusted R^2 (the same correction: 1 - (1 - R^2)(n - 1)/df).
    ols = sm.OLS(rows["judgment"].to_numpy(float), sm.add_constant(design_frame(cfg, rows))).fit()
    assert latest["R_s_adjusted"] == pytest.approx(np.sqrt(ols.rsquared_adj), rel=1e-9)
    assert latest["R_s_ci_low"] < latest["R_s_adjusted"] < latest["R_s_ci_high"]
    # Reference: scipy's Fisher-z confidence interval of a Pearson correlation.
    linked = rows.dropna(subset=["criterion"])
    ci = stats.pearsonr(linked["judgment"], linked["criterion"]).confidence_interval(0.95)
    assert (latest["r_a_ci_low"], latest["r_a_ci_high"]) == pytest.approx(
        (ci.low, ci.high), rel=1e-6
    )
    # Windows are labelled by the days they hold: the newest ends after the last decision.
    assert latest["data_to"] == str(rows["decided_day"].max().date()) < latest["window_end"]
    assert latest["partial"] is True
    first = json.loads(text(run_cli(demo, "fits", "--json", "--decision-maker", "H002"))[0])[0]
    first_day = read_store(
        demo, "SELECT min(decided_day) AS d FROM decisions WHERE decision_maker = 'H002'"
    )
    assert first["window_start"] < first["data_from"] == str(first_day["d"].iloc[0].date())
    out = text(run_cli(demo, "fits", "--decision-maker", "H002", env={"COLUMNS": "200"}))[0]
    assert f"{first['data_from']}..{first['data_to']} (partial)" in out
    assert f"{first['window_start']}.." not in out


def test_weights_history_as_csv_and_xlsx(demo, tmp_path):
    from openpyxl import load_workbook

    fits = json.loads(text(run_cli(demo, "fits", "--json", "--decision-maker", "H004"))[0])
    proc = run_cli(demo, "weights", "H004", "--out", str(tmp_path / "w.csv"))
    assert proc.returncode == 0, text(proc)
    with open(tmp_path / "w.csv", encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == sum(len(f["cues"]) for f in fits)
    # The stored weights, row for row (reference: `fits --json`).
    by_key = {(f["window_end"], c["cue"]): (f, c) for f in fits for c in f["cues"]}
    for r in rows:
        f, c = by_key[(r["window_end"], restore(r["cue"]))]
        if c["weight"] is None:
            assert r["weight"] == "" and r["estimable"] == "false"
        else:
            assert float(r["weight"]) == pytest.approx(c["weight"], rel=1e-11)
        assert r["data_from"] == f["data_from"] and r["partial"] == str(f["partial"]).lower()
        assert r["forbidden"] == str(r["cue"].startswith("claimant_")).lower()
    proc = run_cli(demo, "weights", "H004", "--out", str(tmp_path / "w.xlsx"))
    assert proc.returncode == 0, text(proc)
    sheet = load_workbook(tmp_path / "w.xlsx")["weight_history"]
    values = list(sheet.iter_rows(values_only=True))
    assert list(values[0]) == list(rows[0]) and len(values) == len(rows) + 1
    stdout = text(run_cli(demo, "weights", "H004"))[0]
    assert list(csv.DictReader(io.StringIO(stdout))) == rows
    proc = run_cli(demo, "weights", "H004", "--out", str(tmp_path / "w.pdf"))
    assert proc.returncode == 2 and "csv or xlsx" in text(proc)[1]
