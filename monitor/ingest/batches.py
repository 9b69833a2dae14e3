"""Ingest: validate decision and outcome files (and PostgreSQL pulls) against the
configuration and append them to the store, one transaction per file or pull.

Every input record ends up in exactly one place: ``decisions`` / ``outcomes``
(accepted), ``quarantine`` (with a reason code and a one-line message) or the batch's
duplicate count (identical to what is already stored).  Which files to read is decided
in monitor.ingest.files, what a pull reads in monitor.ingest.postgres; one input becomes
one batch in monitor.ingest.store_batch.  This module runs them in order and sums up.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, replace
from datetime import datetime
from pathlib import Path

import duckdb

from monitor.config import Config
from monitor.ingest.files import IngestUsageError, file_sha256, plan_files
from monitor.ingest.postgres import (
    RECORDED_FORMAT,
    SourceFailed,
    advance_watermark,
    configured_sources,
    connection_string,
    describe_source,
    spool_config,
    spool_folder,
    spool_new_rows,
    stored_watermark,
)
from monitor.ingest.store_batch import FileResult, ingest_spooled, record_failed
from monitor.store.connection import Store
from monitor.store.rules import sql_literal, utc_now


@dataclass
class IngestSummary:
    files: list[FileResult]

    @property
    def accepted(self) -> int:
        return sum(f.accepted for f in self.files)

    @property
    def quarantined(self) -> int:
        return sum(f.quarantined for f in self.files)

    @property
    def duplicates(self) -> int:
        return sum(f.duplicates for f in self.files)

    @property
    def skipped_files(self) -> int:
        return sum(f.status == "skipped" for f in self.files)

    @property
    def waiting_files(self) -> int:
        return sum(f.status == "waiting" for f in self.files)

    @property
    def failed_files(self) -> list[FileResult]:
        return [f for f in self.files if f.status == "failed"]

    @property
    def quarantine_reasons(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for f in self.files:
            for k, v in f.quarantine_reasons.items():
                out[k] = out.get(k, 0) + v
        return dict(sorted(out.items()))

    def to_json(self) -> dict:
        """The `ingest --json` document (DESIGN.md, Contracts)."""
        return {
            "files": [asdict(f) for f in self.files],
            "accepted": self.accepted,
            "quarantined": self.quarantined,
            "duplicates": self.duplicates,
            "corrected": sum(f.corrected for f in self.files),
            "retracted": sum(f.retracted for f in self.files),
            "skipped_files": self.skipped_files,
            "waiting_files": self.waiting_files,
            "failed_files": len(self.failed_files),
            "quarantine_reasons": self.quarantine_reasons,
        }

    def describe(self) -> str:
        """The same account in a few lines for a person."""
        ingested = sum(f.status == "ingested" and f.source == "file" for f in self.files)
        lines = [
            f"{ingested} file(s) ingested, {self.skipped_files} skipped (already ingested), "
            f"{len(self.failed_files)} failed.",
            f"Rows: {self.accepted} accepted, {self.quarantined} quarantined, "
            f"{self.duplicates} duplicates.",
        ]
        changed = [(sum(getattr(f, k) for f in self.files), k) for k in ("corrected", "retracted")]
        if any(n for n, _ in changed):
            lines.append(
                f"Of the accepted: {changed[0][0]} corrections, {changed[1][0]} retractions."
            )
        if self.waiting_files:
            lines.append(
                f"{self.waiting_files} file(s) waiting: changed too recently to be complete; "
                "a later run takes them."
            )
        if self.quarantine_reasons:
            reasons = ", ".join(f"{k} {v}" for k, v in self.quarantine_reasons.items())
            lines.append(f"Quarantine reasons: {reasons}.")
        for f in self.files:
            if f.source == RECORDED_FORMAT and f.status != "failed":
                took = f"{f.rows_read} new rows (batch {f.batch_id})" if f.batch_id else f.message
                lines.append(f"PostgreSQL {f.kind}: {took}.")
        for f in self.failed_files:
            lines.append(f"FAILED {f.path}: {f.message}")
        return "\n".join(lines)


# --- the ingest itself ----------------------------------------------------------------


def ingest(
    config: Config,
    paths: Iterable[str] = (),
    *,
    kind: str | None = None,
    now: datetime | None = None,
    on_file: Callable[[int, int, Path], None] | None = None,
) -> IngestSummary:
    """Ingest files (or the landing folders and the PostgreSQL sources) into the store.

    ``paths`` may contain '-' for JSON Lines on standard input (``kind`` required).
    ``now`` fixes the clock for the future-timestamp check (tests).  ``on_file``
    is called as (index, total, path) before each file (progress display).
    Each file is one transaction: it is either fully in the store or not at all.
    """
    paths = list(paths)
    stdin_tmp: Path | None = None
    if "-" in paths:
        if kind is None:
            raise IngestUsageError("reading from standard input needs --kind decisions|outcomes.")
        stdin_tmp = _spool_stdin()
        paths = [str(stdin_tmp) if p == "-" else p for p in paths]
    try:
        # Without paths, the PostgreSQL sources are pulled after the landing folders
        # (decisions before outcomes); a missing connection string stops the run here.
        pulls = [] if paths else list(configured_sources(config, kind))
        for k in pulls:
            connection_string(configured_sources(config, k)[k], k)
        plan = plan_files(config, paths, kind, pulls=bool(pulls))
        if any(p.kind == "outcomes" for p in plan) and config.outcomes is None:
            raise IngestUsageError("outcome files given but the configuration has no [outcomes].")
        store = Store(config)
        now = now or utc_now()
        results: list[FileResult] = []
        with store.writer() as con:
            store.ensure_ready(con)
            # Staging tables of a large file would otherwise grow in memory up to
            # DuckDB's default limit (80% of RAM); past this limit they spill to the
            # store's temporary folder (<store>.tmp), which keeps peak RSS bounded.
            con.execute(f"SET memory_limit = {sql_literal(config.ingest.memory_limit)}")
            for i, planned in enumerate(plan):
                path, k = planned.path, planned.kind
                if planned.wait:
                    results.append(FileResult(str(path), k, "waiting", message=planned.wait))
                    continue
                if on_file:
                    on_file(i, len(plan), path)
                label = "-" if stdin_tmp is not None and path == stdin_tmp else str(path)
                results.append(_ingest_one(con, config, path, k, now, label))
            for k in pulls:
                results.append(replace(_pull(con, config, k, now), source=RECORDED_FORMAT))
        return IngestSummary(results)
    finally:
        if stdin_tmp is not None:
            shutil.rmtree(stdin_tmp.parent, ignore_errors=True)


def _spool_stdin() -> Path:
    folder = Path(tempfile.mkdtemp(prefix="cuewatch-stdin-"))
    target = folder / "stdin.jsonl"
    with open(target, "wb") as out:
        shutil.copyfileobj(sys.stdin.buffer, out)
    return target


def _ingest_one(
    con: duckdb.DuckDBPyConnection,
    config: Config,
    path: Path,
    kind: str,
    now: datetime,
    label: str,
) -> FileResult:
    sha = file_sha256(path)
    seen = con.execute(
        "SELECT batch_id FROM batches WHERE sha256 = ? AND kind = ? AND status = 'ingested' "
        "ORDER BY batch_id LIMIT 1",
        [sha, kind],
    ).fetchone()
    if seen:
        return FileResult(
            label, kind, "skipped", batch_id=seen[0], message=f"already ingested as batch {seen[0]}"
        )
    return ingest_spooled(con, config, path, kind, now, label, sha=sha)


def _pull(con: duckdb.DuckDBPyConnection, config: Config, kind: str, now: datetime) -> FileResult:
    """Take the new rows of ``kind``'s PostgreSQL source (monitor.ingest.postgres) as one
    batch; the source's watermark advances in the batch's own transaction.  No new rows:
    no batch, status ``up_to_date``."""
    source = configured_sources(config, kind)[kind]
    url = connection_string(source, kind)
    described = describe_source(source, url)
    after = stored_watermark(con, kind)
    started = utc_now()
    folder = spool_folder(Path(config.store.path).parent)
    try:
        try:
            spool = spool_new_rows(url, source, after, folder / "pull.csv")
        except SourceFailed as exc:
            return record_failed(
                con, config, kind, described, "", 0, RECORDED_FORMAT, started, str(exc)
            )
        if spool.rows == 0:
            return FileResult(described, kind, "up_to_date", message="no new rows")
        return ingest_spooled(
            con,
            spool_config(config),
            spool.path,
            kind,
            now,
            spool.label(described, source, after),
            sha=file_sha256(spool.path),
            fmt="csv",
            recorded_format=RECORDED_FORMAT,
            started=started,
            before_commit=lambda c, result: advance_watermark(
                c, kind, described, spool.watermark, result.batch_id
            ),
        )
    finally:
        shutil.rmtree(folder, ignore_errors=True)
