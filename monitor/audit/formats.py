"""Audit tables and their file formats: CSV, Parquet and one XLSX workbook.

A ``Table`` is a name, typed columns and rows of plain Python values.  Every float is
rounded to ``SIGNIFICANT`` significant digits before it is stored in a table, so two
exports of the same rows are byte-identical in CSV and Parquet even if a summation
order changed the last binary digits.  Missing values are ``None`` everywhere (empty in
CSV, null in Parquet, an empty cell in XLSX).
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

# 12 of float64's ~15.9 significant digits: noise from summation order lives in the last
# two or three, so rounding here removes it without losing anything an auditor can use.
SIGNIFICANT = 12
KINDS = ("str", "int", "float", "bool", "date")


def clean_float(value: object) -> float | None:
    """``value`` as a float rounded to SIGNIFICANT digits; None for missing/NaN/inf."""
    if value is None:
        return None
    v = float(value)  # type: ignore[arg-type]
    if not math.isfinite(v):
        return None
    r = float(f"{v:.{SIGNIFICANT}g}")
    return 0.0 if r == 0 else r  # no "-0.0" in the files


def _clean(value: object, kind: str) -> object:
    if value is None:
        return None
    if kind == "float":
        return clean_float(value)
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if kind == "int":
        return int(value)  # type: ignore[call-overload]
    if kind == "bool":
        return bool(value)
    if kind == "date":
        return value if isinstance(value, date) else date.fromisoformat(str(value))
    return str(value)


@dataclass(frozen=True)
class Table:
    """One audit table: ``columns`` are (name, kind) with kind in KINDS; ``rows`` hold
    values already cleaned for that kind (see ``make_table``)."""

    name: str
    title: str
    columns: tuple[tuple[str, str], ...]
    rows: tuple[tuple, ...]

    @property
    def names(self) -> list[str]:
        return [c for c, _ in self.columns]

    def column(self, name: str) -> list:
        i = self.names.index(name)
        return [r[i] for r in self.rows]

    def records(self) -> list[dict]:
        return [dict(zip(self.names, r, strict=True)) for r in self.rows]


def make_table(
    name: str, title: str, columns: Sequence[tuple[str, str]], rows: Iterable[Sequence]
) -> Table:
    """Build a Table, cleaning every value for its column kind (floats rounded)."""
    kinds = [k for _, k in columns]
    bad = [k for k in kinds if k not in KINDS]
    if bad:
        raise ValueError(f"unknown column kinds {bad}")
    out = []
    for row in rows:
        if len(row) != len(kinds):
            raise ValueError(f"table {name}: row has {len(row)} values for {len(kinds)} columns")
        out.append(tuple(_clean(v, k) for v, k in zip(row, kinds, strict=True)))
    return Table(name, title, tuple((c, k) for c, k in columns), tuple(out))


# --- CSV ------------------------------------------------------------------------------


def csv_text(value: object) -> str:
    """The CSV spelling of a cleaned value: repr for floats (shortest round trip),
    lower-case true/false, ISO dates, empty for missing."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, date | datetime):
        return value.isoformat()
    return str(value)


def write_csv(table: Table, path: Path) -> Path:
    """UTF-8, comma separated, '\\n' line ends, header row first."""
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(table.names)
        for row in table.rows:
            w.writerow([csv_text(v) for v in row])
    return path


# --- Parquet --------------------------------------------------------------------------


