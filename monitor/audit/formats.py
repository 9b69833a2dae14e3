"""Audit tables and their file formats: CSV, Parquet and one XLSX workbook.

A ``Table`` is a name, typed columns and rows of plain Python values.  Every float is
rounded to ``SIGNIFICANT`` significant digits before it is stored in a table, so two
exports of the same rows are byte-identical in CSV and Parquet even if a summation
order changed the last binary digits.  Missing values are ``None`` everywhere (empty in
CSV, null in Parquet, an empty cell in XLSX).  A column of kind ``number`` mixes counts
and measures (coverage's ``value``): a float in Parquet, and a whole number is written
as one (``739``, not ``739.0``) in CSV, XLSX and HTML.  A p- or q-value below
``P_FLOOR`` (an underflow to 0 included) is written as ``P_FLOOR``, read "at most".

Text cells of the spreadsheet formats (CSV and XLSX) go through ``neutralise``: a value a
spreadsheet could take for a formula gets a leading apostrophe.  Parquet and HTML keep
the raw text.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

# 12 of float64's ~15.9 significant digits: noise from summation order lives in the last
# two or three, so rounding here removes it without losing anything an auditor can use.
SIGNIFICANT = 12
KINDS = ("str", "int", "float", "number", "bool", "date")
# Whole numbers of a ``number`` column up to this size are written without a decimal
# point (2**53: beyond it a float no longer holds every integer).
_WHOLE_LIMIT = 2**53

# The smallest p- or q-value written: a t or normal tail below it is at or past the end
# of double precision (the smallest normal double is ~2.2e-308), so the computed value,
# 0 included, says only "this small or smaller".  The methodology says so.
P_FLOOR = 1e-300

# First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV
# Injection": =, +, -, @, tab, carriage return), plus the apostrophe itself, so that
# the rule stays reversible: every text cell that starts with "'" was prefixed, and
# dropping exactly one leading "'" gives the true value back (``restore``).
FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r", "'")
ESCAPE = "'"


def clean_float(value: object) -> float | None:
    """``value`` as a float rounded to SIGNIFICANT digits; None for missing/NaN/inf."""
    if value is None:
        return None
    v = float(value)  # type: ignore[arg-type]
    if not math.isfinite(v):
        return None
    r = float(f"{v:.{SIGNIFICANT}g}")
    return 0.0 if r == 0 else r  # no "-0.0" in the files


def is_probability(name: str) -> bool:
    """Whether a column holds p- or q-values (``p_value``, ``q_value``, ``indirect_p``,
    ``joint_p_value``, ``indirect_q_value``): floored at P_FLOOR, shown in scientific
    notation in the workbook."""
    return name in ("p_value", "q_value") or name.endswith(("_p", "_p_value", "_q_value"))


def clean_probability(value: object) -> float | None:
    """A p- or q-value for a file: ``clean_float``, and at least P_FLOOR."""
    v = clean_float(value)
    return v if v is None or v >= P_FLOOR else P_FLOOR


def _clean(value: object, kind: str, name: str = "") -> object:
    if value is None:
        return None
    if kind == "float" and is_probability(name):
        return clean_probability(value)
    if kind in ("float", "number"):
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
        out.append(tuple(_clean(v, k, c) for v, (c, k) in zip(row, columns, strict=True)))
    return Table(name, title, tuple((c, k) for c, k in columns), tuple(out))


# --- spreadsheet formula injection --------------------------------------------------------


def neutralise(text: str) -> str:
    """``text`` safe for a spreadsheet cell: prefixed with ``'`` when it starts with one of
    FORMULA_TRIGGERS, unchanged otherwise.  Only text cells go through this: numbers,
    booleans and dates (a negative weight included) are written as themselves."""
    return ESCAPE + text if text.startswith(FORMULA_TRIGGERS) else text


def restore(cell: str) -> str:
    """The true value of a text cell read back from a CSV or XLSX export (the inverse of
    ``neutralise``): one leading ``'`` removed, if there is one."""
    return cell[len(ESCAPE) :] if cell.startswith(ESCAPE) else cell


def whole(value: object) -> int | None:
    """``value`` as an int when it is a whole float within _WHOLE_LIMIT, else None."""
    if isinstance(value, float) and value.is_integer() and abs(value) <= _WHOLE_LIMIT:
        return int(value)
    return None


def _cell_text(value: object, kind: str) -> str:
    if kind == "number" and whole(value) is not None:
        return str(whole(value))
    text = csv_text(value)
    return neutralise(text) if kind == "str" and value is not None else text


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


