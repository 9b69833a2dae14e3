"""The nightly job: ingest the landing folders, refresh the fits, assess the policy.

Each stage talks to the others only through the store.  The run is recorded in the
``runs`` table so the dashboard can show the last successful nightly run.  Status:
``ok``; ``ok_with_failed_files`` (a file was rejected; the others went in);
``ok_with_failed_deliveries`` (every stage ran but notifications are still owed:
failed, or left when the delivery budget ran out); ``failed`` (with its message).
"""

from __future__ import annotations

import logging
import uuid
from dataclasses import dataclass, field
from datetime import datetime

from monitor.assess.sinks import redact
from monitor.config import Config
from monitor.store.connection import Store
from monitor.store.rules import utc_now
from monitor.store.schema import StoreMismatch

log = logging.getLogger("cuewatch.nightly")


@dataclass
class NightlySummary:
    run_id: str
    status: str
    ingest: dict = field(default_factory=dict)
    refit: dict = field(default_factory=dict)
    assess: dict = field(default_factory=dict)
    message: str = ""

    def to_json(self, *, list_skipped: bool = False) -> dict:
        """The `nightly --json` document.  Files skipped as already ingested (most of a
        landing folder, every night) are counted in ``ingest.skipped_files`` and listed
        only with ``list_skipped``."""
        out = self.__dict__.copy()
        files = out.get("ingest", {}).get("files")
        if files is not None and not list_skipped:
            kept = [f for f in files if f.get("status") != "skipped"]
            out["ingest"] = {**out["ingest"], "files": kept}
        return out

    def describe(self) -> str:
        """One line for a person."""
        ing, ref, ass = self.ingest, self.refit, self.assess
        text = (
            f"Nightly run {self.run_id}: {self.status}. Ingested {ing.get('accepted', 0)} rows "
            f"({ing.get('quarantined', 0)} quarantined, {ing.get('duplicates', 0)} duplicates); "
            f"{ref.get('windows_fitted', 0)} window fit(s) refreshed; "
            f"alerts opened {len(ass.get('opened', []))}, resolved {len(ass.get('resolved', []))}; "
            f"notifications delivered {ass.get('delivered', 0)}"
        )
        if ass.get("undelivered"):
            text += f", not delivered {ass['undelivered']} (retried on the next run)"
        return text + "."


def run_nightly(config: Config, *, now: datetime | None = None) -> NightlySummary:
    """Run ingest -> refit -> assess once.  A failed file does not stop the run (it is
    recorded in ``batches`` and reported); any other error marks the run failed and is
    re-raised after being recorded."""
    from monitor.assess.alerts import assess
    from monitor.ingest.batches import ingest
    from monitor.refit.windows import refit

    store = Store(config)
    run_id = uuid.uuid4().hex[:12]
    started = utc_now()
    summary = NightlySummary(run_id, "running")
    try:
        result = ingest(config, (), now=now)
        summary.ingest = result.to_json()
        summary.refit = refit(config).to_json()
        assessed = assess(config, now=now)
        summary.assess = assessed.to_json()
        failed = result.failed_files
        # A rejected file outranks owed notifications (exit 2 before 3); the message
        # names both.
        summary.status = "ok"
        problems = []
        if failed:
            summary.status = "ok_with_failed_files"
            problems.append(
                f"{len(failed)} file(s) failed; first: {failed[0].path}: {failed[0].message}"
            )
        if assessed.undelivered:
            if not failed:
                summary.status = "ok_with_failed_deliveries"
            problems.append(assessed.delivery_problem().strip())
        summary.message = " ".join(problems)
    except Exception as exc:
        summary.status = "failed"
        summary.message = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        summary.message = redact(summary.message, _urls(config))
        if not isinstance(exc, StoreMismatch):  # a store that is not ready cannot hold it
            _record(store, run_id, started, summary)
        raise
    _record(store, run_id, started, summary)
    return summary


def _urls(config: Config) -> list[str]:
    return [config.alerts.webhook.url] if config.alerts.webhook else []


def _record(store: Store, run_id: str, started, summary: NightlySummary) -> None:
    try:
        with store.writer() as con:
            store.record_run(con, run_id, "nightly", started, summary.status, summary.message)
    except Exception as exc:  # recording must never hide the run's own outcome
        # One line, no traceback: the run's own error (if any) is what the user must see.
        log.warning("could not record the nightly run in the store: %s", exc)
