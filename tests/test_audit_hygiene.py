"""What the audit pack writes and where: the --out folder holds one pack and nothing
stale, an unfinished quarter is said to be one, the HTML report tells the truth about
the rows it leaves out, counts are whole numbers, history cells are strict JSON, p-values
are never 0, and the report's charts have short axis labels in the dashboard's colours.

The store is the demo scenario's first four weeks (2024-11-01 .. 28, twelve handlers)
played night by night on the demo's simulated clock, so its rows were ingested in
November 2024 and "as of 2024-12-15" is a moment inside the quarter.
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from datetime import timedelta
from html.parser import HTMLParser
from pathlib import Path
from types import SimpleNamespace

import pyarrow.parquet as pq
import pytest
from helpers.cli import run_cli, text

from monitor.audit.formats import P_FLOOR, make_table, write_csv, write_parquet, write_workbook
from monitor.audit.report import MAX_HTML_ROWS, cell_text
from monitor.config import load_config
from monitor.demo import play, prepare
from monitor.palette import ACHIEVEMENT, COLOURS, CONSISTENCY
from monitor.store.connection import Store
from monitor.store.rules import utc_now

INSIDE = "2024-12-15"  # a day inside 2024Q4, after the four weeks' decisions arrived


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> SimpleNamespace:
    folder = tmp_path_factory.mktemp("hygiene")
    prepare(folder, days=28, n_handlers=12)
    cfg = folder / "ostwyn.toml"
    raw = cfg.read_text(encoding="utf-8")
    # A tolerance whose doubled value is not a round number, so the forbidden-cue chart's
    # axis ends at a largest |weight| (0.175...) unless the report rounds it.
    assert "tolerance = 0.10 " in raw
    cfg.write_text(raw.replace("tolerance = 0.10 ", "tolerance = 0.07 "), encoding="utf-8")
    config = load_config(cfg)
    play(config, folder / "scenario", say=lambda _line: None, tail_days=3)
    alert_id = _plant_alert(config)
    return SimpleNamespace(folder=folder, cfg=cfg, config=config, alert_id=alert_id)


def _plant_alert(config) -> int:
    """An alert as `assess` opens one (its first history row has no from_state, SQL
    NULL) and `ack` acknowledges it.  Planted: whether four weeks open an alert is the
    policy's business."""
    # In the past, both rows: a pack is as of the moment it is exported, and one made
    # within a second of planting would otherwise not see the acknowledgement yet.
    now = utc_now() - timedelta(seconds=5)
    with Store(config).writer() as con:
        alert_id = int(con.execute("SELECT nextval('alert_ids')").fetchone()[0])
        con.execute(
            "INSERT INTO alerts (alert_id, kind, scope, decision_maker, team, cue, state, "
            "opened_at, opened_window_end, evidence, updated_at) VALUES (?, 'forbidden_cue', "
            "'decision_maker', 'H002', 'Alder', 'claimant_gender', 'open', ?, "
            "DATE '2024-11-24', '{}', ?)",
            [alert_id, now, now],
        )
        con.execute(
            "INSERT INTO alert_history (alert_id, changed_at, from_state, to_state, changed_by, "
            "note, evidence) VALUES (?, ?, NULL, 'open', 'cuewatch assess', NULL, '{}'), "
            "(?, ?, 'open', 'acknowledged', 'auditor', 'seen', NULL)",
            [alert_id, now, alert_id, now + timedelta(seconds=1)],
        )
    return alert_id


def _export(demo, out: Path, *args: str) -> subprocess.CompletedProcess:
    return run_cli(demo.cfg, "export", "--quarter", "2024Q4", "--out", str(out), *args)


def _ok(proc: subprocess.CompletedProcess) -> str:
    out, err = text(proc)
    assert proc.returncode == 0, (out, err)
    return out


def _listed(folder: Path) -> set[str]:
    """The files the folder's manifest lists, with the manifest (the pack's own files)."""
    m = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    names = {m["methodology"], "manifest.json"} | {m[k] for k in ("workbook", "report") if k in m}
    for entry in m["tables"].values():
        names |= {f["path"] for f in entry["files"].values()}
    return names


