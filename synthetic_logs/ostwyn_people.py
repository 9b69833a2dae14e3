"""The Ostwyn Mutual claims handlers: teams, judge models and the planted changes.

Each handler's judge model is priority = intercept + sum_k w_k x_k + e. The
intercept and the error bound are chosen per handler so that, for every cue
value inside CUE_BOUNDS and on every day, the priority stays inside [0.1, 99.9]:
no recorded value ever needs clipping.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import date, timedelta

import numpy as np
from scipy.optimize import brentq
from scipy.special import ndtr
from scipy.stats import norm

from synthetic_logs.ostwyn_cues import CUE_BOUNDS
from synthetic_logs.ostwyn_truth import (
    DESIGN_COLUMNS,
    HandlerTruth,
    PlantedChange,
    models_only,
    true_judge_weights,
)

TEAMS = ("Alder", "Birch", "Cedar")  # invented, neutral

# A team's typical weights, priority points per recorded unit (invented; the signs
# follow the usual fraud red flags). Forbidden cues: zero.
TYPICAL_WEIGHTS: dict[str, float] = {
    "claim_amount": 0.0008,  # 0.8 points per £1,000
    "policy_age_days": -0.0025,  # newer cover looks riskier
    "prior_claims_3y": 2.5,
    "police_report": -6.0,
    "repair_quote_ratio": 8.0,
    "independent_witness": -5.0,
    "report_delay_days": 0.3,
    "vehicle_age_years": 0.1,
}
# The handler whose consistency drops judges from three cues only, which leaves
# room on the 0-100 scale for an error sd of 18 (see README).
FEW_CUE_WEIGHTS: dict[str, float] = {
    "police_report": -10.0,
    "independent_witness": -8.0,
    "prior_claims_3y": 2.5,
}
_NOISE_SD_RANGE = (3.5, 5.5)  # gives R_s of about 0.7-0.85 (typical; see README)
_TEAM_SPREAD, _HANDLER_SPREAD = 0.10, 0.15  # log-scale spread of weights (invented)
_TOP = 49.9  # |priority - 50| never exceeds this, so rounding stays in [0, 100]
_MIN_ROOM = 2.5  # error bound at least this many sd for drawn handlers
_CUT = 3.0  # errors are normal truncated at +-3 sigma unless the scale needs less

# Planted change dates as day offsets for the default 730-day run from 2024-11-01
# (all Mondays there); other spans scale them and move them to the next Monday.
_OFFSETS = {
    "drift_start": 122,  # 2025-03-03
    "drift_end": 304,  # 2025-09-01
    "consistency_start": 213,  # 2025-06-02
    "consistency_end": 304,  # 2025-09-01
    "gender_onset": 339,  # 2025-10-06
    "proxy_onset": 486,  # 2026-03-02
}
GENDER_WEIGHT = 4.0  # points for "male"; standardised weight about 0.25 (measured)
PROXY_WEIGHT = 1.2  # points per vehicle year after onset (from 0.1)
NOISE_BEFORE, NOISE_AFTER = 6.0, 18.0
DRIFT_FACTOR = 2.0


def _event_day(start: date, days: int, key: str) -> date:
    day = start + timedelta(round(_OFFSETS[key] * days / 730))
    day += timedelta((7 - day.weekday()) % 7)
    return min(day, start + timedelta(days - 1))


def _s(c: float) -> float:
    """sd of a standard normal truncated to [-c, c]."""
    mass = 2.0 * ndtr(c) - 1.0
    return float(np.sqrt(1.0 - 2.0 * c * norm.pdf(c) / mass))


def noise_scale(sd: float, bound: float) -> tuple[float, float]:
    """(sigma, c) such that sigma * Z, Z ~ N(0, 1) truncated to [-c, c], has sd ``sd``
    and never exceeds ``bound``. c is 3 when that fits, smaller otherwise.
    Raises ValueError when no such pair exists (sd >= bound / sqrt(3))."""
    if _CUT * sd / _s(_CUT) <= bound:
        return sd / _s(_CUT), _CUT
    if sd >= 0.999 * bound / np.sqrt(3.0):
        raise ValueError(f"noise sd {sd} does not fit inside +-{bound}")
    c = brentq(lambda c: bound * _s(c) / c - sd, 1e-3, _CUT)
    return bound / c, c


def _plan_changes(handlers, start: date, days: int) -> tuple[PlantedChange, ...]:
    by_team = {t: [h.handler_id for h in handlers if h.team == t] for t in TEAMS}
    first, drift, last = by_team[TEAMS[0]], by_team[TEAMS[1]], by_team[TEAMS[2]]
    on = {k: _event_day(start, days, k) for k in _OFFSETS}
    return (
        PlantedChange(
            "forbidden_cue_direct", (first[-1],), None, "claimant_gender=male", "set",
            0.0, GENDER_WEIGHT, on["gender_onset"], on["gender_onset"], "claimant_gender",
            "starts adding priority for male claimants",
        ),
        PlantedChange(
            "proxy_cue", (last[-1],), None, "vehicle_age_years", "set",
            TYPICAL_WEIGHTS["vehicle_age_years"], PROXY_WEIGHT, on["proxy_onset"],
            on["proxy_onset"], "claimant_age_band",
            "starts weighting vehicle age, which is higher for 18-24 claimants; "
            "no direct weight on age band",
        ),
        PlantedChange(
            "consistency_loss", (first[0],), None, "noise_sd", "set", NOISE_BEFORE,
            NOISE_AFTER, on["consistency_start"], on["consistency_end"], None,
            "error sd rises steadily over one quarter, then stays",
        ),
        PlantedChange(
            "team_drift", tuple(drift), TEAMS[1], "report_delay_days", "scale", 1.0,
            DRIFT_FACTOR, on["drift_start"], on["drift_end"], None,
            "whole team's weight on report delay doubles steadily over about six months",
        ),
    )  # fmt: skip


def _draft_handlers(rng: np.random.Generator, n: int) -> list[HandlerTruth]:
    team_factor = {t: np.exp(rng.normal(0, _TEAM_SPREAD, len(TYPICAL_WEIGHTS))) for t in TEAMS}
    drafts = []
    for i in range(n):
        team = TEAMS[i * len(TEAMS) // n]
        spread = np.exp(np.clip(rng.normal(0, _HANDLER_SPREAD, len(TYPICAL_WEIGHTS)), -0.3, 0.3))
        typical = np.array(list(TYPICAL_WEIGHTS.values())) * team_factor[team] * spread
        weights = dict.fromkeys(DESIGN_COLUMNS, 0.0)
        weights.update(zip(TYPICAL_WEIGHTS, typical.round(6).tolist(), strict=True))
        drafts.append(
            HandlerTruth(
                handler_id=f"H{i + 1:03d}",
                team=team,
                intercept=0.0,
                weights=weights,
                noise_sd=round(float(rng.uniform(*_NOISE_SD_RANGE)), 2),
                noise_bound=0.0,
                claims_rate=round(float(rng.uniform(0.8, 1.2)), 3),  # invented workload spread
            )
        )
    return drafts


def _span(weights: dict[str, float]) -> tuple[float, float]:
    """Lowest and highest value of sum_k w_k x_k over the cue bounds."""
    lo = hi = 0.0
    for col, w in weights.items():
        if col in CUE_BOUNDS:
            a, b = w * CUE_BOUNDS[col][0], w * CUE_BOUNDS[col][1]
            lo, hi = lo + min(a, b), hi + max(a, b)
    return lo, hi


def _seat(handler: HandlerTruth, changes, start: date, days: int) -> HandlerTruth:
    """Fix the intercept and error bound so priority stays in range on every day.

    Weights move linearly between change dates, so the extremes of the linear part
    occur on those dates; checking them covers every day. A drawn handler whose
    weights leave too little room for errors of at least 2.5 sd has all its weights
    shrunk by 10% steps (rare; keeps every seed valid).
    """
    days_to_check = {start, start + timedelta(days - 1)}
    days_to_check |= {d for c in changes for d in (c.start, c.end)}
    while True:
        probe = models_only((handler,), changes)
        spans, sds = [], []
        for d in days_to_check:
            p = true_judge_weights(probe, handler.handler_id, d)
            spans.append(_span({c: p[c] for c in DESIGN_COLUMNS}))
            sds.append(p["noise_sd"])
        lo, hi = min(s[0] for s in spans), max(s[1] for s in spans)
        bound = _TOP - (hi - lo) / 2.0
        if bound >= _MIN_ROOM * max(sds) or any(
            handler.handler_id in c.handler_ids and c.mode == "set" for c in changes
        ):
            break
        shrunk = {k: round(v * 0.9, 6) for k, v in handler.weights.items()}
        handler = replace(handler, weights=shrunk)
    noise_scale(max(sds), bound)  # raises if the error cannot fit
    return replace(handler, intercept=round(50.0 - (lo + hi) / 2.0, 4), noise_bound=round(bound, 4))


def build_handlers(
    rng: np.random.Generator, n: int, start: date, days: int
) -> tuple[tuple[str, ...], tuple[HandlerTruth, ...], tuple[PlantedChange, ...]]:
    """Draw ``n`` handlers in three teams and plan the changes.

    Returns (teams, handlers, changes). Seats: the first team's first handler loses
    consistency, its last handler starts using gender, the last team's last
    handler starts using the proxy cue, and the middle team drifts.
    """
    drafts = _draft_handlers(rng, n)
    changes = _plan_changes(drafts, start, days)
    special = {c.kind: c.handler_ids[0] for c in changes if c.kind != "team_drift"}
    fixed = []
    for h in drafts:
        if h.handler_id == special["consistency_loss"]:
            weights = dict.fromkeys(DESIGN_COLUMNS, 0.0) | FEW_CUE_WEIGHTS
            h = replace(h, weights=weights, noise_sd=NOISE_BEFORE)
        elif h.handler_id == special["proxy_cue"]:
            # Fixed, slightly light-touch weights leave room for the large proxy weight.
            weights = dict.fromkeys(DESIGN_COLUMNS, 0.0)
            weights |= {k: round(0.85 * v, 6) for k, v in TYPICAL_WEIGHTS.items()}
            weights["vehicle_age_years"] = TYPICAL_WEIGHTS["vehicle_age_years"]
            h = replace(h, weights=weights, noise_sd=4.0)
        fixed.append(_seat(h, changes, start, days))
    return TEAMS, tuple(fixed), changes
