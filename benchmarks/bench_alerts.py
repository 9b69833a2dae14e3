"""Operating characteristics of the alerts, by simulation (`python -m benchmarks.bench_alerts`).

Decision-makers are simulated day by day with a planted truth, and their rolling windows
go through the project's own statistics and policy code - ``lens.fit_lens`` on window
moments (``refit.buckets.finish_moments``), ``assess.findings.forbidden_findings`` and
``drift_findings`` on an in-memory ``StoredWindows``, ``assess.alerts._window_states``
and ``stats.episodes.episodes`` - under both alert rules (``policy.alert_rule`` =
"calibrated" and the previous "per_window_fdr"), on the same simulated data.  The
DuckDB store is left out (too slow for thousands of person-years); every other step is
the one `assess` runs.

The simulated world (the figures hold for it, not for every organisation):
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
  is 0.25); or a drift of the ``score`` weight by a standardised 0.15 or 0.25.  Sizes
  are population values after the change (solved from the cue covariance);
- 30 decision-makers form an organisation (25 innocent, 5 planted).  Each organisation
  has its own calendar, so the previous scheme's Benjamini-Hochberg family (all
  decision-makers of one window end) is one organisation of 30, as in the demo;
- the configuration is the shipped default (``monitor.config.PolicyConfig`` and
  ``WindowsConfig``) with ``protected`` forbidden.

Reported per rule and volume: (a) false alerts (episodes opened) per 100 innocent
person-cue-years for each alert kind, the time base being the span of the weekly looks
(from the first full window; for drift from the first look with a non-overlapping
predecessor), with an exact Poisson 95 % upper bound; drift counts every design column
as a series, as the alerts do (8 per person); (b) detection delay in weeks from the
change to the first weekly look at which an alert of the planted kind on the planted
cue is open (median and 90th percentile over the planted persons detected within 52
weeks; never-detected persons are counted apart).  When the goals (<= 1 false
forbidden/proxy alert and <= 2 drift per 100 person-cue-years; direct use at 0.15 and
~300 decisions per 90 days found within 8 weeks in the median) do not both hold, the
trade-off curve varies ``policy.false_alerts_per_100_years`` at 300 decisions per 90
days.  Results: printed, and written as JSON to ``--json`` (by default
``monitor/audit/operating_characteristics.json``, read by the audit pack's methodology;
a run with ``--quick``, ``--orgs``, ``--seed`` or ``--length-days`` writes to
``benchmarks/out/bench_alerts_exploration.json`` instead, never over the committed
figures).  Drift's change-point estimate ("since when?") decides no verdict and is
skipped unless ``--change-points`` is given (it costs ~60 ms a flagged drift row).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from unittest import mock

import numpy as np
import pandas as pd
from scipy import optimize, stats

from monitor.assess import findings as findings_module
from monitor.assess.alerts import _window_states
from monitor.assess.findings import (
    FINDING_COLUMNS,
    StoredWindows,
    _below_policy_minimum,
    drift_findings,
    forbidden_findings,
)
from monitor.config import Config
from monitor.refit.buckets import finish_moments
from monitor.stats.episodes import episodes
from monitor.stats.lens import fit_lens
from monitor.stats.monitoring import drift_limit, forbidden_cue_limit

REPO = Path(__file__).resolve().parents[1]
OUT = Path(__file__).resolve().parent / "out"
DEFAULT_JSON = REPO / "monitor" / "audit" / "operating_characteristics.json"
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

VOLUMES = (100, 300, 1000)
RULES = ("calibrated", "per_window_fdr")
KINDS = ("forbidden_cue", "proxy_use", "drift")
TRADEOFF_TARGETS = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0)
TRADEOFF_VOLUME = 300
HORIZON_WEEKS = 52
ORG_SIZE, PLANTED_PER_ORG = 30, 5
ROWS_PER_CHUNK = 250_000  # simulated decisions held at once (~120 MB of sums)
GOALS = {"forbidden_cue": 1.0, "proxy_use": 1.0, "drift": 2.0}
GOAL_DELAY_WEEKS, GOAL_SIZE = 8.0, 0.15


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
        return {"direct": "forbidden_cue", "proxy": "proxy_use", "drift": "drift"}[self.effect]

    @property
    def cue(self) -> str:
        return NAMES[{"direct": FORBIDDEN, "proxy": FORBIDDEN, "drift": DRIFTING}[self.effect]]


PLANTS = (
    Plant("direct", 0.10),
    Plant("direct", 0.15),
    Plant("direct", 0.25),
    Plant("proxy", 0.25),
    Plant("drift", 0.15),
    Plant("drift", 0.25),
)


@dataclass(frozen=True)
class Setup:
    """One benchmark run: ``orgs`` organisations of 30 per volume and planted change."""

    volumes: tuple[int, ...] = VOLUMES
    plants: tuple[Plant, ...] = PLANTS
    orgs_per_plant: int = 12
    tradeoff: tuple[float, ...] = TRADEOFF_TARGETS
    tradeoff_volume: int = TRADEOFF_VOLUME
    seed: int = SEED
    change_points: bool = False  # run drift's change-point estimate too (slow)
    policy: dict = field(default_factory=dict)  # [policy] keys other than the defaults
    windows: dict = field(default_factory=dict)  # [windows] keys other than the defaults

    def config(self, rule: str, **policy) -> Config:
        return make_config(rule, windows=self.windows, **{**self.policy, **policy})


# --- the simulated world ---------------------------------------------------------------


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


def planted_policy(world: World, b: np.ndarray, sigma: float, plant: Plant) -> np.ndarray:
    """The weights after the planted change, solved so that the population size is
    ``plant.size`` (bracketed root of a monotone function of one weight)."""

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
    onset day (the horizon for innocents), raw weights before/after, noise sd."""

    ids: np.ndarray
    org: np.ndarray
    planted: np.ndarray
    onset: np.ndarray
    before: np.ndarray
    after: np.ndarray
    sigma: np.ndarray


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
    for i in range(n):
        before[i], sigma[i] = innocent_policy(world, rng)
        after[i] = before[i]
        if planted[i]:
            after[i] = planted_policy(world, before[i], sigma[i], plant)
            onset[i] = 2 * length + rng.integers(0, step)
    ids = np.array([f"o{o:03d}-p{i % ORG_SIZE:02d}" for i, o in enumerate(org)], dtype=object)
    return Persons(ids, org, planted, onset, before, after, sigma)


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
        weights = np.where(
            (day >= persons.onset[person])[:, None], persons.after[person], persons.before[person]
        )
        y = 50.0 + np.einsum("ij,ij->i", x - world.mean, weights)
        y += persons.sigma[person] * rng.standard_normal(len(day))
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


