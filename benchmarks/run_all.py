"""Run every benchmark in turn (`make bench`); each prints its own table and writes
JSON to benchmarks/out/ (bench_alerts to monitor/audit/operating_characteristics.json,
which the audit pack reads).  Arguments are passed to each benchmark's defaults only."""

from __future__ import annotations

import importlib
import sys
import time

BENCHMARKS = [
    "benchmarks.bench_ingest",
    "benchmarks.bench_refit",
    "benchmarks.bench_dashboard",
    "benchmarks.bench_alerts",
    "benchmarks.bench_postgres",
    "benchmarks.bench_spark",
]


def main() -> int:
    failed = []
    for name in BENCHMARKS:
        try:
            module = importlib.import_module(name)
        except ImportError as exc:
            print(f"skip {name}: {exc}")
            continue
        print(f"\n=== {name} ===", flush=True)
        t0 = time.perf_counter()
        try:
            module.main([])
        except SystemExit as exc:
            if exc.code not in (0, None):
                failed.append(name)
        except Exception as exc:  # report and go on with the others
            print(f"{name} failed: {exc!r}")
            failed.append(name)
        print(f"({name}: {time.perf_counter() - t0:.0f} s)")
    if failed:
        print("failed:", ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
