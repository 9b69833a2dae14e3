"""Sufficient statistics of the judgment log computed inside DuckDB.

Per (decision-maker, stretch of days) bucket the store keeps two statistic sets over the model
vector z = (x_1 .. x_k, Ys, Ye), each as one fixed-size array of *shifted sums*
(``StatLayout``) in its own ``bucket_stats`` row:

* all rows (``linked_only`` false): count, sums of (z - c) and of (z_i - c_i)(z_j - c_j),
  with the criterion entries 0;
* outcome-linked rows (``linked_only`` true): the same over the rows with a current
  outcome.

Why this shape: plain sums of cross-products lose digits when cues have large means
(an amount in pounds, a date).  Each row is shifted by a per-decision-maker reference
``c`` (``bucket_shifts``: the decision-maker's medians when first seen, cut to 20
significant bits; a full refit takes the medians of their first ``kernel.SHIFT_ROWS`` rows)
before its products are summed with plain ``sum``, so the summed terms are near zero.
A full refit, and a nightly one summing buckets again, sum in memory with a compiled
kernel (``refit.kernel``); ``full_sql`` is the reference it is tested against.  A median, not a mean: one extreme value cannot drag the reference away
from the rest of a person's rows, so it affects only the windows that contain it.  Because every bucket of one decision-maker shares its shift, the
statistics of any set of that decision-maker's days are the plain sums of the buckets'
arrays - the shifted form of the pairwise update, exact in real arithmetic - and
``finish_moments`` turns a sum into count, mean and centred co-moment in numpy:
M = Q - s s^T / n.  Across decision-makers (teams, everyone) the finished moments are
pooled with the two-pass formula (``moments.group_sums``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.config import Config
from monitor.refit.stretches import Stretches, day_number, from_day_number
from monitor.stats.limits import RAW_REFIT_CANCELLATION
from monitor.stats.moments import Moments
from monitor.store.rules import current_outcome_sql
from monitor.store.rules import quote_ident as qi
from monitor.store.rules import sql_literal as lit


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


# --- bucket layout ---------------------------------------------------------------------


@dataclass(frozen=True)
class StatLayout:
    """Positions inside the statistics arrays of one bucket.

    The store keeps each (decision-maker, day) bucket as two rows of sums
    (``bucket_stats.sums``), one over all the day's decisions and one over those with a
    current outcome (``linked_only``).  Each is ``[n, s (p), q (upper triangle,
    row-major)]`` over p = k + 2 variables (design columns, judgment, criterion), with
    s sums of the shifted values z - c and q sums of their products; in the all-rows
    set the criterion entries are 0.  In memory a bucket or window is the two side by
    side, (m, 2 * set_width); ``finish`` makes Moments of both sets.
    """

    k: int

    @property
    def p_all(self) -> int:
        return self.k + 1

    @property
    def p_linked(self) -> int:
        return self.k + 2

    @property
    def set_width(self) -> int:
        p = self.p_linked
        return 1 + p + p * (p + 1) // 2

    def all_entries(self) -> np.ndarray:
        """Indices of a row's entries that are not about the criterion."""
        pl, pa = self.p_linked, self.p_all
        tri = [1 + pl + at for at, (i, j) in enumerate(_pairs(pl)) if j < pa]
        return np.array([0, *range(1, 1 + pa), *tri], dtype=np.intp)

    def lost_precision(self, sums: np.ndarray) -> np.ndarray:
        """(m,) bool: the window's sums lost too many digits to cancellation to be fitted
        from them: a variable whose centred sum of squares lies between
        CANCELLATION_FLOOR (below it the variable is constant) and RAW_REFIT_CANCELLATION
        times its shifted one (digits lost ~ log10 of the ratio's inverse), or a sum that
        is not finite.  Such a window is refitted from its raw rows."""
        pl, pw = self.p_linked, self.set_width
        where = {pair: 1 + pl + at for at, pair in enumerate(_pairs(pl))}
        lost = ~np.isfinite(sums).all(axis=1)
        for part, p in ((sums[:, :pw], self.p_all), (sums[:, pw:], pl)):
            n = part[:, :1]
            s = part[:, 1 : 1 + p]
            q = part[:, [where[(i, i)] for i in range(p)]]
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                centred = q - s * s / np.where(n > 0, n, 1.0)
                thin = (centred < RAW_REFIT_CANCELLATION * q) & (centred > CANCELLATION_FLOOR * q)
            lost |= (thin & (n > 0)).any(axis=1)
        return lost

    def count(self, sums: np.ndarray) -> np.ndarray:
        """Rows counted in each (m, 2 * set_width) array (all rows)."""
        return sums[:, 0]

    def finish(self, sums: np.ndarray, shift: np.ndarray) -> tuple[Moments, Moments]:
        """(all rows, linked rows) Moments from (m, 2 * set_width) sums of the two sets
        and each row's shift (m, p_linked).  ``sums`` is left untouched."""
        pw = self.set_width
        return (
            _finish_set(sums[:, :pw][:, self.all_entries()], self.p_all, shift),
            _finish_set(sums[:, pw:], self.p_linked, shift),
        )


