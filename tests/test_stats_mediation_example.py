"""A known-mediation worked example for the forbidden-cue decomposition: the framing data.

Data: the framing experiment of Brader, Valentino & Suhay (2008, American Journal of
Political Science 52(4)), n = 265, the worked example of the R ``mediation`` package
(Tingley, Yamamoto, Hirose, Keele & Imai 2014, Journal of Statistical Software 59(5)),
read from the copy shipped inside the statsmodels wheel
(statsmodels/stats/tests/results/framing.csv).  Mapping onto our terms: ``treat`` (0/1)
is the forbidden cue, ``emo`` (3-12) its proxy (the mediator), ``cong_mesg`` (0/1) the
judgment, so the judge model is a linear probability model (fine for the identities
checked here); ``age`` and ``income`` (1-19) are numeric permitted cues, ``educ`` is
coded as three dummies against "bachelor's degree or higher" and ``gender`` as one dummy
(male) against female: the first level in sorted order, as R's and statsmodels' formulas
code these factors, so the designs equal the vignette's ``lm``/``glm`` designs.

What our figures condition on (``forbidden_cue_decomposition``): the disparity is the
slope of the judgment on the forbidden cue *alone* (for a binary cue the raw difference
in mean judgment between the groups, conditioning on nothing); the direct part is the
cue's weight in the full judge model; the indirect part is the rest, sum_k b_k delta_k
over *every* permitted cue, delta_k the slope of cue k on the forbidden cue alone.  With
the covariates as ordinary permitted cues, emo's part is therefore b_emo times emo's raw
group difference, not times the covariate-adjusted a of the textbook mediator model, and
the covariates' own chance imbalance between the groups is part of the indirect total.
The textbook covariate-adjusted mediation (the vignette's mediator model) is reached by
partialling the covariates out of treat, emo and cong_mesg first and feeding the
residuals to the tool with treat and emo as the only cues (Frisch-Waugh-Lovell); both
routes are checked.

Published versus computed: the vignette publishes only figures for a *probit* outcome
model (ACME, ADE, total effect and proportion mediated on the probability scale), which
a linear tool cannot fit, and it prints no coefficients of its (linear) mediator model.
The reference table in statsmodels/stats/tests/test_mediation.py for this dataset is
likewise for the probit outcome, and it is statsmodels' own output for
``RandomState(4231)`` (it is matched there to 1e-6, which only the same generator can
give), not a published figure.  So no published number is reachable with linear models,
and none is checked: every reference value below is either a textbook identity (named
beside it) or a reference-library computation (statsmodels OLS and
``statsmodels.stats.mediation.Mediation``) on the same 265 rows.
"""

from __future__ import annotations

import pathlib

import numpy as np
import pandas as pd
import pytest
import statsmodels
import statsmodels.api as sm
from statsmodels.stats.mediation import Mediation

from monitor.stats.lens import fit_lens
from monitor.stats.moments import moments_from_rows
from monitor.stats.policy import forbidden_cue_decomposition

FRAMING = pathlib.Path(statsmodels.__file__).parent / "stats" / "tests" / "results" / "framing.csv"
TIGHT = {"rtol": 1e-10, "atol": 1e-13}


@pytest.fixture(scope="module")
def framing() -> pd.DataFrame:
    # No skip if statsmodels stops shipping the file: the example must not vanish quietly.
    data = pd.read_csv(FRAMING)
    assert len(data) == 265 and not data.isna().any().any()
    return data


def _covariates(data: pd.DataFrame) -> tuple[list[str], np.ndarray]:
    """age, educ (dummies against the first sorted level), gender (male), income."""
    columns = {"age": data["age"]}
    for level in sorted(data["educ"].unique())[1:]:
        columns[f"educ={level}"] = data["educ"] == level
    columns["gender=male"] = data["gender"] == "male"
    columns["income"] = data["income"]
    return list(columns), np.column_stack(list(columns.values())).astype(float)


