"""The simulated world of the alerts benchmark (``benchmarks.bench_alerts``): cues,
judges, planted changes and the rolling-window moments of their decisions.

The figures the benchmark reports hold for this world, not for every organisation:
- cues: a binary forbidden cue ``protected`` (share 0.4); a numeric permitted ``proxy``
  correlated 0.44 with it; five other permitted cues: a skewed amount, a score
  correlated 0.3 with the amount's logarithm, a binary flag, a three-level region
  (two dummies) and a count.  All decisions are independent; outcomes play no part;
- a decision-maker makes Poisson(volume / 90) decisions a day; judgment = 50 + x'b +
  normal noise, with their own standardised weights on the five other cues (0.15 to
  0.5 in size, random signs), none on ``protected`` or ``proxy``, and noise set so that
  R_s is uniform on 0.70 to 0.85;
- innocent decision-makers keep that policy for the whole horizon (80 weeks); planted
  ones change it once, on a day drawn uniformly from the week after a burn-in of two
  window lengths: direct use of ``protected`` at standardised weight 0.10, 0.15 or
  0.25; proxy use (the ``proxy`` weight jumps so that the standardised indirect part
  is 0.25); a drift of the ``score`` weight by a standardised 0.15 or 0.25; or a loss
  of consistency (the noise grows so that the population R_s falls to 0.40, below the
  default floor of 0.5).  Sizes are population values after the change (solved from
  the cue covariance);
- 30 decision-makers form an organisation (25 innocent, 5 planted).  Each organisation
  has its own calendar, so the previous scheme's Benjamini-Hochberg family (all
  decision-makers of one window end) is one organisation of 30, as in the demo;
- the configuration is the shipped default (``monitor.config.PolicyConfig`` and
  ``WindowsConfig``) with ``protected`` forbidden.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from monitor.refit.buckets import finish_moments

SEED = 20_261_212

NAMES = (
    "protected",
    "proxy",
    "amount",
    "score",
    "prior_flag",
    "region=south",
    "region=east",
    "tenure",
)
FORBIDDEN, PROXY, DRIFTING = 0, 1, 3  # design-column indices
OTHER = (2, 3, 4, 5, 6, 7)  # permitted cues an innocent judge uses
PROXY_CORRELATION = 0.44
P_PROTECTED = 0.4
R_S_RANGE = (0.70, 0.85)
JUDGMENT_SCALE = 10.0
HORIZON_WEEKS = 52  # looks after the latest onset
ORG_SIZE, PLANTED_PER_ORG = 30, 5
ROWS_PER_CHUNK = 250_000  # simulated decisions held at once (~120 MB of sums)


@dataclass(frozen=True)
class Plant:
    """A planted change: ``effect`` "direct" | "proxy" | "drift" at standardised
    ``size``, detected by alerts of ``kind`` on design column ``cue``."""

    effect: str
    size: float

    @property
    def label(self) -> str:
        return f"{self.effect} {self.size:.2f}"

    @property
    def kind(self) -> str:
        return {
            "direct": "forbidden_cue",
            "proxy": "proxy_use",
            "drift": "drift",
            "consistency": "consistency",
        }[self.effect]

    @property
    def cue(self) -> str:
        if self.effect == "consistency":
            return "R_s"
        return NAMES[{"direct": FORBIDDEN, "proxy": FORBIDDEN, "drift": DRIFTING}[self.effect]]


PLANTS = (
    Plant("direct", 0.10),
    Plant("direct", 0.15),
    Plant("direct", 0.25),
    Plant("proxy", 0.25),
    Plant("drift", 0.15),
    Plant("drift", 0.25),
    Plant("consistency", 0.40),
)


def draw_cues(rng: np.random.Generator, n: int) -> np.ndarray:
    """n cue rows over the design columns ``NAMES`` (see the module text)."""
    x = np.empty((n, len(NAMES)))
    f = rng.random(n) < P_PROTECTED
    x[:, 0] = f
    c = PROXY_CORRELATION
    x[:, 1] = c * (f - P_PROTECTED) / np.sqrt(P_PROTECTED * (1 - P_PROTECTED))
    x[:, 1] += np.sqrt(1 - c * c) * rng.standard_normal(n)
    log_amount = rng.standard_normal(n)
    x[:, 2] = np.exp(0.3 + 0.6 * log_amount)
    x[:, 3] = 0.3 * log_amount + np.sqrt(1 - 0.09) * rng.standard_normal(n)
    x[:, 4] = rng.random(n) < 0.25
    region = rng.random(n)
    x[:, 5] = (region >= 0.5) & (region < 0.8)
    x[:, 6] = region >= 0.8
    x[:, 7] = rng.poisson(4.0, n)
    return x


@dataclass(frozen=True)
class World:
    """Population moments of the cues (from 2 million draws with a fixed seed)."""

    mean: np.ndarray
    cov: np.ndarray

    @classmethod
    def build(cls, seed: int = SEED) -> World:
        x = draw_cues(np.random.default_rng(seed), 2_000_000)
        return cls(x.mean(axis=0), np.cov(x, rowvar=False))

    def sd_judgment(self, b: np.ndarray, sigma: float) -> float:
        return float(np.sqrt(b @ self.cov @ b + sigma**2))

    def std_direct(self, b: np.ndarray, sigma: float) -> float:
        """Population standardised weight of the forbidden cue."""
        return b[FORBIDDEN] * np.sqrt(self.cov[0, 0]) / self.sd_judgment(b, sigma)

    def std_indirect(self, b: np.ndarray, sigma: float) -> float:
        """Population standardised indirect part: sum_k b_k delta_k sd(f) / sd(Ys), with
        delta_k = cov(x_k, f) / var(f) the proxies' imbalance."""
        rest = np.arange(len(b)) != FORBIDDEN
        carried = b[rest] @ self.cov[rest, FORBIDDEN] / self.cov[0, 0]
        return carried * np.sqrt(self.cov[0, 0]) / self.sd_judgment(b, sigma)

    def std_change(self, before: np.ndarray, after: np.ndarray, sigma: float) -> float:
        """Standardised change of the drifting weight, on the scale after the change (as
        the drift findings measure it: raw change x sd(x) / sd(Ys) of the later window)."""
        d = after[DRIFTING] - before[DRIFTING]
        return d * np.sqrt(self.cov[DRIFTING, DRIFTING]) / self.sd_judgment(after, sigma)


