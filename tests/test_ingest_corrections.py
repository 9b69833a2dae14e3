"""Corrections and retractions of stored decisions (issue #13, item 1a): through the real
command line into real DuckDB files.

A decision file may carry a change column (``[decisions] change``): empty = a new
decision, ``correct`` = replaces the stored one, ``retract`` = withdraws it.  History is
kept in ``superseded_decisions``, the refit follows (checked against statsmodels OLS on
the rows as they stand and against a full refit), the audit pack's as-of view shows
the decision as it was known then, and a kill mid-ingest leaves the store as before.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from datetime import UTC, datetime

import duckdb
import numpy as np
import pytest
import statsmodels.api as sm
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import DECISION_COLUMNS, OUTCOME_COLUMNS, REPO, make_config
from helpers.files import outcome_row, varied_decision, write_csv, write_large_decisions_csv
from helpers.store_rows import design_frame, query, read_store

import monitor.ingest.store_batch as store_batch_module
from monitor.config import load_config
from monitor.ingest import ingest

COLUMNS = [*DECISION_COLUMNS, "change"]
N = 150


def _row(i: int, **fields) -> dict:
    """decision_row(i) with varied cues and judgment (tests/helpers/files.py)."""
    return varied_decision(i, 1000, **fields)


def _config(tmp_path, **overrides):
    cfg = make_config(
        tmp_path,
        decisions__change="change",
        windows={"length_days": 90, "step_days": 7, "min_rows": 10},
        **overrides,
    )
    assert run_cli(cfg, "init").returncode == 0
    return cfg


def _refit(cfg, *args):
    proc = run_cli(cfg, "refit", *args)
    assert proc.returncode == 0, text(proc)


def _now() -> str:
    time.sleep(0.05)
    at = datetime.now(UTC).isoformat()
    time.sleep(0.05)
    return at


def _latest_fit(cfg, maker: str) -> dict:
    df = read_store(
        cfg,
        "SELECT * FROM fits WHERE scope = 'decision_maker' AND decision_maker = ? "
        "ORDER BY window_end DESC LIMIT 1",
        [maker],
    )
    return df.iloc[0].to_dict()


def _weights(cfg, maker: str, window_end) -> dict[str, float]:
    df = read_store(
        cfg,
        "SELECT cue, weight FROM cue_weights WHERE scope = 'decision_maker' "
        "AND decision_maker = ? AND window_end = ? AND estimable",
        [maker, window_end],
    )
    return dict(zip(df["cue"], df["weight"], strict=True))


def _statsmodels_weights(cfg, maker: str, start, end) -> tuple[int, dict[str, float]]:
    """Reference: statsmodels OLS of the judgment on the design columns, on the stored
    rows of ``maker`` decided in [start, end] (the decisions as they now stand)."""
    config = load_config(cfg)
    rows = read_store(
        cfg,
        "SELECT * FROM decisions WHERE decision_maker = ? AND decided_day BETWEEN ? AND ?",
        [maker, start, end],
    )
    x = design_frame(config, rows)
    x = x.loc[:, x.std() > 0]  # a constant cue is not estimable in the window
    fit = sm.OLS(rows["judgment"].astype(float), sm.add_constant(x)).fit()
    return len(rows), {c: float(fit.params[c]) for c in x.columns}


def _assert_matches_statsmodels(cfg, maker: str) -> dict:
    fit = _latest_fit(cfg, maker)
    n, ref = _statsmodels_weights(cfg, maker, fit["window_start"], fit["window_end"])
    assert fit["n_decisions"] == n
    got = _weights(cfg, maker, fit["window_end"])
    assert got.keys() == ref.keys()
    for cue, w in ref.items():
        assert got[cue] == pytest.approx(w, rel=1e-9, abs=1e-9), cue
    return fit


def _fits_table(cfg) -> dict:
    df = read_store(
        cfg,
        "SELECT scope, decision_maker, window_end, n_decisions, n_linked, R_s, r_a "
        "FROM fits ORDER BY ALL",
    )
    return {(r.scope, r.decision_maker, str(r.window_end)): r for r in df.itertuples()}


def _same_fits(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for key in a:
        for fig in ("n_decisions", "n_linked", "R_s", "r_a"):
            va, vb = getattr(a[key], fig), getattr(b[key], fig)
            assert (np.isnan(va) and np.isnan(vb)) or va == pytest.approx(vb, rel=1e-9), (key, fig)


# --- corrections ---------------------------------------------------------------------------


def test_a_correction_replaces_the_decision_keeps_its_history_and_the_refit_follows(tmp_path):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d1.csv", [_row(i) for i in range(N)], COLUMNS)
    assert ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d1.csv"))["accepted"] == N
    _refit(cfg)
    before_h0 = _latest_fit(cfg, "h0")

    # c000005 was h2's on 2024-01-06: now h0's on 2024-01-20 with a score of 77.
    old_score = float(_row(5)["score"])
    fixed = _row(5, handler="h0", decided="2024-01-20 09:00:00", score="77")
    write_csv(tmp_path / "fix.csv", [{**fixed, "change": "correct"}], COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "fix.csv"))
    assert (doc["accepted"], doc["corrected"], doc["retracted"], doc["quarantined"]) == (1, 1, 0, 0)
    batch = doc["files"][0]["batch_id"]

    now = query(
        cfg,
        "SELECT decision_maker, judgment, batch_id FROM decisions WHERE decision_id = 'c000005'",
    )
    assert now == [("h0", 77.0, batch)]
    kept = query(
        cfg,
        "SELECT decision_maker, decided_day::VARCHAR, judgment, superseded_batch, "
        "superseded_line, superseded_change FROM superseded_decisions",
    )
    assert kept == [("h2", "2024-01-06", old_score, batch, 2, "corrected")]
    # Both the bucket the old version leaves and the one the new version joins.
    dirty = query(cfg, "SELECT DISTINCT decision_maker, day::VARCHAR FROM dirty_buckets ORDER BY 1")
    assert dirty == [("h0", "2024-01-20"), ("h2", "2024-01-06")]

    _refit(cfg)
    after_h0 = _assert_matches_statsmodels(cfg, "h0")
    after_h2 = _assert_matches_statsmodels(cfg, "h2")
    assert after_h0["n_decisions"] == before_h0["n_decisions"] + 1
    assert after_h2["n_decisions"] == N // 3 - 1
    incremental = _fits_table(cfg)
    _refit(cfg, "--full")
    _same_fits(incremental, _fits_table(cfg))

    # The same correction again is a duplicate; the old row sent again as a new
    # decision conflicts, and the message says how to replace it.
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "fix.csv"), "--json")
    assert doc["files"][0]["status"] == "skipped"  # the same bytes
    write_csv(tmp_path / "fix2.csv", [{**fixed, "change": "correct"}, _row(6)], COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "fix2.csv"))
    assert (doc["accepted"], doc["duplicates"], doc["corrected"]) == (0, 2, 0)
    write_csv(tmp_path / "old.csv", [_row(5)], COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "old.csv"))
    assert doc["quarantine_reasons"] == {"conflicting_duplicate": 1}
    message = query(cfg, "SELECT message FROM quarantine WHERE reason = 'conflicting_duplicate'")
    assert "change=correct" in message[0][0]


def test_changes_are_checked_like_any_row(tmp_path):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d1.csv", [_row(i) for i in range(10)], COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d1.csv"))
    rows = [
        {**_row(1, score="500"), "change": "correct"},  # judgment_out_of_range
        {**_row(99), "change": "correct"},  # unknown_decision
        {**_row(98, handler="", score="x"), "change": "retract"},  # unknown_decision
        {**_row(2, score="x", handler=""), "change": "retract"},  # only the id counts
        {**_row(3, score="60"), "change": "correct"},  # accepted
        {**_row(3, score="61"), "change": "correct"},  # conflicting (same file)
        {**_row(4), "change": "Correct"},  # unknown_change (values are exact)
    ]
    write_csv(tmp_path / "c.csv", rows, COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "c.csv"))
    assert doc["quarantine_reasons"] == {
        "conflicting_duplicate": 1,
        "judgment_out_of_range": 1,
        "unknown_change": 1,
        "unknown_decision": 2,
    }
    assert (doc["accepted"], doc["corrected"], doc["retracted"]) == (2, 1, 1)
    assert query(cfg, "SELECT count(*) FROM decisions") == [(9,)]
    lines = query(cfg, "SELECT source_line, reason FROM quarantine ORDER BY source_line")
    assert lines == [
        (2, "judgment_out_of_range"),
        (3, "unknown_decision"),
        (4, "unknown_decision"),
        (7, "conflicting_duplicate"),
        (8, "unknown_change"),
    ]


# --- retractions -----------------------------------------------------------------------------


def test_a_retraction_removes_the_decision_and_its_outcome_from_the_fits(tmp_path):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d1.csv", [_row(i) for i in range(N)], COLUMNS)
    write_csv(tmp_path / "o1.csv", [outcome_row(i) for i in range(N)], OUTCOME_COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d1.csv"))
    ingest_json(cfg, "--kind", "outcomes", str(tmp_path / "o1.csv"))
    _refit(cfg)
    before = _latest_fit(cfg, "h1")

    # c000007 is h1's; only its id is read.
    write_csv(tmp_path / "r.csv", [{"case_id": "c000007", "change": "retract"}], COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "r.csv"))
    assert (doc["accepted"], doc["retracted"], doc["quarantined"]) == (1, 1, 0)
    assert query(cfg, "SELECT count(*) FROM decisions WHERE decision_id = 'c000007'") == [(0,)]
    assert query(
        cfg, "SELECT superseded_change FROM superseded_decisions WHERE decision_id = 'c000007'"
    ) == [("retracted",)]
    # The outcome stays in the history, linked to nothing.
    assert query(cfg, "SELECT count(*) FROM outcomes WHERE decision_id = 'c000007'") == [(1,)]

    _refit(cfg)
    after = _assert_matches_statsmodels(cfg, "h1")
    assert after["n_decisions"] == before["n_decisions"] - 1
    assert after["n_linked"] == before["n_linked"] - 1
    incremental = _fits_table(cfg)
    _refit(cfg, "--full")
    _same_fits(incremental, _fits_table(cfg))

    # Retracting again is a duplicate; sending the decision again brings it back.
    write_csv(tmp_path / "r2.csv", [{"case_id": "c000007", "change": "retract"}, _row(8)], COLUMNS)
    doc = ingest_json(cfg, "--kind", "decisions", str(tmp_path / "r2.csv"))
    assert (doc["accepted"], doc["duplicates"]) == (0, 2)
    write_csv(tmp_path / "back.csv", [_row(7)], COLUMNS)
    assert ingest_json(cfg, "--kind", "decisions", str(tmp_path / "back.csv"))["accepted"] == 1
    _refit(cfg)
    again = _latest_fit(cfg, "h1")
    assert (again["n_decisions"], again["n_linked"]) == (before["n_decisions"], before["n_linked"])
    assert again["R_s"] == pytest.approx(before["R_s"], rel=1e-9)


# --- the audit pack as of a moment -------------------------------------------------------------


def _read(path) -> list[dict]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def _export(cfg, out, *args) -> None:
    proc = run_cli(
        cfg, "export", "--quarter", "2024Q1", "--out", str(out), "--format", "csv", *args
    )
    assert proc.returncode == 0, text(proc)


def test_the_audit_pack_shows_each_decision_as_it_was_known_then(tmp_path):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d1.csv", [_row(i) for i in range(N)], COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d1.csv"))
    t1 = _now()
    fixed = _row(5, handler="h0", decided="2024-01-20 09:00:00", score="77")
    write_csv(tmp_path / "fix.csv", [{**fixed, "change": "correct"}], COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "fix.csv"))
    t2 = _now()
    write_csv(tmp_path / "r.csv", [{"case_id": "c000007", "change": "retract"}], COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "r.csv"))
    t3 = _now()

    packs = {}
    for name, at in (("t1", t1), ("t2", t2), ("t3", t3)):
        _export(cfg, tmp_path / name, "--as-of", at, "--include-rows", "h0")
        packs[name] = tmp_path / name

    def n_decisions(pack, maker):
        rows = _read(pack / "decision_makers.csv")
        return next(int(r["n_decisions"]) for r in rows if r["decision_maker"] == maker)

    def score(pack, decision):
        rows = _read(pack / "decision_rows.csv")
        return [float(r["judgment"]) for r in rows if r["decision_id"] == decision]

    # Counted by hand: 150 rows, handler = i % 3, so 50 each; c000005 moves h2 -> h0 at
    # t2, c000007 (h1) is withdrawn at t3.
    assert [n_decisions(packs["t1"], m) for m in ("h0", "h1", "h2")] == [50, 50, 50]
    assert [n_decisions(packs["t2"], m) for m in ("h0", "h1", "h2")] == [51, 50, 49]
    assert [n_decisions(packs["t3"], m) for m in ("h0", "h1", "h2")] == [51, 49, 49]
    assert score(packs["t1"], "c000005") == [] and score(packs["t2"], "c000005") == [77.0]

    _export(cfg, tmp_path / "c12", "--compare-as-of", t1, t2)
    moved = {
        r["decision_maker"]: r
        for r in _read(tmp_path / "c12" / "restatements.csv")
        if r["table"] == "decision_makers" and r["figure"] == "n_decisions"
    }
    assert int(moved["h0"]["corrected_decisions"]) == 1
    assert float(moved["h0"]["change"]) == 1 and "1 corrected decisions" in moved["h0"]["why"]
    assert float(moved["h2"]["change"]) == -1 and int(moved["h2"]["corrected_decisions"]) == 1

    _export(cfg, tmp_path / "c23", "--compare-as-of", t2, t3)
    gone = [
        r
        for r in _read(tmp_path / "c23" / "restatements.csv")
        if r["table"] == "decision_makers" and r["figure"] == "n_decisions"
    ]
    h1 = next(r for r in gone if r["decision_maker"] == "h1")
    assert float(h1["change"]) == -1 and int(h1["retracted_decisions"]) == 1
    assert "1 retracted decisions" in h1["why"]
    # Every other decision of h1 withdrawn: h1 has no row as of t4, and the restatements
    # list each of h1's figures as moved to no value (not silently dropped).
    left = [i for i in range(1, N, 3) if i != 7]
    write_csv(tmp_path / "all.csv", [{"case_id": f"c{i:06d}", "change": "retract"} for i in left],
              COLUMNS)  # fmt: skip
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "all.csv"))
    t4 = _now()
    _export(cfg, tmp_path / "c34", "--compare-as-of", t3, t4)
    emptied = [r for r in _read(tmp_path / "c34" / "restatements.csv")
               if r["table"] == "decision_makers" and r["decision_maker"] == "h1"]  # fmt: skip
    by_figure = {r["figure"]: r for r in emptied}
    assert by_figure["n_decisions"]["value_before"] == "49"
    assert by_figure["n_decisions"]["value_after"] == ""
    assert int(by_figure["n_decisions"]["retracted_decisions"]) == len(left)
    assert f"{len(left)} retracted decisions" in by_figure["n_decisions"]["why"]
    assert {"n_decisions", "R_s"} <= set(by_figure)
    # The pack as of t1 is rebuilt the same after the changes.
    _export(cfg, tmp_path / "t1again", "--as-of", t1, "--include-rows", "h0")
    for name in ("decision_makers.csv", "cue_weights.csv", "decision_rows.csv"):
        assert (tmp_path / "t1" / name).read_bytes() == (tmp_path / "t1again" / name).read_bytes()


# --- crash safety ----------------------------------------------------------------------------


def _snapshot(cfg) -> tuple:
    return (
        query(cfg, "SELECT * EXCLUDE (ingested_at) FROM decisions ORDER BY decision_id"),
        query(cfg, "SELECT count(*) FROM superseded_decisions"),
        query(cfg, "SELECT count(*) FROM dirty_buckets"),
        query(cfg, "SELECT count(*), max(batch_id) FROM batches"),
        query(cfg, "SELECT count(*) FROM quarantine"),
    )


def test_a_failure_inside_the_write_leaves_the_store_as_before(tmp_path, monkeypatch):
    cfg = _config(tmp_path)
    write_csv(tmp_path / "d1.csv", [_row(i) for i in range(20)], COLUMNS)
    ingest_json(cfg, "--kind", "decisions", str(tmp_path / "d1.csv"))
    before = _snapshot(cfg)
    rows = [{**_row(i, score="3"), "change": "correct"} for i in range(5)]
    rows.append({"case_id": "c000009", "change": "retract"})
    write_csv(tmp_path / "fix.csv", rows, COLUMNS)

    # Fail after the replaced rows have been moved and deleted, before the new ones go in.
    def broken(*args, **kwargs):
        raise RuntimeError("injected failure after superseding")

    monkeypatch.setattr(store_batch_module, "insert_sql", broken)
    with pytest.raises(RuntimeError, match="injected"):
        ingest(load_config(cfg), [str(tmp_path / "fix.csv")], kind="decisions")
    assert _snapshot(cfg) == before
    monkeypatch.undo()
    result = ingest(load_config(cfg), [str(tmp_path / "fix.csv")], kind="decisions")
    assert (result.files[0].corrected, result.files[0].retracted) == (5, 1)
    assert query(cfg, "SELECT count(*) FROM decisions WHERE judgment = 3") == [(5,)]


ROWS = 150_000


def _corrections_csv(base, path) -> None:
    con = duckdb.connect()
    try:
        con.execute(
            f"COPY (SELECT * REPLACE (CAST((CAST(score AS INTEGER) + 1) % 100 AS VARCHAR) AS score), "
            f"'correct' AS change FROM read_csv('{base}', all_varchar = true)) TO '{path}' (HEADER)"
        )
    finally:
        con.close()


def _problems(cfg) -> list[str]:
    out = []
    n, distinct = query(cfg, "SELECT count(*), count(DISTINCT decision_id) FROM decisions")[0]
    if (n, distinct) != (ROWS, ROWS):
        out.append(f"decisions hold {n} rows, {distinct} ids")
    (kept,) = query(cfg, "SELECT count(*) FROM superseded_decisions")[0]
    (fixed,) = query(
        cfg,
        "SELECT count(*) FROM decisions WHERE batch_id IN (SELECT superseded_batch FROM superseded_decisions)",
    )[0]
    if kept not in (0, ROWS) or fixed != kept:
        out.append(f"{kept} superseded rows but {fixed} corrected decisions")
    (orphans,) = query(
        cfg,
        "SELECT count(*) FROM superseded_decisions WHERE superseded_batch NOT IN "
        "(SELECT batch_id FROM batches WHERE status = 'ingested')",
    )[0]
    if orphans:
        out.append(f"{orphans} superseded rows belong to no ingested batch")
    return out


def test_sigkill_during_a_correction_file_leaves_the_store_as_before(tmp_path):
    cfg = _config(tmp_path, store__lock_timeout_s=30)
    base = write_large_decisions_csv(tmp_path / "base.csv", ROWS)
    assert ingest_json(cfg, "--kind", "decisions", str(base))["accepted"] == ROWS
    fixes = tmp_path / "fixes.csv"
    _corrections_csv(base, fixes)

    scratch = _config(tmp_path / "scratch")
    ingest_json(scratch, "--kind", "decisions", str(base))
    t0 = time.monotonic()
    assert ingest_json(scratch, "--kind", "decisions", str(fixes))["corrected"] == ROWS
    duration = time.monotonic() - t0

    killed = 0
    for fraction in (0.2, 0.4, 0.6, 0.8, 0.95):
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "monitor",
                "--config",
                str(cfg),
                "ingest",
                "--kind",
                "decisions",
                str(fixes),
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            cwd=REPO,
            env={**os.environ, "PYTHONPATH": str(REPO)},
        )
        time.sleep(duration * fraction)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            killed += 1
        proc.wait(timeout=60)
        assert _problems(cfg) == [], f"after a kill at {fraction:.0%}"
    assert killed >= 3, killed
    final = ingest_json(cfg, "--kind", "decisions", str(fixes))
    assert final["files"][0]["status"] in {"ingested", "skipped"}
    assert _problems(cfg) == []
    assert query(cfg, "SELECT count(*) FROM superseded_decisions") == [(ROWS,)]