def _arrays(data: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return tuple(data[c].to_numpy(dtype=float) for c in ("treat", "emo", "cong_mesg"))


def _decompose(cues: np.ndarray, judgment: np.ndarray, names: list[str]):
    mom = moments_from_rows(np.column_stack([cues, judgment]))
    fits = fit_lens(mom, None, names)
    dec = forbidden_cue_decomposition(mom, fits, "treat")
    assert dec.reason[0] == ""
    return dec


def _ols(y: np.ndarray, *columns: np.ndarray):
    return sm.OLS(y, sm.add_constant(np.column_stack(columns))).fit()


def _sobel_se(a: float, s_a: float, b: float, s_b: float) -> float:
    # First-order delta-method SE of a product of independent estimates (Sobel 1982,
    # Sociological Methodology 13).
    return float(np.sqrt(a**2 * s_b**2 + b**2 * s_a**2))


def test_single_mediator_gives_the_product_of_coefficients_and_the_sobel_se(framing):
    # treat and emo only: disparity, direct and indirect are the textbook c, c' and ab of
    # three statsmodels OLS fits (total: cong_mesg ~ treat; mediator: emo ~ treat;
    # outcome: cong_mesg ~ treat + emo).
    treat, emo, y = _arrays(framing)
    dec = _decompose(np.column_stack([treat, emo]), y, ["treat", "emo"])
    total, mediator, outcome = _ols(y, treat), _ols(emo, treat), _ols(y, treat, emo)
    c, a = total.params[1], mediator.params[1]
    c_prime, b = outcome.params[1], outcome.params[2]
    np.testing.assert_allclose(dec.disparity[0, 0], c, **TIGHT)
    np.testing.assert_allclose(dec.direct[0, 0], c_prime, **TIGHT)
    np.testing.assert_allclose(dec.indirect[0, 0], a * b, **TIGHT)
    np.testing.assert_allclose(dec.proxy_parts[0, 0, 0], a * b, **TIGHT)
    # c = c' + ab holds exactly for OLS with one mediator (MacKinnon 2008, Introduction to
    # Statistical Mediation Analysis, ch. 3; from memory).
    np.testing.assert_allclose(c, c_prime + a * b, **TIGHT)
    # The Sobel SE from statsmodels' OLS standard errors, exactly: our Var(delta) is the
    # OLS variance of a (residual df n - 2, as statsmodels) and V_b the judge model's OLS
    # covariance (df n - 3).
    sobel = _sobel_se(a, mediator.bse[1], b, outcome.bse[2])
    np.testing.assert_allclose(dec.indirect_se[0, 0], sobel, **TIGHT)
    np.testing.assert_allclose(dec.proxy_part_se[0, 0, 0], sobel, **TIGHT)
    # Not a degenerate case: a real mediated part, larger than its SE.
    assert dec.indirect[0, 0] > 2 * dec.indirect_se[0, 0]


def test_covariates_as_permitted_cues_split_the_raw_disparity(framing):
    # The tool as a user runs it: emo and the covariates are all permitted cues.
    treat, emo, y = _arrays(framing)
    cov_names, cov = _covariates(framing)
    names = ["treat", "emo", *cov_names]
    cues = np.column_stack([treat, emo, cov])
    dec = _decompose(cues, y, names)
    assert dec.proxies == tuple(names[1:])
    full = _ols(y, cues)
    raw = _ols(y, treat)  # the disparity conditions on nothing: cong_mesg ~ treat
    np.testing.assert_allclose(dec.disparity[0, 0], raw.params[1], **TIGHT)
    np.testing.assert_allclose(dec.direct[0, 0], full.params[1], **TIGHT)
    # Each permitted cue's part: its weight in the full model times its own slope on
    # treat alone (statsmodels OLS, x_k ~ treat).
    imbalance = [_ols(cues[:, j], treat) for j in range(1, cues.shape[1])]
    deltas = np.array([fit.params[1] for fit in imbalance])
    parts = full.params[2:] * deltas
    np.testing.assert_allclose(dec.proxy_parts[0, 0], parts, **TIGHT)
    # Omitted-variable identity, exact for OLS (Goldberger, A Course in Econometrics
    # 1991, "short versus long regression"; from memory): raw slope = long slope +
    # sum_k b_k delta_k.
    np.testing.assert_allclose(raw.params[1], full.params[1] + parts.sum(), **TIGHT)
    np.testing.assert_allclose(dec.indirect[0, 0], parts.sum(), **TIGHT)

    # Standard errors.  emo's part is a single product: the Sobel SE with delta_emo from
    # emo ~ treat alone (Sobel 1982), exactly.
    np.testing.assert_allclose(
        dec.proxy_part_se[0, 0, 0],
        _sobel_se(deltas[0], imbalance[0].bse[1], full.params[2], full.bse[2]),
        **TIGHT,
    )
    # Every part at once, and the total: the multivariate delta method
    # delta' V_b delta + b' Var(delta) b, with V_b statsmodels' covariance of the full
    # model and Var(delta) the covariance of the slopes of the seven regressions on the
    # same design [1, treat]: Sigma (x) (X'X)^-1, Sigma the residual covariance with the
    # same n - 2 divisor statsmodels uses for each (multivariate regression, e.g.
    # Johnson & Wichern, Applied Multivariate Statistical Analysis, ch. 7; from memory).
    resid = np.column_stack([fit.resid for fit in imbalance])
    sigma = resid.T @ resid / imbalance[0].df_resid
    var_delta = sigma * imbalance[0].normalized_cov_params[1, 1]
    np.testing.assert_allclose(np.diag(var_delta), [f.bse[1] ** 2 for f in imbalance], **TIGHT)
    v_b = full.cov_params()[2:, 2:]
    b_p = full.params[2:]
    np.testing.assert_allclose(
        dec.proxy_part_se[0, 0],
        np.sqrt(deltas**2 * np.diag(v_b) + b_p**2 * np.diag(var_delta)),
        **TIGHT,
    )
    total_var = deltas @ v_b @ deltas + b_p @ var_delta @ b_p
    np.testing.assert_allclose(dec.indirect_se[0, 0], np.sqrt(total_var), **TIGHT)


def _partialled(data: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """treat, emo and cong_mesg with the covariates (and the intercept) partialled out."""
    _, cov = _covariates(data)
    base = sm.add_constant(cov)
    return tuple(sm.OLS(v, base).fit().resid for v in _arrays(data))


def test_partialled_rows_give_the_covariate_adjusted_textbook_mediation(framing):
    # Frisch-Waugh-Lovell (Frisch & Waugh 1933, Econometrica; Lovell 1963, JASA; from
    # memory): regressing residuals on residuals gives the coefficients of the regression
    # that includes the covariates.  So with the covariates partialled out our three
    # figures are the covariate-adjusted c, c' and a*b of the vignette's models (mediator:
    # emo ~ treat + age + educ + gender + income; outcome, here linear: cong_mesg ~ emo +
    # treat + age + educ + gender + income), fitted by statsmodels on the raw rows.
    treat_r, emo_r, y_r = _partialled(framing)
    dec = _decompose(np.column_stack([treat_r, emo_r]), y_r, ["treat", "emo"])
    treat, emo, y = _arrays(framing)
    _, cov = _covariates(framing)
    total, mediator, outcome = _ols(y, treat, cov), _ols(emo, treat, cov), _ols(y, treat, emo, cov)
    c, a = total.params[1], mediator.params[1]
    c_prime, b = outcome.params[1], outcome.params[2]
    np.testing.assert_allclose(dec.disparity[0, 0], c, **TIGHT)
    np.testing.assert_allclose(dec.direct[0, 0], c_prime, **TIGHT)
    np.testing.assert_allclose(dec.indirect[0, 0], a * b, **TIGHT)
    # c = c' + ab with the same covariates in all three models (MacKinnon 2008, ch. 3;
    # from memory).
    np.testing.assert_allclose(c, c_prime + a * b, **TIGHT)

    # Standard error.  The tool sees only the two residual columns, so it divides the
    # residual sums of squares by n - 3 (judge) and n - 2 (emo on treat), where the models
    # with the six covariate columns use n - 9 and n - 8 (statsmodels' df_resid).  The
    # sums of squares and the inverse cross-products are the same (Frisch-Waugh-Lovell),
    # so each variance differs by exactly that ratio of divisors.
    n = len(framing)
    assert (outcome.df_resid, mediator.df_resid) == (n - 9, n - 8)
    s_b2 = outcome.bse[2] ** 2 * outcome.df_resid / (n - 3)
    s_a2 = mediator.bse[1] ** 2 * mediator.df_resid / (n - 2)
    np.testing.assert_allclose(dec.indirect_se[0, 0], np.sqrt(a**2 * s_b2 + b**2 * s_a2), **TIGHT)
    # Against the textbook Sobel SE from statsmodels' standard errors (Sobel 1982) it is
    # therefore smaller by about 1 - sqrt((n - 9) / (n - 3)) = 1.1 %; between the two
    # divisor ratios exactly.
    ratio = dec.indirect_se[0, 0] / _sobel_se(a, mediator.bse[1], b, outcome.bse[2])
    assert np.sqrt((n - 9) / (n - 3)) <= ratio <= np.sqrt((n - 8) / (n - 2))
    assert abs(ratio - 0.989) < 0.001


def test_indirect_part_agrees_with_the_statsmodels_mediation_acme(framing):
    # statsmodels.stats.mediation.Mediation, method="parametric": the quasi-Bayesian
    # algorithm 1 of Imai, Keele & Tingley (2010, Psychological Methods 15(4)), with both
    # models OLS and the vignette's covariates.  In each replication it draws the two
    # models' coefficients from their sampling laws and the mediator's potential values
    # with their residual noise; with linear models and no interaction the replication's
    # ACME is b* (a* + noise mean), whose expectation is a*b exactly.  So the average over
    # replications equals our covariate-adjusted indirect part up to Monte Carlo error,
    # measured here from the replications themselves.
    treat, emo, y = _arrays(framing)
    _, cov = _covariates(framing)
    outcome = sm.OLS(y, sm.add_constant(np.column_stack([treat, emo, cov])))
    mediator = sm.OLS(emo, sm.add_constant(np.column_stack([treat, cov])))
    # Positions: treat is column 1 of both designs, emo column 2 of the outcome design.
    med = Mediation(outcome, mediator, (1, 1), 2)
    result = med.fit(method="parametric", n_rep=2000, rng=np.random.RandomState(2014))
    acme = result.summary().loc["ACME (average)", "Estimate"]
    per_rep = np.asarray(med.indirect_effects[0]).mean(axis=0)
    np.testing.assert_allclose(per_rep.mean(), acme, rtol=1e-12)
    mc_error = per_rep.std(ddof=1) / np.sqrt(per_rep.size)

    treat_r, emo_r, y_r = _partialled(framing)
    dec = _decompose(np.column_stack([treat_r, emo_r]), y_r, ["treat", "emo"])
    assert abs(dec.indirect[0, 0] - acme) <= 4 * mc_error, (dec.indirect[0, 0], acme, mc_error)
    assert mc_error < 0.01 * abs(acme)
    # The spread of the replications: b* and a* independent normal draws and the noise
    # mean e with variance 2 sigma_m^2 / n, so Var(b*(a* + e)) = s_b^2 (a^2 + s_a^2 +
    # s_e^2) + b^2 (s_a^2 + s_e^2) exactly (variance of a product of independent
    # variables, Goodman 1960, JASA; from memory): the first-order Sobel variance plus the
    # second-order and noise terms.  Sampling error of an sd from 2,000 draws: about 2 %.
    out_fit, med_fit = outcome.fit(), mediator.fit()
    a, s_a = med_fit.params[1], med_fit.bse[1]
    b, s_b = out_fit.params[2], out_fit.bse[2]
    s_e2 = 2 * med_fit.scale / len(framing)
    expected = np.sqrt(s_b**2 * (a**2 + s_a**2 + s_e2) + b**2 * (s_a**2 + s_e2))
    np.testing.assert_allclose(per_rep.std(ddof=1), expected, rtol=0.08)
    assert expected > _sobel_se(a, s_a, b, s_b)
