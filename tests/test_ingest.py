"""Ingest through the real command line into real DuckDB files: quarantine reasons,
the `ingest --json` summary, idempotency, late and corrected outcomes, file formats.

The expected figures are counted by hand from the crafted rows beside each check.
"""

from __future__ import annotations

import json

import pytest
from helpers.cli import ingest_json, run_cli, text
from helpers.configs import DECISION_COLUMNS, OUTCOME_COLUMNS, make_config
from helpers.files import decision_row, outcome_row, write_csv, write_jsonl, write_parquet
from helpers.store_rows import query

from monitor.ingest.checks import REASONS

# DESIGN.md, Contracts: "`ingest --json` prints one object: files (each with path, kind,
# status ... and its counts), and the totals accepted, quarantined, duplicates,
# skipped_files, and quarantine_reasons".  Keys may be added, never removed.
TOP_KEYS = {"files", "accepted", "quarantined", "duplicates", "skipped_files", "quarantine_reasons"}
FILE_KEYS = {"path", "kind", "status", "rows_read", "accepted", "quarantined", "duplicates"}


def _check_shape(doc: dict) -> None:
    assert TOP_KEYS <= doc.keys(), doc.keys()
    for key in ("accepted", "quarantined", "duplicates", "skipped_files"):
        assert isinstance(doc[key], int)
    assert isinstance(doc["quarantine_reasons"], dict)
    assert all(isinstance(v, int) and v > 0 for v in doc["quarantine_reasons"].values())
    for f in doc["files"]:
        assert FILE_KEYS <= f.keys(), f.keys()
        assert f["status"] in {"ingested", "skipped", "failed"}
        assert f["kind"] in {"decisions", "outcomes"}
        if f["status"] == "ingested":
            assert f["accepted"] + f["quarantined"] + f["duplicates"] == f["rows_read"]
    assert doc["accepted"] == sum(f["accepted"] for f in doc["files"])
    assert doc["quarantined"] == sum(f["quarantined"] for f in doc["files"])
    assert doc["duplicates"] == sum(f["duplicates"] for f in doc["files"])
    assert doc["skipped_files"] == sum(f["status"] == "skipped" for f in doc["files"])
    assert doc["quarantined"] == sum(doc["quarantine_reasons"].values())


# --- every quarantine reason ---------------------------------------------------------------


def _bad_decisions_csv(path):
    """One good row, then one row per reason code (config: judgment_range [0, 100])."""
    rows = [
        decision_row(1),  # line 2: accepted
        decision_row(2, decided="yesterday-ish"),  # 3 unparseable_timestamp
        decision_row(3, decided="2999-01-01 00:00"),  # 4 implausible_timestamp (future)
        decision_row(4, decided="1980-05-05 00:00"),  # 5 implausible_timestamp (too early)
        decision_row(5, handler=""),  # 6 missing_field
        decision_row(6, score="high"),  # 7 judgment_not_numeric
        decision_row(7, score="100.5"),  # 8 judgment_out_of_range
        decision_row(8, amount="12,5"),  # 9 cue_not_numeric
        decision_row(9, amount="1000.01"),  # 10 cue_out_of_range
        decision_row(10, report="yes"),  # 11 binary_not_in_map (values map Y/N)
        decision_row(11, witness="2"),  # 12 binary_not_in_map (no map: 0/1)
        decision_row(12, region="west"),  # 13 undeclared_level
        decision_row(1, score="99"),  # 14 conflicting_duplicate (c000001, other score)
    ]
    write_csv(path, rows)
    # Line 15: one field too many (CRLF like the csv module's lines: DuckDB's reader
    # rejects a whole file whose line endings are mixed).
    with open(path, "a", encoding="utf-8", newline="") as fh:
        fh.write(",".join(decision_row(13).values()) + ",surplus\r\n")


