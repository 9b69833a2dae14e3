"""Forbidden-cue checks as pure functions: direct and proxy use, with FDR control.

Everything works on stacks of ``m`` windows (one row per decision-maker window), the
same stacks ``monitor.stats.lens`` produces, and never loops over windows in Python.  Inputs
are the window ``Moments`` over ``z = (x_1 .. x_k, Ys)`` and the judge fits; nothing here
reads the store or raises on a degenerate window: such a window gets NaN and a reason.

Weight drift and the R_s / r_a floors live in ``monitor.stats.trends``, alert episodes in
``monitor.stats.episodes``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from monitor.stats.design import cue_columns
from monitor.stats.limits import is_constant, t_half_width, t_two_sided_p
from monitor.stats.solves import batched_solve, judge_reasons

if TYPE_CHECKING:
    from monitor.stats.lens import LensFits
    from monitor.stats.moments import Moments


@dataclass(frozen=True)
class ForbiddenCueDecomposition:
    """Disparity = direct + indirect for one forbidden cue, per window and design column.

    Shapes: ``(m,)`` per window, ``(m, f)`` per window x forbidden column (``columns``),
    ``(m, f, p)`` per window x forbidden column x proxy (``proxies``).  Raw figures are in
    judgment units per unit of the column (per level-vs-reference for a dummy); the
    ``std_*`` figures are multiplied by sd(column) / sd(Ys), the scale of a standardised
    weight.  The joint tests are F tests with (f, df_resid) degrees of freedom; for a
    single column they equal the squared t test.  ``cue_direct_size`` and
    ``cue_indirect_size`` (m,) are one size per cue that does not depend on which level
    is the reference: sd(sum_j b_j d_j) / sd(Ys), the spread of the judgment the cue's
    columns carry (for one column, |standardised weight|).  A window that cannot be
    assessed has NaN everywhere and a non-empty ``reason``.  ``std_scale`` (m, f) is the
    factor sd(column) / sd(Ys) that takes a raw figure to the standardised scale.
    """

    cue: str
    columns: tuple[str, ...]
    proxies: tuple[str, ...]
    n: np.ndarray
    df_resid: np.ndarray
    disparity: np.ndarray
    direct: np.ndarray
    direct_se: np.ndarray
    direct_ci_low: np.ndarray
    direct_ci_high: np.ndarray
    direct_p: np.ndarray
    indirect: np.ndarray
    indirect_se: np.ndarray
    indirect_p: np.ndarray
    indirect_ci_low: np.ndarray
    indirect_ci_high: np.ndarray
    proxy_parts: np.ndarray
    proxy_part_se: np.ndarray
    std_disparity: np.ndarray
    std_direct: np.ndarray
    std_indirect: np.ndarray
    std_proxy_parts: np.ndarray
    cue_direct_size: np.ndarray
    cue_indirect_size: np.ndarray
    std_scale: np.ndarray
    joint_F: np.ndarray
    joint_p: np.ndarray
    indirect_joint_F: np.ndarray
    indirect_joint_p: np.ndarray
    reason: np.ndarray


def _wald_f(
    est: np.ndarray, cov: np.ndarray, df_resid: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """F = est' cov^-1 est / q with its upper-tail p from F(q, df_resid); NaN if singular."""
    q = est.shape[1]
    ok = np.isfinite(est).all(axis=1) & (df_resid > 0)
    sol, ok = batched_solve(cov, est, ok)
    f_stat = np.einsum("mi,mi->m", np.nan_to_num(est), np.nan_to_num(sol)) / q
    f_stat = np.where(ok, f_stat, np.nan)
    return f_stat, stats.f.sf(f_stat, q, np.where(ok, df_resid, 1.0))


