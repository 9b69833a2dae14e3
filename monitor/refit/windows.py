"""Bucket statistics and the rolling-window refresh (`cuewatch refit`).

Per (decision-maker, stretch of days) the store keeps the sufficient statistics of
those judgments (``bucket_stats``, shifted sums; see ``buckets``; a stretch lies between
two window boundaries, ``stretches``).  A decision-maker's window is the sum of the
buckets inside it; team and all windows pool the decision-makers'
windows.  A refresh adds to the stored buckets what the batches since the last refit
changed - new decisions, new outcomes (``buckets.delta_sql``) - sums again the buckets
something left (decision corrections and retractions, outcome corrections:
``buckets.recompute_sql``) and refits only the windows covering the changed buckets.  Its cost follows the
size of the news and of the windows it touches, not the length of history.

Windows are ``length_days`` long and end every ``step_days`` days on dates aligned
to ``windows.origin``; a window ending on E covers the days E-length+1 .. E.  The
newest window ends on the first aligned date on or after the newest decision, so it
includes the latest data (it is "still open" until that date passes).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import threading
import time
from dataclasses import dataclass
from datetime import timedelta

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from monitor.config import Config
from monitor.refit.buckets import (
    StatLayout,
    array_rows,
    delta_sql,
    design_expressions,
    new_shift_sql,
    recompute_sql,
    stored_shifts,
)
from monitor.refit.fits_write import delete_windows, fit_tables, insert_arrow, insert_bucket_rows
from monitor.refit.plan import (
    ALL_KEY,
    Buckets,
    ScopeWindows,
    aligned_ends,
    covering_ends,
    decision_maker_windows,
    latest_teams,
    pooled_windows,
)
from monitor.refit.stretches import STRETCHES_FACT, Stretches, from_day_number
from monitor.stats.lens import LensFits, fit_lens_or_rows
from monitor.store.connection import Store, get_fact, set_fact
from monitor.store.rules import quote_ident, utc_now
from monitor.store.schema import drop_temp_tables, replace_bucket_tables, stage_temp_table

SCOPES = ("decision_maker", "team", "all")
BUCKET_LAYOUT = "shifted-array-4-stretches"
# DuckDB memory bound once the bucket SQL is done (it spills beyond it, never fails).
AFTER_SQL_MEMORY_LIMIT = "256MB"
# store_facts key: every batch up to this id is in the stored bucket statistics.
THROUGH_BATCH = "buckets_through_batch"


def design_signature(config: Config) -> str:
    """Identifies the design (cue columns and their coding); stored statistics made
    under another design are rebuilt."""
    doc = {
        name: {"type": c.type, "levels": c.levels, "reference": c.reference, "values": c.values}
        for name, c in config.cues.items()
    }
    doc["__columns__"] = config.design_columns()
    # The bucket_stats layout (StatLayout): a store written with another layout is
    # rebuilt by a full refit instead of failing on a missing column.
    doc["__bucket_layout__"] = BUCKET_LAYOUT
    # Buckets are summed over stretches between window boundaries: other windows, other
    # stretches (``refit.stretches``).
    w = config.windows
    doc["__stretches__"] = [w.length_days, w.step_days, w.origin]
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:16]


def _layout(config: Config) -> StatLayout:
    return StatLayout(len(config.design_columns()))


# --- bucket statistics in memory and in the store ---------------------------------------


# Decision-makers numbered in id order: bucket rows are fetched with this number instead
# of the id string (hundreds of thousands of strings cost more than the numbers).
_NUMBERED = (
    "(SELECT decision_maker, (row_number() OVER (ORDER BY decision_maker) - 1)::INTEGER "
    "AS ent FROM bucket_shifts)"
)


def _strings(arrow_column) -> tuple[np.ndarray, np.ndarray]:
    """A fetched string column as (object array with None for NULL, integer codes in
    the values' sorted order with -1 for NULL), decoded once per distinct value."""
    coded = pc.dictionary_encode(arrow_column).combine_chunks()
    names = np.array(coded.dictionary.to_pylist(), dtype=object)
    rank = np.empty(len(names), dtype=np.int64)
    rank[np.argsort(names.astype(str), kind="stable")] = np.arange(len(names))
    index = coded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    text = np.append(names, None)[index]  # -1 picks the trailing None
    rank = np.append(rank, -1)  # index -1 (NULL) ranks -1
    return text, rank[index]


def _fetch_rows(con, layout: StatLayout, sql: str) -> dict[str, np.ndarray]:
    """Run a query returning (decision_maker, day, linked_only, team, sums) and fetch it with
    decision-makers as numbers (``_NUMBERED``)."""
    table = con.sql(
        "SELECT k.ent, (b.day - DATE '1970-01-01')::INTEGER AS day, b.linked_only, b.team, b.sums "
        f"FROM ({sql}) b JOIN {_NUMBERED} k USING (decision_maker)"
    ).to_arrow_table()
    return {
        "ent": table.column(0).to_numpy().astype(np.int64),
        "day": table.column(1).to_numpy().astype(np.int64),
        "linked": table.column(2).to_numpy(zero_copy_only=False).astype(bool),
        **dict(zip(("team", "team_code"), _strings(table.column(3)), strict=True)),
        "sums": array_rows(table.column(4), layout.set_width),
    }


def _fetch_buckets(con, layout: StatLayout, day_range: tuple[int, int] | None) -> Buckets:
    """The stored bucket rows (of the days in ``day_range``, or all) with every
    decision-maker's id and shift."""
    where = ""
    if day_range is not None:
        lo, hi = (from_day_number(d).isoformat() for d in day_range)
        where = f"WHERE day BETWEEN DATE '{lo}' AND DATE '{hi}'"
    rows = _fetch_rows(con, layout, f"SELECT * FROM bucket_stats {where}")
    keys, shift = stored_shifts(con, layout.p_linked)
    teams = latest_teams(len(keys), rows["ent"], rows["day"], rows["team"], rows["team_code"])
    return Buckets(
        keys,
        shift,
        teams,
        rows["ent"],
        rows["day"],
        rows["linked"],
        rows["team"],
        rows["sums"],
    )


# --- fitting ------------------------------------------------------------------------


def fit_windows(
    config: Config, windows: ScopeWindows, raw_rows=None
) -> tuple[LensFits, np.ndarray]:
    """Fit every window of one scope; returns the fits and a method label per window
    ("moments" or "qr": refit from the window's raw rows when conditioning is poor)."""
    names = config.design_columns()
    min_rows = config.windows.min_rows
    rows_of = None
    if raw_rows is not None:

        def rows_of(i: int):
            return raw_rows(windows.scope, windows.keys[i], int(windows.end[i]))

    fits, redone = fit_lens_or_rows(
        windows.all_rows,
        windows.linked,
        names,
        min_rows=min_rows,
        rows_of=rows_of,
        lost_precision=windows.lost,
    )
    method = np.array(["moments"] * fits.size, dtype=object)
    method[redone] = "qr"
    return fits, method


def _fit_and_write(con, config: Config, sig: str, windows: ScopeWindows) -> tuple[int, int]:
    if not len(windows.end):
        return 0, 0
    # Stored in window-end order: a nightly refit replaces recent windows, and DuckDB's
    # checkpoint then rewrites only the last row groups instead of every one.
    windows = windows.take(np.argsort(windows.end, kind="stable"))
    fits, method = fit_windows(config, windows, _raw_rows_loader(con, config))
    keys = windows.keys.astype(str)
    fit_rows, cue_rows = fit_tables(
        windows.scope,
        keys,
        windows.teams,
        windows.end,
        config.windows.length_days,
        fits,
        method,
        windows.all_rows,
        sig,
    )
    insert_arrow(con, "fits", fit_rows)
    insert_arrow(con, "cue_weights", cue_rows)
    return len(windows.end), int((method == "qr").sum())


def _all_windows(config: Config, buckets: Buckets, ends: np.ndarray) -> dict[str, ScopeWindows]:
    """Every non-empty window ending on ``ends`` of every decision-maker in ``buckets``,
    and the team and all windows pooled from them."""
    length = config.windows.length_days
    ent = np.repeat(np.arange(len(buckets.keys)), len(ends))
    end = np.tile(ends, len(buckets.keys))
    per_dm = decision_maker_windows(buckets, _layout(config), ent, end, length)
    return {
        "decision_maker": per_dm,
        "team": pooled_windows(per_dm, "team"),
        "all": pooled_windows(per_dm, "all"),
    }


def _pairs(names: np.ndarray, label: np.ndarray, ends: np.ndarray, every, fresh: np.ndarray):
    """Unique (key, end) pairs of one scope: ``names[label]`` at ``ends`` (negative
    labels dropped), plus every label in ``every`` at each ``fresh`` end."""
    every = np.asarray(every, dtype=np.int64)
    label = np.concatenate([np.asarray(label, dtype=np.int64), np.repeat(every, len(fresh))])
    ends = np.concatenate([ends, np.tile(fresh, len(every))]).astype(np.int64)
    ok = label >= 0
    codes = np.unique(label[ok] * (1 << 32) + ends[ok])
    return names[codes >> 32].astype(object), codes & ((1 << 32) - 1)


def _wanted(windows: ScopeWindows, keys: np.ndarray, ends: np.ndarray) -> ScopeWindows:
    """The computed windows that are among the wanted (key, end) pairs."""
    if not len(keys) or not len(windows.end):
        return windows.take(np.array([], dtype=np.int64))
    names, ix = np.unique(np.concatenate([keys, windows.keys]).astype(str), return_inverse=True)
    want = ix[: len(keys)].astype(np.int64) * (1 << 32) + ends
    have = ix[len(keys) :].astype(np.int64) * (1 << 32) + windows.end
    return windows.take(np.flatnonzero(np.isin(have, want)))


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

    def describe(self) -> str:
        """One line for a person."""
        return (
            f"Refit ({self.mode}): {self.dirty_buckets} dirty bucket(s), "
            f"{self.windows_fitted} window fit(s) written "
            f"({self.windows_refit_from_rows} refitted from raw rows) in {self.seconds:.2f} s."
        )


def refit(config: Config, *, full: bool = False, lake=None) -> RefitSummary:
    """Bring bucket statistics and window fits up to date, in one transaction.

    Incremental by default: the buckets the new batches change and the windows covering
    them.  A full refit (or a changed design) recomputes everything from the stored
    rows; both give the same numbers.  With ``[lake]`` the buckets are summed on Spark
    (``lake``: a ``monitor.lake.source.LakeSource``, made here when not given).
    """
    if lake is None and config.lake is not None:
        from monitor.lake.source import LakeSource  # pyspark: the lake path only

        lake = LakeSource(config)
    t0 = time.perf_counter()
    store = Store(config)
    with store.writer() as con:
        store.ensure_ready(con)
        sig = design_signature(config)
        con.execute("BEGIN")
        try:
            through = get_fact(con, THROUGH_BATCH)
            full = full or get_fact(con, "design_signature") != sig or through is None
            if lake is not None:
                full = lake.prepare(con, full)  # Spark runs here, inside the transaction
            if full:
                summary = _refit_full(con, config, sig, lake)
            else:
                summary = _refit_incremental(con, config, sig, int(through), lake)
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
        finally:
            # The instance may be shared by other connections of this process.
            con.execute("RESET memory_limit")
    summary.seconds = round(time.perf_counter() - t0, 3)
    return summary


def _newest_batch(con) -> int:
    row = con.execute(
        "SELECT greatest(coalesce((SELECT max(batch_id) FROM decisions), 0), "
        "coalesce((SELECT max(batch_id) FROM outcomes), 0), "
        "coalesce((SELECT max(superseded_batch) FROM superseded_decisions), 0))"
    ).fetchall()[0]
    return int(row[0])


def _count_dirty(con) -> int:
    return int(
        con.execute(
            "SELECT count(*) FROM (SELECT DISTINCT decision_maker, day FROM dirty_buckets)"
        ).fetchall()[0][0]
    )


def _refit_full(con, config: Config, sig: str, lake=None) -> RefitSummary:
    """Every bucket summed in memory from the stored rows (``full.sum_buckets``), written
    once, and every window computed from the buckets in memory."""
    from monitor.refit.full import sum_buckets, write_buckets  # numba: the full refit only

    layout = _layout(config)
    newest_batch = _newest_batch(con)
    n_dirty = _count_dirty(con)
    replace_bucket_tables(con, layout.p_linked, layout.set_width)
    con.execute("DELETE FROM dirty_buckets")
    con.execute("DELETE FROM fits")
    con.execute("DELETE FROM cue_weights")
    buckets = sum_buckets(con, config, layout) if lake is None else lake.buckets(layout)
    fitted = refitted = n_buckets = 0
    if buckets is not None:
        _release_cache(con)  # before the write: peak RSS 1.48 -> 1.29 GB at 5M rows
        ends = aligned_ends(config, int(buckets.day.min()), int(buckets.day.max()))
        # DuckDB writes the buckets (without the GIL) while the windows are summed (a
        # compiled kernel, without the GIL): the connection is the writer's alone until
        # it is joined.
        written = _in_background(write_buckets, con, layout, buckets)
        try:
            scopes = _all_windows(config, buckets, ends)
        except BaseException:
            with contextlib.suppress(BaseException):
                written()  # the connection is free again before the rollback
            raise
        n_buckets = written()
        for windows in scopes.values():
            fitted_n, refit_n = _fit_and_write(con, config, sig, windows)
            fitted += fitted_n
            refitted += refit_n
    set_fact(con, "design_signature", sig)
    set_fact(con, STRETCHES_FACT, Stretches.of(config).to_json())
    set_fact(con, THROUGH_BATCH, str(newest_batch))
    set_fact(con, "last_refit", utc_now().isoformat())
    return RefitSummary("full", n_dirty, n_buckets, fitted, refitted, 0.0)


def _in_background(func, *args):
    """Start ``func(*args)`` on a thread; returns a function that waits for it and
    returns its result or raises its exception."""
    box: dict = {}

    def run() -> None:
        try:
            box["result"] = func(*args)
        except BaseException as exc:  # re-raised in the caller's thread
            box["error"] = exc

    worker = threading.Thread(target=run, name="bucket-writer", daemon=True)
    worker.start()

    def wait():
        worker.join()
        if "error" in box:
            raise box["error"]
        return box["result"]

    return wait


# The temporary table of the buckets summed again from their rows in one refresh.
_RESUM = "_resum_buckets"


def _fetch_delta(
    con, config: Config, layout: StatLayout, through: int
) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
    """Sum again from their rows the buckets the news take something out of
    (``recompute_sql``), replacing their stored rows; then fetch what the news add to
    the other buckets.  Returns the delta rows and the (decision-maker number, day) of
    the buckets summed again."""
    row = con.execute("SELECT min(day), max(day) FROM dirty_buckets").fetchall()[0]
    day_range = None if row[0] is None else (row[0], row[1])
    stage_temp_table(con, _RESUM, recompute_sql(config, through, day_range))
    try:
        # Most nights nothing leaves a bucket (no corrections): then the re-sum, which
        # scans the decisions and outcomes to find no row (0.4 s at 5M rows), is skipped.
        if con.execute(f"SELECT count(*) FROM {_RESUM}").fetchall()[0][0]:
            # The compiled kernel of the full refit, around the stored references (numba
            # is imported on such nights only): 1M rows in DuckDB's SQL took 0.64 s.
            from monitor.refit.full import resum_buckets

            resum_buckets(con, config, layout, _RESUM)
        again = con.execute(
            f"SELECT k.ent, (r.day - DATE '1970-01-01')::BIGINT FROM {_RESUM} r "
            f"JOIN {_NUMBERED} k USING (decision_maker)"
        ).fetchnumpy()
        delta = _fetch_rows(con, layout, delta_sql(config, through, day_range, _RESUM))
    finally:
        drop_temp_tables(con, _RESUM)
    ent, day = (np.asarray(v, dtype=np.int64) for v in again.values())
    return delta, ent, day


def _apply_delta(con, buckets: Buckets, delta: dict[str, np.ndarray]) -> tuple[Buckets, int]:
    """Add the delta rows to the fetched ones (new rows appended), write the changed
    rows back to the store; returns the updated frame and the number of changed
    buckets.  ``buckets`` must hold every stored row of the delta's days."""

    def code(ent, day, linked):
        return (ent * (1 << 20) + day) * 2 + linked

    have = code(buckets.ent, buckets.day, buckets.linked.astype(np.int64))
    want = code(delta["ent"], delta["day"], delta["linked"].astype(np.int64))
    order = np.argsort(have, kind="stable")
    pos = np.searchsorted(have[order], want)
    found = np.zeros(len(want), dtype=bool)
    at = np.zeros(len(want), dtype=np.int64)
    if len(have):
        pos_c = np.minimum(pos, len(have) - 1)
        found = have[order][pos_c] == want
        at = order[pos_c]
    sums, team = buckets.sums, buckets.row_team
    hit = np.flatnonzero(found)
    sums[at[hit]] += delta["sums"][hit]
    # A stored row's team is the max over its decisions: only rows whose news carry another
    # team than the stored one need a look.
    differ = hit[delta["team"][hit] != team[at[hit]]]
    for i, j in zip(at[differ], differ, strict=True):
        t = delta["team"][j]
        if t is not None and (team[i] is None or t > team[i]):
            team[i] = t
    new = np.flatnonzero(~found)
    n_old = len(buckets.day)
    ent = np.concatenate([buckets.ent, delta["ent"][new]])
    day = np.concatenate([buckets.day, delta["day"][new]])
    linked = np.concatenate([buckets.linked, delta["linked"][new]])
    team = np.concatenate([team, delta["team"][new]])
    sums = np.concatenate([sums, delta["sums"][new]]) if len(new) else sums
    changed = np.concatenate([at[hit], n_old + np.arange(len(new))])
    gone = pa.table(
        {
            "decision_maker": pa.array(list(buckets.keys[ent[changed]]), pa.string()),
            "day": pa.array(day[changed].astype(np.int32), pa.int32()).cast(pa.date32()),
            "linked_only": pa.array(linked[changed]),
        }
    )
    con.register("_changed_rows", gone)
    try:
        con.execute(
            "DELETE FROM bucket_stats b USING _changed_rows c WHERE b.decision_maker = "
            "c.decision_maker AND b.day = c.day AND b.linked_only = c.linked_only"
        )
    finally:
        con.unregister("_changed_rows")
    insert_bucket_rows(
        con, buckets.keys, ent[changed], day[changed], linked[changed], team[changed], sums[changed]
    )
    codes = _strings(pa.chunked_array([pa.array(list(team), pa.string())]))[1]
    teams = latest_teams(len(buckets.keys), ent, day, team, codes)
    frame = Buckets(buckets.keys, buckets.shift, teams, ent, day, linked, team, sums)
    n_buckets = len(np.unique(ent[changed] * (1 << 32) + day[changed]))
    return frame, n_buckets


def _refit_incremental(con, config: Config, sig: str, through: int, lake=None) -> RefitSummary:
    layout = _layout(config)
    newest_batch = _newest_batch(con)
    n_dirty = _count_dirty(con)
    if newest_batch <= through and not n_dirty:
        return RefitSummary("nothing to do", 0, 0, 0, 0, 0.0)
    if lake is None:
        con.execute(new_shift_sql(config, through))
        delta, again_ent, again_day = _fetch_delta(con, config, layout, through)
    else:
        delta, again_ent, again_day = lake.resummed(con, layout, _NUMBERED)
    # Every touched bucket: the delta's and those summed again.
    day = np.concatenate([delta["day"], again_day])
    touched_ent = np.concatenate([delta["ent"], again_ent])
    length = config.windows.length_days
    last_day = _last_day(con, day)
    newest = int(aligned_ends(config, last_day, last_day)[-1])
    # Which window ends each scope needs: those covering a changed bucket, and, when
    # the newest aligned end moved on, that end for every series.
    rows, ends = covering_ends(config, day, newest)
    fresh = _new_window_ends(con, config, last_day)
    union = np.union1d(ends, fresh).astype(np.int64)
    con.execute("DELETE FROM dirty_buckets")
    set_fact(con, THROUGH_BATCH, str(newest_batch))
    if not len(union) and not len(day):
        return RefitSummary("incremental", n_dirty, 0, 0, 0, 0.0)
    span = np.concatenate([day, union - length + 1, union])
    buckets = _fetch_buckets(con, layout, (int(span.min()), int(span.max())))
    buckets, changed = _apply_delta(con, buckets, delta)
    _release_cache(con)
    computed = _all_windows(config, buckets, union)
    # The windows to refit per scope: the covering ends of each changed bucket in its
    # decision-maker's, their team's and the all series; a fresh end in every series.
    team_names, team_ix = np.unique(
        np.array(["" if t is None else t for t in buckets.team], dtype=object).astype(str),
        return_inverse=True,
    )
    no_team = np.array([t is None for t in buckets.team], dtype=bool)
    team_ix = np.where(no_team, -1, team_ix)
    d_ent = touched_ent[rows]
    every_dm = np.arange(len(buckets.keys))
    every_team = np.unique(team_ix[team_ix >= 0])
    wanted = {
        "decision_maker": _pairs(buckets.keys, d_ent, ends, every_dm, fresh),
        "team": _pairs(team_names.astype(object), team_ix[d_ent], ends, every_team, fresh),
        "all": _pairs(
            np.array([ALL_KEY], dtype=object), np.zeros(len(ends), np.int64), ends, [0], fresh
        ),
    }
    fitted = refitted = 0
    for scope in SCOPES:
        keys, wend = wanted[scope]
        delete_windows(con, scope, keys, wend)
        fitted_n, refit_n = _fit_and_write(con, config, sig, _wanted(computed[scope], keys, wend))
        fitted += fitted_n
        refitted += refit_n
    set_fact(con, "last_refit", utc_now().isoformat())
    changed += len(np.unique(again_ent * (1 << 32) + again_day))
    return RefitSummary("incremental", n_dirty, changed, fitted, refitted, 0.0)


def _new_window_ends(con, config: Config, last_day: int) -> np.ndarray:
    """Aligned window ends after the newest stored one, up to the one covering last_day."""
    row = con.execute("SELECT (max(window_end) - DATE '1970-01-01')::BIGINT FROM fits").fetchall()[
        0
    ]
    newest = aligned_ends(config, last_day, last_day)[-1]
    if row[0] is None or row[0] >= newest:
        return np.array([], dtype=np.int64)
    ends = aligned_ends(config, int(row[0]) + 1, int(newest))
    return ends[(ends > row[0]) & (ends <= newest)]


def _release_cache(con) -> None:
    """Make DuckDB drop the blocks it cached for the bucket SQL before the numpy stacks
    grow: measured 1.5 GB RSS right after that SQL at 5M decisions, most of it cache."""
    con.execute(f"SET memory_limit = '{AFTER_SQL_MEMORY_LIMIT}'")


def _last_day(con, new_days: np.ndarray) -> int:
    """The newest bucket day, stored or about to be."""
    row = con.execute("SELECT (max(day) - DATE '1970-01-01')::BIGINT FROM bucket_stats").fetchall()[
        0
    ]
    stored = int(row[0]) if row[0] is not None else 0
    return max(stored, int(new_days.max())) if len(new_days) else stored


def _raw_rows_loader(con, config: Config):
    if config.lake is not None:  # the rows are in the lake
        from monitor.lake.source import lake_rows_loader

        return lake_rows_loader(con, config)
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
