"""`cuewatch quarantine`: list the quarantined records and re-admit them after the
configuration changed.

Re-admission re-reads the selected records through the normal ingest path: their
``raw_row`` (the fields cuewatch read, as JSON keyed by the configured column names) is
written to a temporary JSON Lines file, which is staged, checked and appended as a new
batch whose path is ``quarantine:readmit:<batch ids>``, exactly as ``cuewatch ingest``
would (same checks, duplicate rules and dirty buckets).  A record that now passes is
stored and linked to its quarantine row in ``readmissions``; one that still fails stays
quarantined where it was (the new batch keeps no second copy of it).  Each kind is one
transaction: a crash leaves the store as it was before that kind.
"""

from __future__ import annotations

import hashlib
import shutil
import tempfile
from dataclasses import asdict, dataclass, field
from datetime import datetime
from pathlib import Path

import duckdb
import pandas as pd

from monitor.config import Config
from monitor.errors import UserError
from monitor.ingest.checks import REASONS, build_checks
from monitor.ingest.store_batch import _stage, _write_batch
from monitor.store.connection import Store
from monitor.store.rules import sql_literal, utc_now
from monitor.store.schema import drop_temp_tables

READMIT_PREFIX = "quarantine:readmit:"
_KINDS = ("decisions", "outcomes")  # decisions first: an outcome may need its decision


class QuarantineUsageError(UserError):
    """A bad selection for `cuewatch quarantine` (unknown reason, ...)."""


@dataclass(frozen=True)
class Selection:
    """Which quarantined records a listing or a re-admission looks at (None = any)."""

    reason: str | None = None
    batch: int | None = None
    file: str | None = None
    include_readmitted: bool = False

    @property
    def filtered(self) -> bool:
        return any(v is not None for v in (self.reason, self.batch, self.file))

    def validate(self) -> None:
        if self.reason is not None and self.reason not in REASONS:
            raise QuarantineUsageError(
                f"--reason must be one of {', '.join(sorted(REASONS))}, not '{self.reason}'."
            )

    def where_sql(self) -> tuple[str, list]:
        """SQL condition over quarantine q, batches b and readmissions r, and its params."""
        parts, params = ["true"], []
        if self.reason is not None:
            parts.append("q.reason = ?")
            params.append(self.reason)
        if self.batch is not None:
            parts.append("q.batch_id = ?")
            params.append(self.batch)
        if self.file is not None:
            parts.append("b.path IN (?, ?)")
            params += [self.file, str(Path(self.file).expanduser().resolve())]
        if not self.include_readmitted:
            parts.append("r.readmitted_batch IS NULL")
        return " AND ".join(parts), params


_FROM = (
    "FROM quarantine q JOIN batches b ON b.batch_id = q.batch_id "
    "LEFT JOIN readmissions r ON r.quarantine_batch = q.batch_id "
    "AND r.quarantine_line = q.source_line"
)

# A record kept as a JSON object can be read again; a line the reader could not split
# is kept as a JSON string and cannot (CASE: json_type raises on text that is not JSON).
_READABLE = "CASE WHEN json_valid(q.raw_row) THEN json_type(q.raw_row) = 'OBJECT' ELSE false END"


# --- listing ---------------------------------------------------------------------------


@dataclass(frozen=True)
class QuarantinedRecord:
    batch_id: int
    kind: str
    path: str
    line: int | None
    record_id: str | None
    reason: str
    message: str
    readmitted_batch: int | None
    readmitted_line: int | None


@dataclass
class QuarantineListing:
    """Counts of the selected quarantined records by reason, batch and file, and the
    records themselves when the selection was filtered."""

    selection: Selection
    by_reason: dict[str, int]
    by_batch: list[dict]  # batch_id, kind, path, count
    by_file: dict[str, int]
    records: list[QuarantinedRecord] | None

    @property
    def total(self) -> int:
        return sum(self.by_reason.values())

    def to_json(self) -> dict:
        """The `quarantine --json` document (DEVELOPERS.md, The store)."""
        return {
            "selection": asdict(self.selection),
            "total": self.total,
            "by_reason": self.by_reason,
            "by_batch": self.by_batch,
            "by_file": self.by_file,
            "records": None if self.records is None else [asdict(r) for r in self.records],
        }

    def describe(self) -> str:
        """The same account in a few lines for a person."""
        which = "quarantined records" + (
            " (re-admitted ones included)" if self.selection.include_readmitted else ""
        )
        lines = [f"{self.total} {which}."]
        if self.by_reason:
            lines.append("By reason: " + ", ".join(f"{k} {v}" for k, v in self.by_reason.items()))
        for b in self.by_batch:
            lines.append(f"  batch {b['batch_id']} ({b['kind']}, {b['path']}): {b['count']}")
        for r in self.records or []:
            back = (
                f" [re-admitted: batch {r.readmitted_batch} line {r.readmitted_line}]"
                if r.readmitted_batch is not None
                else ""
            )
            lines.append(f"  {r.batch_id}:{r.line} id={r.record_id} {r.reason}: {r.message}{back}")
        return "\n".join(lines)


