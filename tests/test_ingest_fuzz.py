"""Property-based fuzzing of ingest with malformed records (hypothesis).

Whatever the rows hold - random text in any field, missing fields, extra delimiters,
stray quotes, unicode, blank lines - ingest must not crash, and every record read must
land in exactly one place: stored, quarantined or counted as a duplicate, with the
batch's counts matching the rows actually in the store.
"""

from __future__ import annotations

import atexit
import csv
import functools
import io
import json
import shutil
import tempfile
from datetime import UTC, datetime
from pathlib import Path

import duckdb
import pytest
from helpers.configs import DECISION_COLUMNS, OUTCOME_COLUMNS, make_config
from helpers.files import decision_row, outcome_row
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.ingest.checks import build_checks, reader_sql
from monitor.ingest.files import present_columns
from monitor.store.connection import Store

# Any unicode except lone surrogates (they cannot be encoded) and line breaks, which
# would split a raw line; line breaks inside quoted CSV fields are drawn separately.
_CHARS = st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\n")
_TEXT = st.text(_CHARS, max_size=12)
_SPICY = st.sampled_from(
    [
        "",
        " ",
        ",",
        ";",
        '"',
        '""',
        "'",
        "\t",
        "é",
        "名前",
        "🙂",
        "NaN",
        "inf",
        "-1e309",
        "1e3",
        "2024-02-30",
        "0x10",
        "a\nb",
        "\x00",
    ]
)


@st.composite
def _decision_record(draw, i: int) -> dict[str, str]:
    row = decision_row(i % 7)  # ids repeat so duplicates and conflicts occur
    for col in DECISION_COLUMNS:
        choice = draw(st.integers(0, 5))
        if choice == 0:
            row[col] = draw(_TEXT)
        elif choice == 1:
            row[col] = draw(_SPICY)
    return row


@st.composite
def _csv_file(draw) -> tuple[str, int, bool]:
    """(file text, records written, exact) - exact is False when a raw line holds a
    quote, which may legitimately swallow the lines after it into one bad record."""
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\r\n")
    w.writerow(DECISION_COLUMNS)
    n_records, exact = 0, True
    for i in range(draw(st.integers(0, 12))):
        kind = draw(st.sampled_from(["record", "record", "record", "blank", "raw", "extra"]))
        if kind == "record":
            rec = draw(_decision_record(i))
            w.writerow([rec[c] for c in DECISION_COLUMNS])
            n_records += 1
        elif kind == "blank":
            out.write("\r\n")
        elif kind == "raw":
            line = draw(_TEXT.filter(lambda s: s.strip() != ""))
            exact &= '"' not in line
            out.write(line + "\r\n")
            n_records += 1
        else:  # a valid record with extra delimiters appended
            rec = draw(_decision_record(i))
            out.write(
                ",".join(
                    rec[c].replace(",", "").replace('"', "").replace("\n", "")
                    for c in DECISION_COLUMNS
                )
            )
            out.write("," * draw(st.integers(1, 3)) + "\r\n")
            n_records += 1
    return out.getvalue(), n_records, exact


_JSON_VALUE = st.one_of(
    _TEXT,
    _SPICY,
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=False),
    st.none(),
    st.booleans(),
    st.lists(st.integers(), max_size=2),
)


@st.composite
def _jsonl_file(draw) -> tuple[str, int]:
    lines, n_records = [], 0
    for i in range(draw(st.integers(0, 12))):
        kind = draw(st.sampled_from(["record", "record", "record", "blank", "raw"]))
        if kind == "record":
            rec: dict = draw(_decision_record(i))
            for col in DECISION_COLUMNS:
                roll = draw(st.integers(0, 6))
                if roll == 0:
                    rec.pop(col)
                elif roll == 1:
                    rec[col] = draw(_JSON_VALUE)
            if draw(st.booleans()):
                rec[draw(_TEXT)] = draw(_JSON_VALUE)  # an unexpected key
            lines.append(json.dumps(rec, ensure_ascii=draw(st.booleans())))
            n_records += 1
        elif kind == "blank":
            lines.append(draw(st.sampled_from(["", " ", "\t"])))
        else:
            line = draw(_TEXT.filter(lambda s: s.strip() != ""))
            lines.append(line)
            n_records += 1
    return "\n".join(lines) + "\n", n_records


@functools.cache
def _template_store() -> Path:
    """An initialised, empty store for the test configuration, created once."""
    folder = Path(tempfile.mkdtemp(prefix="cuewatch-fuzz-"))
    atexit.register(shutil.rmtree, folder, True)
    store = Store(load_config(make_config(folder)))
    store.init()
    return store.path


def _ingest_and_check(text: str, suffix: str) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        cfg = load_config(make_config(Path(tmp)))
        store = Store(cfg)
        store.path.parent.mkdir(parents=True)
        shutil.copyfile(_template_store(), store.path)  # faster than init per example
        data = Path(tmp) / f"d{suffix}"
        data.write_text(text, encoding="utf-8")
        summary = ingest(cfg, [str(data)], kind="decisions")
        (result,) = summary.files
        assert result.status == "ingested", result.message
        assert result.accepted + result.quarantined + result.duplicates == result.rows_read
        assert sum(result.quarantine_reasons.values()) == result.quarantined
        with store.reader() as con:
            stored = con.execute(
                "SELECT count(*), count(DISTINCT decision_id) FROM decisions WHERE batch_id = ?",
                [result.batch_id],
            ).fetchone()
            quarantined = con.execute(
                "SELECT count(*), count(*) FILTER (WHERE raw_row IS NULL) FROM quarantine"
            ).fetchone()
        assert stored == (result.accepted, result.accepted)  # no id stored twice
        assert quarantined == (result.quarantined, 0)  # each keeps its raw record
        return {"rows_read": result.rows_read}


