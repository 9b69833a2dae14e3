"""Alert lifecycle: `assess` turns window findings into alerts, keeps their history and
delivers each state change to the configured sinks exactly once.

Lifecycle of one alert (one *episode* of one check on one series and cue):
open -> (acknowledged) -> resolved.  An episode opens after
``policy.consecutive_windows`` flagged windows in a row and resolves after as many
clear ones (``policy.episodes``), so one noisy window neither opens nor closes it; a
new episode after resolution is a new alert.  Every state change is a row in
``alert_history``.  An episode that is already over the first time it is seen
(history found on a first run over old data) is recorded as resolved and not
notified: notifications are for things that need attention now.

Delivery uses an outbox (``alert_deliveries``, ``monitor.assess.outbox``): each
(alert, event, sink) is written in the same transaction as the state change and sent
after that transaction has committed and the writer connection is closed, within the
run's delivery budget; a failure is recorded and retried on the next run until it
succeeds, so a failing sink never loses an alert and never holds the store.  Every
attempt carries the same delivery id, so a receiver drops the copy a crash can cause.
"""

from __future__ import annotations

import contextlib
import json
import os
import pwd
from dataclasses import dataclass, field
from datetime import date, datetime

import numpy as np
import pandas as pd

from monitor.assess.findings import evaluate
from monitor.assess.outbox import Job, deliver_jobs, delivery_claim, pending, queue
from monitor.assess.stored import JOINT
from monitor.assess.versions import write_versions
from monitor.config import Config
from monitor.errors import UserError
from monitor.stats.episodes import episodes
from monitor.store.connection import Store, get_fact, set_fact
from monitor.store.rules import utc_now

ALERT_KINDS = {
    "forbidden_direct": "forbidden_cue",
    "forbidden_proxy": "proxy_use",
    "drift": "drift",
    "consistency": "consistency",
    "achievement": "achievement",
}
STATES = ("open", "acknowledged", "resolved")


class AlertUsageError(UserError):
    """A user error in the alerts / ack commands."""


@dataclass
class AssessSummary:
    evaluated: bool
    findings: int = 0
    flagged_windows: int = 0
    opened: list[int] = field(default_factory=list)
    resolved: list[int] = field(default_factory=list)
    recorded_history: int = 0
    delivered: int = 0
    # One redacted message per notification that failed in this run.
    delivery_failures: list[str] = field(default_factory=list)
    # Notifications not attempted because the run's delivery budget had run out.
    deferred: int = 0
    # Another cuewatch process was delivering the outbox; this run left it alone.
    delivering_elsewhere: bool = False

    @property
    def undelivered(self) -> int:
        """Notifications this run should have sent and did not (failed or deferred)."""
        return len(self.delivery_failures) + self.deferred

    def to_json(self) -> dict:
        return {**self.__dict__, "undelivered": self.undelivered}

    def describe(self) -> str:
        """One line for a person."""
        if not self.evaluated:
            head = "Fits unchanged since the last assessment: nothing re-evaluated."
        else:
            head = (
                f"Assessed {self.findings} finding rows ({self.flagged_windows} flagged windows); "
                f"alerts opened {len(self.opened)}, resolved {len(self.resolved)}."
            )
        return f"{head} Notifications delivered: {self.delivered}.{self.delivery_problem()}"

    def delivery_problem(self) -> str:
        """A sentence on undelivered notifications ('' when there are none)."""
        text = ""
        if self.undelivered:
            text = (
                f" Notifications not delivered: {self.undelivered} "
                f"({len(self.delivery_failures)} failed, {self.deferred} left when the "
                "delivery budget ran out); they are retried on the next run."
            )
            if self.delivery_failures:
                text += f" First: {self.delivery_failures[0]}"
        if self.delivering_elsewhere:
            text += " Another cuewatch process is delivering the pending notifications."
        return text


# --- assess ---------------------------------------------------------------------------