def test_every_reason_code_is_produced_and_counted(tmp_path):
    # Configuration A covers most codes; B swaps in the maps and ranges for the rest.
    cfg_a = make_config(tmp_path / "a")
    cfg_b = make_config(
        tmp_path / "b",
        decisions__judgment_values={"urgent": 1, "routine": 0},
        decisions__judgment_range=None,
        outcomes__criterion_values=None,
        outcomes__criterion_range=[0, 1],
    )
    for cfg in (cfg_a, cfg_b):
        assert run_cli(cfg, "init").returncode == 0

    _bad_decisions_csv(tmp_path / "a" / "d.csv")
    write_csv(tmp_path / "a" / "late.csv", [decision_row(20, decided="2024-03-05 10:00")])
    doc_a1 = ingest_json(
        cfg_a,
        "--kind",
        "decisions",
        str(tmp_path / "a" / "d.csv"),
        str(tmp_path / "a" / "late.csv"),
    )
    write_csv(
        tmp_path / "a" / "o.csv",
        [
            outcome_row(1),  # accepted
            outcome_row(1, result="Maybe"),  # criterion_not_in_map
            outcome_row(20, seen="2024-03-01 09:00:00"),  # outcome_before_decision
        ],
        OUTCOME_COLUMNS,
    )
    doc_a2 = ingest_json(cfg_a, "--kind", "outcomes", str(tmp_path / "a" / "o.csv"))

    write_csv(
        tmp_path / "b" / "d.csv",
        [decision_row(1, score="urgent"), decision_row(2, score="50")],  # 2nd: not in map
    )
    doc_b1 = ingest_json(cfg_b, "--kind", "decisions", str(tmp_path / "b" / "d.csv"))
    write_csv(
        tmp_path / "b" / "o.csv",
        [outcome_row(1, result="1"), outcome_row(1, result="Yes"), outcome_row(1, result="2")],
        OUTCOME_COLUMNS,
    )
    doc_b2 = ingest_json(cfg_b, "--kind", "outcomes", str(tmp_path / "b" / "o.csv"))

    # Configuration C declares a change column (corrections and retractions).
    cfg_c = make_config(tmp_path / "c", decisions__change="change")
    assert run_cli(cfg_c, "init").returncode == 0
    write_csv(
        tmp_path / "c" / "d.csv",
        [
            decision_row(1),  # accepted
            decision_row(2, age_days="1e200"),  # implausible_magnitude (no range)
            decision_row(3, change="undo"),  # unknown_change
            decision_row(4, change="correct"),  # unknown_decision: c000004 is not stored
        ],
        [*DECISION_COLUMNS, "change"],
    )
    doc_c1 = ingest_json(cfg_c, "--kind", "decisions", str(tmp_path / "c" / "d.csv"))

    for doc in (doc_a1, doc_a2, doc_b1, doc_b2, doc_c1):
        _check_shape(doc)
    assert doc_a1["quarantine_reasons"] == {
        "binary_not_in_map": 2,
        "conflicting_duplicate": 1,
        "cue_not_numeric": 1,
        "cue_out_of_range": 1,
        "implausible_timestamp": 2,
        "judgment_not_numeric": 1,
        "judgment_out_of_range": 1,
        "malformed_record": 1,
        "missing_field": 1,
        "undeclared_level": 1,
        "unparseable_timestamp": 1,
    }
    assert (doc_a1["accepted"], doc_a1["quarantined"], doc_a1["duplicates"]) == (2, 13, 0)
    assert doc_a2["quarantine_reasons"] == {"criterion_not_in_map": 1, "outcome_before_decision": 1}
    assert doc_b1["quarantine_reasons"] == {"judgment_not_in_map": 1}
    assert doc_b2["quarantine_reasons"] == {"criterion_not_numeric": 1, "criterion_out_of_range": 1}
    assert doc_c1["quarantine_reasons"] == {
        "implausible_magnitude": 1,
        "unknown_change": 1,
        "unknown_decision": 1,
    }
    seen = set()
    for doc in (doc_a1, doc_a2, doc_b1, doc_b2, doc_c1):
        seen |= doc["quarantine_reasons"].keys()
    assert seen == set(REASONS)  # every documented code, and no undocumented one

    # Stored rows: the reason, the source line and the raw record as JSON text.
    stored = query(
        cfg_a,
        "SELECT source_line, reason, raw_row FROM quarantine WHERE kind = 'decisions' "
        "ORDER BY source_line",
    )
    assert [(line, reason) for line, reason, _ in stored] == [
        (3, "unparseable_timestamp"),
        (4, "implausible_timestamp"),
        (5, "implausible_timestamp"),
        (6, "missing_field"),
        (7, "judgment_not_numeric"),
        (8, "judgment_out_of_range"),
        (9, "cue_not_numeric"),
        (10, "cue_out_of_range"),
        (11, "binary_not_in_map"),
        (12, "binary_not_in_map"),
        (13, "undeclared_level"),
        (14, "conflicting_duplicate"),
        (15, "malformed_record"),
    ]
    raw = {line: json.loads(r) for line, _, r in stored}
    assert raw[7]["score"] == "high" and raw[7]["case_id"] == "c000006"
    assert raw[9]["amount"] == "12,5"
    assert raw[15].endswith(",surplus")  # the unsplittable line, verbatim, as a JSON string
    messages = dict(
        query(cfg_a, "SELECT source_line, message FROM quarantine WHERE kind = 'decisions'")
    )
    assert messages[6] == "handler is empty"
    assert messages[7] == "score='high' is not a number"
    assert messages[10] == "amount='1000.01' is outside [0, 1000]"
    assert messages[12] == "witness='2' is not one of 0, 1"
    assert messages[13].startswith("region='west' is not a declared level")
    assert "line 2" in messages[14]
    assert all(m for m in messages.values())