def forbidden_cue_decomposition(
    all_rows: Moments, fits: LensFits, cue: str
) -> ForbiddenCueDecomposition:
    """Split each window's disparity on forbidden ``cue`` into direct and per-proxy parts.

    ``all_rows`` holds the moments of ``z = (x_1 .. x_k, Ys)`` for the same m windows and
    column order as ``fits``.  With F the cue's columns and P the others:
    disparity = slope of Ys on F alone, direct = b_F of the full judge model, and
    indirect = disparity - direct = sum_k b_k delta_k, delta_k the slope of x_k on F alone
    (the omitted-variable identity, exact for OLS).

    ``indirect_se`` is the unconditional (first-order delta-method) standard error of the
    product b_P' delta: Var = delta' V_PP delta + b_P' Var(delta) b_P, where Var(delta) =
    Sigma_P|F (x) S_FF^-1 comes from the regression of the proxies on F in the same
    moments (Sobel 1982, Sociological Methodology; MacKinnon, Lockwood, Hoffman, West &
    Sheets 2002, Psychological Methods 7(1), who compare it with other tests of an
    indirect effect).  Treating delta as fixed (the first term alone) asks whether the
    indirect part is zero *in this sample*, which it almost never is: on a cue with no
    proxy path in the population it rejected in most windows.  ``proxy_part_se`` is the
    same for each proxy's part b_p delta_p.  p-values and intervals use the t
    distribution with the judge model's residual degrees of freedom, as the weights do.
    A constant proxy contributes 0.
    Raises ValueError only for a cue that has no column (a configuration bug).
    """
    names = tuple(fits.names)
    f_idx = cue_columns(names, cue)
    if not f_idx:
        raise ValueError(f"cue {cue!r} has no design column among {names}")
    p_idx = [j for j in range(len(names)) if j not in f_idx]
    k = len(names)
    m_all = all_rows.comoment
    s_ff = m_all[:, f_idx][:, :, f_idx]
    s_fy = m_all[:, f_idx, k]
    s_fp = m_all[:, f_idx][:, :, p_idx]
    var_y = m_all[:, k, k]
    var_f = np.diagonal(s_ff, axis1=1, axis2=2)
    var_p = m_all[:, p_idx, p_idx]

    reason = judge_reasons(fits)
    fitted = reason == ""
    f_est = np.asarray(fits.estimable)[:, f_idx].all(axis=1)
    cue_why = np.asarray(fits.cue_reason, dtype=object)[:, f_idx[0]]
    bad_f = fitted & ~f_est
    reason[bad_f] = [f"forbidden cue not estimable: {r or 'unknown'}" for r in cue_why[bad_f]]

    # A proxy the fit could not estimate is harmless only if it is constant (delta = 0);
    # otherwise the partial weights are not identified and neither is the split.
    p_est = np.asarray(fits.estimable)[:, p_idx]
    p_const = is_constant(var_p, all_rows.n[:, None], all_rows.mean[:, p_idx])
    bad_p = fitted & f_est & (~p_est & ~p_const).any(axis=1)
    reason[bad_p] = "a permitted cue is not estimable (collinear), split not identified"
    ok = reason == ""
    bad_y = ok & is_constant(var_y, all_rows.n, all_rows.mean[:, k])
    reason[bad_y] = "constant judgment"
    ok = reason == ""

    disparity, ok_solve = batched_solve(s_ff, s_fy, ok)
    delta, _ = batched_solve(s_ff, s_fp, ok_solve)
    reason[ok & ~ok_solve] = "forbidden cue columns collinear in window"
    ok = ok_solve
    nan_m = np.where(ok, 1.0, np.nan)
    col = nan_m[:, None]

    weights = np.asarray(fits.weights, dtype=float)
    b_f = weights[:, f_idx] * col
    b_p = np.where(p_const, 0.0, weights[:, p_idx])
    delta = np.where(p_const[:, None, :], 0.0, delta)
    parts = delta * b_p[:, None, :]
    indirect = disparity - b_f

    cov = np.asarray(fits.cov, dtype=float)
    v_pp = np.nan_to_num(cov[:, p_idx][:, :, p_idx])
    d0, bp0 = np.nan_to_num(delta), np.nan_to_num(b_p)
    # Sampling error of the judge weights, the proxies' imbalance held at its estimate ...
    ind_cov = np.einsum("mfp,mpq,mgq->mfg", d0, v_pp, d0)
    # ... plus the sampling error of the imbalance itself: Var(delta) = Sigma_P|F (x)
    # S_FF^-1, Sigma_P|F the residual covariance of the proxies given F.
    n_f = len(f_idx)
    dof_delta = np.where(ok, all_rows.n - n_f - 1.0, np.nan)
    s_pp = np.nan_to_num(m_all[:, p_idx][:, :, p_idx])
    resid_pp = (s_pp - np.einsum("mfp,mfq->mpq", np.nan_to_num(s_fp), d0)) / np.where(
        dof_delta > 0, dof_delta, np.nan
    )[:, None, None]
    s_ff_inv, _ = batched_solve(s_ff, np.broadcast_to(np.eye(n_f), s_ff.shape).copy(), ok)
    spread = np.einsum("mp,mpq,mq->m", bp0, np.nan_to_num(resid_pp), bp0)
    ind_cov = ind_cov + spread[:, None, None] * np.nan_to_num(s_ff_inv)
    ind_se = np.sqrt(np.diagonal(ind_cov, axis1=1, axis2=2)) * col
    part_var = (
        d0**2 * np.diagonal(v_pp, axis1=1, axis2=2)[:, None, :]
        + (bp0**2 * np.nan_to_num(np.diagonal(resid_pp, axis1=1, axis2=2)))[:, None, :]
        * np.nan_to_num(np.diagonal(s_ff_inv, axis1=1, axis2=2))[:, :, None]
    )
    part_se = np.sqrt(part_var) * col[:, :, None]
    df = np.asarray(fits.df_resid, dtype=float)
    df_safe = np.where(df > 0, df, np.nan)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        ind_p = t_two_sided_p(indirect / ind_se, df_safe)
        ind_half = t_half_width(ind_se, df_safe, 0.05)
        to_std = np.sqrt(var_f / np.where(var_y > 0, var_y, np.nan)[:, None])

    with np.errstate(divide="ignore", invalid="ignore"):
        y_scale = np.where(var_y > 0, var_y, np.nan)
        cue_direct = np.sqrt(np.einsum("mf,mfg,mg->m", b_f, s_ff, b_f) / y_scale)
        cue_indirect = np.sqrt(np.einsum("mf,mfg,mg->m", indirect, s_ff, indirect) / y_scale)
    v_ff = cov[:, f_idx][:, :, f_idx]
    joint_f, joint_p = _wald_f(b_f, v_ff, np.where(ok, df, 0.0))
    ind_joint_f, ind_joint_p = _wald_f(indirect, ind_cov, np.where(ok, df, 0.0))
    # No proxy path at all (no permitted cue varies with f): nothing to find, p = 1
    # rather than 0/0.
    no_path = ok & (np.abs(ind_cov) == 0).all(axis=(1, 2))
    ind_p = np.where(no_path[:, None], 1.0, ind_p)
    ind_joint_p = np.where(no_path, 1.0, ind_joint_p)
    return ForbiddenCueDecomposition(
        cue=cue,
        columns=tuple(names[j] for j in f_idx),
        proxies=tuple(names[j] for j in p_idx),
        n=np.asarray(all_rows.n, dtype=float),
        df_resid=df,
        disparity=disparity,
        direct=b_f,
        direct_se=np.asarray(fits.std_errors)[:, f_idx] * col,
        direct_ci_low=np.asarray(fits.ci_low)[:, f_idx] * col,
        direct_ci_high=np.asarray(fits.ci_high)[:, f_idx] * col,
        direct_p=np.asarray(fits.p_values)[:, f_idx] * col,
        indirect=indirect,
        indirect_se=ind_se,
        indirect_p=ind_p,
        indirect_ci_low=indirect - ind_half,
        indirect_ci_high=indirect + ind_half,
        proxy_parts=parts,
        proxy_part_se=part_se,
        std_disparity=disparity * to_std,
        std_direct=np.asarray(fits.std_weights)[:, f_idx] * col,
        std_indirect=indirect * to_std,
        std_proxy_parts=parts * to_std[:, :, None],
        cue_direct_size=cue_direct,
        cue_indirect_size=cue_indirect,
        std_scale=to_std,
        joint_F=joint_f,
        joint_p=joint_p,
        indirect_joint_F=ind_joint_f,
        indirect_joint_p=ind_joint_p,
        reason=reason,
    )


