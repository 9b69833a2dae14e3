"""The crontab translation, DST behaviour and the run loop (no waiting for real cron times)."""

from __future__ import annotations

import calendar
import logging
import os
import signal
import threading
import time
from datetime import date, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from monitor.config import Config
from monitor.schedule import (
    ScheduleUsageError,
    crontab_to_trigger,
    next_fire_times,
    run_schedule,
)

UTC = ZoneInfo("UTC")
LONDON = ZoneInfo("Europe/London")


def _utc(moments: list[datetime]) -> list[datetime]:
    return [m.astimezone(UTC) for m in moments]


# --- day of week ---------------------------------------------------------------------


def test_weekday_numbers_follow_standard_cron_not_apscheduler():
    # Standard cron: weekday 0-6 with 0 = Sunday (POSIX/IEEE Std 1003.1, crontab);
    # 7 = Sunday too (Vixie cron extension, from memory).  2026-05-31 is a Sunday
    # (checked with the stdlib calendar below).
    sunday = datetime(2026, 5, 31, 12, tzinfo=UTC)
    assert calendar.weekday(2026, 5, 31) == calendar.SUNDAY
    naive = CronTrigger.from_crontab("0 2 * * 1", timezone="UTC").get_next_fire_time(None, sunday)
    ours = next_fire_times("0 2 * * 1", "UTC", sunday, 1)[0]
    assert naive.weekday() == calendar.TUESDAY  # the pitfall: APScheduler's 1 is Tuesday
    assert ours == datetime(2026, 6, 1, 2, tzinfo=UTC) and ours.weekday() == calendar.MONDAY


@pytest.mark.parametrize(
    ("field", "weekdays"),
    [
        ("0", {calendar.SUNDAY}),
        ("7", {calendar.SUNDAY}),
        ("1-5", {0, 1, 2, 3, 4}),  # Monday..Friday in Python's numbering
        ("mon-fri", {0, 1, 2, 3, 4}),
        ("0,6", {calendar.SATURDAY, calendar.SUNDAY}),
        ("5-7", {calendar.FRIDAY, calendar.SATURDAY, calendar.SUNDAY}),
        ("fri-sun", {calendar.FRIDAY, calendar.SATURDAY, calendar.SUNDAY}),
        ("*/2", {calendar.SUNDAY, calendar.TUESDAY, calendar.THURSDAY, calendar.SATURDAY}),
        ("1-7/3", {calendar.MONDAY, calendar.THURSDAY, calendar.SUNDAY}),
    ],
)
def test_weekday_field_forms(field, weekdays):
    # Expected sets worked out by hand from the cron rule (0/7 = Sunday, 1 = Monday),
    # then compared with what fires over four weeks.
    start = datetime(2026, 6, 1, tzinfo=UTC)
    fired = next_fire_times(f"0 2 * * {field}", "UTC", start, 4 * len(weekdays))
    assert {f.weekday() for f in fired} == weekdays
    assert fired[-1] - fired[0] < timedelta(days=28)


def test_day_of_month_or_day_of_week_fires_on_either():
    # Standard cron rule (POSIX crontab: both restricted -> a day matching either).
    # Brute-force reference over April 2026 with the stdlib calendar.
    expected = [
        datetime(2026, 4, d, 2, tzinfo=UTC)
        for d in range(1, 31)
        if d == 13 or calendar.weekday(2026, 4, d) == calendar.FRIDAY
    ]
    got = next_fire_times("0 2 13 * fri", "UTC", datetime(2026, 4, 1, tzinfo=UTC), len(expected))
    assert got == expected
    assert calendar.weekday(2026, 4, 13) == calendar.MONDAY  # so the 13th only fires via "either"


