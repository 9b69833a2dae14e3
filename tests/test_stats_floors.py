"""Consistency and achievement floors: bias-adjusted figures with intervals, checked by
simulation with planted truth and against statsmodels."""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm

from monitor.stats.lens import fit_lens
from monitor.stats.moments import Moments, moments_from_rows
from monitor.stats.trends import achievement_floor, consistency_floor

K = 8


def _windows(rng, m: int, n: int, r2: float):
    """m windows of n rows, 8 standard normal cues, judgment with population R^2 = r2."""
    x = rng.normal(size=(m, n, K))
    signal = x.sum(axis=2) / np.sqrt(K)
    noise_sd = np.sqrt((1 - r2) / r2) if r2 > 0 else 1.0
    y = (signal if r2 > 0 else 0.0) + noise_sd * rng.normal(size=(m, n))
    parts = [moments_from_rows(np.column_stack([x[i], y[i]])) for i in range(m)]
    moms = Moments(
        *(np.concatenate([getattr(p, a) for p in parts]) for a in ("n", "mean", "comoment"))
    )
    return fit_lens(moms, None, [f"c{j}" for j in range(K)]), x, y


def test_adjusted_consistency_removes_the_small_window_bias():
    # Planted truth: a judge answering at random (population R^2 = 0) with 8 cues and
    # n = 40 shows R_s ~ 0.45; the adjusted figure is centred near 0 in R^2.
    rng = np.random.default_rng(1)
    fits, x, y = _windows(rng, 2000, 40, 0.0)
    assert 0.40 <= np.mean(fits.R_s) <= 0.50
    check = consistency_floor(fits, floor=0.5, min_rows=30, z=3.5)
    assert abs(np.mean(check.estimate**2)) < 0.05
    # Source: statsmodels' rsquared_adj on the same rows (Wherry's correction).
    for i in range(3):
        ref = sm.OLS(y[i], sm.add_constant(x[i])).fit()
        assert np.isclose(check.estimate[i] ** 2, max(ref.rsquared_adj, 0.0), rtol=1e-9, atol=1e-12)


def test_consistency_floor_fires_on_evidence_only():
    rng = np.random.default_rng(2)
    # A consistent judge just above the floor (R = 0.6) in small windows: never crossed.
    fits, _, _ = _windows(rng, 1000, 60, 0.36)
    assert consistency_floor(fits, floor=0.5, min_rows=30, z=3.5).flagged.mean() == 0.0
    # The point-estimate rule flags some of those windows (2 % here: over a year of
    # weekly looks, an alert that opens and closes on noise).
    assert consistency_floor(fits, floor=0.5, min_rows=30).flagged.mean() > 0.01
    # A judge well below the floor (R = 0.3) in windows of 300: crossed in most windows
    # (84 % here at z = 3.5), so two consecutive looks come soon.
    fits, _, _ = _windows(rng, 500, 300, 0.09)
    assert consistency_floor(fits, floor=0.5, min_rows=30, z=3.5).flagged.mean() > 0.75


def test_consistency_interval_covers_the_planted_r2():
    rng = np.random.default_rng(3)
    fits, _, _ = _windows(rng, 2000, 200, 0.5)
    check = consistency_floor(fits, floor=0.5, min_rows=30, z=1.959963984540054)
    covered = (check.ci_low**2 <= 0.5) & (0.5 <= check.ci_high**2)
    assert 0.92 <= covered.mean() <= 0.98, covered.mean()


def test_achievement_interval_is_fishers():
    # Source: Fisher's z interval for a correlation (tanh(atanh(r) +- z / sqrt(n - 3))),
    # worked by hand for r = 0.2, n = 103: atanh(0.2) = 0.2027; +- 1.96 / 10 gives
    # (0.0067, 0.3987) in z, i.e. (0.0067, 0.3788) in r.
    fits = type("F", (), {"r_a": np.array([0.2]), "n_linked": np.array([103.0])})()
    check = achievement_floor(fits, floor=0.4, min_linked=50, z=1.96)
    assert np.isclose(check.ci_low[0], np.tanh(np.arctanh(0.2) - 0.196), rtol=1e-12)
    assert np.isclose(check.ci_high[0], 0.3788, atol=5e-4)
    assert check.flagged[0]  # 0.379 < 0.4: wholly below the floor
    assert not achievement_floor(fits, floor=0.35, min_linked=50, z=1.96).flagged[0]


def test_an_interval_across_the_floor_neither_opens_nor_closes():
    # Three windows: wholly below, across, wholly above the floor 0.5 (Fisher intervals
    # at z = 1.96, n = 103: half-width ~0.196 in z).
    fits = type("F", (), {"r_a": np.array([0.1, 0.5, 0.9]), "n_linked": np.array([103.0] * 3)})()
    check = achievement_floor(fits, floor=0.5, min_linked=50, z=1.96)
    assert check.flagged.tolist() == [True, False, False]
    assert check.assessable.tolist() == [True, False, True]