def assess(
    config: Config, *, now: datetime | None = None, force: bool = False, sleep=None
) -> AssessSummary:
    """Evaluate the policy on the stored fits, update alerts, notify.

    Idempotent: when the fits have not changed since the last assessment nothing is
    recomputed; pending notifications are still retried.  Notifications are sent after
    the alerts' transaction has committed and the store's writer lock is released
    (``monitor.assess.outbox``); ``summary.undelivered`` counts those still owed.
    """
    now = now or utc_now()
    store = Store(config)
    with contextlib.ExitStack() as held:
        with store.writer() as con:
            store.ensure_ready(con)
            fits_stamp = get_fact(con, "last_refit") or ""
            summary = AssessSummary(evaluated=False)
            if force or get_fact(con, "assessed_fits") != fits_stamp:
                findings, proxies = evaluate(con, config)
                con.execute("BEGIN")
                try:
                    _write_findings(con, findings, proxies, now)
                    summary = _reconcile(con, config, findings, now)
                    summary.evaluated = True
                    summary.findings = len(findings)
                    flagged = findings["flagged"].fillna(False).astype(bool)
                    summary.flagged_windows = int(flagged.sum())
                    set_fact(con, "assessed_fits", fits_stamp)
                    con.execute("COMMIT")
                except BaseException:
                    con.execute("ROLLBACK")
                    raise
            # Claimed before the outbox is read, so no other process has a stale copy.
            claimed = held.enter_context(delivery_claim(store))
            jobs = _jobs(con) if claimed else []
        # The writer connection is closed: from here on nothing waits for a receiver.
        summary.delivering_elsewhere = not claimed
        report = deliver_jobs(store, config, jobs, sleep=sleep)
    summary.delivered, summary.delivery_failures = report.delivered, report.failures
    summary.deferred = report.deferred
    return summary


def _jobs(con) -> list[Job]:
    """The undelivered outbox rows with the notification each one sends."""
    rows = pending(con)
    docs = {d["id"]: d for d in _alert_docs(con, sorted({r[0] for r in rows}))} if rows else {}
    return [
        Job(alert_id, event, sink, attempts, delivery,
            {**docs[alert_id], "event": event, "delivery_id": delivery})
        for alert_id, event, sink, attempts, delivery in rows
    ]  # fmt: skip


def _write_findings(con, findings: pd.DataFrame, proxies: pd.DataFrame, now: datetime) -> None:
    """Bring the stored findings to this evaluation's, keeping every earlier version."""
    write_versions(con, "finding_versions", findings, now)
    write_versions(con, "proxy_part_versions", proxies, now)


def _window_states(findings: pd.DataFrame) -> pd.DataFrame:
    """One row per (kind, scope, decision_maker, cue, window) with flagged/assessable:
    the verdict rows (a categorical cue's per-level rows are detail beneath its verdict)."""
    verdict = ~findings["level_detail"].astype("boolean").fillna(False).astype(bool)
    f = findings[
        findings["check_kind"].isin(ALERT_KINDS) & (findings["cue"] != JOINT) & verdict
    ].copy()
    f["kind"] = f["check_kind"].map(ALERT_KINDS)
    f["flagged"] = f["flagged"].fillna(False).astype(bool)
    f["assessable"] = f["assessable"].fillna(False).astype(bool)
    f["abs_size"] = np.where(
        f["check_kind"] == "forbidden_proxy", f["std_indirect"].abs(), f["std_weight"].abs()
    )
    f = f.sort_values(
        ["kind", "scope", "decision_maker", "cue", "window_end", "abs_size"],
        ascending=[True, True, True, True, True, False],
        na_position="last",
    )
    grouped = f.groupby(["kind", "scope", "decision_maker", "cue", "window_end"], sort=True)
    states = grouped.agg(flagged=("flagged", "any"), assessable=("assessable", "any"))
    top = grouped.head(1).set_index(["kind", "scope", "decision_maker", "cue", "window_end"])
    return states.join(top.drop(columns=["flagged", "assessable"])).reset_index()