def test_other_fields_keep_their_meaning():
    start = datetime(2026, 1, 1, tzinfo=UTC)
    got = next_fire_times("*/20 9-10 1,15 jan-feb *", "UTC", start, 7)
    # Reference: minutes 0,20,40 of hours 9 and 10 on the 1st and 15th (hand-computed).
    expected = [
        datetime(2026, 1, day, hour, minute, tzinfo=UTC)
        for day in (1, 15)
        for hour in (9, 10)
        for minute in (0, 20, 40)
    ][:7]
    assert got == expected


@pytest.mark.parametrize(
    "expr",
    ["61 * * * *", "0 24 * * *", "0 2 0 * *", "0 2 * 13 *", "0 2 * * 8", "0 2 L * *",
     "0 2 * * 5#3", "5/15 * * * *", "0 2 * * mon-", "0 2 * *", "0 2 * * 5-1", "*/0 * * * *"],
)  # fmt: skip
def test_bad_expressions_name_the_expression(expr):
    with pytest.raises(ScheduleUsageError) as err:
        crontab_to_trigger(expr, "UTC")
    assert repr(expr) in str(err.value)


def test_unknown_time_zone_is_a_usage_error():
    with pytest.raises(ScheduleUsageError, match="Mars/Olympus"):
        crontab_to_trigger("0 2 * * *", "Mars/Olympus")


def test_naive_start_is_refused():
    with pytest.raises(ValueError):
        next_fire_times("0 2 * * *", "UTC", datetime(2026, 1, 1), 1)


# --- daylight-saving time, Europe/London ----------------------------------------------
# UK summer time starts and ends at 01:00 UTC on the last Sunday of March and of
# October (Summer Time Act 1972 as amended; gov.uk "When do the clocks change?").
# In 2026 those Sundays are 29 March and 25 October (checked with the stdlib calendar).


def _last_sunday(year: int, month: int) -> date:
    last = calendar.monthrange(year, month)[1]
    return max(date(year, month, d) for d in range(last - 6, last + 1)
               if calendar.weekday(year, month, d) == calendar.SUNDAY)  # fmt: skip


def test_the_2026_change_days():
    assert _last_sunday(2026, 3) == date(2026, 3, 29)
    assert _last_sunday(2026, 10) == date(2026, 10, 25)


def test_spring_forward_nonexistent_0130_fires_once_at_0130_utc():
    # 01:30 does not exist on 29 March (01:00 GMT -> 02:00 BST).  It fires once, at
    # 01:30 UTC (= 02:30 BST); the days around it fire at 01:30 GMT and 01:30 BST.
    got = next_fire_times(
        "30 1 * * *", "Europe/London", datetime(2026, 3, 28, 12, tzinfo=LONDON), 3
    )
    assert _utc(got) == [
        datetime(2026, 3, 29, 1, 30, tzinfo=UTC),
        datetime(2026, 3, 30, 0, 30, tzinfo=UTC),
        datetime(2026, 3, 31, 0, 30, tzinfo=UTC),
    ]


def test_fall_back_repeated_0130_fires_once_at_the_first_occurrence():
    # 01:00-01:59 happens twice on 25 October; the job fires once, at 01:30 BST
    # (00:30 UTC), not again at 01:30 GMT (01:30 UTC).
    got = next_fire_times(
        "30 1 * * *", "Europe/London", datetime(2026, 10, 24, 12, tzinfo=LONDON), 3
    )
    assert _utc(got) == [
        datetime(2026, 10, 25, 0, 30, tzinfo=UTC),
        datetime(2026, 10, 26, 1, 30, tzinfo=UTC),
        datetime(2026, 10, 27, 1, 30, tzinfo=UTC),
    ]


def test_0200_fires_once_on_both_change_days():
    # 02:00 exists exactly once on both days in London: 02:00 BST = 01:00 UTC on
    # 29 March, 02:00 GMT = 02:00 UTC on 25 October.
    spring = next_fire_times(
        "0 2 * * *", "Europe/London", datetime(2026, 3, 28, 12, tzinfo=LONDON), 2
    )
    autumn = next_fire_times(
        "0 2 * * *", "Europe/London", datetime(2026, 10, 24, 12, tzinfo=LONDON), 2
    )
    assert _utc(spring) == [
        datetime(2026, 3, 29, 1, tzinfo=UTC),
        datetime(2026, 3, 30, 1, tzinfo=UTC),
    ]
    assert _utc(autumn) == [
        datetime(2026, 10, 25, 2, tzinfo=UTC),
        datetime(2026, 10, 26, 2, tzinfo=UTC),
    ]


