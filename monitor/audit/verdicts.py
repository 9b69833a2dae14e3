"""The pack's window verdicts: the stored findings as they stood at the as-of time.

The alerts open and resolve on the weekly windows' findings, the dashboard shows them,
and this table puts the same rows in the pack: every version of ``finding_versions``
that had been evaluated by the as-of time and not yet superseded then
(``store.rules.version_known_at``), for the windows ending in the quarter.  Nothing is
recomputed here, so the pack can never reach another verdict than the alerts did.
"""

from __future__ import annotations

from datetime import date

import pandas as pd

from monitor.audit.formats import Table, table_from_columns
from monitor.config import Config
from monitor.store.connection import Store
from monitor.store.rules import version_known_at

WINDOW_FINDING_COLUMNS = (
    "check_kind:str scope:str decision_maker:str team:str cue:str level:str "
    "level_detail:bool window_start:date window_end:date n:int disparity direct indirect "
    "std_disparity std_weight std_indirect ci_low ci_high p_value q_value statistic "
    "flagged:bool assessable:bool reason:str change_day:date change_low:date "
    "change_high:date evaluated_at:str"
)
TITLE = (
    "Stored findings of the weekly windows ending in the quarter, as they stood at the "
    "as-of time (the rows the alerts and the dashboard read); ci_low/ci_high bracket "
    "std_indirect on forbidden_proxy rows and std_weight on the others"
)


def fetch_window_findings(config: Config, first: date, last: date, as_of: str) -> pd.DataFrame:
    """The finding versions standing at ``as_of`` for windows ending in [first, last]."""
    with Store(config).reader() as con:
        return con.execute(
            "SELECT * EXCLUDE (superseded_at, row_hash) FROM finding_versions "
            f"WHERE {version_known_at()} AND window_end BETWEEN ? AND ? "
            "ORDER BY check_kind, scope, decision_maker, cue, window_end, "
            "level_detail, level NULLS FIRST",
            [as_of, as_of, first, last],
        ).df()


def _values(frame: pd.DataFrame, column: str) -> list:
    values = frame[column].astype(object).where(frame[column].notna(), None)
    if column == "evaluated_at":
        return [None if v is None else pd.Timestamp(v).isoformat() for v in values]
    if column in ("window_start", "window_end", "change_day", "change_low", "change_high"):
        return [None if v is None else pd.Timestamp(v).date() for v in values]
    return list(values)


def window_findings_table(frame: pd.DataFrame) -> Table:
    data = {c: _values(frame, c) for c in frame.columns}
    return table_from_columns("window_findings", TITLE, WINDOW_FINDING_COLUMNS, data)