# --- idempotency ---------------------------------------------------------------------------


def test_same_file_twice_is_skipped(config_path, tmp_path):
    data = write_csv(tmp_path / "d.csv", [decision_row(i) for i in range(5)])
    first = ingest_json(config_path, "--kind", "decisions", str(data))
    second = ingest_json(config_path, "--kind", "decisions", str(data))
    _check_shape(second)
    assert first["files"][0]["status"] == "ingested" and first["accepted"] == 5
    assert second["files"][0]["status"] == "skipped" and second["skipped_files"] == 1
    assert second["accepted"] == 0
    assert query(config_path, "SELECT count(*) FROM decisions") == [(5,)]
    assert query(config_path, "SELECT count(*) FROM batches") == [(1,)]


def test_same_ids_identical_content_in_a_new_file_are_duplicates(config_path, tmp_path):
    rows = [decision_row(i) for i in range(5)]
    ingest_json(config_path, "--kind", "decisions", str(write_csv(tmp_path / "a.csv", rows)))
    # Different bytes (column order reversed, padding spaces), identical content.
    again = [{k: f" {v} " for k, v in r.items()} for r in rows[:3]] + [decision_row(7)]
    b = write_csv(tmp_path / "b.csv", again, list(reversed(DECISION_COLUMNS)))
    doc = ingest_json(config_path, "--kind", "decisions", str(b))
    _check_shape(doc)
    assert (doc["accepted"], doc["duplicates"], doc["quarantined"]) == (1, 3, 0)
    assert query(config_path, "SELECT count(*) FROM decisions") == [(6,)]


def test_conflicting_ids_are_quarantined_and_the_stored_row_kept(config_path, tmp_path):
    ingest_json(
        config_path,
        "--kind",
        "decisions",
        str(write_csv(tmp_path / "a.csv", [decision_row(1, score="40")])),
    )
    before = query(config_path, "SELECT * EXCLUDE (ingested_at) FROM decisions")
    doc = ingest_json(
        config_path,
        "--kind",
        "decisions",
        str(write_csv(tmp_path / "b.csv", [decision_row(1, score="41")])),
    )
    assert doc["quarantine_reasons"] == {"conflicting_duplicate": 1}
    assert doc["accepted"] == 0
    assert query(config_path, "SELECT * EXCLUDE (ingested_at) FROM decisions") == before
    assert query(config_path, "SELECT judgment FROM decisions") == [(40.0,)]


# --- outcomes ------------------------------------------------------------------------------


def test_outcome_before_its_decision_links_once_the_decision_arrives(config_path, tmp_path):
    o = write_csv(tmp_path / "o.csv", [outcome_row(1, result="Yes")], OUTCOME_COLUMNS)
    doc = ingest_json(config_path, "--kind", "outcomes", str(o))
    assert doc["accepted"] == 1
    assert query(config_path, "SELECT count(*) FROM decisions_with_outcome") == [(0,)]
    d = write_csv(tmp_path / "d.csv", [decision_row(1), decision_row(2)])
    ingest_json(config_path, "--kind", "decisions", str(d))
    linked = query(
        config_path,
        "SELECT decision_id, criterion FROM decisions_with_outcome ORDER BY decision_id",
    )
    assert linked == [("c000001", 1.0), ("c000002", None)]


