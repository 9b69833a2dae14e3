"""`cuewatch demo`: the Ostwyn Mutual scenario through the whole pipeline.

Generates two years of invented claims-handling logs, then plays them into landing
folders the way the case-management system would drop them: one catch-up nightly run
per month for the history, then one nightly run per day for the last five weeks
(ingest -> refit -> assess), then the audit pack of the last complete quarter, then the
dashboard.

Each night runs under a simulated clock (``monitor.store.rules.simulated_clock``) set to
02:00 after the night's last arrival day, in the schedule's time zone, so every time the
store records (ingested_at, batch start and end, fitted_at, alert changes, findings) is
the time the scenario says it happened, and ``export --as-of`` can replay it.  The
batches it writes carry ``clock = 'simulated'``.  Only this module sets that clock.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

from monitor.cautions import CAUTION
from monitor.config import Config, load_config
from monitor.errors import UserError
from monitor.store.rules import simulated_clock

REPO_CONFIG = Path(__file__).resolve().parent.parent / "config" / "ostwyn.toml"
DAILY_TAIL_DAYS = 35  # the last five weeks arrive day by day
NIGHT_TIME = time(2, 0)  # when the demo's nightly job runs (its config's cron: 0 2 * * *)


class DemoUnavailable(UserError):
    """The demo needs the repository's config/ostwyn.toml, which a wheel does not carry."""


def demo_config_text() -> str:
    """The demo configuration's text; DemoUnavailable outside a source checkout."""
    if not REPO_CONFIG.is_file():
        raise DemoUnavailable(
            f"the demo needs config/{REPO_CONFIG.name} from the cuewatch source tree "
            f"(looked for {REPO_CONFIG}); run `cuewatch demo` from a checkout."
        )
    return REPO_CONFIG.read_text(encoding="utf-8")


def write_demo_config(demo_dir: Path) -> Path:
    """Copy the demo configuration into ``demo_dir`` with its paths pointing there."""
    text = demo_config_text()
    text = text.replace('"../demo_run/', '"./')
    target = demo_dir / "ostwyn.toml"
    target.write_text(text, encoding="utf-8")
    return target


def prepare(demo_dir: Path, *, seed: int = 7, days: int = 730, n_handlers: int = 36) -> Config:
    """Fresh demo folder: scenario files (kept if already generated with these
    arguments), empty landing folders and store."""
    from synthetic_logs.ostwyn import generate, load_truth

    demo_config_text()  # before generating two years of logs for nothing
    demo_dir.mkdir(parents=True, exist_ok=True)
    scenario = demo_dir / "scenario"
    try:
        truth = load_truth(scenario)
        fresh = (truth.seed, truth.days, truth.n_handlers) != (seed, days, n_handlers)
    except (FileNotFoundError, OSError, ValueError, KeyError):
        fresh = True
    if fresh:
        generate(scenario, seed=seed, days=days, n_handlers=n_handlers)
    for name in (
        "landing",
        "alerts.jsonl",
        "cuewatch.duckdb",
        "cuewatch.duckdb.wal",
        "cuewatch.duckdb.lock",
    ):
        p = demo_dir / name
        if p.is_dir():
            shutil.rmtree(p)
        elif p.exists():
            p.unlink()
    config = load_config(write_demo_config(demo_dir))
    Path(config.decisions.landing).mkdir(parents=True, exist_ok=True)
    Path(config.outcomes.landing).mkdir(parents=True, exist_ok=True)
    return config


def night_after(day: date, timezone: str) -> datetime:
    """When the nightly run that takes ``day``'s files starts: ``NIGHT_TIME`` the next
    morning in ``timezone``, as a UTC time."""
    local = datetime.combine(day + timedelta(days=1), NIGHT_TIME, tzinfo=ZoneInfo(timezone))
    return local.astimezone(UTC)


def nights(
    arrivals: list[tuple[date, list[Path]]], tail_days: int
) -> list[list[tuple[date, list[Path]]]]:
    """The arrival days grouped into nightly runs: one per calendar month up to
    ``tail_days`` before the last arrival (a monitor catching up on its history a month
    at a time), then one per arrival day."""
    if not arrivals:
        return []
    last_day = arrivals[-1][0]
    cutoff = date.fromordinal(last_day.toordinal() - tail_days)
    groups: list[list[tuple[date, list[Path]]]] = []
    month = None
    for arrival in arrivals:
        day = arrival[0]
        if day <= cutoff and (day.year, day.month) == month:
            groups[-1].append(arrival)
        else:
            groups.append([arrival])
        month = (day.year, day.month) if day <= cutoff else None
    return groups


def play(
    config: Config,
    scenario: Path,
    *,
    say: Callable[[str], None] = print,
    tail_days: int = DAILY_TAIL_DAYS,
) -> list[dict]:
    """Drop the scenario's daily files into the landing folders and run the nightly
    job, each run under the simulated clock of its night: once per month for the
    history, then once per day.  Returns the nightly summaries, each with its
    ``night`` (the simulated start, ISO 8601 UTC)."""
    from monitor.nightly import run_nightly
    from monitor.store.connection import Store
    from synthetic_logs.ostwyn import day_files

    groups = nights(day_files(scenario), tail_days)
    # The store is created on the first night, so its history begins there too.
    with simulated_clock(night_after(groups[0][-1][0], config.schedule.timezone)):
        Store(config).init()
    summaries = []
    for group in groups:
        for _, files in group:
            for f in files:
                landing = (
                    config.decisions.landing
                    if f.parent.name == "decisions"
                    else config.outcomes.landing
                )
                shutil.copy2(f, Path(landing) / f.name)
        night = night_after(group[-1][0], config.schedule.timezone)
        with simulated_clock(night):
            s = run_nightly(config)
        label = f"{group[0][0]} to {group[-1][0]}" if len(group) > 1 else str(group[0][0])
        assess = s.assess
        say(
            f"  night of {night.strftime('%Y-%m-%d %H:%M')} UTC ({label}): "
            f"+{s.ingest['accepted']} rows, "
            f"{s.ingest['quarantined']} quarantined, {s.refit.get('windows_fitted', 0)} windows refit, "
            f"alerts +{len(assess.get('opened', []))} opened / {len(assess.get('resolved', []))} resolved"
        )
        summaries.append({**s.to_json(), "night": night.isoformat()})
    return summaries