def list_quarantine(config: Config, selection: Selection) -> QuarantineListing:
    """Count (and, when filtered, list) the quarantined records ``selection`` picks."""
    selection.validate()
    store = Store(config)
    where, params = selection.where_sql()
    with store.reader() as con:
        store.ensure_ready(con)
        by_reason = dict(
            con.execute(
                f"SELECT q.reason, count(*) {_FROM} WHERE {where} GROUP BY 1 ORDER BY 1", params
            ).fetchall()
        )
        batches = con.execute(
            f"SELECT q.batch_id, b.kind, b.path, count(*) {_FROM} WHERE {where} "
            "GROUP BY ALL ORDER BY 1",
            params,
        ).fetchall()
        records = None
        if selection.filtered:
            records = [
                QuarantinedRecord(*row)
                for row in con.execute(
                    f"SELECT q.batch_id, q.kind, b.path, q.source_line, q.record_id, q.reason, "
                    f"q.message, r.readmitted_batch, r.readmitted_line {_FROM} WHERE {where} "
                    "ORDER BY q.batch_id, q.source_line",
                    params,
                ).fetchall()
            ]
    by_batch = [{"batch_id": b, "kind": k, "path": p, "count": int(n)} for b, k, p, n in batches]
    by_file: dict[str, int] = {}
    for b in by_batch:
        by_file[b["path"]] = by_file.get(b["path"], 0) + b["count"]
    return QuarantineListing(
        selection, {k: int(v) for k, v in by_reason.items()}, by_batch, by_file, records
    )


# --- re-admission ------------------------------------------------------------------------


@dataclass
class KindReadmission:
    kind: str
    batch_id: int
    path: str
    selected: int
    readmitted: int  # stored as new rows
    duplicates: int  # identical to a row already stored: counted as back, nothing appended
    still_quarantined: int
    still_reasons: dict[str, int] = field(default_factory=dict)


@dataclass
class ReadmitSummary:
    """What `quarantine --readmit` did, one entry per kind that had records to re-check."""

    kinds: list[KindReadmission]
    unreadable: int  # selected records kept as raw lines, which cannot be re-read

    @property
    def readmitted(self) -> int:
        return sum(k.readmitted + k.duplicates for k in self.kinds)

    @property
    def still_quarantined(self) -> int:
        return sum(k.still_quarantined for k in self.kinds) + self.unreadable

    def to_json(self) -> dict:
        """The `quarantine --readmit --json` document (DEVELOPERS.md, The store)."""
        return {
            "kinds": [asdict(k) for k in self.kinds],
            "readmitted": self.readmitted,
            "still_quarantined": self.still_quarantined,
            "unreadable": self.unreadable,
        }

    def describe(self) -> str:
        """The same account in a few lines for a person."""
        if not self.kinds and not self.unreadable:
            return "Nothing to re-admit: no quarantined record matches."
        lines = [
            f"{self.readmitted} record(s) re-admitted, {self.still_quarantined} still quarantined."
        ]
        for k in self.kinds:
            reasons = ", ".join(f"{r} {n}" for r, n in k.still_reasons.items())
            lines.append(
                f"  {k.kind}: batch {k.batch_id} ({k.path}): {k.readmitted} stored, "
                f"{k.duplicates} already stored, {k.still_quarantined} still failing"
                + (f" ({reasons})" if reasons else "")
            )
        if self.unreadable:
            lines.append(
                f"  {self.unreadable} record(s) are lines the reader could not split; "
                "they cannot be re-read and stay quarantined."
            )
        return "\n".join(lines)


