"""Checks on a series of windows: weight drift between two windows, R_s / r_a floors per window.

Pure functions on stacks of ``m`` windows, like ``monitor.stats.policy``: a window that
cannot be assessed gets NaN and a reason (drift) or ``assessable`` False (floors),
never an exception.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from monitor.stats.limits import normal_two_sided_p
from monitor.stats.solves import batched_solve, judge_reasons

if TYPE_CHECKING:
    from monitor.stats.lens import LensFits


@dataclass(frozen=True)
class WeightDrift:
    """Change of the judge weights between two windows, per pair (arrays (m, k) or (m,)).

    ``change`` = first - second; ``z`` its Wald statistic and ``p_value`` two-sided
    normal.  ``joint_stat`` = d' (V1 + V2)^-1 d over the ``joint_df`` columns estimable in
    both windows, ``joint_p`` from chi2(joint_df).  NaN with a ``reason`` where nothing
    can be compared.
    """

    names: tuple[str, ...]
    change: np.ndarray
    std_error: np.ndarray
    z: np.ndarray
    p_value: np.ndarray
    joint_stat: np.ndarray
    joint_df: np.ndarray
    joint_p: np.ndarray
    reason: np.ndarray


def weight_drift(first: LensFits, second: LensFits) -> WeightDrift:
    """Wald tests of weight change between paired windows (row i of ``first`` vs ``second``).

    The windows must not overlap: the two estimates are then independent and their
    covariances add.  The joint test is the Wald form of the Chow test that allows each
    window its own residual variance (unequal variances are the rule between quarters,
    and the classic Chow F test is invalid then); with equal variances the two agree up
    to the variance estimate and the F vs chi2 reference (see tests/test_policy.py).
    The intercept is not tested: a level shift of all judgments is not a change of policy.
    A cue not estimable in either window is left out of the joint test.
    """
    b1, b2 = np.asarray(first.weights, float), np.asarray(second.weights, float)
    v1, v2 = np.asarray(first.cov, float), np.asarray(second.cov, float)
    both = np.asarray(first.estimable) & np.asarray(second.estimable)
    both &= np.isfinite(b1) & np.isfinite(b2)
    fitted = (judge_reasons(first) == "") & (judge_reasons(second) == "")
    both &= fitted[:, None]
    change = np.where(both, b1 - b2, np.nan)
    var = np.diagonal(v1, axis1=1, axis2=2) + np.diagonal(v2, axis1=1, axis2=2)
    with np.errstate(invalid="ignore"):
        se = np.where(both, np.sqrt(var), np.nan)
        z = change / se
    p = normal_two_sided_p(z)
    # Columns outside the common set become identity rows with zero change, so every
    # window solves at full size and the skipped columns add nothing to the statistic.
    mask2 = both[:, :, None] & both[:, None, :]
    eye = np.eye(b1.shape[1], dtype=bool)[None]
    v = np.where(mask2, np.nan_to_num(v1 + v2), np.where(eye, 1.0, 0.0))
    d = np.where(both, change, 0.0)
    df = both.sum(axis=1)
    sol, ok = batched_solve(v, d, df > 0)
    joint = np.where(ok, np.einsum("mi,mi->m", d, np.nan_to_num(sol)), np.nan)
    reason = np.full(len(df), "", dtype=object)
    reason[~fitted] = "a window of the pair was not fitted"
    reason[fitted & (df == 0)] = "no cue estimable in both windows"
    reason[fitted & (df > 0) & ~ok] = "weight covariance singular"
    return WeightDrift(
        names=tuple(first.names),
        change=change,
        std_error=se,
        z=z,
        p_value=p,
        joint_stat=joint,
        joint_df=df,
        joint_p=stats.chi2.sf(joint, np.maximum(df, 1)),
        reason=reason,
    )


@dataclass(frozen=True)
class FloorCheck:
    """Per-window floor verdict: ``flagged`` only where ``assessable`` (both (m,) bool)."""

    flagged: np.ndarray
    assessable: np.ndarray


def below_floor(value: np.ndarray, n: np.ndarray, *, floor: float, min_n: int) -> FloorCheck:
    """Flag windows whose ``value`` is below ``floor``, given at least ``min_n`` rows.

    A NaN value (e.g. R_s of a constant judgment) or too few rows is not assessable,
    never a flag: a floor should fire on evidence, not on missing data.
    """
    value = np.asarray(value, dtype=float)
    assessable = np.isfinite(value) & (np.asarray(n) >= min_n)
    with np.errstate(invalid="ignore"):
        return FloorCheck(assessable & (value < floor), assessable)


def consistency_floor(fits: LensFits, *, floor: float, min_rows: int) -> FloorCheck:
    """Consistency R_s below ``floor`` on windows with at least ``min_rows`` decisions."""
    return below_floor(fits.R_s, fits.n, floor=floor, min_n=min_rows)


def achievement_floor(fits: LensFits, *, floor: float, min_linked: int) -> FloorCheck:
    """Achievement r_a below ``floor`` on windows with at least ``min_linked`` outcomes."""
    return below_floor(fits.r_a, fits.n_linked, floor=floor, min_n=min_linked)
