"""Bucket statistics in Spark: the shifted sums of ``refit.buckets.StatLayout`` per
(decision-maker, stretch of days), computed where the rows are, collected as Arrow (only the
buckets travel), and laid out as the store's ``bucket_stats`` rows.

Shifts (``bucket_shifts``): a decision-maker already in the store keeps theirs (sent to
Spark as a small broadcast table); a new one gets the medians of their rows, each cut to
20 significant bits as ``refit.buckets.shift_select`` cuts them, and for the criterion
the median of the outcomes.  Spark's medians are ``percentile_approx`` (accuracy
10,000): any reference near the data keeps the digits (``refit.buckets``), and an exact
median would hold every value of a person in memory.
"""

from __future__ import annotations

import numpy as np

from monitor.config import Config
from monitor.refit.buckets import StatLayout
from monitor.refit.stretches import Stretches

# 2^33 + 1: Veltkamp's split, as ``refit.buckets._SPLIT``.
_SPLIT = 8589934593.0
MEDIAN_ACCURACY = 10_000


def _F():
    from pyspark.sql import functions as F

    return F


def design(config: Config, accepted, names: dict[str, str]):
    """(decision_maker, bucket day, team, x0..x(k-1), judgment) of the accepted
    decisions: the bucket day is the day number of the first day of the decision's
    stretch (``refit.stretches``), categorical cues one 0/1 column per non-reference
    level, in ``config.design_columns()`` order."""
    F = _F()
    xs = []
    for name, cue in config.cues.items():
        col = F.col(names[name])
        if cue.type == "categorical":
            xs += [F.when(col == F.lit(level), 1.0).otherwise(0.0)
                   for level in cue.levels if level != cue.reference]  # fmt: skip
        else:
            xs.append(col.cast("double"))
    xs.append(F.col(names["value"]).cast("double"))
    n = F.datediff(F.to_date(F.col(names["time"])), F.lit("1970-01-01").cast("date"))
    st = Stretches.of(config)
    back = F.least(
        F.pmod(n - st.after_end, F.lit(st.step)), F.pmod(n - st.at_start, F.lit(st.step))
    )
    day = n - back
    team = F.col(names["team"]) if "team" in names else F.lit(None).cast("string")
    return accepted.select(
        F.col(names["id"]).alias("_did"),
        F.col(names["maker"]).alias("dm"),
        day.alias("day"),
        team.alias("team"),
        F.col("_run"),
        *[x.alias(f"x{i}") for i, x in enumerate(xs)],
    )


def _cut(m):
    a = m * _SPLIT
    return a - (a - m)


def new_shifts(rows, p: int, crit_ref: float, known):
    """Shifts of the decision-makers in ``rows`` (``design``'s frame) that ``known``
    (a frame of decision_maker) lacks: (dm, c0..c(p-1))."""
    F = _F()
    fresh = rows.join(F.broadcast(known), rows.dm == known.decision_maker, "left_anti")
    medians = [
        F.coalesce(F.percentile_approx(f"x{i}", 0.5, MEDIAN_ACCURACY), F.lit(0.0)).alias(f"m{i}")
        for i in range(p - 1)
    ]
    out = fresh.groupBy("dm").agg(*medians)
    cut = [_cut(F.col(f"m{i}").cast("double")).alias(f"c{i}") for i in range(p - 1)]
    return out.select("dm", *cut, F.lit(float(crit_ref)).alias(f"c{p - 1}"))


def criterion_reference(settled_outcomes, value_col: str) -> float:
    """The median criterion of the outcomes that count (0 when none), cut as above."""
    F = _F()
    kept = settled_outcomes.filter(F.col("reason").isNull() & ~F.col("duplicate"))
    row = kept.agg(
        F.percentile_approx(F.col(value_col).cast("double"), 0.5, MEDIAN_ACCURACY)
    ).first()
    m = float(row[0]) if row is not None and row[0] is not None else 0.0
    return float(_cut(np.float64(m)))


