"""The stretches of days the bucket statistics are summed over, and day numbers.

A bucket holds one decision-maker's decisions of one *stretch*: the days between two
window boundaries - a window's first day, the day after a window's end - so that every
window holds a stretch whole or not at all, and a window's statistics are the sum of the
buckets whose first day lies in it.  With 90-day windows every 7 days a boundary falls on
two weekdays: two buckets a week instead of seven per-day ones (one when the length is a
multiple of the step).  A bucket is named by its stretch's first day.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np

from monitor.config import Config

EPOCH = date(1970, 1, 1)
# store_facts key: the stretches the stored buckets are summed over (``Stretches.to_json``).
STRETCHES_FACT = "bucket_stretches"


def day_number(d: date) -> int:
    """Days since 1970-01-01."""
    return (d - EPOCH).days


def from_day_number(n: int) -> date:
    """The date ``n`` days after 1970-01-01."""
    return EPOCH + timedelta(days=int(n))


@dataclass(frozen=True)
class Stretches:
    """The stretches of days the buckets are summed over.  A stretch starts on a day
    after an aligned window end (day number = ``after_end`` modulo ``step``) or on an
    aligned window's first day (``at_start`` modulo ``step``), and runs to the day before
    the next such day: at most ``step`` days.  ``start`` (numpy), ``sql`` (DuckDB) and
    ``monitor.lake.sums`` (Spark) compute the same first day from these residues."""

    step: int
    after_end: int
    at_start: int

    @classmethod
    def of(cls, config: Config) -> Stretches:
        w = config.windows
        origin = day_number(date.fromisoformat(w.origin))
        step = w.step_days
        return cls(step, (origin + 1) % step, (origin - w.length_days + 1) % step)

    def to_json(self) -> str:
        return json.dumps([self.step, self.after_end, self.at_start])

    @classmethod
    def from_json(cls, text: str) -> Stretches:
        step, after_end, at_start = json.loads(text)
        return cls(int(step), int(after_end), int(at_start))

    def start(self, days) -> np.ndarray:
        """The first day (day number) of each day's stretch."""
        days = np.asarray(days, dtype=np.int64)
        back = np.minimum((days - self.after_end) % self.step, (days - self.at_start) % self.step)
        return days - back

    def sql(self, day: str) -> str:
        """DuckDB expression: the first day (DATE) of the stretch of ``day`` (a DATE)."""
        n = f"({day} - DATE '1970-01-01')"
        s = self.step

        def back(r: int) -> str:  # (n - r) mod s, never negative
            return f"((({n} - {r}) % {s} + {s}) % {s})"

        return f"({day} - least({back(self.after_end)}, {back(self.at_start)})::INTEGER)"

    def last(self, first_days) -> np.ndarray:
        """The last day of the stretches starting on ``first_days``."""
        first = np.asarray(first_days, dtype=np.int64)
        nxt = np.minimum(
            (self.after_end - first - 1) % self.step, (self.at_start - first - 1) % self.step
        )
        return first + nxt
