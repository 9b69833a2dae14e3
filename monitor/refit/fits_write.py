"""Window fits as rows of the store's ``fits`` and ``cue_weights`` tables, and bucket
statistics as rows of ``bucket_stats`` / ``bucket_shifts`` (every writer of them: the
full refit, the nightly's delta and re-sum, the lake path).

The rows are built as Arrow tables straight from the numpy stacks and inserted with
one ``INSERT ... SELECT`` each: building them from Python lists of arrays and pandas
object columns was the slowest step of a refit.
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pyarrow as pa

from monitor import __version__
from monitor.stats.lens import CUE_FIGURES, LENS_FIGURES, LensFits
from monitor.stats.moments import Moments
from monitor.store.rules import quote_ident, utc_now

EPOCH = date(1970, 1, 1)


def _nullable(values: np.ndarray) -> pa.Array:
    """A float column with NaN ("not estimable") stored as NULL for SQL users."""
    values = np.asarray(values, dtype=float)
    return pa.array(values, mask=np.isnan(values))


def _list_column(rows: np.ndarray) -> pa.Array:
    """(m, w) float rows as a list column, zero copy from the flattened array."""
    m, w = rows.shape
    offsets = pa.array(np.arange(m + 1, dtype=np.int32) * w)
    return pa.ListArray.from_arrays(offsets, pa.array(np.ascontiguousarray(rows).ravel()))


def insert_arrow(con, table: str, data: pa.Table, where: str = "TRUE") -> None:
    """Append the rows of ``data`` matching ``where`` to ``table`` (columns matched by
    name)."""
    name = f"_new_{table}"
    con.register(name, data)
    try:
        cols = ", ".join(quote_ident(c) for c in data.column_names)
        con.execute(f"INSERT INTO {table} ({cols}) SELECT {cols} FROM {name} WHERE {where}")
    finally:
        con.unregister(name)


def insert_bucket_rows(con, keys: np.ndarray, ent, day, linked, team, sums) -> None:
    """Append bucket rows to ``bucket_stats``: row i is decision-maker ``keys[ent[i]]``'s
    set ``linked[i]`` (the outcome-linked rows, or all rows) of the bucket starting on day
    number ``day[i]``, with ``team[i]`` and the (m, set_width) ``sums``.  A linked set
    that holds no row is left out.  The sums go to DuckDB without a copy when they are
    contiguous float64."""
    names = pa.array([str(k) for k in keys], pa.string())
    data = pa.table(
        {
            "decision_maker": pa.DictionaryArray.from_arrays(
                pa.array(np.asarray(ent, dtype=np.int32)), names
            ),
            "day": pa.array(np.asarray(day, dtype=np.int32)).cast(pa.date32()),
            "linked_only": pa.array(np.asarray(linked, dtype=bool)),
            "team": pa.array(list(team), pa.string()),
            "sums": pa.FixedSizeListArray.from_arrays(
                pa.array(np.ascontiguousarray(sums, dtype=float).ravel()), sums.shape[1]
            ),
        }
    )
    insert_arrow(con, "bucket_stats", data, where="NOT linked_only OR sums[1] > 0")


def insert_bucket_shifts(con, keys, shift: np.ndarray) -> None:
    """Append decision-makers' references (``keys``, (e, p_linked) ``shift``) to
    ``bucket_shifts``."""
    shift = np.ascontiguousarray(shift, dtype=float)
    data = pa.table(
        {
            "decision_maker": pa.array([str(k) for k in keys], pa.string()),
            "shift": pa.FixedSizeListArray.from_arrays(pa.array(shift.ravel()), shift.shape[1]),
        }
    )
    insert_arrow(con, "bucket_shifts", data)


def delete_buckets(con, listed: str) -> None:
    """Delete both sets of every bucket (decision_maker, day) that the table or
    registered relation ``listed`` names."""
    con.execute(
        f"DELETE FROM bucket_stats b USING {listed} r "
        "WHERE b.decision_maker = r.decision_maker AND b.day = r.day"
    )


def fit_tables(
    scope: str,
    keys: np.ndarray,
    teams: np.ndarray,
    end: np.ndarray,
    length: int,
    fits: LensFits,
    method: np.ndarray,
    all_w: Moments,
    sig: str,
) -> tuple[pa.Table, pa.Table]:
    """(fits rows, cue_weights rows) for ``m`` windows of one scope.

    keys, teams: (m,) the series key and team per window; end: (m,) window end day
    numbers (days since 1970-01-01); all_w: the windows' all-rows statistics (for the
    judgment mean and sd and the stored co-moments).  NaN figures become NULL; NaN
    inside the array columns stays NaN.
    """
    k = len(fits.names)
    ys_sd = np.sqrt(
        np.where(all_w.n > 1, all_w.comoment[:, k, k] / np.maximum(all_w.n - 1, 1), np.nan)
    )
    now = utc_now()
    m = len(end)
    fit_cols = {
        "scope": pa.array([scope] * m, pa.string()),
        "decision_maker": pa.array(keys, pa.string()),
        "team": pa.array(list(teams), pa.string()),
        "window_start": pa.array(end - (length - 1), pa.int32()).cast(pa.date32()),
        "window_end": pa.array(end, pa.int32()).cast(pa.date32()),
        "n_decisions": pa.array(fits.n.astype(np.int64)),
        "n_linked": pa.array(fits.n_linked.astype(np.int64)),
        **{f: _nullable(getattr(fits, f)) for f in LENS_FIGURES},
        "R_s_linked": _nullable(fits.R_s_linked),
        "judgment_mean": _nullable(all_w.mean[:, k]),
        "judgment_sd": _nullable(ys_sd),
        "sigma": _nullable(fits.sigma),
        "df_resid": _nullable(fits.df_resid.astype(float)),
        "condition_number": _nullable(fits.condition),
        "method": pa.array(method.astype(str), pa.string()),
        "reason": pa.array([r or None for r in fits.reason], pa.string()),
        # Array columns from flattened numpy (NaN kept inside, as before): building
        # them from Python lists of arrays was the slowest step of the write.
        "weight_cov": _list_column(fits.cov.reshape(m, -1)),
        "cue_mean": _list_column(all_w.mean),
        "comoment": _list_column(all_w.comoment.reshape(m, -1)),
        "design_signature": pa.array([sig] * m, pa.string()),
        "software_version": pa.array([__version__] * m, pa.string()),
        "fitted_at": pa.array([now] * m, pa.timestamp("us", tz="UTC")),
    }
    window_end = pa.array(np.repeat(end, k), pa.int32()).cast(pa.date32())
    cue_cols = {
        "scope": pa.array([scope] * (m * k), pa.string()),
        "decision_maker": pa.array(np.repeat(keys, k), pa.string()),
        "window_end": window_end,
        "cue_index": pa.array(np.tile(np.arange(k, dtype=np.int32), m)),
        "cue": pa.array(np.tile(np.array(fits.names, dtype=object), m), pa.string()),
        **{
            col: _nullable(getattr(fits, field).ravel())
            for col, field in CUE_FIGURES.items()
            if col != "estimable"
        },
        "estimable": pa.array(fits.estimable.ravel().astype(bool)),
        "reason": pa.array([r or None for r in fits.cue_reason.ravel()], pa.string()),
    }
    return pa.table(fit_cols), pa.table(cue_cols)


def delete_windows(con, scope: str, keys: np.ndarray, ends: np.ndarray) -> None:
    """Remove the stored fits and cue weights of the windows (key, end day number) of one
    scope (one set-based DELETE per table)."""
    if not len(keys):
        return
    gone = pa.table(
        {
            "decision_maker": pa.array([str(k) for k in keys], pa.string()),
            "window_end": pa.array(np.asarray(ends, dtype=np.int32), pa.int32()).cast(pa.date32()),
        }
    )
    con.register("_gone", gone)
    try:
        for table in ("fits", "cue_weights"):
            con.execute(
                f"DELETE FROM {table} t USING _gone g WHERE t.scope = ? "
                "AND t.decision_maker = g.decision_maker AND t.window_end = g.window_end",
                [scope],
            )
    finally:
        con.unregister("_gone")
