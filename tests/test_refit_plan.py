"""Specification of the vectorised pieces behind the refit: pooling bucket statistics
into groups (``monitor.stats.moments.group_sums``), the window ends covering a day
(``monitor.refit.plan.covering_ends``) and the window sums of stored bucket parts
(``monitor.refit.plan.window_sums`` with ``moments_sql.StatLayout.finish``).

References: numpy's ``np.cov`` on the pooled raw rows (outside the project), the
two-pass statistics of the window's raw rows, and a brute-force enumeration of
aligned window ends written out here (common practice).
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest

from monitor.config import Config
from monitor.refit.plan import covering_ends
from monitor.refit.stretches import day_number
from monitor.stats.moments import Moments, group_sums, moments_from_rows


def _buckets(rng: np.random.Generator, count: int) -> tuple[list[np.ndarray], Moments]:
    rows = [
        rng.normal(size=(int(rng.integers(0, 6)), 3)) * [1.0, 2.0, 0.5] + [1e4, 0.0, 5.0]
        for _ in range(count)
    ]
    parts = [moments_from_rows(z) for z in rows]
    stack = Moments(*(np.concatenate([getattr(m, f) for m in parts])
                      for f in ("n", "mean", "comoment")))  # fmt: skip
    return rows, stack


def test_group_sums_equal_the_covariance_of_the_pooled_rows():
    rng = np.random.default_rng(21)
    rows, stack = _buckets(rng, 300)
    group = rng.integers(0, 7, size=300)  # unsorted membership, as in pooled_windows
    got = group_sums(stack, group, 8)  # group 7 has no members
    assert got.n[7] == 0 and np.all(got.comoment[7] == 0)
    for g in range(7):
        z = np.vstack([rows[i] for i in np.flatnonzero(group == g)])
        assert got.n[g] == len(z)
        # Reference: numpy's sample covariance times (n - 1) is the centred co-moment.
        ref = np.cov(z, rowvar=False) * (len(z) - 1)
        scale = np.sqrt(np.outer(np.diag(ref), np.diag(ref)))
        # Inputs near 1e4 carry ~1e-12 rounding each: 1e-11 of the scale (common practice).
        assert np.all(np.abs(got.comoment[g] - ref) <= 1e-11 * scale)
        np.testing.assert_allclose(got.mean[g], z.mean(axis=0), rtol=1e-14, atol=1e-13)


def test_group_sums_of_empty_members_and_empty_input():
    rng = np.random.default_rng(3)
    _, stack = _buckets(rng, 5)
    empty = Moments(np.zeros(2), np.zeros((2, 3)), np.zeros((2, 3, 3)))
    got = group_sums(empty, np.array([0, 0]), 1)
    assert got.n[0] == 0 and np.all(got.mean == 0) and np.all(got.comoment == 0)
    none = group_sums(stack.take(slice(0, 0)), np.array([], dtype=int), 2)
    assert none.size == 2 and np.all(none.n == 0)


def test_covering_ends_match_a_brute_force_enumeration():
    config = Config.model_validate(
        {
            "store": {"path": "x.duckdb"},
            "decisions": {"id": "i", "decided_at": "t", "decision_maker": "w", "judgment": "y"},
            "cues": {"a": {"type": "numeric"}},
            "windows": {"length_days": 30, "step_days": 7, "min_rows": 5},
        }
    )
    origin = day_number(date.fromisoformat(config.windows.origin))
    days = np.arange(origin - 40, origin + 60)
    newest = origin + 49
    rows, ends = covering_ends(config, days, newest)
    got = {(int(days[r]), int(e)) for r, e in zip(rows, ends, strict=True)}
    # Reference: every aligned end (origin + j * step) within reach, checked one by one.
    want = {
        (int(d), int(e))
        for d in days
        for e in range(origin - 140, origin + 140, 7)
        if d <= e <= d + 29 and e <= newest
    }
    assert got == want


# --------------------------------------------------------------------------- window sums


def _parts(rows: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """One bucket row in the stored layout (``StatLayout``): count, sums of the shifted
    values and the upper triangle of their product sums - written out here from the
    layout's definition, independently of the store's SQL."""
    u = rows - shift
    p = u.shape[1]
    tri = [float(u[:, i] @ u[:, j]) for i in range(p) for j in range(i, p)]
    return np.array([float(len(u)), *u.sum(axis=0), *tri])


def _log(rng: np.random.Generator):
    """Rows (x1, x2, ys, ye-or-NaN) of 3 decision-makers on random days, with a cue of
    mean 1e4 and sd ~1 (common practice stress case for plain sums) and a 0/1 cue that
    is constant within some buckets."""
    rows = []
    for ent in range(3):
        for day in np.sort(rng.choice(np.arange(1000, 1400), size=150, replace=False)):
            n = int(rng.integers(1, 6))
            x = np.column_stack([1e4 + rng.normal(size=n), rng.integers(0, 2, size=n) * 1.0])
            ys = x @ [0.5, 2.0] + rng.normal(size=n)
            ye = np.where(rng.random(n) < 0.6, rng.normal(size=n) + ys, np.nan)
            rows.append((ent, int(day), np.column_stack([x, ys, ye])))
    return rows


def test_window_sums_equal_the_statistics_of_the_raw_rows():
    from monitor.refit.buckets import StatLayout
    from monitor.refit.plan import window_sums

    rng = np.random.default_rng(8)
    layout = StatLayout(2)
    log = _log(rng)
    shift = np.array([[1e4, 0.5, 5000.0, 5000.0]] * 3)  # near the means, as in the store
    ent, day, linked, sums = [], [], [], []
    for e, d, z in log:
        every = z.copy()
        every[:, 3] = shift[e, 3]  # the all-rows set has criterion entries 0
        for flag, rows in ((False, every), (True, z[~np.isnan(z[:, 3])])):
            if len(rows):
                ent.append(e), day.append(d), linked.append(flag)
                sums.append(_parts(rows, shift[e]))
    ent, day, linked, sums = map(np.array, (ent, day, linked, sums))
    win_ent = np.repeat(np.arange(3), 62)
    win_end = np.tile(np.arange(990, 1424, 7), 3)
    got = window_sums(ent, day, linked, sums, win_ent, win_end, 90)
    all_rows, linked_w = layout.finish(got, shift[win_ent])
    for w, (e, end) in enumerate(zip(win_ent, win_end, strict=True)):
        z = [r for ee, d, r in log if ee == e and end - 89 <= d <= end]
        if not z:
            assert layout.count(got[w : w + 1])[0] == 0
            continue
        z = np.vstack(z)
        # Reference: the two-pass statistics of the window's raw rows (numpy).
        for mine, ref in ((all_rows, moments_from_rows(z[:, :3])),
                          (linked_w, moments_from_rows(z[~np.isnan(z[:, 3])]))):  # fmt: skip
            scale = np.sqrt(np.outer(np.diag(ref.comoment[0]), np.diag(ref.comoment[0])))
            assert mine.n[w] == ref.n[0]
            np.testing.assert_allclose(mine.mean[w], ref.mean[0], rtol=1e-14, atol=1e-12)
            # A cue with mean 1e4 and sd 1 carries ~1e-12 rounding in its input values.
            assert np.all(np.abs(mine.comoment[w] - ref.comoment[0]) <= 1e-10 * scale + 1e-12)
    # Windows do not depend on the days loaded outside them: with only the days from
    # 1200 on, the windows starting there are identical to the last bit.
    late = day >= 1200
    part = window_sums(ent[late], day[late], linked[late], sums[late], win_ent, win_end, 90)
    inside = win_end - 89 >= 1200
    assert inside.sum() > 20
    assert np.array_equal(part[inside], got[inside])


def test_window_sums_keep_a_constant_cue_exactly_constant():
    from monitor.refit.buckets import StatLayout
    from monitor.refit.plan import window_sums

    layout = StatLayout(1)
    rng = np.random.default_rng(3)
    # The cue is 0.3 on every row (not representable in binary) and the shift differs.
    sums = [_parts(np.column_stack([np.full(4, 0.3), rng.normal(size=4), rng.normal(size=4)]),
                   np.array([0.25, 0.0, 0.0])) for _ in range(30)]  # fmt: skip
    ent, day = np.zeros(60), np.tile(np.arange(30) + 700, 2)
    linked = np.repeat([False, True], 30)  # the same rows in both sets
    got = window_sums(ent, day, linked, np.array(sums * 2), np.array([0]), np.array([729]), 90)
    all_rows, linked = layout.finish(got, np.array([[0.25, 0.0, 0.0]]))
    assert all_rows.comoment[0, 0, 0] == 0.0 and linked.comoment[0, 0, 0] == 0.0
    assert all_rows.mean[0, 0] == pytest.approx(0.3, rel=1e-15)


@pytest.mark.parametrize(
    ("length", "step", "origin"),
    [(90, 7, "2024-01-01"), (91, 7, "2023-12-28"), (12, 5, "2024-03-02"), (30, 1, "2024-01-01"),
     (30, 14, "2022-06-06"), (28, 7, "2024-01-05"), (90, 30, "2021-02-03"),
     (5, 7, "2024-01-01")],
)  # fmt: skip
def test_stretches_are_the_days_between_window_boundaries(length, step, origin):
    """A bucket's stretch (``refit.stretches``) against its definition, enumerated here
    (common practice: a brute-force check of a closed form): it starts on the greatest
    window boundary - an aligned window's first day or the day after an aligned end - on
    or before the day; numpy, DuckDB's SQL and the stored JSON agree; no aligned window
    holds part of a stretch."""
    import duckdb

    from monitor.refit.plan import aligned_ends
    from monitor.refit.stretches import Stretches

    config = Config.model_validate(
        {
            "store": {"path": "x.duckdb"},
            "decisions": {"id": "i", "decided_at": "t", "decision_maker": "w", "judgment": "y"},
            "cues": {"a": {"type": "numeric"}},
            "windows": {"length_days": length, "step_days": step, "origin": origin},
        }
    )
    st = Stretches.of(config)
    assert Stretches.from_json(st.to_json()) == st
    o = day_number(date.fromisoformat(origin))
    days = np.arange(o - 500, o + 500)
    ends = o + step * np.arange(-1000, 1000)
    bounds = np.unique(np.concatenate([ends + 1, ends - length + 1]))
    want = bounds[np.searchsorted(bounds, days, side="right") - 1]
    assert np.array_equal(st.start(days), want)
    first = np.unique(want)
    assert np.array_equal(st.last(first)[:-1], first[1:] - 1)
    assert np.all(st.last(first) - first < step)
    sql = (
        f"SELECT ({st.sql('x')} - DATE '1970-01-01')::BIGINT FROM (SELECT DATE '1970-01-01' "
        f"+ i::INTEGER AS x FROM range({o - 500}, {o + 500}) t(i)) ORDER BY x"
    )
    assert np.array_equal(np.array([r[0] for r in duckdb.sql(sql).fetchall()]), want)
    for end in aligned_ends(config, o - 300, o + 300):
        inside = (days >= end - length + 1) & (days <= end)
        # A stretch is inside the window exactly when its first day is.
        assert np.array_equal(inside, (want >= end - length + 1) & (want <= end))


def test_compiled_pooling_equals_group_sums():
    """``window_kernel.pooled_moments`` (the team and all windows) against
    ``moments.group_sums``, itself checked against numpy's ``np.cov`` above: groups in
    any order, an empty group, members with no rows, means far from zero."""
    from monitor.refit.window_kernel import pooled_moments

    rng = np.random.default_rng(5)
    rows, stack = _buckets(rng, 400)
    group = rng.integers(0, 9, size=400)
    group[group == 4] = 5  # group 4 has no member
    want = group_sums(stack, group, 10)
    order = np.argsort(group, kind="stable")
    n, mean, comoment = pooled_moments(stack.n, stack.mean, stack.comoment, order, group, 10)
    assert np.array_equal(n, want.n)
    assert np.allclose(mean, want.mean, rtol=1e-13, atol=1e-12)
    scale = np.abs(want.comoment).max()
    assert np.allclose(comoment, want.comoment, rtol=1e-12, atol=1e-12 * scale)
    assert n[4] == 0 and np.all(mean[4] == 0) and np.all(comoment[4] == 0)
