"""Benchmark of the bucket statistics on Apache Spark (`python -m benchmarks.bench_spark`).

The refit benchmark's synthetic log (``bench_refit.build_store``: 5,000,000 decisions,
200 decision-makers, 10 numeric cues, two years, outcomes for half of them) is written as
two Parquet datasets (decisions, outcomes; ``load_seq`` the watermark), then in one run,
side by side on the same files:

(a) DuckDB reading the Parquet files and computing the same bucket sums
    (``refit.buckets.full_sql`` over views of the files, around the same kind of
    shifts), fetched as Arrow;
(b) Spark ``local[1]`` and ``local[2]``: the lake path's Spark work of a full refit
    (``lake.source.LakeSource.prepare``: read, check, quarantine, shifts, bucket sums,
    collected to the driver), each in a child process of its own (one Spark per process),
    the session's start-up timed apart;
(c) the size of what travels back: bucket rows and bytes against the input's rows and
    Parquet bytes.

Results go to ``benchmarks/out/bench_spark.json``; ``--rows`` / ``--makers`` shrink it.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import duckdb

from benchmarks.bench_refit import build_store

OUT = Path(__file__).resolve().parent / "out"


def write_lake(cfg_path: Path, folder: Path) -> dict:
    """The store's decisions and outcomes as Parquet (typed columns), with load_seq."""
    from monitor.config import load_config

    config = load_config(cfg_path)
    con = duckdb.connect(str(config.store.path), read_only=True)
    (folder / "decisions").mkdir(parents=True)
    (folder / "outcomes").mkdir(parents=True)
    con.execute(
        "COPY (SELECT row_number() OVER () AS load_seq, decision_id AS id, decided_at AS at, "
        "decision_maker AS who, team, judgment AS y, * EXCLUDE (decision_id, decided_at, "
        "decided_day, decision_maker, team, judgment, batch_id, ingested_at, source_line) "
        f"FROM decisions) TO '{folder / 'decisions' / 'part-0.parquet'}' (FORMAT parquet)"
    )
    con.execute(
        "COPY (SELECT row_number() OVER () AS load_seq, decision_id AS id, observed_at AS seen, "
        f"criterion AS ye FROM outcomes) TO '{folder / 'outcomes' / 'part-0.parquet'}' (FORMAT parquet)"
    )
    rows = con.execute(
        "SELECT (SELECT count(*) FROM decisions), (SELECT count(*) FROM outcomes)"
    ).fetchone()
    con.close()
    size = sum(f.stat().st_size for f in folder.rglob("*.parquet"))
    return {"decision_rows": rows[0], "outcome_rows": rows[1], "parquet_bytes": size}


def lake_config(cfg_path: Path, folder: Path, master: str) -> Path:
    body = cfg_path.read_text(encoding="utf-8")
    body += f"""
[lake]
decisions = "{folder / "decisions"}"
outcomes = "{folder / "outcomes"}"
watermark = "load_seq"
master = "{master}"
spark_conf = {{ "spark.driver.memory" = "2g" }}
"""
    path = cfg_path.parent / f"lake_{master.replace('[', '_').replace(']', '')}.toml"
    path.write_text(body, encoding="utf-8")
    return path


def duckdb_sums(cfg_path: Path, folder: Path) -> dict:
    """DuckDB on the same Parquet files: views named as the store's tables, the shifts by
    ``shift_select``, the bucket sums by ``full_sql``, fetched as Arrow."""
    from monitor.config import load_config
    from monitor.refit.buckets import full_sql, shift_select

    config = load_config(cfg_path)
    con = duckdb.connect()
    t0 = time.perf_counter()
    con.execute(
        'CREATE VIEW decisions AS SELECT id AS decision_id, "at" AS decided_at, '
        'CAST("at" AS DATE) AS decided_day, who AS decision_maker, team, y AS judgment, '
        'load_seq AS batch_id, "at" AS ingested_at, load_seq AS source_line, * '
        f"FROM read_parquet('{folder / 'decisions' / '*.parquet'}')"
    )
    con.execute(
        "CREATE VIEW outcomes AS SELECT id AS decision_id, seen AS observed_at, ye AS criterion, "
        "load_seq AS batch_id, seen AS ingested_at, load_seq AS source_line "
        f"FROM read_parquet('{folder / 'outcomes' / '*.parquet'}')"
    )
    con.execute(f"CREATE TABLE bucket_shifts AS {shift_select(config, 'TRUE')}")
    table = con.sql(full_sql(config)).to_arrow_table()
    seconds = time.perf_counter() - t0
    return {
        "seconds": round(seconds, 2),
        "bucket_rows": table.num_rows,
        "bucket_bytes": table.nbytes,
    }


def spark_child(cfg_path: Path) -> dict:
    """In this process: start Spark, then time the lake path's Spark work of a full refit."""
    from monitor.config import load_config
    from monitor.lake.session import spark_session
    from monitor.lake.source import LakeSource
    from monitor.refit.buckets import StatLayout
    from monitor.store.connection import Store

    config = load_config(cfg_path)
    t0 = time.perf_counter()
    spark_session(config)
    startup = time.perf_counter() - t0
    store = Store(config)
    with store.writer() as con:
        store.ensure_ready(con)
        con.execute("BEGIN")
        source = LakeSource(config)
        t1 = time.perf_counter()
        # The store of the benchmark holds the decisions (for DuckDB's side); the lake
        # path refuses such a store, so the check reads an empty one.
        con.execute("DELETE FROM decisions")
        source.prepare(con, True)
        seconds = time.perf_counter() - t1
        con.execute("ROLLBACK")
    got = source._full
    layout = StatLayout(len(config.design_columns()))
    rows = 2 * len(got["day"])
    return {"startup_s": round(startup, 2), "seconds": round(seconds, 2), "bucket_rows": rows,
            "bucket_bytes": int(rows * layout.set_width * 8)}  # fmt: skip


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=5_000_000)
    ap.add_argument("--makers", type=int, default=200)
    ap.add_argument("--days", type=int, default=730)
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(spark_child(Path(args.child))))
        return 0
    with tempfile.TemporaryDirectory(prefix="bench_spark_") as tmp:
        folder = Path(tmp)
        cfg_path = build_store(folder, args.rows, args.days, args.makers)
        lake = folder / "lake"
        sizes = write_lake(cfg_path, lake)
        result = {"rows": args.rows, "makers": args.makers, "input": sizes,
                  "load_before": os.getloadavg()}  # fmt: skip
        result["duckdb"] = duckdb_sums(cfg_path, lake)
        for master in ("local[1]", "local[2]"):
            child = lake_config(cfg_path, lake, master)
            proc = subprocess.run(
                [sys.executable, "-m", "benchmarks.bench_spark", "--child", str(child)],
                capture_output=True, text=True, check=False,
            )  # fmt: skip
            if proc.returncode:
                print(proc.stderr[-2000:])
                return 1
            result[master] = json.loads(proc.stdout.strip().splitlines()[-1])
            result[master]["ratio_to_duckdb"] = round(
                result[master]["seconds"] / result["duckdb"]["seconds"], 2
            )
        result["load_after"] = os.getloadavg()
    OUT.mkdir(exist_ok=True)
    (OUT / "bench_spark.json").write_text(json.dumps(result, indent=2), encoding="utf-8")
    print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
