"""The full refit's bucket statistics, summed in memory (``kernel``) from the decisions
streamed out of DuckDB as Arrow record batches, and written to the store once.

Decision-makers and teams come out of DuckDB as ENUM codes (their ids sorted as DuckDB
sorts them, so a team's code is its rank and ``max(team)`` of a bucket is the largest
code), day numbers as integers (mapped to their stretch's first day here), the design columns and the judgment as DOUBLE and the
current outcome's criterion as DOUBLE with NaN for none.  The windows are then computed
from the in-memory buckets (no read back).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from monitor.config import Config
from monitor.refit.buckets import StatLayout, design_expressions
from monitor.refit.fits_write import insert_arrow
from monitor.refit.kernel import BucketAccumulator
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
    teams = [r[0] for r in con.execute(
        "SELECT DISTINCT team FROM decisions WHERE team IS NOT NULL ORDER BY 1").fetchall()]  # fmt: skip
    lo, hi, n_rows = con.execute(
        "SELECT (min(decided_day) - DATE '1970-01-01')::BIGINT, "
        "(max(decided_day) - DATE '1970-01-01')::BIGINT, count(*) FROM decisions"
    ).fetchall()[0]
    if not makers or lo is None:
        return None
    crit_ref = con.execute("SELECT coalesce(median(criterion), 0) FROM outcomes").fetchall()[0][0]
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
        f"FROM decisions d LEFT JOIN ({current_outcome_sql()}) o USING (decision_id) "
        f"WHERE {present}"
    )
    # Each day number -> its stretch's first day (``stretches``), looked up per batch.
    bucket_of = Stretches.of(config).start(np.arange(int(lo), int(hi) + 1)).astype(np.int32)
    first = int(bucket_of[0])
    acc = BucketAccumulator(len(makers), p, first, int(hi), float(crit_ref), int(n_rows))
    reader = con.sql(sql).to_arrow_reader(BATCH_ROWS)
    try:
        for batch in reader:
            if not batch.num_rows:
                continue
            cols = tuple(_readonly(batch.column(3 + i)) for i in range(p - 1))
            acc.add(
                _codes(batch.column(0)),
                bucket_of[batch.column(1).to_numpy() - int(lo)],
                _codes(batch.column(2)),
                cols,
                _readonly(batch.column(2 + p)),
            )
    finally:
        reader.close()  # a result left open would block the rollback after an error
    res = acc.result()
    keep = res.has_shift
    if not keep.any():
        return None
    number = np.cumsum(keep) - 1
    ent = number[res.ent]
    nb = len(ent)
    # Two stored rows per bucket, side by side in memory: (nb, 2w) viewed as (2nb, w).
    sums = res.sums.reshape(2 * nb, layout.set_width)
    ent2, day2 = np.repeat(ent, 2), np.repeat(res.day, 2)
    linked2 = np.tile(np.array([False, True]), nb)
    code2 = res.team.reshape(-1)
    row_team = np.append(np.array(teams, dtype=object), None)[code2]
    keys = np.array(makers, dtype=object)[keep]
    return Buckets(
        keys,
        res.shift[keep],
        latest_teams(len(keys), ent2, day2, row_team, code2),
        ent2,
        day2,
        linked2,
        row_team,
        sums,
    )


def write_buckets(con, layout: StatLayout, buckets: Buckets) -> int:
    """Write ``bucket_shifts`` and ``bucket_stats`` (every all-rows set; the linked sets
    that hold a row) from ``sum_buckets``'s frame, in its (day, decision-maker, set)
    order; returns the buckets written."""
    keys = pa.array(list(buckets.keys), pa.string())
    shifts = pa.FixedSizeListArray.from_arrays(
        pa.array(np.ascontiguousarray(buckets.shift).ravel()), layout.p_linked
    )
    insert_arrow(con, "bucket_shifts", pa.table({"decision_maker": keys, "shift": shifts}))
    # The rows are in (day, decision-maker, set) order already (``kernel``); the arrays
    # go to DuckDB without a copy, and the linked sets without a row are left out there.
    data = pa.table(
        {
            "decision_maker": pa.DictionaryArray.from_arrays(
                pa.array(buckets.ent.astype(np.int32)), keys
            ),
            "day": pa.array(buckets.day.astype(np.int32)).cast(pa.date32()),
            "linked_only": pa.array(buckets.linked),
            "team": pa.array(list(buckets.row_team), pa.string()),
            "sums": pa.FixedSizeListArray.from_arrays(
                pa.array(buckets.sums.reshape(-1)), layout.set_width
            ),
        }
    )
    insert_arrow(con, "bucket_stats", data, where="NOT linked_only OR sums[1] > 0")
    return int((~buckets.linked).sum())
