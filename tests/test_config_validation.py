"""Settings a user can get wrong are refused in one sentence that names the key (or the
path), exit code 2, never a traceback: the CSV reader's settings, time zones, column
names and map keys, cue names the store already uses, the store's path, a header that
is not a header, and a quarter beyond the calendar."""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import base_config, make_config
from helpers.files import decision_row, write_csv
from helpers.store_rows import query

from monitor.cli import main


def _one_sentence(proc_or_result, *must_name: str) -> str:
    """The error line of a command that must have failed with exit code 2."""
    if hasattr(proc_or_result, "returncode"):
        code, (_, err) = proc_or_result.returncode, text(proc_or_result)
    else:
        code, err = proc_or_result.exit_code, proc_or_result.stderr
    assert code == 2, (code, err)
    assert "Traceback" not in err, err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    for name in must_name:
        assert name in lines[0], (name, lines[0])
    return lines[0]


def _init(cfg: Path):
    return CliRunner().invoke(main, ["--config", str(cfg), "init"])


# --- the reader's settings -------------------------------------------------------------------


@pytest.mark.parametrize(
    "key, value",
    [
        ("delimiter", ";;"),
        ("delimiter", ""),
        ("delimiter", '"'),
        ("delimiter", "\n"),
        ("encoding", "klingon-8"),
        ("encoding", "cp1252"),  # a real codec, but not one DuckDB's CSV reader decodes
        ("earliest", "yesterday"),
        ("earliest", "1990-13-01"),
        ("future_tolerance_hours", 1e300),
    ],
)
def test_a_bad_ingest_setting_is_refused_naming_it(tmp_path, key, value):
    cfg = make_config(tmp_path, ingest={key: value})
    _one_sentence(_init(cfg), f"ingest.{key}", str(cfg))


@pytest.mark.parametrize("alias", ["latin1", "ISO-8859-1", "L1"])
def test_an_encoding_alias_reads_the_file_as_that_encoding(tmp_path, alias):
    cfg = make_config(tmp_path, ingest={"encoding": alias})
    assert run_cli(cfg, "init").returncode == 0
    data = write_csv(tmp_path / "d.csv", [decision_row(1, handler="Zoë")], encoding="latin-1")
    doc = ingest_json(cfg, "--kind", "decisions", str(data))
    assert doc["accepted"] == 1, doc
    assert query(cfg, "SELECT decision_maker FROM decisions") == [("Zoë",)]


def test_an_earliest_time_with_an_offset_is_honoured(tmp_path):
    cfg = make_config(tmp_path, ingest={"earliest": "2024-01-03T00:00:00+00:00"})
    assert run_cli(cfg, "init").returncode == 0
    # decision_row(1) is decided on 2024-01-02, decision_row(2) on 2024-01-03.
    data = write_csv(tmp_path / "d.csv", [decision_row(1), decision_row(2)])
    doc = ingest_json(cfg, "--kind", "decisions", str(data))
    assert (doc["accepted"], doc["quarantine_reasons"]) == (1, {"implausible_timestamp": 1})


@pytest.mark.parametrize("zone", ["localtime", "posix/Europe/London", "right/UTC", "Mars/Olympus"])
@pytest.mark.parametrize("key", ["decisions.timezone", "outcomes.timezone", "schedule.timezone"])
def test_a_time_zone_the_store_cannot_use_is_refused(tmp_path, zone, key):
    cfg = make_config(tmp_path, **{key.replace(".", "__"): zone})
    _one_sentence(_init(cfg), key, str(cfg))


# --- names from the configuration ---------------------------------------------------------


@pytest.mark.parametrize(
    "key, value",
    [
        ("decisions__id", ""),
        ("decisions__judgment", " score"),
        ("outcomes__criterion", "result "),
        ("decisions__judgment_values", {"Yes ": 1, "No": 0}),
        ("outcomes__criterion_values", {"": 1, "No": 0}),
        ("cues", {"amount": {"type": "numeric", "column": "  "}}),
        ("cues", {"report": {"type": "binary", "values": {" Y": 1, "N": 0}}}),
        (
            "cues",
            {"band": {"type": "categorical", "levels": ["a", "b "], "reference": "a"}},
        ),
    ],
)
def test_a_name_that_could_never_match_is_refused(tmp_path, key, value):
    cfg = make_config(tmp_path, **{key: value})
    first = key.split("__")[0]
    _one_sentence(_init(cfg), first, str(cfg))


