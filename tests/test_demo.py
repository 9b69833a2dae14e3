"""`cuewatch demo` end to end on a small scenario (the full one is `make demo`)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import duckdb

from monitor.demo import last_complete_quarter


def test_last_complete_quarter_is_the_one_before_the_current() -> None:
    # Calendar arithmetic, common practice: Q1 = Jan-Mar ... Q4 = Oct-Dec.
    from datetime import date

    assert last_complete_quarter(date(2026, 10, 31)) == "2026Q3"
    assert last_complete_quarter(date(2026, 2, 1)) == "2025Q4"
    assert last_complete_quarter(date(2026, 4, 1)) == "2026Q1"


def test_demo_command_runs_the_pipeline_and_writes_the_audit_pack(tmp_path: Path) -> None:
    folder = tmp_path / "demo"
    proc = subprocess.run(
        [sys.executable, "-m", "monitor", "demo", "--dir", str(folder), "--no-dashboard",
         "--days", "120", "--handlers", "6", "--daily-tail", "3"],
        capture_output=True, text=True, timeout=600,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    assert "nightly backfill" in out
    # A backfill plus one run per arrival day of the tail, each recorded in `runs`.
    daily_lines = [line for line in out.splitlines() if line.startswith("  nightly 20")]
    assert 1 <= len(daily_lines) <= 3
    assert "not proof of intent" in out
    store = folder / "cuewatch.duckdb"
    con = duckdb.connect(str(store), read_only=True)
    try:
        runs = con.execute("SELECT status, count(*) FROM runs GROUP BY status").fetchall()
        assert dict(runs).get("ok", 0) == 1 + len(daily_lines)
        # Every row of every scenario file is accounted for in the store.
        read = con.execute(
            "SELECT sum(rows_read), sum(rows_accepted + rows_quarantined + rows_duplicate) "
            "FROM batches WHERE status = 'ingested'"
        ).fetchone()
        assert read[0] == read[1] and read[0] > 0
        n_files = len(list((folder / "scenario" / "decisions").glob("*.csv"))) + len(
            list((folder / "scenario" / "outcomes").glob("*.csv"))
        )
        assert con.execute("SELECT count(*) FROM batches").fetchone()[0] == n_files
        assert con.execute("SELECT count(*) FROM fits").fetchone()[0] > 0
    finally:
        con.close()
    packs = list(folder.glob("audit_*"))
    assert len(packs) == 1
    manifest = json.loads((packs[0] / "manifest.json").read_text())
    assert manifest["quarter"] == packs[0].name.removeprefix("audit_")
