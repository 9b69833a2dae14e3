"""Control limits of the weekly look: the rule they count is the alert rule, and the
false-alarm rate they promise holds where it can be worked out by hand."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.stats.episodes import episodes
from monitor.stats.monitoring import control_limit, count_openings, null_statistics


@settings(max_examples=300, deadline=None)
@given(st.lists(st.booleans(), max_size=60), st.integers(1, 4))
def test_openings_follow_the_alert_episode_rule(flags, consecutive):
    # The calibration must count exactly the alerts monitor.stats.episodes would open.
    assert count_openings(np.array(flags, bool), consecutive) == len(episodes(flags, consecutive))


def test_limit_matches_the_closed_form_for_independent_looks():
    # Non-overlapping windows (step = length) give independent N(0, 1) looks.  With one
    # look to open and one to close, an alert opens at a flagged look after a clear one:
    # rate per look = p (1 - p), p = P(|z| >= c) (worked out by hand, common practice for
    # a two-state chain).  Per 100 years: 100 * (365.25 / L) * p (1 - p).
    length = 91
    limit = control_limit("level", length, length, 1, 5.0, years=200_000, seed=3)
    p = limit.p_limit
    expected = 100 * (365.25 / length) * p * (1 - p)
    assert abs(expected - 5.0) / 5.0 < 0.08, expected


def test_overlap_needs_a_higher_limit_than_independent_looks():
    # Weekly looks at 90-day windows are strongly correlated (92 % shared rows): the
    # limit for the same target differs from the one for independent looks, and the
    # achieved rate on a fresh simulated history (another seed) stays near the target.
    limit = control_limit("level", 90, 7, 2, 1.0)
    z = null_statistics("level", 90, 7, 20_000, seed=99)
    fresh = count_openings(z >= limit.z, 2) / 200.0
    assert 0.7 <= fresh <= 1.4, fresh
    # Treating the 52 weekly looks as independent 2-in-a-row tests at this per-look
    # level would promise far fewer alerts than the overlap really gives.
    p = limit.p_limit
    naive = 100 * (365.25 / 7) * p * p * (1 - p)
    assert naive < 0.1 * limit.target_per_100_years


def test_change_statistic_is_standard_normal_under_the_null():
    # Difference of two adjacent non-overlapping window sums over sqrt(2L): N(0, 1).
    z = null_statistics("change", 90, 7, 2_000, seed=5)
    assert abs(np.mean(z**2) - 1.0) < 0.05
    assert abs(np.mean(z >= 1.959963984540054) - 0.05) < 0.01