# --- the project's checks on the simulated windows -------------------------------------

CALENDAR_START = date(1900, 1, 7)


def make_config(rule: str, *, windows: dict | None = None, **policy) -> Config:
    """The shipped defaults with ``protected`` forbidden, under alert rule ``rule``
    (``policy`` and ``windows`` override single keys)."""
    cues = {
        "protected": {"type": "binary"},
        "proxy": {"type": "numeric"},
        "amount": {"type": "numeric"},
        "score": {"type": "numeric"},
        "prior_flag": {"type": "binary"},
        "region": {
            "type": "categorical",
            "levels": ["north", "south", "east"],
            "reference": "north",
        },
        "tenure": {"type": "numeric"},
    }
    cfg = Config.model_validate(
        {
            "decisions": {"id": "id", "decided_at": "at", "decision_maker": "who", "judgment": "y"},
            "cues": cues,
            "policy": {"forbidden": ["protected"], "alert_rule": rule, **policy},
            "windows": windows or {},
        }
    )
    if tuple(cfg.design_columns()) != NAMES:
        raise AssertionError(f"design columns {cfg.design_columns()} are not {NAMES}")
    return cfg


def stored_windows(persons: Persons, moments, fits, ends: np.ndarray, days: int, length: int):
    """The windows as `assess` reads them.  Each organisation gets its own calendar (its
    own window-end dates), so the previous scheme's BH family is one organisation."""
    n_looks = len(ends)
    org_day0 = persons.org * (days + 7)
    end_day = (org_day0[:, None] + ends[None, :]).ravel()
    start = np.datetime64(CALENDAR_START, "D")
    meta = pd.DataFrame(
        {
            "scope": "decision_maker",
            "decision_maker": np.repeat(persons.ids, n_looks),
            "team": np.repeat([f"org{o:03d}" for o in persons.org], n_looks),
            "window_start": start + (end_day - length + 1),
            "window_end": start + end_day,
            "n_decisions": moments.n.astype(int),
            "n_linked": 0,
            "R_s": fits.R_s,
            "r_a": np.nan,
        }
    )
    return StoredWindows(meta, moments, fits)


