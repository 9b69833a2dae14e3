"""Benchmark of ingest from PostgreSQL (`python -m benchmarks.bench_postgres [--rows N]`).

Starts a throwaway PostgreSQL server (tests/helpers/postgres_server.py: initdb in a
temporary folder, loopback port), fills a table with decision rows of the demo
configuration's columns (config/ostwyn.toml; numeric cues as double precision, 0.1% of
rows without a priority so the quarantine path runs) and times, side by side in one run:

(a) **pull**: `monitor.ingest.ingest` pulling the rows through `[decisions.from_postgres]`
    into a fresh, initialised store (the watermark query, the COPY to a spool, all checks,
    duplicates, quarantine, batch provenance, the watermark, one transaction); then an
    incremental pull of ``--increment`` more rows into the same store;
(b) **bare**: `COPY (SELECT * FROM the table WHERE row_seq > x ORDER BY row_seq) TO STDOUT
    (FORMAT csv)` of the same rows into a file with psycopg: the floor of moving the rows
    out of PostgreSQL, with nothing stored.

Reported: seconds, rows per second and the ratio of each pull to its bare copy.  The
runs are interleaved and ``--repeat`` keeps the best of each.  Writes
benchmarks/out/bench_postgres.json.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import psycopg

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out"
DEMO_CONFIG = ROOT / "config" / "ostwyn.toml"
ENV = "CUEWATCH_BENCH_PG"

TABLE = """CREATE TABLE claim_scores (
    row_seq BIGINT PRIMARY KEY, claim_id TEXT, scored_at TIMESTAMP, handler_id TEXT,
    team TEXT, priority DOUBLE PRECISION, claim_amount DOUBLE PRECISION,
    policy_age_days DOUBLE PRECISION, prior_claims_3y DOUBLE PRECISION, police_report TEXT,
    repair_quote_ratio DOUBLE PRECISION, independent_witness TEXT,
    report_delay_days DOUBLE PRECISION, vehicle_age_years DOUBLE PRECISION,
    claimant_age_band TEXT, claimant_gender TEXT)"""


def fill(url: str, first: int, n: int) -> float:
    """Insert rows ``first`` .. ``first + n - 1``; returns the seconds taken."""
    t0 = time.perf_counter()
    with psycopg.connect(url) as pg:
        pg.execute(
            f"""INSERT INTO claim_scores
            SELECT i, 'CL' || lpad(i::text, 8, '0'),
                   timestamp '2024-01-01' + (i % 60000000) * interval '1 second',
                   'H' || (i % 120), 'team-' || (i % 8),
                   CASE WHEN i % 1000 = 7 THEN NULL ELSE i % 101 END,
                   round(((i * 7919) % 2500000) / 10.0, 2), (i * 31) % 9000, i % 7,
                   CASE WHEN i % 3 = 0 THEN 'Y' ELSE 'N' END,
                   round(((i * 13) % 3000) / 1000.0, 3),
                   CASE WHEN i % 5 = 0 THEN 'Y' ELSE 'N' END, i % 60, i % 25,
                   (ARRAY['18-24', '25-39', '40-59', '60+'])[1 + i % 4],
                   CASE WHEN i % 2 = 0 THEN 'female' ELSE 'male' END
            FROM generate_series({first}::bigint, {first + n - 1}) AS i"""
        )
        pg.execute("ANALYZE claim_scores")
    return time.perf_counter() - t0


def bare_copy(url: str, after: int, target: Path) -> float:
    t0 = time.perf_counter()
    with psycopg.connect(url) as pg, pg.cursor() as cur, open(target, "wb") as out:
        with cur.copy(
            f"COPY (SELECT * FROM claim_scores WHERE row_seq > {after} ORDER BY row_seq) "
            "TO STDOUT (FORMAT csv, HEADER true)"
        ) as stream:
            for chunk in stream:
                out.write(chunk)
    return time.perf_counter() - t0


def bench_config(folder: Path) -> Path:
    body = DEMO_CONFIG.read_text(encoding="utf-8")
    body = "\n".join(
        line
        for line in body.splitlines()
        if not line.startswith("landing =") and not line.startswith("path =")
    )
    body = body.replace("[store]", f'[store]\npath = "{folder / "cuewatch.duckdb"}"', 1)
    body += (
        f'\n[decisions.from_postgres]\nurl_env = "{ENV}"\ntable = "claim_scores"\n'
        'watermark = "row_seq"\n'
    )
    path = folder / "bench.toml"
    path.write_text(body, encoding="utf-8")
    return path


def pull_into_fresh_store(work: Path, rows: int, increment: int, url: str) -> dict:
    """Time a full pull of ``rows`` into a new store, then an incremental pull of
    ``increment`` rows (added to PostgreSQL in between, not timed); removes them after."""
    from monitor.config import load_config
    from monitor.ingest import ingest
    from monitor.store.connection import Store

    folder = Path(tempfile.mkdtemp(dir=work))
    config = load_config(bench_config(folder))
    Store(config).init()
    t0 = time.perf_counter()
    full = ingest(config, kind="decisions")
    full_s = time.perf_counter() - t0
    fill(url, rows + 1, increment)
    t0 = time.perf_counter()
    more = ingest(config, kind="decisions")
    inc_s = time.perf_counter() - t0
    with psycopg.connect(url) as pg:
        pg.execute(f"DELETE FROM claim_scores WHERE row_seq > {rows}")
    shutil.rmtree(folder, ignore_errors=True)
    assert full.files[0].rows_read == rows and more.files[0].rows_read == increment
    return {"full_s": full_s, "incremental_s": inc_s, "accepted": full.accepted}


def bare_runs(work: Path, rows: int, increment: int, url: str) -> dict:
    full_s = bare_copy(url, 0, work / "bare.csv")
    fill(url, rows + 1, increment)
    inc_s = bare_copy(url, rows, work / "bare.csv")
    with psycopg.connect(url) as pg:
        pg.execute(f"DELETE FROM claim_scores WHERE row_seq > {rows}")
    return {"full_s": full_s, "incremental_s": inc_s}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--increment", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args(argv)

    sys.path.insert(0, str(ROOT / "tests"))
    from helpers.postgres_server import start_postgres, stop_postgres

    server = start_postgres()
    work = Path(tempfile.mkdtemp(prefix="cuewatch-bench-pg-"))
    try:
        url = server.create_database("bench")
        os.environ[ENV] = url
        with psycopg.connect(url) as pg:
            pg.execute(TABLE)
        fill_s = fill(url, 1, args.rows)
        pulls, bares = [], []
        for _ in range(args.repeat):  # interleaved, best of each kept
            bares.append(bare_runs(work, args.rows, args.increment, url))
            pulls.append(pull_into_fresh_store(work, args.rows, args.increment, url))
    finally:
        stop_postgres(server)
        shutil.rmtree(work, ignore_errors=True)

    result = {"rows": args.rows, "increment": args.increment, "fill_s": fill_s}
    for step, n in (("full", args.rows), ("incremental", args.increment)):
        pull_s = min(r[f"{step}_s"] for r in pulls)
        bare_s = min(r[f"{step}_s"] for r in bares)
        result[step] = {
            "rows": n,
            "pull_s": pull_s,
            "bare_copy_s": bare_s,
            "pull_rows_per_s": n / pull_s,
            "bare_rows_per_s": n / bare_s,
            "ratio": pull_s / bare_s,
        }
    print(f"PostgreSQL source, {args.rows:,} rows (+{args.increment:,}), best of {args.repeat}")
    print(f"{'pull':<12} {'rows':>10} {'bare s':>8} {'pull s':>8} {'bare rows/s':>12} "
          f"{'pull rows/s':>12} {'ratio':>6}")  # fmt: skip
    for step in ("full", "incremental"):
        r = result[step]
        print(
            f"{step:<12} {r['rows']:>10,} {r['bare_copy_s']:>8.2f} {r['pull_s']:>8.2f} "
            f"{r['bare_rows_per_s']:>12,.0f} {r['pull_rows_per_s']:>12,.0f} {r['ratio']:>6.2f}"
        )
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / "bench_postgres.json").write_text(json.dumps(result, indent=2), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
