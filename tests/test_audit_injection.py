"""Spreadsheet formula injection (issue #13, item 12): text that a spreadsheet would run
as a formula is neutralised in the CSV and XLSX exports, numbers stay numbers, the true
value is recoverable, Parquet keeps the raw text, and CSV/Parquet stay byte-reproducible.

The rule checked is OWASP's CSV-injection guidance (cells starting with =, +, -, @, tab or
carriage return get a leading single quote).  Whether a workbook cell is a formula is read
from the file itself: an ``<f>`` element in the sheet XML (ECMA-376 Part 1, SpreadsheetML
cell formula), not from the writer's own bookkeeping.
"""

from __future__ import annotations

import csv
import json
import re
import zipfile
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from helpers.hostile_store import AT_FORMULA, FORMULA, build_hostile_store

from monitor.audit.formats import make_table, restore, write_csv, write_parquet, write_workbook
from monitor.audit.pack import export
from monitor.config import load_config
from monitor.store.rules import utc_now

# OWASP CSV injection: the characters a cell must not start with.
OWASP_STARTS = ("=", "+", "-", "@", "\t", "\r")
HOSTILE = [
    FORMULA,
    "+1+1",
    "-2+3",
    AT_FORMULA,
    "\t=1+1",
    "\r=1+1",
    "'quoted already",
    "plain",
    "a=b",
]


def _sheet_formulas(path: Path) -> list[str]:
    """Every <f> element in the workbook's sheets (a cell formula in SpreadsheetML)."""
    with zipfile.ZipFile(path) as zf:
        sheets = [n for n in zf.namelist() if n.startswith("xl/worksheets/")]
        return [
            m.group(0)
            for n in sheets
            for m in re.finditer(rb"<f[ >].*?</f>|<f/>", zf.read(n), re.S)  # type: ignore[arg-type]
        ]


def _read_csv(path: Path) -> list[list[str]]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.reader(fh))


@pytest.fixture()
def table():
    rows = [(text, -0.5 * (i + 1), -(i + 1), i % 2 == 0) for i, text in enumerate(HOSTILE)]
    return make_table(
        "t", "hostile", [("who", "str"), ("w", "float"), ("n", "int"), ("b", "bool")], rows
    )


def test_csv_text_cells_never_start_like_a_formula_and_restore_exactly(table, tmp_path):
    rows = _read_csv(write_csv(table, tmp_path / "t.csv"))[1:]
    assert len(rows) == len(HOSTILE)
    for (who, w, n, b), original in zip(rows, HOSTILE, strict=True):
        assert not who.startswith(OWASP_STARTS), who
        assert restore(who) == original
        # Numbers stay numbers: a negative weight and a negative count are written plainly.
        assert float(w) < 0 and w.startswith("-") and int(n) < 0 and b in ("true", "false")
    assert rows[HOSTILE.index("plain")][0] == "plain"
    assert rows[HOSTILE.index("a=b")][0] == "a=b"


def test_workbook_has_no_formula_cells_and_numbers_stay_numeric(table, tmp_path):
    from datetime import UTC, datetime

    from openpyxl import load_workbook

    path = write_workbook(
        [table], tmp_path / "t.xlsx", [("Note", "=1+1 on the cover")], datetime.now(UTC)
    )
    assert _sheet_formulas(path) == []
    wb = load_workbook(path)
    sheet = wb["t"]
    for row, original in zip(sheet.iter_rows(min_row=2), HOSTILE, strict=True):
        who, w, n, b = row
        assert who.data_type == "s" and not who.value.startswith(OWASP_STARTS)
        # XML 1.0 section 2.11 (end-of-line handling): a parser reads a bare CR as LF, so a
        # carriage return inside a workbook's text comes back as a line feed.
        assert restore(who.value) == original.replace("\r", "\n")
        assert w.data_type == "n" and w.value < 0
        assert n.data_type == "n" and n.value < 0
        assert b.data_type == "b"
    assert restore(wb["cover"]["B1"].value) == "=1+1 on the cover"


def test_parquet_keeps_the_raw_text(table, tmp_path):
    got = pq.read_table(write_parquet(table, tmp_path / "t.parquet")).column("who").to_pylist()
    assert got == HOSTILE


@pytest.fixture(scope="module")
def hostile_pack(tmp_path_factory):
    root = tmp_path_factory.mktemp("injection")
    cfg_path, _ = build_hostile_store(
        root, handlers={"H002": FORMULA, "H004": "-H004"}, teams={"Alder": AT_FORMULA}
    )
    config = load_config(cfg_path)
    as_of = utc_now().isoformat()  # after the build: both exports see the same rows
    out = [root / "a", root / "b"]
    for d in out:
        export(config, quarter="2024Q4", out_dir=d, as_of=as_of, formats=["csv", "parquet", "xlsx"])
    return out


def test_exported_workbook_of_a_hostile_store_holds_no_formula(hostile_pack):
    from openpyxl import load_workbook

    book = next(hostile_pack[0].glob("*.xlsx"))
    assert _sheet_formulas(book) == []
    texts = [
        c.value
        for ws in load_workbook(book).worksheets
        for row in ws.iter_rows()
        for c in row
        if isinstance(c.value, str)
    ]
    assert not [t for t in texts if t.startswith(OWASP_STARTS)]
    # The hostile names are there, neutralised, in many cells (the issue counted 34).
    assert sum(t == "'" + FORMULA for t in texts) >= 10
    assert sum(t == "'" + AT_FORMULA for t in texts) >= 3


def test_exported_csvs_are_neutralised_and_parquet_is_raw(hostile_pack):
    folder = hostile_pack[0]
    tables = json.loads((folder / "manifest.json").read_text())["tables"]
    csv_cells, numbers = [], []
    for name, entry in tables.items():
        header, *rows = _read_csv(folder / f"{name}.csv")
        kinds = [entry["columns"][c] for c in header]
        csv_cells += [c for row in rows for c, k in zip(row, kinds, strict=True) if k == "str"]
        numbers += [c for row in rows for c, k in zip(row, kinds, strict=True) if k == "float"]
    assert not [c for c in csv_cells if c.startswith(OWASP_STARTS)]
    # Numbers are never prefixed: negative figures are written as plain numbers.
    assert any(c.startswith("-") for c in numbers)
    assert all(float(c) == float(c) for c in numbers if c)
    assert "'" + FORMULA in csv_cells and "'-H004" in csv_cells
    makers = pq.read_table(folder / "decision_makers.parquet").column("decision_maker").to_pylist()
    assert FORMULA in makers and "-H004" in makers
    teams = pq.read_table(folder / "decision_makers.parquet").column("team").to_pylist()
    assert AT_FORMULA in teams


def test_csv_and_parquet_stay_byte_identical_between_two_exports(hostile_pack):
    a, b = hostile_pack
    for p in sorted(a.glob("*.csv")) + sorted(a.glob("*.parquet")):
        assert p.read_bytes() == (b / p.name).read_bytes(), p.name


def test_methodology_tells_how_to_recover_the_value(hostile_pack):
    text = (hostile_pack[0] / "methodology.txt").read_text(encoding="utf-8")
    flat = " ".join(text.split())
    assert "extra leading '" in flat and "without that first '" in flat
