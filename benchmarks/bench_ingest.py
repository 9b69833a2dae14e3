"""Benchmark of ingest (`python -m benchmarks.bench_ingest [--rows 1000000 5000000]`).

For each size a decision CSV with the demo configuration's columns (config/ostwyn.toml:
id, time, handler, team, priority and the ten cues) is generated with DuckDB's COPY;
0.1% of rows carry a bad value so the quarantine path is exercised.  Then, each in a
fresh child process so that its peak RSS is its own:

(a) cuewatch's ingest of the file into a fresh, initialised store;
(b) DuckDB's bare ``CREATE TABLE t AS SELECT * FROM read_csv('file')`` into a fresh
    DuckDB file - the floor: read, parse and store, with no checks;
(c) whole processes: ``python -m monitor ingest --kind decisions FILE --json`` into a
    fresh, initialised store (start-up, imports, the ingest, exit) against the bare
    copy's whole child process (start-up, ``import duckdb``, the copy, exit).

It prints a table (seconds, ratio, peak RSS) and writes benchmarks/out/bench_ingest.json.
``--profile`` adds the time of each SQL statement of one ingest (which step dominates).
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import duckdb

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out"
DEMO_CONFIG = ROOT / "config" / "ostwyn.toml"

# One SELECT column per file column of the demo configuration (ids, cues in order).
_COLUMNS = """
    'CL' || lpad(CAST(i AS VARCHAR), 8, '0') AS claim_id,
    strftime(TIMESTAMP '2024-01-01' + to_seconds(i % 60000000), '%Y-%m-%d %H:%M:%S') AS scored_at,
    'H' || CAST(i % 120 AS VARCHAR) AS handler_id,
    'team-' || CAST(i % 8 AS VARCHAR) AS team,
    CASE WHEN i % 1000 = 7 THEN 'n/a' ELSE CAST(i % 101 AS VARCHAR) END AS priority,
    CAST(round(((i * 7919) % 2500000) / 10.0, 2) AS VARCHAR) AS claim_amount,
    CAST((i * 31) % 9000 AS VARCHAR) AS policy_age_days,
    CAST(i % 7 AS VARCHAR) AS prior_claims_3y,
    CASE WHEN i % 3 = 0 THEN 'Y' ELSE 'N' END AS police_report,
    CAST(round(((i * 13) % 3000) / 1000.0, 3) AS VARCHAR) AS repair_quote_ratio,
    CASE WHEN i % 5 = 0 THEN 'Y' ELSE 'N' END AS independent_witness,
    CASE WHEN i % 1000 = 501 THEN '999' ELSE CAST(i % 60 AS VARCHAR) END AS report_delay_days,
    CAST(i % 25 AS VARCHAR) AS vehicle_age_years,
    ['18-24', '25-39', '40-59', '60+'][1 + i % 4] AS claimant_age_band,
    CASE WHEN i % 2 = 0 THEN 'female' ELSE 'male' END AS claimant_gender
