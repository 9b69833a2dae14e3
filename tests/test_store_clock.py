"""The store's clock: the system's everywhere, a simulated one only inside
``simulated_clock``, which only the demo uses (no option, setting or variable reaches it)."""

from __future__ import annotations

import re
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from monitor.store.rules import clock_kind, simulated_clock, utc_now

MONITOR = Path(__file__).resolve().parent.parent / "monitor"


def test_the_clock_is_the_systems_outside_the_demo() -> None:
    before = datetime.now(UTC)
    now = utc_now()
    assert before <= now <= datetime.now(UTC)
    assert now.tzinfo is not None and now.utcoffset() == timedelta(0)
    assert clock_kind() == "system"


def test_a_simulated_clock_starts_where_it_is_set_runs_on_and_ends_with_its_block() -> None:
    start = datetime(2025, 3, 1, 2, 0, tzinfo=UTC)
    with simulated_clock(start):
        first, second = utc_now(), utc_now()
        assert start <= first <= second < start + timedelta(seconds=5)
        assert clock_kind() == "simulated"
        # A thread started inside has a context of its own: the system clock.
        seen: list[datetime] = []
        worker = threading.Thread(target=lambda: seen.append(utc_now()))
        worker.start()
        worker.join()
        assert seen[0].year == datetime.now(UTC).year
    assert clock_kind() == "system" and utc_now() > start + timedelta(days=365)


def test_a_start_without_a_time_zone_is_refused() -> None:
    with pytest.raises(ValueError), simulated_clock(datetime(2025, 3, 1, 2, 0)):
        pass


def test_only_the_demo_sets_the_simulated_clock() -> None:
    users = sorted(
        str(p.relative_to(MONITOR))
        for p in MONITOR.rglob("*.py")
        if re.search(r"\bsimulated_clock\(", p.read_text(encoding="utf-8"))
    )
    assert users == ["demo.py", "store/rules.py"]
    # And nothing reads a time from the environment for it.
    assert "os.environ" not in (MONITOR / "store" / "rules.py").read_text(encoding="utf-8")
