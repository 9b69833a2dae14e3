"""Inference on the indirect (proxy) part of a forbidden cue's disparity.

The indirect part is a product, b_P' delta: judge weights of the permitted cues times
their imbalance between the forbidden cue's groups.  Its test must carry the sampling
error of both factors (Sobel 1982; MacKinnon et al. 2002), or it rejects whenever the
sample imbalance is not exactly zero.  Checked here by simulation with planted truth and
against the Monte Carlo product distribution built on statsmodels' OLS fits.
"""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from statsmodels.stats.multitest import multipletests

from monitor.stats.lens import fit_lens
from monitor.stats.moments import Moments, moments_from_rows
from monitor.stats.policy import bh_qvalues, forbidden_cue_decomposition

NAMES = ["amount", "delay", "gender"]


def _windows(rng, m: int, n: int, *, imbalance: float, proxy_weight: float):
    """m windows of n rows: a binary forbidden cue (gender) the judge never uses, a
    permitted cue ``amount`` whose mean differs by ``imbalance`` between the groups and
    carries judge weight ``proxy_weight``, and an unrelated permitted cue ``delay``."""
    gender = rng.integers(0, 2, size=(m, n)).astype(float)
    amount = imbalance * gender + rng.normal(size=(m, n))
    delay = rng.normal(size=(m, n))
    y = 2.0 + proxy_weight * amount + 0.5 * delay + rng.normal(size=(m, n))
    return np.stack([amount, delay, gender, y], axis=2)


def _decompose(z: np.ndarray):
    parts = [moments_from_rows(w) for w in z]
    moms = Moments(
        *(np.concatenate([getattr(p, a) for p in parts]) for a in ("n", "mean", "comoment"))
    )
    fits = fit_lens(moms, None, NAMES)
    return forbidden_cue_decomposition(moms, fits, "gender"), moms, fits


def test_indirect_test_holds_its_level_when_the_proxy_is_balanced():
    # Planted truth: the proxy is used (weight 0.8) but is balanced between the groups in
    # the population (delta = 0), so the indirect part is zero.  Holding the sample
    # imbalance fixed rejected in most such windows; the unconditional variance must
    # reject at about the nominal 5 % (2,400 windows: binomial sd 0.45 points).
    rng = np.random.default_rng(2024)
    dec, moms, fits = _decompose(_windows(rng, 2400, 300, imbalance=0.0, proxy_weight=0.8))
    rate = np.mean(dec.indirect_p[:, 0] < 0.05)
    assert 0.03 <= rate <= 0.07, rate
    # The same windows tested with the imbalance held fixed (Var = delta' V_PP delta, the
    # first term alone): it rejects far more often than 5 %, which is the fault fixed.
    co = moms.comoment
    delta = co[:, 2, :2] / co[:, 2, 2][:, None]
    v_pp = fits.cov[:, :2, :2]
    held_se = np.sqrt(np.einsum("mp,mpq,mq->m", delta, v_pp, delta))
    t_held = dec.indirect[:, 0] / held_se
    assert np.mean(np.abs(t_held) > 1.97) > 0.3
    assert (dec.indirect_se[:, 0] > held_se).all()


def test_indirect_test_finds_a_real_proxy_path():
    # Planted truth: imbalance 0.44 sd and weight 0.8 (indirect 0.352 judgment units).
    rng = np.random.default_rng(7)
    dec, _, _ = _decompose(_windows(rng, 400, 600, imbalance=0.44, proxy_weight=0.8))
    assert np.mean(dec.indirect_p[:, 0] < 0.05) > 0.95
    # The interval covers the planted indirect part at about its nominal rate.
    covered = (dec.indirect_ci_low[:, 0] <= 0.352) & (0.352 <= dec.indirect_ci_high[:, 0])
    assert 0.92 <= covered.mean() <= 0.98, covered.mean()


