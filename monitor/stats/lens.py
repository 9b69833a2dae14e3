"""Lens-model maths as pure functions: numpy arrays in, numpy arrays out, no I/O.

Everything here works on *stacks* of windows so that all windows of all
decision-makers are solved in one vectorised call.

The per-window inputs are the sufficient statistics of ``monitor.stats.moments``
(``Moments``: count, mean, centred co-moment).

Contents: the batched fit from statistics (``fit_lens`` -> ``LensFits``, normal
equations in correlation form); the raw-row fallback for poorly conditioned windows
(``fit_lens_rows``, QR) and the stack helpers (``stack``, ``replace_rows``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields

import numpy as np

from monitor.stats.limits import (
    COLLINEAR_CONDITION,
    PIVOT_FLOOR,
    RAW_REFIT_CONDITION,
    is_constant,
    t_half_width,
    t_two_sided_p,
)
from monitor.stats.moments import Moments, moments_from_rows


@dataclass(frozen=True)
class LensFits:
    """A stack of ``m`` lens-model window fits over ``k`` design columns (cue dummies).

    Judge-model figures use all rows of a window; environment-model and lens-model
    equation figures use the outcome-linked rows, with the judge model refitted there
    (``R_s_linked``).  A figure that cannot be estimated is NaN and ``reason`` (per
    window) or ``cue_reason`` (per cue) says why; several reasons are joined by "; ".
    Intervals and p-values use the t distribution with ``df_resid = n - k_eff - 1``
    degrees of freedom, ``k_eff`` the number of estimable cues in the window.
    """

    names: tuple[str, ...]
    n: np.ndarray  # (m,) rows in the judge model
    n_linked: np.ndarray  # (m,) rows with a linked outcome
    intercept: np.ndarray  # (m,)
    weights: np.ndarray  # (m,k) judge-model weights b_s
    std_errors: np.ndarray  # (m,k)
    t_values: np.ndarray  # (m,k)
    p_values: np.ndarray  # (m,k) two-sided
    ci_low: np.ndarray  # (m,k)
    ci_high: np.ndarray  # (m,k)
    std_weights: np.ndarray  # (m,k) b * sd(x) / sd(Ys)
    utilization_r: np.ndarray  # (m,k) r(x_i, Ys), all rows
    R_s: np.ndarray  # (m,) consistency: multiple correlation of the judge model
    sigma: np.ndarray  # (m,) residual standard deviation of the judge model
    df_resid: np.ndarray  # (m,) n - k_eff - 1
    cov: np.ndarray  # (m,k,k) covariance of the weights; NaN rows/cols where not estimable
    env_weights: np.ndarray  # (m,k) environment-model weights b_e, linked rows
    env_std_errors: np.ndarray  # (m,k)
    validity_r: np.ndarray  # (m,k) ecological validity r(x_i, Ye), linked rows
    R_e: np.ndarray  # (m,) environmental predictability
    R_s_linked: np.ndarray  # (m,) judge model refitted on the linked rows
    r_a: np.ndarray  # (m,) achievement r(Ys, Ye)
    G: np.ndarray  # (m,) matching index
    C: np.ndarray  # (m,) unmodelled agreement r(e_s, e_e)
    model_of_judge_r: np.ndarray  # (m,) G * R_e
    estimable: np.ndarray  # (m,k) bool: the judge weight is estimated
    cue_reason: np.ndarray  # (m,k) object str, '' when estimable
    reason: np.ndarray  # (m,) object str, '' when every figure is estimated
    needs_raw_refit: np.ndarray  # (m,) bool: conditioning too poor for normal equations
    condition: np.ndarray  # (m,) condition number of the cue correlation matrix

    @property
    def size(self) -> int:
        return int(self.n.shape[0])

    def conf_int(self) -> np.ndarray:
        """(m, k, 2) array of [ci_low, ci_high]."""
        return np.stack([self.ci_low, self.ci_high], axis=-1)

    def take(self, index: np.ndarray | slice) -> LensFits:
        """The windows selected by ``index`` (an index array, boolean mask or slice;
        a bare integer would drop the window axis, so wrap it in a list)."""
        return LensFits(self.names, **{f: getattr(self, f)[index] for f in _ARRAY_FIELDS})


_ARRAY_FIELDS = tuple(f.name for f in fields(LensFits) if f.name != "names")

# The window figures of the lens model equation, named as everywhere else (the store's
# ``fits`` table, ``fits --json``, the audit pack, the dashboard).
LENS_FIGURES = ("R_s", "R_e", "r_a", "G", "C", "model_of_judge_r")
# The per-cue figures: their column name in ``cue_weights`` (and the pack) -> the
# ``LensFits`` field that holds them.
CUE_FIGURES = {
    "weight": "weights",
    "std_error": "std_errors",
    "t_value": "t_values",
    "p_value": "p_values",
    "ci_low": "ci_low",
    "ci_high": "ci_high",
    "std_weight": "std_weights",
    "utilization_r": "utilization_r",
    "validity_r": "validity_r",
    "env_weight": "env_weights",
    "estimable": "estimable",
}


def stack(fits: list[LensFits]) -> LensFits:
    """Concatenate fits over the same design columns into one stack, in order."""
    names = fits[0].names
    if any(f.names != names for f in fits):
        raise ValueError("cannot stack fits over different design columns")
    return LensFits(
        names, **{f: np.concatenate([getattr(x, f) for x in fits]) for f in _ARRAY_FIELDS}
    )


def replace_rows(fits: LensFits, index: np.ndarray, other: LensFits) -> LensFits:
    """A copy of ``fits`` with windows ``index`` replaced by the windows of ``other``."""
    if other.names != fits.names:
        raise ValueError("cannot replace with fits over different design columns")
    out = {}
    for f in _ARRAY_FIELDS:
        arr = getattr(fits, f).copy()
        arr[index] = getattr(other, f)
        out[f] = arr
    return LensFits(fits.names, **out)


@dataclass(frozen=True)
class _Ols:
    """OLS of q responses on the k cues for a stack of m windows (internal)."""

    coef: np.ndarray  # (m,k,q), 0 for cues left out
    inv_sxx: np.ndarray  # (m,k,k) inverse co-moment block of fitted cues, 0 elsewhere
    fitted_cross: np.ndarray  # (m,q,q) centred fitted-value cross products b' S b
    resid_cross: np.ndarray  # (m,q,q) residual cross products e' e
    condition: np.ndarray  # (m,)
    collinear: np.ndarray  # (m,) bool


def _diag(a: np.ndarray) -> np.ndarray:
    return np.diagonal(a, axis1=-2, axis2=-1)


def _constant(mom: Moments) -> np.ndarray:
    """(m, p) bool: variable has no spread beyond rounding (all of an empty set)."""
    return is_constant(_diag(mom.comoment), mom.n[:, None], mom.mean)


def _cholesky_inverse(corr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverses of a stack of unit-diagonal symmetric matrices, and which are singular.

    A Cholesky factorisation vectorised over the stack (a loop over the k columns, not
    over windows): LAPACK's batched routines pay a per-matrix call overhead that
    dominates for k ~ 10, and they raise for the whole stack if one matrix is
    singular.  Pivot j equals 1 - R^2 of cue j on the cues before it; below
    PIVOT_FLOOR the condition number exceeds 1/PIVOT_FLOOR > COLLINEAR_CONDITION, so
    the window is flagged singular (and given a unit pivot to keep the stack finite).
    """
    m, k, _ = corr.shape
    # Windows on the last axis: each step is then a contiguous vector operation.
    c = np.ascontiguousarray(np.moveaxis(corr, 0, -1))
    low = np.zeros_like(c)
    singular = np.zeros(m, dtype=bool)
    for j in range(k):
        row = low[j, :j]
        piv = c[j, j] - (row * row).sum(axis=0)
        weak = ~(piv > PIVOT_FLOOR)
        singular |= weak
        low[j, j] = np.sqrt(np.where(weak, 1.0, piv))
        low[j + 1 :, j] = (c[j + 1 :, j] - (low[j + 1 :, :j] * row).sum(axis=1)) / low[j, j]
    low_inv = np.zeros_like(c)
    for j in range(k):  # forward substitution: row j of L^-1
        acc = -(low[j, :j, None] * low_inv[:j]).sum(axis=0)
        acc[j] += 1.0
        low_inv[j] = acc / low[j, j]
    low_inv = np.moveaxis(low_inv, -1, 0)
    return np.swapaxes(low_inv, 1, 2) @ low_inv, singular


