"""Specification of the vectorised pieces behind the refit: pooling bucket statistics
into groups (``monitor.moments.group_sums``) and the window ends covering a day
(``monitor.window_plan.covering_ends``).

References: numpy's ``np.cov`` on the pooled raw rows (outside the project) and a
brute-force enumeration of aligned window ends written out here (common practice).
"""

from __future__ import annotations

from datetime import date

import numpy as np

from monitor.config import Config
from monitor.moments import Moments, group_sums, moments_from_rows
from monitor.window_plan import covering_ends, day_number


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
    group = rng.integers(0, 7, size=300)  # unsorted membership, as in build_series
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