@dataclass
class Tally:
    """Innocent series of one alert kind: alerts opened, looks (the time base) and
    assessable looks."""

    alerts: int = 0
    looks: int = 0
    assessable: int = 0


@dataclass
class Outcome:
    """Counts and delays of one rule on one batch of simulated windows."""

    false: dict[str, Tally] = field(default_factory=lambda: {k: Tally() for k in KINDS})
    delays: list[float] = field(default_factory=list)  # weeks; inf = not within horizon


def evaluate(
    config: Config,
    w: StoredWindows,
    persons: Persons,
    plant: Plant,
    ends: np.ndarray,
    days: int,
    *,
    drift: bool = True,
    change_points: bool = False,
) -> Outcome:
    """Findings -> per-window states -> episodes, as `assess` does, then the
    false alerts of the innocent series and the delay of each planted series."""
    # As ``monitor.assess.findings.evaluate`` does after loading the stored windows.
    parts = [forbidden_findings(config, w)[0]]
    if drift:
        with _change_points(keep=change_points):
            parts.append(drift_findings(config, w))
    findings = pd.concat(parts, ignore_index=True).reindex(columns=FINDING_COLUMNS)
    _below_policy_minimum(findings, config.policy.min_rows)
    states = _window_states(findings)
    index = pd.Index(persons.ids).get_indexer(states["decision_maker"])
    start = np.datetime64(CALENDAR_START, "D")
    day = (states["window_end"].to_numpy().astype("datetime64[D]") - start).astype(np.int64)
    day -= persons.org[index] * (days + 7)
    keys = states[["kind", "decision_maker", "cue"]].to_numpy()
    cut = np.flatnonzero((keys[1:] != keys[:-1]).any(axis=1)) + 1
    flagged = states["flagged"].to_numpy(bool)
    assessable = states["assessable"].to_numpy(bool)
    out = Outcome()
    n_needed = config.policy.consecutive_windows
    for a, b in zip(np.r_[0, cut], np.r_[cut, len(states)], strict=True):
        kind, cue, who = keys[a, 0], keys[a, 2], index[a]
        seq = [bool(f) if ok else None for f, ok in zip(flagged[a:b], assessable[a:b], strict=True)]
        found = episodes(seq, n_needed)
        if not persons.planted[who]:
            t = out.false[kind]
            t.alerts += len(found)
            t.looks += b - a
            t.assessable += int(assessable[a:b].sum())
        elif kind == plant.kind and cue == plant.cue:
            out.delays.append(_delay(found, day[a:b], persons.onset[who]))
    return out


@contextmanager
def _change_points(*, keep: bool):
    """Drift findings without their change-point estimate unless ``keep``: the estimate
    ("since when?") is evidence for the reader and decides no verdict, and at ~60 ms a
    flagged drift row it would take most of the run.  The columns stay, empty."""
    if keep:
        yield
        return

    def empty(rows: pd.DataFrame, *_args) -> None:
        for column in ("change_day", "change_low", "change_high"):
            rows[column] = None

    with mock.patch.object(findings_module, "_since_when", empty):
        yield


def _delay(found, end_day: np.ndarray, onset: int) -> float:
    """Weeks from the onset to the first look (window end on or after it) at which an
    alert is open; inf if none within the horizon."""
    first = int(np.searchsorted(end_day, onset))
    best = None
    for ep in found:
        if ep.resolve_index is not None and ep.resolve_index <= first:
            continue
        at = max(ep.open_index, first)
        best = at if best is None else min(best, at)
    if best is None or best >= len(end_day):
        return float("inf")
    return float(end_day[best] - onset) / 7.0


# --- the run -----------------------------------------------------------------------------


def simulate(setup: Setup, world: World, volume: int, p_index: int):
    """One batch: the organisations planted with ``setup.plants[p_index]`` at
    ``volume`` decisions per 90 days, as (persons, stored windows, look days, days)."""
    cfg = setup.config("calibrated")
    length, step = cfg.windows.length_days, cfg.windows.step_days
    days, ends = window_geometry(length, step)
    rng = np.random.default_rng([setup.seed, volume, p_index])
    plant = setup.plants[p_index]
    persons = make_persons(world, rng, plant, setup.orgs_per_plant, days, length, step)
    moments = window_moments(world, rng, persons, volume / 90.0, days, ends, length)
    # Fitted at the windows' own minimum, as ``findings.load_windows`` does; windows
    # below the policy's minimum are then marked not assessed by ``evaluate``.
    fits = fit_lens(moments, None, NAMES, min_rows=cfg.windows.min_rows)
    if fits.needs_raw_refit.any():  # the store would refit these by QR; none expected
        raise AssertionError("a simulated window needs a raw-row refit")
    return persons, stored_windows(persons, moments, fits, ends, days, length), ends, days