def innocent_policy(world: World, rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """Raw weights and noise sd of one innocent judge (R_s uniform on ``R_S_RANGE``)."""
    beta = rng.uniform(0.15, 0.5, len(OTHER)) * rng.choice([-1.0, 1.0], len(OTHER))
    b = np.zeros(len(NAMES))
    b[list(OTHER)] = JUDGMENT_SCALE * beta / np.sqrt(np.diag(world.cov)[list(OTHER)])
    r_s = rng.uniform(*R_S_RANGE)
    sigma = float(np.sqrt(b @ world.cov @ b * (1 - r_s**2) / r_s**2))
    return b, sigma


def planted_noise(world: World, b: np.ndarray, plant: Plant) -> float:
    """The noise sd after a planted loss of consistency: population R_s = ``plant.size``."""
    r_s = plant.size
    return float(np.sqrt(b @ world.cov @ b * (1 - r_s**2) / r_s**2))


def planted_policy(world: World, b: np.ndarray, sigma: float, plant: Plant) -> np.ndarray:
    """The weights after the planted change, solved so that the population size is
    ``plant.size`` (bracketed root of a monotone function of one weight); a loss of
    consistency keeps the weights (its noise: ``planted_noise``)."""
    if plant.effect == "consistency":
        return b.copy()

    def with_weight(j: int, value: float) -> np.ndarray:
        out = b.copy()
        out[j] = value
        return out

    if plant.effect == "direct":
        j, size = FORBIDDEN, lambda v: world.std_direct(with_weight(FORBIDDEN, v), sigma)
    elif plant.effect == "proxy":
        j, size = PROXY, lambda v: world.std_indirect(with_weight(PROXY, v), sigma)
    elif plant.effect == "drift":
        sign = np.sign(b[DRIFTING]) or 1.0
        j = DRIFTING

        def size(v: float) -> float:
            return sign * world.std_change(b, with_weight(DRIFTING, b[DRIFTING] + sign * v), sigma)

    else:
        raise ValueError(f"unknown planted effect {plant.effect!r}")
    span = 100.0 * JUDGMENT_SCALE
    value = optimize.brentq(lambda v: size(v) - plant.size, 0.0, span, xtol=1e-12)
    if plant.effect == "drift":
        return with_weight(j, b[DRIFTING] + np.sign(b[DRIFTING] or 1.0) * value)
    return with_weight(j, value)


@dataclass
class Persons:
    """The decision-makers of one simulated batch: ids, organisation, whether planted,
    onset day (the horizon for innocents), raw weights before/after, noise sd
    before/after."""

    ids: np.ndarray
    org: np.ndarray
    planted: np.ndarray
    onset: np.ndarray
    before: np.ndarray
    after: np.ndarray
    sigma: np.ndarray
    sigma_after: np.ndarray


def window_geometry(length: int, step: int) -> tuple[int, np.ndarray]:
    """Simulated days and the window-end days (0-based) of the weekly looks: the first
    full window, then every ``step`` days for ``HORIZON_WEEKS`` after the latest onset."""
    last_onset = 2 * length + step - 1
    days = last_onset + HORIZON_WEEKS * 7 + step
    ends = np.arange(length - 1, days, step)
    return int(ends[-1] + 1), ends


def make_persons(
    world: World,
    rng: np.random.Generator,
    plant: Plant,
    orgs: int,
    days: int,
    length: int,
    step: int,
) -> Persons:
    """``orgs`` organisations of ``ORG_SIZE`` decision-makers, the last
    ``PLANTED_PER_ORG`` of each planted with ``plant`` (onset in the week after a burn-in
    of two window lengths)."""
    n = orgs * ORG_SIZE
    org = np.repeat(np.arange(orgs), ORG_SIZE)
    planted = np.tile(np.arange(ORG_SIZE) >= ORG_SIZE - PLANTED_PER_ORG, orgs)
    before, after = np.zeros((n, len(NAMES))), np.zeros((n, len(NAMES)))
    sigma, onset = np.zeros(n), np.full(n, days)
    sigma_after = np.zeros(n)
    for i in range(n):
        before[i], sigma[i] = innocent_policy(world, rng)
        after[i], sigma_after[i] = before[i], sigma[i]
        if planted[i]:
            after[i] = planted_policy(world, before[i], sigma[i], plant)
            if plant.effect == "consistency":
                sigma_after[i] = planted_noise(world, before[i], plant)
            onset[i] = 2 * length + rng.integers(0, step)
    ids = np.array([f"o{o:03d}-p{i % ORG_SIZE:02d}" for i, o in enumerate(org)], dtype=object)
    return Persons(ids, org, planted, onset, before, after, sigma, sigma_after)


_TRI = np.triu_indices(len(NAMES) + 1)


def window_moments(
    world: World,
    rng: np.random.Generator,
    persons: Persons,
    rate: float,
    days: int,
    ends: np.ndarray,
    length: int,
):
    """Moments over (x, Ys) of every (person, look) window, persons major: the window
    ending on day e holds the person's decisions of days e - length + 1 .. e.  Decisions
    are generated a chunk of persons at a time; sums over a window are differences of
    running sums over the chunk's rows (kept in person-day order), shifted by the
    population means, and turned into centred moments by ``finish_moments``."""
    p = len(NAMES) + 1
    shift = np.r_[world.mean, 50.0]
    n_people, n_looks = len(persons.ids), len(ends)
    n = np.zeros(n_people * n_looks)
    s = np.zeros((n_people * n_looks, p))
    q = np.zeros((n_people * n_looks, len(_TRI[0])))
    chunk = max(1, int(ROWS_PER_CHUNK // (rate * days)))
    for lo in range(0, n_people, chunk):
        who = np.arange(lo, min(lo + chunk, n_people))
        counts = rng.poisson(rate, (len(who), days))
        person = np.repeat(who, counts.sum(axis=1))
        day = np.repeat(np.tile(np.arange(days), len(who)), counts.ravel())
        x = draw_cues(rng, len(day))
        late = day >= persons.onset[person]
        weights = np.where(late[:, None], persons.after[person], persons.before[person])
        y = 50.0 + np.einsum("ij,ij->i", x - world.mean, weights)
        noise = np.where(late, persons.sigma_after[person], persons.sigma[person])
        y += noise * rng.standard_normal(len(day))
        z = np.column_stack([x, y]) - shift
        running = np.zeros((len(day) + 1, 1 + p + len(_TRI[0])))
        np.cumsum(
            np.column_stack([np.ones(len(day)), z, z[:, _TRI[0]] * z[:, _TRI[1]]]),
            axis=0,
            out=running[1:],
        )
        first_row = np.r_[0, np.cumsum(counts.ravel())]  # row offset of each (person, day)
        local = np.arange(len(who))[:, None] * days
        hi = first_row[local + ends[None, :] + 1].ravel()
        lo_row = first_row[local + ends[None, :] - length + 1].ravel()
        sums = running[hi] - running[lo_row]
        at = slice(who[0] * n_looks, (who[-1] + 1) * n_looks)
        n[at], s[at], q[at] = sums[:, 0], sums[:, 1 : 1 + p], sums[:, 1 + p :]
    full = np.zeros((len(n), p, p))
    full[:, _TRI[0], _TRI[1]] = q
    full[:, _TRI[1], _TRI[0]] = q
    return finish_moments(n, np.broadcast_to(shift, (len(n), p)), s, full)
