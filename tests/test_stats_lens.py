"""Specification of monitor.stats.lens: lens-model fits from sufficient statistics and rows.

Every numeric check is against something outside the project, named beside it:
statsmodels OLS, NIST StRD certified values, exact rational arithmetic (fractions),
plain numpy least squares on the raw rows, or an algebraic identity.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
import statsmodels.api as sm
from helpers.references import (
    LONGLEY_CERTIFIED_COEF,
    LONGLEY_CERTIFIED_R2,
    LONGLEY_CERTIFIED_RESID_SD,
    LONGLEY_CERTIFIED_SE,
)

from monitor.stats.lens import (
    LensFits,
    fit_lens,
    fit_lens_or_rows,
    fit_lens_rows,
    replace_rows,
    stack,
)
from monitor.stats.moments import Moments, group_sums, merge, moments_from_rows

NAMES3 = ("a", "b", "c")


def _stack_moments(parts: list[Moments]) -> Moments:
    return Moments(
        np.concatenate([p.n for p in parts]),
        np.concatenate([p.mean for p in parts]),
        np.concatenate([p.comoment for p in parts]),
    )


def _window(rng, n, k=3, shift=0.0, linked_share=0.6):
    """Rows of one synthetic window: cues, judgment, criterion (NaN when not linked)."""
    x = rng.normal(size=(n, k)) * rng.uniform(0.5, 3.0, size=k) + shift
    ys = x @ rng.normal(size=k) + rng.normal(size=n)
    ye = x @ rng.normal(size=k) + 0.5 * (ys - ys.mean()) + rng.normal(size=n)
    ye[rng.random(n) > linked_share] = np.nan
    return x, ys, ye


def _moments(x, ys, ye):
    keep = np.isfinite(ye)
    all_rows = moments_from_rows(np.column_stack([x, ys]))
    linked = moments_from_rows(np.column_stack([x[keep], ys[keep], ye[keep]]))
    return all_rows, linked


def _fit_both(x, ys, ye, names=NAMES3, **kw) -> list[LensFits]:
    return [fit_lens(*_moments(x, ys, ye), names, **kw), fit_lens_rows(x, ys, ye, names, **kw)]


def _lre(est, cert):
    """Log relative error (NIST StRD convention): correct significant digits."""
    est, cert = np.asarray(est, float), np.asarray(cert, float)
    with np.errstate(divide="ignore"):
        return -np.log10(np.abs(est - cert) / np.abs(cert))


# --------------------------------------------------------------------------- statsmodels


def test_judge_and_environment_models_match_statsmodels_ols():
    rng = np.random.default_rng(11)
    x, ys, ye = _window(rng, 250, k=4)
    keep = np.isfinite(ye)
    names = ("a", "b", "c", "d")
    # Reference: statsmodels OLS with add_constant (outside the project).
    judge = sm.OLS(ys, sm.add_constant(x)).fit()
    env = sm.OLS(ye[keep], sm.add_constant(x[keep])).fit()
    for fit in _fit_both(x, ys, ye, names):
        np.testing.assert_allclose(fit.weights[0], judge.params[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.intercept[0], judge.params[0], rtol=1e-9)
        np.testing.assert_allclose(fit.std_errors[0], judge.bse[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.t_values[0], judge.tvalues[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.p_values[0], judge.pvalues[1:], rtol=1e-7, atol=1e-300)
        np.testing.assert_allclose(fit.conf_int()[0], judge.conf_int()[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.cov[0], judge.cov_params()[1:, 1:], rtol=1e-9)
        np.testing.assert_allclose(fit.R_s[0] ** 2, judge.rsquared, rtol=1e-9)
        np.testing.assert_allclose(fit.sigma[0], np.sqrt(judge.scale), rtol=1e-9)
        assert fit.df_resid[0] == judge.df_resid
        np.testing.assert_allclose(fit.env_weights[0], env.params[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.env_std_errors[0], env.bse[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.R_e[0] ** 2, env.rsquared, rtol=1e-9)
        # R_s_linked is the judge model refitted on the linked rows (statsmodels again).
        judge_l = sm.OLS(ys[keep], sm.add_constant(x[keep])).fit()
        np.testing.assert_allclose(fit.R_s_linked[0] ** 2, judge_l.rsquared, rtol=1e-9)
        assert fit.reason[0] == ""
        assert fit.n[0] == 250 and fit.n_linked[0] == keep.sum()


def test_zero_order_and_standardised_figures_match_numpy():
    rng = np.random.default_rng(12)
    x, ys, ye = _window(rng, 120)
    keep = np.isfinite(ye)
    judge = sm.OLS(ys, sm.add_constant(x)).fit()
    for fit in _fit_both(x, ys, ye):
        for i in range(3):
            # Pearson r by numpy.corrcoef; beta = b sd(x)/sd(y) (textbook definition).
            np.testing.assert_allclose(
                fit.utilization_r[0, i], np.corrcoef(x[:, i], ys)[0, 1], rtol=1e-10
            )
            np.testing.assert_allclose(
                fit.validity_r[0, i], np.corrcoef(x[keep, i], ye[keep])[0, 1], rtol=1e-10
            )
            beta = judge.params[1 + i] * x[:, i].std() / ys.std()
            np.testing.assert_allclose(fit.std_weights[0, i], beta, rtol=1e-9)
        np.testing.assert_allclose(fit.r_a[0], np.corrcoef(ys[keep], ye[keep])[0, 1], rtol=1e-10)


# --------------------------------------------------------------------------- NIST Longley


def _longley():
    data = sm.datasets.longley.load_pandas()
    return data.exog.to_numpy(float), data.endog.to_numpy(float), tuple(data.exog.columns)


def test_longley_certified_values_agree_with_statsmodels():
    x, y, _ = _longley()
    ref = sm.OLS(y, sm.add_constant(x)).fit()
    np.testing.assert_allclose(ref.params, LONGLEY_CERTIFIED_COEF, rtol=1e-7)
    np.testing.assert_allclose(ref.bse, LONGLEY_CERTIFIED_SE, rtol=1e-7)
    np.testing.assert_allclose(np.sqrt(ref.scale), LONGLEY_CERTIFIED_RESID_SD, rtol=1e-7)
    np.testing.assert_allclose(ref.rsquared, LONGLEY_CERTIFIED_R2, rtol=1e-7)


def _longley_lres(fit: LensFits) -> np.ndarray:
    est = np.concatenate([fit.intercept, fit.weights[0]])
    return np.concatenate(
        [
            _lre(est, LONGLEY_CERTIFIED_COEF),
            _lre(fit.std_errors[0], LONGLEY_CERTIFIED_SE[1:]),
            _lre(fit.sigma, [LONGLEY_CERTIFIED_RESID_SD]),
            _lre(fit.R_s**2, [LONGLEY_CERTIFIED_R2]),
        ]
    )


def test_longley_sufficient_statistics_path_reaches_seven_digits():
    x, y, names = _longley()
    fit = fit_lens(moments_from_rows(np.column_stack([x, y])), None, names)
    # Measured: cue correlation matrix 1-norm condition ~ 2.0e4, well below the
    # refit limit, so the normal-equation path is trusted and must deliver.
    assert not fit.needs_raw_refit[0]
    assert 1e4 < fit.condition[0] < 1e5
    assert np.all(_longley_lres(fit) >= 7.0)


def test_longley_raw_row_path_reaches_seven_digits():
    x, y, names = _longley()
    fit = fit_lens_rows(x, y, None, names)
    assert not fit.needs_raw_refit[0]
    assert np.all(_longley_lres(fit) >= 7.0)


# --------------------------------------------------------------------------- conditioning


def _exact_ols(x: np.ndarray, y: np.ndarray) -> list[float]:
    """Slopes solved in exact rational arithmetic (fractions.Fraction) from the floats."""
    n, k = x.shape
    xs = [[Fraction(v) for v in row] for row in x.tolist()]
    yv = [Fraction(v) for v in y.tolist()]
    mx = [sum(r[j] for r in xs) / n for j in range(k)]
    my = sum(yv) / n
    a = [[sum((r[i] - mx[i]) * (r[j] - mx[j]) for r in xs) for j in range(k)] for i in range(k)]
    b = [sum((r[i] - mx[i]) * (v - my) for r, v in zip(xs, yv, strict=True)) for i in range(k)]
    for c in range(k):  # Gauss-Jordan, exact
        for r in range(k):
            if r != c:
                f = a[r][c] / a[c][c]
                a[r] = [u - f * w for u, w in zip(a[r], a[c], strict=True)]
                b[r] -= f * b[c]
    return [float(b[i] / a[i][i]) for i in range(k)]


def test_poor_conditioning_flags_refit_and_rows_fit_is_accurate():
    rng = np.random.default_rng(3)
    n = 40
    base = rng.normal(size=(n, 2))
    # Third cue = sum of the others + 1e-4 noise: condition ~ 1e9 (poor, not singular).
    x = np.column_stack([base, base.sum(axis=1) + 1e-4 * rng.normal(size=n)])
    y = x @ [1.0, -2.0, 0.5] + rng.normal(size=n)
    exact = _exact_ols(x, y)  # reference: exact rational arithmetic
    fit = fit_lens(moments_from_rows(np.column_stack([x, y])), None, NAMES3)
    assert fit.needs_raw_refit[0]
    assert 1e7 < fit.condition[0] < 1e12
    assert np.isfinite(fit.weights).all()  # still filled from the normal equations
    raw = fit_lens_rows(x, y, None, NAMES3)
    assert not raw.needs_raw_refit[0]
    np.testing.assert_allclose(raw.weights[0], exact, rtol=1e-9)
    np.testing.assert_allclose(raw.condition, fit.condition, rtol=1e-3)


# --------------------------------------------------------------------------- lens model eq.


def _random_windows(rng, m, k=3):
    rows, alls, links = [], [], []
    for _ in range(m):
        x, ys, ye = _window(rng, int(rng.integers(15, 80)), k=k, shift=rng.normal() * 50)
        a, lk = _moments(x, ys, ye)
        rows.append((x, ys, ye))
        alls.append(a)
        links.append(lk)
    return rows, _stack_moments(alls), _stack_moments(links)


def test_lens_model_equation_is_exact_in_sample():
    rng = np.random.default_rng(7)
    _, all_rows, linked = _random_windows(rng, 300)
    fit = fit_lens(all_rows, linked, NAMES3)
    assert np.isfinite(fit.G).all() and np.isfinite(fit.C).all()
    # Tucker (1964) lens model equation: r_a = G R_e R_s + C sqrt(1-R_e^2) sqrt(1-R_s^2).
    rhs = fit.G * fit.R_e * fit.R_s_linked + fit.C * np.sqrt(1 - fit.R_e**2) * np.sqrt(
        1 - fit.R_s_linked**2
    )
    np.testing.assert_allclose(fit.r_a, rhs, rtol=0, atol=1e-10)
    np.testing.assert_allclose(fit.model_of_judge_r, fit.G * fit.R_e, rtol=1e-15)


def test_matching_index_and_residual_agreement_from_rows():
    rng = np.random.default_rng(8)
    rows, all_rows, linked = _random_windows(rng, 25)
    fit = fit_lens(all_rows, linked, NAMES3)
    for i, (x, ys, ye) in enumerate(rows):
        keep = np.isfinite(ye)
        design = np.column_stack([np.ones(keep.sum()), x[keep]])
        # Reference: numpy lstsq on the linked rows; G = r(fitted_s, fitted_e),
        # C = r(resid_s, resid_e), the definitions of the lens model.
        coef_s = np.linalg.lstsq(design, ys[keep], rcond=None)[0]
        coef_e = np.linalg.lstsq(design, ye[keep], rcond=None)[0]
        fs, fe = design @ coef_s, design @ coef_e
        g = np.corrcoef(fs, fe)[0, 1]
        c = np.corrcoef(ys[keep] - fs, ye[keep] - fe)[0, 1]
        np.testing.assert_allclose(fit.G[i], g, rtol=1e-9)
        np.testing.assert_allclose(fit.C[i], c, rtol=1e-8, atol=1e-12)
        rows_fit = fit_lens_rows(x, ys, ye, NAMES3)
        np.testing.assert_allclose(rows_fit.G[0], g, rtol=1e-9)
        np.testing.assert_allclose(rows_fit.C[0], c, rtol=1e-8, atol=1e-12)


# --------------------------------------------------------------------------- merging


def test_merge_in_any_order_or_grouping_equals_rows_of_concatenation():
    rng = np.random.default_rng(4)
    parts = [rng.normal(size=(int(rng.integers(0, 12)), 4)) * 3 + 100 for _ in range(9)]
    mom = [moments_from_rows(p) for p in parts]
    ref = moments_from_rows(np.concatenate(parts))  # reference: two-pass on all rows

    def left_fold(order):
        acc = mom[order[0]]
        for j in order[1:]:
            acc = merge(acc, mom[j])
        return acc

    def tree(items):
        while len(items) > 1:
            nxt = [merge(items[j], items[j + 1]) for j in range(0, len(items) - 1, 2)]
            items = nxt + ([items[-1]] if len(items) % 2 else [])
        return items[0]

    results = [left_fold(list(range(9))), left_fold(list(rng.permutation(9))), tree(mom[::-1])]
    for got in results:
        np.testing.assert_allclose(got.n, ref.n)
        np.testing.assert_allclose(got.mean, ref.mean, rtol=1e-13)
        np.testing.assert_allclose(got.comoment, ref.comoment, rtol=1e-11, atol=1e-9)


# --------------------------------------------------------------------------- degenerate


def test_too_few_rows_gives_nan_and_reason():
    rng = np.random.default_rng(20)
    x, ys, ye = _window(rng, 30)
    for fit in _fit_both(x, ys, ye, min_rows=40):
        assert np.isnan(fit.weights).all() and np.isnan(fit.R_s).all()
        assert np.isnan(fit.cov).all()
        assert fit.reason[0].startswith("too few rows: n=30 < 40")
        assert not fit.estimable.any()
    x, ys, ye = _window(rng, 4)  # n = 4 <= k + 1 = 4, whatever min_rows says
    for fit in _fit_both(x, ys, ye):
        assert np.isnan(fit.weights).all()
        assert "too few rows: n=4 < 5" in fit.reason[0]


def test_constant_cue_is_not_estimable_and_rest_equals_statsmodels_without_it():
    rng = np.random.default_rng(21)
    x, ys, ye = _window(rng, 80)
    x[:, 1] = 7.25e3  # constant in this window
    keep = np.isfinite(ye)
    ref = sm.OLS(ys, sm.add_constant(x[:, [0, 2]])).fit()  # statsmodels without the cue
    env = sm.OLS(ye[keep], sm.add_constant(x[keep][:, [0, 2]])).fit()
    for fit in _fit_both(x, ys, ye):
        assert list(fit.estimable[0]) == [True, False, True]
        assert fit.cue_reason[0, 1] == "constant in window" and fit.cue_reason[0, 0] == ""
        assert np.isnan(fit.weights[0, 1]) and np.isnan(fit.cov[0, 1]).all()
        np.testing.assert_allclose(fit.weights[0, [0, 2]], ref.params[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.std_errors[0, [0, 2]], ref.bse[1:], rtol=1e-9)
        np.testing.assert_allclose(fit.intercept[0], ref.params[0], rtol=1e-9)
        assert fit.df_resid[0] == ref.df_resid == 80 - 2 - 1
        np.testing.assert_allclose(fit.R_s[0] ** 2, ref.rsquared, rtol=1e-9)
        np.testing.assert_allclose(fit.env_weights[0, [0, 2]], env.params[1:], rtol=1e-9)
        assert fit.reason[0] == ""


def test_constant_judgment():
    rng = np.random.default_rng(22)
    x, _, ye = _window(rng, 50)
    ys = np.full(50, 3.0)
    for fit in _fit_both(x, ys, ye):
        assert np.isnan(fit.R_s[0]) and np.isnan(fit.std_weights).all()
        assert np.isnan(fit.utilization_r).all() and np.isnan(fit.G[0]) and np.isnan(fit.r_a[0])
        assert "judgment constant in window" in fit.reason[0]
        # Nothing to explain: the weights are not estimable (not 0 with SE 0 and CI [0, 0]).
        assert np.isnan(fit.weights[0]).all() and np.isnan(fit.std_errors[0]).all()
        assert np.isnan(fit.ci_low[0]).all() and not fit.estimable[0].any()
        assert (fit.cue_reason[0] == "judgment constant in window").all()
        assert np.isfinite(fit.R_e[0])  # the environment model does not need the judgment


def test_constant_criterion():
    rng = np.random.default_rng(23)
    x, ys, ye = _window(rng, 60, linked_share=1.0)
    ye[:] = 1.0
    for fit in _fit_both(x, ys, ye):
        assert np.isnan(fit.R_e[0]) and np.isnan(fit.r_a[0]) and np.isnan(fit.G[0])
        assert np.isnan(fit.validity_r).all()
        assert "criterion constant in linked rows" in fit.reason[0]
        assert np.isfinite(fit.R_s[0]) and np.isfinite(fit.weights).all()


def test_perfectly_collinear_cues():
    rng = np.random.default_rng(24)
    x, ys, ye = _window(rng, 60)
    x[:, 2] = 2.0 * x[:, 0] - x[:, 1]
    for fit in _fit_both(x, ys, ye):
        assert np.isnan(fit.weights).all() and np.isnan(fit.R_s[0]) and np.isnan(fit.G[0])
        assert "cues perfectly collinear" in fit.reason[0]
        assert set(fit.cue_reason[0]) == {"cues perfectly collinear"}
        assert not fit.needs_raw_refit[0]
        np.testing.assert_allclose(  # zero-order r still defined (numpy.corrcoef)
            fit.utilization_r[0, 0], np.corrcoef(x[:, 0], ys)[0, 1], rtol=1e-10
        )


def test_empty_windows_and_missing_outcomes():
    empty = Moments(np.zeros(2), np.zeros((2, 4)), np.zeros((2, 4, 4)))
    fit = fit_lens(empty, None, NAMES3)
    assert (fit.n == 0).all() and np.isnan(fit.weights).all() and np.isnan(fit.r_a).all()
    assert all(r == "too few rows: n=0 < 2; no linked outcomes" for r in fit.reason)
    rng = np.random.default_rng(25)
    x, ys, _ = _window(rng, 40)
    no_outcome = np.full(40, np.nan)
    for fit in _fit_both(x, ys, no_outcome):
        assert fit.n_linked[0] == 0 and np.isnan(fit.env_weights).all()
        assert np.isnan(fit.G[0]) and np.isnan(fit.R_e[0])
        assert fit.reason[0] == "no linked outcomes"
        assert np.isfinite(fit.weights).all()
    few = np.full(40, np.nan)
    few[:4] = rng.normal(size=4)
    for fit in _fit_both(x, ys, few):
        assert fit.reason[0] == "too few linked rows: n_linked=4 < 5"
        assert np.isnan(fit.R_e[0]) and np.isfinite(fit.R_s[0])


# --------------------------------------------------------------------------- batching


def test_batched_equals_one_at_a_time_and_stack_helpers():
    rng = np.random.default_rng(30)
    rows, all_rows, linked = _random_windows(rng, 12)
    batched = fit_lens(all_rows, linked, NAMES3, min_rows=20)
    singles = stack(
        [fit_lens(all_rows.take([i]), linked.take([i]), NAMES3, min_rows=20) for i in range(12)]
    )
    from_rows = stack([fit_lens_rows(x, ys, ye, NAMES3, min_rows=20) for x, ys, ye in rows])
    for field in ("weights", "std_errors", "R_s", "R_e", "G", "C", "r_a", "cov", "env_weights"):
        np.testing.assert_allclose(getattr(batched, field), getattr(singles, field), rtol=1e-12)
        np.testing.assert_allclose(getattr(batched, field), getattr(from_rows, field), rtol=1e-9)
    assert list(batched.reason) == list(from_rows.reason)
    swapped = replace_rows(batched, np.array([2, 5]), from_rows.take(np.array([2, 5])))
    np.testing.assert_array_equal(swapped.weights[[0, 1]], batched.weights[[0, 1]])
    np.testing.assert_array_equal(swapped.weights[[2, 5]], from_rows.weights[[2, 5]])
    assert batched.take(slice(3, 6)).size == 3


def test_shape_mismatch_is_a_bug_not_a_degenerate_window():
    empty = Moments(np.zeros(1), np.zeros((1, 3)), np.zeros((1, 3, 3)))
    with pytest.raises(ValueError):
        fit_lens(empty, None, NAMES3)


# --- edges found by a mutation run (`make mutate`) ---------------------------------------


def test_merge_with_empty_sets_is_the_identity_and_two_empties_stay_empty():
    # Moments' contract: n = 0 has zero mean and co-moment; merging with it changes nothing.
    # Reference by hand: one row (2, -1, 7) has mean (2, -1, 7) and zero co-moment.
    empty = Moments(np.zeros(1), np.zeros((1, 3)), np.zeros((1, 3, 3)))
    one = Moments(np.ones(1), np.array([[2.0, -1.0, 7.0]]), np.zeros((1, 3, 3)))
    for merged in (merge(empty, one), merge(one, empty)):
        np.testing.assert_array_equal(merged.n, [1.0])
        np.testing.assert_array_equal(merged.mean, [[2.0, -1.0, 7.0]])
        np.testing.assert_array_equal(merged.comoment, np.zeros((1, 3, 3)))
    with np.errstate(all="raise"):  # no 0/0 on the way
        nothing = merge(empty, empty)
    np.testing.assert_array_equal(nothing.n, [0.0])
    np.testing.assert_array_equal(nothing.mean, np.zeros((1, 3)))
    np.testing.assert_array_equal(nothing.comoment, np.zeros((1, 3, 3)))


def test_stack_of_one_window_and_mismatched_design_columns():
    rng = np.random.default_rng(5)
    x, ys, ye = _window(rng, 80)
    fit = fit_lens_rows(x, ys, ye, NAMES3)
    alone = stack([fit])
    np.testing.assert_array_equal(alone.weights, fit.weights)
    np.testing.assert_array_equal(alone.R_s, fit.R_s)
    other = fit_lens_rows(x[:, :2], ys, ye, ("a", "b"))
    with pytest.raises(ValueError, match="different design columns"):
        stack([fit, other])
    with pytest.raises(ValueError, match="different design columns"):
        replace_rows(fit, np.array([0]), other)


def test_window_whose_cues_are_all_constant_fits_the_intercept_only():
    # Every cue constant: nothing to weigh, R_s = 0 (the intercept-only model explains
    # nothing), and achievement is still the plain correlation (numpy corrcoef).
    rng = np.random.default_rng(9)
    n = 50
    x = np.column_stack([np.full(n, 2.0), np.full(n, 5.0)])
    ys, ye = rng.normal(size=n), rng.normal(size=n)
    for fit in (
        fit_lens_rows(x, ys, ye, ("a", "b")),
        fit_lens(*_moments(x, ys, ye), ("a", "b")),
    ):
        assert not fit.estimable.any() and np.isnan(fit.weights).all()
        np.testing.assert_allclose(fit.R_s, [0.0], atol=1e-12)
        np.testing.assert_allclose(fit.r_a, [np.corrcoef(ys, ye)[0, 1]], rtol=1e-12)


def _near_collinear_window(rng, n):
    """A window whose third cue is the sum of the first two up to 1e-5 noise: the cue
    correlation matrix's condition number lies between the raw-refit and the collinear
    limits."""
    x12 = rng.normal(size=(n, 2))
    x = np.column_stack([x12, x12.sum(axis=1) + 1e-5 * rng.normal(size=n)])
    ys = x @ np.array([1.0, -0.5, 0.25]) + rng.normal(size=n)
    ye = x12 @ np.array([0.5, 0.5]) + 0.5 * ys + rng.normal(size=n)
    return x, ys, ye


def test_raw_refit_replaces_exactly_the_poorly_conditioned_windows():
    rng = np.random.default_rng(21)
    windows = [_window(rng, 90, linked_share=1.0), _near_collinear_window(rng, 90)]
    x, ys, ye = _near_collinear_window(rng, 90)
    ye[30:] = np.nan  # 30 linked rows < min_rows: environment figures stay "too few"
    windows.append((x, ys, ye))
    x, ys, ye = _window(rng, 90, linked_share=1.0)
    ye[30:] = np.nan  # well conditioned, 30 linked rows: no refit, still "too few"
    windows.append((x, ys, ye))
    parts = [_moments(*w) for w in windows]
    all_rows = _stack_moments([p[0] for p in parts])
    linked = _stack_moments([p[1] for p in parts])
    fits, redo = fit_lens_or_rows(
        all_rows, linked, NAMES3, min_rows=50, rows_of=lambda i: windows[i]
    )
    np.testing.assert_array_equal(redo, [1, 2])
    # Source: statsmodels OLS (pinv-based) on the raw rows of the refitted window.
    x, ys, ye = windows[1]
    judge = sm.OLS(ys, sm.add_constant(x)).fit()
    env = sm.OLS(ye, sm.add_constant(x)).fit()
    np.testing.assert_allclose(fits.weights[1], judge.params[1:], rtol=1e-6)
    np.testing.assert_allclose(fits.R_s[1], np.sqrt(judge.rsquared), rtol=1e-9)
    np.testing.assert_allclose(fits.R_e[1], np.sqrt(env.rsquared), rtol=1e-9)
    np.testing.assert_allclose(fits.r_a[1], np.corrcoef(ys, ye)[0, 1], rtol=1e-12)
    # The well-conditioned window keeps its moment fit (statsmodels again).
    x0, ys0, ye0 = windows[0]
    np.testing.assert_allclose(
        fits.weights[0], sm.OLS(ys0, sm.add_constant(x0)).fit().params[1:], rtol=1e-9
    )
    env0 = sm.OLS(ye0, sm.add_constant(x0)).fit()
    np.testing.assert_allclose(fits.R_e[0], np.sqrt(env0.rsquared), rtol=1e-9)
    assert "too few" in fits.reason[3] and np.isnan(fits.R_e[3])
    # min_rows holds on the refit path too: 30 linked rows < 50.
    assert "too few" in fits.reason[2] and np.isnan(fits.R_e[2]) and np.isnan(fits.r_a[2])
    x2, ys2, _ = windows[2]
    np.testing.assert_allclose(
        fits.R_s[2], np.sqrt(sm.OLS(ys2, sm.add_constant(x2)).fit().rsquared), rtol=1e-9
    )


def test_group_sums_of_a_group_do_not_depend_on_the_other_groups():
    # The refit's promise (monitor.stats.moments.group_sums docstring): a group's sums run
    # over its members in their given order, so adding other groups' buckets around them
    # leaves its statistics identical to the last bit.
    rng = np.random.default_rng(3)
    members = 400
    scale = 10.0 ** rng.integers(-3, 6, size=(members, 1))
    mine = Moments(
        rng.integers(1, 20, size=members).astype(float),
        rng.normal(size=(members, 2)) * scale,
        np.repeat(np.eye(2)[None], members, axis=0) * scale[:, :, None] ** 2,
    )
    alone = group_sums(mine, np.zeros(members, dtype=np.int64), 1)
    others = 3 * members
    mixed = _stack_moments([mine, mine.take(rng.integers(0, members, size=others))])
    groups = np.concatenate([np.zeros(members, np.int64), rng.integers(1, 50, size=others)])
    shuffle = rng.permutation(len(groups))
    # keep group 0's members in their given order while interleaving the rest
    zero = np.flatnonzero(groups[shuffle] == 0)
    shuffle[zero] = np.arange(members)
    together = group_sums(mixed.take(shuffle), groups[shuffle], 50)
    np.testing.assert_array_equal(together.n[0], alone.n[0])
    np.testing.assert_array_equal(together.mean[0], alone.mean[0])
    np.testing.assert_array_equal(together.comoment[0], alone.comoment[0])
