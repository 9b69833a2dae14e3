"""Bucket statistics and the rolling-window refresh (`cuewatch refit`).

Per (decision-maker, day) the store keeps the sufficient statistics of that day's
judgments (``bucket_stats``; see ``moments_sql``).  A window's statistics are the
merge of its days' buckets, for one decision-maker, a team or everyone, so a refresh
only recomputes the buckets that new decisions, new outcomes or outcome corrections
made dirty, and then only the windows that cover them.

Windows are ``length_days`` long and end every ``step_days`` days on dates aligned
to ``windows.origin``; a window ending on E covers the days E-length+1 .. E.  The
newest window ends on the first aligned date on or after the newest decision, so it
includes the latest data (it is "still open" until that date passes).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from datetime import date, timedelta

import duckdb
import numpy as np
import pandas as pd

from monitor import __version__
from monitor.config import Config
from monitor.lens import LensFits, fit_lens, fit_lens_rows, replace_rows, stack
from monitor.moments import Moments, fixed_window_sums, segment_sums
from monitor.moments_sql import MomentLayout, design_expressions, moments_sql
from monitor.store import Store, quote_ident, sql_literal, utc_now

EPOCH = date(1970, 1, 1)
SCOPES = ("decision_maker", "team", "all")
ALL_KEY = "all"
BUCKET_LAYOUT = "shifted-sums-2"


class RefitUsageError(Exception):
    """A user error in the refit / fits commands."""


def day_number(d: date) -> int:
    return (d - EPOCH).days


def from_day_number(n: int) -> date:
    return EPOCH + timedelta(days=int(n))


def design_signature(config: Config) -> str:
    """Identifies the design (cue columns and their coding); stored statistics made
    under another design are rebuilt."""
    doc = {
        name: {"type": c.type, "levels": c.levels, "reference": c.reference, "values": c.values}
        for name, c in config.cues.items()
    }
    doc["__columns__"] = config.design_columns()
    # The bucket_stats layout (MomentLayout.columns): a store written with another
    # layout is rebuilt by a full refit instead of failing on a missing column.
    doc["__bucket_layout__"] = BUCKET_LAYOUT
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:16]


# --- bucket statistics ----------------------------------------------------------------


def _bucket_table_sql(layout: MomentLayout) -> str:
    cols = ", ".join(
        f"{c} {'BIGINT' if c.startswith('n_') else 'DOUBLE'}" for c in layout.columns()
    )
    return (
        "CREATE TABLE bucket_stats (decision_maker VARCHAR NOT NULL, day DATE NOT NULL, "
        f"team VARCHAR, {cols})"
    )


def _get_fact(con: duckdb.DuckDBPyConnection, key: str) -> str | None:
    rows = con.execute("SELECT value FROM store_facts WHERE key = ?", [key]).fetchall()
    return rows[0][0] if rows else None


def _set_fact(con: duckdb.DuckDBPyConnection, key: str, value: str) -> None:
    con.execute("INSERT OR REPLACE INTO store_facts VALUES (?, ?, ?)", [key, value, utc_now()])


def _bucket_insert_sql(config: Config, where: str, restrict: bool) -> str:
    select = moments_sql(
        config,
        group_by=["d.decision_maker AS decision_maker", "d.decided_day AS day"],
        decision_filter=where,
        restrict_outcomes=restrict,
    )
    layout = MomentLayout(len(config.design_columns()))
    cols = ", ".join(["decision_maker", "day", "team", *layout.columns()])
    return f"INSERT INTO bucket_stats ({cols}) {select}"


# --- windows ------------------------------------------------------------------------


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
    g = group_of_entity[base.entity]
    order = np.lexsort((base.day, g))
    g_sorted, d_sorted = g[order], base.day[order]
    boundary = np.ones(len(order), dtype=bool)
    boundary[1:] = (g_sorted[1:] != g_sorted[:-1]) | (d_sorted[1:] != d_sorted[:-1])
    starts = np.flatnonzero(boundary)
    # Each (group, day) is a short run of consecutive buckets: sequential merges
    # within runs cost one pass per member, far less than a range tree over all.
    all_rows = segment_sums(base.all_rows.take(order), boundary)
    linked = segment_sums(base.linked.take(order), boundary)
    teams = keys if scope == "team" else np.array([None] * len(keys), dtype=object)
    return Series(scope, keys, teams, g_sorted[starts], d_sorted[starts], all_rows, linked)


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
        base = Series(
            "decision_maker",
            keys,
            teams,
            entity[sub],
            days[sub],
            all_rows.take(sub),
            linked.take(sub),
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


def fit_series(
    config: Config, series: Series, ent, end, start, stop, raw_rows=None, windows=None
) -> tuple[LensFits, np.ndarray]:
    """Fit every planned window of one series; returns the fits and a method label
    per window ("moments" or "qr").  ``windows``: their statistics if already merged
    (``window_moments``)."""
    names = config.design_columns()
    all_w, link_w = windows if windows is not None else window_moments(config, series, ent, end)
    min_rows = config.windows.min_rows
    fits = fit_lens(all_w, link_w, names, min_rows=min_rows)
    method = np.array(["moments"] * fits.size, dtype=object)
    redo = np.flatnonzero(fits.needs_raw_refit)
    if len(redo) and raw_rows is not None:
        refits = []
        for i in redo:
            x, ys, ye = raw_rows(series.scope, series.keys[ent[i]], int(end[i]))
            refits.append(fit_lens_rows(x, ys, ye, names, min_rows=min_rows))
        fits = replace_rows(fits, redo, stack(refits))
        method[redo] = "qr"
    return fits, method


# --- the refresh --------------------------------------------------------------------


@dataclass
class RefitSummary:
    mode: str  # "full" | "incremental" | "nothing to do"
    dirty_buckets: int
    buckets_recomputed: int
    windows_fitted: int
    windows_refit_from_rows: int
    seconds: float

    def to_json(self) -> dict:
        return self.__dict__.copy()


def refit(config: Config, *, full: bool = False) -> RefitSummary:
    """Bring bucket statistics and window fits up to date, in one transaction.

    Incremental by default: only dirty buckets and the windows covering them.  A full
    refit (or a changed design) recomputes everything; both give the same numbers.
    """
    import time

    t0 = time.perf_counter()
    store = Store(config)
    with store.writer() as con:
        store.ensure_ready(con)
        sig = design_signature(config)
        con.execute("BEGIN")
        try:
            if full or _get_fact(con, "design_signature") != sig or not _has_buckets(con):
                summary = _refit_full(con, config, sig)
            else:
                summary = _refit_incremental(con, config, sig)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
    summary.seconds = round(time.perf_counter() - t0, 3)
    return summary


def _has_buckets(con) -> bool:
    return bool(
        con.execute(
            "SELECT count(*) FROM information_schema.tables WHERE table_name = 'bucket_stats'"
        ).fetchall()[0][0]
    )


def _refit_full(con, config: Config, sig: str) -> RefitSummary:
    layout = MomentLayout(len(config.design_columns()))
    con.execute("DROP TABLE IF EXISTS bucket_stats")
    con.execute(_bucket_table_sql(layout))
    con.execute(_bucket_insert_sql(config, "TRUE", restrict=False))
    n_dirty = con.execute(
        "SELECT count(*) FROM (SELECT DISTINCT decision_maker, day FROM dirty_buckets)"
    ).fetchall()[0][0]
    con.execute("DELETE FROM dirty_buckets")
    con.execute("DELETE FROM fits")
    con.execute("DELETE FROM cue_weights")
    frame = _fetch_buckets(con, layout, None)
    n_buckets = len(frame["day_number"])
    last_day = _last_day(con)
    fitted = refitted = 0
    every = build_series(frame, layout)
    del frame  # the wide fetched columns are no longer needed: lower peak memory
    for _scope, series in every.items():
        ent, end, start, stop = plan_windows(config, series, None, last_day)
        fitted_n, refit_n = _fit_and_write(con, config, sig, series, ent, end, start, stop)
        fitted += fitted_n
        refitted += refit_n
    _set_fact(con, "design_signature", sig)
    _set_fact(con, "last_refit", utc_now().isoformat())
    return RefitSummary("full", int(n_dirty), n_buckets, fitted, refitted, 0.0)


def _refit_incremental(con, config: Config, sig: str) -> RefitSummary:
    layout = MomentLayout(len(config.design_columns()))
    stamp = con.execute("SELECT max(marked_at) FROM dirty_buckets").fetchall()[0][0]
    if stamp is None:
        return RefitSummary("nothing to do", 0, 0, 0, 0, 0.0)
    con.execute(
        "CREATE TEMP TABLE _dirty AS SELECT DISTINCT decision_maker, day FROM dirty_buckets "
        "WHERE marked_at <= ?",
        [stamp],
    )
    try:
        n_dirty = con.execute("SELECT count(*) FROM _dirty").fetchall()[0][0]
        con.execute(
            "DELETE FROM bucket_stats b USING _dirty x "
            "WHERE b.decision_maker = x.decision_maker AND b.day = x.day"
        )
        lo_day, hi_day = con.execute("SELECT min(day), max(day) FROM _dirty").fetchone()
        # The literal day range lets DuckDB skip row groups by their min/max (zone
        # maps) before the semi-join: decisions arrive roughly in time order.
        where = (
            f"d.decided_day BETWEEN DATE '{lo_day}' AND DATE '{hi_day}' AND EXISTS "
            "(SELECT 1 FROM _dirty x WHERE x.decision_maker = d.decision_maker "
            "AND x.day = d.decided_day)"
        )
        con.execute(_bucket_insert_sql(config, where, restrict=True))
        dirty = con.execute(
            "SELECT x.decision_maker, (x.day - DATE '1970-01-01')::BIGINT, b.team "
            "FROM _dirty x LEFT JOIN bucket_stats b USING (decision_maker, day)"
        ).fetchall()
        con.execute("DELETE FROM dirty_buckets WHERE marked_at <= ?", [stamp])
    finally:
        con.execute("DROP TABLE IF EXISTS _dirty")

    length = config.windows.length_days
    last_day = _last_day(con)
    wanted: dict[str, dict[object, set[int]]] = {s: {} for s in SCOPES}
    lo, hi = None, None
    teams_of = dict(
        con.execute(
            "SELECT decision_maker, arg_max(team, day) FROM bucket_stats GROUP BY decision_maker"
        ).fetchall()
    )
    for dm, day, team in dirty:
        ends = aligned_ends(config, day, day + length - 1)
        ends = ends[(ends >= day) & (ends <= max(day + length - 1, 0))]
        ends = ends[ends <= aligned_ends(config, last_day, last_day)[-1]]
        if not len(ends):
            continue
        endset = set(int(e) for e in ends)
        wanted["decision_maker"].setdefault(dm, set()).update(endset)
        t = team or teams_of.get(dm)
        if t is not None:
            wanted["team"].setdefault(t, set()).update(endset)
        wanted["all"].setdefault(ALL_KEY, set()).update(endset)
        lo = (
            min(lo, int(ends.min()) - length + 1)
            if lo is not None
            else int(ends.min()) - length + 1
        )
        hi = max(hi, int(ends.max())) if hi is not None else int(ends.max())
    # A full refit gives every series a window up to the newest aligned end, even a
    # decision-maker with nothing new: when the newest end moves on, add it for all.
    fresh = _new_window_ends(con, config, last_day)
    if len(fresh):
        endset = {int(e) for e in fresh}
        for dm, team in teams_of.items():
            wanted["decision_maker"].setdefault(dm, set()).update(endset)
            if team is not None:
                wanted["team"].setdefault(team, set()).update(endset)
        wanted["all"].setdefault(ALL_KEY, set()).update(endset)
        first = int(fresh.min()) - length + 1
        lo = first if lo is None else min(lo, first)
        hi = int(fresh.max()) if hi is None else max(hi, int(fresh.max()))
    if lo is None:
        return RefitSummary("incremental", int(n_dirty), len(dirty), 0, 0, 0.0)
    frame = _fetch_buckets(con, layout, (lo, hi))
    fitted = refitted = 0
    every = build_series(frame, layout)
    del frame
    for scope, series in every.items():
        ent, end, start, stop = plan_windows(config, series, wanted[scope], last_day)
        _delete_windows(con, scope, wanted[scope])
        fitted_n, refit_n = _fit_and_write(con, config, sig, series, ent, end, start, stop)
        fitted += fitted_n
        refitted += refit_n
    _set_fact(con, "last_refit", utc_now().isoformat())
    return RefitSummary("incremental", int(n_dirty), len(dirty), fitted, refitted, 0.0)


def _new_window_ends(con, config: Config, last_day: int) -> np.ndarray:
    """Aligned window ends after the newest stored one, up to the one covering last_day."""
    row = con.execute("SELECT (max(window_end) - DATE '1970-01-01')::BIGINT FROM fits").fetchone()
    newest = aligned_ends(config, last_day, last_day)[-1]
    if row[0] is None or row[0] >= newest:
        return np.array([], dtype=np.int64)
    ends = aligned_ends(config, int(row[0]) + 1, int(newest))
    return ends[(ends > row[0]) & (ends <= newest)]


def _last_day(con) -> int:
    row = con.execute("SELECT (max(day) - DATE '1970-01-01')::BIGINT FROM bucket_stats").fetchall()[
        0
    ]
    return int(row[0]) if row[0] is not None else 0


def _fetch_buckets(
    con, layout: MomentLayout, day_range: tuple[int, int] | None
) -> dict[str, np.ndarray]:
    cols = ", ".join(layout.columns())
    where = ""
    params: list = []
    if day_range is not None:
        where = "WHERE day BETWEEN ? AND ?"
        params = [from_day_number(day_range[0]), from_day_number(day_range[1])]
    res = con.execute(
        f"SELECT decision_maker, team, (day - DATE '1970-01-01')::BIGINT AS day_number, {cols} "
        f"FROM bucket_stats {where} ORDER BY decision_maker, day",
        params,
    ).fetchnumpy()
    return {
        k: (v.filled(np.nan) if hasattr(v, "filled") and v.dtype.kind == "f" else np.asarray(v))
        for k, v in res.items()
    }


def _delete_windows(con, scope: str, wanted: dict[object, set[int]]) -> None:
    if not wanted:
        return
    rows = [(str(k), from_day_number(e)) for k, ends in wanted.items() for e in ends]
    df = pd.DataFrame(rows, columns=["decision_maker", "window_end"])
    con.register("_gone", df)
    try:
        for table in ("fits", "cue_weights"):
            con.execute(
                f"DELETE FROM {table} t USING _gone g WHERE t.scope = ? "
                "AND t.decision_maker = g.decision_maker AND t.window_end = g.window_end",
                [scope],
            )
    finally:
        con.unregister("_gone")


def _raw_rows_loader(con, config: Config):
    xs = design_expressions(config)
    length = config.windows.length_days

    def load(scope: str, key: str, end_day: int):
        end = from_day_number(end_day)
        start = end - timedelta(days=length - 1)
        cond = {"decision_maker": "d.decision_maker = ?", "team": "d.team = ?", "all": "? = ?"}[
            scope
        ]
        params = [key] if scope != "all" else [ALL_KEY, ALL_KEY]
        cues_ok = " AND ".join(f"d.{quote_ident(c)} IS NOT NULL" for c in config.cues)
        sql = (
            f"SELECT {', '.join(xs)}, d.judgment, o.criterion FROM decisions d "
            "LEFT JOIN current_outcomes o USING (decision_id) "
            f"WHERE {cond} AND d.decided_day BETWEEN ? AND ? AND {cues_ok} ORDER BY d.decision_id"
        )
        arr = np.asarray(con.execute(sql, [*params, start, end]).fetchall(), dtype=float)
        k = len(xs)
        if arr.size == 0:
            arr = np.zeros((0, k + 2))
        return arr[:, :k], arr[:, k], arr[:, k + 1]

    return load


def _fit_and_write(con, config, sig, series: Series, ent, end, start, stop) -> tuple[int, int]:
    if not len(ent):
        return 0, 0
    merged = window_moments(config, series, ent, end)
    loader = _raw_rows_loader(con, config)
    fits, method = fit_series(config, series, ent, end, start, stop, loader, merged)
    length = config.windows.length_days
    all_w = merged[0]
    keys = series.keys[ent].astype(str)
    teams = series.teams[ent]
    ends = [from_day_number(e) for e in end]
    starts = [e - timedelta(days=length - 1) for e in ends]
    k = len(fits.names)
    ys_sd = np.sqrt(
        np.where(all_w.n > 1, all_w.comoment[:, k, k] / np.maximum(all_w.n - 1, 1), np.nan)
    )
    now = utc_now()
    fit_df = pd.DataFrame(
        {
            "scope": series.scope,
            "decision_maker": keys,
            "team": [t if t is not None else None for t in teams],
            "window_start": starts,
            "window_end": ends,
            "n_decisions": fits.n.astype(np.int64),
            "n_linked": fits.n_linked.astype(np.int64),
            "R_s": fits.R_s,
            "R_e": fits.R_e,
            "r_a": fits.r_a,
            "G": fits.G,
            "C": fits.C,
            "model_of_judge_r": fits.model_of_judge_r,
            "R_s_linked": fits.R_s_linked,
            "judgment_mean": all_w.mean[:, k],
            "judgment_sd": ys_sd,
            "sigma": fits.sigma,
            "df_resid": fits.df_resid.astype(float),
            "condition_number": fits.condition,
            "method": method,
            "reason": [r or None for r in fits.reason],
            "weight_cov": list(fits.cov.reshape(len(ent), -1)),
            "cue_mean": list(all_w.mean),
            "comoment": list(all_w.comoment.reshape(len(ent), -1)),
            "design_signature": sig,
            "software_version": __version__,
            "fitted_at": now,
        }
    )
    if series.scope == "team":
        fit_df["team"] = keys
    m = len(ent)
    cue_df = pd.DataFrame(
        {
            "scope": series.scope,
            "decision_maker": np.repeat(keys, k),
            "window_end": np.repeat(np.array(ends, dtype=object), k),
            "cue_index": np.tile(np.arange(k, dtype=np.int32), m),
            "cue": np.tile(np.array(fits.names, dtype=object), m),
            "weight": fits.weights.ravel(),
            "std_error": fits.std_errors.ravel(),
            "t_value": fits.t_values.ravel(),
            "p_value": fits.p_values.ravel(),
            "ci_low": fits.ci_low.ravel(),
            "ci_high": fits.ci_high.ravel(),
            "std_weight": fits.std_weights.ravel(),
            "utilization_r": fits.utilization_r.ravel(),
            "validity_r": fits.validity_r.ravel(),
            "env_weight": fits.env_weights.ravel(),
            "estimable": fits.estimable.ravel(),
            "reason": [r or None for r in fits.cue_reason.ravel()],
        }
    )
    # NaN means "not estimable": store it as NULL so SQL users see missing values.
    for df in (fit_df, cue_df):
        num = df.select_dtypes(include="float").columns
        df[num] = df[num].astype(object).where(df[num].notna(), None)
    con.register("_fit_df", fit_df)
    con.register("_cue_df", cue_df)
    try:
        fit_cols = ", ".join(quote_ident(c) for c in fit_df.columns)
        con.execute(f"INSERT INTO fits ({fit_cols}) SELECT {fit_cols} FROM _fit_df")
        cue_cols = ", ".join(quote_ident(c) for c in cue_df.columns)
        con.execute(f"INSERT INTO cue_weights ({cue_cols}) SELECT {cue_cols} FROM _cue_df")
    finally:
        con.unregister("_fit_df")
        con.unregister("_cue_df")
    return m, int((method == "qr").sum())


# --- reading fits back ----------------------------------------------------------------

FIT_FIELDS = [
    "scope",
    "decision_maker",
    "team",
    "window_start",
    "window_end",
    "n_decisions",
    "n_linked",
    "R_s",
    "R_e",
    "r_a",
    "G",
    "C",
    "model_of_judge_r",
]
CUE_FIELDS = [
    "cue",
    "weight",
    "std_error",
    "ci_low",
    "ci_high",
    "std_weight",
    "utilization_r",
    "validity_r",
    "p_value",
    "estimable",
    "reason",
]


def read_fits(
    config: Config,
    *,
    decision_maker: str | None = None,
    latest: bool = False,
    scope: str | None = None,
) -> list[dict]:
    """Stored window fits as `fits --json` objects (DESIGN.md, Contracts)."""
    store = Store(config)
    where, params = ["TRUE"], []
    if decision_maker is not None:
        where.append("f.decision_maker = ?")
        params.append(decision_maker)
    if scope is not None:
        where.append("f.scope = ?")
        params.append(scope)
    if latest:
        where.append(
            "f.window_end = (SELECT max(window_end) FROM fits g WHERE g.scope = f.scope "
            "AND g.decision_maker = f.decision_maker)"
        )
    order = "CASE f.scope WHEN 'decision_maker' THEN 0 WHEN 'team' THEN 1 ELSE 2 END, f.decision_maker, f.window_end"
    with store.reader() as con:
        store.ensure_ready(con) if False else None
        fits = con.execute(
            f"SELECT {', '.join('f.' + quote_ident(c) for c in FIT_FIELDS)}, f.reason FROM fits f "
            f"WHERE {' AND '.join(where)} ORDER BY {order}",
            params,
        ).df()
        cues = con.execute(
            f"SELECT c.scope, c.decision_maker, c.window_end, {', '.join('c.' + quote_ident(x) for x in CUE_FIELDS)} "
            f"FROM cue_weights c JOIN fits f USING (scope, decision_maker, window_end) "
            f"WHERE {' AND '.join(where)} ORDER BY c.scope, c.decision_maker, c.window_end, c.cue_index",
            params,
        ).df()
    grouped = {k: g for k, g in cues.groupby(["scope", "decision_maker", "window_end"], sort=False)}
    out = []
    for row in fits.itertuples(index=False):
        d = dict(zip([*FIT_FIELDS, "reason"], row, strict=True))
        g = grouped.get((d["scope"], d["decision_maker"], d["window_end"]))
        d["cues"] = (
            []
            if g is None
            else [
                _clean(dict(zip(CUE_FIELDS, r, strict=True)))
                for r in g[CUE_FIELDS].itertuples(index=False)
            ]
        )
        out.append(_clean(d))
    return out


def _clean(d: dict) -> dict:
    out = {}
    for k, v in d.items():
        if isinstance(v, float) and not np.isfinite(v):
            v = None
        elif isinstance(v, np.floating):
            v = None if not np.isfinite(v) else float(v)
        elif isinstance(v, np.integer):
            v = int(v)
        elif isinstance(v, np.bool_):
            v = bool(v)
        elif isinstance(v, pd.Timestamp):
            v = v.date().isoformat()
        elif isinstance(v, date):
            v = v.isoformat()
        elif v is pd.NA or v is pd.NaT:
            v = None
        if k == "reason" and not v:
            v = None
        out[k] = v
    return out


__all__ = ["RefitUsageError", "read_fits", "refit", "sql_literal"]
