"""Sufficient statistics of the judgment log computed inside DuckDB.

One SELECT groups the decisions (joined with their current outcome) by a key, e.g.
(decision-maker, day), and returns per group two statistic sets over the model
vector z = (x_1 .. x_k, Ys[, Ye]):

* ``all``    - every row: count, mean and centred co-moment over (x, Ys);
* ``linked`` - rows with an outcome: the same over (x, Ys, Ye).

Why this shape: plain sums of cross-products lose digits when cues have large means
(an amount in pounds, a date).  Each row is first shifted by its decision-maker's
mean (one cheap grouped pass), the shifted cross-products are summed with ``fsum``
(compensated and independent of DuckDB's thread count), and the outer query turns
them into exact centred co-moments: M = Q - s s^T / n.
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
    """Names of the wide columns holding one group's two statistic sets."""

    k: int

    @property
    def p_all(self) -> int:
        return self.k + 1

    @property
    def p_linked(self) -> int:
        return self.k + 2

    def columns(self) -> list[str]:
        cols = ["n_all"] + [f"mean_all_{i}" for i in range(self.p_all)]
        cols += [f"co_all_{i}_{j}" for i, j in _pairs(self.p_all)]
        cols += ["n_linked"] + [f"mean_linked_{i}" for i in range(self.p_linked)]
        cols += [f"co_linked_{i}_{j}" for i, j in _pairs(self.p_linked)]
        return cols

    def to_moments(self, arrays: dict[str, np.ndarray]) -> tuple[Moments, Moments]:
        """Rebuild the two Moments stacks from fetched column arrays."""
        return self._one(arrays, "all", self.p_all), self._one(arrays, "linked", self.p_linked)

    @staticmethod
    def _one(arrays: dict[str, np.ndarray], tag: str, p: int) -> Moments:
        n = np.asarray(arrays[f"n_{tag}"], dtype=float)
        m = n.shape[0]
        mean = np.zeros((m, p))
        co = np.zeros((m, p, p))
        for i in range(p):
            mean[:, i] = np.nan_to_num(np.asarray(arrays[f"mean_{tag}_{i}"], dtype=float))
        for i, j in _pairs(p):
            v = np.nan_to_num(np.asarray(arrays[f"co_{tag}_{i}_{j}"], dtype=float))
            co[:, i, j] = v
            co[:, j, i] = v
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
    return (
        "SELECT decision_id, criterion FROM ("
        "SELECT decision_id, criterion, row_number() OVER (PARTITION BY decision_id "
        "ORDER BY ingested_at DESC, batch_id DESC, source_line DESC) AS rank_ "
        f"FROM outcomes {clause}) WHERE rank_ = 1"
    )


def moments_sql(
    config: Config,
    *,
    group_by: list[str],
    decision_filter: str = "TRUE",
    as_of: str | None = None,
    restrict_outcomes: bool = False,
) -> str:
    """A SELECT returning ``group_by`` columns, ``team`` (max per group) and the
    ``MomentLayout`` columns.

    group_by: expressions over the decisions table aliased ``d`` with output names,
        e.g. ["d.decision_maker AS decision_maker", "d.decided_day AS day"].
    decision_filter: SQL predicate on ``d`` (which rows count).
    as_of: only decisions and outcomes ingested at or before this timestamp.
    restrict_outcomes: restrict the outcome ranking to the filtered decisions (fast
        when the filter selects few rows).
    """
    xs = design_expressions(config)
    k = len(xs)
    layout = MomentLayout(k)
    p = k + 2  # x..., ys, ye
    filt = [decision_filter, _cues_present(config)]
    if as_of is not None:
        filt.append(f"d.ingested_at <= {lit(as_of)}::TIMESTAMPTZ")
    where = " AND ".join(f"({f})" for f in filt)
    out_filter = None
    if restrict_outcomes:
        out_filter = f"decision_id IN (SELECT d.decision_id FROM decisions d WHERE {where})"
    outcome = current_outcome_sql(as_of, out_filter)
    names = [g.split(" AS ")[-1].strip() for g in group_by]
    z = ", ".join(f"{e} AS z{i}" for i, e in enumerate(xs))
    base = (
        f"SELECT {', '.join(group_by)}, d.team AS team_, {z}, d.judgment AS z{k}, o.criterion AS z{k + 1} "
        f"FROM decisions d LEFT JOIN ({outcome}) o ON o.decision_id = d.decision_id WHERE {where}"
    )
    # Shift per decision-maker when it is part of the key, else per first key.
    shift_key = "decision_maker" if "decision_maker" in names else names[0]
    shift_cols = ", ".join(
        f"coalesce(fsum(z{i}) / nullif(count(z{i}), 0), 0) AS c{i}" for i in range(p)
    )
    shifted = ", ".join(f"b.z{i} - s.c{i} AS u{i}" for i in range(p))
    keep = ", ".join(f"b.{n}" for n in names)
    shift_keep = ", ".join(f"s.c{i}" for i in range(p))
    link = f"u{k + 1} IS NOT NULL"

    aggs = ["count(*) AS n_all"]
    aggs += [f"fsum(u{i}) AS s_all_{i}" for i in range(k + 1)]
    aggs += [f"fsum(u{i} * u{j}) AS q_all_{i}_{j}" for i, j in _pairs(k + 1)]
    aggs += [f"count(*) FILTER (WHERE {link}) AS n_linked"]
    aggs += [f"coalesce(fsum(u{i}) FILTER (WHERE {link}), 0) AS s_linked_{i}" for i in range(p)]
    aggs += [
        f"coalesce(fsum(u{i} * u{j}) FILTER (WHERE {link}), 0) AS q_linked_{i}_{j}"
        for i, j in _pairs(p)
    ]
    aggs += [f"any_value(c{i}) AS c{i}" for i in range(p)]
    aggs += ["max(team_) AS team"]

    def finish(tag: str, width: int) -> list[str]:
        n = f"n_{tag}"
        safe = f"nullif({n}, 0)"
        cols = [n]
        cols += [f"CASE WHEN {n} > 0 THEN c{i} + s_{tag}_{i} / {safe} END AS mean_{tag}_{i}" for i in range(width)]
        cols += [
            f"CASE WHEN {n} > 0 THEN q_{tag}_{i}_{j} - s_{tag}_{i} * s_{tag}_{j} / {safe} END AS co_{tag}_{i}_{j}"
            for i, j in _pairs(width)
        ]
        return cols

    outer = [*names, "team", *finish("all", k + 1), *finish("linked", p)]
    assert len(layout.columns()) == len(outer) - len(names) - 1
    return (
        f"WITH base AS ({base}), "
        f"shift AS (SELECT {shift_key}, {shift_cols} FROM base GROUP BY {shift_key}), "
        f"shifted AS (SELECT {keep}, b.team_, {shift_keep}, {shifted} FROM base b JOIN shift s USING ({shift_key})), "
        f"grouped AS (SELECT {', '.join(names)}, {', '.join(aggs)} FROM shifted GROUP BY {', '.join(names)}) "
        f"SELECT {', '.join(outer)} FROM grouped"
    )
