"""Control limits for the weekly look at rolling windows, calibrated to a false-alarm rate.

Each (person, check, cue) series is watched every ``step_days`` on a window of the last
``length_days`` days.  The windows overlap (a 90-day window moved by 7 days shares 92 %
of its rows), so the series of window statistics is a moving sum of the daily evidence:
a MOSUM chart (Bauer & Hackl 1978, Technometrics 20; Chu, Hornik & Kuan 1995,
Biometrika 82).  Its limit is chosen like any control chart's, from the in-control run
length (Montgomery, *Introduction to Statistical Quality Control*, ch. 9): the limit c
such that an innocent series opens at most ``target`` alerts per 100 years under the
alert rule actually used (``consecutive`` looks at or beyond c open an alert, as many
looks below c close it).  Treating the weekly looks as independent tests would let the
overlap turn a 5 % test into a false alert every few months.

The null run length of this chart has no closed form, so it is computed by simulating
the in-control process exactly: independent standard normal daily increments, window
statistic z_t = (sum of the last L increments) / sqrt(L) ("level": is a weight
non-zero?) or the difference of two adjacent such sums / sqrt(2 L) ("change": did a
weight move between the current window and the previous non-overlapping one?).  With a
fixed seed the limit is the same on every machine and run.  A window statistic that is
t-distributed with a few hundred residual degrees of freedom is close enough to normal
here; the p-value form (``p_limit``) is what the checks compare against, so t and F
tests use it through their own p-values.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from monitor.stats.limits import normal_two_sided_p

DAYS_PER_YEAR = 365.25
# Simulated in-control history: a rate of 1 per 100 years then rests on ~200 simulated
# alerts (relative standard error ~7 %); one calibration takes ~0.3 s and is cached.
SIMULATED_YEARS = 20_000
SEED = 20_261_203


@dataclass(frozen=True)
class ControlLimit:
    """The limit for one alert rule: flag a look when |z| >= ``z`` (equivalently its
    two-sided p-value <= ``p_limit``).  ``false_alerts_per_100_years`` is what the
    limit achieves on the simulated in-control series (at most the target)."""

    statistic: str  # "level" | "change"
    length_days: int
    step_days: int
    consecutive: int
    target_per_100_years: float
    z: float
    p_limit: float
    false_alerts_per_100_years: float


def count_openings(flags: np.ndarray, consecutive: int) -> int:
    """Alerts opened along one series of looks (True = flagged) under the hysteresis
    rule of ``monitor.stats.episodes``: ``consecutive`` flagged looks in a row open an
    alert, as many clear looks in a row close it."""
    flags = np.asarray(flags, dtype=bool)
    if not flags.size:
        return 0
    edges = np.flatnonzero(np.diff(flags.astype(np.int8))) + 1
    starts = np.r_[0, edges]
    lengths = np.diff(np.r_[starts, flags.size])
    values = flags[starts]
    opened, count = False, 0
    for value, length in zip(values, lengths, strict=True):
        if length < consecutive:
            continue
        if value and not opened:
            opened, count = True, count + 1
        elif not value and opened:
            opened = False
    return count


def null_statistics(
    statistic: str, length_days: int, step_days: int, years: float, seed: int
) -> np.ndarray:
    """|z| at each weekly look of one long in-control series (see the module text)."""
    rng = np.random.default_rng(seed)
    days = int(years * DAYS_PER_YEAR) + 2 * length_days + step_days
    total = np.concatenate([[0.0], np.cumsum(rng.standard_normal(days))])
    ends = np.arange(2 * length_days, days + 1, step_days)
    current = total[ends] - total[ends - length_days]
    if statistic == "level":
        return np.abs(current) / np.sqrt(length_days)
    if statistic == "change":
        # The previous non-overlapping window: the latest look ending at least
        # length_days before this one (as monitor.assess.findings pairs them).
        lag = -(-length_days // step_days) * step_days
        earlier = total[ends - lag] - total[ends - lag - length_days]
        return np.abs(current - earlier) / np.sqrt(2.0 * length_days)
    raise ValueError(f"unknown statistic {statistic!r}")


@lru_cache(maxsize=64)
def control_limit(
    statistic: str,
    length_days: int,
    step_days: int,
    consecutive: int,
    target_per_100_years: float,
    *,
    years: float = SIMULATED_YEARS,
    seed: int = SEED,
) -> ControlLimit:
    """The smallest |z| limit whose simulated in-control false-alarm rate is at most
    ``target_per_100_years`` alerts per 100 series-years (bisection; the rate falls as
    the limit rises)."""
    if target_per_100_years <= 0:
        raise ValueError("the false-alarm target must be positive")
    z = null_statistics(statistic, length_days, step_days, years, seed)
    span = years / 100.0

    def rate(limit: float) -> float:
        return count_openings(z >= limit, consecutive) / span

    lo, hi = 0.0, 8.0
    for _ in range(40):
        mid = (lo + hi) / 2.0
        if rate(mid) <= target_per_100_years:
            hi = mid
        else:
            lo = mid
    return ControlLimit(
        statistic=statistic,
        length_days=length_days,
        step_days=step_days,
        consecutive=consecutive,
        target_per_100_years=target_per_100_years,
        z=hi,
        p_limit=float(normal_two_sided_p(np.float64(hi))),
        false_alerts_per_100_years=rate(hi),
    )


def forbidden_cue_limit(policy, windows) -> ControlLimit | None:
    """The limit of the direct and proxy forbidden-cue checks for a ``[policy]`` and
    ``[windows]`` configuration; None under the per-window FDR rule."""
    if policy.alert_rule != "calibrated":
        return None
    return control_limit(
        "level",
        windows.length_days,
        windows.step_days,
        policy.consecutive_windows,
        policy.false_alerts_per_100_years,
    )


def drift_limit(policy, windows) -> ControlLimit | None:
    """The limit of the weight-drift check; None under the per-window FDR rule."""
    if policy.alert_rule != "calibrated":
        return None
    return control_limit(
        "change",
        windows.length_days,
        windows.step_days,
        policy.consecutive_windows,
        policy.drift_false_alerts_per_100_years,
    )
