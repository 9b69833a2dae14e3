"""The project's checks on simulated windows, as `assess` runs them on stored ones:
``forbidden_findings``, ``drift_findings`` and ``floor_findings`` (consistency) on an
in-memory ``StoredWindows``, the
policy-minimum rule of ``findings.evaluate``, ``alerts._window_states`` and
``episodes``; then the false alerts of the innocent series and the detection delay of
the planted ones (``benchmarks.bench_alerts``)."""

from __future__ import annotations

from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import date
from unittest import mock

import numpy as np
import pandas as pd

from benchmarks.alerts_world import NAMES, Persons, Plant
from monitor.assess import drift as drift_module
from monitor.assess.alerts import _window_states
from monitor.assess.drift import drift_findings
from monitor.assess.findings import _below_policy_minimum, floor_findings, forbidden_findings
from monitor.assess.stored import FINDING_COLUMNS, StoredWindows
from monitor.config import Config
from monitor.stats.episodes import episodes

KINDS = ("forbidden_cue", "proxy_use", "drift", "consistency")

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
        parts.append(floor_findings(config, w))
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
        if kind == "drift" and cue in config.policy.forbidden:
            continue  # reported, never alerted: the forbidden-cue check watches it
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

    with mock.patch.object(drift_module, "_since_when", empty):
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
