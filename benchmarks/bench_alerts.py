"""Operating characteristics of the alerts, by simulation (`python -m benchmarks.bench_alerts`).

Decision-makers are simulated day by day with a planted truth
(``benchmarks.alerts_world``, which describes the simulated world and its assumptions),
and their rolling windows go through the project's own statistics and policy code -
``lens.fit_lens`` on window moments (``refit.buckets.finish_moments``), then the
findings, window states and episodes of `assess` (``benchmarks.alerts_checks``) - under
both alert rules (``policy.alert_rule`` = "calibrated" and the previous
"per_window_fdr"), on the same simulated data.  The DuckDB store is left out (too slow
for thousands of person-years); every other step is the one `assess` runs.  The
configuration is the shipped default (``monitor.config.PolicyConfig`` and
``WindowsConfig``) with the simulated forbidden cue declared forbidden.

Reported per rule and volume: (a) false alerts (episodes opened) per 100 innocent
person-cue-years for each alert kind, the time base being the span of the weekly looks
(from the first full window; for drift from the first look with a non-overlapping
predecessor), with an exact Poisson 95 % upper bound; drift counts every permitted cue
as a series, as the alerts do (6 per person: the three-level region is one cue with one
joint verdict; the forbidden cue's weight is the forbidden-cue check's), consistency one
per person; (b) detection delay in weeks from the
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
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np
from scipy import stats

from benchmarks.alerts_checks import KINDS, Outcome, Tally, evaluate, make_config, stored_windows
from benchmarks.alerts_world import (
    HORIZON_WEEKS,
    NAMES,
    ORG_SIZE,
    PLANTED_PER_ORG,
    PLANTS,
    SEED,
    Plant,
    World,
    make_persons,
    window_geometry,
    window_moments,
)
from monitor.config import Config
from monitor.stats.lens import fit_lens
from monitor.stats.monitoring import drift_limit, forbidden_cue_limit

REPO = Path(__file__).resolve().parents[1]
OUT = Path(__file__).resolve().parent / "out"
DEFAULT_JSON = REPO / "monitor" / "audit" / "operating_characteristics.json"

VOLUMES = (100, 300, 1000)
RULES = ("calibrated", "per_window_fdr")
TRADEOFF_TARGETS = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0)
TRADEOFF_VOLUME = 300
GOALS = {"forbidden_cue": 1.0, "proxy_use": 1.0, "drift": 2.0}
TRADEOFF_KINDS = ("forbidden_cue", "proxy_use")  # the curve of the forbidden-cue limit
GOAL_DELAY_WEEKS, GOAL_SIZE = 8.0, 0.15


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
            if volume == setup.tradeoff_volume and plant.kind in TRADEOFF_KINDS:
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
                    if p.kind in TRADEOFF_KINDS
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
        "consistency_floor",
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
