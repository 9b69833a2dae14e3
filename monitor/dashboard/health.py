"""The dashboard's data-health page data: ingest batches, quarantine, outcome coverage
and the last runs, read in one short read-only connection."""

from __future__ import annotations

import shlex
from dataclasses import dataclass

import pandas as pd

from monitor.config import Config
from monitor.dashboard.reads import read_frames
from monitor.ingest.readmit import Selection, list_quarantine


@dataclass(frozen=True)
class DataHealth:
    """``batches``: per kind and status, files and row counts with the last ingest time.
    ``quarantine``: kind, reason, rows.  ``quarantine_sample``: up to three rejected
    rows per reason.  ``coverage``: per decision month, decisions, linked outcomes,
    share linked and the median / 90th-percentile outcome lag in days.
    ``last_nightly``: the newest run with command 'nightly' and status 'ok' (run_id,
    started_at, finished_at, message) or None; ``last_run``: the newest run of any kind.
    ``waiting``: the records still quarantined (not re-admitted), as `cuewatch
    quarantine` counts them: by reason (reason, rows) and by batch (batch_id, kind,
    file, rows); ``commands``: the command lines that list and re-admit them."""

    batches: pd.DataFrame
    quarantine: pd.DataFrame
    quarantine_sample: pd.DataFrame
    coverage: pd.DataFrame
    last_nightly: dict | None
    last_run: dict | None
    waiting_by_reason: pd.DataFrame
    waiting_by_batch: pd.DataFrame
    commands: list[tuple[str, str]]


def data_health(config: Config) -> DataHealth:
    frames = read_frames(
        config,
        (
            """SELECT kind, status, count(*) AS files, sum(rows_read) AS rows_read,
                      sum(rows_accepted) AS accepted, sum(rows_quarantined) AS quarantined,
                      sum(rows_duplicate) AS duplicates, max(finished_at) AS last_finished
               FROM batches GROUP BY kind, status ORDER BY kind, status""",
            [],
        ),
        ("SELECT kind, reason, count(*) AS rows FROM quarantine GROUP BY ALL ORDER BY 3 DESC", []),
        (
            """SELECT q.kind, q.reason, q.record_id, q.message, q.raw_row, b.path AS file,
                      q.source_line
               FROM quarantine q LEFT JOIN batches b USING (batch_id)
               QUALIFY row_number() OVER (PARTITION BY q.reason ORDER BY q.batch_id,
                                          q.source_line) <= 3
               ORDER BY q.reason, q.batch_id, q.source_line""",
            [],
        ),
        (
            """SELECT date_trunc('month', decided_day)::DATE AS month, count(*) AS decisions,
                      count(criterion) AS linked,
                      median(date_diff('second', decided_at, observed_at)) / 86400.0
                          AS median_lag_days,
                      quantile_cont(date_diff('second', decided_at, observed_at), 0.9)
                          / 86400.0 AS p90_lag_days
               FROM decisions_with_outcome GROUP BY 1 ORDER BY 1""",
            [],
        ),
        (
            """SELECT run_id, command, status, started_at, finished_at, message FROM runs
               ORDER BY finished_at DESC NULLS LAST, started_at DESC""",
            [],
        ),
    )
    batches, quarantine, sample, coverage, runs = frames
    coverage["share_linked"] = coverage["linked"] / coverage["decisions"].where(
        coverage["decisions"] > 0
    )
    ok = runs[(runs["command"] == "nightly") & (runs["status"] == "ok")]
    # The command's own count (one owner of "still quarantined"), in a second short read.
    listing = list_quarantine(config, Selection())
    by_reason = pd.DataFrame(
        list(listing.by_reason.items()), columns=["reason", "rows"]
    ).sort_values(["rows", "reason"], ascending=[False, True], ignore_index=True)
    by_batch = pd.DataFrame(
        [(b["batch_id"], b["kind"], b["path"], b["count"]) for b in listing.by_batch],
        columns=["batch_id", "kind", "file", "rows"],
    )
    return DataHealth(
        batches=batches,
        quarantine=quarantine,
        quarantine_sample=sample,
        coverage=coverage,
        last_nightly=ok.iloc[0].to_dict() if len(ok) else None,
        last_run=runs.iloc[0].to_dict() if len(runs) else None,
        waiting_by_reason=by_reason,
        waiting_by_batch=by_batch,
        commands=quarantine_commands(config, by_reason["reason"].tolist()[:1], by_batch),
    )


def quarantine_commands(
    config: Config, reasons: list[str], by_batch: pd.DataFrame
) -> list[tuple[str, str]]:
    """(command line, what it does) for listing and re-admitting quarantined records,
    with this store's configuration and, as examples, the commonest reason and the
    first batch that holds any."""
    base = "cuewatch --config " + shlex.quote(str(config.source or "FILE"))
    reason = reasons[0] if reasons else "REASON"
    batch = str(by_batch["batch_id"].iloc[0]) if len(by_batch) else "BATCH_ID"
    return [
        (f"{base} quarantine", "count the records still quarantined by reason, batch and file"),
        (
            f"{base} quarantine --reason {shlex.quote(reason)}",
            "list those records, with line and message",
        ),
        (f"{base} quarantine --batch {batch}", "list one batch's records"),
        (
            f"{base} quarantine --reason {shlex.quote(reason)} --readmit",
            "after fixing the configuration: check them again and store those that now "
            "pass (once; the others stay quarantined)",
        ),
    ]