def csv_field(text: str) -> str:
    """One CSV field (RFC 4180): quoted, with quotes doubled, when it holds a comma, a
    quote, a line feed or a carriage return.  Python's csv writer leaves a bare carriage
    return unquoted when the line end is '\\n', which let a value start a new row."""
    if any(ch in text for ch in ',"\r\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def write_csv(table: Table, path: Path) -> Path:
    """UTF-8, comma separated, '\\n' line ends, header row first; text cells neutralised
    against formula injection (``neutralise``)."""
    kinds = [k for _, k in table.columns]
    lines = [[neutralise(n) for n in table.names]]
    lines += [[_cell_text(v, k) for v, k in zip(row, kinds, strict=True)] for row in table.rows]
    with open(path, "w", encoding="utf-8", newline="") as fh:
        for fields in lines:
            # A row of one empty field is written as "" so that it is not an empty line.
            text = '""' if fields == [""] else ",".join(csv_field(f) for f in fields)
            fh.write(text + "\n")
    return path


# --- Parquet --------------------------------------------------------------------------


def write_parquet(table: Table, path: Path) -> Path:
    """One Parquet file with an explicit schema (string, int64, float64, bool, date32).

    Built from Arrow arrays, not a DataFrame, so no pandas index or metadata varies
    between runs; pyarrow writes no timestamp into the file.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    arrow = {"str": pa.string(), "int": pa.int64(), "float": pa.float64(), "number": pa.float64()}
    arrow |= {"bool": pa.bool_(), "date": pa.date32()}
    schema = pa.schema([(c, arrow[k]) for c, k in table.columns])
    cols = list(zip(*table.rows, strict=True)) if table.rows else [()] * len(table.columns)
    arrays = [pa.array(list(v), type=f.type) for v, f in zip(cols, schema, strict=True)]
    pq.write_table(pa.Table.from_arrays(arrays, schema=schema), path, compression="zstd")
    return path


# --- XLSX -----------------------------------------------------------------------------

# ``number`` columns: General, so a count shows as 739 and a share as 0.7846.
_NUMBER_FORMATS = {"int": "#,##0", "float": "0.0000", "number": "General", "date": "yyyy-mm-dd"}
_MAX_WIDTH = 60


def _sheet_name(name: str, used: set[str]) -> str:
    base = name[:31]
    out, i = base, 2
    while out.lower() in used:
        out = f"{base[:28]}~{i}"
        i += 1
    used.add(out.lower())
    return out


def _put(sheet, row: int, column: int, value: object, kind: str):
    """Write one cell: text neutralised and typed as a string (openpyxl would otherwise
    store a value starting with "=" as a formula); other kinds as they are."""
    cell = sheet.cell(row=row, column=column)
    if kind == "str" and value is not None:
        cell.value = neutralise(str(value))
        cell.data_type = "s"
    elif kind == "number" and whole(value) is not None:
        cell.value = whole(value)
    else:
        cell.value = value
    return cell


def write_workbook(
    tables: Sequence[Table], path: Path, cover: Sequence[tuple[str, str]], created: datetime
) -> Path:
    """One workbook: a cover sheet of (label, text) lines, then one sheet per table with a
    bold filled header, frozen header row, auto-filter, number formats and widths.

    Cells keep full (rounded) values; the number format only changes what is shown.
    Text cells are neutralised (``neutralise``) and stored as strings, never formulas.
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
        _put(ws, i, 1, label, "str").font = bold
        cell = _put(ws, i, 2, text, "str")
        cell.alignment = Alignment(wrap_text=True, vertical="top")
    ws.column_dimensions["A"].width = 24
    ws.column_dimensions["B"].width = 110
    fill = PatternFill("solid", fgColor="DDE4EE")
    used = {"cover"}
    for table in tables:
        sh = wb.create_sheet(_sheet_name(table.name, used))
        for j, name in enumerate(table.names, start=1):
            c = _put(sh, 1, j, name, "str")
            c.font, c.fill = bold, fill
        for i, row in enumerate(table.rows, start=2):
            for j, (v, (_, kind)) in enumerate(zip(row, table.columns, strict=True), start=1):
                _put(sh, i, j, v, kind)
        for j, (name, kind) in enumerate(table.columns, start=1):
            letter = get_column_letter(j)
            # p- and q-values span many decades: scientific, so 1e-9 does not show as 0.
            small = kind == "float" and is_probability(name)
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
