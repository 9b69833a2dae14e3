"""Demo scenario: claims handlers at Ostwyn Mutual (an invented motor insurer).

Handlers score each new claim's investigation priority 0-100; months later an
investigation or review says whether fraud was confirmed. :func:`generate` writes
one decision file per working day and one outcome file per day on which outcomes
arrived, plus ``truth.json`` recording everything planted (see README.md).

The judge side is exactly linear in the *recorded* cue values, so estimated
weights can be checked against :func:`true_judge_weights`.
"""

from __future__ import annotations

import argparse
import re
import sys
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import ndtr, ndtri

from synthetic_logs.ostwyn_cues import CUE_BOUNDS, ENVIRONMENT, draw_cues, environment_logit
from synthetic_logs.ostwyn_faults import apply_bad_rows, plan_corrections
from synthetic_logs.ostwyn_people import build_handlers, noise_scale
from synthetic_logs.ostwyn_truth import (
    DESIGN_COLUMNS,
    ScenarioTruth,
    load_truth,
    models_only,
    true_judge_weights,
    write_truth,
)

__all__ = ["ScenarioTruth", "generate", "day_files", "true_judge_weights", "load_truth", "main"]

DECISION_COLUMNS = (
    "claim_id",
    "scored_at",
    "handler_id",
    "team",
    "priority",
    "claim_amount",
    "policy_age_days",
    "prior_claims_3y",
    "police_report",
    "repair_quote_ratio",
    "independent_witness",
    "report_delay_days",
    "vehicle_age_years",
    "claimant_age_band",
    "claimant_gender",
)
OUTCOME_COLUMNS = ("claim_id", "closed_at", "fraud_confirmed")

# Working hours 09:00-17:30 local time (invented; a typical office day).
_DAY_OPEN_S, _DAY_CLOSE_S = 9 * 3600, 17 * 3600 + 1800
_ABSENCE_RATE = 0.05  # share of working days a handler is away (invented)
_OUTCOME_SHARE = 0.85  # claims that ever get a verdict (brief: "most claims (~85%)")
_LAG_MIN, _LAG_MAX, _LAG_MEDIAN = 20, 180, 55  # days decision -> verdict (invented)
_FILE_RE = re.compile(r"^(decisions|outcomes)_(\d{4}-\d{2}-\d{2})\.csv$")


def _weekdays(start: date, days: int) -> list[date]:
    return [d for d in (start + timedelta(i) for i in range(days)) if d.weekday() < 5]


def _next_weekday(days: np.ndarray) -> np.ndarray:
    """Move datetime64[D] values falling on Saturday/Sunday to the next Monday."""
    dow = (days.astype("int64") + 3) % 7  # 1970-01-01 was a Thursday (dow 3, Monday = 0)
    shift = np.where(dow == 5, 2, np.where(dow == 6, 1, 0))
    return days + shift.astype("timedelta64[D]")


def _working_time(rng: np.random.Generator, day: np.ndarray) -> np.ndarray:
    seconds = rng.integers(_DAY_OPEN_S, _DAY_CLOSE_S, size=day.shape[0])
    return day.astype("datetime64[s]") + seconds.astype("timedelta64[s]")


def _stamp(ts: np.ndarray) -> np.ndarray:
    """'YYYY-MM-DD HH:MM:SS' local time, no offset (the config declares Europe/London)."""
    return np.char.replace(np.datetime_as_string(ts, unit="s").astype(str), "T", " ")