_FUZZ = settings(
    max_examples=50,
    deadline=None,
    # No shrinking: each example runs a real ingest (~0.1-0.3 s), and shrinking a
    # failure can take minutes; the failing example is printed as generated.
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


@_FUZZ
@given(_csv_file())
def test_fuzzed_csv_is_fully_accounted_for(sample):
    text, n_records, exact = sample
    got = _ingest_and_check(text, ".csv")["rows_read"]
    if exact:
        assert got == n_records
    else:
        assert got <= n_records


@_FUZZ
@given(_jsonl_file())
def test_fuzzed_jsonl_is_fully_accounted_for(sample):
    text, n_records = sample
    assert _ingest_and_check(text, ".jsonl")["rows_read"] == n_records


# --- the one-test pass for records that pass ------------------------------------------
# Staging settles most records with one test on their parsed values and runs the
# ordered checks only on the rest (monitor.ingest.checks.Checks.checked_sql).  The
# reason of every record must be the same as with the ordered checks alone.

# Values at the edges of the test configuration's checks: ranges (score 0-100, amount
# 0-1000), maps (Y/N, Yes/No, 0/1), levels, and the horizon / earliest dates used below.
_EDGE = {
    "number": ["0", "-0", "1", " 5 ", "1e3", "100", "100.0000001", "-1e-300", "1000",
               "1000.0000001", "inf", "-inf", "NaN", "0x10", "+7", "1_0"],
    "map": ["Y", "N", "y", " Y", "Yes", "No", "yes", "0", "1", "0.0", "2"],
    "level": ["north", "south", " north", "North", "a", "b", "c", "d", ""],
    "time": ["2024-06-01 00:00:00", "2024-06-01 00:00:01", "2024-05-31 23:59:59+00",
             "2000-01-01", "1999-12-31 23:59:59", "2024-02-30", "2024-06-01T00:00:00Z"],
}  # fmt: skip
_COLUMN_EDGE = {
    "decided": "time", "seen": "time", "score": "number", "amount": "number",
    "age_days": "number", "report": "map", "witness": "map", "result": "map",
    "region": "level", "band": "level",
}  # fmt: skip


@st.composite
def _edge_record(draw, kind: str) -> list[str]:
    """A valid record with zero, one or two fields replaced by a value at the edge of
    that field's checks (or, now and then, any text)."""
    row = (decision_row if kind == "decisions" else outcome_row)(draw(st.integers(0, 99)))
    columns = DECISION_COLUMNS if kind == "decisions" else OUTCOME_COLUMNS
    for c in draw(st.lists(st.sampled_from(columns), max_size=2)):
        edge = st.sampled_from(_EDGE[_COLUMN_EDGE.get(c, "level")])
        row[c] = draw(st.one_of(edge, edge, edge, _SPICY, _TEXT))
    return [row[c] for c in columns]


def _reasons(cfg, kind: str, path: Path, shortcut: bool) -> list:
    con = duckdb.connect()
    con.execute(f"SET TimeZone = '{cfg.decisions.timezone}'")
    checks = build_checks(cfg, kind)
    present = present_columns(con, cfg, path, "csv")
    sql = checks.checked_sql(
        reader_sql(cfg, path, "csv", checks.columns, present),
        "csv",
        horizon=datetime(2024, 6, 1, tzinfo=UTC),
        earliest="2000-01-01",
        shortcut=shortcut,
    )
    return con.execute(f"SELECT reason, message FROM ({sql})").fetchall()


def _same_both_ways(folder: Path, kind: str, columns: list[str], rows: list[list[str]]) -> list:
    """Write ``rows`` as a CSV file, stage it with and without the one-test pass and
    assert that every record gets the same reason and message; returns them."""
    cfg = load_config(make_config(folder))
    path = folder / "f.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(columns)
        w.writerows(rows)
    fast = _reasons(cfg, kind, path, shortcut=True)
    assert fast == _reasons(cfg, kind, path, shortcut=False)
    return fast


passed: list[int] = []


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def _same_reasons(data):
    kind = data.draw(st.sampled_from(["decisions", "outcomes"]))
    columns = DECISION_COLUMNS if kind == "decisions" else OUTCOME_COLUMNS
    rows = data.draw(st.lists(_edge_record(kind), min_size=1, max_size=20))
    with tempfile.TemporaryDirectory() as tmp:
        fast = _same_both_ways(Path(tmp), kind, columns, rows)
    passed.append(sum(reason is None for reason, _ in fast))


def test_the_one_test_pass_gives_the_same_reasons_as_the_ordered_checks():
    passed.clear()
    _same_reasons()
    assert sum(passed) > 20  # the examples include many records that pass


@pytest.mark.parametrize("kind", ["decisions", "outcomes"])
def test_every_single_edge_value_gets_the_same_reason_either_way(tmp_path, kind):
    """Each field of a valid record set to each of its edge values in turn (one fault
    per record): the one-test pass must agree with the ordered checks on every record."""
    columns = DECISION_COLUMNS if kind == "decisions" else OUTCOME_COLUMNS
    rows = []
    for c in columns:
        for value in [*_EDGE[_COLUMN_EDGE.get(c, "level")], "", " ", "x"]:
            row = (decision_row if kind == "decisions" else outcome_row)(len(rows))
            row[c] = value
            rows.append([row[k] for k in columns])
    fast = _same_both_ways(tmp_path, kind, columns, rows)
    reasons = {reason for reason, _ in fast}
    assert None in reasons and len(reasons) >= (8 if kind == "decisions" else 4)