def _condition(corr: np.ndarray, inv: np.ndarray) -> np.ndarray:
    """1-norm condition numbers ||R||_1 ||R^-1||_1 (within a factor k of the 2-norm one)."""
    return np.abs(corr).sum(axis=-2).max(axis=-1) * np.abs(inv).sum(axis=-2).max(axis=-1)


def _solve_moments(mom: Moments, k: int, ok: np.ndarray) -> _Ols:
    """Normal equations in correlation form (cues scaled to unit co-moment diagonal).

    Cues with ``ok`` False get an identity row and column, so their weight is 0 and the
    other cues are fitted as if they were absent.  Collinear windows are flagged; their
    numbers are meaningless and the caller masks them.
    """
    m = mom.size
    sxx, sxy, syy = mom.comoment[:, :k, :k], mom.comoment[:, :k, k:], mom.comoment[:, k:, k:]
    d = np.sqrt(np.where(ok, _diag(sxx), 1.0))
    both = ok[:, :, None] & ok[:, None, :]
    eye = np.broadcast_to(np.eye(k), (m, k, k))
    corr = np.where(both, sxx / (d[:, :, None] * d[:, None, :]), eye)
    corr_inv, singular = _cholesky_inverse(corr)
    with np.errstate(over="ignore", invalid="ignore"):
        condition = np.where(singular, np.inf, _condition(corr, corr_inv))
    collinear = ~(condition <= COLLINEAR_CONDITION)
    rhs = np.where(ok[:, :, None], sxy / d[:, :, None], 0.0)
    coef = (corr_inv @ rhs) / d[:, :, None]
    inv = np.where(both, corr_inv / (d[:, :, None] * d[:, None, :]), 0.0)
    b_sxx = np.swapaxes(coef, 1, 2) @ sxx
    fitted = b_sxx @ coef
    b_sxy = np.swapaxes(coef, 1, 2) @ sxy
    resid = syy - b_sxy - np.swapaxes(b_sxy, 1, 2) + fitted
    return _Ols(coef, inv, fitted, resid, condition, collinear)


