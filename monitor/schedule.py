"""The nightly schedule: standard crontab expressions and the run loop.

APScheduler 3 does the timing, but its cron fields differ from standard cron in two
places that matter here, so expressions are translated rather than handed over:

* day of week: standard cron counts 0 (or 7) = Sunday, 1 = Monday; APScheduler's
  numeric ``day_of_week`` counts 0 = Monday, so ``CronTrigger.from_crontab("0 2 * * 1")``
  fires on Tuesdays.  We convert the field to day names (mon..sun).
* day of month *and* day of week both restricted: standard cron fires on a day that
  matches *either*; APScheduler requires both.  We support the standard rule by
  combining two triggers (``OrTrigger``).  As in the classic cron implementations, a
  field counts as restricted unless it starts with ``*``.

Daylight-saving time (the schedule's own time zone):

* a time that does not exist (spring forward: 01:30 Europe/London on 2026-03-29)
  fires once, at the same clock reading taken with the pre-change offset, i.e.
  01:30 UTC = 02:30 BST;
* a time that happens twice (fall back: 01:30 Europe/London on 2026-10-25) fires
  once, at its first occurrence (01:30 BST = 00:30 UTC), when the hour field is fixed.
  A job with ``*`` in the hour field runs in both real hours (once per real hour).
"""

from __future__ import annotations

import logging
import re
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from apscheduler.events import EVENT_JOB_MAX_INSTANCES, EVENT_JOB_MISSED, JobExecutionEvent
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.combining import OrTrigger
from apscheduler.triggers.cron import CronTrigger

from monitor.config import Config
from monitor.errors import UserError

log = logging.getLogger(__name__)

_FIELDS = (  # name, low, high (standard cron bounds)
    ("minute", 0, 59),
    ("hour", 0, 23),
    ("day of month", 1, 31),
    ("month", 1, 12),
    ("day of week", 0, 7),
)
_MONTHS = {m: i for i, m in enumerate("jan feb mar apr may jun jul aug sep oct nov dec".split(), 1)}
_WEEKDAYS = {d: i for i, d in enumerate("sun mon tue wed thu fri sat".split())}
# APScheduler's names, indexed by standard cron's weekday number (0 = Sunday).
_APS_DAY = ("sun", "mon", "tue", "wed", "thu", "fri", "sat")
_APS_ORDER = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
_ELEMENT = re.compile(
    r"^(?:(?P<star>\*)|(?P<a>[0-9a-z]+)(?:-(?P<b>[0-9a-z]+))?)(?:/(?P<step>\d+))?$"
)


class ScheduleUsageError(UserError):
    """A schedule the user wrote cannot be used; the message names the expression."""


# --- crontab translation -------------------------------------------------------------


def crontab_to_trigger(expr: str, timezone: str) -> CronTrigger | OrTrigger:
    """An APScheduler 3 trigger that fires when standard 5-field cron ``expr`` would.

    Fields: minute hour day-of-month month day-of-week; elements ``*``, ``N``,
    ``N-M``, ``*/S``, ``N-M/S`` and comma lists; month names jan..dec and weekday
    names sun..sat; weekday 0 and 7 are Sunday.  Non-standard forms (``L``, ``W``,
    ``#``, ``?``, ``@daily``, a step on a single value) are rejected.  Returns a
    ``CronTrigger`` (an ``OrTrigger`` of two when both day fields are restricted;
    see the module docstring).  Raises ``ScheduleUsageError`` naming ``expr``.
    """
    tz = _zone(expr, timezone)
    fields = expr.strip().lower().split()
    if len(fields) != 5:
        raise ScheduleUsageError(
            f"cron expression {expr!r} must have five fields: "
            "minute hour day-of-month month day-of-week."
        )
    minute, hour, dom, month, dow = (
        _translate(expr, text, spec) for text, spec in zip(fields, _FIELDS, strict=True)
    )
    repeat_once = not fields[1].startswith("*")
    common = {"minute": minute, "hour": hour, "month": month, "timezone": tz}
    try:
        if fields[2].startswith("*") or fields[4].startswith("*"):
            return _WallClockCron(repeat_once, day=dom, day_of_week=dow, **common)
        return OrTrigger(
            [
                _WallClockCron(repeat_once, day=dom, day_of_week="*", **common),
                _WallClockCron(repeat_once, day="*", day_of_week=dow, **common),
            ]
        )
    except ValueError as exc:  # whatever APScheduler still refuses
        raise ScheduleUsageError(f"cron expression {expr!r} is not usable: {exc}.") from None


