"""The claims the Ostwyn Mutual handlers see: cue distributions and the fraud outcome model.

Every cue is drawn inside fixed bounds (CUE_BOUNDS) so that the handlers' linear
judge models can be shown never to leave the 0-100 priority scale. Where a number
comes from is written beside it; "invented" means chosen to look plausible.
"""

from __future__ import annotations

import numpy as np
from scipy.special import ndtr, ndtri

from synthetic_logs.ostwyn_truth import DESIGN_COLUMNS

AGE_BANDS = ("18-24", "25-39", "40-59", "60+")
# Share of claimants per band (invented, loosely shaped like a motor book).
AGE_SHARES = (0.12, 0.33, 0.35, 0.20)
MALE_SHARE = 0.55  # invented

# Recorded values always lie inside these bounds (after rounding to the recorded
# precision). Dummies are 0/1.
CUE_BOUNDS: dict[str, tuple[float, float]] = {
    "claim_amount": (150.0, 15000.0),
    "policy_age_days": (0.0, 3650.0),
    "prior_claims_3y": (0.0, 4.0),
    "police_report": (0.0, 1.0),
    "repair_quote_ratio": (0.05, 1.5),
    "independent_witness": (0.0, 1.0),
    "report_delay_days": (0.0, 30.0),
    "vehicle_age_years": (0.0, 18.0),
    "claimant_age_band=18-24": (0.0, 1.0),
    "claimant_age_band=25-39": (0.0, 1.0),
    "claimant_age_band=60+": (0.0, 1.0),
    "claimant_gender=male": (0.0, 1.0),
}

# Fraud confirmed: logit P = intercept + sum coef * cue (per recorded unit).
# Signs follow the usual red flags (new policy, repeat claims, no police report,
# no witness, inflated repair quote, late reporting); sizes invented. The
# forbidden cues carry no direct effect. Intercept tuned so that about 7% of
# verdicts are "Yes" (invented; the brief asks for 5-10%).
ENVIRONMENT: dict[str, float] = {
    "intercept": -3.1,
    "claim_amount": 0.00006,
    "policy_age_days": -0.0005,
    "prior_claims_3y": 0.55,
    "police_report": -1.0,
    "repair_quote_ratio": 1.3,
    "independent_witness": -0.9,
    "report_delay_days": 0.06,
    "vehicle_age_years": 0.02,
    "claimant_age_band=18-24": 0.0,
    "claimant_age_band=25-39": 0.0,
    "claimant_age_band=60+": 0.0,
    "claimant_gender=male": 0.0,
}


def _truncated_normal(rng, mean, sd, lo, hi, n):
    """Inverse-CDF draw of ``n`` values from N(mean, sd^2) restricted to [lo, hi]."""
    a, b = ndtr((lo - mean) / sd), ndtr((hi - mean) / sd)
    return mean + sd * ndtri(rng.uniform(a, b, n))


def _truncated_exponential(rng, mean, hi, n):
    """Inverse-CDF draw from an exponential with ``mean`` restricted to [0, hi]."""
    top = 1.0 - np.exp(-hi / mean)
    return -mean * np.log1p(-rng.uniform(0.0, top, n))


def draw_cues(rng: np.random.Generator, n: int) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Draw ``n`` claims.

    Returns the recorded columns as strings (the file's text, in config codes) and
    the design matrix (n, len(DESIGN_COLUMNS)) of the same recorded values as floats,
    so the judge model is exactly linear in what the files say.
    """
    band = rng.choice(4, size=n, p=AGE_SHARES)
    male = rng.random(n) < MALE_SHARE

    # Young drivers run older, cheaper cars (common knowledge; sizes invented). The
    # overall mean, about 8 years, is near the UK average car age (SMMT, from memory).
    vehicle_mean = np.array([12.5, 7.8, 7.0, 7.5])[band]
    vehicle_age = np.floor(_truncated_normal(rng, vehicle_mean, 3.5, 0.0, 18.999, n))
    # Cover held with this insurer; shorter for young claimants (invented).
    policy_mean = np.array([1000.0, 1150.0, 1250.0, 1300.0])[band]
    policy_age = np.floor(_truncated_exponential(rng, policy_mean, 3650.999, n))
    prior_rate = np.array([0.28, 0.25, 0.20, 0.20])[band]  # about 0.08 a year (from memory)
    prior = np.minimum(rng.poisson(prior_rate), 4)
    police = rng.random(n) < 0.35  # invented
    witness = rng.random(n) < np.where(police, 0.35, 0.20)  # invented
    # Repair quote over book value: older cars have lower book values (invented sizes).
    ratio_median = 0.3 * np.exp(0.02 * vehicle_age)
    ratio = np.round(
        np.exp(_truncated_normal(rng, np.log(ratio_median), 0.5, np.log(0.05), np.log(1.5), n)), 2
    )
    ratio = np.clip(ratio, 0.05, 1.5)
    # Claim amounts: right-skewed, median £2,800, mean near £3,500; UK average motor
    # claim payouts are a few £1,000s (ABI, from memory). Capped at £15,000 (invented).
    amount = np.round(
        np.exp(_truncated_normal(rng, np.log(2800.0), 0.8, np.log(150.0), np.log(15000.0), n)), 2
    )
    amount = np.clip(amount, 150.0, 15000.0)
    # Most claims are reported within a few days (invented).
    delay = np.floor(_truncated_exponential(rng, 3.5, 30.999, n))

    x = np.column_stack(
        [
            amount,
            policy_age,
            prior,
            police,
            ratio,
            witness,
            delay,
            vehicle_age,
            band == 0,
            band == 1,
            band == 3,
            male,
        ]
    ).astype(float)
    assert x.shape[1] == len(DESIGN_COLUMNS)
    text = {
        "claim_amount": np.char.mod("%.2f", amount),
        "policy_age_days": policy_age.astype(np.int64).astype(str),
        "prior_claims_3y": prior.astype(np.int64).astype(str),
        "police_report": np.where(police, "Y", "N"),
        "repair_quote_ratio": np.char.mod("%.2f", ratio),
        "independent_witness": np.where(witness, "Y", "N"),
        "report_delay_days": delay.astype(np.int64).astype(str),
        "vehicle_age_years": vehicle_age.astype(np.int64).astype(str),
        "claimant_age_band": np.array(AGE_BANDS)[band],
        "claimant_gender": np.where(male, "male", "female"),
    }
    return text, x


def environment_logit(x: np.ndarray, environment: dict[str, float]) -> np.ndarray:
    """Log-odds of "fraud confirmed" for each row of the design matrix ``x``."""
    coef = np.array([environment[c] for c in DESIGN_COLUMNS])
    return environment["intercept"] + x @ coef