def _evidence(row: pd.Series) -> dict:
    kind = row["kind"]
    size = row["std_indirect"] if kind == "proxy_use" else row["std_weight"]
    if kind in ("consistency", "achievement"):
        size = row["statistic"]
    ev = {
        "window": {"start": _iso(row["window_start"]), "end": _iso(row["window_end"])},
        "std_weight": finite_or_none(size),
        "interval": [finite_or_none(row.get("ci_low")), finite_or_none(row.get("ci_high"))],
        "q_value": finite_or_none(row.get("q_value")),
        "p_value": finite_or_none(row.get("p_value")),
        "n": None if pd.isna(row.get("n")) else int(row["n"]),
    }
    if kind in ("forbidden_cue", "proxy_use"):
        ev.update(
            level=row.get("level") if isinstance(row.get("level"), str) else None,
            disparity=finite_or_none(row.get("disparity")),
            direct=finite_or_none(row.get("direct")),
            indirect=finite_or_none(row.get("indirect")),
            std_disparity=finite_or_none(row.get("std_disparity")),
            std_indirect=finite_or_none(row.get("std_indirect")),
        )
    if kind == "drift":
        ev.update(change=finite_or_none(row.get("direct")), z=finite_or_none(row.get("statistic")))
        # Since when: the change-point estimate and its interval (None where unknown).
        ev["since"] = {
            "estimate": _iso(row.get("change_day")),
            "low": _iso(row.get("change_low")),
            "high": _iso(row.get("change_high")),
        }
    if kind in ("consistency", "achievement"):
        ev.update(
            figure="R_s" if kind == "consistency" else "r_a",
            value=finite_or_none(row.get("statistic")),
        )
    return ev


def _reconcile(con, config: Config, findings: pd.DataFrame, now: datetime) -> AssessSummary:
    summary = AssessSummary(evaluated=True)
    if not len(findings):
        return summary
    states = _window_states(findings)
    existing = con.execute(
        "SELECT alert_id, kind, scope, decision_maker, cue, state, opened_window_end, evidence "
        "FROM alerts"
    ).df()
    by_key = {
        (r.kind, r.scope, r.decision_maker, r.cue, _iso(r.opened_window_end)): r
        for r in existing.itertuples(index=False)
    }
    seen: set[int] = set()
    n_needed = config.policy.consecutive_windows
    for key, g in states.groupby(["kind", "scope", "decision_maker", "cue"], sort=True):
        g = g.sort_values("window_end").reset_index(drop=True)
        seq = [bool(f) if a else None for f, a in zip(g["flagged"], g["assessable"], strict=True)]
        for ep in episodes(seq, n_needed):
            open_end = _iso(g.loc[ep.open_index, "window_end"])
            last = ep.resolve_index if ep.resolve_index is not None else len(g) - 1
            flagged_rows = g.iloc[ep.open_index : last + 1]
            flagged_rows = flagged_rows[flagged_rows["flagged"]]
            evidence = _evidence(flagged_rows.iloc[-1])
            resolve_end = (
                None if ep.resolve_index is None else _iso(g.loc[ep.resolve_index, "window_end"])
            )
            team = g.loc[ep.open_index, "team"]
            stored = by_key.get((*key, open_end))
            if stored is None:
                alert_id = _create(con, config, key, team, open_end, resolve_end, evidence, now)
                (summary.resolved if resolve_end else summary.opened).append(alert_id)
                seen.add(alert_id)
                continue
            seen.add(int(stored.alert_id))
            if resolve_end and stored.state != "resolved":
                _resolve(
                    con,
                    config,
                    int(stored.alert_id),
                    stored.state,
                    resolve_end,
                    now,
                    "resolved after consecutive clear windows",
                )
                summary.resolved.append(int(stored.alert_id))
            new_ev = json.dumps(evidence, sort_keys=True)
            if new_ev != stored.evidence:
                con.execute(
                    "UPDATE alerts SET evidence = ?, updated_at = ? WHERE alert_id = ?",
                    [new_ev, now, int(stored.alert_id)],
                )
    # Open alerts whose episode the (restated) data no longer shows.
    for r in existing.itertuples(index=False):
        if int(r.alert_id) not in seen and r.state != "resolved":
            _resolve(
                con,
                config,
                int(r.alert_id),
                r.state,
                None,
                now,
                "no longer supported by the data after restatement",
            )
            summary.resolved.append(int(r.alert_id))
    return summary