def write_parquet(table: Table, path: Path) -> Path:
    """One Parquet file with an explicit schema (string, int64, float64, bool, date32).

    Built from Arrow arrays, not a DataFrame, so no pandas index or metadata varies
    between runs; pyarrow writes no timestamp into the file.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    arrow = {"str": pa.string(), "int": pa.int64(), "float": pa.float64()}
    arrow |= {"bool": pa.bool_(), "date": pa.date32()}
    schema = pa.schema([(c, arrow[k]) for c, k in table.columns])
    cols = list(zip(*table.rows, strict=True)) if table.rows else [()] * len(table.columns)
    arrays = [pa.array(list(v), type=f.type) for v, f in zip(cols, schema, strict=True)]
    pq.write_table(pa.Table.from_arrays(arrays, schema=schema), path, compression="zstd")
    return path


# --- XLSX -----------------------------------------------------------------------------

_NUMBER_FORMATS = {"int": "#,##0", "float": "0.0000", "date": "yyyy-mm-dd"}
_MAX_WIDTH = 60


def _sheet_name(name: str, used: set[str]) -> str:
    base = name[:31]
    out, i = base, 2
    while out.lower() in used:
        out = f"{base[:28]}~{i}"
        i += 1
    used.add(out.lower())
    return out


def write_workbook(
    tables: Sequence[Table], path: Path, cover: Sequence[tuple[str, str]], created: datetime
) -> Path:
    """One workbook: a cover sheet of (label, text) lines, then one sheet per table with a
    bold filled header, frozen header row, auto-filter, number formats and widths.

    Cells keep full (rounded) values; the number format only changes what is shown.
    """
    from openpyxl import Workbook
    from openpyxl.styles import Alignment, Font, PatternFill
    from openpyxl.utils import get_column_letter

    wb = Workbook()
    wb.properties.created = created.replace(tzinfo=None)
    wb.properties.modified = created.replace(tzinfo=None)
    ws = wb.active
    ws.title = "cover"
    bold = Font(bold=True)
    for i, (label, text) in enumerate(cover, start=1):
        ws.cell(row=i, column=1, value=label).font = bold
        cell = ws.cell(row=i, column=2, value=text)
        cell.alignment = Alignment(wrap_text=True, vertical="top")
    ws.column_dimensions["A"].width = 24
    ws.column_dimensions["B"].width = 110
    fill = PatternFill("solid", fgColor="DDE4EE")
    used = {"cover"}
    for table in tables:
        sh = wb.create_sheet(_sheet_name(table.name, used))
        for j, name in enumerate(table.names, start=1):
            c = sh.cell(row=1, column=j, value=name)
            c.font, c.fill = bold, fill
        for i, row in enumerate(table.rows, start=2):
            for j, v in enumerate(row, start=1):
                sh.cell(row=i, column=j, value=v)
        for j, (name, kind) in enumerate(table.columns, start=1):
            letter = get_column_letter(j)
            # p- and q-values span many decades: scientific, so 1e-9 does not show as 0.
            small = kind == "float" and (name.startswith(("p_", "q_")) or name.endswith("_p"))
            fmt = "0.00E+00" if small else _NUMBER_FORMATS.get(kind)
            if fmt:
                for (cell,) in sh.iter_rows(min_row=2, min_col=j, max_col=j):
                    cell.number_format = fmt
            longest = max([len(name)] + [len(csv_text(r[j - 1])) for r in table.rows[:500]])
            sh.column_dimensions[letter].width = min(_MAX_WIDTH, max(8, longest + 2))
        sh.freeze_panes = "A2"
        if table.rows:
            sh.auto_filter.ref = f"A1:{get_column_letter(len(table.columns))}{len(table.rows) + 1}"
    wb.save(path)
    return path


def spec(text: str) -> list[tuple[str, str]]:
    """Columns from a compact spec: 'name:kind name:kind ...' (kind defaults to float)."""
    out = []
    for item in text.split():
        name, _, kind = item.partition(":")
        out.append((name, kind or "float"))
    return out


def table_from_columns(name: str, title: str, columns: str, data: dict[str, Sequence]) -> Table:
    """A Table from column sequences of equal length; ``columns`` is a ``spec`` string and
    a column missing from ``data`` is all None."""
    cols = spec(columns)
    n = max((len(v) for v in data.values()), default=0)
    seqs = [data.get(c, [None] * n) for c, _ in cols]
    if any(len(s) != n for s in seqs):
        raise ValueError(f"table {name}: columns of unequal length")
    return make_table(name, title, cols, zip(*seqs, strict=True) if cols else [])
