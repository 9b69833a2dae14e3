"""One decision-maker's cue weights window by window as a table for a report
(`cuewatch weights ID --out FILE.csv|.xlsx`, and the person page's download button).

The files are written by the audit pack's writers (``audit.formats``): the same typed
columns, rounding, and neutralised text cells (a cue level such as "=1" cannot become
a spreadsheet formula).
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from monitor.audit.formats import Table, make_table, spec, write_csv, write_workbook
from monitor.cautions import CAUTION
from monitor.config import Config
from monitor.errors import UserError
from monitor.refit.fits_read import read_fits
from monitor.stats.design import cue_of
from monitor.store.rules import utc_now

COLUMNS = spec(
    "decision_maker:str team:str window_start:date window_end:date data_from:date "
    "data_to:date partial:bool n_decisions:int cue:str forbidden:bool weight std_error ci_low "
    "ci_high std_weight p_value estimable:bool reason:str"
)
FORMATS = ("csv", "xlsx")


@dataclass(frozen=True)
class WeightHistory:
    """The table and where it was written (``path`` None when not written)."""

    table: Table
    path: Path | None = None

    def to_json(self) -> dict:
        return {
            "path": None if self.path is None else str(self.path),
            "columns": self.table.names,
            "rows": [
                {k: (v.isoformat() if hasattr(v, "isoformat") else v) for k, v in r.items()}
                for r in self.table.records()
            ],
        }

    def describe(self) -> str:
        n = len(self.table.rows)
        windows = len(set(self.table.column("window_end")))
        where = f" to {self.path}" if self.path else ""
        return f"Wrote {n} rows ({windows} windows x cues){where}."


def weight_history(config: Config, decision_maker: str) -> Table:
    """One row per (window, cue) of ``decision_maker``'s stored fits, oldest first."""
    from monitor.people import check_name

    check_name(config, decision_maker, teams_too=False, all_too=False)
    fits = read_fits(config, decision_maker=decision_maker, scope="decision_maker")
    forbidden = set(config.policy.forbidden)
    rows = [
        [f["decision_maker"], f["team"], f["window_start"], f["window_end"], f["data_from"],
         f["data_to"], f["partial"], f["n_decisions"], c["cue"], cue_of(c["cue"]) in forbidden,
         c["weight"], c["std_error"], c["ci_low"], c["ci_high"], c["std_weight"], c["p_value"],
         c["estimable"], c["reason"]]
        for f in fits
        for c in f["cues"]
    ]  # fmt: skip
    return make_table(
        "weight_history", f"Cue weights of {decision_maker}, window by window", COLUMNS,
        [[_date(v) if k == "date" else v for v, (_, k) in zip(r, COLUMNS, strict=True)]
         for r in rows],
    )  # fmt: skip


def export_weight_history(
    config: Config, decision_maker: str, out: Path, fmt: str | None = None
) -> WeightHistory:
    """Write the history to ``out`` as CSV or XLSX (``fmt``, else from the suffix)."""
    fmt = (fmt or out.suffix.lstrip(".") or "csv").lower()
    if fmt not in FORMATS:
        raise UserError(f"the weights table is written as {' or '.join(FORMATS)}, not '{fmt}'.")
    table = weight_history(config, decision_maker)
    if not table.rows:
        raise UserError(
            f"no window fits are stored for {decision_maker} yet: run 'cuewatch refit'."
        )
    out.parent.mkdir(parents=True, exist_ok=True)
    if fmt == "csv":
        write_csv(table, out)
    else:
        write_workbook([table], out, cover(decision_maker), utc_now())
    return WeightHistory(table, out)


def weight_history_bytes(config: Config, decision_maker: str, fmt: str) -> bytes:
    """The file ``export_weight_history`` writes, as bytes (for a download button)."""
    with tempfile.TemporaryDirectory(prefix="cuewatch-weights-") as tmp:
        path = Path(tmp) / f"weights.{fmt}"
        export_weight_history(config, decision_maker, path, fmt)
        return path.read_bytes()


def cover(decision_maker: str) -> list[tuple[str, str]]:
    return [
        ("table", f"Judge-model cue weights of {decision_maker}, one row per window and cue"),
        ("created", datetime.now().astimezone().isoformat(timespec="seconds")),
        ("weights", "weight, std_error and the 95% t interval in judgment units per cue unit; "
                    "std_weight = weight x sd(cue) / sd(judgment)"),
        ("windows", "data_from..data_to are the days the window holds decisions; partial = "
                    "fewer days than the window's length"),
        ("caution", CAUTION),
    ]  # fmt: skip


def _date(v):
    from datetime import date

    return None if v is None else date.fromisoformat(str(v)[:10])
