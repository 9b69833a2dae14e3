"""The full refit's bucket statistics, summed in memory (``kernel``) from the decisions
streamed out of DuckDB as Arrow record batches, and written to the store once.

Decision-makers and teams come out of DuckDB as ENUM codes (their ids sorted as DuckDB
sorts them, so a team's code is its rank and ``max(team)`` of a bucket is the largest
code), day numbers as integers (mapped to their stretch's first day here), the design
columns and the judgment as DOUBLE and the current outcome's criterion as DOUBLE with NaN
for none.  The windows are then computed from the in-memory buckets (no read back).
``resum_buckets`` streams the rows of chosen buckets through the same kernel for a
nightly refit.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from monitor.config import Config
from monitor.refit.buckets import StatLayout, design_expressions, stored_shifts
from monitor.refit.fits_write import delete_buckets, insert_bucket_rows, insert_bucket_shifts
from monitor.refit.kernel import BucketAccumulator, BucketSums
from monitor.refit.plan import Buckets, latest_teams
from monitor.refit.stretches import Stretches
from monitor.store.rules import current_outcome_sql
from monitor.store.rules import quote_ident as qi
from monitor.store.rules import sql_literal as lit

# Rows per record batch: a few tens of MB of columns at a time.
BATCH_ROWS = 1 << 19


def _enum(values: list[str]) -> str:
    return "ENUM(" + ", ".join(lit(v) for v in values) + ")"


def _codes(column: pa.Array) -> np.ndarray:
    """An ENUM column without NULL (an Arrow dictionary) as its indices, zero copy."""
    return column.indices.to_numpy()


def _readonly(column: pa.Array) -> np.ndarray:
    """A DOUBLE column as a read-only float64 array (zero copy when it has no NULL).
    All read-only, so the kernel sees one array type (one compiled signature)."""
    out = column.to_numpy(zero_copy_only=False).view()
    out.flags.writeable = False
    return out


def sum_buckets(con, config: Config, layout: StatLayout) -> Buckets | None:
    """Every bucket of every stored decision with all its cues (None when there is
    none), summed around references the kernel picks; the decision-makers numbered in
    id order."""
    makers = [r[0] for r in con.execute(
        "SELECT DISTINCT decision_maker FROM decisions ORDER BY 1").fetchall()]  # fmt: skip
    lo, hi, n_rows = con.execute(
        "SELECT (min(decided_day) - DATE '1970-01-01')::BIGINT, "
        "(max(decided_day) - DATE '1970-01-01')::BIGINT, count(*) FROM decisions"
    ).fetchall()[0]
    if not makers or lo is None:
        return None
    crit_ref = con.execute("SELECT coalesce(median(criterion), 0) FROM outcomes").fetchall()[0][0]
    res, teams = _stream_sums(
        con, config, layout, makers, "decisions", None, (int(lo), int(hi)), int(n_rows), crit_ref
    )
    keep = res.has_shift
    if not keep.any():
        return None
    number = np.cumsum(keep) - 1
    return _frame(layout, np.array(makers, dtype=object)[keep], res.shift[keep],
                  number[res.ent], res, teams)  # fmt: skip


def _frame(layout: StatLayout, keys, shift, ent, res: BucketSums, teams: list) -> Buckets:
    """The kernel's buckets as the in-memory frame: two rows per bucket (all rows, then
    the linked rows), side by side in memory: (nb, 2w) viewed as (2nb, w)."""
    nb = len(ent)
    sums = res.sums.reshape(2 * nb, layout.set_width)
    ent2, day2 = np.repeat(ent, 2), np.repeat(res.day, 2)
    linked2 = np.tile(np.array([False, True]), nb)
    code2 = res.team.reshape(-1)
    row_team = np.append(np.array(teams, dtype=object), None)[code2]
    return Buckets(
        keys,
        shift,
        latest_teams(len(keys), ent2, day2, row_team, code2),
        ent2,
        day2,
        linked2,
        row_team,
        sums,
    )


def _stream_sums(
    con,
    config: Config,
    layout: StatLayout,
    makers: list[str],
    decisions: str,
    outcome_filter: str | None,
    days: tuple[int, int],
    n_rows: int,
    crit_ref: float,
    known_shift: np.ndarray | None = None,
) -> tuple[BucketSums, list[str]]:
    """Sum the buckets of the decisions in the relation ``decisions`` (rows of the
    ``decisions`` table; those with all their cues count) - their decision-makers among
    ``makers`` (numbered in that order), their days in ``days``: the rows stream out of
    DuckDB as Arrow batches into the compiled kernel.  ``outcome_filter``: a predicate
    on ``outcomes`` keeping at least those decisions' outcomes.  Returns the kernel's
    buckets and the teams their codes name."""
    lo, hi = days
    teams = [r[0] for r in con.execute(
        f"SELECT DISTINCT team FROM {decisions} WHERE team IS NOT NULL ORDER BY 1"
    ).fetchall()]  # fmt: skip
    p = layout.p_linked
    # A team's code is 1 + its rank; 0 (a name no team has) stands for none.
    none = "_" * (1 + max((len(t) for t in teams), default=0))
    team = f"coalesce(d.team, {lit(none)})::{_enum([none, *teams])}"
    present = " AND ".join(f"d.{qi(c)} IS NOT NULL" for c in config.cues) or "TRUE"
    # Every column DOUBLE (a CASE of 1.0 / 0.0 is a DECIMAL): one array type for the kernel.
    xs = ", ".join(f"CAST({e} AS DOUBLE)" for e in [*design_expressions(config), "d.judgment"])
    sql = (
        f"SELECT d.decision_maker::{_enum(makers)} AS ent, "
        "(d.decided_day - DATE '1970-01-01')::INTEGER AS day, "
        f"{team} AS team, {xs}, coalesce(o.criterion, 'NaN'::DOUBLE) AS crit "
        f"FROM {decisions} d LEFT JOIN ({current_outcome_sql(outcome_filter)}) o "
        f"USING (decision_id) WHERE {present}"
    )
    # Each day number -> its stretch's first day (``stretches``), looked up per batch.
    bucket_of = Stretches.of(config).start(np.arange(lo, hi + 1)).astype(np.int32)
    acc = BucketAccumulator(len(makers), p, int(bucket_of[0]), hi, float(crit_ref), n_rows,
                            known_shift)  # fmt: skip
    reader = con.sql(sql).to_arrow_reader(BATCH_ROWS)
    try:
        for batch in reader:
            if not batch.num_rows:
                continue
            cols = tuple(_readonly(batch.column(3 + i)) for i in range(p - 1))
            acc.add(
                _codes(batch.column(0)),
                bucket_of[batch.column(1).to_numpy() - lo],
                _codes(batch.column(2)),
                cols,
                _readonly(batch.column(2 + p)),
            )
    finally:
        reader.close()  # a result left open would block the rollback after an error
    return acc.result(), teams


def resum_buckets(con, config: Config, layout: StatLayout, only: str) -> int:
    """Sum again from their rows the buckets listed in the table ``only`` (decision_maker,
    day: a stretch's first day), around the stored references, replacing their stored
    rows (a bucket with no row left is deleted).  Returns the buckets written."""
    n, lo, hi = con.execute(
        f"SELECT count(*), (min(day) - DATE '1970-01-01')::BIGINT, "
        f"(max(day) - DATE '1970-01-01')::BIGINT FROM {only}"
    ).fetchall()[0]
    delete_buckets(con, only)
    if not n:
        return 0
    stretches = Stretches.of(config)
    hi = int(stretches.last([hi])[0])
    keys, shift = stored_shifts(con, layout.p_linked)
    makers = [str(k) for k in keys]
    span = (f"decided_day BETWEEN DATE '1970-01-01' + {int(lo)}::INTEGER "
            f"AND DATE '1970-01-01' + {int(hi)}::INTEGER")  # fmt: skip
    # The days' decisions (DuckDB skips other row groups), then those of the listed
    # buckets; the outcomes only of the days' decisions (a tighter filter repeating the
    # bucket join cost more than it saved: 0.34 against 0.27 s for 1M rows).
    chosen = (
        f"(SELECT * FROM (SELECT *, {stretches.sql('decided_day')} AS _bucket FROM decisions "
        f"WHERE {span}) b SEMI JOIN {only} r ON r.decision_maker = b.decision_maker "
        "AND r.day = b._bucket)"
    )
    days_ids = f"decision_id IN (SELECT decision_id FROM decisions WHERE {span})"
    room = len(makers) * (hi - int(lo) + 1)  # at most one bucket per maker and day
    res, teams = _stream_sums(
        con, config, layout, makers, chosen, days_ids, (int(lo), hi), room, 0.0, shift
    )
    frame = _frame(layout, keys, None, res.ent, res, teams)
    _insert(con, frame)
    return len(res.ent)


def write_buckets(con, layout: StatLayout, buckets: Buckets) -> int:
    """Write ``bucket_shifts`` and ``bucket_stats`` (every all-rows set; the linked sets
    that hold a row) from ``sum_buckets``'s frame, in its (day, decision-maker, set)
    order; returns the buckets written."""
    insert_bucket_shifts(con, buckets.keys, buckets.shift)
    _insert(con, buckets)
    return int((~buckets.linked).sum())


def _insert(con, b: Buckets) -> None:
    # The rows are in (day, decision-maker, set) order already (``kernel``); the arrays
    # go to DuckDB without a copy.
    insert_bucket_rows(con, b.keys, b.ent, b.day, b.linked, b.row_team, b.sums)