def run(
    setup: Setup, *, command: str = "python -m benchmarks.bench_alerts", progress=print
) -> dict:
    """Every batch under both rules (and the trade-off targets): the result dict that
    ``--json`` writes."""
    world = World.build(setup.seed)
    configs = {rule: setup.config(rule) for rule in RULES}
    tallies = {r: {v: {k: Tally() for k in KINDS} for v in setup.volumes} for r in RULES}
    delays = {r: {v: {p.label: [] for p in setup.plants} for v in setup.volumes} for r in RULES}
    trade = {t: {k: Tally() for k in KINDS} for t in setup.tradeoff}
    trade_delays = {t: {p.label: [] for p in setup.plants} for t in setup.tradeoff}
    t0 = time.perf_counter()
    for volume in setup.volumes:
        for p_index, plant in enumerate(setup.plants):
            persons, w, ends, days = simulate(setup, world, volume, p_index)
            for rule, cfg in configs.items():
                got = evaluate(
                    cfg, w, persons, plant, ends, days, change_points=setup.change_points
                )
                _add(tallies[rule][volume], delays[rule][volume][plant.label], got)
            if volume == setup.tradeoff_volume and plant.kind != "drift":
                for target in setup.tradeoff:
                    cfg = setup.config("calibrated", false_alerts_per_100_years=target)
                    got = evaluate(cfg, w, persons, plant, ends, days, drift=False)
                    _add(trade[target], trade_delays[target][plant.label], got)
            progress(
                f"  {volume:>5} decisions/90 d, {plant.label}: {len(persons.ids)} persons, "
                f"{w.meta.shape[0]} windows ({time.perf_counter() - t0:.0f} s)"
            )
    step = configs["calibrated"].windows.step_days
    return {
        "run": {
            "command": command,
            "date": date.today().isoformat(),
            "code": _code_version(),
            "seconds": round(time.perf_counter() - t0, 1),
        },
        "settings": _settings(configs),
        "world": _world_text(setup),
        "volumes": list(setup.volumes),
        "rules": {
            rule: {
                "limits": _limits(configs[rule]),
                "false_alerts": [
                    _false_row(volume, kind, tallies[rule][volume][kind], step)
                    for volume in setup.volumes
                    for kind in KINDS
                ],
                "detection": [
                    _delay_row(volume, p, delays[rule][volume][p.label])
                    for volume in setup.volumes
                    for p in setup.plants
                ],
            }
            for rule in RULES
        },
        "tradeoff": [
            {
                "false_alerts_per_100_years_target": target,
                "limit": _limits(setup.config("calibrated", false_alerts_per_100_years=target))[
                    "forbidden"
                ],
                "volume": setup.tradeoff_volume,
                "false_alerts": [
                    _false_row(setup.tradeoff_volume, k, trade[target][k], step)
                    for k in ("forbidden_cue", "proxy_use")
                ],
                "detection": [
                    _delay_row(setup.tradeoff_volume, p, trade_delays[target][p.label])
                    for p in setup.plants
                    if p.kind != "drift"
                ],
            }
            for target in setup.tradeoff
            if setup.tradeoff_volume in setup.volumes
        ],
    }


def _code_version() -> str:
    """The commit the figures were computed on, '+changes' if monitor/ (this file's
    output aside) had uncommitted changes then ('' outside a git checkout)."""
    try:
        head = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True, text=True
        )
        dirty = subprocess.run(
            [
                "git",
                "status",
                "--porcelain",
                "--",
                "monitor",
                f":!{DEFAULT_JSON.relative_to(REPO)}",
            ],
            cwd=REPO,
            capture_output=True,
            text=True,
        )
    except OSError:
        return ""
    if head.returncode:
        return ""
    return head.stdout.strip() + ("+changes" if dirty.stdout.strip() else "")


def _add(tally: dict[str, Tally], delays: list[float], got: Outcome) -> None:
    for kind, t in got.false.items():
        tally[kind].alerts += t.alerts
        tally[kind].looks += t.looks
        tally[kind].assessable += t.assessable
    delays.extend(got.delays)


