"""The demo scenario read from PostgreSQL gives the same fits and alerts as the same
scenario read from files (numbers to 1e-9 relative).

The scenario's decision and outcome files (tests/helpers/demo_store.py: one year, 12
handlers) are loaded into PostgreSQL tables (numeric cues as double precision, outcome
times as timestamps, the rest as text) with a row number as the watermark; a second store
pulls them with one nightly run, as the file store read its landing folders.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from helpers.cli import command_json, json_differences
from helpers.demo_store import build_demo_store
from helpers.store_rows import query

from monitor.config import load_config
from monitor.nightly import run_nightly

psycopg = pytest.importorskip("psycopg", reason="psycopg is not installed (pip extra 'postgres')")

ENV = "CUEWATCH_TEST_DEMO_DB"


def _load_typed(url: str, table: str, csv_path: Path, types: dict[str, str]) -> None:
    """Copy a CSV file into ``table`` as text, then cast each column to ``types``
    (default text); ``row_seq`` numbers the rows in file order."""
    header = csv_path.read_text(encoding="utf-8").splitlines()[0].split(",")
    raw = f"{table}_text"
    with psycopg.connect(url) as pg:
        pg.execute(f"CREATE TABLE {raw} ({', '.join(f'{c} TEXT' for c in header)})")
        with (
            pg.cursor().copy(f"COPY {raw} FROM STDIN (FORMAT csv, HEADER true)") as copy,
            open(csv_path, "rb") as fh,
        ):
            while chunk := fh.read(1 << 20):
                copy.write(chunk)
        pg.execute(f"ALTER TABLE {raw} ADD COLUMN file_line BIGSERIAL")
        casts = ", ".join(f"NULLIF({c}, '')::{types.get(c, 'text')} AS {c}" for c in header)
        pg.execute(
            f"CREATE TABLE {table} AS SELECT row_number() OVER (ORDER BY file_line) AS row_seq, "
            f"{casts} FROM {raw}"
        )


def test_the_demo_from_postgres_fits_and_alerts_as_from_files(
    tmp_path_factory, postgres_server, monkeypatch
):
    files_cfg = build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")
    config = load_config(files_cfg)
    url = postgres_server.create_database("ostwyn_demo")
    numeric = {name for name, cue in config.cues.items() if cue.type == "numeric"}
    _load_typed(
        url,
        "claim_scores",
        Path(config.decisions.landing) / "decisions_all.csv",
        # The planted faults of the scenario (a priority of 'n/a', an unparseable
        # time) could not sit in a typed column: those two stay text.
        {c: "double precision" for c in numeric},
    )
    _load_typed(
        url,
        "claim_closures",
        Path(config.outcomes.landing) / "outcomes_all.csv",
        {"closed_at": "timestamp"},
    )

    folder = tmp_path_factory.mktemp("demo_from_postgres")
    body = files_cfg.read_text(encoding="utf-8")
    body = body.replace('path = "./cuewatch.duckdb"', f'path = "{folder / "cuewatch.duckdb"}"')
    body = body.replace('file = "./alerts.jsonl"', f'file = "{folder / "alerts.jsonl"}"')
    body = "\n".join(line for line in body.splitlines() if not line.startswith("landing ="))
    body += f"""
[decisions.from_postgres]
url_env = "{ENV}"
table = "claim_scores"
watermark = "row_seq"

[outcomes.from_postgres]
url_env = "{ENV}"
query = "SELECT * FROM claim_closures"
watermark = "row_seq"
"""
    pg_cfg = folder / "ostwyn_pg.toml"
    pg_cfg.write_text(body, encoding="utf-8")
    monkeypatch.setenv(ENV, url)
    pg_config = load_config(pg_cfg)
    from monitor.store.connection import Store

    Store(pg_config).init()
    summary = run_nightly(pg_config)
    pulled = summary.ingest
    assert pulled["failed_files"] == 0
    by_reason = "SELECT kind, reason, count(*) FROM quarantine GROUP BY ALL ORDER BY ALL"
    assert query(pg_cfg, by_reason) == query(files_cfg, by_reason)
    assert query(pg_cfg, by_reason), "the scenario's planted faults were not quarantined"
    counts = "SELECT (SELECT count(*) FROM decisions), (SELECT count(*) FROM outcomes)"
    assert query(pg_cfg, counts) == query(files_cfg, counts)

    for args in (("fits",), ("alerts",)):
        from_files, from_pg = command_json(files_cfg, *args), command_json(pg_cfg, *args)
        assert from_files, f"{args}: the file store has nothing to compare"
        assert json_differences(from_files, from_pg) == [], args