def test_indirect_test_is_not_liberal_when_the_proxy_is_unused():
    # Planted truth: imbalanced proxy (0.44) that the judge does not use (weight 0):
    # the product test is known to be conservative here (MacKinnon et al. 2002).
    rng = np.random.default_rng(11)
    dec, _, _ = _decompose(_windows(rng, 2400, 300, imbalance=0.44, proxy_weight=0.0))
    assert np.mean(dec.indirect_p[:, 0] < 0.05) <= 0.07


def test_indirect_standard_error_agrees_with_the_monte_carlo_product_distribution():
    # Source: the Monte Carlo (product-distribution) method for an indirect effect
    # (MacKinnon, Lockwood & Williams 2004, Multivariate Behavioral Research, from
    # memory): draw the two factors from their sampling laws, here statsmodels' OLS
    # estimates and covariances of the judge model y ~ amount + gender and the mediator
    # model amount ~ gender, and take the spread of their product.  The delta method
    # leaves out only the second-order term Var(a) Var(b), under 1 % here.
    rng = np.random.default_rng(5)
    z = _windows(rng, 1, 2000, imbalance=0.44, proxy_weight=0.5)[0]
    amount, gender, y = z[:, 0], z[:, 2], z[:, 3]
    judge = sm.OLS(y, sm.add_constant(np.column_stack([amount, gender]))).fit()
    med = sm.OLS(amount, sm.add_constant(gender)).fit()
    draws = rng.normal(judge.params[1], judge.bse[1], 200_000) * rng.normal(
        med.params[1], med.bse[1], 200_000
    )
    mom = moments_from_rows(np.column_stack([amount, gender, y]))
    dec = forbidden_cue_decomposition(mom, fit_lens(mom, None, ["amount", "gender"]), "gender")
    np.testing.assert_allclose(dec.indirect[0, 0], judge.params[1] * med.params[1], rtol=1e-9)
    # Monte Carlo error of an sd from 200,000 draws: about 0.2 %.
    np.testing.assert_allclose(dec.indirect_se[0, 0], draws.std(), rtol=0.02)


def test_bh_qvalues_keep_precision_for_tiny_p_values():
    # Source: statsmodels.stats.multitest.multipletests (fdr_bh), per family.  p-values far
    # below 1e-13 must not collapse to 0 (and so fall below their own p).
    p = np.array([1e-40, 3e-35, 2e-31, 0.01, 0.2, 5e-300, 1e-16, 0.04, 0.5, 0.03])
    groups = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1, 2])
    q = bh_qvalues(p, groups)
    for g in np.unique(groups):
        ref = multipletests(p[groups == g], method="fdr_bh")[1]
        np.testing.assert_allclose(q[groups == g], ref, rtol=1e-12, atol=0)
    assert (q >= p).all()


def test_categorical_cue_size_does_not_depend_on_the_reference_level():
    # The same rows coded against two different reference levels: the per-level weights
    # change, the cue's size sd(sum_j b_j d_j) / sd(Ys) must not.  Source: its definition,
    # computed here directly from statsmodels' fitted weights and the rows.
    rng = np.random.default_rng(8)
    n = 400
    level = rng.integers(0, 3, size=n)
    amount = rng.normal(size=n)
    y = 1.0 + 0.7 * amount + np.array([0.0, 0.6, -0.3])[level] + rng.normal(size=n)
    sizes = []
    for reference in (0, 2):
        others = [v for v in range(3) if v != reference]
        dummies = np.column_stack([level == v for v in others]).astype(float)
        z = np.column_stack([amount, dummies, y])
        mom = moments_from_rows(z)
        names = ["amount", *(f"region={v}" for v in others)]
        dec = forbidden_cue_decomposition(mom, fit_lens(mom, None, names), "region")
        ref = sm.OLS(y, sm.add_constant(np.column_stack([amount, dummies]))).fit()
        carried = dummies @ ref.params[2:]
        np.testing.assert_allclose(dec.cue_direct_size[0], carried.std() / y.std(), rtol=1e-9)
        sizes.append(dec.cue_direct_size[0])
    np.testing.assert_allclose(sizes[0], sizes[1], rtol=1e-9)