def _finish_set(part: np.ndarray, p: int, shift: np.ndarray) -> Moments:
    n = part[:, 0].copy()
    s = part[:, 1 : 1 + p]
    slot = np.empty((p, p), dtype=np.intp)
    for i, (a, b) in enumerate(_pairs(p)):
        slot[a, b] = slot[b, a] = 1 + p + i
    q = part[:, slot.ravel()].reshape(len(n), p, p)  # a fresh array
    return finish_moments(n, shift[:, :p], s, q)


def array_rows(arrow_column, width: int) -> np.ndarray:
    """A fetched fixed-size DOUBLE array column as a fresh (m, width) float array (one
    copy: each chunk's values are read in place)."""
    parts = [c.flatten().to_numpy(zero_copy_only=False) for c in arrow_column.chunks]
    if not parts:
        return np.zeros((0, width))
    return np.concatenate(parts).reshape(-1, width)


def stored_shifts(con, p: int) -> tuple[np.ndarray, np.ndarray]:
    """Every decision-maker's stored reference: ids in id order (as ``windows._NUMBERED``
    numbers them) and their (e, p) shifts."""
    table = con.sql(
        "SELECT decision_maker, shift FROM bucket_shifts ORDER BY decision_maker"
    ).to_arrow_table()
    return np.array(table.column(0).to_pylist(), dtype=object), array_rows(table.column(1), p)


# --- bucket SQL ------------------------------------------------------------------------

# 2^33 + 1: the shift is the mean cut to 20 significant bits (Veltkamp's split), so a
# constant 0/1 cue shifts, sums and shifts back without rounding and its mean is exactly
# 0 or 1 - "constant" never hinges on a stray 1e-17.
_SPLIT = "8589934593.0"


def shift_select(config: Config, decision_filter: str) -> str:
    """SELECT (decision_maker, shift DOUBLE[p_linked]) for the decision-makers of the
    decisions ``d`` matching ``decision_filter``: their cue and judgment medians, and the
    median of all stored outcomes for the criterion (any value near the data keeps the
    digits; only the cancellation needs it close).  Medians, so that one absurd value
    cannot move the reference of every other row (a mean of 1e12 and 999 ordinary values
    sits 1e9 away from all of them, and their windows' spread cancels away)."""
    xs = [*design_expressions(config), "d.judgment"]
    medians = [f"coalesce(median({e}), 0)" for e in xs]
    medians.append("coalesce((SELECT median(criterion) FROM outcomes), 0)")
    cut = ", ".join(f"({m} * {_SPLIT}) - (({m} * {_SPLIT}) - {m})" for m in medians)
    return (
        f"SELECT d.decision_maker, [{cut}]::DOUBLE[{len(medians)}] AS shift FROM decisions d "
        f"WHERE ({decision_filter}) AND {_cues_present(config)} GROUP BY d.decision_maker"
    )


def _shifted_rows(config: Config, rows: str, extra: str = "") -> str:
    """Shifted values u0..u(k+1) of ``rows`` (a relation with decision_maker, _bday,
    team, the cue columns, judgment and _crit - the criterion, NULL when unlinked - plus ``extra``
    columns), joined with ``bucket_shifts``.  Unlinked rows carry u = 0 for the
    criterion."""
    k = len(config.design_columns())
    p = k + 2
    xs = design_expressions(config, "r")
    shift_cols = ", ".join(f"shift[{i + 1}] AS c{i}" for i in range(p))
    us = [f"{e} - s.c{i} AS u{i}" for i, e in enumerate(xs)]
    us.append(f"r.judgment - s.c{k} AS u{k}")
    us.append(f"coalesce(r._crit - s.c{k + 1}, 0) AS u{k + 1}")
    return (
        f"SELECT r.decision_maker, r._bday AS day, r.team, {extra}{', '.join(us)} FROM ({rows}) r "
        f"JOIN (SELECT decision_maker, {shift_cols} FROM bucket_shifts) s USING (decision_maker)"
    )