def _false_row(volume: int, kind: str, t: Tally, step: int) -> dict:
    """Rate per 100 person-cue-years with the exact (Garwood) Poisson 95 % interval."""
    years = t.looks * step / 365.25
    upper = stats.chi2.ppf(0.975, 2 * (t.alerts + 1)) / 2.0
    return {
        "volume": volume,
        "kind": kind,
        "alerts": t.alerts,
        "person_cue_years": round(years, 1),
        "per_100": None if not years else 100.0 * t.alerts / years,
        "upper_95": None if not years else 100.0 * upper / years,
        "assessable_share": None if not t.looks else t.assessable / t.looks,
    }


def _delay_row(volume: int, plant: Plant, delays: list[float]) -> dict:
    """Median and 90th percentile over every planted person (a person not detected within
    ``HORIZON_WEEKS`` counts as later than any detected one; a percentile that falls
    among them is null), and the share never detected."""
    d = np.sort(np.asarray(delays, dtype=float))
    d[d > HORIZON_WEEKS] = np.inf

    def quantile(q: float) -> float | None:
        if not len(d):
            return None
        v = float(np.quantile(d, q, method="inverted_cdf"))
        return v if np.isfinite(v) else None

    return {
        "volume": volume,
        "planted": plant.label,
        "kind": plant.kind,
        "size": plant.size,
        "persons": int(len(d)),
        "median_weeks": quantile(0.5),
        "p90_weeks": quantile(0.9),
        "never_share": None if not len(d) else float(np.mean(~np.isfinite(d))),
    }


def _settings(configs: dict[str, Config]) -> dict:
    cfg = configs["calibrated"]
    keys = (
        "tolerance",
        "proxy_tolerance",
        "fdr",
        "consecutive_windows",
        "min_rows",
        "drift_alpha",
        "drift_min_std_change",
        "false_alerts_per_100_years",
        "drift_false_alerts_per_100_years",
    )
    out = {f"policy.{k}": getattr(cfg.policy, k) for k in keys}
    out.update({f"windows.{k}": getattr(cfg.windows, k) for k in ("length_days", "step_days")})
    out["horizon_weeks"] = HORIZON_WEEKS
    return out


def _limits(cfg: Config) -> dict:
    out = {}
    for name, limit in (
        ("forbidden", forbidden_cue_limit(cfg.policy, cfg.windows)),
        ("drift", drift_limit(cfg.policy, cfg.windows)),
    ):
        out[name] = None if limit is None else {"z": limit.z, "p": limit.p_limit}
    return out


def _world_text(setup: Setup) -> dict:
    return {
        "seed": setup.seed,
        "organisations_per_planted_change": setup.orgs_per_plant,
        "organisation": f"{ORG_SIZE} decision-makers, {PLANTED_PER_ORG} planted",
        "cues": "binary forbidden cue (share 0.4); permitted numeric proxy correlated 0.44 "
        "with it; five other permitted cues (skewed amount, score, binary flag, three-level "
        "region, count)",
        "judges": "own weights on the five other cues, none on the forbidden cue or the "
        "proxy; R_s uniform on 0.70-0.85; Poisson daily volume; independent decisions",
        "planted": [p.label for p in setup.plants],
    }


# --- output ------------------------------------------------------------------------------


def _num(v: float | None, digits: int = 2) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def _weeks(row: dict) -> str:
    never = row["never_share"]
    med = ">52" if row["median_weeks"] is None else f"{row['median_weeks']:.1f}"
    p90 = ">52" if row["p90_weeks"] is None else f"{row['p90_weeks']:.1f}"
    return f"{med:>5} /{p90:>5} /{100 * never:>4.0f}%" if never is not None else "-"


