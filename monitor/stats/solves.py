"""Helpers shared by the checks that work on stacks of ``m`` window fits.

``monitor.stats.policy`` (forbidden cues) and ``monitor.stats.trends`` (drift, floors) both need to
know which judge fits are usable and to solve one small linear system per window
without one bad window failing the whole batch.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from monitor.stats.limits import COLLINEAR_CONDITION

if TYPE_CHECKING:
    from monitor.stats.lens import LensFits


def judge_reasons(fits: LensFits) -> np.ndarray:
    """A fresh (m,) object array: "" where the judge model is fitted, else why not.

    ``fits.reason`` also carries environment-model reasons (e.g. no linked outcomes)
    that do not touch the judge weights, so the judge model counts as fitted wherever
    its residual scale is defined.
    """
    fitted = np.isfinite(np.asarray(fits.sigma, float)) & (np.asarray(fits.df_resid) > 0)
    why = [f"judge model not fitted: {r or 'unknown'}" for r in np.asarray(fits.reason, object)]
    return np.where(fitted, "", np.array(why, dtype=object)).astype(object)


def batched_solve(a: np.ndarray, b: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve a x = b for each window; windows not ``ok`` or ill-conditioned give NaN.

    a: (m, q, q); b: (m, q) or (m, q, r).  Returns (x, ok_after).  Bad windows get an
    identity matrix before the solve so one of them cannot fail the whole batch.
    """
    eye = np.eye(a.shape[-1])
    finite = np.isfinite(a).all(axis=(1, 2)) & np.isfinite(b).reshape(len(b), -1).all(axis=1)
    ok = ok & finite
    safe = np.where(ok[:, None, None], np.nan_to_num(a), eye)
    ok = ok & (np.linalg.cond(safe) < COLLINEAR_CONDITION)
    safe = np.where(ok[:, None, None], safe, eye)
    rhs = np.nan_to_num(b)
    x = np.linalg.solve(safe, rhs[..., None] if rhs.ndim == 2 else rhs)
    x = x[..., 0] if rhs.ndim == 2 else x
    return np.where(ok.reshape((-1,) + (1,) * (x.ndim - 1)), x, np.nan), ok
