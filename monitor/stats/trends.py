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
    joint, df, ok = _joint_wald(change, both, v1 + v2)
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


def _joint_wald(
    change: np.ndarray, both: np.ndarray, v: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """d' V^-1 d per row over the columns marked in ``both``: (statistic, df, solved)."""
    # Columns outside the common set become identity rows with zero change, so every
    # window solves at full size and the skipped columns add nothing to the statistic.
    mask2 = both[:, :, None] & both[:, None, :]
    eye = np.eye(both.shape[1], dtype=bool)[None]
    v = np.where(mask2, np.nan_to_num(v), np.where(eye, 1.0, 0.0))
    d = np.where(both, change, 0.0)
    df = both.sum(axis=1)
    sol, ok = batched_solve(v, d, df > 0)
    return np.where(ok, np.einsum("mi,mi->m", d, np.nan_to_num(sol)), np.nan), df, ok


def cue_drift(
    first: LensFits, second: LensFits, columns: list[int]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The joint Wald test of change over one cue's design columns (a categorical cue's
    dummies), the same test as ``weight_drift``'s joint one restricted to ``columns``:
    (statistic, df, p from chi2(df)), NaN where no column is estimable in both windows.
    One verdict per cue does not depend on which level is the reference."""
    idx = np.asarray(columns, dtype=int)
    b1 = np.asarray(first.weights, float)[:, idx]
    b2 = np.asarray(second.weights, float)[:, idx]
    v1 = np.asarray(first.cov, float)[:, idx][:, :, idx]
    v2 = np.asarray(second.cov, float)[:, idx][:, :, idx]
    both = np.asarray(first.estimable)[:, idx] & np.asarray(second.estimable)[:, idx]
    both &= np.isfinite(b1) & np.isfinite(b2)
    fitted = (judge_reasons(first) == "") & (judge_reasons(second) == "")
    both &= fitted[:, None]
    stat, df, ok = _joint_wald(np.where(both, b1 - b2, np.nan), both, v1 + v2)
    p = np.where(ok & (df > 0), stats.chi2.sf(stat, np.maximum(df, 1)), np.nan)
    return np.where(df > 0, stat, np.nan), df, p


@dataclass(frozen=True)
class FloorCheck:
    """Per-window floor verdict: ``flagged`` only where ``assessable`` (both (m,) bool).

    ``estimate`` is the figure compared with the floor (bias-adjusted for R_s) and
    ``ci_low`` / ``ci_high`` its interval (NaN under the point-estimate rule)."""

    flagged: np.ndarray
    assessable: np.ndarray
    estimate: np.ndarray | None = None
    ci_low: np.ndarray | None = None
    ci_high: np.ndarray | None = None


def below_floor(value: np.ndarray, n: np.ndarray, *, floor: float, min_n: int) -> FloorCheck:
    """Flag windows whose ``value`` is below ``floor``, given at least ``min_n`` rows.

    A NaN value (e.g. R_s of a constant judgment) or too few rows is not assessable,
    never a flag: a floor should fire on evidence, not on missing data.
    """
    value = np.asarray(value, dtype=float)
    assessable = np.isfinite(value) & (np.asarray(n) >= min_n)
    with np.errstate(invalid="ignore"):
        return FloorCheck(assessable & (value < floor), assessable)


def consistency_floor(
    fits: LensFits, *, floor: float, min_rows: int, z: float | None = None
) -> FloorCheck:
    """Consistency R_s below ``floor`` on windows with at least ``min_rows`` decisions.

    With ``z`` (a control limit) the check is on the bias-adjusted R_s and its interval:
    R^2 adjusted for the k_eff cues (Wherry's correction, 1 - (1 - R^2)(n - 1)/df), its
    standard error from the large-sample variance of R^2 (Olkin & Finn 1995,
    Psychological Bulletin 118, from memory: 4 R^2 (1 - R^2)^2 df^2 / ((n^2 - 1)(n + 3))),
    the interval adj R^2 +- z SE mapped back to R.  The floor is crossed only when the
    whole interval lies below it, and cleared only when it lies wholly above (an interval
    across the floor is not assessable): a small window's R_s is biased upwards (a judge
    answering at random with 8 cues shows R_s ~ 0.45 at n = 40) and noisy, so its point
    estimate alone would flap.  Without ``z``: the point estimate, as before.
    """
    if z is None:
        return below_floor(fits.R_s, fits.n, floor=floor, min_n=min_rows)
    n = np.asarray(fits.n, dtype=float)
    df = np.asarray(fits.df_resid, dtype=float)
    r2 = np.asarray(fits.R_s, dtype=float) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        adj = 1.0 - (1.0 - r2) * (n - 1.0) / df
        se = np.sqrt(4.0 * r2 * (1.0 - r2) ** 2 * df**2 / ((n**2 - 1.0) * (n + 3.0)))
        to_r = lambda v: np.sqrt(np.clip(v, 0.0, 1.0))  # noqa: E731
        estimate, low, high = to_r(adj), to_r(adj - z * se), to_r(adj + z * se)
    return _interval_verdict(
        np.isfinite(estimate) & np.isfinite(high) & (n >= min_rows) & (df > 0),
        estimate,
        low,
        high,
        floor,
    )


def achievement_floor(
    fits: LensFits, *, floor: float, min_linked: int, z: float | None = None
) -> FloorCheck:
    """Achievement r_a below ``floor`` on windows with at least ``min_linked`` outcomes.

    With ``z``: the interval tanh(atanh(r_a) +- z / sqrt(n_linked - 3)) (Fisher 1921) must
    lie wholly below the floor.  Without: the point estimate, as before."""
    if z is None:
        return below_floor(fits.r_a, fits.n_linked, floor=floor, min_n=min_linked)
    r = np.asarray(fits.r_a, dtype=float)
    n = np.asarray(fits.n_linked, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.arctanh(np.clip(r, -0.999999, 0.999999))
        half = z / np.sqrt(n - 3.0)
        low, high = np.tanh(centre - half), np.tanh(centre + half)
    return _interval_verdict(np.isfinite(r) & (n >= min_linked) & (n > 3), r, low, high, floor)


def _interval_verdict(usable, estimate, low, high, floor: float) -> FloorCheck:
    """Below the floor when the whole interval is below it, clear when the whole interval
    is at or above it; an interval across the floor is no evidence either way (not
    assessable), so it neither opens nor closes an alert and the alert does not flap."""
    with np.errstate(invalid="ignore"):
        below, above = high < floor, low >= floor
    assessable = usable & (below | above)
    return FloorCheck(assessable & below, assessable, estimate, low, high)


@dataclass(frozen=True)
class ChangePoint:
    """When a weight most likely changed: day numbers (days since 1970-01-01) of the
    estimate and of the ends of its 95 % interval; NaN when the series is too short."""

    day: float
    low: float
    high: float


def change_point(
    ends: np.ndarray, weights: np.ndarray, std_errors: np.ndarray, length_days: int
) -> ChangePoint:
    """The most likely day of a step change in one weight, from its rolling windows.

    ``ends``: (m,) window end days; ``weights``, ``std_errors``: (m,) that weight in each
    window.  A step at day tau makes window i's expected weight b0 + (b1 - b0) f_i(tau),
    f_i the share of the window's days after tau (a ramp over one window length, daily
    volume taken as even).  Overlapping windows share rows, so their errors are
    correlated: cov(e_i, e_j) = se_i se_j max(0, 1 - |t_i - t_j| / L), the moving-sum
    covariance.  Each candidate day is fitted by generalised least squares; the estimate
    minimises the residual sum of squares and the interval is every day whose RSS lies
    within the chi-square(1) 95 % point of it (profile likelihood for a change point,
    Hinkley 1970, Biometrika 57).  A weight missing in a window drops that window.
    """
    t = np.asarray(ends, dtype=float)
    b = np.asarray(weights, dtype=float)
    se = np.asarray(std_errors, dtype=float)
    keep = np.isfinite(b) & np.isfinite(se) & (se > 0)
    t, b, se = t[keep], b[keep], se[keep]
    if len(t) < 4:
        return ChangePoint(np.nan, np.nan, np.nan)
    length = float(length_days)
    overlap = np.clip(1.0 - np.abs(t[:, None] - t[None, :]) / length, 0.0, None)
    cov = overlap * se[:, None] * se[None, :] + 1e-12 * np.diag(se**2)
    chol = np.linalg.cholesky(cov)
    white_b = np.linalg.solve(chol, b)
    candidates = np.arange(t[0] - length, t[-1] + 1.0)
    share = np.clip((t[None, :] - candidates[:, None]) / length, 0.0, 1.0)  # (c, m)
    # Whiten once for every candidate, then solve each two-column regression in closed
    # form (one vectorised pass instead of a least-squares call per candidate day).
    u = np.linalg.solve(chol, np.ones_like(t))  # (m,)
    v = np.linalg.solve(chol, share.T)  # (m, c)
    uu, uv, vv = u @ u, u @ v, np.einsum("mc,mc->c", v, v)
    ub, vb, bb = u @ white_b, v.T @ white_b, white_b @ white_b
    det = uu * vv - uv**2
    with np.errstate(divide="ignore", invalid="ignore"):
        fitted = (vv * ub**2 - 2.0 * uv * ub * vb + uu * vb**2) / det
    rss = np.where(det > 1e-12 * uu * np.maximum(vv, 1e-300), bb - fitted, np.inf)
    if not np.isfinite(rss).any():
        return ChangePoint(np.nan, np.nan, np.nan)
    best = int(np.argmin(rss))
    inside = candidates[rss <= rss[best] + 3.841458820694124]
    return ChangePoint(float(candidates[best]), float(inside.min()), float(inside.max()))