def _decision_rows(rng, truth_parts, start, days, per_day):
    """Draw every claim: who scored it when, its cues, and its priority."""
    handlers, changes = truth_parts
    work_days = _weekdays(start, days)
    h_count, d_count = len(handlers), len(work_days)
    rates = np.array([h.claims_rate for h in handlers]) * per_day
    present = rng.random((d_count, h_count)) >= _ABSENCE_RATE
    n_rows = rng.poisson(rates[None, :] * present)
    d_idx = np.repeat(np.repeat(np.arange(d_count), h_count), n_rows.ravel())
    h_idx = np.repeat(np.tile(np.arange(h_count), d_count), n_rows.ravel())
    day64 = np.array(work_days, dtype="datetime64[D]")[d_idx]
    scored = _working_time(rng, day64)
    order = np.lexsort((h_idx, scored))
    d_idx, h_idx, scored = d_idx[order], h_idx[order], scored[order]

    cues, x = draw_cues(rng, d_idx.shape[0])
    # Judge model per (handler, working day): exactly linear in the recorded cues.
    weight = np.empty((h_count, d_count, len(DESIGN_COLUMNS)))
    intercept = np.empty((h_count, d_count))
    sigma = np.empty((h_count, d_count))
    cut = np.empty((h_count, d_count))
    partial = models_only(handlers, changes)
    for hi, h in enumerate(handlers):
        for di, d in enumerate(work_days):
            p = true_judge_weights(partial, h.handler_id, d)
            weight[hi, di] = [p[c] for c in DESIGN_COLUMNS]
            intercept[hi, di] = p["intercept"]
            sigma[hi, di], cut[hi, di] = noise_scale(p["noise_sd"], h.noise_bound)
    linear = intercept[h_idx, d_idx] + np.einsum("nk,nk->n", x, weight[h_idx, d_idx])
    # Symmetric truncated normal with a per-handler bound fixed in advance: mean 0,
    # independent of the cues, so OLS stays unbiased (see README "Judge side").
    c = cut[h_idx, d_idx]
    u = rng.uniform(ndtr(-c), ndtr(c))
    noise = sigma[h_idx, d_idx] * ndtri(u)
    priority = np.round(linear + noise, 1)
    if priority.size and (priority.min() < 0 or priority.max() > 100):
        raise AssertionError("planted priority left [0, 100]; cue bounds or weights are wrong")

    frame = pd.DataFrame(
        {
            "scored_at": _stamp(scored),
            "handler_id": [handlers[i].handler_id for i in h_idx],
            "team": [handlers[i].team for i in h_idx],
            "priority": np.char.mod("%.1f", priority),
            **cues,
        }
    )
    frame.insert(0, "claim_id", np.char.mod("CLM%07d", np.arange(1, len(frame) + 1)))
    frame["_day"] = scored.astype("datetime64[D]")
    return frame[list(DECISION_COLUMNS) + ["_day"]], x


def _outcome_rows(rng, decisions, x, environment, horizon):
    """One verdict per claim that gets one, dated 20-180 days later, up to the horizon."""
    n = len(decisions)
    p = 1.0 / (1.0 + np.exp(-environment_logit(x, environment)))
    fraud = rng.random(n) < p
    lag_log = rng.normal(np.log(_LAG_MEDIAN), 0.6, n)
    lag = np.clip(np.round(np.exp(lag_log)), _LAG_MIN, _LAG_MAX).astype("int64")
    decided = decisions["_day"].to_numpy().astype("datetime64[D]")
    closed_day = _next_weekday(decided + lag.astype("timedelta64[D]"))
    keep = (rng.random(n) < _OUTCOME_SHARE) & (closed_day <= np.datetime64(horizon))
    closed = _working_time(rng, closed_day[keep])
    return pd.DataFrame(
        {
            "claim_id": decisions["claim_id"].to_numpy()[keep],
            "closed_at": _stamp(closed),
            "fraud_confirmed": np.where(fraud[keep], "Yes", "No"),
            "_day": closed_day[keep],
        }
    )