def test_latest_correction_wins_and_history_is_kept(config_path, tmp_path):
    ingest_json(
        config_path,
        "--kind",
        "decisions",
        str(write_csv(tmp_path / "d.csv", [decision_row(1), decision_row(2)])),
    )
    first = [outcome_row(1, result="Yes"), outcome_row(2, result="No")]
    ingest_json(
        config_path,
        "--kind",
        "outcomes",
        str(write_csv(tmp_path / "o1.csv", first, OUTCOME_COLUMNS)),
    )
    # A later file corrects case 1; within it case 2 is corrected twice (last line wins).
    second = [
        outcome_row(1, result="No", seen="2024-03-02 09:00:00"),
        outcome_row(2, result="Yes", seen="2024-03-03 09:00:00"),
        outcome_row(2, result="No", seen="2024-03-04 09:00:00"),
        outcome_row(2, result="No", seen="2024-03-04 09:00:00"),  # re-delivery: duplicate
    ]
    doc = ingest_json(
        config_path,
        "--kind",
        "outcomes",
        str(write_csv(tmp_path / "o2.csv", second, OUTCOME_COLUMNS)),
    )
    assert (doc["accepted"], doc["duplicates"]) == (3, 1)
    current = query(
        config_path, "SELECT decision_id, criterion FROM current_outcomes ORDER BY decision_id"
    )
    assert current == [("c000001", 0.0), ("c000002", 0.0)]
    history = query(
        config_path,
        "SELECT decision_id, criterion FROM outcomes ORDER BY decision_id, ingested_at, source_line",
    )
    assert history == [
        ("c000001", 1.0),
        ("c000001", 0.0),
        ("c000002", 0.0),
        ("c000002", 1.0),
        ("c000002", 0.0),
    ]
    assert query(
        config_path,
        "SELECT criterion FROM decisions_with_outcome WHERE decision_id = 'c000001'",
    ) == [(0.0,)]


# --- formats -------------------------------------------------------------------------------


def test_csv_with_semicolons_and_latin1(tmp_path):
    cfg = make_config(tmp_path, ingest={"delimiter": ";", "encoding": "latin-1"})
    assert run_cli(cfg, "init").returncode == 0
    rows = [decision_row(1, handler="Zoë Müller", amount="12.5"), decision_row(2, team="Ærø")]
    data = write_csv(tmp_path / "d.csv", rows, delimiter=";", encoding="latin-1")
    assert "ë".encode("latin-1") in data.read_bytes()  # truly latin-1 on disk
    doc = ingest_json(cfg, "--kind", "decisions", str(data))
    assert doc["accepted"] == 2, doc
    assert query(cfg, "SELECT decision_maker, amount FROM decisions ORDER BY decision_id") == [
        ("Zoë Müller", 12.5),
        ("h2", float(decision_row(2)["amount"])),
    ]
    assert query(cfg, "SELECT team FROM decisions WHERE decision_id = 'c000002'") == [("Ærø",)]


def test_jsonl_with_blank_and_malformed_lines(config_path, tmp_path):
    good = decision_row(1)
    numeric = {**decision_row(2), "score": 55, "amount": 12.25, "witness": 1}  # JSON numbers
    data = write_jsonl(
        tmp_path / "d.jsonl",
        [good, "", "   ", "{not json", numeric, "[1, 2]", {"case_id": "c000009"}, ""],
    )
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    _check_shape(doc)
    f = doc["files"][0]
    assert (f["rows_read"], f["accepted"], f["quarantined"]) == (5, 2, 3)  # blanks not records
    assert f["quarantine_reasons"] == {"malformed_record": 2, "missing_field": 1}
    assert query(config_path, "SELECT source_line, reason, raw_row FROM quarantine ORDER BY 1") == [
        (4, "malformed_record", json.dumps("{not json")),
        (6, "malformed_record", json.dumps("[1, 2]")),
        (7, "missing_field", '{"case_id": "c000009"}'),
    ]
    assert query(
        config_path, "SELECT decision_id, source_line, judgment, amount FROM decisions ORDER BY 1"
    ) == [("c000001", 1, float(good["score"]), float(good["amount"])), ("c000002", 5, 55.0, 12.25)]


def test_parquet_with_native_types(config_path, tmp_path):
    import datetime as dt

    rows = [
        {
            **decision_row(1),
            "decided": dt.datetime(2024, 1, 5, 9, 30),
            "score": 42.0,
            "amount": 100.0,
            "age_days": 3,
            "witness": 1,
        },
        {
            **decision_row(2),
            "decided": dt.datetime(2024, 1, 6, 9, 30),
            "score": 142.0,
            "amount": 100.0,
            "age_days": 3,
            "witness": 0,
        },
    ]
    data = write_parquet(tmp_path / "d.parquet", rows, DECISION_COLUMNS)
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    assert (doc["accepted"], doc["quarantine_reasons"]) == (1, {"judgment_out_of_range": 1})
    got = query(config_path, "SELECT decision_id, decided_at, judgment, witness FROM decisions")
    assert got[0][0] == "c000001" and got[0][2:] == (42.0, 1.0)
    assert got[0][1] == dt.datetime(2024, 1, 5, 9, 30, tzinfo=dt.UTC)
    # Parquet has no lines: source_line is the 1-based record number.
    assert query(config_path, "SELECT source_line FROM quarantine") == [(2,)]


