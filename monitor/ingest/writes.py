"""The write side of ingest, as SQL over the checked staging table ``_checked``: which
records are duplicates or conflicts of what is stored (or of earlier records in the
same file), and the statements that append the accepted records, quarantine the
rejected ones and mark the touched (decision maker, day) buckets for refresh.

Each function takes the file's ``Checks`` (monitor.ingest.checks) for its columns and
kind; all identifiers and literals that come from the configuration go through the
store's quoting.
"""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING

from monitor.store.rules import quote_ident as qi
from monitor.store.rules import sql_literal as lit

if TYPE_CHECKING:  # for the hints only, so the import between the two stays one-way
    from monitor.ingest.checks import Checks, FileColumn


# --- duplicates and conflicts ------------------------------------------------------------


def _compare(checks: Checks, a: str, b: str, stored: bool) -> str:
    """SQL: record a's parsed content equals b's (b a stored row when ``stored``)."""
    parts = []
    for c in checks.columns:
        if c.role == "id" or (stored and c.role == "change"):
            continue
        left = f"{a}.p_{c.alias}"
        right = f"{b}.{_stored_column(checks, c)}" if stored else f"{b}.p_{c.alias}"
        parts.append(f"{left} IS NOT DISTINCT FROM {right}")
    return " AND ".join(parts)


def _stored_column(checks: Checks, c: FileColumn) -> str:
    return {
        "time": "decided_at" if checks.kind == "decisions" else "observed_at",
        "maker": "decision_maker",
        "team": "team",
        "value": "judgment" if checks.kind == "decisions" else "criterion",
    }.get(c.role) or qi(c.cue)


def classify_duplicates_sql(checks: Checks) -> str:
    """Statements that mark duplicates and conflicting duplicates in _checked."""
    idc = f"p_{checks.col('id').alias}"
    conflict_msg = (
        "'id ' || c.{id} || ' is already stored with different content; the stored record is kept'"
    )
    if checks.kind == "decisions":
        same_stored = _compare(checks, "c", "d", True)
        stored = (
            f"UPDATE _checked AS c SET is_duplicate = ({same_stored}), "
            f"reason = CASE WHEN ({same_stored}) THEN NULL ELSE 'conflicting_duplicate' END, "
            f"message = CASE WHEN ({same_stored}) THEN NULL ELSE {conflict_msg.format(id=idc)} END "
            f"FROM decisions d WHERE d.decision_id = c.{idc} AND c.reason IS NULL AND NOT c.is_blank"
        )
    else:
        tcol = f"p_{checks.col('time').alias}"
        # An outcome identical to one already in the history is a re-delivery; a
        # different one for the same decision is a correction and is appended.
        stored = (
            f"UPDATE _checked AS c SET is_duplicate = true FROM outcomes o "
            f"WHERE o.decision_id = c.{idc} AND o.observed_at = c.{tcol} "
            f"AND o.criterion IS NOT DISTINCT FROM c.p_{checks.col('value').alias} "
            f"AND c.reason IS NULL AND NOT c.is_blank;\n"
            f"UPDATE _checked AS c SET reason = 'outcome_before_decision', "
            f"message = 'outcome observed at ' || CAST(c.{tcol} AS VARCHAR) || ' is before its decision at ' "
            f"|| CAST(d.decided_at AS VARCHAR) FROM decisions d "
            f"WHERE d.decision_id = c.{idc} AND c.{tcol} < d.decided_at AND c.reason IS NULL "
            f"AND NOT c.is_duplicate AND NOT c.is_blank"
        )
    same = _compare(checks, "c", "f", False)
    if checks.kind == "outcomes":
        # Several rows for one decision in one file: identical ones are duplicates,
        # different ones are successive corrections (all appended, in file order).
        repeated = _repeated_ids(idc, "reason IS NULL AND NOT is_blank")
        within = (
            f"UPDATE _checked AS c SET is_duplicate = true FROM {repeated} AS m, _checked AS f "
            f"WHERE c.{idc} = m.k AND f.{idc} = m.k AND f.rowid < c.rowid AND ({same}) "
            f"AND c.reason IS NULL AND f.reason IS NULL AND NOT f.is_blank AND NOT c.is_blank"
        )
    else:
        in_file_conflict = f"'id ' || c.{idc} || ' appears earlier in this file (line ' || {checks.line_expr('f.rowid')} || ') with different content'"
        within = (
            f"UPDATE _checked AS c SET is_duplicate = ({same}), "
            f"reason = CASE WHEN ({same}) THEN NULL ELSE 'conflicting_duplicate' END, "
            f"message = CASE WHEN ({same}) THEN NULL ELSE {in_file_conflict} END "
            f"FROM {_repeated_ids(idc, 'reason IS NULL AND NOT is_duplicate AND NOT is_blank')} AS m, "
            f"_checked AS f "
            f"WHERE c.{idc} = m.k AND f.rowid = m.first_ord AND c.rowid > m.first_ord "
            f"AND c.reason IS NULL AND NOT c.is_duplicate AND NOT c.is_blank"
        )
    return stored + ";\n" + within