def table(result: dict) -> str:
    """The side-by-side tables as text."""
    rules = list(result["rules"])
    lines = ["(a) false alerts per 100 innocent person-cue-years (exact 95% upper bound)"]
    lines.append(
        f"{'decisions/90d':>13}  {'kind':<14}{'p-c-years':>10}"
        + "".join(f"  {r:>22}" for r in rules)
    )
    rows = {r: result["rules"][r]["false_alerts"] for r in rules}
    for i, row in enumerate(rows[rules[0]]):
        cells = "".join(
            f"  {_num(rows[r][i]['per_100']):>8} ({_num(rows[r][i]['upper_95']):>5}) "
            f"[{rows[r][i]['alerts']:>3}]"
            for r in rules
        )
        lines.append(
            f"{row['volume']:>13}  {row['kind']:<14}{row['person_cue_years']:>10.0f}{cells}"
        )
    lines += ["", "(b) detection delay, weeks: median / 90th percentile / never within 52 weeks"]
    lines.append(
        f"{'decisions/90d':>13}  {'planted':<14}{'persons':>8}"
        + "".join(f"  {r:>22}" for r in rules)
    )
    rows = {r: result["rules"][r]["detection"] for r in rules}
    for i, row in enumerate(rows[rules[0]]):
        cells = "".join(f"  {_weeks(rows[r][i]):>22}" for r in rules)
        lines.append(f"{row['volume']:>13}  {row['planted']:<14}{row['persons']:>8}{cells}")
    if result["tradeoff"]:
        lines += [
            "",
            f"trade-off at {result['tradeoff'][0]['volume']} decisions/90d (calibrated rule, varying "
            "policy.false_alerts_per_100_years):",
            f"{'target':>8}  {'|z| >=':>6}  {'false direct':>12}  {'false proxy':>11}"
            + "".join(f"  {d['planted']:>20}" for d in result["tradeoff"][0]["detection"]),
        ]
        for t in result["tradeoff"]:
            fa = {r["kind"]: r for r in t["false_alerts"]}
            lines.append(
                f"{t['false_alerts_per_100_years_target']:>8g}  {t['limit']['z']:>6.2f}"
                f"  {_num(fa['forbidden_cue']['per_100']):>12}"
                f"  {_num(fa['proxy_use']['per_100']):>11}"
                + "".join(f"  {_weeks(d):>20}" for d in t["detection"])
            )
    return "\n".join(lines)


def goals(result: dict) -> list[str]:
    """Whether the issue's goals hold, one line per rule."""
    out = []
    for rule, r in result["rules"].items():
        worst = {}
        for row in r["false_alerts"]:
            if row["per_100"] is not None:
                worst[row["kind"]] = max(worst.get(row["kind"], 0.0), row["per_100"])
        ok_a = all(worst.get(k, 0.0) <= g for k, g in GOALS.items())
        target = [
            d
            for d in r["detection"]
            if d["kind"] == "forbidden_cue" and d["size"] == GOAL_SIZE and d["volume"] == 300
        ]
        med = target[0]["median_weeks"] if target else None
        ok_b = med is not None and med <= GOAL_DELAY_WEEKS
        out.append(
            f"{rule}: (a) worst false alerts per 100 "
            + ", ".join(f"{k} {v:.2f}" for k, v in worst.items())
            + f" -> {'met' if ok_a else 'NOT met'}; (b) direct {GOAL_SIZE} at 300/90d median "
            f"{'>52' if med is None else f'{med:.1f}'} weeks -> {'met' if ok_b else 'NOT met'}"
        )
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a ~1-minute run (fewer persons)")
    parser.add_argument("--orgs", type=int, help="organisations of 30 per planted change")
    parser.add_argument("--seed", type=int, default=SEED)
    parser.add_argument(
        "--length-days",
        type=int,
        help="windows.length_days other than the default (writes to benchmarks/out/)",
    )
    parser.add_argument(
        "--change-points",
        action="store_true",
        help="keep drift's change-point estimate (decides no verdict; slow)",
    )
    parser.add_argument(
        "--json", type=Path, help=f"where to write the JSON (default {DEFAULT_JSON})"
    )
    argv = sys.argv[1:] if argv is None else argv
    args = parser.parse_args(argv)
    orgs = args.orgs or (2 if args.quick else 12)
    windows = {} if args.length_days is None else {"length_days": args.length_days}
    setup = Setup(
        orgs_per_plant=orgs, seed=args.seed, change_points=args.change_points, windows=windows
    )
    command = " ".join(["python -m benchmarks.bench_alerts", *(argv or [])])
    result = run(setup, command=command)
    print(table(result))
    print()
    print("\n".join(goals(result)))
    print(f"\nrun time {result['run']['seconds']:.0f} s")
    default = DEFAULT_JSON
    if args.quick or windows or args.orgs or args.seed != SEED:
        default = OUT / "bench_alerts_exploration.json"  # never the committed figures
    path = args.json or default
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(result, indent=1, sort_keys=False) + "\n")
    print(f"written {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