def _sums(p: int, with_criterion: bool = True) -> str:
    """The array expression of one set's statistics over shifted values u0..u(p-1):
    count, sums and the upper triangle of product sums.  Without the criterion its
    entries are the literal 0 (its u is 0)."""
    ye = p - 1

    def term(expr: str, *idx: int) -> str:
        return "0.0" if not with_criterion and ye in idx else f"sum({expr})"

    sums = ["count(*)::DOUBLE"] + [term(f"u{i}", i) for i in range(p)]
    sums += [term(f"u{i} * u{j}", i, j) for i, j in _pairs(p)]
    return f"[{', '.join(sums)}]::DOUBLE[{len(sums)}]"


def _in_buckets(
    table: str, bucket_day: str = "d.decided_day", maker: str = "d.decision_maker"
) -> str:
    """SQL: the row's (decision-maker, day) is one of the buckets listed in ``table``."""
    return (
        f"EXISTS (SELECT 1 FROM {table} rb WHERE rb.decision_maker = {maker} "
        f"AND rb.day = {bucket_day})"
    )


def full_sql(config: Config, only: str | None = None, day_range: tuple | None = None) -> str:
    """Every stored decision's bucket statistics: per (decision_maker, stretch) one row
    with ``linked_only`` false (all the stretch's decisions; criterion entries 0) and
    one with ``linked_only`` true (the decisions with a current outcome).  Returns
    decision_maker, day (the stretch's first day, ``plan.Stretches``), linked_only, team
    (max) and ``sums`` DOUBLE[set_width].  ``only``: a table of (decision_maker, day)
    buckets to compute instead of all; ``day_range`` (first, last bucket day of those)
    lets DuckDB skip the row groups of other days.

    The all-rows set needs no outcome: it is summed from the decisions alone, and only
    the linked set joins the current outcomes (an inner join over the outcomes).  Plain
    ``sum``, not ``fsum``: the rows are shifted to near zero first and the thread-count
    test (1 vs 4 threads, 1e-12 relative) holds with it."""
    p = len(config.design_columns()) + 2
    stretches = Stretches.of(config)
    bday = stretches.sql("d.decided_day")
    present = _cues_present(config)
    outcomes = current_outcome_sql()
    if only is not None:
        if day_range is not None:
            lo = lit(str(day_range[0]))
            hi = lit(str(_stretch_last(stretches, day_range[1])))
            present += f" AND d.decided_day BETWEEN {lo}::DATE AND {hi}::DATE"
        present += f" AND {_in_buckets(only, bday)}"
        outcomes = current_outcome_sql(
            decision_filter=f"decision_id IN (SELECT d.decision_id FROM decisions d WHERE {present})"
        )
    every = f"SELECT d.*, {bday} AS _bday, NULL::DOUBLE AS _crit FROM decisions d WHERE {present}"
    linked = (
        f"SELECT d.*, {bday} AS _bday, o.criterion AS _crit "
        f"FROM ({outcomes}) o JOIN decisions d USING (decision_id) WHERE {present}"
    )
    return (
        f"SELECT decision_maker, day, false AS linked_only, max(team) AS team, "
        f"{_sums(p, with_criterion=False)} AS sums FROM ({_shifted_rows(config, every)}) "
        "GROUP BY decision_maker, day UNION ALL "
        f"SELECT decision_maker, day, true, max(team), {_sums(p)} "
        f"FROM ({_shifted_rows(config, linked)}) GROUP BY decision_maker, day"
    )


def _stretch_last(stretches: Stretches, first_day):
    """The last day (a date) of the stretch starting on ``first_day`` (a date)."""
    return from_day_number(int(stretches.last([day_number(first_day)])[0]))