def bh_qvalues(p_values: np.ndarray, groups: np.ndarray | None = None) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (q-values), one family per ``groups`` label.

    Any shape; NaN p-values stay NaN and do not count towards a family's size.  Without
    ``groups`` all finite entries form one family.  q_(i) = min_{j >= i} min(1, p_(j) m / j).
    """
    p = np.asarray(p_values, dtype=float)
    flat = p.ravel()
    labels = np.zeros(p.shape, dtype=int) if groups is None else np.asarray(groups)
    _, g = np.unique(np.broadcast_to(labels, p.shape).ravel(), return_inverse=True)
    live = np.flatnonzero(np.isfinite(flat))
    q = np.full(flat.shape, np.nan)
    if live.size == 0:
        return q.reshape(p.shape)
    pl, gl = flat[live], g[live]
    order = np.lexsort((pl, gl))
    ps, gs = pl[order], gl[order]
    starts = np.flatnonzero(np.r_[True, gs[1:] != gs[:-1]])
    sizes = np.diff(np.r_[starts, gs.size])
    rank = np.arange(gs.size) - np.repeat(starts, sizes) + 1
    raw = np.minimum(1.0, ps * np.repeat(sizes, sizes) / rank)
    # The running minimum from the end, family by family: no arithmetic on the values,
    # so a q-value keeps every digit of its p (a shared offset lost those below ~1e-13).
    qs = np.concatenate(
        [np.minimum.accumulate(part[::-1])[::-1] for part in np.split(raw, starts[1:])]
    )
    q[live[order]] = qs
    return q.reshape(p.shape)


@dataclass(frozen=True)
class ForbiddenCueFlags:
    """Per-window verdict on one forbidden cue (all arrays (m,)).

    ``size`` is the standardised direct weight for a single column; for a categorical
    cue the reference-invariant ``cue_direct_size`` of the decomposition, with the level
    of the largest |weight| as detail (``size_column``).  ``p_value`` is the t test for a
    single column, the joint F test for a categorical cue (one verdict per cue); ``q_value`` is BH-adjusted within the evaluation's family.  The
    ``proxy_*`` fields are the same for the indirect part, in a family of their own.
    ``assessable`` is False where the decomposition gave a reason; such windows are never
    flagged.
    """

    cue: str
    size: np.ndarray
    size_column: np.ndarray
    p_value: np.ndarray
    q_value: np.ndarray
    flagged: np.ndarray
    proxy_size: np.ndarray
    proxy_p_value: np.ndarray
    proxy_q_value: np.ndarray
    proxy_flagged: np.ndarray
    assessable: np.ndarray


def _largest(values: np.ndarray, columns: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    safe = np.where(np.isfinite(values), np.abs(values), -1.0)
    at = safe.argmax(axis=1)
    return values[np.arange(len(values)), at], np.asarray(columns, dtype=object)[at]


def is_flagged(
    assessable: np.ndarray,
    size: np.ndarray,
    evidence: np.ndarray,
    *,
    tolerance: float,
    level: float,
) -> np.ndarray:
    """When a forbidden-cue figure is a finding: the window is assessable, the
    standardised size is material (|size| >= tolerance) and the evidence is strong
    enough (``evidence`` <= ``level``: the p-value against the calibrated control limit,
    or the BH q-value against the FDR level under the per-window rule).  The one rule
    used by assess (direct and proxy use) and by the audit pack."""
    with np.errstate(invalid="ignore"):
        return np.asarray(assessable, bool) & (np.abs(size) >= tolerance) & (evidence <= level)


def flag_forbidden(
    decompositions: Sequence[ForbiddenCueDecomposition],
    *,
    tolerance: float,
    fdr: float,
    family: np.ndarray | None = None,
    p_limit: float | None = None,
) -> list[ForbiddenCueFlags]:
    """Flag direct and proxy use of every forbidden cue over the same m windows.

    The BH family is every (window, cue) sharing a ``family`` label (an evaluation id per
    window; default: all m windows form one evaluation).  Direct use is flagged when
    |size| >= tolerance and q <= fdr.  A proxy finding needs |standardised indirect| >=
    tolerance and its own q <= fdr, its p from the unconditional (delta-method,
    Sobel) test of the indirect part (see ``forbidden_cue_decomposition``); its family is separate so that
    reporting proxies cannot dilute or inflate the direct findings.  With ``p_limit``
    (a calibrated control limit, ``monitor.stats.monitoring``) a window is flagged on
    its own p-value instead (p <= p_limit); the q-values are still reported.
    """
    if not decompositions:
        return []
    m = len(decompositions[0].n)
    labels = np.zeros(m, dtype=int) if family is None else np.asarray(family)
    groups = np.broadcast_to(labels, (len(decompositions), m))

    def evidence(single: list[np.ndarray], joint: list[np.ndarray]) -> np.ndarray:
        return np.stack(
            [s[:, 0] if s.shape[1] == 1 else j for s, j in zip(single, joint, strict=True)]
        )

    p = evidence([d.direct_p for d in decompositions], [d.joint_p for d in decompositions])
    pp = evidence(
        [d.indirect_p for d in decompositions], [d.indirect_joint_p for d in decompositions]
    )
    q, pq = bh_qvalues(p, groups), bh_qvalues(pp, groups)
    out = []
    for c, d in enumerate(decompositions):
        assessable = d.reason == ""
        size, column = _largest(d.std_direct, d.columns)
        psize, _ = _largest(d.std_indirect, d.columns)
        if len(d.columns) > 1:
            # A categorical cue: one reference-invariant size for the verdict; the
            # largest level stays the reported detail.
            size, psize = d.cue_direct_size, d.cue_indirect_size
        if p_limit is None:
            flagged = is_flagged(assessable, size, q[c], tolerance=tolerance, level=fdr)
            pflagged = is_flagged(assessable, psize, pq[c], tolerance=tolerance, level=fdr)
        else:
            flagged = is_flagged(assessable, size, p[c], tolerance=tolerance, level=p_limit)
            pflagged = is_flagged(assessable, psize, pp[c], tolerance=tolerance, level=p_limit)
        out.append(
            ForbiddenCueFlags(
                d.cue, size, column, p[c], q[c], flagged, psize, pp[c], pq[c], pflagged, assessable
            )
        )
    return out