def _zone(expr: str, timezone: str) -> ZoneInfo:
    try:
        return ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise ScheduleUsageError(f"schedule {expr!r}: unknown time zone {timezone!r}.") from None


def _translate(expr: str, text: str, spec: tuple[str, int, int]) -> str:
    """One cron field in APScheduler's syntax (day of week as names)."""
    name, low, high = spec
    names = _WEEKDAYS if name == "day of week" else _MONTHS if name == "month" else {}
    parts: list[tuple[int, int, int | None, bool]] = []  # (first, last, step, star)
    for element in text.split(","):
        m = _ELEMENT.match(element)
        if m is None:
            raise ScheduleUsageError(
                f"cron expression {expr!r}: {name} element {element!r} is not standard cron."
            )
        step = int(m["step"]) if m["step"] else None
        if step == 0:
            raise ScheduleUsageError(f"cron expression {expr!r}: {name} step must be at least 1.")
        if m["star"]:
            parts.append((low, high, step, True))
            continue
        if m["b"] is None and step is not None:
            raise ScheduleUsageError(
                f"cron expression {expr!r}: {name} step {element!r} needs a range, "
                f"e.g. {m['a']}-{high}/{step}."
            )
        first = _value(expr, m["a"], name, low, high, names)
        last = first if m["b"] is None else _value(expr, m["b"], name, low, high, names)
        if name == "day of week" and m["b"] == "sun":
            last = 7  # "fri-sun" means Friday to Sunday
        if first > last:
            raise ScheduleUsageError(
                f"cron expression {expr!r}: {name} range {element!r} runs backwards."
            )
        parts.append((first, last, step, False))
    if name == "day of week":
        return _weekday_names(parts)
    return ",".join(_aps_element(*p) for p in parts)


def _value(expr: str, token: str, name: str, low: int, high: int, names: dict) -> int:
    if token in names:
        return names[token]
    if not token.isdigit() or not low <= int(token) <= high:
        raise ScheduleUsageError(
            f"cron expression {expr!r}: {name} value {token!r} is outside {low}-{high}."
        )
    return int(token)


def _aps_element(first: int, last: int, step: int | None, star: bool) -> str:
    # Same meaning in APScheduler for minute, hour, day of month and month.
    core = "*" if star else (str(first) if first == last else f"{first}-{last}")
    return core if step is None else f"{core}/{step}"


def _weekday_names(parts: list[tuple[int, int, int | None, bool]]) -> str:
    days: set[int] = set()
    for first, last, step, star in parts:
        if star:
            last = 6  # "*/2" is Sun, Tue, Thu, Sat, not also 7 = Sunday again
        days.update(v % 7 for v in range(first, last + 1, step or 1))
    if len(days) == 7:
        return "*"
    chosen = {_APS_DAY[d] for d in days}
    return ",".join(d for d in _APS_ORDER if d in chosen)


class _WallClockCron(CronTrigger):
    """A CronTrigger that, when asked to, fires a repeated wall-clock time only once.

    In the hour repeated at a fall-back change APScheduler returns the time twice
    (``fold`` 0 and 1); for a fixed-hour job the second one is skipped.
    """

    def __init__(self, repeat_once: bool, **fields):
        super().__init__(**fields)
        self.repeat_once = repeat_once

    def get_next_fire_time(self, previous_fire_time, now):
        fire = super().get_next_fire_time(previous_fire_time, now)
        while self.repeat_once and fire is not None and _second_occurrence(fire):
            fire = super().get_next_fire_time(fire, fire)
        return fire

    def __getstate__(self):
        state = super().__getstate__()
        state["repeat_once"] = self.repeat_once
        return state

    def __setstate__(self, state):
        self.repeat_once = state.pop("repeat_once", True)
        super().__setstate__(state)


def _second_occurrence(moment: datetime) -> bool:
    return moment.fold == 1 and moment.utcoffset() != moment.replace(fold=0).utcoffset()


def next_fire_times(expr: str, timezone: str, start: datetime, count: int) -> list[datetime]:
    """The first ``count`` fire times of ``expr`` at or after ``start`` (no waiting).

    ``start`` must be time-zone aware (``ValueError`` otherwise).  Times are returned
    aware, in ``timezone``; a fire time equal to ``start`` is included.  Fewer than
    ``count`` come back only if the schedule ends (it never does for cron).
    """
    if start.tzinfo is None or start.utcoffset() is None:
        raise ValueError("start must be time-zone aware")
    trigger = crontab_to_trigger(expr, timezone)
    out: list[datetime] = []
    previous: datetime | None = None
    now = start
    while len(out) < count:
        fire = trigger.get_next_fire_time(previous, now)
        if fire is None:
            break
        out.append(fire)
        previous = now = fire
    return out