def _repeated_ids(idc: str, where: str) -> str:
    """SQL: the ids (k) that occur more than once among the staged records matching
    ``where``, with the ordinal of the first (first_ord).  Grouping the ids' 64-bit
    hashes first is much cheaper than grouping millions of strings, and only the
    few records whose hash repeats are then grouped by the id itself."""
    return (
        f"(SELECT {idc} AS k, min(rowid) AS first_ord FROM _checked "
        f"WHERE {where} AND hash({idc}) IN (SELECT h FROM (SELECT hash({idc}) AS h FROM _checked "
        f"WHERE {where} GROUP BY h HAVING count(*) > 1)) "
        f"GROUP BY {idc} HAVING count(*) > 1)"
    )


# --- writing -------------------------------------------------------------------------------


def _not_retraction(checks: Checks, prefix: str = "") -> str:
    """SQL: `` AND NOT <retracting>`` when the files may carry retractions (which add
    no row and touch no new bucket: monitor.ingest.corrections handles them)."""
    retracting = checks.retracting_sql(prefix)
    return "" if retracting is None else f" AND NOT {retracting}"


def insert_sql(checks: Checks, batch_id: int, ingested_at: datetime) -> str:
    """INSERT appending the accepted records of _checked to decisions / outcomes."""
    # No ORDER BY: a filtered scan keeps _checked's (file) order while DuckDB's
    # preserve_insertion_order is on (the default), and a sort of every accepted
    # row was a large share of the ingest time.
    ok = "reason IS NULL AND NOT is_duplicate AND NOT is_blank" + _not_retraction(checks)
    ts = f"p_{checks.col('time').alias}"
    if checks.kind == "decisions":
        cue_cols = [c for c in checks.columns if c.role == "cue"]
        names = ", ".join(qi(c.cue) for c in cue_cols)
        vals = ", ".join(f"p_{c.alias}" for c in cue_cols)
        return (
            f"INSERT INTO decisions (decision_id, decided_at, decided_day, decision_maker, team, "
            f"judgment, batch_id, ingested_at, source_line, {names}) "
            f"SELECT p_{checks.col('id').alias}, {ts}, CAST({ts} AS DATE), "
            f"p_{checks.col('maker').alias}, {_team_expr(checks)}, "
            f"p_{checks.col('value').alias}, {batch_id}, "
            f"{lit(ingested_at.isoformat())}::TIMESTAMPTZ, {checks.line_expr('rowid')}, {vals} "
            f"FROM _checked WHERE {ok}"
        )
    return (
        f"INSERT INTO outcomes (decision_id, observed_at, criterion, batch_id, ingested_at, source_line) "
        f"SELECT p_{checks.col('id').alias}, {ts}, p_{checks.col('value').alias}, {batch_id}, "
        f"{lit(ingested_at.isoformat())}::TIMESTAMPTZ, {checks.line_expr('rowid')} "
        f"FROM _checked WHERE {ok}"
    )


def _team_expr(checks: Checks) -> str:
    team = [c for c in checks.columns if c.role == "team"]
    return f"p_{team[0].alias}" if team else "NULL"


def quarantine_sql(checks: Checks, batch_id: int, ingested_at: datetime) -> str:
    """INSERT moving the rejected records of _checked to quarantine, in file order."""
    return (
        f"INSERT INTO quarantine SELECT {batch_id}, {lit(checks.kind)}, {checks.line_expr('rowid')}, "
        f"p_{checks.col('id').alias}, reason, coalesce(message, reason), "
        f"{checks.quarantined_record_expr()}, {lit(ingested_at.isoformat())}::TIMESTAMPTZ "
        f"FROM _checked WHERE reason IS NOT NULL AND NOT is_blank ORDER BY rowid"
    )


def mark_dirty_sql(checks: Checks, marked_at: datetime) -> str:
    """INSERT marking the (decision maker, day) buckets the accepted records touch."""
    ok = "c.reason IS NULL AND NOT c.is_duplicate AND NOT c.is_blank" + _not_retraction(
        checks, "c."
    )
    stamp = f"{lit(marked_at.isoformat())}::TIMESTAMPTZ"
    if checks.kind == "decisions":
        ts = f"c.p_{checks.col('time').alias}"
        return (
            f"INSERT INTO dirty_buckets SELECT DISTINCT c.p_{checks.col('maker').alias}, "
            f"CAST({ts} AS DATE), {stamp} FROM _checked c WHERE {ok}"
        )
    return (
        f"INSERT INTO dirty_buckets SELECT DISTINCT d.decision_maker, d.decided_day, {stamp} "
        f"FROM _checked c JOIN decisions d ON d.decision_id = c.p_{checks.col('id').alias} WHERE {ok}"
    )