def _store_columns(cfg: Path) -> set[str]:
    """Every column name of the tables and views that sit beside the cue columns, read
    from a real store (not from the code that validates the configuration)."""
    con = duckdb.connect(str(Path(cfg).parent / "store" / "cuewatch.duckdb"), read_only=True)
    try:
        views = [
            r[0]
            for r in con.execute(
                "SELECT view_name FROM duckdb_views() WHERE NOT internal"
            ).fetchall()
        ]
        # The findings' views never share a query with the cue columns.
        views = [v for v in views if v not in ("policy_findings", "policy_proxy_parts")]
        names = set()
        for t in ["decisions", "outcomes", *views]:
            names |= {d[0] for d in con.execute(f'SELECT * FROM "{t}" LIMIT 0').description}
        return names
    finally:
        con.close()


def test_every_column_the_store_uses_is_refused_as_a_cue_name(tmp_path):
    plain = make_config(tmp_path / "plain")
    assert run_cli(plain, "init").returncode == 0
    cue_names = set(base_config()["cues"])
    used = _store_columns(plain) - cue_names
    # The columns the issue named must be among them.
    assert {"criterion", "observed_at", "outcome_ingested_at", "decision_id"} <= used
    for name in sorted(used) + ["Criterion", "OBSERVED_AT"]:
        cues = {**base_config()["cues"], name: {"type": "numeric"}}
        cfg = make_config(tmp_path / name, cues=cues)
        _one_sentence(_init(cfg), f"cues.{name}", str(cfg))


def test_cue_names_that_differ_only_in_case_are_refused(tmp_path):
    cues = {**base_config()["cues"], "Amount": {"type": "numeric"}}
    cfg = make_config(tmp_path, cues=cues)
    _one_sentence(_init(cfg), "cues.Amount", "'amount'", str(cfg))


# --- the store's path ------------------------------------------------------------------------


def _store_at(tmp_path: Path, where: str) -> Path:
    return make_config(tmp_path, store={"path": where, "lock_timeout_s": 2.0})


@pytest.mark.parametrize("command", [["init"], ["ingest"], ["refit"], ["fits", "--json"]])
@pytest.mark.parametrize(
    "case", ["folder", "under_a_file", "not_duckdb", "truncated", "unwritable"]
)
def test_a_store_path_that_cannot_hold_a_store_is_named(tmp_path, case, command):
    if case == "folder":
        (tmp_path / "st").mkdir()
        where = str(tmp_path / "st")
    elif case == "under_a_file":
        (tmp_path / "st").write_text("a file", encoding="utf-8")
        where = str(tmp_path / "st" / "cw.duckdb")
    elif case == "not_duckdb":
        (tmp_path / "cw.duckdb").write_bytes(b"SQLite format 3\x00" + b"\x00" * 4096)
        where = str(tmp_path / "cw.duckdb")
    elif case == "truncated":
        good = _store_at(tmp_path / "good", str(tmp_path / "cw.duckdb"))
        assert run_cli(good, "init").returncode == 0
        whole = (tmp_path / "cw.duckdb").read_bytes()
        (tmp_path / "cw.duckdb").write_bytes(whole[: len(whole) // 3])
        where = str(tmp_path / "cw.duckdb")
    else:
        # Even root cannot create folders in sysfs; chmod does not stop root.
        assert os.path.isdir("/sys") and not os.path.exists("/sys/cuewatch-test")
        where = "/sys/cuewatch-test/cw.duckdb"
    cfg = _store_at(tmp_path, where)
    result = CliRunner().invoke(main, ["--config", str(cfg), *command])
    if case == "unwritable" and command[0] == "fits":
        _one_sentence(result, where, "does not exist")  # readers never create it
    else:
        _one_sentence(result, where, "store.path")


# --- files and arguments ---------------------------------------------------------------------


def test_a_ten_megabyte_header_fails_the_file_in_one_sentence(config_path, tmp_path):
    data = tmp_path / "d.csv"
    row = decision_row(1)
    with open(data, "w", encoding="utf-8") as fh:
        fh.write(",".join(row) + "," + "x" * 10_000_000 + "\n")
        fh.write(",".join(row.values()) + ",\n")
    proc = run_cli(config_path, "ingest", "--kind", "decisions", str(data))
    line = _one_sentence(proc, str(data), "header")
    assert "line 1" in line
    assert query(config_path, "SELECT status FROM batches") == [("failed",)]


@pytest.mark.parametrize("quarter", ["9999Q4", "0999Q1", "0000Q4"])
def test_a_quarter_at_the_ends_of_the_calendar_is_one_sentence(config_path, tmp_path, quarter):
    result = CliRunner().invoke(
        main, ["--config", str(config_path), "export", "--quarter", quarter, "--out", str(tmp_path)]
    )
    _one_sentence(result, quarter)


def test_the_written_out_reserved_names_are_what_the_migrations_create():
    # The configuration checks against a written-out set (no database per load); it must
    # stay equal to the columns the migrations really create.
    from monitor.store.rules import RESERVED_COLUMN_NAMES
    from monitor.store.schema import reserved_column_names

    assert RESERVED_COLUMN_NAMES == reserved_column_names()
