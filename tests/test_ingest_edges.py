"""Every configured range and value map at its edges: the quarantine reason (or the
stored value) a record gets when one field sits exactly on a bound, one ulp or 0.001
inside it, or one ulp or 0.001 outside it; and, for a map, each key as written, trimmed,
in another case, cut short, and the number it maps to.

The expected reasons are the configuration's own words (DESIGN.md: ``range`` and
``judgment_range`` are closed intervals, "outside -> quarantined"; a map's keys are
exact text), worked out by hand below, never by the code under test.  Each case is
checked twice: through a real ingest (which settles passing records with one test
and runs the ordered checks only on the others) and through the ordered checks alone,
so a bound made half-open in either place fails here.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import duckdb
import pytest
from helpers.configs import DECISION_COLUMNS, OUTCOME_COLUMNS, make_config
from helpers.files import decision_row, outcome_row

from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.ingest.checks import build_checks, reader_sql
from monitor.ingest.files import present_columns
from monitor.store.connection import Store

ACCEPT = None  # expected reason of a record that is stored
NOW = datetime(2024, 6, 1, tzinfo=UTC)  # after every timestamp of decision_row / outcome_row


def _up(x: float) -> float:
    return math.nextafter(x, math.inf)


def _down(x: float) -> float:
    return math.nextafter(x, -math.inf)


def _range_edges(lo: float, hi: float, reason: str) -> Iterator[tuple[str, str | None, float]]:
    """(text, expected reason, stored value) around the closed interval [lo, hi]."""
    inside = [lo, hi, _up(lo), _down(hi), lo + 0.001, hi - 0.001]
    outside = [_down(lo), _up(hi), lo - 0.001, hi + 0.001]
    for x in inside:
        yield repr(x), ACCEPT, x  # repr: the shortest text that reads back as x
    for x in outside:
        yield repr(x), reason, math.nan
    # The same bounds written differently (the cast ignores surrounding spaces).
    yield f" {lo!r} ", ACCEPT, lo
    yield f"{hi:.6e}", ACCEPT, hi


def _map_edges(
    values: dict[str, float], reason: str
) -> Iterator[tuple[str, str | None, float | str]]:
    """(text, expected reason, stored value) for a text -> number map (or a list of
    levels, given as {level: level}): keys match exactly, after trimming the field."""
    keys = set(values)
    for key, value in values.items():
        yield key, ACCEPT, value
        yield f"  {key} ", ACCEPT, value
        numbers = [str(value), f"{value:g}"] if isinstance(value, float) else []
        for near in (key.upper(), key.lower(), key[:-1], key + key[-1], *numbers):
            if near not in keys and near.strip():
                yield near, reason, math.nan
    yield "", "missing_field", math.nan


# One configuration per row family; each entry: (field, edges).  The overrides change
# the small test configuration (tests/helpers/configs.py) so that every kind of bound occurs:
# a negative and fractional lower bound, a mapped judgment whose map reaches outside
# judgment_range, a numeric criterion with a range.
DECISIONS_NUMERIC = {
    "overrides": {
        "decisions__judgment_range": [0, 100],
        "cues__amount": {"type": "numeric", "range": [-2.5, 1000.25]},
    },
    "fields": {
        "score": list(_range_edges(0.0, 100.0, "judgment_out_of_range")),
        "amount": list(_range_edges(-2.5, 1000.25, "cue_out_of_range")),
        "report": list(_map_edges({"Y": 1.0, "N": 0.0}, "binary_not_in_map")),
        "region": list(_map_edges({"north": "north", "south": "south"}, "undeclared_level")),
        "band": list(_map_edges({"a": "a", "b": "b", "c": "c"}, "undeclared_level")),
        # A binary cue without a map takes the numbers 0 and 1 only.
        "witness": [
            ("0", ACCEPT, 0.0),
            ("1", ACCEPT, 1.0),
            ("1.0", ACCEPT, 1.0),
            (" 1 ", ACCEPT, 1.0),
            ("-0", ACCEPT, 0.0),
            (repr(_up(1.0)), "binary_not_in_map", math.nan),
            (repr(_up(0.0)), "binary_not_in_map", math.nan),
            ("0.999", "binary_not_in_map", math.nan),
            ("2", "binary_not_in_map", math.nan),
            ("-1", "binary_not_in_map", math.nan),
            ("", "missing_field", math.nan),
        ],  # fmt: skip
        # A numeric cue without a range takes any finite number up to [ingest]
        # max_magnitude (default 1e15) in magnitude, the bound included.
        "age_days": [
            ("-1e15", ACCEPT, -1e15),
            ("1e15", ACCEPT, 1e15),
            (repr(_up(1e15)), "implausible_magnitude", math.nan),
            ("-1e300", "implausible_magnitude", math.nan),
            ("1e300", "implausible_magnitude", math.nan),
            ("inf", "cue_not_numeric", math.nan),
            ("", "missing_field", math.nan),
        ],  # fmt: skip
    },
}
DECISIONS_MAPPED = {
    "overrides": {
        "decisions__judgment_values": {"High": 100, "Mid": 50.5, "Low": -1, "Top": 100.001},
        "decisions__judgment_range": [0, 100],
    },
    "fields": {
        "score": [
            *(e for e in _map_edges({"High": 100.0, "Mid": 50.5}, "judgment_not_in_map")),
            # In the map but mapped outside judgment_range: the range still applies.
            ("Low", "judgment_out_of_range", math.nan),
            ("Top", "judgment_out_of_range", math.nan),
            ("-1", "judgment_not_in_map", math.nan),
        ],
    },
}
OUTCOMES_MAPPED = {
    "overrides": {},  # criterion_values = { Yes = 1, No = 0 }
    "fields": {"result": list(_map_edges({"Yes": 1.0, "No": 0.0}, "criterion_not_in_map"))},
}
OUTCOMES_NUMERIC = {
    "overrides": {"outcomes__criterion_values": None, "outcomes__criterion_range": [0, 1]},
    "fields": {
        "result": [
            *_range_edges(0.0, 1.0, "criterion_out_of_range"),
            ("Yes", "criterion_not_numeric", math.nan),
        ]
    },
}
CASES = {
    "decisions_numeric": ("decisions", DECISIONS_NUMERIC),
    "decisions_mapped": ("decisions", DECISIONS_MAPPED),
    "outcomes_mapped": ("outcomes", OUTCOMES_MAPPED),
    "outcomes_numeric": ("outcomes", OUTCOMES_NUMERIC),
}


def _write_case(folder: Path, kind: str, case: dict) -> tuple[Path, list[tuple]]:
    """One CSV file with one record per edge value (each record otherwise valid);
    returns the file and [(record id, field, text, reason, value)]."""
    columns = DECISION_COLUMNS if kind == "decisions" else OUTCOME_COLUMNS
    make_row = decision_row if kind == "decisions" else outcome_row
    rows, expected = [], []
    for field, edges in case["fields"].items():
        for text, reason, value in edges:
            i = len(rows)
            row = make_row(i, **{field: text})
            if kind == "decisions" and field != "score":
                row["score"] = "50"  # decision_row's own scores stay inside [0, 100] anyway
            rows.append(row)
            expected.append((row["case_id"], field, text, reason, value))
    path = folder / f"{kind}.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    return path, expected


def _ordered_reasons(cfg, kind: str, path: Path) -> list[str | None]:
    """The reason of every record from the ordered checks alone (no one-test pass)."""
    con = duckdb.connect()
    try:
        con.execute(f"SET TimeZone = '{cfg.decisions.timezone}'")
        checks = build_checks(cfg, kind)
        present = present_columns(con, cfg, path, "csv")
        sql = checks.checked_sql(
            reader_sql(cfg, path, "csv", checks.columns, present),
            "csv",
            horizon=NOW,
            earliest=cfg.ingest.earliest,
            shortcut=False,
        )
        return [r for (r,) in con.execute(f"SELECT reason FROM ({sql})").fetchall()]
    finally:
        con.close()


_STORED = {
    "score": "judgment",
    "result": "criterion",
}


def _same(got, want) -> bool:
    if isinstance(want, str):
        return got == want
    if isinstance(want, float) and math.isnan(want):
        return got is None
    return got is not None and float(got) == want


@pytest.mark.parametrize("name", list(CASES))
def test_every_range_and_map_edge_gets_its_expected_reason(tmp_path, name):
    kind, case = CASES[name]
    cfg_path = make_config(tmp_path, **case["overrides"])
    cfg = load_config(cfg_path)
    Store(cfg).init()
    path, expected = _write_case(tmp_path, kind, case)

    summary = ingest(cfg, [str(path)], kind=kind, now=NOW)
    (result,) = summary.files
    assert result.status == "ingested", result.message
    con = duckdb.connect(str(cfg.store.path), read_only=True)
    try:
        quarantined = dict(
            con.execute(
                "SELECT record_id, reason FROM quarantine WHERE kind = ?", [kind]
            ).fetchall()
        )
        table = "decisions" if kind == "decisions" else "outcomes"
        fields = sorted(case["fields"])
        stored_cols = ", ".join(
            f'"{_STORED.get(f, f)}"' if kind == "decisions" or f in _STORED else "NULL"
            for f in fields
        )
        stored = {
            row[0]: dict(zip(fields, row[1:], strict=True))
            for row in con.execute(f"SELECT decision_id, {stored_cols} FROM {table}").fetchall()
        }
    finally:
        con.close()
    ordered = _ordered_reasons(cfg, kind, path)
    assert len(ordered) == len(expected)

    wrong = []
    for (rid, field, text, reason, value), reason_ordered in zip(expected, ordered, strict=True):
        got = quarantined.get(rid)
        value_got = stored[rid][field] if rid in stored else None
        if got != reason or reason_ordered != reason:
            wrong.append(
                (field, text, f"want {reason}", f"ingest {got}", f"ordered {reason_ordered}")
            )
        elif reason is ACCEPT and not _same(value_got, value):
            wrong.append((field, text, f"want stored {value!r}", f"stored {value_got!r}"))
    assert not wrong, "\n".join(map(str, wrong))
    # The table above holds both outcomes for every family (it can fail either way).
    assert {r is ACCEPT for *_, r, _ in expected} == {True, False}