# --- the run loop --------------------------------------------------------------------


@dataclass(frozen=True)
class ScheduleSummary:
    """What happened while ``run_schedule`` ran: runs started and failed, and
    fire times skipped (a run was still going, or the grace time had passed)."""

    runs: int
    failures: int
    skipped: int

    def to_json(self) -> dict:
        return {"runs": self.runs, "failures": self.failures, "skipped": self.skipped}

    def describe(self) -> str:
        """One line for a person."""
        return f"Stopped after {self.runs} run(s), {self.failures} failed, {self.skipped} skipped."


def run_schedule(
    config: Config,
    job: Callable[[], None],
    *,
    stop_event: threading.Event | None = None,
    trigger: BaseTrigger | None = None,
) -> ScheduleSummary:
    """Run ``job`` on ``config.schedule`` until stopped; block until then.

    One run at a time (``max_instances=1``); fire times missed while a run goes on or
    while the process was down are folded into one run (``coalesce``) if within
    ``config.schedule.misfire_grace_s``, else skipped with a warning.  A run that
    raises is logged with its traceback and the schedule carries on.  Stops when
    ``stop_event`` is set or, when called from the main thread, on SIGTERM/SIGINT:
    the running job is allowed to finish, then the function returns (a second signal
    acts as it normally would).  ``trigger`` replaces the cron trigger (tests,
    embedding).  Raises ``ScheduleUsageError`` for a bad cron expression.
    """
    sched_cfg = config.schedule
    trig = trigger or crontab_to_trigger(sched_cfg.cron, sched_cfg.timezone)
    stop = stop_event or threading.Event()
    tally = _Tally()

    def run_once() -> None:
        tally.add(runs=1)
        started = time.monotonic()
        try:
            job()
        except Exception:
            tally.add(failures=1)
            log.exception("scheduled run failed; the next run will happen as scheduled")
        else:
            log.info("scheduled run finished in %.1f s", time.monotonic() - started)

    def on_skip(event: JobExecutionEvent) -> None:
        tally.add(skipped=1)
        why = "the previous run is still going" if event.code == EVENT_JOB_MAX_INSTANCES else (
            "it is past the misfire grace time"
        )  # fmt: skip
        log.warning("scheduled run due %s skipped: %s", event.scheduled_run_time, why)

    scheduler = BackgroundScheduler(
        timezone=sched_cfg.timezone, executors={"default": ThreadPoolExecutor(1)}
    )
    scheduler.add_listener(on_skip, EVENT_JOB_MAX_INSTANCES | EVENT_JOB_MISSED)
    scheduled = scheduler.add_job(
        run_once,
        trig,
        id="cuewatch-scheduled-run",
        max_instances=1,
        coalesce=True,
        misfire_grace_time=sched_cfg.misfire_grace_s,
    )
    restore = _stop_on_signals(stop)
    try:
        scheduler.start()
        log.info("schedule %r (%s): next run %s", sched_cfg.cron, sched_cfg.timezone,
                 scheduled.next_run_time)  # fmt: skip
        while not stop.wait(0.1):
            pass
        log.info("stopping the schedule; waiting for a running job to finish")
    finally:
        if scheduler.running:
            scheduler.shutdown(wait=True)
        restore()
    return ScheduleSummary(tally.runs, tally.failures, tally.skipped)


class _Tally:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.runs = self.failures = self.skipped = 0

    def add(self, runs: int = 0, failures: int = 0, skipped: int = 0) -> None:
        with self._lock:
            self.runs += runs
            self.failures += failures
            self.skipped += skipped


def _stop_on_signals(stop: threading.Event) -> Callable[[], None]:
    """Set ``stop`` on SIGTERM/SIGINT; returns a function restoring the old handlers.

    Python only lets the main thread install handlers; elsewhere this does nothing
    and ``stop_event`` is the only way to stop.
    """
    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    wanted = (signal.SIGTERM, signal.SIGINT)
    previous = {sig: signal.getsignal(sig) for sig in wanted}

    def restore() -> None:
        for sig, handler in previous.items():
            signal.signal(sig, handler)

    def on_signal(signum, frame) -> None:
        log.info("received %s", signal.Signals(signum).name)
        stop.set()
        restore()  # a second signal then interrupts as usual

    for sig in wanted:
        signal.signal(sig, on_signal)
    return restore
