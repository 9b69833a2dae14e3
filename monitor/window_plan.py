"""Which windows to fit and their merged statistics: the day-bucket series of each
scope (decision-maker, team, all) and the aligned window ends.

Windows are ``length_days`` long and end every ``step_days`` days on dates aligned
to ``windows.origin``; a window ending on E covers the days E-length+1 .. E.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np

from monitor.config import Config
from monitor.moments import Moments, fixed_window_sums, group_sums
from monitor.moments_sql import MomentLayout

EPOCH = date(1970, 1, 1)
ALL_KEY = "all"


def day_number(d: date) -> int:
    """Days since 1970-01-01."""
    return (d - EPOCH).days


def from_day_number(n: int) -> date:
    """The date ``n`` days after 1970-01-01."""
    return EPOCH + timedelta(days=int(n))


@dataclass(frozen=True)
class WindowPlan:
    """The windows to fit: for each, its series (entity) and the bucket index range."""

    scope: np.ndarray  # (w,) object
    key: np.ndarray  # (w,) object: decision-maker id, team name or "all"
    team: np.ndarray  # (w,) object
    end_day: np.ndarray  # (w,) int day numbers
    start: np.ndarray  # (w,) bucket index range [start, stop) in the scope's series
    stop: np.ndarray


def aligned_ends(config: Config, first_day: int, last_day: int) -> np.ndarray:
    """Window end day-numbers (aligned to the origin every step) whose windows
    overlap [first_day, last_day], up to the first aligned date on or after last_day."""
    w = config.windows
    origin = day_number(date.fromisoformat(w.origin))
    lo = first_day  # first end that covers first_day
    j0 = -((origin - lo) // w.step_days)  # ceil((lo - origin) / step)
    hi = last_day
    j1 = -((origin - hi) // w.step_days)
    return origin + np.arange(j0, j1 + 1) * w.step_days


def covering_ends(config: Config, days: np.ndarray, newest: int) -> tuple[np.ndarray, np.ndarray]:
    """Every (index into ``days``, aligned window end) whose window covers that day:
    ends in [day, day + length - 1], none after ``newest``.  Vectorised: a day is
    covered by at most ceil(length / step) + 1 aligned windows."""
    w = config.windows
    origin = day_number(date.fromisoformat(w.origin))
    days = np.asarray(days, dtype=np.int64)
    first = -((origin - days) // w.step_days)  # ceil((day - origin) / step)
    per = -(-w.length_days // w.step_days) + 1
    ends = origin + (first[:, None] + np.arange(per)) * w.step_days
    upper = np.maximum(days + w.length_days - 1, 0)
    ok = (ends >= days[:, None]) & (ends <= upper[:, None]) & (ends <= newest)
    rows, cols = np.nonzero(ok)
    return rows, ends[rows, cols]


@dataclass(frozen=True)
class Series:
    """Day buckets of several entities of one scope, sorted by (entity, day)."""

    scope: str
    keys: np.ndarray  # (e,) entity keys
    teams: np.ndarray  # (e,) the entity's team (latest seen)
    entity: np.ndarray  # (b,) entity index per bucket
    day: np.ndarray  # (b,) day numbers
    all_rows: Moments
    linked: Moments


def _group_series(
    base: Series, scope: str, group_of_entity: np.ndarray, keys: np.ndarray
) -> Series:
    """Merge a finer series into coarser entities (e.g. decision-makers into teams)."""
    g = group_of_entity[base.entity].astype(np.int64)
    # (group, day) codes in sorted order; buckets are merged in place, unsorted.
    big = np.int64(1) << 32
    codes, cell = np.unique(g * big + base.day, return_inverse=True)
    all_rows = group_sums(base.all_rows, cell, len(codes))
    linked = group_sums(base.linked, cell, len(codes))
    teams = keys if scope == "team" else np.array([None] * len(keys), dtype=object)
    return Series(scope, keys, teams, codes // big, codes % big, all_rows, linked)


def build_series(frame: dict[str, np.ndarray], layout: MomentLayout) -> dict[str, Series]:
    """Decision-maker, team and all series from fetched bucket rows."""
    dm = np.asarray(frame["decision_maker"], dtype=object)
    days = np.asarray(frame["day_number"], dtype=np.int64)
    team = np.asarray(frame["team"], dtype=object)
    order = np.lexsort((days, dm))
    if np.array_equal(order, np.arange(len(order))):
        arrays = frame  # fetched in order already: skip a copy of every column
    else:
        arrays = {k: np.asarray(v)[order] for k, v in frame.items()}
        dm, days, team = dm[order], days[order], team[order]
    all_rows, linked = layout.to_moments(arrays)
    del arrays
    keys, entity = (
        np.unique(dm, return_inverse=True)
        if len(dm)
        else (np.array([], dtype=object), np.array([], dtype=int))
    )
    # A decision-maker's team: the one on their latest bucket.
    last = np.zeros(len(keys), dtype=int)
    if len(dm):
        last[entity] = np.arange(len(dm))  # later buckets overwrite earlier ones
    teams = team[last] if len(dm) else np.array([], dtype=object)
    per_dm = Series("decision_maker", keys.astype(object), teams, entity, days, all_rows, linked)
    team_keys = np.array(sorted({t for t in teams if t is not None}), dtype=object)
    team_index = {t: i for i, t in enumerate(team_keys)}
    has_team = np.array([t is not None for t in teams], dtype=bool)
    out = {"decision_maker": per_dm}
    if len(team_keys):
        sub = np.flatnonzero(has_team[entity])
        whole = len(sub) == len(entity)  # everyone has a team: no copy of the stacks
        base = (
            per_dm
            if whole
            else Series(
                "decision_maker",
                keys,
                teams,
                entity[sub],
                days[sub],
                all_rows.take(sub),
                linked.take(sub),
            )
        )
        group = np.array([team_index.get(t, -1) for t in teams])
        out["team"] = _group_series(base, "team", group, team_keys)
    if len(keys):
        out["all"] = _group_series(
            per_dm, "all", np.zeros(len(keys), dtype=int), np.array([ALL_KEY], dtype=object)
        )
    return out


def plan_windows(
    config: Config, series: Series, wanted: dict[object, set[int]] | None, last_day: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(entity index, end day, start, stop) for every window of the series, or only
    for the wanted {key: {end days}}."""
    length = config.windows.length_days
    ent_l, end_l = [], []
    for e, key in enumerate(series.keys):
        mine = series.day[series.entity == e]
        if not len(mine):
            continue
        ends = aligned_ends(config, int(mine.min()), max(int(mine.max()), last_day))
        if wanted is not None:
            want = wanted.get(key)
            if not want:
                continue
            ends = ends[np.isin(ends, np.fromiter(want, dtype=np.int64))]
        ent_l.append(np.full(len(ends), e))
        end_l.append(ends)
    if not ent_l:
        z = np.array([], dtype=np.int64)
        return z, z, z, z
    ent = np.concatenate(ent_l)
    end = np.concatenate(end_l)
    big = np.int64(10_000_000)
    composite = series.entity.astype(np.int64) * big + series.day
    start = np.searchsorted(composite, ent * big + (end - length + 1), side="left")
    stop = np.searchsorted(composite, ent * big + end, side="right")
    nonempty = stop > start
    return ent[nonempty], end[nonempty], start[nonempty], stop[nonempty]


def window_moments(config: Config, series: Series, ent, end) -> tuple[Moments, Moments]:
    """(all rows, linked rows) statistics of the windows (entity index, end day)."""
    length = config.windows.length_days
    return (
        fixed_window_sums(series.all_rows, series.entity, series.day, ent, end, length),
        fixed_window_sums(series.linked, series.entity, series.day, ent, end, length),
    )
