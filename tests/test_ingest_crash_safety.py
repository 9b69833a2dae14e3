"""Large files: an ingest killed at any moment leaves no partial batch, a re-run
completes the file, and a million-row file ingests with bounded memory.

Real subprocesses and real DuckDB files throughout; the files are generated with
DuckDB's COPY so that each takes about a second to write.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

from helpers.cli import ingest_json, run_cli, text
from helpers.configs import REPO, make_config
from helpers.files import write_large_decisions_csv

from monitor.config import load_config
from monitor.store.connection import Store

ROWS = 400_000
BAD_EVERY = 1_000  # every 1000th row has judgment 'x' -> quarantined


def _consistency_problems(cfg) -> list[str]:
    """Open the store read-write (as the next ingest would) and list broken invariants."""
    problems: list[str] = []
    with Store(load_config(cfg)).writer(timeout_s=30) as con:
        rows = con.execute(
            """SELECT b.batch_id, b.status, b.rows_read, b.rows_accepted, b.rows_quarantined,
                      b.rows_duplicate,
                      (SELECT count(*) FROM decisions d WHERE d.batch_id = b.batch_id),
                      (SELECT count(*) FROM quarantine q WHERE q.batch_id = b.batch_id)
               FROM batches b ORDER BY b.batch_id"""
        ).fetchall()
        for bid, status, read, acc, quar, dup, n_dec, n_quar in rows:
            if (acc or 0, quar or 0) != (n_dec, n_quar):
                problems.append(
                    f"batch {bid} ({status}) says {acc} accepted / {quar} quarantined "
                    f"but the store holds {n_dec} / {n_quar}"
                )
            if status == "ingested" and acc + quar + dup != read:
                problems.append(f"batch {bid} counts do not add up to {read} rows read")
        for table in ("decisions", "quarantine"):
            orphans = con.execute(
                f"SELECT count(*) FROM {table} WHERE batch_id NOT IN (SELECT batch_id FROM batches)"
            ).fetchone()[0]
            if orphans:
                problems.append(f"{orphans} {table} rows belong to no batch")
    return problems


def _ingest_process(cfg, data) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(cfg), "ingest", "--json"]
        + ["--kind", "decisions", str(data)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        cwd=REPO,
        env={**os.environ, "PYTHONPATH": str(REPO)},
    )


def test_sigkill_at_several_points_leaves_no_partial_batch(tmp_path):
    cfg = make_config(tmp_path, store__lock_timeout_s=30)
    assert run_cli(cfg, "init").returncode == 0
    data = write_large_decisions_csv(tmp_path / "big.csv", ROWS, bad_every=BAD_EVERY)

    # Measure one uninterrupted run in a scratch store to place the kills across it.
    scratch = make_config(tmp_path / "scratch")
    assert run_cli(scratch, "init").returncode == 0
    t0 = time.monotonic()
    full = ingest_json(scratch, "--kind", "decisions", str(data))
    duration = time.monotonic() - t0
    assert full["accepted"] == ROWS - ROWS // BAD_EVERY

    killed_while_running = 0
    # Kills up to 60 % of the measured time: once one run gets to commit, every later run
    # skips the file at once, so a late kill that misses (a less loaded machine than
    # during the measurement) would take the later ones with it.
    for fraction in (0.1, 0.2, 0.35, 0.5, 0.6):
        proc = _ingest_process(cfg, data)
        time.sleep(duration * fraction)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            killed_while_running += 1
        proc.wait(timeout=60)
        assert _consistency_problems(cfg) == [], f"after a kill at {fraction:.0%}"
    # Most kills must land mid-run, or the test proves nothing.
    assert killed_while_running >= 3, killed_while_running

    final = ingest_json(cfg, "--kind", "decisions", str(data))
    status = final["files"][0]["status"]
    assert status in {"ingested", "skipped"}  # skipped if an earlier run got to commit
    assert _consistency_problems(cfg) == []
    with Store(load_config(cfg)).reader() as con:
        assert con.execute(
            "SELECT count(*), count(DISTINCT decision_id) FROM decisions"
        ).fetchone() == (
            ROWS - ROWS // BAD_EVERY,
            ROWS - ROWS // BAD_EVERY,
        )
        assert con.execute("SELECT count(*) FROM quarantine").fetchone() == (ROWS // BAD_EVERY,)
        assert con.execute("SELECT count(*) FROM batches WHERE status = 'ingested'").fetchone() == (
            1,
        )


_PEAK_RSS = """
import resource, subprocess, sys
proc = subprocess.run(sys.argv[1:], capture_output=True)
sys.stderr.write(proc.stderr.decode())
sys.stdout.write(proc.stdout.decode())
print("PEAK_RSS_KB", resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)
sys.exit(proc.returncode)
"""


def test_a_million_rows_ingest_with_bounded_memory(tmp_path):
    n = 1_000_000
    cfg = make_config(tmp_path)
    assert run_cli(cfg, "init").returncode == 0
    data = write_large_decisions_csv(tmp_path / "million.csv", n, bad_every=BAD_EVERY)
    cmd = [sys.executable, "-m", "monitor", "--config", str(cfg), "ingest", "--json"]
    t0 = time.monotonic()
    # A wrapper process measures only the ingest's peak RSS (ru_maxrss is in KiB on Linux).
    proc = subprocess.run(
        [sys.executable, "-c", _PEAK_RSS, *cmd, "--kind", "decisions", str(data)],
        capture_output=True,
        cwd=REPO,
        env={**os.environ, "PYTHONPATH": str(REPO)},
        timeout=300,
    )
    elapsed = time.monotonic() - t0
    out, err = text(proc)
    assert proc.returncode == 0, err
    peak_mb = int(out.rsplit("PEAK_RSS_KB", 1)[1]) / 1024
    print(f"\n1,000,000-row CSV: ingest {elapsed:.1f} s, peak RSS {peak_mb:.0f} MB")
    assert f'"accepted": {n - n // BAD_EVERY}' in out
    assert peak_mb < 1536, peak_mb


def test_killed_while_waiting_for_the_lock_changes_nothing(tmp_path):
    # A process killed before it owns the store must leave it exactly as it was.
    cfg = make_config(tmp_path, store__lock_timeout_s=30)
    assert run_cli(cfg, "init").returncode == 0
    data = write_large_decisions_csv(tmp_path / "small.csv", 1000)
    with Store(load_config(cfg)).writer():
        proc = _ingest_process(cfg, data)
        time.sleep(1.0)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    assert _consistency_problems(cfg) == []
    doc = ingest_json(cfg, "--kind", "decisions", str(data))
    assert doc["accepted"] == 1000
