"""The store: creation and migration through `init`, cue columns following the
configuration, and the connection rules (one writer under a lock, readers that retry).

All checks use real DuckDB files and, where two processes matter, real subprocesses.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import duckdb
import pytest
from helpers.cli import run_cli, text
from helpers.configs import REPO, base_config, make_config, write_config
from helpers.store_rows import query, store_path

from monitor.config import load_config
from monitor.store.connection import Store, StoreBusy
from monitor.store.rules import quote_ident
from monitor.store.schema import MIGRATIONS, StoreMismatch, latest_version


def _init_json(cfg: Path) -> dict:
    proc = run_cli(cfg, "init", "--json")
    assert proc.returncode == 0, text(proc)
    return json.loads(proc.stdout)


def test_init_creates_the_documented_tables(tmp_path):
    cfg = make_config(tmp_path)
    first = _init_json(cfg)
    assert first["created"] is True
    # Every migration, in order (numbers may have gaps while a branch's lands later).
    assert first["applied"] == sorted(v for v, _, _ in MIGRATIONS)
    assert first["applied"][-1] == latest_version()
    tables = {r[0] for r in query(cfg, "SELECT table_name FROM information_schema.tables")}
    # DESIGN.md, Contracts: these names are documented for analysts.
    assert {"decisions", "outcomes", "batches", "quarantine"} <= tables
    assert {"current_outcomes", "decisions_with_outcome"} <= tables
    cols = dict(
        query(
            cfg,
            "SELECT column_name, data_type FROM information_schema.columns "
            "WHERE table_name = 'decisions'",
        )
    )
    assert cols["amount"] == "DOUBLE" and cols["report"] == "DOUBLE"
    assert cols["region"] == "VARCHAR" and cols["band"] == "VARCHAR"


def test_second_init_is_a_no_op(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    before = query(cfg, "SELECT version, applied_at FROM store_versions ORDER BY version")
    again = _init_json(cfg)
    assert again["created"] is False
    assert again["applied"] == [] and again["cue_columns_added"] == []
    after = query(cfg, "SELECT version, applied_at FROM store_versions ORDER BY version")
    assert after == before  # no new migration rows
    proc = run_cli(cfg, "init")
    assert "up to date" in text(proc)[0]


def test_adding_a_cue_adds_its_column(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    doc = base_config()
    doc["cues"]["night_call"] = {"type": "binary"}
    doc["cues"]["channel"] = {"type": "categorical", "levels": ["web", "phone"], "reference": "web"}
    write_config(cfg, doc)
    result = _init_json(cfg)
    assert result["applied"] == []
    assert sorted(result["cue_columns_added"]) == ["channel", "night_call"]
    cols = dict(
        query(
            cfg,
            "SELECT column_name, data_type FROM information_schema.columns "
            "WHERE table_name = 'decisions'",
        )
    )
    assert cols["night_call"] == "DOUBLE" and cols["channel"] == "VARCHAR"
    assert len(query(cfg, "SELECT * FROM store_versions")) == len(MIGRATIONS)


def test_a_changed_cue_type_is_a_user_error(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    doc = base_config()
    doc["cues"]["amount"] = {"type": "categorical", "levels": ["lo", "hi"], "reference": "lo"}
    write_config(cfg, doc)
    proc = run_cli(cfg, "init")
    out, err = text(proc)
    assert proc.returncode == 2, (out, err)
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "'amount'" in lines[0] and "categorical" in lines[0]
    # The failed migration left the column as it was.
    assert query(
        cfg,
        "SELECT data_type FROM information_schema.columns "
        "WHERE table_name = 'decisions' AND column_name = 'amount'",
    ) == [("DOUBLE",)]


def test_ingest_before_init_is_a_user_error(tmp_path):
    cfg = make_config(tmp_path)
    data = tmp_path / "d.csv"
    data.write_text("case_id\n", encoding="utf-8")
    proc = run_cli(cfg, "ingest", "--kind", "decisions", str(data))
    assert proc.returncode == 2
    assert "cuewatch init" in text(proc)[1]


def test_quote_ident_round_trips_awkward_names(tmp_path):
    import duckdb

    con = duckdb.connect()
    for name in ["plain", "with space", 'quote"inside', "semi;colon", "ünïcode"]:
        con.execute(f"CREATE TABLE {quote_ident(name)} (x INTEGER)")
    names = {
        r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()
    }
    assert names == {"plain", "with space", 'quote"inside', "semi;colon", "ünïcode"}


# --- connection rules -------------------------------------------------------------------

_HOLD_WRITER = textwrap.dedent(
    """
    import sys, time
    from monitor.config import load_config
    from monitor.store.connection import Store
    cfg = load_config(sys.argv[1])
    with Store(cfg).writer() as con:
        con.execute("SELECT count(*) FROM decisions").fetchone()
        print("held", flush=True)
        time.sleep(float(sys.argv[2]))
    print("released", flush=True)
    """
)


def _hold_writer(cfg: Path, seconds: float) -> subprocess.Popen:
    proc = subprocess.Popen(
        [sys.executable, "-c", _HOLD_WRITER, str(cfg), str(seconds)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        cwd=REPO,
        env={"PYTHONPATH": str(REPO), "PATH": "/usr/bin:/bin"},
    )
    assert proc.stdout.readline().strip() == b"held", proc.stderr.read()
    return proc


def test_second_writer_gives_up_after_lock_timeout(tmp_path):
    cfg = make_config(tmp_path, store__lock_timeout_s=1)
    _init_json(cfg)
    data = tmp_path / "d.csv"
    data.write_text("case_id\n", encoding="utf-8")
    holder = _hold_writer(cfg, 30)
    try:
        t0 = time.monotonic()
        proc = run_cli(cfg, "ingest", "--kind", "decisions", str(data), timeout=30)
        elapsed = time.monotonic() - t0
        out, err = text(proc)
        assert proc.returncode == 2, (out, err)
        assert "Traceback" not in err
        assert "lock" in err and f"pid {holder.pid}" in err, err
        assert elapsed < 10, elapsed  # 1 s lock timeout plus start-up on a loaded machine
    finally:
        holder.kill()
        holder.wait()


def test_reader_retries_while_the_writer_holds_the_file(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    holder = _hold_writer(cfg, 1.5)
    try:
        store = Store(load_config(cfg))
        t0 = time.monotonic()
        with store.reader(retry_s=20) as con:
            waited = time.monotonic() - t0
            assert con.execute("SELECT count(*) FROM decisions").fetchone() == (0,)
        # It could only open once the holder let go (about 1.5 s after "held").
        assert waited > 0.5, waited
        assert holder.wait(timeout=20) == 0
    finally:
        holder.kill()
        holder.wait()


def test_reader_gives_up_with_store_busy(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    holder = _hold_writer(cfg, 30)
    try:
        store = Store(load_config(cfg))
        t0 = time.monotonic()
        with pytest.raises(StoreBusy, match="busy"), store.reader(retry_s=0.5):
            pass
        assert time.monotonic() - t0 < 5
    finally:
        holder.kill()
        holder.wait()


def test_in_process_writer_lock_times_out(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    holder = _hold_writer(cfg, 30)
    try:
        store = Store(load_config(cfg))
        t0 = time.monotonic()
        with pytest.raises(StoreBusy), store.writer(timeout_s=0.3):
            pass
        assert time.monotonic() - t0 < 3
    finally:
        holder.kill()
        holder.wait()


def test_reader_on_a_missing_store_says_run_init(tmp_path):
    store = Store(load_config(make_config(tmp_path)))
    with pytest.raises(StoreMismatch, match="init"), store.reader():
        pass


# --- the table of applied migrations -------------------------------------------------------

_TABLES = "SELECT table_name FROM information_schema.tables WHERE table_schema = 'main'"
_HISTORY = "SELECT version, description, applied_at, software_version FROM {} ORDER BY version"


def _as_a_former_store(cfg: Path) -> list[tuple]:
    """Give an initialised store the migration table's former name, as stores made before
    the rename have it, and return that table's rows."""
    con = duckdb.connect(str(store_path(cfg)))
    try:
        con.execute("ALTER TABLE store_versions RENAME TO schema_migrations")
        return con.execute(_HISTORY.format("schema_migrations")).fetchall()
    finally:
        con.close()