def _rows(path: Path) -> list[dict[str, str]]:
    with open(path, encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


class _Page(HTMLParser):
    """The report's parts these tests read: paragraph texts by class, the charts' text
    and rect elements, table cells by table id, and the style sheet."""

    def __init__(self, source: str):
        super().__init__()
        self.paragraphs: list[tuple[str, str]] = []
        self.svg_texts: list[tuple[str, str]] = []
        self.rect_fills: list[str] = []
        self.cells: dict[str, list[list[str]]] = {}
        self.style = ""
        self._stack: list[tuple[str, dict]] = []
        self._table: str | None = None
        self._in_chart = False
        self._buf: list[str] = []
        self.feed(source)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "h2" and a.get("id"):
            self._table = a["id"]
        if tag == "svg" and "chart" in (a.get("class") or ""):
            self._in_chart = True
        if tag == "rect" and self._in_chart and a.get("fill"):
            self.rect_fills.append(a["fill"].lower())
        if tag == "tr" and self._table:
            self.cells.setdefault(self._table, []).append([])
        self._stack.append((tag, a))
        self._buf = []

    def handle_endtag(self, tag):
        if not self._stack:
            return
        name, a = self._stack.pop()
        body = "".join(self._buf).strip()
        if name == "p":
            self.paragraphs.append((a.get("class") or "", body))
        elif name == "text" and self._in_chart:
            self.svg_texts.append((a.get("class") or "", body))
        elif name == "td" and self._table and self.cells.get(self._table):
            self.cells[self._table][-1].append(body)
        elif name == "style":
            self.style = body
        elif name == "svg":
            self._in_chart = False
        self._buf = []

    def handle_data(self, data):
        self._buf.append(data)


def _page(folder: Path) -> _Page:
    return _Page(next(folder.glob("*.html")).read_text(encoding="utf-8"))


# --- the --out folder -----------------------------------------------------------------------


def test_a_new_pack_replaces_the_earlier_one_and_leaves_nothing_stale(demo, tmp_path):
    out = tmp_path / "pack"
    _ok(_export(demo, out, "--as-of", INSIDE, "--format", "csv,parquet,xlsx,html"))
    first = sorted(p.name for p in out.iterdir())
    assert any(n.endswith(".parquet") for n in first) and "audit_2024Q4.xlsx" in first
    _ok(_export(demo, out, "--format", "csv"))
    # Exactly the second pack's files: no Parquet, workbook or report of the first.
    assert {p.name for p in out.iterdir()} == _listed(out)
    assert not any(p.suffix in (".parquet", ".xlsx", ".html") for p in out.iterdir())
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["as_of_defaulted_to_now"] is True
    for entry in manifest["tables"].values():
        assert set(entry["files"]) == {"csv"}


def test_a_folder_holding_other_files_is_refused_and_left_alone(demo, tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep me", encoding="utf-8")
    proc = _export(demo, mine, "--format", "csv")
    out, err = text(proc)
    assert proc.returncode == 2, (out, err)
    assert len(err.strip().splitlines()) == 1 and "notes.txt" in err and "Traceback" not in err
    assert [p.name for p in mine.iterdir()] == ["notes.txt"]

    # An earlier pack plus a file of someone else's: refused too, the pack kept whole.
    out_dir = tmp_path / "pack"
    _ok(_export(demo, out_dir, "--format", "csv"))
    before = {p.name: p.read_bytes() for p in out_dir.iterdir()}
    (out_dir / "draft.docx").write_bytes(b"not ours")
    proc = _export(demo, out_dir, "--format", "csv,html")
    assert proc.returncode == 2 and "draft.docx" in text(proc)[1]
    assert {p.name: p.read_bytes() for p in out_dir.iterdir() if p.name != "draft.docx"} == before

    # An export that finds nothing leaves the earlier pack as it was.
    (out_dir / "draft.docx").unlink()
    proc = run_cli(demo.cfg, "export", "--quarter", "2023Q1", "--out", str(out_dir))
    assert proc.returncode == 2 and "nothing to export" in text(proc)[1]
    assert {p.name: p.read_bytes() for p in out_dir.iterdir()} == before


# --- an unfinished quarter ------------------------------------------------------------------


def test_an_unfinished_quarter_is_warned_in_the_summary_manifest_methodology_and_report(
    demo, tmp_path
):
    early, late = tmp_path / "early", tmp_path / "late"
    said = _ok(_export(demo, early, "--as-of", INSIDE, "--format", "csv,html"))
    warning = [line for line in said.splitlines() if line.startswith("WARNING")]
    assert len(warning) == 1 and "2024Q4 was not over" in warning[0] and "2024-12-31" in warning[0]
    manifest = json.loads((early / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["quarter_over_at_as_of"] is False
    assert [w for w in manifest["warnings"] if "was not over" in w] == [warning[0][9:]]
    method = (early / "methodology.txt").read_text(encoding="utf-8")
    assert "WARNING: 2024Q4 was not over" in method
    assert method.index("WARNING") < method.index("WHAT THE DATA ARE")
    warned = [body for cls, body in _page(early).paragraphs if cls == "warning"]
    assert any("2024Q4 was not over" in body for body in warned)

    # The same quarter as of now (after 2024-12-31): no such warning.
    said = _ok(_export(demo, late, "--format", "csv"))
    assert "WARNING" not in said
    manifest = json.loads((late / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["quarter_over_at_as_of"] is True and manifest["warnings"] == []
    assert "was not over" not in (late / "methodology.txt").read_text(encoding="utf-8")


# --- the HTML report ------------------------------------------------------------------------


def test_an_html_only_pack_does_not_point_at_files_it_lacks(demo, tmp_path):
    for fmts in ("html", "csv,html", "xlsx,html"):
        out = tmp_path / fmts.replace(",", "_")
        _ok(_export(demo, out, "--format", fmts))
        manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
        long = [t for t, e in manifest["tables"].items() if e["rows"] > MAX_HTML_ROWS]
        assert long, "the fixture needs a table longer than the report shows"
        notes = [body for cls, body in _page(out).paragraphs if cls == "more"]
        assert len(notes) == len(long)
        present = {p.name for p in out.iterdir()}
        for table, note in zip(long, notes, strict=True):
            rows = manifest["tables"][table]["rows"]
            assert f"The first {MAX_HTML_ROWS} of {rows} rows" in note
            for suffix in (".csv", ".parquet"):
                if f"{table}{suffix}" in note:
                    assert f"{table}{suffix}" in present, (fmts, note)
            if fmts == "html":
                assert "HTML only" in note and ".csv" not in note and "workbook" not in note
            if fmts == "xlsx,html":
                assert f"the workbook's {table} sheet" in note and ".csv" not in note


def test_the_report_prints_whole_tables(demo, tmp_path):
    """The print style sheet lets every table box grow to its content (a scroll box
    printed shows only what fits in it).  The rendered check is in
    tests/test_audit_browser.py."""
    _ok(_export(demo, tmp_path, "--format", "html"))
    style = _page(tmp_path).style
    assert "@media print" in style
    printed = style[style.index("@media print") :]
    rule = printed[printed.index(".wrap{") : printed.index("}", printed.index(".wrap{"))]
    assert "max-height:none" in rule and "overflow:visible" in rule


def test_axis_labels_are_short_and_colours_are_the_dashboards(demo, tmp_path):
    _ok(_export(demo, tmp_path, "--format", "html"))
    page = _page(tmp_path)
    numbers = []
    for _, body in page.svg_texts:
        try:
            numbers.append((body, float(body)))
        except ValueError:
            continue
    assert len(numbers) >= 6  # two charts' ticks
    for body, value in numbers:
        # At most three significant digits (common practice for axis ticks).
        assert body == f"{float(f'{value:.3g}'):g}", body
    assert any(v < 0 for _, v in numbers) and any(v > 0.1 for _, v in numbers)

    # Series colours: the dashboard's own palette, and the dashboard's overview draws
    # consistency and achievement in the same two colours as the report.
    fills = set(page.rect_fills)
    assert fills == {CONSISTENCY, ACHIEVEMENT, COLOURS["forbidden"]}
    charts = pytest.importorskip("dashboards.charts")
    import pandas as pd

    people = pd.DataFrame(
        {"scope": ["decision_maker"], "decision_maker": ["H001"], "n_decisions": [260],
         "n_linked": [206], "why": [""], "R_s": [0.44], "r_a": [0.05], "open_alerts": [0]}
    )  # fmt: skip
    spec = charts.overview_chart(people).to_dict()
    scale = spec["encoding"]["color"]["scale"]
    assert dict(zip(scale["domain"], scale["range"], strict=True)) == {
        "consistency R_s": CONSISTENCY,
        "achievement r_a": ACHIEVEMENT,
    }


def test_the_audit_pack_imports_no_plotting_or_dashboard_library():
    code = (
        "import sys, monitor.audit.pack, monitor.audit.report, monitor.audit.charts; "
        "print(sorted(m for m in ('altair', 'streamlit', 'dashboards') if m in sys.modules))"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "[]"


# --- cells ----------------------------------------------------------------------------------


def test_alert_history_cells_are_strict_json(demo, tmp_path):
    _ok(_export(demo, tmp_path, "--format", "csv"))
    alerts = {int(r["alert_id"]): r for r in _rows(tmp_path / "alerts.csv")}
    assert demo.alert_id in alerts

    def refuse(token):  # NaN / Infinity are not JSON (RFC 8259, section 6)
        raise ValueError(token)

    for row in alerts.values():
        history = json.loads(row["history"], parse_constant=refuse)
        assert history and all(isinstance(h, dict) for h in history)
    first, second = json.loads(alerts[demo.alert_id]["history"])
    assert first["from"] is None and first["to"] == "open" and first["by"] == "cuewatch assess"
    assert second["from"] == "open" and second["to"] == "acknowledged"


def test_counts_are_written_as_whole_numbers(demo, tmp_path):
    _ok(_export(demo, tmp_path / "pack", "--format", "csv,xlsx,html"))
    counts = ("decisions_used", "decisions_missing_cues", "outcomes_linked", "outcomes_corrected")
    rows = [r for r in _rows(tmp_path / "pack" / "coverage.csv") if r["measure"] in counts]
    assert rows and all(r["value"].isdigit() for r in rows), rows[:3]
    used = {r["decision_maker"]: int(r["value"]) for r in rows if r["measure"] == "decisions_used"}
    dm = {r["decision_maker"]: r for r in _rows(tmp_path / "pack" / "decision_makers.csv")}
    assert used["all"] == int(dm["all"]["n_decisions"])  # the same count in two tables
    # The workbook holds them as integers, the report shows them as integers.
    from openpyxl import load_workbook

    sheet = load_workbook(tmp_path / "pack" / "audit_2024Q4.xlsx")["coverage"]
    header = [c.value for c in sheet[1]]
    for cells in sheet.iter_rows(min_row=2, values_only=True):
        rec = dict(zip(header, cells, strict=True))
        if rec["measure"] in counts:
            assert isinstance(rec["value"], int), rec
    shown = _page(tmp_path / "pack").cells["coverage"]
    shown = [r for r in shown if r and r[0] == "decisions_used"]
    assert shown and all(r[-1].isdigit() for r in shown)

    # Restated counts too: n_linked moved between mid-December 2024 and now.
    _ok(_export(demo, tmp_path / "diff", "--compare-as-of", INSIDE, utc_now().isoformat(),
                "--format", "csv"))  # fmt: skip
    moved = [r for r in _rows(tmp_path / "diff" / "restatements.csv") if r["figure"] == "n_linked"]
    assert moved
    for r in moved:
        assert r["value_before"].isdigit() and r["value_after"].isdigit() and "." not in r["change"]


def test_a_p_value_that_underflowed_is_written_as_at_most_the_floor(tmp_path):
    """A tail probability below the smallest double underflows to 0 (a t of 60 on 900
    degrees of freedom already does: scipy's stdtr gives 0.0); the files write P_FLOOR
    and the report '<1e-300', never 0."""
    from scipy import special

    underflowed = float(2 * special.stdtr(900, -60.0))
    assert underflowed == 0.0  # the case the floor is for (scipy, computed here)
    cols = [
        ("cue", "str"),
        ("p_value", "float"),
        ("indirect_q_value", "float"),
        ("weight", "float"),
    ]
    values = [underflowed, 5e-324, 1e-250, 0.5]
    t = make_table("cue_weights", "p-values", cols, [("c", p, p, p) for p in values])
    csv_rows = _rows(write_csv(t, tmp_path / "t.csv"))
    assert [r["p_value"] for r in csv_rows] == ["1e-300", "1e-300", "1e-250", "0.5"]
    assert [r["indirect_q_value"] for r in csv_rows] == ["1e-300", "1e-300", "1e-250", "0.5"]
    assert [r["weight"] for r in csv_rows] == ["0.0", "5e-324", "1e-250", "0.5"]  # not a p
    parquet = pq.read_table(write_parquet(t, tmp_path / "t.parquet")).column("p_value")
    assert parquet.to_pylist() == [P_FLOOR, P_FLOOR, 1e-250, 0.5]
    from openpyxl import load_workbook

    write_workbook([t], tmp_path / "t.xlsx", [("Quarter", "test")], utc_now())
    sheet = load_workbook(tmp_path / "t.xlsx")["cue_weights"]
    assert [r[1] for r in sheet.iter_rows(min_row=2, values_only=True)] == [
        P_FLOOR, P_FLOOR, 1e-250, 0.5,
    ]  # fmt: skip
    shown = [cell_text(r[1], "p_value", "float") for r in t.rows]
    assert shown == ["<1e-300", "<1e-300", "1e-250", "0.5"]