def readmit(config: Config, selection: Selection, now: datetime | None = None) -> ReadmitSummary:
    """Re-check the selected, not yet re-admitted quarantined records against the current
    configuration and append those that pass (see the module docstring).  ``now`` fixes
    the clock for the future-timestamp check (tests)."""
    selection.validate()
    if selection.include_readmitted:
        raise QuarantineUsageError("--all cannot be combined with --readmit.")
    store = Store(config)
    now = now or utc_now()
    where, params = selection.where_sql()
    with store.writer() as con:
        store.ensure_ready(con)
        con.execute(f"SET memory_limit = {sql_literal(config.ingest.memory_limit)}")
        rows = con.execute(
            f"SELECT q.kind, q.batch_id, q.source_line, q.raw_row, {_READABLE} {_FROM} "
            f"WHERE {where} ORDER BY q.batch_id, q.source_line",
            params,
        ).fetchall()
        unreadable = sum(1 for r in rows if not r[4])
        kinds = []
        for kind in _KINDS:
            picked = [(b, line, raw) for k, b, line, raw, ok in rows if k == kind and ok]
            if not picked:
                continue
            if kind == "outcomes" and config.outcomes is None:
                raise QuarantineUsageError(
                    "quarantined outcomes selected but the configuration has no [outcomes]."
                )
            kinds.append(_readmit_kind(con, config, kind, picked, now))
    return ReadmitSummary(kinds, unreadable)


def _readmit_kind(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    kind: str,
    picked: list[tuple[int, int, str]],
    now: datetime,
) -> KindReadmission:
    """Ingest ``picked`` (quarantine batch, line, raw_row) as one new batch, in one
    transaction with the links to the quarantine rows of the records that came back."""
    label = READMIT_PREFIX + ",".join(str(b) for b in sorted({b for b, _, _ in picked}))
    scratch = Path(tempfile.mkdtemp(prefix="cuewatch-readmit-"))
    path = scratch / "readmit.jsonl"
    # raw_row is one JSON object on one line (JSON text never holds a raw newline), so
    # line i of this file is picked[i - 1].
    body = "".join(raw + "\n" for _, _, raw in picked).encode("utf-8")
    path.write_bytes(body)
    started = utc_now()
    checks = build_checks(config, kind)
    try:
        rejected = _stage(con, config, checks, path, "jsonl", now, label)
        con.execute("BEGIN")
        try:
            result = _write_batch(
                con,
                config,
                checks,
                rejected,
                path,
                "jsonl",
                hashlib.sha256(body).hexdigest(),
                len(body),
                started,
                label,
            )
            moved = _link_and_tidy(con, result.batch_id, picked)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
    finally:
        drop_temp_tables(con, "_raw", "_checked", "_rejects", "_reject_errors", "_reject_scans")
        shutil.rmtree(scratch, ignore_errors=True)
    return KindReadmission(
        kind,
        result.batch_id,
        label,
        len(picked),
        result.accepted,
        result.duplicates,
        result.quarantined,
        dict(sorted(moved.items())),
    )


def _link_and_tidy(
    con: duckdb.DuckDBPyConnection, batch_id: int, picked: list[tuple[int, int, str]]
) -> dict[str, int]:
    """Inside the transaction: drop the new batch's copies of the records that still
    fail (their original quarantine rows stay), link every other record to its
    quarantine row, and keep the batch's counts to what it brought back.  Returns the
    still-failing records' reasons."""
    failing = dict(
        con.execute(
            "SELECT source_line, reason FROM quarantine WHERE batch_id = ?", [batch_id]
        ).fetchall()
    )
    con.execute("DELETE FROM quarantine WHERE batch_id = ?", [batch_id])
    links = pd.DataFrame(
        [
            (qb, ql, batch_id, i)
            for i, (qb, ql, _) in enumerate(picked, start=1)
            if i not in failing
        ],
        columns=["quarantine_batch", "quarantine_line", "readmitted_batch", "readmitted_line"],
    )
    con.register("_readmit_links", links)
    try:
        con.execute(
            "INSERT INTO readmissions SELECT quarantine_batch, quarantine_line, "
            "readmitted_batch, readmitted_line, ? FROM _readmit_links",
            [utc_now()],
        )
    finally:
        con.unregister("_readmit_links")
    con.execute(
        "UPDATE batches SET rows_read = rows_read - rows_quarantined, rows_quarantined = 0, "
        "message = ? WHERE batch_id = ?",
        [
            f"re-admitted from quarantine; {len(failing)} record(s) still failing stay "
            "quarantined under their own batches",
            batch_id,
        ],
    )
    reasons: dict[str, int] = {}
    for reason in failing.values():
        reasons[reason] = reasons.get(reason, 0) + 1
    return reasons