def _solve_rows(x: np.ndarray, y: np.ndarray, ok: np.ndarray) -> _Ols:
    """Householder QR on centred, column-scaled rows; one window (m = 1).

    x: (n, k) cues, y: (n, q) responses, ok: (k,) cues to fit; needs n > ok.sum().
    """
    from scipy.linalg import solve_triangular  # heavy import, only for refits

    k, q = x.shape[1], y.shape[1]
    xc, yc = x - x.mean(axis=0), y - y.mean(axis=0)
    cols = np.flatnonzero(ok)
    d = np.sqrt(np.einsum("ij,ij->j", xc[:, cols], xc[:, cols]))
    q_mat, r_mat = np.linalg.qr(xc[:, cols] / d)
    coef, inv = np.zeros((k, q)), np.zeros((k, k))
    diag_r = np.abs(np.diag(r_mat))
    collinear = not diag_r.min() > np.sqrt(PIVOT_FLOOR) * diag_r.max()
    condition = np.inf
    if not collinear:
        r_inv = solve_triangular(r_mat, np.eye(cols.size))
        corr_inv = r_inv @ r_inv.T
        condition = float(_condition(r_mat.T @ r_mat, corr_inv))
        collinear = not condition <= COLLINEAR_CONDITION
    if not collinear:
        coef[cols] = solve_triangular(r_mat, q_mat.T @ yc) / d[:, None]
        inv[np.ix_(cols, cols)] = corr_inv / np.outer(d, d)
    fitted = xc @ coef
    resid = yc - fitted
    return _Ols(
        coef[None],
        inv[None],
        (fitted.T @ fitted)[None],
        (resid.T @ resid)[None],
        np.array([condition]),
        np.array([collinear]),
    )


def _t_figures(b, se, df, alpha):
    """t values, two-sided p-values and interval bounds; df broadcast over cues."""
    dfc = np.where(df > 0, df, np.nan)[:, None]
    t = b / se
    p = t_two_sided_p(t, dfc)
    half = t_half_width(se, dfc, alpha)
    return t, p, b - half, b + half


