"""Corrections and retractions of stored decisions, as SQL over the checked staging
table ``_checked``.

A decision file may carry a change column (``[decisions] change``).  Empty: the row is
a new decision, as without the column.  ``correct_value``: the row replaces the stored
decision with the same id.  ``retract_value``: the stored decision is withdrawn (only
the id is read).  The replaced row moves to ``superseded_decisions`` with the batch,
line, time and kind of the change, so history is kept and the audit pack can show the
decision as it was known at any moment (``store.rules.decisions_known_at_sql``); the
buckets of both the old and the new version are marked for the refit.

Classification (``classify_changes_sql``), per staged record that passed its checks:
* new decision or correction identical to the stored decision: duplicate;
* new decision whose id is stored with other content: ``conflicting_duplicate``
  (the message says to send it as a correction);
* retraction of a decision already retracted (and not sent again since): duplicate;
* correction or retraction of an id that is not stored: ``unknown_decision``;
* one id several times in one file: the first valid record counts, a later identical
  one is a duplicate, a different one a ``conflicting_duplicate`` (as without changes).
"""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING

import duckdb

from monitor.ingest.writes import _compare, _repeated_ids
from monitor.store.rules import CORRECTED, RETRACTED
from monitor.store.rules import sql_literal as lit

if TYPE_CHECKING:
    from monitor.ingest.checks import Checks


def classify_changes_sql(checks: Checks) -> str:
    """Statements marking duplicates, conflicts and unknown decisions in ``_checked`` for
    a decision file whose configuration has a change column."""
    change = checks.change_column()
    d = checks.config.decisions
    idc = f"p_{checks.col('id').alias}"
    retract = checks.retracting_sql("c.")
    new = f"c.p_{change.alias} IS NULL"
    live = "c.reason IS NULL AND NOT c.is_blank"
    same_stored = _compare(checks, "c", "d", True)
    hint = lit(
        f"; the stored record is kept (send the row with {change.source}={d.correct_value} to replace it)"
    )
    unknown = lit(" is not stored (never received, or retracted): nothing to ")
    action = f"CASE WHEN {retract} THEN 'retract' ELSE 'correct' END"
    stored = [
        f"UPDATE _checked AS c SET is_duplicate = true FROM decisions d "
        f"WHERE d.decision_id = c.{idc} AND {live} AND NOT {retract} AND ({same_stored})",
        f"UPDATE _checked AS c SET reason = 'conflicting_duplicate', "
        f"message = 'id ' || c.{idc} || ' is already stored with different content' || {hint} "
        f"FROM decisions d WHERE d.decision_id = c.{idc} AND {live} AND {new} "
        f"AND NOT c.is_duplicate",
        f"UPDATE _checked AS c SET is_duplicate = true WHERE {live} AND {retract} "
        f"AND c.{idc} NOT IN (SELECT decision_id FROM decisions) "
        f"AND c.{idc} IN (SELECT decision_id FROM superseded_decisions "
        f"WHERE superseded_change = {lit(RETRACTED)})",
        f"UPDATE _checked AS c SET reason = 'unknown_decision', "
        f"message = 'id ' || c.{idc} || {unknown} || {action} "
        f"WHERE {live} AND NOT c.is_duplicate AND NOT ({new}) "
        f"AND c.{idc} NOT IN (SELECT decision_id FROM decisions)",
    ]
    # Within the file: the same content (change included), or two retractions.
    same = (
        f"(({_compare(checks, 'c', 'f', False)}) OR ({retract} AND {checks.retracting_sql('f.')}))"
    )
    conflict = (
        f"'id ' || c.{idc} || ' appears earlier in this file (line ' || "
        f"{checks.line_expr('f.rowid')} || ') with different content or change'"
    )
    repeated = _repeated_ids(idc, "reason IS NULL AND NOT is_duplicate AND NOT is_blank")
    within = (
        f"UPDATE _checked AS c SET is_duplicate = {same}, "
        f"reason = CASE WHEN {same} THEN NULL ELSE 'conflicting_duplicate' END, "
        f"message = CASE WHEN {same} THEN NULL ELSE {conflict} END "
        f"FROM {repeated} AS m, _checked AS f "
        f"WHERE c.{idc} = m.k AND f.rowid = m.first_ord AND c.rowid > m.first_ord "
        f"AND c.reason IS NULL AND NOT c.is_duplicate AND NOT c.is_blank"
    )
    return ";\n".join([*stored, within])


def supersede(
    con: duckdb.DuckDBPyConnection, checks: Checks, batch_id: int, ingested_at: datetime
) -> tuple[int, int]:
    """Inside the batch's transaction, before the accepted records are appended: move the
    stored rows that the batch's accepted corrections and retractions replace to
    ``superseded_decisions``, delete them from ``decisions`` and mark their buckets
    dirty.  Returns (corrections, retractions)."""
    change = checks.change_column()
    if change is None:
        return 0, 0
    idc = f"p_{checks.col('id').alias}"
    accepted = (
        f"c.reason IS NULL AND NOT c.is_duplicate AND NOT c.is_blank "
        f"AND c.p_{change.alias} IS NOT NULL"
    )
    retract = checks.retracting_sql("c.")
    row = con.execute(
        f"SELECT count(*) FILTER (WHERE NOT {retract}), count(*) FILTER (WHERE {retract}) "
        f"FROM _checked c WHERE {accepted}"
    ).fetchone()
    corrected, retracted = int(row[0]), int(row[1])
    if not corrected + retracted:
        return 0, 0
    stamp = f"{lit(ingested_at.isoformat())}::TIMESTAMPTZ"
    con.execute(
        "INSERT INTO superseded_decisions BY NAME "
        f"SELECT d.*, {int(batch_id)} AS superseded_batch, "
        f"{checks.line_expr('c.rowid')} AS superseded_line, {stamp} AS superseded_at, "
        f"CASE WHEN {retract} THEN {lit(RETRACTED)} ELSE {lit(CORRECTED)} END "
        "AS superseded_change "
        f"FROM decisions d JOIN _checked c ON d.decision_id = c.{idc} WHERE {accepted}"
    )
    con.execute(
        f"DELETE FROM decisions WHERE decision_id IN (SELECT c.{idc} FROM _checked c "
        f"WHERE {accepted})"
    )
    # The buckets the replaced versions leave (the new versions' buckets are marked with
    # every other accepted record).
    con.execute(
        f"INSERT INTO dirty_buckets SELECT DISTINCT decision_maker, decided_day, {stamp} "
        f"FROM superseded_decisions WHERE superseded_batch = {int(batch_id)}"
    )
    return corrected, retracted
