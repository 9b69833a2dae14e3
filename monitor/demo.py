"""`cuewatch demo`: the Ostwyn Mutual scenario through the whole pipeline.

Generates two years of invented claims-handling logs, then plays them into landing
folders the way the case-management system would drop them: a backfill of the first
months in one nightly run, then one nightly run per week (ingest -> refit -> assess),
then the audit pack of the last complete quarter, then the dashboard.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from datetime import date
from pathlib import Path

from monitor.cautions import CAUTION
from monitor.config import Config, load_config
from monitor.errors import UserError

REPO_CONFIG = Path(__file__).resolve().parent.parent / "config" / "ostwyn.toml"
DAILY_TAIL_DAYS = 35  # the last five weeks arrive day by day


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


def play(
    config: Config,
    scenario: Path,
    *,
    say: Callable[[str], None] = print,
    tail_days: int = DAILY_TAIL_DAYS,
) -> list[dict]:
    """Drop the scenario's daily files into the landing folders and run the nightly
    job: once for the backfill, then once per day.  Returns the nightly summaries."""
    from monitor.nightly import run_nightly
    from monitor.store.connection import Store
    from synthetic_logs.ostwyn import day_files

    Store(config).init()
    arrivals = day_files(scenario)
    last_day = arrivals[-1][0]
    cutoff = date.fromordinal(last_day.toordinal() - tail_days)
    batches: list[list[tuple[date, list[Path]]]] = [[a for a in arrivals if a[0] <= cutoff]]
    batches += [[a] for a in arrivals if a[0] > cutoff]
    summaries = []
    for i, batch in enumerate(batches):
        for _, files in batch:
            for f in files:
                landing = (
                    config.decisions.landing
                    if f.parent.name == "decisions"
                    else config.outcomes.landing
                )
                shutil.copy2(f, Path(landing) / f.name)
        s = run_nightly(config)
        label = "backfill" if i == 0 else str(batch[-1][0])
        assess = s.assess
        say(
            f"  nightly {label}{f' (to {batch[-1][0]})' if i == 0 else ''}: +{s.ingest['accepted']} rows, "
            f"{s.ingest['quarantined']} quarantined, {s.refit.get('windows_fitted', 0)} windows refit, "
            f"alerts +{len(assess.get('opened', []))} opened / {len(assess.get('resolved', []))} resolved"
        )
        summaries.append(s.to_json())
    return summaries


def last_complete_quarter(day: date) -> str:
    q = (day.month - 1) // 3  # quarters before the current one this year
    return f"{day.year}Q{q}" if q else f"{day.year - 1}Q4"


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
    say("Playing the daily logs into the landing folders and running the nightly job:")
    summaries = play(config, demo_dir / "scenario", say=say, tail_days=tail_days)
    from monitor.assess.alerts import list_alerts

    alerts = list_alerts(config)
    out = {"config": str(config.source), "nightly_runs": len(summaries), "alerts": alerts}
    if export:
        try:
            from monitor.audit.pack import export as run_export
        except ImportError:
            run_export = None
        if run_export is not None:
            from synthetic_logs.ostwyn import load_truth

            quarter = last_complete_quarter(load_truth(demo_dir / "scenario").last_decision_day)
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
            say(f"Audit pack for {quarter}: {target} ({result.get('summary', '')[:200]})")
    return out


def describe_demo(result: dict) -> str:
    """``run_demo``'s account for a person: the store, the alerts still open on
    forbidden cues or proxies, the caution, and what to try next."""
    alerts = result["alerts"]
    open_now = sum(a["state"] != "resolved" for a in alerts)
    lines = [
        f"\nStore and config: {result['config']}",
        f"Alerts: {len(alerts)} ({open_now} not resolved):",
    ]
    for a in alerts:
        if a["state"] != "resolved" and a["kind"] in ("forbidden_cue", "proxy_use"):
            lines.append(
                f"  #{a['id']} {a['kind']} {a['decision_maker']} {a['cue']} "
                f"since window ending {a['opened_window_end']}"
            )
    lines += [CAUTION, f"Try: cuewatch --config {result['config']} fits --latest"]
    return "\n".join(lines)