def _clear(folder: Path, prefix: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob(f"{prefix}_*.csv"):
        old.unlink()


def _write_by_day(frame: pd.DataFrame, folder: Path, prefix: str, sort_col: str) -> None:
    frame = frame.sort_values(["_day", sort_col], kind="stable")
    for day, part in frame.groupby("_day", sort=True):
        name = f"{prefix}_{pd.Timestamp(day).date().isoformat()}.csv"
        visible = [c for c in part.columns if not c.startswith("_")]
        part[visible].to_csv(folder / name, index=False, lineterminator="\n")


def generate(
    out_dir: Path,
    *,
    seed: int = 7,
    start: date = date(2024, 11, 1),
    days: int = 730,
    outcome_horizon: date = date(2026, 11, 30),
    n_handlers: int = 36,
    claims_per_handler_day: float = 12.0,
    bad_row_rate: float = 0.001,
    correction_rate: float = 0.005,
) -> ScenarioTruth:
    """Write the scenario into ``out_dir`` and return what was planted.

    Layout: ``decisions/decisions_YYYY-MM-DD.csv`` (weekdays from ``start`` for
    ``days`` calendar days), ``outcomes/outcomes_YYYY-MM-DD.csv`` (days on which
    verdicts arrived, never after ``outcome_horizon``) and ``truth.json``. Earlier
    scenario files in those folders are removed first. The same arguments always
    give byte-identical files. ``n_handlers`` must be at least 6 (three teams, and
    the planted handlers need distinct seats); ``days`` at least 28.
    """
    if n_handlers < 6:
        raise ValueError("n_handlers must be at least 6 to seat the planted handlers")
    if days < 28:
        raise ValueError("days must be at least 28")
    out_dir = Path(out_dir)
    rng = np.random.default_rng(seed)
    teams, handlers, changes = build_handlers(rng, n_handlers, start, days)
    decisions, x = _decision_rows(rng, (handlers, changes), start, days, claims_per_handler_day)
    environment = dict(ENVIRONMENT)
    outcomes = _outcome_rows(rng, decisions, x, environment, outcome_horizon)
    decisions, outcomes, bad_rows = apply_bad_rows(rng, decisions, outcomes, bad_row_rate)
    outcomes, corrections = plan_corrections(rng, outcomes, correction_rate, outcome_horizon)

    _clear(out_dir / "decisions", "decisions")
    _clear(out_dir / "outcomes", "outcomes")
    _write_by_day(decisions, out_dir / "decisions", "decisions", "_order")
    _write_by_day(outcomes, out_dir / "outcomes", "outcomes", "closed_at")
    last_day = max(_weekdays(start, days))
    truth = ScenarioTruth(
        seed=seed,
        start=start,
        days=days,
        last_decision_day=last_day,
        outcome_horizon=outcome_horizon,
        n_handlers=n_handlers,
        claims_per_handler_day=claims_per_handler_day,
        bad_row_rate=bad_row_rate,
        correction_rate=correction_rate,
        teams=teams,
        handlers=handlers,
        changes=changes,
        environment=environment,
        cue_bounds={k: (float(lo), float(hi)) for k, (lo, hi) in CUE_BOUNDS.items()},
        bad_rows=tuple(bad_rows),
        corrections=tuple(corrections),
        counts={
            "decision_rows": int(len(decisions)),
            "outcome_rows": int(len(outcomes)),
            "bad_rows": len(bad_rows),
            "corrections": len(corrections),
            "decision_files": int(decisions["_day"].nunique()),
            "outcome_files": int(outcomes["_day"].nunique()),
        },
    )
    write_truth(truth, out_dir)
    return truth


def day_files(out_dir: Path) -> list[tuple[date, list[Path]]]:
    """Per calendar day, the files that arrived that day, in arrival order.

    A day's decision file (claims scored that day) arrives before its outcome file.
    Days with no file are left out; the list is sorted by day.
    """
    by_day: dict[date, list[tuple[int, Path]]] = {}
    for sub in ("decisions", "outcomes"):
        folder = Path(out_dir) / sub
        if not folder.is_dir():
            continue
        for path in folder.iterdir():
            m = _FILE_RE.match(path.name)
            if m:
                rank = 0 if m.group(1) == "decisions" else 1
                by_day.setdefault(date.fromisoformat(m.group(2)), []).append((rank, path))
    return [(d, [p for _, p in sorted(by_day[d])]) for d in sorted(by_day)]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m synthetic_logs.ostwyn",
        description="Write the Ostwyn Mutual demo scenario (decision and outcome files).",
    )
    parser.add_argument("--out", required=True, type=Path, help="output folder")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--days", type=int, default=730, help="calendar days of decisions")
    parser.add_argument("--start", type=date.fromisoformat, default=date(2024, 11, 1))
    parser.add_argument("--handlers", type=int, default=36, help="number of claims handlers")
    parser.add_argument("--horizon", type=date.fromisoformat, default=date(2026, 11, 30),
                        help="no outcome is observed after this day")  # fmt: skip
    args = parser.parse_args(argv)
    if args.handlers < 6 or args.days < 28:
        print("error: need --handlers >= 6 and --days >= 28", file=sys.stderr)
        return 2
    truth = generate(
        args.out,
        seed=args.seed,
        start=args.start,
        days=args.days,
        n_handlers=args.handlers,
        outcome_horizon=args.horizon,
    )
    c = truth.counts
    print(
        f"wrote {c['decision_rows']} decisions in {c['decision_files']} files, "
        f"{c['outcome_rows']} outcomes in {c['outcome_files']} files "
        f"({c['bad_rows']} bad rows, {c['corrections']} corrections) to {args.out}"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