def last_complete_quarter(day: date) -> str:
    q = (day.month - 1) // 3  # quarters before the current one this year
    return f"{day.year}Q{q}" if q else f"{day.year - 1}Q4"


def _quarter(day: date) -> tuple[int, int]:
    return day.year, (day.month - 1) // 3 + 1


def _quarter_end(year: int, q: int) -> date:
    return date(year + (q == 4), 1 if q == 4 else 3 * q + 1, 1) - timedelta(days=1)


def demo_quarter(first_decision: date, last_decision: date, last_arrival: date) -> str:
    """The quarter the demo's audit pack covers: the last quarter complete by the last
    arrival day that holds decisions; when no complete quarter holds any (a scenario
    shorter than a quarter), the quarter of the last decision."""
    latest = _quarter(last_decision)
    label = last_complete_quarter(last_arrival)
    complete = (int(label[:4]), int(label[-1]))
    if _quarter(first_decision) <= complete < latest:
        latest = complete
    return f"{latest[0]}Q{latest[1]}"


def run_demo(
    demo_dir: Path,
    *,
    say: Callable[[str], None] = print,
    export: bool = True,
    days: int = 730,
    n_handlers: int = 36,
    tail_days: int = DAILY_TAIL_DAYS,
) -> dict:
    """The whole demo; returns what a test needs to check it."""
    say(f"Generating the Ostwyn Mutual scenario in {demo_dir / 'scenario'} ...")
    config = prepare(demo_dir, days=days, n_handlers=n_handlers)
    say(
        "Playing the logs into the landing folders and running the nightly job "
        "(a simulated clock: one night per month of history, then one per day):"
    )
    summaries = play(config, demo_dir / "scenario", say=say, tail_days=tail_days)
    from monitor.assess.alerts import list_alerts
    from synthetic_logs.ostwyn import day_files, load_truth

    alerts = list_alerts(config)
    truth = load_truth(demo_dir / "scenario")
    arrivals = day_files(demo_dir / "scenario")
    out = {
        "config": str(config.source),
        "nightly_runs": len(summaries),
        "alerts": alerts,
        "first_night": summaries[0]["night"],
        "last_night": summaries[-1]["night"],
    }
    if export:
        from monitor.audit.pack import export as run_export

        quarter = demo_quarter(truth.start, truth.last_decision_day, arrivals[-1][0])
        target = demo_dir / f"audit_{quarter}"
        result = run_export(
            config,
            quarter=quarter,
            out_dir=target,
            as_of=None,
            formats=["csv", "parquet", "xlsx", "html"],
            include_rows=[],
            compare=None,
        )
        out["audit"] = str(target)
        out["quarter"] = quarter
        say(f"Audit pack for {quarter}: {result.get('summary', '')}")
    return out


_LISTED_KINDS = ("forbidden_cue", "proxy_use")


def describe_demo(result: dict) -> str:
    """``run_demo``'s account for a person: the store, the alerts not resolved (each one
    listed, forbidden-cue and proxy alerts first), the caution, and what to try next."""
    alerts = result["alerts"]
    unresolved = [a for a in alerts if a["state"] != "resolved"]
    unresolved.sort(key=lambda a: (a["kind"] not in _LISTED_KINDS, a["kind"], a["id"]))
    cfg = result["config"]
    lines = [
        f"\nStore and config: {cfg}",
        f"Simulated nights: {result['first_night'][:16]} to {result['last_night'][:16]} "
        f"({result['nightly_runs']} runs; batches.clock = 'simulated')",
        f"Alerts raised: {len(alerts)}; resolved since: {len(alerts) - len(unresolved)}; "
        f"not resolved: {len(unresolved)}" + (", listed here:" if unresolved else "."),
    ]
    for a in unresolved:
        cue = f" {a['cue']}" if a.get("cue") else ""
        lines.append(
            f"  #{a['id']} {a['state']} {a['kind']} {a['decision_maker']}{cue}, "
            f"since window ending {a['opened_window_end']}"
        )
    lines += [CAUTION, "Try:", f"  cuewatch --config {cfg} fits --latest"]
    if result.get("quarter"):
        q = result["quarter"]
        # An as-of two weeks after the quarter (before the last night): the pack as it
        # stood then; and what the later nights restated, up to six hours after the last.
        last_night = datetime.fromisoformat(result["last_night"])
        end = _quarter_end(int(q[:4]), int(q[-1]))
        then = min(end + timedelta(days=15), last_night.date() - timedelta(days=1))
        later = (last_night + timedelta(hours=6)).strftime("%Y-%m-%dT%H:%M%z")
        folder = Path(cfg).parent
        lines += [
            f"  cuewatch --config {cfg} export --quarter {q} --as-of {then} "
            f"--out {folder / f'audit_{q}_as_of_{then}'}",
            f"  cuewatch --config {cfg} export --quarter {q} --compare-as-of {then} {later} "
            f"--out {folder / f'restated_{q}'}",
        ]
    return "\n".join(lines)