def test_a_new_store_lists_its_migrations_in_store_versions(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    tables = {r[0] for r in query(cfg, _TABLES)}
    assert "store_versions" in tables and "schema_migrations" not in tables
    versions = [r[0] for r in query(cfg, _HISTORY.format("store_versions"))]
    assert versions == sorted(v for v, _, _ in MIGRATIONS)


def test_init_renames_a_former_migration_table_and_keeps_its_history(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    before = _as_a_former_store(cfg)
    assert len(before) == len(MIGRATIONS)
    # Until the next init, readers still find the store up to date (no "run init").
    proc = run_cli(cfg, "fits", "--json")
    assert proc.returncode == 0, text(proc)
    again = _init_json(cfg)
    assert again["applied"] == [] and again["schema_version"] == latest_version()
    tables = {r[0] for r in query(cfg, _TABLES)}
    assert "store_versions" in tables and "schema_migrations" not in tables
    assert query(cfg, _HISTORY.format("store_versions")) == before  # same rows, same times


def test_a_writer_that_checks_the_store_renames_a_former_migration_table(tmp_path):
    cfg = make_config(tmp_path)
    _init_json(cfg)
    before = _as_a_former_store(cfg)
    store = Store(load_config(cfg))
    with store.reader() as con:
        store.ensure_ready(con)  # a read-only check leaves the store as it is
    assert "schema_migrations" in {r[0] for r in query(cfg, _TABLES)}
    with store.writer() as con:
        store.ensure_ready(con)
    tables = {r[0] for r in query(cfg, _TABLES)}
    assert "store_versions" in tables and "schema_migrations" not in tables
    assert query(cfg, _HISTORY.format("store_versions")) == before