def _create(con, config, key, team, open_end, resolve_end, evidence, now) -> int:
    kind, scope, dm, cue = key
    alert_id = int(con.execute("SELECT nextval('alert_ids')").fetchall()[0][0])
    state = "resolved" if resolve_end else "open"
    ev = json.dumps(evidence, sort_keys=True)
    con.execute(
        "INSERT INTO alerts (alert_id, kind, scope, decision_maker, team, cue, state, opened_at, "
        "opened_window_end, resolved_at, resolved_window_end, evidence, updated_at) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            alert_id,
            kind,
            scope,
            dm,
            team if isinstance(team, str) else None,
            cue,
            state,
            now,
            open_end,
            now if resolve_end else None,
            resolve_end,
            ev,
            now,
        ],
    )
    _history(
        con,
        alert_id,
        now,
        None,
        "open",
        "cuewatch assess",
        f"{config.policy.consecutive_windows} consecutive flagged window(s) ending {open_end}",
        ev,
    )
    if resolve_end:
        _history(
            con,
            alert_id,
            now,
            "open",
            "resolved",
            "cuewatch assess",
            f"episode already over when first seen (clear from window ending {resolve_end})",
            ev,
        )
    else:
        queue(con, config, alert_id, "opened", now)
    return alert_id


def _resolve(con, config, alert_id: int, old_state: str, resolve_end, now, note: str) -> None:
    con.execute(
        "UPDATE alerts SET state = 'resolved', resolved_at = ?, resolved_window_end = ?, "
        "updated_at = ? WHERE alert_id = ?",
        [now, resolve_end, now, alert_id],
    )
    _history(con, alert_id, now, old_state, "resolved", "cuewatch assess", note, None)
    queue(con, config, alert_id, "resolved", now)


def _history(con, alert_id, at, from_state, to_state, by, note, evidence, via=None) -> None:
    con.execute(
        "INSERT INTO alert_history (alert_id, changed_at, from_state, to_state, changed_by, "
        "note, evidence, os_user, via) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [alert_id, at, from_state, to_state, by, note, evidence, os_user(), via],
    )


# --- reading and acknowledging ------------------------------------------------------------


def _alert_docs(
    con, ids: list[int] | None = None, state: str | None = None, history: bool = False
) -> list[dict]:
    where, params = [], []
    if ids is not None:
        where.append(f"alert_id IN ({', '.join('?' for _ in ids)})")
        params += list(ids)
    if state is not None:
        where.append("state = ?")
        params.append(state)
    clause = f"WHERE {' AND '.join(where)}" if where else ""
    rows = con.execute(
        "SELECT alert_id, kind, scope, decision_maker, team, cue, state, opened_at, "
        "opened_window_end, resolved_at, resolved_window_end, acknowledged_by, acknowledged_at, "
        f"note, evidence FROM alerts {clause} ORDER BY alert_id",
        params,
    ).fetchall()
    docs = []
    for r in rows:
        d = {
            "id": int(r[0]),
            "kind": r[1],
            "scope": r[2],
            "decision_maker": r[3],
            "team": r[4],
            "cue": r[5],
            "state": r[6],
            "opened_at": _iso(r[7]),
            "opened_window_end": _iso(r[8]),
            "resolved_at": _iso(r[9]),
            "resolved_window_end": _iso(r[10]),
            "acknowledged_by": r[11],
            "acknowledged_at": _iso(r[12]),
            "note": r[13],
            "evidence": json.loads(r[14]),
        }
        docs.append(d)
    if history and docs:
        hist = con.execute(
            "SELECT alert_id, changed_at, from_state, to_state, changed_by, note, os_user, via "
            f"FROM alert_history WHERE alert_id IN ({', '.join('?' for _ in docs)}) "
            "ORDER BY changed_at, alert_id",
            [d["id"] for d in docs],
        ).fetchall()
        by_id: dict[int, list] = {}
        for h in hist:
            keys = ("at", "from", "to", "by", "note", "os_user", "via")
            by_id.setdefault(int(h[0]), []).append(
                dict(zip(keys, (_iso(h[1]), *h[2:]), strict=True))
            )
        for d in docs:
            d["history"] = by_id.get(d["id"], [])
    return docs


