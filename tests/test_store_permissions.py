"""Who can read what cuewatch writes (issue #13, item 16): the store, its WAL and lock, the
alert file and the audit exports are created owner-only (0600 files, 0700 folders) under a
permissive umask, unless ``store.file_mode`` says otherwise; `init` tightens an older
store; bad modes are one-sentence configuration errors.

Modes are read with os.stat, the kernel's own account, never from cuewatch.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pytest
from helpers.cli import run_cli, text
from helpers.configs import make_config
from helpers.files import decision_row, write_csv

from monitor.config import ConfigError, load_config
from monitor.store.connection import Store
from monitor.store.rules import utc_now


def mode(path: Path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.fixture(autouse=True)
def permissive_umask():
    """The common default umask (022), under which files used to come out 0644 / 0755;
    the test's subprocesses inherit it."""
    old = os.umask(0o022)
    yield
    os.umask(old)


def _ok(proc) -> None:
    assert proc.returncode == 0, text(proc)


def _plant_pending_delivery(cfg_path: Path) -> None:
    """One open alert with a queued file-sink notification, as `assess` leaves them."""
    config = load_config(cfg_path)
    now = utc_now()
    with Store(config).writer() as con:
        con.execute(
            "INSERT INTO alerts (alert_id, kind, scope, decision_maker, team, cue, state, "
            "opened_at, opened_window_end, evidence, updated_at) VALUES (nextval('alert_ids'), "
            "'forbidden_cue', 'decision_maker', 'h1', 't1', 'region', 'open', ?, "
            "DATE '2024-01-28', '{}', ?)",
            [now, now],
        )
        con.execute(
            "INSERT INTO alert_deliveries (alert_id, event, sink, status, attempts, created_at) "
            "SELECT max(alert_id), 'opened', 'file', 'pending', 0, ? FROM alerts",
            [now],
        )


def _pipeline(tmp_path: Path, **overrides) -> Path:
    cfg = make_config(tmp_path, alerts={"file": "out/alerts.jsonl"}, **overrides)
    _ok(run_cli(cfg, "init"))
    write_csv(tmp_path / "in" / "d.csv", [decision_row(i) for i in range(300)])
    _ok(run_cli(cfg, "ingest", "--kind", "decisions", str(tmp_path / "in" / "d.csv")))
    _ok(run_cli(cfg, "refit"))
    _plant_pending_delivery(cfg)
    _ok(run_cli(cfg, "assess"))
    _ok(run_cli(cfg, "export", "--quarter", "2024Q1", "--out", str(tmp_path / "pack"),
                "--format", "csv,parquet,xlsx,html"))  # fmt: skip
    return cfg


def test_store_lock_alert_file_and_exports_are_owner_only_by_default(tmp_path):
    cfg = _pipeline(tmp_path)
    store = Path(load_config(cfg).store.path)
    assert mode(store.parent) == 0o700  # created by cuewatch (store/)
    assert mode(store) == 0o600
    assert mode(store.with_name(store.name + ".lock")) == 0o600
    alerts = tmp_path / "out" / "alerts.jsonl"
    assert json.loads(alerts.read_text().splitlines()[0])["decision_maker"] == "h1"
    assert mode(alerts) == 0o600 and mode(alerts.parent) == 0o700
    pack = tmp_path / "pack"
    files = sorted(pack.iterdir())
    assert {p.suffix for p in files} >= {".csv", ".parquet", ".xlsx", ".html", ".json", ".txt"}
    assert mode(pack) == 0o700
    assert {p.name: mode(p) for p in files} == {p.name: 0o600 for p in files}
    # Everything else the commands left beside the store (delivery lock, ...) too.
    assert {p.name: mode(p) for p in store.parent.iterdir()} == {
        p.name: 0o600 for p in store.parent.iterdir()
    }


def test_the_wal_is_owner_only_while_a_writer_has_it(tmp_path):
    config = load_config(make_config(tmp_path))
    store = Store(config)
    store.init()
    with store.writer() as con:
        con.execute("CREATE TABLE scratch AS SELECT range AS i FROM range(100000)")
        wal = store.path.with_name(store.path.name + ".wal")
        assert wal.exists()  # DuckDB keeps the change in the WAL until the checkpoint
        assert mode(wal) == 0o600
    assert os.umask(0o022) == 0o022  # the writer restored the process umask


def test_a_configured_mode_is_used_instead(tmp_path):
    cfg = make_config(tmp_path, store__file_mode="0640")
    _ok(run_cli(cfg, "init"))
    store = Path(load_config(cfg).store.path)
    assert mode(store) == 0o640 and mode(store.parent) == 0o750


def test_init_tightens_a_store_created_before_the_rule(tmp_path):
    cfg = make_config(tmp_path)
    _ok(run_cli(cfg, "init"))
    store = Path(load_config(cfg).store.path)
    lock = store.with_name(store.name + ".lock")
    os.chmod(store, 0o644)
    os.chmod(lock, 0o644)
    _ok(run_cli(cfg, "init"))
    assert mode(store) == 0o600 and mode(lock) == 0o600


def test_init_on_a_mistaken_folder_path_leaves_the_folder_as_it_was(tmp_path):
    cfg = make_config(tmp_path)
    folder = Path(load_config(cfg).store.path)
    folder.mkdir(parents=True)
    os.chmod(folder, 0o755)
    (folder / "notes.txt").write_text("someone's")
    run_cli(cfg, "init")  # fails one way or another: the path is a folder
    assert mode(folder) == 0o755


@pytest.mark.parametrize(
    ("value", "expect"),
    [("0o640", 0o640), ("600", 0o600), ("0660", 0o660), (0o644, 0o644)],
)
def test_file_mode_spellings(tmp_path, value, expect):
    assert load_config(make_config(tmp_path, store__file_mode=value)).store.file_mode == expect


@pytest.mark.parametrize(
    "value",
    ["0o700", "0o400", 600, "rw-------", "0o1600", "", True],
)
def test_bad_file_modes_are_one_sentence_naming_the_key(tmp_path, value):
    cfg = make_config(tmp_path, store__file_mode=value)
    with pytest.raises(ConfigError) as err:
        load_config(cfg)
    message = str(err.value)
    assert "store.file_mode" in message and str(cfg) in message and "\n" not in message
    proc = run_cli(cfg, "init")
    assert proc.returncode == 2 and "Traceback" not in text(proc)[1]
