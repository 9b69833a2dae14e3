"""The outbox (``alert_deliveries``): notifications queued with the state change that
caused them, delivered after that transaction has committed.

A row is written for each (alert, event, sink) in the same transaction as the alert's
state change (``queue``), so a crash can lose neither.  Delivery happens later, with
the store's writer connection closed and its lock released: a receiver that accepts a
connection and never answers holds up no ingest, ack or dashboard, only this run, and
that for at most ``[alerts] delivery_budget_s`` in all.  Each outcome is recorded in a
short writer transaction of its own as soon as it is known, so a run killed half-way
re-sends only the notification that was in flight.  Whatever is not delivered stays
in the outbox and is tried again on the next run.

Delivery is at least once: a notification whose outcome was not recorded (the process
died after the receiver got it) is sent again.  Every attempt carries the same
delivery id, so receivers can drop the copy.  One process delivers at a time (a
non-blocking lock file beside the store): a second run, say a manual ``assess`` during
the nightly job, leaves the outbox to the first instead of racing it.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

from monitor.assess.sinks import SinkError, configured_sinks, deliver, delivery_id, redact
from monitor.config import Config
from monitor.store.connection import Store
from monitor.store.rules import utc_now


@dataclass(frozen=True)
class Job:
    """One undelivered (alert, event, sink) and the notification to send."""

    alert_id: int
    event: str
    sink: str
    attempts: int
    delivery_id: str
    document: dict


@dataclass
class DeliveryReport:
    delivered: int = 0
    failures: list[str] = field(default_factory=list)
    deferred: int = 0  # not attempted: the budget ran out first


def queue(con, config: Config, alert_id: int, event: str, now) -> None:
    """Queue ``event`` of ``alert_id`` for every configured sink (inside the caller's
    transaction)."""
    for sink in configured_sinks(config.alerts):
        con.execute(
            "INSERT INTO alert_deliveries VALUES (?, ?, ?, 'pending', 0, NULL, ?, NULL)",
            [alert_id, event, sink, now],
        )


def pending(con) -> list[tuple[int, str, str, int, str]]:
    """Undelivered rows, oldest first: (alert_id, event, sink, attempts, delivery_id).

    The delivery id is derived from the row's key and the microsecond it was queued,
    so it is the same on every attempt, whatever the session's time zone."""
    rows = con.execute(
        "SELECT alert_id, event, sink, attempts, epoch_us(created_at) FROM alert_deliveries "
        "WHERE status <> 'delivered' ORDER BY created_at, alert_id, event, sink"
    ).fetchall()
    return [
        (int(a), e, s, int(n), delivery_id(int(a), e, s, str(queued)))
        for a, e, s, n, queued in rows
    ]


@contextlib.contextmanager
def delivery_claim(store: Store) -> Iterator[bool]:
    """Hold the outbox for this process if no other process does; yields whether it
    got it.  The lock is the kernel's (``flock``), so a killed process leaves none."""
    path = store.path.with_name(store.path.name + ".deliver.lock")
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        try:
            yield True
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def deliver_jobs(
    store: Store,
    config: Config,
    jobs: list[Job],
    *,
    sleep: Callable[[float], None] | None = None,
    clock: Callable[[], float] = time.monotonic,
) -> DeliveryReport:
    """Send ``jobs`` in order within the delivery budget; record each outcome.

    Call with no store connection open: each outcome is written by a short writer
    transaction of its own.  Jobs reached after the budget has run out are left as
    they are (``deferred``).  Messages and stored errors are redacted.
    """
    report = DeliveryReport()
    deadline = clock() + config.alerts.delivery_budget_s
    urls = [config.alerts.webhook.url] if config.alerts.webhook else []
    for job in jobs:
        if clock() >= deadline:
            report.deferred += 1
            continue
        hint = f"cuewatch --config {config.source} ack {job.alert_id} --by NAME --note TEXT"
        kwargs = {"ack_hint": hint, "deadline": deadline}
        if sleep is not None:
            kwargs["sleep"] = sleep
        try:
            deliver(config.alerts, job.document, job.sink, **kwargs)
        except (SinkError, OSError) as exc:
            error = redact(str(exc), urls)
            _record(store, job, error)
            report.failures.append(f"alert {job.alert_id} {job.event} via {job.sink}: {error}")
            continue
        _record(store, job, None)
        report.delivered += 1
    return report


def _record(store: Store, job: Job, error: str | None) -> None:
    with store.writer() as con:
        if error is None:
            con.execute(
                "UPDATE alert_deliveries SET status = 'delivered', attempts = ?, "
                "last_error = NULL, delivered_at = ? WHERE alert_id = ? AND event = ? AND sink = ?",
                [job.attempts + 1, utc_now(), job.alert_id, job.event, job.sink],
            )
        else:
            con.execute(
                "UPDATE alert_deliveries SET status = 'failed', attempts = ?, last_error = ? "
                "WHERE alert_id = ? AND event = ? AND sink = ?",
                [job.attempts + 1, error[:500], job.alert_id, job.event, job.sink],
            )