def bucket_sums(rows, current, shifts, layout: StatLayout):
    """Two frames of bucket sums: every row of each (dm, day) (criterion entries left
    out: they are 0), and the rows with a current outcome (all entries).  ``rows``:
    ``design``'s frame; ``current``: (_oid, _crit); ``shifts``: (dm, c0..)."""
    F = _F()
    p = layout.p_linked
    joined = rows.join(F.broadcast(shifts), "dm").join(
        current, F.col("_did") == F.col("_oid"), "left"
    )
    us = [(F.col(f"x{i}") - F.col(f"c{i}")).alias(f"u{i}") for i in range(p - 1)]
    us.append((F.col("_crit") - F.col(f"c{p - 1}")).alias(f"u{p - 1}"))
    shifted = joined.select("dm", "day", "team", *us)

    def sums(q: int):
        out = [F.count(F.lit(1)).cast("double").alias("n")]
        out += [F.sum(f"u{i}").alias(f"s{i}") for i in range(q)]
        out += [F.sum(F.col(f"u{i}") * F.col(f"u{j}")).alias(f"q{i}_{j}")
                for i in range(q) for j in range(i, q)]  # fmt: skip
        return out

    every = shifted.groupBy("dm", "day").agg(F.max("team").alias("team"), *sums(p - 1))
    linked = (
        shifted.filter(F.col(f"u{p - 1}").isNotNull())
        .groupBy("dm", "day")
        .agg(F.max("team").alias("team"), *sums(p))
    )
    return every, linked


def collect_sets(every, linked, layout: StatLayout) -> dict[str, np.ndarray]:
    """The two frames as store rows, side by side per bucket: keys ``dm`` (object),
    ``day`` (int64), ``team_all`` / ``team_linked`` (object, None for none) and
    ``sums`` (b, 2 * set_width): the all-rows set then the linked set (zeros when the
    bucket has no linked row), buckets in (day, dm) order."""
    a = every.toArrow()
    b = linked.toArrow()
    w = layout.set_width
    pa_ = layout.p_all
    a_keys = list(zip(a.column("dm").to_pylist(), a.column("day").to_pylist(), strict=True))
    order = sorted(range(len(a_keys)), key=lambda i: (a_keys[i][1], a_keys[i][0]))
    index = {a_keys[i]: r for r, i in enumerate(order)}
    nb = len(order)
    sums = np.zeros((nb, 2 * w))
    all_cols = ["n", *[f"s{i}" for i in range(pa_)]]
    all_cols += [f"q{i}_{j}" for i in range(pa_) for j in range(i, pa_)]
    src = (
        np.column_stack([a.column(c).to_numpy(zero_copy_only=False) for c in all_cols])
        if nb
        else np.zeros((0, len(all_cols)))
    )
    sums[:, layout.all_entries()] = src[order]
    pl = layout.p_linked
    link_cols = ["n", *[f"s{i}" for i in range(pl)]]
    link_cols += [f"q{i}_{j}" for i in range(pl) for j in range(i, pl)]
    team_linked = np.full(nb, None, dtype=object)
    if b.num_rows:
        at = np.array(
            [
                index[k]
                for k in zip(b.column("dm").to_pylist(), b.column("day").to_pylist(), strict=True)
            ]
        )
        sums[at, w:] = np.column_stack(
            [b.column(c).to_numpy(zero_copy_only=False) for c in link_cols]
        )
        team_linked[at] = np.array(b.column("team").to_pylist(), dtype=object)
    dm = np.array([a_keys[i][0] for i in order], dtype=object)
    day = np.array([a_keys[i][1] for i in order], dtype=np.int64)
    team_all = (
        np.array(a.column("team").to_pylist(), dtype=object)[order]
        if nb
        else np.zeros(0, dtype=object)
    )
    return {"dm": dm, "day": day, "team_all": team_all, "team_linked": team_linked, "sums": sums}