def test_stdin_with_kind(config_path):
    lines = "\n".join(json.dumps(decision_row(i)) for i in range(3)) + "\n"
    doc = ingest_json(config_path, "--kind", "decisions", "-", stdin=lines.encode())
    assert doc["files"][0]["path"] == "-" and doc["accepted"] == 3
    assert query(config_path, "SELECT count(*) FROM decisions") == [(3,)]


def test_stdin_without_kind_is_a_user_error(config_path):
    proc = run_cli(config_path, "ingest", "-", stdin=b"{}\n")
    assert proc.returncode == 2 and "--kind" in text(proc)[1]


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_missing_required_column_fails_the_file(config_path, tmp_path, fmt):
    cols = [c for c in DECISION_COLUMNS if c != "witness"]
    rows = [decision_row(i) for i in range(3)]
    good = write_csv(tmp_path / "good.csv", [decision_row(9)])
    bad = (
        write_csv(tmp_path / "bad.csv", rows, cols)
        if fmt == "csv"
        else write_parquet(tmp_path / "bad.parquet", rows, cols)
    )
    proc = run_cli(config_path, "ingest", "--json", "--kind", "decisions", str(good), str(bad))
    out, err = text(proc)
    assert proc.returncode == 2, (out, err)
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "'witness'" in lines[0] and bad.name in lines[0]
    doc = json.loads(out)
    statuses = {f["path"]: f["status"] for f in doc["files"]}
    assert statuses == {str(good): "ingested", str(bad): "failed"}
    # Nothing from the failed file is stored; its attempt is recorded as a failed batch.
    assert query(config_path, "SELECT decision_id FROM decisions") == [("c000009",)]
    assert query(config_path, "SELECT count(*) FROM quarantine") == [(0,)]
    assert query(config_path, "SELECT status FROM batches ORDER BY batch_id") == [
        ("ingested",),
        ("failed",),
    ]


def test_landing_folders_are_the_default(config_path, tmp_path):
    write_csv(tmp_path / "landing" / "decisions" / "2024-01.csv", [decision_row(1)])
    write_csv(tmp_path / "landing" / "outcomes" / "2024-03.csv", [outcome_row(1)], OUTCOME_COLUMNS)
    doc = ingest_json(config_path)
    assert sorted((f["kind"], f["status"]) for f in doc["files"]) == [
        ("decisions", "ingested"),
        ("outcomes", "ingested"),
    ]
    assert query(config_path, "SELECT criterion FROM decisions_with_outcome") == [(1.0,)]


# --- known limits of the CSV reader, kept visible -------------------------------------------


@pytest.mark.xfail(
    strict=True,
    raises=AssertionError,
    reason="DuckDB skips blank CSV lines, so later line numbers shift (DEVELOPERS.md, Ingest)",
)
def test_csv_line_numbers_count_blank_lines(config_path, tmp_path):
    data = write_csv(tmp_path / "d.csv", [decision_row(1)])
    with open(data, "a", encoding="utf-8", newline="") as fh:
        fh.write("\r\n")  # line 3: blank
        fh.write(",".join(decision_row(2, score="high").values()) + "\r\n")  # line 4
    ingest_json(config_path, "--kind", "decisions", str(data))
    assert query(config_path, "SELECT source_line FROM quarantine") == [(4,)]


@pytest.mark.xfail(
    strict=True,
    raises=AssertionError,
    reason="DuckDB's CSV reader rejects a file with mixed line ends",
)
def test_csv_with_mixed_line_endings_is_ingested(config_path, tmp_path):
    data = write_csv(tmp_path / "d.csv", [decision_row(1)])  # CRLF lines
    with open(data, "a", encoding="utf-8", newline="") as fh:
        fh.write(",".join(decision_row(2).values()) + "\n")  # an LF line appended
    doc = ingest_json(config_path, "--kind", "decisions", str(data))
    assert doc["files"][0]["status"] == "ingested" and doc["accepted"] == 2
