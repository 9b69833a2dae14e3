"""Policy checks against independent computations (statsmodels, scipy, pandas).

The judge fits fed to ``monitor.stats.policy`` here come from statsmodels OLS run window by
window on the raw rows, so the policy maths is checked without trusting monitor.stats.lens.
"""

from __future__ import annotations

import warnings
from types import SimpleNamespace

import hypothesis.strategies as st
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.stats.design import cue_columns
from monitor.stats.episodes import Episode, episodes, window_states
from monitor.stats.moments import moments_from_rows
from monitor.stats.policy import bh_qvalues, flag_forbidden, forbidden_cue_decomposition
from monitor.stats.trends import (
    achievement_floor,
    below_floor,
    consistency_floor,
    cue_drift,
    weight_drift,
)

NUMERIC = ["amount", "gender", "delay", "witness"]  # "gender" sits mid-design on purpose
CATEGORICAL = ["amount", "region=north", "region=west", "delay", "witness"]


def _rows(rng, n, *, direct=0.0, kind="numeric", proxy=1.0, link=1.0, noise=1.0):
    """One window of rows: the forbidden cue F, proxies correlated with it, Ys."""
    if kind == "categorical":
        level = rng.integers(0, 3, size=n)
        fcols = np.column_stack([level == 1, level == 2]).astype(float)
        f_signal = fcols @ np.array([1.0, -0.7])
    else:
        f = rng.integers(0, 2, size=n).astype(float) if kind == "binary" else rng.normal(size=n)
        fcols, f_signal = f[:, None], f
    amount = 0.6 * link * f_signal + rng.normal(size=n)
    delay = 0.4 * link * f_signal + rng.normal(size=n)
    witness = rng.integers(0, 2, size=n).astype(float)
    y = 3 + proxy * amount - 0.5 * delay + 0.3 * witness + direct * f_signal
    y = y + noise * rng.normal(size=n)
    x = np.column_stack([amount, fcols, delay, witness])
    return x, y


