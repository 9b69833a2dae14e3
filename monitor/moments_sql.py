"""Sufficient statistics of the judgment log computed inside DuckDB.

One SELECT groups the decisions (joined with their current outcome) by a key, e.g.
(decision-maker, day), and returns per group two statistic sets over the model
vector z = (x_1 .. x_k, Ys[, Ye]):

* ``all``    - every row: count, mean and centred co-moment over (x, Ys);
* ``linked`` - rows with an outcome: the same over (x, Ys, Ye).

Why this shape: plain sums of cross-products lose digits when cues have large means
(an amount in pounds, a date).  Each row is first shifted by its decision-maker's
cue and judgment means (one cheap grouped scan of the decisions) and the criterion by
the mean of all outcomes, the shifted cross-products are summed with plain ``sum``
(near-zero terms: the thread-count test holds at 1e-12, and ``fsum`` cost more), and
``MomentLayout.to_moments`` turns them into exact centred co-moments in numpy:
M = Q - s s^T / n.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.config import Config
from monitor.moments import Moments
from monitor.store import quote_ident as qi
from monitor.store import sql_literal as lit


def design_expressions(config: Config, table: str = "d") -> list[str]:
    """SQL expressions for the design columns, in ``config.design_columns()`` order."""
    out: list[str] = []
    for name, cue in config.cues.items():
        col = f"{table}.{qi(name)}"
        if cue.type == "categorical":
            out.extend(
                f"CASE WHEN {col} = {lit(level)} THEN 1.0 ELSE 0.0 END"
                for level in cue.levels
                if level != cue.reference
            )
        else:
            out.append(f"CAST({col} AS DOUBLE)")
    return out


def _cues_present(config: Config, table: str = "d") -> str:
    return " AND ".join(f"{table}.{qi(name)} IS NOT NULL" for name in config.cues) or "TRUE"


def _pairs(p: int) -> list[tuple[int, int]]:
    return [(i, j) for i in range(p) for j in range(i, p)]


@dataclass(frozen=True)
class MomentLayout:
    """Names of the wide columns holding one group's two statistic sets.

    The columns are *shifted* sums, finished into centred statistics in numpy by
    ``to_moments``: for each variable the shift ``c_i`` (the decision-maker's mean),
    and per set the count, ``s_i = sum(z_i - c_i)`` and
    ``q_i_j = sum((z_i - c_i)(z_j - c_j))``.  Keeping the finishing step out of SQL
    keeps the query short (DuckDB spends more time planning several hundred
    expressions than summing a day's rows) and lets sums of two groups with the same
    shift be added exactly.
    """

    k: int

    @property
    def p_all(self) -> int:
        return self.k + 1

    @property
    def p_linked(self) -> int:
        return self.k + 2

    def columns(self) -> list[str]:
        cols = [f"c_{i}" for i in range(self.p_linked)]
        for tag, p in (("all", self.p_all), ("linked", self.p_linked)):
            cols += [f"n_{tag}"] + [f"s_{tag}_{i}" for i in range(p)]
            cols += [f"q_{tag}_{i}_{j}" for i, j in _pairs(p)]
        return cols

    def to_moments(self, arrays: dict[str, np.ndarray]) -> tuple[Moments, Moments]:
        """Rebuild the two Moments stacks (all rows, linked rows) from fetched columns."""
        shift = (
            np.column_stack(
                [
                    np.nan_to_num(np.asarray(arrays[f"c_{i}"], dtype=float))
                    for i in range(self.p_linked)
                ]
            )
            if self.p_linked
            else np.zeros((0, 0))
        )
        return (
            self._one(arrays, "all", self.p_all, shift),
            self._one(arrays, "linked", self.p_linked, shift),
        )

    @staticmethod
    def _one(arrays: dict[str, np.ndarray], tag: str, p: int, shift: np.ndarray) -> Moments:
        def column(name: str) -> np.ndarray:
            return np.nan_to_num(np.asarray(arrays[name], dtype=float))

        n = column(f"n_{tag}")
        s = np.column_stack([column(f"s_{tag}_{i}") for i in range(p)])
        pairs = _pairs(p)
        upper = np.column_stack([column(f"q_{tag}_{i}_{j}") for i, j in pairs])
        # One gather of the stored triangle into full (m, p, p) matrices: filling
        # q[:, i, j] and q[:, j, i] column by column was strided and slow.
        slot = np.empty((p, p), dtype=np.intp)
        for at, (i, j) in enumerate(pairs):
            slot[i, j] = slot[j, i] = at
        q = upper[:, slot.ravel()].reshape(len(n), p, p)
        del upper
        return finish_moments(n, shift[:, :p], s, q)


# A centred sum of squares below this fraction of the shifted one is rounding left over
# from Q - s s^T / n on a constant variable: a real spread that small would need the
# group's mean to sit a million standard deviations from the decision-maker's mean.
CANCELLATION_FLOOR = 1e-12


def finish_moments(n: np.ndarray, shift: np.ndarray, s: np.ndarray, q: np.ndarray) -> Moments:
    """Centred statistics from shifted sums: mean = c + s / n, M = Q - s s^T / n.

    n: (m,) counts; shift: (m, p); s: (m, p); q: (m, p, p), overwritten with the
    result.  Empty groups give zero mean and co-moment.  A variable constant within its group gets a co-moment row and
    column of exactly zero, so whether a cue is "constant in window" never depends on
    rounding, on the shift or on DuckDB's thread count.
    """
    safe = np.where(n > 0, n, 1.0)
    mean = np.where((n > 0)[:, None], shift + s / safe[:, None], 0.0)
    # In place in ``q`` (the caller's temporary): bucket stacks are hundreds of MB.
    # (s_i s_j) / n keeps M symmetric.
    shifted_diag = np.diagonal(q, axis1=1, axis2=2).copy()
    co = q
    for i in range(q.shape[1]):  # a row at a time: no (m, p, p) temporary
        co[:, i, :] -= (s[:, i, None] * s) / safe[:, None]
    flat = np.diagonal(co, axis1=1, axis2=2) <= CANCELLATION_FLOOR * shifted_diag
    group, var = np.nonzero(flat)
    co[group, var, :] = 0.0
    co[group, :, var] = 0.0
    return Moments(n, mean, co)


def current_outcome_sql(as_of: str | None = None, decision_filter: str | None = None) -> str:
    """The outcome that counts per decision (the latest ingested), optionally as of a time
    and restricted to decisions matched by ``decision_filter`` (a SQL predicate on
    ``outcomes``)."""
    where = []
    if as_of is not None:
        where.append(f"ingested_at <= {lit(as_of)}::TIMESTAMPTZ")
    if decision_filter:
        where.append(decision_filter)
    clause = f"WHERE {' AND '.join(where)}" if where else ""
    # arg_max over the ordering key is a hash aggregate: measured 0.23 s against 0.40 s
    # for row_number() over 2.4M outcomes.  A missing source_line ranks last, as
    # NULLS LAST did in the descending window order.
    return (
        "SELECT decision_id, arg_max(criterion, (ingested_at, batch_id, coalesce(source_line, -1))) "
        f"AS criterion FROM outcomes {clause} GROUP BY decision_id"
    )


def moments_sql(
    config: Config,
    *,
    group_by: list[str],
    decision_filter: str = "TRUE",
    as_of: str | None = None,
    restrict_outcomes: bool = False,
    outcome_filter: str | None = None,
) -> str:
    """A SELECT returning ``group_by`` columns, ``team`` (max per group) and the
    ``MomentLayout`` columns.

    group_by: expressions over the decisions table aliased ``d`` with output names,
        e.g. ["d.decision_maker AS decision_maker", "d.decided_day AS day"].
    decision_filter: SQL predicate on ``d`` (which rows count).
    as_of: only decisions and outcomes ingested at or before this timestamp.
    restrict_outcomes: restrict the outcome ranking to the filtered decisions (fast
        when the filter selects few rows).
    outcome_filter: a cheaper predicate on ``outcomes`` used instead of the
        filtered-decisions semi-join when ``restrict_outcomes`` (it must keep at least
        every outcome of the filtered decisions).

    The statistics come out as shifted sums; ``MomentLayout.to_moments`` finishes
    them into ``Moments``.
    """
    xs = design_expressions(config)
    k = len(xs)
    p = k + 2  # x..., ys, ye
    filt = [decision_filter, _cues_present(config)]
    if as_of is not None:
        filt.append(f"d.ingested_at <= {lit(as_of)}::TIMESTAMPTZ")
    where = " AND ".join(f"({f})" for f in filt)
    out_filter = None
    if restrict_outcomes:
        out_filter = outcome_filter or (
            f"decision_id IN (SELECT d.decision_id FROM decisions d WHERE {where})"
        )
    outcome = current_outcome_sql(as_of, out_filter)
    names = [g.split(" AS ")[-1].strip() for g in group_by]
    exprs = [g.split(" AS ")[0].strip() for g in group_by]
    z = ", ".join(f"{e} AS z{i}" for i, e in enumerate(xs))
    base = (
        f"SELECT {', '.join(group_by)}, d.team AS team_, {z}, d.judgment AS z{k}, "
        f"o.criterion AS z{k + 1} FROM decisions d "
        f"LEFT JOIN ({outcome}) o ON o.decision_id = d.decision_id WHERE {where}"
    )
    # Shift per decision-maker when it is part of the key, else per first key.
    at = names.index("decision_maker") if "decision_maker" in names else 0
    shift_key, shift_expr = names[at], exprs[at]
    # The shift is the mean cut to 20 significant bits (Veltkamp's split): then a
    # constant 0/1 cue shifts, sums and shifts back without rounding, so its mean is
    # exactly 0 or 1 and "constant" never hinges on a stray 1e-17.
    split = "8589934593.0"  # 2^33 + 1
    shift_cols = ", ".join(
        f"(m{i} * {split}) - ((m{i} * {split}) - m{i}) AS c{i}" for i in range(p)
    )
    # The cue and judgment shifts come from the decisions alone (a cheap grouped scan,
    # no outcome join); the criterion's from all current outcomes (one column): any
    # value near the data keeps the digits, only the cancellation needs it close.
    mean_cols = ", ".join(
        f"coalesce(avg({e}), 0) AS m{i}" for i, e in enumerate([*xs, "d.judgment"])
    )
    out_asof = f"WHERE ingested_at <= {lit(as_of)}::TIMESTAMPTZ" if as_of is not None else ""
    mean_cols += f", coalesce((SELECT avg(criterion) FROM outcomes {out_asof}), 0) AS m{k + 1}"
    # Unlinked rows carry u = 0 for the criterion; their products are never used.
    shifted = ", ".join(f"b.z{i} - s.c{i} AS u{i}" for i in range(k + 1))
    shifted += f", coalesce(b.z{k + 1} - s.c{k + 1}, 0) AS u{k + 1}"
    keep = ", ".join(f"b.{n}" for n in names)
    shift_keep = ", ".join(f"s.c{i}" for i in range(p))
    # One pass of sums per (key, linked?) part: FILTERed aggregates cost about three
    # times as much in DuckDB, and both statistic sets share the same shift, so the
    # all-rows sums are simply the sums of the two parts.  Plain ``sum``, not
    # ``fsum``: the rows are shifted to near zero first, and the thread-count test
    # (1 vs 4 threads, 1e-12 relative) holds with it; ``fsum`` cost 10-30% more.
    part_aggs = ["count(*) AS n"]
    part_aggs += [f"sum(u{i}) AS s{i}" for i in range(p)]
    part_aggs += [f"sum(u{i} * u{j}) AS q{i}_{j}" for i, j in _pairs(p)]
    part_aggs += [f"any_value(c{i}) AS c{i}" for i in range(p)]
    part_aggs += ["max(team_) AS team_"]

    # The two parts side by side (a join of two small tables): FILTERed aggregates over
    # the parts cost seconds at 5M rows, this costs milliseconds.
    def both(col: str) -> str:
        return f"coalesce(u.{col}, 0) + coalesce(l.{col}, 0)"

    aggs = [f"{both('n')} AS n_all"]
    aggs += [f"{both(f's{i}')} AS s_all_{i}" for i in range(k + 1)]
    aggs += [f"{both(f'q{i}_{j}')} AS q_all_{i}_{j}" for i, j in _pairs(k + 1)]
    aggs += ["coalesce(l.n, 0) AS n_linked"]
    aggs += [f"coalesce(l.s{i}, 0) AS s_linked_{i}" for i in range(p)]
    aggs += [f"coalesce(l.q{i}_{j}, 0) AS q_linked_{i}_{j}" for i, j in _pairs(p)]
    aggs += [f"coalesce(u.c{i}, l.c{i}) AS c_{i}" for i in range(p)]
    aggs += ["greatest(u.team_, l.team_) AS team"]
    outer = [*names, "team", *MomentLayout(k).columns()]
    keys = ", ".join(names)
    return (
        f"WITH base AS ({base}), "
        f"shift AS (SELECT {shift_key}, {shift_cols} FROM (SELECT {shift_expr} AS {shift_key}, "
        f"{mean_cols} FROM decisions d WHERE {where} GROUP BY {shift_expr})), "
        f"shifted AS (SELECT {keep}, b.team_, b.z{k + 1} IS NOT NULL AS linked, {shift_keep}, "
        f"{shifted} FROM base b JOIN shift s USING ({shift_key})), "
        f"parts AS (SELECT {keys}, linked, {', '.join(part_aggs)} FROM shifted "
        f"GROUP BY {keys}, linked), "
        f"grouped AS (SELECT {keys}, {', '.join(aggs)} FROM "
        "(SELECT * FROM parts WHERE NOT linked) u "
        f"FULL JOIN (SELECT * FROM parts WHERE linked) l USING ({keys})) "
        f"SELECT {', '.join(outer)} FROM grouped"
    )
