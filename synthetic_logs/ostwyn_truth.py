"""What the Ostwyn Mutual scenario planted: the truth record and how to read it back.

This module holds the frozen truth dataclasses, their JSON form (``truth.json``)
and :func:`true_judge_weights`, which rebuilds any handler's judge model on any
day from the record alone, so a test or benchmark can compare estimates with the
planted values without re-running the generator.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, fields
from datetime import date
from pathlib import Path
from typing import Any

# Design columns of the judge model, in the order the generator uses them.
# Categorical cues become dummies "cue=level" against the config's reference
# level (claimant_age_band: "40-59", claimant_gender: "female").
DESIGN_COLUMNS: tuple[str, ...] = (
    "claim_amount",
    "policy_age_days",
    "prior_claims_3y",
    "police_report",
    "repair_quote_ratio",
    "independent_witness",
    "report_delay_days",
    "vehicle_age_years",
    "claimant_age_band=18-24",
    "claimant_age_band=25-39",
    "claimant_age_band=60+",
    "claimant_gender=male",
)

TRUTH_FILE = "truth.json"


@dataclass(frozen=True)
class HandlerTruth:
    """One claims handler's stable judge model (before any planted change).

    weights:     priority points per unit of each design column (all of DESIGN_COLUMNS).
    intercept:   priority points.
    noise_sd:    standard deviation of the judge-model error, priority points (the
                 exact sd of the truncated distribution actually drawn).
    noise_bound: the error is symmetric about 0 and never exceeds this in size;
                 it is fixed per handler so errors stay independent of the cues.
    """

    handler_id: str
    team: str
    intercept: float
    weights: dict[str, float]
    noise_sd: float
    noise_bound: float
    claims_rate: float


@dataclass(frozen=True)
class PlantedChange:
    """A change in one parameter of some handlers' judge models.

    parameter: a design column (a weight) or "noise_sd".
    mode:      "set"   -> the parameter moves from ``before`` to ``after`` (absolute);
               "scale" -> each handler's own value is multiplied by a factor moving
               from ``before`` to ``after``.
    The move is linear in calendar days from ``start`` to ``end`` and holds after
    ``end``; ``start == end`` is a step on that day.
    """

    kind: str
    handler_ids: tuple[str, ...]
    team: str | None
    parameter: str
    mode: str
    before: float
    after: float
    start: date
    end: date
    forbidden_cue: str | None
    description: str

    def level(self, day: date) -> float:
        """The value (or factor) in force on ``day``."""
        if day < self.start:
            return self.before
        if day >= self.end:
            return self.after
        frac = (day - self.start).days / (self.end - self.start).days
        return self.before + frac * (self.after - self.before)


@dataclass(frozen=True)
class BadRow:
    """A deliberately faulty row: which claim, which file, what is wrong."""

    claim_id: str
    kind: str
    file: str
    column: str
    value: str


@dataclass(frozen=True)
class Correction:
    """An outcome restated later; the later row (``corrected_*``) is the true one."""

    claim_id: str
    first_closed_at: str
    first_value: str
    corrected_closed_at: str
    corrected_value: str
    file: str


@dataclass(frozen=True)
class ScenarioTruth:
    """Everything the generator planted, as written to ``truth.json``."""

    seed: int
    start: date
    days: int
    last_decision_day: date
    outcome_horizon: date
    n_handlers: int
    claims_per_handler_day: float
    bad_row_rate: float
    correction_rate: float
    teams: tuple[str, ...]
    handlers: tuple[HandlerTruth, ...]
    changes: tuple[PlantedChange, ...]
    environment: dict[str, float]
    cue_bounds: dict[str, tuple[float, float]]
    bad_rows: tuple[BadRow, ...]
    corrections: tuple[Correction, ...]
    counts: dict[str, int]

    def handler(self, handler_id: str) -> HandlerTruth:
        for h in self.handlers:
            if h.handler_id == handler_id:
                return h
        raise KeyError(f"no handler {handler_id!r} in this scenario")

    def stable_handlers(self) -> list[str]:
        """Handlers no planted change touches."""
        touched = {h for c in self.changes for h in c.handler_ids}
        return [h.handler_id for h in self.handlers if h.handler_id not in touched]


def true_judge_weights(truth: ScenarioTruth, handler_id: str, day: date) -> dict[str, float]:
    """The planted judge model of ``handler_id`` in force on ``day``.

    Returns one weight per design column (priority points per unit; dummies named
    "cue=level"), plus "intercept" and "noise_sd" (priority points). Raises KeyError
    for an unknown handler.
    """
    h = truth.handler(handler_id)
    params = dict(h.weights)
    params["intercept"] = h.intercept
    params["noise_sd"] = h.noise_sd
    for change in truth.changes:
        if handler_id not in change.handler_ids:
            continue
        level = change.level(day)
        if change.mode == "set":
            params[change.parameter] = level
        else:
            params[change.parameter] = h.weights.get(change.parameter, 0.0) * level
    return params


def _encode(value: Any) -> Any:
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, dict):
        return {k: _encode(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_encode(v) for v in value]
    return value


def truth_to_json(truth: ScenarioTruth) -> str:
    return json.dumps(_encode(asdict(truth)), indent=1, sort_keys=False)


def write_truth(truth: ScenarioTruth, out_dir: Path) -> Path:
    path = Path(out_dir) / TRUTH_FILE
    path.write_text(truth_to_json(truth) + "\n", encoding="utf-8")
    return path


def _dated(cls: type, raw: dict[str, Any]) -> Any:
    """Build a truth dataclass from JSON, restoring dates and tuples."""
    kwargs = {}
    for f in fields(cls):
        value = raw[f.name]
        if f.type in ("date",):
            value = date.fromisoformat(value)
        elif isinstance(value, list) and f.name != "cue_bounds":
            value = tuple(value)
        kwargs[f.name] = value
    return cls(**kwargs)


def load_truth(out_dir: Path) -> ScenarioTruth:
    """Read ``OUT/truth.json`` written by :func:`synthetic_logs.ostwyn.generate`."""
    raw = json.loads((Path(out_dir) / TRUTH_FILE).read_text(encoding="utf-8"))
    raw["handlers"] = [_dated(HandlerTruth, h) for h in raw["handlers"]]
    raw["changes"] = [_dated(PlantedChange, c) for c in raw["changes"]]
    raw["bad_rows"] = [_dated(BadRow, b) for b in raw["bad_rows"]]
    raw["corrections"] = [_dated(Correction, c) for c in raw["corrections"]]
    raw["cue_bounds"] = {k: (float(v[0]), float(v[1])) for k, v in raw["cue_bounds"].items()}
    return _dated(ScenarioTruth, raw)


def models_only(
    handlers: tuple[HandlerTruth, ...], changes: tuple[PlantedChange, ...]
) -> ScenarioTruth:
    """A truth record holding only the judge models, for use while generating."""
    day = date(2000, 1, 1)
    return ScenarioTruth(0, day, 0, day, day, len(handlers), 0.0, 0.0, 0.0, (), handlers,
                         changes, {}, {}, (), (), {})  # fmt: skip