def _sm_fits(windows, names, alpha=0.05):
    """Judge fits in the LensFits layout, each window fitted by statsmodels OLS.

    A constant column is left out of that window's fit and marked not estimable, as the
    design asks of monitor.stats.lens; a window with n <= k + 1 gets a reason.
    """
    m, k = len(windows), len(names)
    out = {f: np.full((m, k), np.nan) for f in ("weights", "std_errors", "t_values")}
    out |= {f: np.full((m, k), np.nan) for f in ("p_values", "ci_low", "ci_high", "std_weights")}
    cov = np.full((m, k, k), np.nan)
    estimable = np.zeros((m, k), dtype=bool)
    cue_reason = np.full((m, k), "", dtype=object)
    reason = np.full(m, "", dtype=object)
    df_resid, sigma, n, r_s = (np.full(m, np.nan) for _ in range(4))
    for w, (x, y) in enumerate(windows):
        n[w] = len(y)
        use = x.std(axis=0) > 0
        cue_reason[w, ~use] = "constant in window"
        if len(y) <= use.sum() + 1:
            reason[w] = "too few rows"
            continue
        with np.errstate(divide="ignore", invalid="ignore"):  # constant Ys: R_s undefined
            res = sm.OLS(y, sm.add_constant(x[:, use], has_constant="add")).fit()
            r_s[w] = np.sqrt(res.rsquared)
        estimable[w] = use
        out["weights"][w, use] = res.params[1:]
        out["std_errors"][w, use] = res.bse[1:]
        out["t_values"][w, use] = res.tvalues[1:]
        out["p_values"][w, use] = res.pvalues[1:]
        ci = res.conf_int(alpha)[1:]
        out["ci_low"][w, use], out["ci_high"][w, use] = ci[:, 0], ci[:, 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            sd_ratio = x[:, use].std(ddof=1, axis=0) / y.std(ddof=1)
        out["std_weights"][w, use] = res.params[1:] * sd_ratio
        cov[w][np.ix_(use, use)] = res.cov_params()[1:, 1:]
        df_resid[w], sigma[w] = res.df_resid, np.sqrt(res.scale)
    return SimpleNamespace(
        names=tuple(names), n=n, cov=cov, estimable=estimable, cue_reason=cue_reason,
        reason=reason, df_resid=df_resid, sigma=sigma, R_s=r_s, **out,
    )  # fmt: skip


def _moments(windows):
    parts = [moments_from_rows(np.column_stack([x, y])) for x, y in windows]
    from monitor.stats.moments import Moments

    return Moments(
        *(np.concatenate([getattr(p, a) for p in parts]) for a in ("n", "mean", "comoment"))
    )


def _decompose(windows, names, cue):
    return forbidden_cue_decomposition(_moments(windows), _sm_fits(windows, names), cue)


# --- forbidden-cue decomposition --------------------------------------------------------


@pytest.mark.parametrize("kind", ["numeric", "binary"])
def test_decomposition_matches_three_statsmodels_regressions(kind):
    rng = np.random.default_rng(1)
    windows = [_rows(rng, n, direct=d, kind=kind) for n, d in [(60, 0.0), (150, 0.8), (400, -0.3)]]
    dec = _decompose(windows, NUMERIC, "gender")
    assert dec.columns == ("gender",) and dec.proxies == ("amount", "delay", "witness")
    for w, (x, y) in enumerate(windows):
        f, p = x[:, [1]], x[:, [0, 2, 3]]
        # Source: statsmodels OLS of Ys on F alone (disparity), on all cues (direct), and
        # of each proxy on F alone (delta); indirect per proxy = b_k * delta_k.
        zero_order = sm.OLS(y, sm.add_constant(f)).fit()
        full = sm.OLS(y, sm.add_constant(x)).fit()
        deltas = np.array([sm.OLS(p[:, j], sm.add_constant(f)).fit().params[1] for j in range(3)])
        np.testing.assert_allclose(dec.disparity[w, 0], zero_order.params[1], rtol=1e-9)
        np.testing.assert_allclose(dec.direct[w, 0], full.params[2], rtol=1e-9)
        np.testing.assert_allclose(dec.direct_se[w, 0], full.bse[2], rtol=1e-9)
        np.testing.assert_allclose(dec.direct_p[w, 0], full.pvalues[2], rtol=1e-7, atol=1e-300)
        np.testing.assert_allclose(
            [dec.direct_ci_low[w, 0], dec.direct_ci_high[w, 0]], full.conf_int()[2], rtol=1e-9
        )
        np.testing.assert_allclose(
            dec.proxy_parts[w, 0], full.params[[1, 3, 4]] * deltas, rtol=1e-8, atol=1e-12
        )
        if kind == "binary":
            # Source: pandas group means; the zero-order slope on a 0/1 cue is their difference.
            means = pd.Series(y).groupby(f[:, 0]).mean()
            np.testing.assert_allclose(dec.disparity[w, 0], means[1.0] - means[0.0], rtol=1e-9)
        # Standardised scale sd(f)/sd(Ys): numpy sample sd (common practice definition).
        to_std = f[:, 0].std(ddof=1) / y.std(ddof=1)
        np.testing.assert_allclose(dec.std_disparity[w, 0], dec.disparity[w, 0] * to_std)
        np.testing.assert_allclose(dec.std_indirect[w, 0], dec.indirect[w, 0] * to_std)
        np.testing.assert_allclose(dec.std_direct[w, 0], full.params[2] * to_std, rtol=1e-9)
        # Single column: joint F is the squared t (textbook identity, common practice).
        np.testing.assert_allclose(dec.joint_F[w], full.tvalues[2] ** 2, rtol=1e-9)
    assert (dec.reason == "").all()


def test_categorical_cue_level_means_and_joint_wald_match_statsmodels():
    rng = np.random.default_rng(2)
    windows = [_rows(rng, n, direct=d, kind="categorical") for n, d in [(90, 0.0), (300, 0.5)]]
    dec = _decompose(windows, CATEGORICAL, "region")
    assert cue_columns(CATEGORICAL, "region") == [1, 2]
    assert dec.columns == ("region=north", "region=west")
    for w, (x, y) in enumerate(windows):
        # Source: pandas level means; dummy slopes alone = level mean - reference mean.
        level = x[:, 1] + 2 * x[:, 2]
        means = pd.Series(y).groupby(level).mean()
        np.testing.assert_allclose(dec.disparity[w], means[[1.0, 2.0]] - means[0.0], rtol=1e-9)
        # Source: statsmodels OLSResults.f_test of both dummy weights = 0.
        full = sm.OLS(y, sm.add_constant(x)).fit()
        test = full.f_test(np.eye(6)[[2, 3]])
        np.testing.assert_allclose(dec.joint_F[w], float(test.fvalue), rtol=1e-9)
        np.testing.assert_allclose(dec.joint_p[w], float(test.pvalue), rtol=1e-7)
        np.testing.assert_allclose(dec.direct[w], full.params[[2, 3]], rtol=1e-9)


@pytest.mark.parametrize("kind", ["numeric", "categorical"])
def test_omitted_variable_identity_is_exact(kind):
    rng = np.random.default_rng(3)
    names = CATEGORICAL if kind == "categorical" else NUMERIC
    cue = "region" if kind == "categorical" else "gender"
    windows = []
    for n in (50, 200, 1000):
        x, y = _rows(rng, n, direct=0.4, kind=kind)
        x[:, 0] += 1e4  # a large offset: the centred co-moments must still be exact
        windows.append((x, y))
    dec = _decompose(windows, names, cue)
    # Source: omitted-variable identity for OLS (disparity - direct = sum_k b_k delta_k).
    np.testing.assert_allclose(dec.proxy_parts.sum(axis=2), dec.indirect, rtol=0, atol=1e-10)
    np.testing.assert_allclose(dec.disparity - dec.direct, dec.indirect, rtol=0, atol=1e-10)


def test_indirect_standard_error_matches_difference_of_nested_fits():
    rng = np.random.default_rng(4)
    windows = [_rows(rng, n, direct=0.2) for n in (80, 500)]
    dec = _decompose(windows, NUMERIC, "gender")
    for w, (x, y) in enumerate(windows):
        # Source: statsmodels fits.  The part of the variance from the judge weights, the
        # proxies' imbalance held fixed: Var_full(b_f) - sigma_full^2 [(F'F)^-1]_ff, the
        # difference between a zero-order and a partial slope (Clogg, Petkova & Haritou
        # 1995, from memory).
        full = sm.OLS(y, sm.add_constant(x)).fit()
        reduced = sm.OLS(y, sm.add_constant(x[:, [1]])).fit()
        held = full.bse[2] ** 2 - full.scale * reduced.normalized_cov_params[1, 1]
        # The part from the imbalance itself (Sobel 1982): b_P' Var(delta) b_P with
        # Var(delta_p, delta_q) = cov(resid_p, resid_q) [(F'F)^-1]_ff, from statsmodels
        # regressions of each proxy on F alone.
        proxies = [0, 2, 3]
        fits = [sm.OLS(x[:, j], sm.add_constant(x[:, [1]])).fit() for j in proxies]
        resid = np.column_stack([f.resid for f in fits])
        sigma_pf = resid.T @ resid / fits[0].df_resid
        b_p = full.params[[1, 3, 4]]
        spread = b_p @ sigma_pf @ b_p * fits[0].normalized_cov_params[1, 1]
        np.testing.assert_allclose(dec.indirect_se[w, 0], np.sqrt(held + spread), rtol=1e-8)


def test_degenerate_windows_give_nan_and_reason_without_raising():
    rng = np.random.default_rng(5)
    good = _rows(rng, 100, direct=0.5)
    x_const_f, y_const_f = _rows(rng, 100)
    x_const_f[:, 1] = 2.0  # forbidden cue constant in this window
    x_const_p, y_const_p = _rows(rng, 100, direct=0.5)
    x_const_p[:, 3] = 1.0  # a proxy constant: contributes nothing, the rest still works
    tiny = _rows(rng, 4)
    flat = (good[0], np.full(100, 7.0))  # constant judgment
    windows = [good, (x_const_f, y_const_f), (x_const_p, y_const_p), tiny, flat]
    dec = _decompose(windows, NUMERIC, "gender")
    assert dec.reason[0] == "" and dec.reason[2] == ""
    assert "not estimable" in dec.reason[1] and "too few rows" in dec.reason[3]
    assert dec.reason[4] == "constant judgment"
    for w in (1, 3, 4):
        assert np.isnan(dec.disparity[w]).all() and np.isnan(dec.std_direct[w]).all()
        assert np.isnan(dec.joint_p[w]) and np.isnan(dec.proxy_parts[w]).all()
    assert dec.proxy_parts[2, 0, 2] == 0.0
    # Source: statsmodels OLS without the constant proxy.
    x, y = x_const_p[:, :3], y_const_p
    full = sm.OLS(y, sm.add_constant(x)).fit()
    zero = sm.OLS(y, sm.add_constant(x[:, [1]])).fit()
    np.testing.assert_allclose(dec.direct[2, 0], full.params[2], rtol=1e-9)
    np.testing.assert_allclose(dec.disparity[2, 0], zero.params[1], rtol=1e-9)
    # No permitted cue at all: no proxy path, the indirect part is nil with p = 1.
    alone = [(x[:, [1]], y) for x, y in windows[:1]]
    solo = _decompose(alone, ["gender"], "gender")
    assert solo.proxies == () and solo.indirect_p[0, 0] == 1.0
    np.testing.assert_allclose(solo.indirect[0], 0.0, atol=1e-12)
    with pytest.raises(ValueError, match="no design column"):
        _decompose([good], NUMERIC, "religion")


def _degenerate_set(rng):
    windows = [_rows(rng, n, direct=0.4, kind="numeric") for n in (30, 120)]
    x, y = _rows(rng, 80)
    windows.append((np.where(np.arange(4) == 1, 5.0, x), y))  # forbidden cue constant
    x, y = _rows(rng, 80, direct=0.4)
    windows.append((np.where(np.arange(4) == 3, 1.0, x), y))  # a proxy constant
    windows.append(_rows(rng, 4))  # too few rows
    return windows


def test_decomposition_from_monitor_lens_fits_agrees_with_statsmodels_fits():
    from monitor.stats.lens import fit_lens

    windows = _degenerate_set(np.random.default_rng(11))
    moments = _moments(windows)
    # The judge fit without outcomes: its window reason says so, the judge part is fine.
    fits = fit_lens(moments, None, NUMERIC, min_rows=10)
    ours = forbidden_cue_decomposition(moments, fits, "gender")
    # Source: the same decomposition fed by statsmodels OLS fits of each window.
    ref = _decompose(windows, NUMERIC, "gender")
    np.testing.assert_array_equal(ours.reason == "", [True, True, False, True, False])
    np.testing.assert_array_equal(ours.reason == "", ref.reason == "")
    for field in ("disparity", "direct", "direct_ci_low", "indirect", "indirect_se",
                  "std_indirect", "std_direct", "joint_p", "std_proxy_parts"):  # fmt: skip
        np.testing.assert_allclose(getattr(ours, field), getattr(ref, field), rtol=1e-8)
    drift = weight_drift(fits.take(slice(0, 4)), fits.take(slice(1, 5)))
    # Pairs (i, i + 1): both constant columns drop out of pair 2; pair 3 has no fit.
    np.testing.assert_array_equal(drift.joint_df, [4, 3, 2, 0])
    assert np.isnan(drift.joint_stat[3]) and "not fitted" in drift.reason[3]


# --- Benjamini-Hochberg ------------------------------------------------------------------


def test_bh_qvalues_match_statsmodels_per_family_with_nans_and_ties():
    rng = np.random.default_rng(6)
    p = rng.uniform(size=(3, 40)) ** 2
    p[0, :5] = 0.01  # ties
    p[1, 7] = p[2, 3] = np.nan
    groups = np.array([[0] * 40, [1] * 20 + [0] * 20, [2] * 40])
    q = bh_qvalues(p, groups)
    assert q.shape == p.shape
    assert np.isnan(q[1, 7]) and np.isnan(q[2, 3])
    for g in (0, 1, 2):
        live = (groups == g) & np.isfinite(p)
        # Source: statsmodels.stats.multitest.multipletests(method="fdr_bh").
        expected = multipletests(p[live], method="fdr_bh")[1]
        np.testing.assert_allclose(q[live], expected, rtol=1e-12)
    # One family when no groups are given.
    live = np.isfinite(p)
    np.testing.assert_allclose(bh_qvalues(p)[live], multipletests(p[live], method="fdr_bh")[1])
    assert np.isnan(bh_qvalues(np.array([np.nan, np.nan]))).all()


# --- flagging ----------------------------------------------------------------------------


def test_flags_need_size_and_evidence_and_separate_direct_from_proxy():
    rng = np.random.default_rng(7)
    windows = [_rows(rng, 400, direct=1.0, link=0.0)]  # direct use
    windows += [_rows(rng, 400, direct=0.0, proxy=3.0)]  # use through the proxy only
    windows += [_rows(rng, 400, direct=0.0, link=0.0) for _ in range(20)]
    windows += [_rows(rng, 40, direct=0.05, link=0.0)]  # small, not material
    dec = _decompose(windows, NUMERIC, "gender")
    (flags,) = flag_forbidden([dec], tolerance=0.10, fdr=0.05)
    assert flags.flagged[0] and not flags.proxy_flagged[0]
    assert flags.proxy_flagged[1] and not flags.flagged[1]
    assert not flags.flagged[2:].any()
    # Source: statsmodels multipletests over the direct p-values of this one evaluation.
    np.testing.assert_allclose(flags.q_value, multipletests(dec.direct_p[:, 0], method="fdr_bh")[1])
    np.testing.assert_allclose(flags.size, dec.std_direct[:, 0])
    # The same windows as two evaluations: q is adjusted within each.
    family = np.r_[np.zeros(11, int), np.ones(12, int)]
    (split,) = flag_forbidden([dec], tolerance=0.10, fdr=0.05, family=family)
    expected = multipletests(dec.direct_p[11:, 0], method="fdr_bh")[1]
    np.testing.assert_allclose(split.q_value[11:], expected)


def test_categorical_flag_uses_largest_level_and_joint_test():
    rng = np.random.default_rng(8)
    windows = [_rows(rng, 300, direct=0.6, kind="categorical") for _ in range(3)]
    windows.append(_rows(rng, 3, kind="categorical"))  # not assessable
    dec = _decompose(windows, CATEGORICAL, "region")
    (flags,) = flag_forbidden([dec], tolerance=0.10, fdr=0.05)
    big = np.argmax(np.abs(dec.std_direct[:3]), axis=1)
    np.testing.assert_array_equal(flags.size_column[:3], np.array(dec.columns)[big])
    np.testing.assert_allclose(flags.p_value[:3], dec.joint_p[:3])
    assert flags.flagged[:3].all()
    assert not flags.assessable[3] and not flags.flagged[3] and np.isnan(flags.q_value[3])
    assert window_states(flags.flagged, flags.assessable) == [True, True, True, None]


def _batch_fits(moments, names):
    """Vectorised OLS from co-moments (normal equations), for the large simulation only.

    Spot-checked against statsmodels in the simulation test below.
    """
    from scipy import stats

    k = len(names)
    s_xx, s_xy, s_yy = (
        moments.comoment[:, :k, :k],
        moments.comoment[:, :k, k],
        moments.comoment[:, k, k],
    )
    inv = np.linalg.inv(s_xx)
    b = np.einsum("mij,mj->mi", inv, s_xy)
    df = moments.n - k - 1
    sigma2 = (s_yy - np.einsum("mi,mi->m", b, s_xy)) / df
    cov = sigma2[:, None, None] * inv
    se = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    half = stats.t.ppf(0.975, df)[:, None] * se
    m = len(df)
    return SimpleNamespace(
        names=tuple(names), n=moments.n, weights=b, std_errors=se, cov=cov, df_resid=df,
        sigma=np.sqrt(sigma2),
        p_values=2 * stats.t.sf(np.abs(b / se), df[:, None]), ci_low=b - half, ci_high=b + half,
        std_weights=b * np.sqrt(np.diagonal(s_xx, axis1=1, axis2=2) / s_yy[:, None]),
        estimable=np.ones((m, k), bool), cue_reason=np.full((m, k), "", object),
        reason=np.full(m, "", object),
    )  # fmt: skip


def test_false_alarm_share_under_the_null_is_within_the_fdr_level():
    from monitor.stats.moments import Moments

    rng = np.random.default_rng(9)
    evaluations, dms, n, fdr = 1000, 25, 60, 0.05
    m = evaluations * dms
    gender = rng.normal(size=(m, n))
    witness = rng.integers(0, 2, size=(m, n)).astype(float)
    amount = 0.6 * gender + rng.normal(size=(m, n))
    delay = rng.normal(size=(m, n))
    y = 3 + amount - 0.5 * delay + rng.normal(size=(m, n))  # no forbidden-cue weight
    z = np.stack([amount, gender, delay, witness, y], axis=2)
    mean = z.mean(axis=1)
    d = z - mean[:, None, :]
    moments = Moments(np.full(m, float(n)), mean, np.einsum("mni,mnj->mij", d, d))
    fits = _batch_fits(moments, NUMERIC)
    # Anchor the helper: window 0 against statsmodels OLS.
    ref = _sm_fits([(z[0, :, :4], z[0, :, 4])], NUMERIC)
    np.testing.assert_allclose(fits.weights[0], ref.weights[0], rtol=1e-9)
    np.testing.assert_allclose(fits.p_values[0], ref.p_values[0], rtol=1e-7)
    decs = [forbidden_cue_decomposition(moments, fits, c) for c in ("gender", "witness")]
    family = np.repeat(np.arange(evaluations), dms)
    for tolerance in (0.0, 0.10):
        flags = flag_forbidden(decs, tolerance=tolerance, fdr=fdr, family=family)
        flagged = np.stack([f.flagged for f in flags])  # (cue, window)
        share = flagged.mean()
        # Every discovery is false here, so the false discovery proportion of an
        # evaluation is 1 if it flags anything; its mean estimates the FDR, which BH keeps
        # at or below fdr (Benjamini & Hochberg 1995).  Allow 2.5 binomial SEs of noise.
        fdp = flagged.reshape(2, evaluations, dms).any(axis=(0, 2)).mean()
        print(f"tolerance={tolerance}: flagged pair share={share:.4f}, mean FDP={fdp:.4f}")
        assert share <= fdr
        assert fdp <= fdr + 2.5 * np.sqrt(fdr * (1 - fdr) / evaluations)
    # Without the FDR control the same data would flag far more: the check can fail.
    raw = np.stack([dec.direct_p[:, 0] for dec in decs]) <= fdr
    assert raw.reshape(2, evaluations, dms).any(axis=(0, 2)).mean() > 0.5


# --- drift -------------------------------------------------------------------------------


def _pooled(first, second, weights=None, keep_first=None):
    """Both windows in one statsmodels model: [1, x, D, D*x], D = 1 in the first window.

    keep_first: first-window columns that enter its slopes (a cue missing there gets a
    slope in the second window only).  Returns the fit and the interaction columns.
    """
    (x1, y1), (x2, y2) = first, second
    k = x1.shape[1]
    keep = np.arange(k) if keep_first is None else np.asarray(keep_first)
    d = np.r_[np.ones(len(y1)), np.zeros(len(y2))]
    x = np.vstack([x1, x2])
    shared = x.copy()
    extra = [j for j in range(k) if j not in keep]
    shared[: len(y1), extra] = 0.0  # those cues act in the second window only
    design = np.column_stack([np.ones(len(d)), shared, d, d[:, None] * x[:, keep]])
    model = sm.OLS if weights is None else sm.WLS
    kwargs = {} if weights is None else {"weights": weights}
    res = model(np.r_[y1, y2], design, **kwargs).fit()
    return res, np.arange(k + 2, k + 2 + len(keep))


def _drift_pairs(noise_first, noise_second, seed=10):
    rng = np.random.default_rng(seed)
    firsts = [_rows(rng, 200, direct=d, noise=noise_first) for d in (0.0, 1.0, 0.0)]
    seconds = [_rows(rng, 260, direct=0.0, proxy=p, noise=noise_second) for p in (1.0, 1.0, 1.3)]
    return firsts, seconds


def test_drift_matches_weighted_pooled_regression_exactly():
    firsts, seconds = _drift_pairs(1.0, 2.0)
    fa, fb = _sm_fits(firsts, NUMERIC), _sm_fits(seconds, NUMERIC)
    drift = weight_drift(fa, fb)
    for w in range(3):
        # Source: statsmodels WLS of both windows with a window dummy and interactions,
        # weights 1/sigma_w^2 from each window's own fit; its scale is then exactly 1, so
        # the interaction estimates, t values and Wald chi2 equal the two-sample figures.
        wts = np.r_[np.full(200, fa.sigma[w] ** -2), np.full(260, fb.sigma[w] ** -2)]
        res, inter = _pooled(firsts[w], seconds[w], weights=wts)
        np.testing.assert_allclose(res.scale, 1.0, rtol=1e-9)
        np.testing.assert_allclose(drift.change[w], res.params[inter], rtol=1e-8)
        np.testing.assert_allclose(drift.z[w], res.tvalues[inter], rtol=1e-8)
        wald = res.wald_test(np.eye(len(res.params))[inter], use_f=False, scalar=True)
        np.testing.assert_allclose(drift.joint_stat[w], wald.statistic, rtol=1e-8)
        np.testing.assert_allclose(drift.joint_p[w], wald.pvalue, rtol=1e-6, atol=1e-300)
    assert (drift.joint_df == 4).all() and (drift.reason == "").all()
    assert drift.joint_p[0] > 0.01 and drift.joint_p[1] < 1e-3  # a direct weight of 1.0 appears


def test_one_cue_drift_is_the_wald_test_of_its_columns_in_the_weighted_pooled_regression():
    # A cue with several design columns (here columns 1 and 2 taken as one cue's
    # dummies) gets one verdict: the Wald chi2 of the change in those columns only.
    firsts, seconds = _drift_pairs(1.0, 2.0)
    fa, fb = _sm_fits(firsts, NUMERIC), _sm_fits(seconds, NUMERIC)
    stat, df, p = cue_drift(fa, fb, [1, 2])
    for w in range(3):
        # Source: statsmodels WLS as in the test above; wald_test restricted to the two
        # interaction terms of those columns.
        wts = np.r_[np.full(200, fa.sigma[w] ** -2), np.full(260, fb.sigma[w] ** -2)]
        res, inter = _pooled(firsts[w], seconds[w], weights=wts)
        wald = res.wald_test(np.eye(len(res.params))[inter[[1, 2]]], use_f=False, scalar=True)
        np.testing.assert_allclose(stat[w], wald.statistic, rtol=1e-8)
        np.testing.assert_allclose(p[w], wald.pvalue, rtol=1e-6, atol=1e-300)
    assert (df == 2).all()
    # One column: the square of that column's z.
    single, _, _ = cue_drift(fa, fb, [0])
    np.testing.assert_allclose(single, weight_drift(fa, fb).z[:, 0] ** 2, rtol=1e-9)


def test_drift_joint_test_close_to_chow_f_test_under_equal_variances():
    figures = []
    for seed in range(10, 20):
        firsts, seconds = _drift_pairs(1.0, 1.0, seed=seed)
        drift = weight_drift(_sm_fits(firsts, NUMERIC), _sm_fits(seconds, NUMERIC))
        for w in range(3):
            # Source: statsmodels OLS with window dummy and interactions, F test of the
            # interaction block (the classic Chow F test, one pooled noise variance).
            res, inter = _pooled(firsts[w], seconds[w])
            chow = res.f_test(np.eye(len(res.params))[inter])
            figures.append((drift.joint_stat[w] / 4, float(chow.fvalue)))
            figures.append((drift.joint_p[w], float(chow.pvalue)))
    stat = np.array(figures[0::2])
    pv = np.array(figures[1::2])
    rel = np.abs(stat[:, 0] / stat[:, 1] - 1)
    print(
        f"W/k vs Chow F: max rel diff {rel.max():.3f}; max |p diff| {np.abs(pv[:, 0] - pv[:, 1]).max():.3f}"
    )
    # Same noise variance, n = 200 and 260: the statistics differ only through the two
    # variance estimates (measured below 6 %); the p-values also through chi2 vs F.
    assert rel.max() < 0.10
    assert np.abs(pv[:, 0] - pv[:, 1]).max() < 0.03


def test_drift_leaves_out_a_cue_missing_in_one_window():
    firsts, seconds = _drift_pairs(1.0, 1.5)
    x, y = firsts[0]
    x = x.copy()
    x[:, 3] = 0.0  # witness constant in the first window of pair 0
    firsts[0] = (x, y)
    tiny = _rows(np.random.default_rng(1), 3)
    fa, fb = _sm_fits(firsts + [tiny], NUMERIC), _sm_fits(seconds + [seconds[0]], NUMERIC)
    drift = weight_drift(fa, fb)
    assert drift.joint_df[0] == 3 and np.isnan(drift.z[0, 3])
    # Source: statsmodels WLS as above, the witness slope free in the second window only.
    wts = np.r_[np.full(200, fa.sigma[0] ** -2), np.full(260, fb.sigma[0] ** -2)]
    res, inter = _pooled(firsts[0], seconds[0], weights=wts, keep_first=[0, 1, 2])
    wald = res.wald_test(np.eye(len(res.params))[inter], use_f=False, scalar=True)
    np.testing.assert_allclose(drift.joint_stat[0], wald.statistic, rtol=1e-8)
    assert drift.reason[3] == "a window of the pair was not fitted" and np.isnan(drift.joint_p[3])


# --- floors ------------------------------------------------------------------------------


def test_floors_flag_only_assessable_windows():
    # Plain predicates (common practice: no verdict on too few rows or undefined values).
    check = below_floor(
        np.array([0.2, 0.9, np.nan, 0.2]), np.array([50, 50, 50, 10]), floor=0.5, min_n=40
    )
    np.testing.assert_array_equal(check.flagged, [True, False, False, False])
    np.testing.assert_array_equal(check.assessable, [True, True, False, False])
    fits = SimpleNamespace(R_s=np.array([0.3, 0.8]), n=np.array([100, 100]),
                           r_a=np.array([0.1, 0.1]), n_linked=np.array([5, 80]))  # fmt: skip
    np.testing.assert_array_equal(
        consistency_floor(fits, floor=0.5, min_rows=40).flagged, [True, False]
    )
    ach = achievement_floor(fits, floor=0.2, min_linked=30)
    np.testing.assert_array_equal(ach.flagged, [False, True])
    np.testing.assert_array_equal(ach.assessable, [False, True])


# --- hysteresis --------------------------------------------------------------------------

states_lists = st.lists(st.sampled_from([True, False, None]), max_size=40)


def _assessed_before(states, index, count):
    """Indices of the last ``count`` assessed windows up to and including ``index``."""
    seen = [i for i in range(index + 1) if states[i] is not None]
    return seen[-count:]


@settings(max_examples=300, deadline=None)
@given(states=states_lists, n=st.integers(1, 4))
def test_episode_properties(states, n):
    # Properties stated in DESIGN.md ("Forbidden cues", last sentence).
    found = episodes(states, n)
    previous_end = -1
    for ep in found:
        opening = _assessed_before(states, ep.open_index, n)
        assert len(opening) == n and all(states[i] is True for i in opening)
        assert opening[0] > previous_end  # the N flags all come after the last resolve
        if ep.resolve_index is None:
            assert ep is found[-1]
            break
        closing = _assessed_before(states, ep.resolve_index, n)
        assert len(closing) == n and all(states[i] is False for i in closing)
        assert closing[0] > ep.open_index  # the N clears all come after the open
        previous_end = ep.resolve_index
    # Not-assessable windows change nothing but the indices.
    kept = [i for i, s in enumerate(states) if s is not None]
    compact = episodes([states[i] for i in kept], n)
    mapped = [
        Episode(kept[e.open_index], None if e.resolve_index is None else kept[e.resolve_index])
        for e in compact
    ]
    assert mapped == found


def _open_after(found, i):
    return any(
        e.open_index <= i and (e.resolve_index is None or i < e.resolve_index) for e in found
    )


@settings(max_examples=200, deadline=None)
@given(states=states_lists, n=st.integers(1, 4))
def test_no_run_of_n_is_missed(states, n):
    # Converse of the above: closed after window i means fewer than N trailing flags since
    # the last resolve; open after i means fewer than N trailing clears since the open.
    found = episodes(states, n)
    for i in range(len(states)):
        is_open = _open_after(found, i)
        marks = [e.open_index for e in found if e.open_index <= i]
        marks += [
            e.resolve_index for e in found if e.resolve_index is not None and e.resolve_index <= i
        ]
        since = max(marks, default=-1)
        trail = [j for j in _assessed_before(states, i, n) if j > since]
        assert not (len(trail) == n and all(states[j] is (not is_open) for j in trail))


def test_one_noisy_window_neither_opens_nor_closes():
    clear, flag = False, True
    assert episodes([clear, clear, flag, clear, clear], 2) == []
    assert episodes([flag, None, flag, clear, flag, clear, None, clear], 2) == [Episode(2, 7)]
    assert episodes([flag, flag, clear, flag, flag], 2) == [Episode(1, None)]
    assert episodes([flag, clear, flag], 1) == [Episode(0, 1), Episode(2, None)]
    with pytest.raises(ValueError):
        episodes([flag], 0)


# --- floors at their edges (added after a mutation run: `make mutate`) -------------------


def test_below_floor_edges_are_inclusive_for_rows_and_strict_for_the_value():
    # The docstring's words: "at least min_n rows" is assessable, "below floor" flags.
    check = below_floor(
        np.array([0.5, 0.4999, 0.4999]), np.array([40, 40, 39]), floor=0.5, min_n=40
    )
    np.testing.assert_array_equal(check.assessable, [True, True, False])
    np.testing.assert_array_equal(check.flagged, [False, True, False])


def test_achievement_interval_is_the_fisher_interval_of_pearsons_r():
    # Source: scipy.stats.pearsonr(...).confidence_interval(), the Fisher z interval
    # tanh(atanh(r) -+ z_{0.975} / sqrt(n - 3)); n = 4 is the smallest n it is defined for.
    rng = np.random.default_rng(11)
    sizes = [4, 30, 200, 200]
    r, low, high = [], [], []
    for n, slope in zip(sizes, [0.5, 0.5, 0.0, 1.0], strict=True):
        ys = rng.normal(size=n)
        ye = slope * ys + rng.normal(size=n)
        res = stats.pearsonr(ys, ye)
        ci = res.confidence_interval(confidence_level=0.95)
        r.append(res.statistic)
        low.append(ci.low)
        high.append(ci.high)
    fits = SimpleNamespace(r_a=np.array(r), n_linked=np.array(sizes))
    check = achievement_floor(fits, floor=0.3, min_linked=4, z=stats.norm.ppf(0.975))
    np.testing.assert_allclose(check.estimate, r, rtol=1e-12)
    np.testing.assert_allclose(check.ci_low, low, rtol=1e-9)
    np.testing.assert_allclose(check.ci_high, high, rtol=1e-9)
    # Assessable where the interval is wholly on one side of the floor; flagged exactly
    # where it lies wholly below.
    low, high = np.array(low), np.array(high)
    np.testing.assert_array_equal(check.assessable, (high < 0.3) | (low >= 0.3))
    np.testing.assert_array_equal(check.flagged, high < 0.3)
    assert check.flagged[2] and not check.flagged[3]


def test_achievement_floor_needs_min_linked_and_more_than_three_outcomes():
    # n_linked = 3 leaves the Fisher interval undefined (sqrt(n - 3) = 0): not assessable,
    # whatever min_linked says; n = min_linked is enough ("at least").  At n = 4 the
    # interval (tanh(atanh(-0.9) +- 1.96) = (-0.998, 0.45), by hand) lies across the floor
    # 0: no evidence either way, so not assessable either.
    fits = SimpleNamespace(
        r_a=np.array([-0.9, -0.9, -0.9, -0.9, np.nan]), n_linked=np.array([3, 4, 49, 50, 80])
    )
    check = achievement_floor(fits, floor=0.0, min_linked=4, z=1.96)
    np.testing.assert_array_equal(check.assessable, [False, False, True, True, False])
    strict = achievement_floor(fits, floor=0.0, min_linked=50, z=1.96)
    np.testing.assert_array_equal(strict.assessable, [False, False, False, True, False])
    np.testing.assert_array_equal(strict.flagged, [False, False, False, True, False])


def test_floor_checks_on_empty_or_undefined_windows_warn_about_nothing():
    # Windows with no outcomes, no rows or an undefined R_s are routine in a nightly run:
    # they are "not assessable", with no numpy RuntimeWarning in the logs.
    fits = SimpleNamespace(
        r_a=np.array([np.nan, 0.4, 0.4, 0.2]),
        n_linked=np.array([0.0, 2.0, 3.0, 60.0]),
        R_s=np.array([np.nan, 0.5, 1.0, 0.3]),
        n=np.array([0.0, 3.0, 5.0, 60.0]),
        df_resid=np.array([np.nan, 0.0, 2.0, 57.0]),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ach = achievement_floor(fits, floor=0.5, min_linked=1, z=1.96)
        cons = consistency_floor(fits, floor=0.5, min_rows=1, z=1.96)
        plain = below_floor(fits.r_a, fits.n_linked, floor=0.5, min_n=1)
    np.testing.assert_array_equal(ach.assessable, [False, False, False, True])
    assert not cons.assessable[0] and not cons.assessable[1] and cons.assessable[3]
    np.testing.assert_array_equal(plain.assessable, [False, True, True, True])


def test_window_states_refuse_series_of_different_lengths():
    # A flag without its assessability (or the reverse) is a caller's bug, not a window.
    with pytest.raises(ValueError):
        window_states(np.array([True, False]), np.array([True]))
