"""One input into one batch: stage and check a file (a landing file, standard input, a
PostgreSQL pull's spool, re-admitted quarantine records) in temporary tables, then append
its rows, quarantine and counts to the store in one transaction.

The hot path is set-based SQL inside DuckDB (its own CSV / JSON / Parquet readers,
one staging table per file, CASE expressions for the checks), so large files stream
with bounded memory and no Python loop runs per row.  The per-record checks are built in
monitor.ingest.checks and the write statements in monitor.ingest.writes.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path

import duckdb

from monitor import __version__
from monitor.config import Config
from monitor.ingest.checks import FileRejected, build_checks, reader_sql
from monitor.ingest.corrections import classify_changes_sql, supersede
from monitor.ingest.files import detect_format, find_line, mask_lines, present_columns
from monitor.ingest.writes import (
    classify_duplicates_sql,
    insert_sql,
    mark_dirty_sql,
    quarantine_sql,
)
from monitor.store.rules import clock_kind, sql_literal, utc_now
from monitor.store.schema import drop_temp_tables, empty_temp_table, stage_temp_table


@dataclass
class FileResult:
    path: str
    kind: str
    # "ingested" | "skipped" (already ingested) | "waiting" (a landing file still
    # changing: not read, not recorded, taken by a later run) | "failed"
    status: str
    batch_id: int | None = None
    rows_read: int = 0
    accepted: int = 0
    quarantined: int = 0
    duplicates: int = 0
    # Of ``accepted``: decisions corrected and retracted (monitor.ingest.corrections).
    corrected: int = 0
    retracted: int = 0
    quarantine_reasons: dict[str, int] = field(default_factory=dict)
    message: str = ""
    # "file", or "postgresql" for a pull (status "up_to_date" when it found no new rows).
    source: str = "file"


def ingest_spooled(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    path: Path,
    kind: str,
    now: datetime,
    label: str,
    *,
    sha: str,
    fmt: str | None = None,
    recorded_format: str | None = None,
    started: datetime | None = None,
    before_commit: Callable[[duckdb.DuckDBPyConnection, FileResult], None] | None = None,
) -> FileResult:
    """Check and store one file as one batch (the path files take, and the one rows
    pulled from elsewhere take once spooled to a file).  ``fmt`` is the reader to use
    (default: from the suffix), ``recorded_format`` what ``batches.format`` says (default
    ``fmt``); ``before_commit`` runs inside the batch's transaction after its rows are
    written, so what it writes commits with them or not at all."""
    size = path.stat().st_size
    started = started or utc_now()
    try:
        fmt = fmt or detect_format(path)
        checks = build_checks(config, kind)
        staged = _stage(con, config, checks, path, fmt, now, label)
        con.execute("BEGIN")
        try:
            result = _write_batch(
                con,
                config,
                checks,
                staged,
                path,
                fmt,
                sha,
                size,
                started,
                label,
                recorded_format or fmt,
            )
            if before_commit is not None:
                before_commit(con, result)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
        return result
    except (FileRejected, duckdb.Error, UnicodeDecodeError) as exc:
        message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        fmt_shown = recorded_format or path.suffix.lstrip(".") or "?"
        return record_failed(con, config, kind, label, sha, size, fmt_shown, started, message)
    finally:
        drop_temp_tables(con, "_raw", "_checked", "_rejects", "_reject_errors", "_reject_scans")


def record_failed(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    kind: str,
    label: str,
    sha: str,
    size: int,
    fmt: str,
    started: datetime,
    message: str,
) -> FileResult:
    """Record an input that could not be ingested as a failed batch (no rows)."""
    batch_id = con.execute("SELECT nextval('batch_ids')").fetchone()[0]
    con.execute(
        "INSERT INTO batches VALUES (?, ?, ?, ?, ?, ?, 0, 0, 0, 0, ?, ?, 'failed', ?, ?, ?, ?)",
        [
            batch_id,
            kind,
            label,
            sha,
            size,
            fmt,
            started,
            utc_now(),
            message,
            config.digest,
            __version__,
            clock_kind(),
        ],
    )
    return FileResult(label, kind, "failed", batch_id=batch_id, message=message)


def _stage(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    checks,
    path: Path,
    fmt: str,
    now: datetime,
    label: str,
) -> int:
    """Read and check one file into temporary tables (outside the write transaction,
    so a record's ordinal is its rowid).  Returns the number of lines the reader
    rejected outright."""
    present = present_columns(con, config, path, fmt)
    checks.require_columns(present, label)

    # 1. Read, parse and check every record in one set-based pass, in file order
    #    (the staged table's rowid is the record's ordinal).  A CSV line whose quote
    #    is never closed swallows the lines after it into one rejected record: that
    #    line is masked and the file read again (monitor.ingest.files.mask_lines).
    masked: dict[int, tuple[int, str]] = {}  # reader's line -> (physical line, its text)
    spans: list[tuple[int, int]] = []
    scratch: Path | None = None
    try:
        source = path
        for _ in range(MAX_QUOTE_PASSES):
            _read_and_check(con, config, checks, source, fmt, now, present)
            rejected_lines = _stage_rejects(con) if fmt != "parquet" else 0
            runaway = _runaway_quotes(con) if fmt == "csv" and rejected_lines else []
            if not runaway:
                break
            for line, record in runaway:
                taken = {physical for physical, _ in masked.values()}
                found = find_line(path, config.ingest.encoding, record, line, taken)
                if found is None:
                    raise FileRejected(
                        f"{label}: line {line} opens a quoted value that is never closed"
                    )
                physical, start, length = found
                masked[line] = (physical, _decoded(path, config.ingest.encoding, start, length))
                spans.append((start, length))
            scratch = scratch or Path(tempfile.mkdtemp(prefix="cuewatch-masked-"))
            source = mask_lines(path, spans, _placeholder(config), scratch / "masked.csv")
            drop_temp_tables(con, "_checked", "_rejects", "_reject_errors", "_reject_scans")
        else:
            first = min(masked)
            raise FileRejected(
                f"more than {MAX_QUOTE_PASSES - 1} rounds of quoted values that are "
                f"never closed, the first on line {first}"
            )
    finally:
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    for line, (_, original) in masked.items():
        con.execute(
            "UPDATE _rejects SET error_type = 'UNCLOSED QUOTE', csv_line = ? WHERE line = ?",
            [original, line],
        )
    checks.set_line_numbers(fmt, rejected_lines > 0)

    # 2. Duplicates: identical to what is stored (or earlier in the file) -> counted;
    #    a stored decision with different content -> quarantined, never overwritten.
    changes = checks.change_column() is not None
    con.execute(classify_changes_sql(checks) if changes else classify_duplicates_sql(checks))
    return rejected_lines


# Rounds of masking unclosed quotes before a file is given up (each round reads the file
# again; a round masks every such line the reader reported, so one or two is usual).
MAX_QUOTE_PASSES = 20


def _read_and_check(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    checks,
    source: Path,
    fmt: str,
    now: datetime,
    present: list[str],
) -> None:
    """Stage ``source`` as ``_checked`` (and the reader's rejected lines as
    ``_reject_errors``)."""
    tz = checks.timezone
    if tz != config.decisions.timezone:
        con.execute(f"SET TimeZone = {sql_literal(tz)}")
    try:
        horizon = now + timedelta(hours=config.ingest.future_tolerance_hours)
        reader = reader_sql(config, source, fmt, checks.columns, present)
        if fmt == "jsonl":
            # Materialise the JSON Lines split first: inlined, the optimiser may run a
            # JSON function on a line that is not JSON before the CASE guards it.
            stage_temp_table(con, "_raw", reader)
            reader = "SELECT * FROM _raw"
        stage_temp_table(
            con,
            "_checked",
            checks.checked_sql(reader, fmt, horizon=horizon, earliest=config.ingest.earliest),
        )
    finally:
        if tz != config.decisions.timezone:
            con.execute(f"SET TimeZone = {sql_literal(config.decisions.timezone)}")
        drop_temp_tables(con, "_raw")


def _runaway_quotes(con: duckdb.DuckDBPyConnection) -> list[tuple[int, str]]:
    """(line, text) of the rejected CSV records that run over several lines because a
    quote was not closed (the reader reports an unquoted value at the place where it
    finally gave up)."""
    return con.execute(
        "SELECT line, csv_line FROM _rejects WHERE error_type = 'UNQUOTED VALUE' "
        "AND regexp_matches(trim(csv_line, chr(13) || chr(10)), '[\\r\\n]') ORDER BY line"
    ).fetchall()


def _placeholder(config: Config) -> bytes:
    """A line the CSV reader rejects on its own (one field: no delimiter, no quote)."""
    return b"^" if config.ingest.delimiter == "~" else b"~"


def _decoded(path: Path, encoding: str, start: int, length: int) -> str:
    with open(path, "rb") as fh:
        fh.seek(start)
        return fh.read(length).decode(encoding, "replace")


def _write_batch(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    checks,
    rejected_lines: int,
    path: Path,
    fmt: str,
    sha: str,
    size: int,
    started: datetime,
    label: str,
    recorded_format: str | None = None,
) -> FileResult:
    """Append one staged file to the store; the caller holds the transaction.
    ``recorded_format`` is what ``batches.format`` says (default ``fmt``)."""
    kind = checks.kind
    batch_id = con.execute("SELECT nextval('batch_ids')").fetchone()[0]
    ingested_at = utc_now()
    corrected, retracted = supersede(con, checks, batch_id, ingested_at)
    accepted = con.execute(insert_sql(checks, batch_id, ingested_at)).fetchone()
    accepted = (int(accepted[0]) if accepted else 0) + retracted
    con.execute(quarantine_sql(checks, batch_id, ingested_at))
    if rejected_lines:
        encoding = "utf-8" if fmt == "jsonl" else config.ingest.encoding
        con.execute(
            "INSERT INTO quarantine SELECT ?, ?, line, NULL, 'malformed_record', "
            "CASE error_type "
            "WHEN 'INVALID ENCODING' THEN 'the line is not valid ' || ? || ' text' "
            "WHEN 'UNCLOSED QUOTE' THEN 'a quoted value opened on this line is never closed' "
            "WHEN 'LINE SIZE OVER MAXIMUM' THEN 'the line is too long: ' || error_message "
            "ELSE 'the CSV reader could not split this line: ' || error_message END, "
            "CAST(to_json(csv_line) AS VARCHAR), ? "
            "FROM _rejects ORDER BY line",
            [batch_id, kind, encoding, ingested_at],
        )
    con.execute(mark_dirty_sql(checks, ingested_at))

    counts = con.execute(
        "SELECT count(*), count(*) FILTER (WHERE is_duplicate) FROM _checked WHERE NOT is_blank"
    ).fetchone()
    rows_read = int(counts[0]) + rejected_lines
    duplicates = int(counts[1])
    reasons = dict(
        con.execute(
            "SELECT reason, count(*) FROM quarantine WHERE batch_id = ? GROUP BY reason",
            [batch_id],
        ).fetchall()
    )
    quarantined = int(sum(reasons.values()))
    if accepted + quarantined + duplicates != rows_read:  # a bug, not a user error
        raise RuntimeError(
            f"ingest accounting mismatch for {label}: read {rows_read}, accepted {accepted}, "
            f"quarantined {quarantined}, duplicates {duplicates}"
        )
    con.execute(
        "INSERT INTO batches VALUES "
        "(?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'ingested', NULL, ?, ?, ?)",
        [
            batch_id,
            kind,
            label,
            sha,
            size,
            recorded_format or fmt,
            rows_read,
            accepted,
            quarantined,
            duplicates,
            started,
            utc_now(),
            config.digest,
            __version__,
            clock_kind(),
        ],
    )
    return FileResult(
        label,
        kind,
        "ingested",
        batch_id=batch_id,
        rows_read=rows_read,
        accepted=accepted,
        quarantined=quarantined,
        duplicates=duplicates,
        corrected=corrected,
        retracted=retracted,
        quarantine_reasons=dict(sorted(reasons.items())),
    )


def _stage_rejects(con: duckdb.DuckDBPyConnection) -> int:
    """Stage the reader's rejected lines, one row a line, as ``_rejects`` (line,
    error_type, error_message, csv_line); returns how many there are."""
    try:
        stage_temp_table(
            con,
            "_rejects",
            "SELECT line, CAST(first(error_type) AS VARCHAR) AS error_type, "
            "first(error_message) AS error_message, first(csv_line) AS csv_line "
            "FROM _reject_errors GROUP BY line",
        )
    except duckdb.CatalogException:
        empty_temp_table(
            con,
            "_rejects",
            "line BIGINT, error_type VARCHAR, error_message VARCHAR, csv_line VARCHAR",
        )
    return int(con.execute("SELECT count(*) FROM _rejects").fetchone()[0])
