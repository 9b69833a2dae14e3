"""A pull from PostgreSQL killed at any moment loses and duplicates nothing: the batch and
the source's watermark commit together, so the next pull takes exactly the rows the
killed one did not store.  Real subprocesses, a real PostgreSQL server and DuckDB files
(the file counterpart is tests/test_ingest_crash_safety.py)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest
from helpers.cli import ingest_json, run_cli
from helpers.configs import REPO, make_config

from monitor.config import load_config
from monitor.store.connection import Store

psycopg = pytest.importorskip("psycopg", reason="psycopg is not installed (pip extra 'postgres')")

ENV = "CUEWATCH_TEST_CRASH_DB"
ROWS = 150_000  # per load; two loads
BAD_EVERY = 1_000  # judgment 150 (outside 0-100): quarantined

TABLE = """CREATE TABLE case_decisions (
    row_seq BIGINT GENERATED ALWAYS AS IDENTITY,
    case_id TEXT, decided TIMESTAMP, handler TEXT, team TEXT, score DOUBLE PRECISION,
    amount DOUBLE PRECISION, age_days INTEGER, report TEXT, witness SMALLINT,
    region TEXT, band TEXT)"""


def _load(url: str, first: int, n: int) -> None:
    """Rows ``first`` .. ``first + n - 1`` of the synthetic decisions (ids c0000001 ...)."""
    with psycopg.connect(url) as pg:
        pg.execute(
            f"""INSERT INTO case_decisions (case_id, decided, handler, team, score, amount,
                    age_days, report, witness, region, band)
                SELECT 'c' || lpad(i::text, 7, '0'),
                       timestamp '2024-01-01' + (i % 8000000) * interval '1 second',
                       'h' || (i % 50), 't' || (i % 5),
                       CASE WHEN i % {BAD_EVERY} = 0 THEN 150 ELSE i % 100 END,
                       round(((i * 37) % 100000 / 100.0)::numeric, 2), i % 365,
                       CASE WHEN i % 3 = 0 THEN 'N' ELSE 'Y' END, i % 2,
                       CASE WHEN i % 4 = 0 THEN 'south' ELSE 'north' END,
                       (ARRAY['a', 'b', 'c'])[1 + i % 3]
                FROM generate_series({first}, {first + n - 1}) AS i"""
        )


def _config(tmp_path, name: str):
    return make_config(
        tmp_path,
        name,
        store__path=f"{name}.store/cuewatch.duckdb",
        store__lock_timeout_s=30,
        decisions__landing=None,
        outcomes__landing=None,
        decisions__from_postgres={
            "url_env": ENV,
            "table": "case_decisions",
            "watermark": "row_seq",
        },
    )


def _problems(cfg) -> list[str]:
    """What a crash could have broken: every source row up to the stored watermark is in
    the store exactly once (stored or quarantined), none past it; batches add up."""
    problems = []
    with Store(load_config(cfg)).writer(timeout_s=30) as con:
        mark = con.execute("SELECT max(watermark) FROM source_watermarks").fetchone()[0]
        taken = int(mark) if mark is not None else 0
        stored, distinct = con.execute(
            "SELECT count(*), count(DISTINCT decision_id) FROM decisions"
        ).fetchone()
        quarantined = con.execute("SELECT count(*) FROM quarantine").fetchone()[0]
        if stored != distinct:
            problems.append(f"{stored - distinct} decisions stored twice")
        if stored + quarantined != taken:
            problems.append(
                f"watermark {taken} but {stored} stored + {quarantined} quarantined rows"
            )
        read, in_batches = con.execute(
            "SELECT sum(rows_read), sum(rows_accepted + rows_quarantined + rows_duplicate) "
            "FROM batches WHERE status = 'ingested'"
        ).fetchone()
        if (read or 0) != taken or (in_batches or 0) != taken:
            problems.append(f"batches read {read} / account for {in_batches}, watermark {taken}")
    return problems


def _pull_process(cfg, url) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(cfg), "ingest", "--json"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        cwd=REPO,
        env={**os.environ, "PYTHONPATH": str(REPO), ENV: url},
    )


def test_sigkill_during_pulls_loses_and_duplicates_nothing(tmp_path, postgres_server):
    url = postgres_server.create_database("crash_cases")
    with psycopg.connect(url) as pg:
        pg.execute(TABLE)
    _load(url, 1, ROWS)

    # One uninterrupted pull into a scratch store places the kills across a run.
    scratch = _config(tmp_path, "scratch.toml")
    assert run_cli(scratch, "init").returncode == 0
    t0 = time.monotonic()
    assert ingest_json(scratch, env={ENV: url})["accepted"] == ROWS - ROWS // BAD_EVERY
    duration = time.monotonic() - t0

    cfg = _config(tmp_path, "pg.toml")
    assert run_cli(cfg, "init").returncode == 0
    killed = 0
    # Kills up to three quarters of the measured run: a later run that happens to be
    # faster than the measured one (a shared machine) still meets most of them mid-run.
    for i, fraction in enumerate((0.15, 0.35, 0.55, 0.75, 0.25, 0.5, 0.7)):
        if i == 4:  # more rows arrive: the later kills hit an incremental pull
            _load(url, ROWS + 1, ROWS)
        proc = _pull_process(cfg, url)
        time.sleep(duration * fraction)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            killed += 1
        proc.wait(timeout=60)
        assert _problems(cfg) == [], f"after a kill at {fraction:.0%} (round {i})"
    assert killed >= 4, killed  # most kills must land mid-run, or this proves nothing

    statuses = [ingest_json(cfg, env={ENV: url})["files"][0]["status"] for _ in range(2)]
    assert statuses[-1] == "up_to_date" and set(statuses) <= {"ingested", "up_to_date"}
    assert _problems(cfg) == []
    total = 2 * ROWS
    # The spools of the killed pulls are gone too (removed by the next pull).
    store_folder = load_config(cfg).store.path.parent
    assert [p.name for p in store_folder.iterdir() if p.name.startswith(".cuewatch-pull-")] == []
    with Store(load_config(cfg)).reader() as con:
        assert con.execute("SELECT count(*) FROM decisions").fetchone() == (
            total - total // BAD_EVERY,
        )
        assert con.execute("SELECT watermark FROM source_watermarks").fetchone() == (str(total),)
