"""Numeric limits and reference distributions shared by the statistics: one owner each.

Every check that asks "is this constant?", "is this matrix singular?", "is this window
poorly conditioned?" or "what is the two-sided p / interval of this t or z?" asks here,
so the fits, the policy checks and the drift tests cannot drift apart.
"""

from __future__ import annotations

import numpy as np

# A correlation matrix of the cues with a condition number beyond this is treated as
# singular: the normal equations would keep fewer than ~4 significant digits, and in
# floating point an exact linear dependency rarely shows as an exactly zero eigenvalue
# (common practice for float64).
COLLINEAR_CONDITION = 1e12
# Between this and COLLINEAR_CONDITION a window is refitted from its raw rows by QR:
# the normal equations lose about log10(condition) digits, QR about half as many.
RAW_REFIT_CONDITION = 1e7
# A window's sums are shifted (refit.buckets); a variable whose centred sum of squares is
# below this fraction of its shifted one lost about 7 of 16 digits to cancellation, the
# same budget as RAW_REFIT_CONDITION, and the window is refitted from its raw rows.
RAW_REFIT_CANCELLATION = 1e-7
# A Cholesky pivot (1 - R^2 of a cue on the cues before it) below this means the
# condition number exceeds 1 / PIVOT_FLOOR > COLLINEAR_CONDITION.
PIVOT_FLOOR = 1e-13
# A variable whose standard deviation is below this fraction of its mean's magnitude is
# constant: rounding in the mean leaves a spread of a few ulps of |mean|, never more.
CONSTANT_RTOL = 1e-10


def is_constant(comoment_diag: np.ndarray, n: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """True where a variable has no spread beyond rounding (and for an empty set).

    ``comoment_diag``: centred sums of squares, ``n``: counts (broadcast against it),
    ``mean``: the variables' means.  Constant means sd <= CONSTANT_RTOL * |mean|."""
    sd = np.sqrt(np.maximum(comoment_diag, 0.0) / np.maximum(n, 1.0))
    return sd <= CONSTANT_RTOL * np.abs(mean)


def t_two_sided_p(t: np.ndarray, df: np.ndarray) -> np.ndarray:
    """Two-sided p-values of t statistics with ``df`` degrees of freedom (NaN where df
    is NaN)."""
    from scipy import special

    return 2.0 * special.stdtr(df, -np.abs(t))


def t_half_width(se: np.ndarray, df: np.ndarray, alpha: float) -> np.ndarray:
    """Half-width of the two-sided (1 - alpha) t interval: t_{1-alpha/2, df} * se."""
    from scipy import special

    return special.stdtrit(df, 1.0 - alpha / 2.0) * se


def normal_half_width(se: np.ndarray, alpha: float) -> np.ndarray:
    """Half-width of the two-sided (1 - alpha) normal interval: z_{1-alpha/2} * se."""
    from scipy import special

    return special.ndtri(1.0 - alpha / 2.0) * se


def normal_two_sided_p(z: np.ndarray) -> np.ndarray:
    """Two-sided p-values of standard normal statistics."""
    from scipy import special

    return 2.0 * special.ndtr(-np.abs(z))