def test_hourly_job_runs_in_both_repeated_hours():
    # With "*" in the hour field every real hour gets its run, including both 01:30s.
    got = next_fire_times(
        "30 * * * *", "Europe/London", datetime(2026, 10, 24, 23, 0, tzinfo=UTC), 4
    )
    assert [g.strftime("%H:%M") for g in _utc(got)] == ["23:30", "00:30", "01:30", "02:30"]


# --- the run loop --------------------------------------------------------------------


def _config(tmp_path) -> Config:
    return Config.model_validate(
        {
            "decisions": {"id": "i", "decided_at": "t", "decision_maker": "d", "judgment": "j"},
            "cues": {"x": {"type": "numeric"}},
            "schedule": {"cron": "0 2 * * *", "timezone": "UTC", "misfire_grace_s": 60},
        }
    )


def test_failed_run_is_logged_and_the_next_run_happens(tmp_path, caplog):
    calls: list[float] = []
    stop = threading.Event()
    stopped_at: list[float] = []

    def job():
        calls.append(time.monotonic())
        if len(calls) == 1:
            raise RuntimeError("boom: first run fails")
        stopped_at.append(time.monotonic())
        stop.set()

    caplog.set_level(logging.INFO, logger="monitor.schedule")
    summary = run_schedule(
        _config(tmp_path), job, stop_event=stop, trigger=IntervalTrigger(seconds=0.2)
    )
    returned = time.monotonic()
    assert len(calls) == 2 and summary.runs == 2 and summary.failures == 1
    failure = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert len(failure) == 1 and failure[0].exc_info is not None
    assert "RuntimeError: boom: first run fails" in caplog.text  # the traceback is logged
    assert returned - stopped_at[0] < 1.0


def test_sigterm_stops_the_loop_within_a_second(tmp_path):
    runs: list[float] = []
    sent: list[float] = []

    def send_sigterm():
        sent.append(time.monotonic())
        os.kill(os.getpid(), signal.SIGTERM)

    before = signal.getsignal(signal.SIGTERM)
    timer = threading.Timer(0.5, send_sigterm)
    timer.start()
    summary = run_schedule(
        _config(tmp_path), lambda: runs.append(1), trigger=IntervalTrigger(seconds=0.1)
    )
    elapsed = time.monotonic() - sent[0]
    assert elapsed < 1.0
    assert summary.runs >= 2 and summary.runs == len(runs)
    assert signal.getsignal(signal.SIGTERM) == before  # handlers restored


def test_running_job_finishes_before_stop_returns(tmp_path):
    stop = threading.Event()
    finished: list[bool] = []

    def job():
        stop.set()  # ask to stop while this run is still going
        time.sleep(0.4)
        finished.append(True)

    run_schedule(_config(tmp_path), job, stop_event=stop, trigger=IntervalTrigger(seconds=0.1))
    assert finished == [True]


def test_long_job_never_runs_twice_at_once(tmp_path):
    lock = threading.Lock()
    active = [0]
    peak = [0]
    stop = threading.Event()

    def job():
        with lock:
            active[0] += 1
            peak[0] = max(peak[0], active[0])
        time.sleep(0.45)  # longer than four trigger periods
        with lock:
            active[0] -= 1

    threading.Timer(1.2, stop.set).start()
    summary = run_schedule(
        _config(tmp_path), job, stop_event=stop, trigger=IntervalTrigger(seconds=0.1)
    )
    assert peak[0] == 1
    assert summary.runs >= 2
    assert summary.skipped >= 1  # fire times that came while a run was going were skipped