def list_alerts(config: Config, state: str | None = None, *, history: bool = False) -> list[dict]:
    """The stored alerts as `alerts --json` objects, oldest first."""
    if state is not None and state not in STATES:
        raise AlertUsageError(f"--state must be one of {', '.join(STATES)}, not '{state}'.")
    store = Store(config)
    with store.reader() as con:
        return _alert_docs(con, None, state, history)


def acknowledge(
    config: Config,
    alert_id: int,
    by: str,
    note: str,
    *,
    timeout_s: float | None = None,
    via: str = "cli",
) -> dict:
    """Mark an open alert acknowledged by ``by`` with ``note``; returns the alert.

    ``by`` is the name the person gave; the history row also records the operating-system
    account this process runs as (``os_user``) and ``via``, how the acknowledgement came
    in ('cli', or the dashboard's own wording), neither of which the person types.
    """
    if not by.strip():
        raise AlertUsageError("--by must name who acknowledges the alert.")
    store = Store(config)
    with store.writer(timeout_s=timeout_s) as con:
        store.ensure_ready(con)
        rows = con.execute(
            "SELECT state, acknowledged_by FROM alerts WHERE alert_id = ?", [alert_id]
        ).fetchall()
        if not rows:
            raise AlertUsageError(f"there is no alert with id {alert_id}.")
        state, who = rows[0]
        if state != "open":
            extra = f" by {who}" if who else ""
            raise AlertUsageError(
                f"alert {alert_id} is {state}{extra}; only open alerts can be acknowledged."
            )
        now = utc_now()
        con.execute("BEGIN")
        try:
            con.execute(
                "UPDATE alerts SET state = 'acknowledged', acknowledged_by = ?, acknowledged_at = ?, "
                "note = ?, updated_at = ? WHERE alert_id = ?",
                [by, now, note, now, alert_id],
            )
            _history(con, alert_id, now, "open", "acknowledged", by, note, None, via)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
        return _alert_docs(con, [alert_id], history=True)[0]


def os_user() -> str:
    """The operating-system account this process runs as (its effective uid), such as
    'alice'; 'uid 1001' for an id without a name.  Read from the kernel, not from $USER,
    which the caller sets."""
    uid = os.geteuid()
    try:
        return pwd.getpwuid(uid).pw_name
    except KeyError:
        return f"uid {uid}"


def _iso(v) -> str | None:
    if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NaT:
        return None
    if isinstance(v, pd.Timestamp):
        if v.tzinfo is None and v == v.normalize():
            return v.date().isoformat()  # a DATE column read back through pandas
        v = v.to_pydatetime()
    if isinstance(v, datetime):
        return v.isoformat()
    if isinstance(v, date):
        return v.isoformat()
    if isinstance(v, np.datetime64):
        return str(pd.Timestamp(v).date())
    return str(v)


def finite_or_none(v) -> float | None:
    """``v`` as a float, or None when it is missing, not a number or not finite."""
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if np.isfinite(f) else None
