"""Shared fixtures for the ingest-stage tests: a small configuration, file writers and
a helper that runs the real command line in a subprocess.

Everything here is general: a test states the rows it feeds in and the result it
expects; the helpers only save typing.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import duckdb
import pytest

REPO = Path(__file__).resolve().parents[1]

# The decision file columns of the small test configuration, in header order.
DECISION_COLUMNS = [
    "case_id",
    "decided",
    "handler",
    "team",
    "score",
    "amount",
    "age_days",
    "report",
    "witness",
    "region",
    "band",
]
OUTCOME_COLUMNS = ["case_id", "seen", "result"]


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a valid TOML basic string
    if isinstance(value, Sequence):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, Mapping):
        return (
            "{ " + ", ".join(f"{json.dumps(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
        )
    raise TypeError(f"cannot write {value!r} as TOML")


def base_config() -> dict[str, Any]:
    """A small configuration with two cues of each type (numeric, binary, categorical)."""
    return {
        "store": {"path": "store/cuewatch.duckdb", "lock_timeout_s": 5.0, "read_retry_s": 5.0},
        "decisions": {
            "landing": "landing/decisions",
            "id": "case_id",
            "decided_at": "decided",
            "decision_maker": "handler",
            "team": "team",
            "judgment": "score",
            "judgment_range": [0, 100],
            "timezone": "UTC",
        },
        "outcomes": {
            "landing": "landing/outcomes",
            "id": "case_id",
            "observed_at": "seen",
            "criterion": "result",
            "criterion_values": {"Yes": 1, "No": 0},
        },
        "cues": {
            "amount": {"type": "numeric", "range": [0, 1000]},
            "age_days": {"type": "numeric"},
            "report": {"type": "binary", "values": {"Y": 1, "N": 0}},
            "witness": {"type": "binary"},
            "region": {"type": "categorical", "levels": ["north", "south"], "reference": "north"},
            "band": {"type": "categorical", "levels": ["a", "b", "c"], "reference": "a"},
        },
        "policy": {"forbidden": ["region"]},
    }


def _merge(base: dict, overrides: Mapping[str, Any]) -> dict:
    """Overrides use dotted keys ("store.lock_timeout_s") or section dicts; None deletes."""
    out = json.loads(json.dumps(base))
    for key, value in overrides.items():
        parts = key.split(".")
        node = out
        for p in parts[:-1]:
            node = node.setdefault(p, {})
        if value is None:
            node.pop(parts[-1], None)
        else:
            node[parts[-1]] = value
    return out


def write_config(path: Path, doc: Mapping[str, Any]) -> Path:
    """Write ``doc`` as TOML (sections, cue tables, inline maps) and return the path."""
    lines: list[str] = []
    for section, body in doc.items():
        if section == "cues":
            for name, cue in body.items():
                lines.append(f"[cues.{name}]")
                lines.extend(f"{k} = {_toml_value(v)}" for k, v in cue.items())
        else:
            lines.append(f"[{section}]")
            lines.extend(f"{k} = {_toml_value(v)}" for k, v in body.items())
        lines.append("")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def make_config(tmp_path: Path, name: str = "cuewatch.toml", **overrides: Any) -> Path:
    """Write the small test configuration under ``tmp_path`` and return its path.

    Keyword overrides use '__' for the dot (``store__lock_timeout_s=1``) and replace a
    whole section when given a dict for a section name (``ingest={"delimiter": ";"}``);
    a value of None deletes the key.
    """
    dotted = {k.replace("__", "."): v for k, v in overrides.items()}
    return write_config(tmp_path / name, _merge(base_config(), dotted))


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


def run_cli(
    config: Path | None,
    *args: str,
    env: Mapping[str, str] | None = None,
    stdin: bytes | None = None,
    timeout: float = 120,
) -> subprocess.CompletedProcess:
    """Run ``python -m monitor [--config FILE] ARGS`` and capture its output as text."""
    cmd = [sys.executable, "-m", "monitor"]
    if config is not None:
        cmd += ["--config", str(config)]
    full_env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    full_env["PYTHONPATH"] = str(REPO)
    full_env.update(env or {})
    return subprocess.run(
        [*cmd, *args],
        input=stdin,
        capture_output=True,
        env=full_env,
        timeout=timeout,
        cwd=REPO,
    )


def text(proc: subprocess.CompletedProcess) -> tuple[str, str]:
    return proc.stdout.decode("utf-8", "replace"), proc.stderr.decode("utf-8", "replace")


def ingest_json(config: Path, *args: str, **kw: Any) -> dict:
    """Run ``ingest --json ARGS``; assert it printed one JSON document and return it."""
    proc = run_cli(config, "ingest", "--json", *args, **kw)
    out, err = text(proc)
    assert out.strip(), f"no JSON printed (exit {proc.returncode}): {err}"
    return json.loads(out)


def store_path(config: Path) -> Path:
    from monitor.config import load_config

    return Path(load_config(config).store.path)


def query(config: Path, sql: str, params: list | None = None) -> list[tuple]:
    """Read the store directly (read-only) and return all rows."""
    con = duckdb.connect(str(store_path(config)), read_only=True)
    try:
        return con.execute(sql, params or []).fetchall()
    finally:
        con.close()


@pytest.fixture
def config_path(tmp_path: Path) -> Path:
    """The small configuration, with an initialised store."""
    cfg = make_config(tmp_path)
    proc = run_cli(cfg, "init")
    assert proc.returncode == 0, text(proc)
    return cfg


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


# --- no silent skips under CI ----------------------------------------------------------


def ci_forbids_skips() -> bool:
    """CI sets CI=true: there a skipped test means a prerequisite is missing, which must
    fail the run instead of passing it quietly."""
    return os.environ.get("CI", "").strip().lower() in {"true", "1"}


def _skip_reason(report: pytest.TestReport | pytest.CollectReport) -> str:
    longrepr = report.longrepr
    if isinstance(longrepr, tuple) and len(longrepr) == 3:  # (path, line, "Skipped: why")
        return str(longrepr[2])
    return str(longrepr)


def _fail_instead_of_skip(report: pytest.TestReport | pytest.CollectReport) -> None:
    report.outcome = "failed"
    report.longrepr = f"skipped under CI=true, which allows no skips: {_skip_reason(report)}"


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_makereport(item: pytest.Item, call: pytest.CallInfo):
    """Under CI a skip (skip, skipif, importorskip, in a test or a fixture) is a failure;
    an expected failure (xfail, which pytest also reports as skipped) stays one."""
    report = yield
    if report.skipped and not hasattr(report, "wasxfail") and ci_forbids_skips():
        _fail_instead_of_skip(report)
    return report


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_make_collect_report(collector: pytest.Collector):
    """A whole module skipped at import (a module-level importorskip) fails under CI too."""
    report = yield
    if report.skipped and ci_forbids_skips():
        _fail_instead_of_skip(report)
    return report
