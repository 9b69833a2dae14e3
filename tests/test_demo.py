"""`cuewatch demo` end to end on a small scenario (the full one is `make demo`): the
pipeline, its summary, the simulated clock its nights run under, and `export --as-of`
replaying the demo's past."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import duckdb
import pytest
from helpers.cli import run_cli, text

from monitor.demo import demo_quarter, last_complete_quarter, night_after, play, prepare

# The small scenario: decisions on the weekdays of 2024-11-01 .. 2025-02-28 (120 days),
# outcomes arriving until the generator's horizon.
SMALL = ["--days", "120", "--handlers", "6", "--daily-tail", "3"]


def run_demo_cli(folder: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "monitor", "demo", "--dir", str(folder), "--no-dashboard", *args],
        capture_output=True, text=True, timeout=900,
    )  # fmt: skip


@pytest.fixture(scope="module")
def small_demo(tmp_path_factory) -> tuple[Path, str]:
    folder = tmp_path_factory.mktemp("demo")
    proc = run_demo_cli(folder, *SMALL)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return folder, proc.stdout


def query(store: Path, sql: str, params: list | None = None) -> list[tuple]:
    con = duckdb.connect(str(store), read_only=True)
    try:
        return con.execute(sql, params or []).fetchall()
    finally:
        con.close()


def test_last_complete_quarter_is_the_one_before_the_current() -> None:
    # Calendar arithmetic, common practice: Q1 = Jan-Mar ... Q4 = Oct-Dec.
    assert last_complete_quarter(date(2026, 10, 31)) == "2026Q3"
    assert last_complete_quarter(date(2026, 2, 1)) == "2025Q4"
    assert last_complete_quarter(date(2026, 4, 1)) == "2026Q1"


def test_the_demo_exports_a_quarter_that_holds_its_decisions() -> None:
    # The full scenario: decisions 2024-11-01 .. 2026-10-30, last outcomes 2026-11-30.
    assert demo_quarter(date(2024, 11, 1), date(2026, 10, 30), date(2026, 11, 30)) == "2026Q3"
    # Four weeks of decisions in November 2024, outcomes into 2025: the only quarter
    # with decisions, complete by then.
    assert demo_quarter(date(2024, 11, 1), date(2024, 11, 28), date(2025, 6, 30)) == "2024Q4"
    # ... and when the last arrival is still inside that quarter it is the latest with
    # data (not 2024Q3, which ended before the first decision).
    assert demo_quarter(date(2024, 11, 1), date(2024, 11, 28), date(2024, 12, 20)) == "2024Q4"
    # Decisions ended in 2025Q1, outcomes ran to September: 2025Q2 is complete but holds
    # no decision, so the pack covers 2025Q1.
    assert demo_quarter(date(2024, 11, 1), date(2025, 2, 28), date(2025, 9, 29)) == "2025Q1"


def test_the_nightly_job_runs_at_two_in_the_schedules_zone() -> None:
    # Europe/London is UTC+1 in summer (BST), UTC+0 in winter (tz database, from memory).
    assert night_after(date(2025, 6, 30), "Europe/London") == datetime(2025, 7, 1, 1, tzinfo=UTC)
    assert night_after(date(2025, 1, 31), "Europe/London") == datetime(2025, 2, 1, 2, tzinfo=UTC)


def test_demo_command_runs_the_pipeline_and_writes_the_audit_pack(small_demo) -> None:
    folder, out = small_demo
    nights = [line for line in out.splitlines() if line.startswith("  night of 20")]
    assert "not proof of intent" in out
    store = folder / "cuewatch.duckdb"
    runs = query(store, "SELECT status, count(*) FROM runs GROUP BY status")
    assert dict(runs).get("ok", 0) == len(nights) > 3
    # Every row of every scenario file is accounted for in the store.
    read = query(
        store,
        "SELECT sum(rows_read), sum(rows_accepted + rows_quarantined + rows_duplicate) "
        "FROM batches WHERE status = 'ingested'",
    )[0]
    assert read[0] == read[1] and read[0] > 0
    n_files = len(list((folder / "scenario" / "decisions").glob("*.csv"))) + len(
        list((folder / "scenario" / "outcomes").glob("*.csv"))
    )
    assert query(store, "SELECT count(*) FROM batches")[0][0] == n_files
    assert query(store, "SELECT count(*) FROM fits")[0][0] > 0
    packs = list(folder.glob("audit_*"))
    assert len(packs) == 1
    manifest = json.loads((packs[0] / "manifest.json").read_text())
    assert manifest["quarter"] == packs[0].name.removeprefix("audit_") == "2025Q1"


def test_the_summary_lists_every_alert_it_counts_and_cuts_no_path(small_demo) -> None:
    folder, out = small_demo
    store = folder / "cuewatch.duckdb"
    states = dict(query(store, "SELECT state, count(*) FROM alerts GROUP BY state"))
    raised = sum(states.values())
    unresolved = raised - states.get("resolved", 0)
    head = re.search(r"Alerts raised: (\d+); resolved since: (\d+); not resolved: (\d+)", out)
    assert head and [int(g) for g in head.groups()] == [raised, raised - unresolved, unresolved]
    listed = re.findall(r"^  #(\d+) (open|acknowledged) ", out, flags=re.M)
    open_ids = query(store, "SELECT alert_id FROM alerts WHERE state <> 'resolved'")
    assert sorted(int(i) for i, _ in listed) == sorted(i for (i,) in open_ids)
    # The pack's line carries its whole folder (no cut in the middle of a path).
    assert f"tables written to {folder / 'audit_2025Q1'}." in out


def test_the_nights_run_on_a_simulated_clock_recorded_in_batches(small_demo) -> None:
    folder, _ = small_demo
    store = folder / "cuewatch.duckdb"
    assert query(store, "SELECT DISTINCT clock FROM batches") == [("simulated",)]
    first, last = query(store, "SELECT min(started_at), max(finished_at) FROM runs")[0]
    # The first night takes November 2024's files; the last one the final arrival day.
    assert first.astimezone(UTC).date() == date(2024, 11, 30)
    assert last < datetime(2025, 12, 31, tzinfo=UTC)
    # Every time the store recorded comes from the scenario's nights, not today's clock.
    for sql in (
        "SELECT min(ingested_at), max(ingested_at) FROM decisions",
        "SELECT min(ingested_at), max(ingested_at) FROM outcomes",
        "SELECT min(started_at), max(finished_at) FROM batches",
        "SELECT min(fitted_at), max(fitted_at) FROM fits",
        "SELECT min(evaluated_at), max(evaluated_at) FROM policy_findings",
        "SELECT min(changed_at), max(changed_at) FROM alert_history",
        "SELECT min(opened_at), max(opened_at) FROM alerts",
    ):
        low, high = query(store, sql)[0]
        assert first <= low <= high <= last, sql
    # A decision arrives after it was made, at the latest with the next month's night.
    lag = query(
        store,
        "SELECT min(ingested_at - decided_at), max(ingested_at - decided_at) FROM decisions",
    )[0]
    assert timedelta(0) < lag[0] and lag[1] < timedelta(days=33)


def test_export_as_of_replays_the_demos_past(small_demo, tmp_path) -> None:
    folder, _ = small_demo
    cfg = folder / "ostwyn.toml"
    # 2025-04-15 (00:00 London): the nights up to 1 April had run, which took every file
    # that arrived by 31 March.
    then = run_cli(cfg, "export", "--quarter", "2025Q1", "--as-of", "2025-04-15",
                   "--format", "csv", "--out", str(tmp_path / "then"), timeout=300)  # fmt: skip
    assert then.returncode == 0, text(then)[1]
    now = run_cli(cfg, "export", "--quarter", "2025Q1", "--format", "csv",
                  "--out", str(tmp_path / "now"), timeout=300)  # fmt: skip
    assert now.returncode == 0, text(now)[1]

    def all_row(pack: Path) -> dict:
        lines = (pack / "decision_makers.csv").read_text().splitlines()
        header = lines[0].split(",")
        rows = [dict(zip(header, line.split(","), strict=False)) for line in lines[1:]]
        return next(r for r in rows if r["scope"] == "all")

    before, after = all_row(tmp_path / "then"), all_row(tmp_path / "now")
    # The restatement: outcomes that arrived after mid-April link more decisions now.
    assert int(float(before["n_linked"])) < int(float(after["n_linked"]))
    assert before["n_decisions"] == after["n_decisions"]

    # Reference: a second store fed only the files that had arrived by 31 March, exported
    # as of now, must give byte-identical tables (the pack writes CSV reproducibly).
    other = tmp_path / "until_march"
    config = prepare(other, days=120, n_handlers=6)
    for sub in ("decisions", "outcomes"):
        for f in (other / "scenario" / sub).glob("*.csv"):
            if date.fromisoformat(f.stem.split("_")[1]) > date(2025, 3, 31):
                f.unlink()
    play(config, other / "scenario", say=lambda _line: None, tail_days=3)
    ref = run_cli(other / "ostwyn.toml", "export", "--quarter", "2025Q1", "--format", "csv",
                  "--out", str(tmp_path / "ref"), timeout=300)  # fmt: skip
    assert ref.returncode == 0, text(ref)[1]
    for table in ("decision_makers", "cue_weights", "forbidden_cues", "coverage"):
        assert (tmp_path / "then" / f"{table}.csv").read_bytes() == (
            tmp_path / "ref" / f"{table}.csv"
        ).read_bytes(), table
    shutil.rmtree(other)


def test_a_future_as_of_is_refused(small_demo, tmp_path) -> None:
    folder, _ = small_demo
    cfg = folder / "ostwyn.toml"
    tomorrow = (datetime.now(UTC) + timedelta(days=1)).date().isoformat()
    for args in (["--as-of", tomorrow], ["--compare-as-of", "2025-04-15", tomorrow]):
        proc = run_cli(cfg, "export", "--quarter", "2025Q1", "--out", str(tmp_path / "x"), *args)
        out, err = text(proc)
        assert proc.returncode == 2, (out, err)
        assert len(err.strip().splitlines()) == 1 and "lies in the future" in err
        assert "Traceback" not in err
    assert not (tmp_path / "x").exists()


def test_a_four_week_demo_exports_the_quarter_of_its_data(tmp_path) -> None:
    proc = run_demo_cli(tmp_path / "quick", "--days", "28", "--handlers", "6")
    assert proc.returncode == 0, proc.stderr[-2000:]
    manifest = json.loads((tmp_path / "quick" / "audit_2024Q4" / "manifest.json").read_text())
    assert manifest["quarter"] == "2024Q4"
    dm = (tmp_path / "quick" / "audit_2024Q4" / "decision_makers.csv").read_text()
    assert len(dm.splitlines()) > 1