def recompute_sql(config: Config, through_batch: int, day_range: tuple | None) -> str:
    """SELECT DISTINCT (decision_maker, day: the stretch's first day) of the buckets the batches after
    ``through_batch`` take something out of: the buckets of decision versions in the
    stored sums that a correction or retraction replaced, and of stored decisions whose
    current outcome was replaced by a correction.  These are summed again from their
    rows (``full_sql(only=...)``) rather than by subtraction: taking a value out of a
    sum leaves its rounding behind, and after an absurd value that rounding is larger
    than everything else in the bucket."""
    b = int(through_batch)
    bday = Stretches.of(config).sql("decided_day")
    in_range = "TRUE"
    if day_range is not None:
        lo, hi = (lit(str(d)) for d in day_range)
        in_range = f"d.decided_day BETWEEN {lo}::DATE AND {hi}::DATE"
    return (
        f"SELECT DISTINCT decision_maker, {bday} AS day FROM superseded_decisions "
        f"WHERE superseded_batch > {b} AND batch_id <= {b} UNION "
        f"SELECT d.decision_maker, {bday} FROM decisions d "
        f"WHERE d.batch_id <= {b} AND {in_range} "
        f"AND d.decision_id IN (SELECT decision_id FROM outcomes WHERE batch_id > {b}) "
        f"AND d.decision_id IN (SELECT decision_id FROM outcomes WHERE batch_id <= {b})"
    )


def delta_sql(config: Config, through_batch: int, day_range: tuple | None, skip: str) -> str:
    """What the batches after ``through_batch`` add to the stored bucket statistics:
    decision_maker, day, linked_only, team (max) and ``sums`` DOUBLE[set_width] per
    touched row.

    * a new decision (or the new version of a corrected one) adds its row to its
      bucket's all-rows set, and to the linked set if it has an outcome (one that came
      with it or earlier);
    * an older decision whose first outcome arrived adds its row with that criterion to
      the linked set; its all-rows set does not change.

    Nothing is subtracted: the buckets something leaves (``recompute_sql``, the table
    ``skip``) are left out here and summed again from their rows by the caller.

    ``day_range`` (first, last decision day touched, from ``dirty_buckets``)
    lets DuckDB skip the row groups of older decisions when looking up the decisions
    of new outcomes: the lookup then costs the same whatever the length of history.
    """
    p = len(config.design_columns()) + 2
    b = int(through_batch)
    present = _cues_present(config)
    in_range = "TRUE"
    if day_range is not None:
        lo, hi = (lit(str(d)) for d in day_range)
        in_range = f"d.decided_day BETWEEN {lo}::DATE AND {hi}::DATE"
    # Names of our own start with "_": cue names start with a letter, so none collide.
    bday = Stretches.of(config).sql("d.decided_day")
    cols = f"d.decision_maker, {bday} AS _bday, d.team, d.judgment, " + ", ".join(
        f"d.{qi(c)}" for c in config.cues
    )
    new_dec = f"SELECT d.* FROM decisions d WHERE d.batch_id > {b} AND {present}"
    new_out = current_outcome_sql(
        decision_filter="decision_id IN (SELECT decision_id FROM _new_dec)"
    )
    old_dec = (
        f"SELECT d.* FROM decisions d WHERE d.batch_id <= {b} AND {in_range} AND {present} "
        f"AND d.decision_id IN (SELECT decision_id FROM outcomes WHERE batch_id > {b})"
    )
    history = "decision_id IN (SELECT decision_id FROM _old_dec)"
    now_cur = current_outcome_sql(decision_filter=history)
    rows = (
        f"SELECT {cols}, NULL::DOUBLE AS _crit, false AS _linked_only FROM _new_dec d "
        f"UNION ALL SELECT {cols}, o.criterion, true "
        f"FROM _new_dec d JOIN ({new_out}) o USING (decision_id) "
        f"UNION ALL SELECT {cols}, o.criterion, true "
        f"FROM _old_dec d JOIN ({now_cur}) o USING (decision_id)"
    )
    kept = _in_buckets(skip, "r._bday", "r.decision_maker")
    rows = f"SELECT * FROM ({rows}) r WHERE NOT {kept}"
    shifted = _shifted_rows(config, rows, extra="r._linked_only AS linked_only, ")
    return (
        f"WITH _new_dec AS ({new_dec}), _old_dec AS ({old_dec}) "
        f"SELECT decision_maker, day, linked_only, max(team) AS team, "
        f"{_sums(p)} AS sums FROM ({shifted}) "
        "GROUP BY decision_maker, day, linked_only"
    )


def new_shift_sql(config: Config, through_batch: int) -> str:
    """INSERT the shifts of decision-makers first seen in batches after ``through_batch``."""
    where = (
        f"d.batch_id > {int(through_batch)} AND d.decision_maker NOT IN "
        "(SELECT decision_maker FROM bucket_shifts)"
    )
    return f"INSERT INTO bucket_shifts {shift_select(config, where)}"