def _join(reason: np.ndarray, mask: np.ndarray, text) -> None:
    """Append ``text`` (a str, or an object array aligned with mask's True entries)."""
    if not mask.any():
        return
    old = reason[mask]
    sep = np.full(old.shape, "; ", dtype=object)
    sep[old == ""] = ""
    reason[mask] = old + sep + text


def _few_text(label: str, n: np.ndarray, need: np.ndarray) -> np.ndarray:
    return np.array(
        [f"too few {label}={int(a)} < {int(b)}" for a, b in zip(n, need, strict=True)], object
    )


def _judge_figures(mom: Moments, ols: _Ols, ok, need, alpha):
    """Judge-model figures on all rows; returns (dict of fields, masks)."""
    k = ok.shape[1]
    n, syy = mom.n, mom.comoment[:, k, k]
    var_x = _diag(mom.comoment)[:, :k]
    too_few = n < need
    y_const = _constant(mom)[:, k]
    # A constant judgment has nothing to explain: its weights are not zero-with-SE-zero,
    # they are not estimable.
    bad = too_few | ols.collinear | y_const
    fitted = ok & ~bad[:, None]
    df = n - ok.sum(axis=1) - 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        sse = np.maximum(ols.resid_cross[:, 0, 0], 0.0)
        sigma2 = np.where(df > 0, sse / np.where(df > 0, df, 1.0), np.nan)
        b = np.where(fitted, ols.coef[:, :, 0], np.nan)
        cov = np.where(fitted[:, :, None] & fitted[:, None, :], ols.inv_sxx, np.nan)
        cov = cov * sigma2[:, None, None]
        se = np.sqrt(_diag(cov))
        t, p, lo, hi = _t_figures(b, se, df, alpha)
        r_ok = ok & ~(too_few | y_const)[:, None]
        util = np.where(r_ok, mom.comoment[:, :k, k] / np.sqrt(var_x * syy[:, None]), np.nan)
        std_w = np.where(y_const[:, None], np.nan, b * np.sqrt(var_x / syy[:, None]))
        r_s = np.sqrt(np.clip(1.0 - sse / syy, 0.0, 1.0))
    r_s = np.where(bad | y_const, np.nan, r_s)
    intercept = mom.mean[:, k] - np.einsum("mk,mk->m", np.where(ok, b, 0.0), mom.mean[:, :k])
    out = dict(
        n=n,
        intercept=intercept,
        weights=b,
        std_errors=se,
        t_values=t,
        p_values=p,
        ci_low=lo,
        ci_high=hi,
        std_weights=std_w,
        utilization_r=util,
        R_s=r_s,
        sigma=np.where(bad, np.nan, np.sqrt(sigma2)),
        df_resid=df,
        cov=cov,
        estimable=fitted,
        condition=ols.condition,
    )
    return out, too_few, y_const


def _linked_figures(mom: Moments, ols: _Ols, ok, need):
    """Environment model, refitted judge model and lens model equation, linked rows."""
    k = ok.shape[1]
    n = mom.n
    few = n < need
    const = _constant(mom)
    s_const, e_const = const[:, k], const[:, k + 1]
    bad = few | ols.collinear
    any_const = s_const | e_const
    s = mom.comoment
    sss, see, sse_ = s[:, k, k], s[:, k + 1, k + 1], s[:, k, k + 1]
    var_x = _diag(s)[:, :k]
    fit_ok = ok & ~bad[:, None]
    df = n - ok.sum(axis=1) - 1.0
    res, fit = ols.resid_cross, ols.fitted_cross
    with np.errstate(divide="ignore", invalid="ignore"):
        res_s, res_e = np.maximum(res[:, 0, 0], 0.0), np.maximum(res[:, 1, 1], 0.0)
        env_se = np.sqrt(res_e / df)[:, None] * np.sqrt(_diag(ols.inv_sxx))
        r_ok = ok & ~(few | e_const)[:, None]
        validity = np.where(r_ok, s[:, :k, k + 1] / np.sqrt(var_x * see[:, None]), np.nan)
        r_e = np.sqrt(np.clip(1.0 - res_e / see, 0.0, 1.0))
        r_sl = np.sqrt(np.clip(1.0 - res_s / sss, 0.0, 1.0))
        r_a = sse_ / np.sqrt(sss * see)
        g = fit[:, 0, 1] / np.sqrt(fit[:, 0, 0] * fit[:, 1, 1])
        c = res[:, 0, 1] / np.sqrt(res_s * res_e)
    no_lme = bad | any_const
    out = dict(
        n_linked=n,
        env_weights=np.where(fit_ok, ols.coef[:, :, 1], np.nan),
        env_std_errors=np.where(fit_ok, env_se, np.nan),
        validity_r=validity,
        R_e=np.where(bad | e_const, np.nan, r_e),
        R_s_linked=np.where(bad | s_const, np.nan, r_sl),
        r_a=np.where(few | any_const, np.nan, r_a),
        G=np.where(no_lme, np.nan, g),
        C=np.where(no_lme, np.nan, c),
    )
    out["model_of_judge_r"] = out["G"] * out["R_e"]
    return out, few, s_const, e_const


