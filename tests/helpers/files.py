"""Decision and outcome rows of the small test configuration, written as CSV, JSON Lines,
Parquet, or in bulk with DuckDB's COPY."""

from __future__ import annotations

import csv
import json
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import duckdb
import numpy as np

from helpers.configs import DECISION_COLUMNS


def decision_row(i: int, **fields: Any) -> dict[str, Any]:
    """A valid decision record (all fields text, as a file would hold them)."""
    row = {
        "case_id": f"c{i:06d}",
        "decided": f"2024-01-{1 + i % 28:02d} {8 + i % 10:02d}:{i % 60:02d}:00",
        "handler": f"h{i % 3}",
        "team": "t1" if i % 2 else "t2",
        "score": str(10 + i % 80),
        "amount": str(50 + (i * 37) % 900),
        "age_days": str(i % 365),
        "report": "Y" if i % 3 else "N",
        "witness": str(i % 2),
        "region": "south" if i % 4 == 0 else "north",
        "band": "abc"[i % 3],
    }
    row.update({k: ("" if v is None else str(v)) for k, v in fields.items()})
    return row


def varied_decision(i: int, seed: int, **fields: Any) -> dict[str, Any]:
    """decision_row(i) with cue values and a judgment drawn from a generator seeded by
    ``seed + i`` (decision_row's own cues are functions of i, collinear within one
    handler); ``fields`` override any value.  Invented data for the tests."""
    rng = np.random.default_rng(seed + i)
    amount, age = rng.uniform(0, 1000), rng.integers(0, 365)
    report, witness = rng.integers(0, 2), rng.integers(0, 2)
    score = 20 + 0.03 * amount + 0.05 * age + 10 * report - 5 * witness + rng.normal(0, 5)
    values = {
        "amount": f"{amount:.2f}",
        "age_days": str(age),
        "report": "Y" if report else "N",
        "witness": str(witness),
        "region": str(rng.choice(["north", "south"])),
        "band": str(rng.choice(["a", "b", "c"])),
        "score": f"{min(max(score, 0), 100):.1f}",
    }
    return decision_row(i, **{**values, **fields})


def outcome_row(i: int, **fields: Any) -> dict[str, Any]:
    row = {
        "case_id": f"c{i:06d}",
        "seen": "2024-03-01 09:00:00",
        "result": "Yes" if i % 2 else "No",
    }
    row.update({k: ("" if v is None else str(v)) for k, v in fields.items()})
    return row


def write_csv(
    path: Path,
    rows: Iterable[Mapping[str, Any]],
    columns: Sequence[str] = DECISION_COLUMNS,
    *,
    delimiter: str = ",",
    encoding: str = "utf-8",
) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding=encoding, newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(columns), delimiter=delimiter, extrasaction="ignore")
        w.writeheader()
        w.writerows(rows)
    return path


def write_jsonl(path: Path, records: Iterable[Any]) -> Path:
    """One line per record: dicts become JSON objects, strings are written verbatim."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding="utf-8") as fh:
        for rec in records:
            fh.write((rec if isinstance(rec, str) else json.dumps(rec)) + "\n")
    return path


def write_parquet(path: Path, rows: Sequence[Mapping[str, Any]], columns: Sequence[str]) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    path.parent.mkdir(parents=True, exist_ok=True)
    table = pa.table({c: [r.get(c) for r in rows] for c in columns})
    pq.write_table(table, path)
    return path


def write_large_decisions_csv(path: Path, n: int, *, bad_every: int = 0) -> Path:
    """Write ``n`` decision rows for the small configuration with DuckDB's COPY (fast).

    Ids are c0000000..; every ``bad_every``-th row (if > 0) has a judgment of 'x' and
    is quarantined.  Returns the path.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    score = (
        f"CASE WHEN {bad_every} > 0 AND i % {bad_every} = 0 THEN 'x' ELSE CAST(i % 100 AS VARCHAR) END"
        if bad_every
        else "CAST(i % 100 AS VARCHAR)"
    )
    con = duckdb.connect()
    try:
        con.execute(
            f"""COPY (
                SELECT 'c' || lpad(CAST(i AS VARCHAR), 7, '0') AS case_id,
                       strftime(TIMESTAMP '2024-01-01' + to_seconds(i % 8000000), '%Y-%m-%d %H:%M:%S')
                           AS decided,
                       'h' || CAST(i % 50 AS VARCHAR) AS handler,
                       't' || CAST(i % 5 AS VARCHAR) AS team,
                       {score} AS score,
                       CAST(round((i * 37) % 100000 / 100.0, 2) AS VARCHAR) AS amount,
                       CAST(i % 365 AS VARCHAR) AS age_days,
                       CASE WHEN i % 3 = 0 THEN 'N' ELSE 'Y' END AS report,
                       CAST(i % 2 AS VARCHAR) AS witness,
                       CASE WHEN i % 4 = 0 THEN 'south' ELSE 'north' END AS region,
                       ['a', 'b', 'c'][1 + i % 3] AS band
                FROM range({int(n)}) t(i)
            ) TO '{path}' (HEADER, DELIMITER ',')"""
        )
    finally:
        con.close()
    return path