"""


def generate_csv(path: Path, rows: int) -> float:
    """Write ``rows`` decision records; returns the seconds taken."""
    t0 = time.perf_counter()
    con = duckdb.connect()
    con.execute(
        f"COPY (SELECT {_COLUMNS} FROM range({int(rows)}) t(i)) TO '{path}' (HEADER, DELIMITER ',')"
    )
    con.close()
    return time.perf_counter() - t0


# --- children (each run in its own process) ---------------------------------------------


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux


def _cpu_s() -> float:
    # CPU time is reported beside wall time: on a shared machine it varies less.
    use = resource.getrusage(resource.RUSAGE_SELF)
    return use.ru_utime + use.ru_stime


def _bench_config(store: Path):
    from monitor.config import load_config

    cfg = load_config(DEMO_CONFIG)
    return cfg.model_copy(update={"store": cfg.store.model_copy(update={"path": store})})


def child_ingest(store: Path, csv_path: Path, profile: bool) -> dict:
    from monitor.ingest.batches import ingest
    from monitor.store.connection import Store

    cfg = _bench_config(store)
    Store(cfg).init()
    timings: list[tuple[str, float]] = []
    if profile:
        _install_statement_timer(timings)
    t0, c0 = time.perf_counter(), _cpu_s()
    summary = ingest(cfg, [str(csv_path)], kind="decisions")
    seconds, cpu = time.perf_counter() - t0, _cpu_s() - c0
    (f,) = summary.files
    return {
        "seconds": seconds,
        "cpu_s": cpu,
        "peak_rss_mb": _peak_rss_mb(),
        "status": f.status,
        "rows_read": f.rows_read,
        "accepted": f.accepted,
        "quarantined": f.quarantined,
        "quarantine_reasons": f.quarantine_reasons,
        "statements": sorted(timings, key=lambda t: -t[1])[:12],
    }


def _install_statement_timer(timings: list[tuple[str, float]]) -> None:
    """Wrap the writer connection so every execute() is timed (profiling only)."""
    import contextlib

    from monitor.ingest import batches as ingest_module
    from monitor.store.connection import Store

    class Timed:
        def __init__(self, con):
            self._con = con

        def execute(self, sql, *args):
            t0 = time.perf_counter()
            result = self._con.execute(sql, *args)
            timings.append((" ".join(str(sql).split())[:110], time.perf_counter() - t0))
            return result

        def __getattr__(self, name):
            return getattr(self._con, name)

    original = Store.writer

    @contextlib.contextmanager
    def timed_writer(self, timeout_s=None):
        with original(self, timeout_s) as con:
            yield Timed(con)

    ingest_module.Store.writer = timed_writer


def child_bare(db: Path, csv_path: Path) -> dict:
    t0, c0 = time.perf_counter(), _cpu_s()
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE t AS SELECT * FROM read_csv('{csv_path}')")
    n = con.execute("SELECT count(*) FROM t").fetchone()[0]
    con.close()
    return {
        "seconds": time.perf_counter() - t0,
        "cpu_s": _cpu_s() - c0,
        "peak_rss_mb": _peak_rss_mb(),
        "rows": n,
    }


def _run_child(*args: str) -> dict:
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "benchmarks.bench_ingest", "--child", *args],
        capture_output=True,
        text=True,
        cwd=ROOT,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"child {args[0]} failed: {proc.stderr.strip()[-2000:]}")
    return {**json.loads(proc.stdout.strip().splitlines()[-1]),
            "process_s": time.perf_counter() - t0}  # fmt: skip


def cli_ingest(store: Path, csv_path: Path) -> float:
    """Wall seconds of ``python -m monitor ingest`` as a whole process into a fresh store
    (initialised first, not timed)."""
    import os
    import re

    store.parent.mkdir(parents=True, exist_ok=True)
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    text = re.sub(r'(\[store\]\npath = )"[^"]*"', lambda m: f'{m.group(1)}"{store}"', text)
    text = text.replace('"../demo_run/', '"./')  # landing folders etc. beside the store
    cfg = store.parent / "bench.toml"
    cfg.write_text(text, encoding="utf-8")
    env = {**os.environ, "CUEWATCH_CONFIG": str(cfg)}
    cmd = [sys.executable, "-m", "monitor"]
    subprocess.run([*cmd, "init"], env=env, cwd=ROOT, check=True, capture_output=True)
    t0 = time.perf_counter()
    subprocess.run([*cmd, "ingest", "--kind", "decisions", str(csv_path), "--json"], env=env,
                   cwd=ROOT, check=True, capture_output=True)  # fmt: skip
    return time.perf_counter() - t0


# --- the benchmark ---------------------------------------------------------------------------


def _best(runs: list[dict]) -> dict:
    best = min(runs, key=lambda r: r["seconds"])
    return {
        **best,
        "cpu_s": min(r["cpu_s"] for r in runs),
        "peak_rss_mb": max(r["peak_rss_mb"] for r in runs),
    }


def bench_size(rows: int, work: Path, profile: bool, repeat: int) -> dict:
    csv_path = work / f"decisions_{rows}.csv"
    gen_s = generate_csv(csv_path, rows)
    size_mb = csv_path.stat().st_size / 1e6
    bare_runs, our_runs, cli_runs = [], [], []
    for k in range(repeat):  # interleaved, so a burst of load on the machine hits both
        bare_runs.append(_run_child("bare", str(work / f"bare_{rows}_{k}.duckdb"), str(csv_path)))
        cli_runs.append(cli_ingest(work / f"cli_{rows}_{k}" / "s.duckdb", csv_path))
        our_runs.append(
            _run_child(
                "ingest",
                str(work / f"store_{rows}_{k}" / "s.duckdb"),
                str(csv_path),
                str(int(profile)),
            )
        )
        for leftover in work.glob(f"*_{rows}_{k}*"):
            shutil.rmtree(leftover, ignore_errors=True) if leftover.is_dir() else leftover.unlink()
    bare, ours = _best(bare_runs), _best(our_runs)
    if ours["status"] != "ingested" or ours["rows_read"] != rows:
        raise RuntimeError(f"ingest did not complete: {ours}")
    csv_path.unlink()
    return {
        "rows": rows,
        "csv_mb": round(size_mb, 1),
        "generate_s": round(gen_s, 2),
        "bare_s": round(bare["seconds"], 2),
        "bare_peak_rss_mb": round(bare["peak_rss_mb"]),
        "ingest_s": round(ours["seconds"], 2),
        "ingest_peak_rss_mb": round(ours["peak_rss_mb"]),
        "ratio": round(ours["seconds"] / bare["seconds"], 2),
        "bare_cpu_s": round(bare["cpu_s"], 2),
        "ingest_cpu_s": round(ours["cpu_s"], 2),
        "cpu_ratio": round(ours["cpu_s"] / bare["cpu_s"], 2),
        "bare_process_s": round(min(r["process_s"] for r in bare_runs), 2),
        "cli_ingest_process_s": round(min(cli_runs), 2),
        "process_ratio": round(min(cli_runs) / min(r["process_s"] for r in bare_runs), 2),
        "repeat": repeat,
        "accepted": ours["accepted"],
        "quarantined": ours["quarantined"],
        "quarantine_reasons": ours["quarantine_reasons"],
        "statements": [(s, round(t, 3)) for s, t in ours["statements"]],
    }


def print_table(results: list[dict]) -> None:
    head = (
        f"{'rows':>10} {'CSV MB':>7} {'bare s':>7} {'ingest s':>9} {'ratio':>6} {'CPU ratio':>9} "
    )
    head += f"{'bare RSS MB':>12} {'ingest RSS MB':>14}"
    print(head)
    for r in results:
        print(
            f"{r['rows']:>10,} {r['csv_mb']:>7.0f} {r['bare_s']:>7.2f} {r['ingest_s']:>9.2f} "
            f"{r['ratio']:>6.2f} {r['cpu_ratio']:>9.2f} {r['bare_peak_rss_mb']:>12} {r['ingest_peak_rss_mb']:>14}"
        )
    for r in results:
        print(
            f"{r['rows']:>10,} rows, whole processes: `python -m monitor ingest` "
            f"{r['cli_ingest_process_s']:.2f} s, bare copy {r['bare_process_s']:.2f} s, "
            f"ratio {r['process_ratio']:.2f} (goal <= 2)"
        )
    for r in results:
        if r["statements"]:
            print(f"\nslowest statements at {r['rows']:,} rows:")
            for sql, secs in r["statements"]:
                print(f"  {secs:7.3f} s  {sql}")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        what, *rest = argv[1:]
        if what == "bare":
            doc = child_bare(Path(rest[0]), Path(rest[1]))
        else:
            doc = child_ingest(Path(rest[0]), Path(rest[1]), rest[2] == "1")
        print(json.dumps(doc))
        return 0
    parser = argparse.ArgumentParser(prog="python -m benchmarks.bench_ingest")
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 5_000_000])
    parser.add_argument("--profile", action="store_true", help="time each SQL statement")
    parser.add_argument("--repeat", type=int, default=2, help="runs per size; the best counts")
    parser.add_argument("--out", type=Path, default=OUT / "bench_ingest.json")
    args = parser.parse_args(argv)
    results = []
    with tempfile.TemporaryDirectory(prefix="cuewatch-bench-") as tmp:
        for rows in args.rows:
            print(f"{rows:,} rows ...", flush=True)
            results.append(bench_size(rows, Path(tmp), args.profile, args.repeat))
    print_table(results)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps({"results": results}, indent=2), encoding="utf-8")
    print(f"\nwrote {args.out}")
    goal_ok = all(r["ratio"] <= 2 for r in results) and all(
        r["ingest_peak_rss_mb"] < 1024 for r in results
    )
    print("goal (ratio <= 2, peak RSS < 1 GB):", "met" if goal_ok else "NOT met")
    return 0


if __name__ == "__main__":
    sys.exit(main())