def _assemble(names, all_rows, linked, judge, pair, ok, ok_l, min_rows, alpha, cond_limit):
    m, k = all_rows.size, len(names)
    need = np.maximum(float(min_rows), ok.sum(axis=1) + 2.0)
    out, too_few, y_const = _judge_figures(all_rows, judge, ok, need, alpha)
    reason = np.full(m, "", dtype=object)
    _join(reason, too_few, _few_text("rows: n", all_rows.n[too_few], need[too_few]))
    collinear = judge.collinear & ~too_few
    _join(reason, collinear, "cues perfectly collinear")
    _join(reason, y_const & ~too_few, "judgment constant in window")
    cue_reason = np.full((m, k), "", dtype=object)
    cue_reason[~ok] = "constant in window"
    cue_reason[collinear] = np.where(
        ok[collinear], "cues perfectly collinear", "constant in window"
    )
    cue_reason[y_const & ~too_few] = "judgment constant in window"
    cue_reason[too_few] = "too few rows"
    refit = ~too_few & ~judge.collinear & (judge.condition > cond_limit)
    if linked is None:
        nan_mk, nan_m = np.full((m, k), np.nan), np.full(m, np.nan)
        out.update(n_linked=np.zeros(m), env_weights=nan_mk, env_std_errors=nan_mk)
        out.update(validity_r=nan_mk, R_e=nan_m, R_s_linked=nan_m, r_a=nan_m, G=nan_m, C=nan_m)
        out.update(model_of_judge_r=nan_m)
        _join(reason, np.ones(m, bool), "no linked outcomes")
    else:
        need_l = np.maximum(float(min_rows), ok_l.sum(axis=1) + 2.0)
        lk, few, s_const, e_const = _linked_figures(linked, pair, ok_l, need_l)
        out.update(lk)
        nl = linked.n
        _join(reason, nl == 0, "no linked outcomes")
        few_some = few & (nl > 0)
        _join(reason, few_some, _few_text("linked rows: n_linked", nl[few_some], need_l[few_some]))
        _join(
            reason,
            pair.collinear & ~few & ~judge.collinear,
            "cues perfectly collinear in linked rows",
        )
        _join(reason, e_const & ~few, "criterion constant in linked rows")
        _join(reason, s_const & ~y_const & ~few, "judgment constant in linked rows")
        refit |= ~few & ~pair.collinear & (pair.condition > cond_limit)
    return LensFits(
        tuple(names),
        cue_reason=cue_reason,
        reason=reason,
        needs_raw_refit=refit,
        **out,
    )


def _check_shapes(all_rows: Moments, linked: Moments | None, k: int) -> None:
    if all_rows.width != k + 1:
        raise ValueError(f"all_rows must have k+1={k + 1} variables, got {all_rows.width}")
    if linked is not None and (linked.width != k + 2 or linked.size != all_rows.size):
        raise ValueError(f"linked must have {all_rows.size} sets of k+2={k + 2} variables")


def fit_lens(
    all_rows: Moments,
    linked: Moments | None,
    names: Sequence[str],
    *,
    min_rows: int = 0,
    alpha: float = 0.05,
    cond_limit: float = RAW_REFIT_CONDITION,
) -> LensFits:
    """Lens-model fits of m windows at once from their sufficient statistics.

    all_rows: moments over (x_1..x_k, Ys) of every row of each window;
    linked:   moments over (x_1..x_k, Ys, Ye) of the outcome-linked rows, or None.
    A window with fewer than max(min_rows, k_eff + 2) rows, a constant cue, judgment
    or criterion, or collinear cues gives NaN figures and a reason; nothing raises.
    Windows whose cue correlation matrix has a condition number above ``cond_limit``
    (but below COLLINEAR_CONDITION) are filled from the normal equations and flagged
    ``needs_raw_refit`` so the caller can refit them with ``fit_lens_rows``.
    """
    k = len(names)
    _check_shapes(all_rows, linked, k)
    ok = ~_constant(all_rows)[:, :k]
    judge = _solve_moments(all_rows, k, ok)
    ok_l = pair = None
    if linked is not None:
        ok_l = ~_constant(linked)[:, :k]
        pair = _solve_moments(linked, k, ok_l)
    return _assemble(names, all_rows, linked, judge, pair, ok, ok_l, min_rows, alpha, cond_limit)


def fit_lens_rows(
    x: np.ndarray,
    ys: np.ndarray,
    ye: np.ndarray | None,
    names: Sequence[str],
    *,
    min_rows: int = 0,
    alpha: float = 0.05,
) -> LensFits:
    """The lens-model fit of one window (m = 1) from its raw rows, by QR.

    x: (n, k) cues, ys: (n,) judgments, ye: (n,) criterion with NaN where no outcome is
    linked, or None.  Same fields and reasons as ``fit_lens``; ``needs_raw_refit`` False.
    """
    x = np.asarray(x, dtype=float).reshape(len(ys), len(names))
    ys = np.asarray(ys, dtype=float)
    k = len(names)
    all_rows = moments_from_rows(np.column_stack([x, ys]))
    ok = ~_constant(all_rows)[:, :k]
    judge = _rows_or_moments(x, ys[:, None], all_rows, ok)
    linked = ok_l = pair = None
    if ye is not None:
        ye = np.asarray(ye, dtype=float)
        keep = np.isfinite(ye)
        z = np.column_stack([x[keep], ys[keep], ye[keep]])
        linked = moments_from_rows(z)
        ok_l = ~_constant(linked)[:, :k]
        pair = _rows_or_moments(z[:, :k], z[:, k:], linked, ok_l)
    return _assemble(names, all_rows, linked, judge, pair, ok, ok_l, min_rows, alpha, np.inf)


def _rows_or_moments(x, y, mom, ok) -> _Ols:
    # QR needs more rows than fitted cues; below that the window is reported as too few
    # rows anyway, and with no cue to fit there is nothing to condition.
    k_eff = int(ok.sum())
    if k_eff == 0 or x.shape[0] <= k_eff + 1:
        return _solve_moments(mom, x.shape[1], ok)
    return _solve_rows(x, y, ok[0])


def fit_lens_or_rows(
    all_rows: Moments,
    linked: Moments | None,
    names: Sequence[str],
    *,
    min_rows: int,
    rows_of: Callable[[int], tuple[np.ndarray, np.ndarray, np.ndarray]] | None,
    lost_precision: np.ndarray | None = None,
) -> tuple[LensFits, np.ndarray]:
    """``fit_lens``, then every window it flags ``needs_raw_refit``, and every window
    whose statistics the caller found to have lost precision (``lost_precision``, (m,)
    bool: e.g. cancellation in shifted sums), refitted from its raw rows by QR
    (``fit_lens_rows``); ``rows_of(i)`` returns window i's (x, ys, ye).

    The one fallback rule of the refit stage and the audit pack.  Returns the fits and
    the indices of the windows refitted from rows (none when ``rows_of`` is None)."""
    fits = fit_lens(all_rows, linked, names, min_rows=min_rows)
    redo_mask = fits.needs_raw_refit
    if lost_precision is not None:
        redo_mask = redo_mask | np.asarray(lost_precision, dtype=bool)
    redo = np.flatnonzero(redo_mask)
    if not len(redo) or rows_of is None:
        return fits, redo[:0]
    refits = [fit_lens_rows(*rows_of(int(i)), names, min_rows=min_rows) for i in redo]
    return replace_rows(fits, redo, stack(refits)), redo
