"""The `cuewatch` command line: parse, call one stage function, print a summary or --json.

No logic lives here that a test cannot reach through the stage modules.  Exit codes:
0 success; 2 a user error (bad configuration, bad input, a busy store, a rejected
file), one sentence on stderr; 3 (``assess``, ``nightly``) everything ran but alert
notifications are still owed (failed, or left when the delivery budget ran out), one
sentence on stderr after the normal output.
"""

from __future__ import annotations

import contextlib
import functools
import json
import sys
from pathlib import Path

import click

from monitor import __version__
from monitor.config import ENV_VAR, Config, load_config
from monitor.errors import UserError

EXIT_USER_ERROR = 2
EXIT_NOT_DELIVERED = 3


def fail(message: str, code: int = EXIT_USER_ERROR) -> None:
    click.echo(f"cuewatch: {message}", err=True)
    sys.exit(code)


def handles_user_errors(fn):
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except UserError as exc:
            fail(str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__)

    return wrapper


def print_json(doc) -> None:
    click.echo(json.dumps(doc, indent=2, default=str, allow_nan=False))


class Context:
    def __init__(self, config_path: str | None):
        self.config_path = config_path
        self._config: Config | None = None

    @property
    def config(self) -> Config:
        if self._config is None:
            self._config = load_config(self.config_path)
            from monitor.store.permissions import set_process_umask

            set_process_umask(self._config)  # owner-only files unless configured otherwise
        return self._config


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.option(
    "--config",
    "config_path",
    type=click.Path(dir_okay=False),
    envvar=ENV_VAR,
    help=f"Configuration file (TOML). Defaults to ${ENV_VAR}.",
)
@click.version_option(__version__, prog_name="cuewatch")
@click.pass_context
def main(ctx: click.Context, config_path: str | None) -> None:
    """cuewatch: keeps watching a judgment log - cue weights, consistency, achievement,
    forbidden-cue use - and tells oversight when something changes."""
    ctx.obj = Context(config_path)


@main.command()
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON.")
@click.pass_obj
@handles_user_errors
def init(obj: Context, as_json: bool) -> None:
    """Create or migrate the store (a no-op when it is up to date)."""
    from monitor.store.connection import Store, describe_init

    result = Store(obj.config).init()
    if as_json:
        print_json(result)
        return
    click.echo(describe_init(result))


@main.command()
@click.argument("paths", nargs=-1)
@click.option("--kind", type=click.Choice(["decisions", "outcomes"]), help="What the files hold.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.pass_obj
@handles_user_errors
def ingest(obj: Context, paths: tuple[str, ...], kind: str | None, as_json: bool) -> None:
    """Append decision / outcome files (or the landing folders; '-' = JSON Lines on stdin)."""
    from monitor.ingest.batches import ingest as run_ingest

    summary = _with_progress(
        lambda on_file: run_ingest(obj.config, paths, kind=kind, on_file=on_file),
        enabled=not as_json,
    )
    if as_json:
        print_json(summary.to_json())
    else:
        click.echo(summary.describe())
    if summary.failed_files:
        first = summary.failed_files[0]
        fail(f"{len(summary.failed_files)} file(s) failed; first: {first.path}: {first.message}")


@main.command()
@click.option("--reason", help="Only records quarantined for this reason.")
@click.option("--batch", type=int, help="Only records of this batch.")
@click.option("--file", "file", help="Only records of the batch(es) read from this path.")
@click.option("--all", "include_all", is_flag=True, help="Include records already re-admitted.")
@click.option(
    "--readmit", is_flag=True, help="Re-check the records against the current configuration."
)
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON.")
@click.pass_obj
@handles_user_errors
def quarantine(
    obj: Context,
    reason: str | None,
    batch: int | None,
    file: str | None,
    include_all: bool,
    readmit: bool,
    as_json: bool,
) -> None:
    """List quarantined records by reason, batch and file, or re-admit them (once)."""
    from monitor.ingest.readmit import Selection, list_quarantine
    from monitor.ingest.readmit import readmit as run_readmit

    selection = Selection(reason, batch, file, include_all)
    if readmit:
        result = run_readmit(obj.config, selection)
    else:
        result = list_quarantine(obj.config, selection)
    if as_json:
        print_json(result.to_json())
    else:
        click.echo(result.describe())


@contextlib.contextmanager
def _busy(label: str, enabled: bool):
    """A spinner with ``label`` on stderr while long work runs, when stderr is a terminal
    (never in --json output or a pipe)."""
    if not enabled or not sys.stderr.isatty():
        yield
        return
    from rich.console import Console

    with Console(stderr=True).status(label):
        yield


def _with_progress(run, enabled: bool):
    """Run ``run(on_file)`` with a rich progress bar on stderr when it is a terminal."""
    if not enabled or not sys.stderr.isatty():
        return run(None)
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        transient=True,
        console=Console(stderr=True),
    ) as progress:
        task = progress.add_task("ingest", total=None)

        def on_file(i: int, total: int, path: Path) -> None:
            progress.update(task, total=total, completed=i, description=f"ingest {path.name}")

        return run(on_file)


@main.command()
@click.option("--full", is_flag=True, help="Recompute every bucket and window from scratch.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.pass_obj
@handles_user_errors
def refit(obj: Context, full: bool, as_json: bool) -> None:
    """Bring the rolling window fits up to date (incremental by default)."""
    from monitor.refit.windows import refit as run_refit

    with _busy("Refitting the rolling windows ...", enabled=not as_json):
        summary = run_refit(obj.config, full=full)
    if as_json:
        print_json(summary.to_json())
        return
    click.echo(summary.describe())


@main.command()
@click.option(
    "--decision-maker", "decision_maker", help="Only this decision-maker (or team, or 'all')."
)
@click.option("--latest", is_flag=True, help="Only the newest window of each series.")
@click.option(
    "--scope", type=click.Choice(["decision_maker", "team", "all"]), help="Only this scope."
)
@click.option("--json", "as_json", is_flag=True, help="Print the fits as a JSON array.")
@click.pass_obj
@handles_user_errors
def fits(
    obj: Context, decision_maker: str | None, latest: bool, scope: str | None, as_json: bool
) -> None:
    """Show stored window fits: weights, consistency, achievement."""
    from monitor.people import check_name
    from monitor.refit.fits_read import describe_fits, read_fits

    if decision_maker is not None:
        check_name(obj.config, decision_maker)  # a mistyped name is an error, not "no fits"
    rows = read_fits(obj.config, decision_maker=decision_maker, latest=latest, scope=scope)
    if as_json:
        print_json(rows)
        return
    cfg = obj.config
    forbidden = cfg.policy.forbidden
    click.echo(describe_fits(rows, binary_judgment=cfg.judgment_is_binary, forbidden=forbidden))


@main.command()
@click.option("--json", "as_json", is_flag=True, help="Print the lists as JSON.")
@click.pass_obj
@handles_user_errors
def people(obj: Context, as_json: bool) -> None:
    """List the decision-makers and teams in the store: volume, days, latest R_s, alerts."""
    from monitor.people import roster

    result = roster(obj.config)
    print_json(result.to_json()) if as_json else click.echo(result.describe())


@main.command()
@click.argument("first")
@click.argument("second", required=False)
@click.option("--window-end", help="The window whose weights are listed (default: the latest).")
@click.option("--windows", type=int, default=12, show_default=True, help="Windows shown (0 = all).")
@click.option("--json", "as_json", is_flag=True, help="Print every window as JSON.")
@click.pass_obj
@handles_user_errors
def compare(obj, first: str, second: str | None, window_end, windows: int, as_json: bool) -> None:
    """Compare FIRST with SECOND, or with the rest of FIRST's team, window by window."""
    from monitor.refit.compare import compare as run_compare

    result = run_compare(obj.config, first, second)
    if as_json:
        print_json(result.to_json())
        return
    click.echo(result.describe(window_end=window_end, shown=windows))


@main.command()
@click.argument("decision_maker")
@click.option("--out", type=click.Path(dir_okay=False), help="CSV or XLSX file to write.")
@click.option("--format", "fmt", type=click.Choice(["csv", "xlsx"]), help="Default: from --out.")
@click.option("--json", "as_json", is_flag=True, help="Print the rows as JSON.")
@click.pass_obj
@handles_user_errors
def weights(obj: Context, decision_maker: str, out, fmt, as_json: bool) -> None:
    """One decision-maker's cue weights window by window, as CSV or XLSX for a report."""
    from monitor.refit import weight_history as wh

    if not out and not as_json:  # the CSV itself on stdout
        click.echo(wh.weight_history_bytes(obj.config, decision_maker, "csv").decode(), nl=False)
        return
    if out:
        result = wh.export_weight_history(obj.config, decision_maker, Path(out), fmt)
    else:
        result = wh.WeightHistory(wh.weight_history(obj.config, decision_maker))
    print_json(result.to_json()) if as_json else click.echo(result.describe())


@main.command()
@click.option("--port", type=int, default=8501, show_default=True, help="Port on 127.0.0.1.")
@click.pass_obj
@handles_user_errors
def dashboard(obj: Context, port: int) -> None:
    """Start the oversight dashboard on 127.0.0.1 (Ctrl-C stops it).

    It reads the store; acknowledging an alert on its Alerts page is its one write.
    """
    from monitor.dashboard.start import launch

    sys.exit(launch(obj.config, port=port))


@main.command()
@click.option("--quarter", required=True, help="Calendar quarter, e.g. 2026Q3.")
@click.option(
    "--out", "out_dir", required=True, type=click.Path(file_okay=False), help="Output folder."
)
@click.option("--as-of", "as_of", help="Use only rows ingested at or before this time (ISO 8601).")
@click.option(
    "--format",
    "formats",
    default="csv,parquet,xlsx,html",
    show_default=True,
    help="Comma-separated: csv, parquet, xlsx, html.",
)
@click.option(
    "--include-rows",
    "include_rows",
    multiple=True,
    help="Also export this decision-maker's raw rows for the quarter (privacy warning).",
)
@click.option(
    "--compare-as-of", "compare", nargs=2, help="List restatements between two as-of times."
)
@click.option("--json", "as_json", is_flag=True, help="Print what was written as JSON.")
@click.pass_obj
@handles_user_errors
def export(
    obj: Context,
    quarter: str,
    out_dir: str,
    as_of: str | None,
    formats: str,
    include_rows: tuple[str, ...],
    compare: tuple[str, str] | None,
    as_json: bool,
) -> None:
    """Write the quarterly audit tables (CSV, Parquet, XLSX, HTML) with a manifest."""
    from monitor.audit.pack import export as run_export

    with _busy("Writing the audit pack ...", enabled=not as_json):
        result = run_export(
            obj.config,
            quarter=quarter,
            out_dir=Path(out_dir),
            as_of=as_of,
            formats=[f.strip() for f in formats.split(",") if f.strip()],
            include_rows=list(include_rows),
            compare=compare,
        )
    if as_json:
        print_json(result)
    else:
        click.echo(result.get("summary", json.dumps(result, default=str)))


@main.command()
@click.option("--force", is_flag=True, help="Re-evaluate even if the fits have not changed.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.pass_obj
@handles_user_errors
def assess(obj: Context, force: bool, as_json: bool) -> None:
    """Evaluate the policy on the fits, update alerts and notify."""
    from monitor.assess.alerts import assess as run_assess

    summary = run_assess(obj.config, force=force)
    if as_json:
        print_json(summary.to_json())
    else:
        click.echo(summary.describe())
    if summary.undelivered:
        fail(summary.delivery_problem().strip(), EXIT_NOT_DELIVERED)


@main.group(invoke_without_command=True)
@click.option(
    "--state", type=click.Choice(["open", "acknowledged", "resolved"]), help="Only this state."
)
@click.option("--person", help="Only alerts on this decision-maker.")
@click.option("--team", help="Only alerts on this team or its members.")
@click.option("--kind", help="Only this kind (forbidden_cue, proxy_use, drift, ...).")
@click.option("--history", is_flag=True, help="Include each alert's state history.")
@click.option("--json", "as_json", is_flag=True, help="Print the alerts as a JSON array.")
@click.pass_context
@handles_user_errors
def alerts(ctx, state, person, team, kind, history: bool, as_json: bool) -> None:
    """List alerts (forbidden-cue use, proxies, drift, consistency, achievement);
    'alerts show ID' explains one."""
    if ctx.invoked_subcommand is not None:
        return
    from monitor.assess.explain import describe_listing, select_alerts

    docs = select_alerts(
        ctx.obj.config, state=state, person=person, team=team, kind=kind, history=history
    )
    print_json(docs) if as_json else click.echo(describe_listing(docs, history=history))


@alerts.command("show")
@click.argument("alert_id", type=int)
@click.option("--json", "as_json", is_flag=True, help="Print the explanation as JSON.")
@click.pass_obj
@handles_user_errors
def alerts_show(obj: Context, alert_id: int, as_json: bool) -> None:
    """Why alert ALERT_ID was raised: finding, evidence, series, proxies, history."""
    from monitor.assess.explain import explain_alert

    result = explain_alert(obj.config, alert_id)
    print_json(result.to_json()) if as_json else click.echo(result.describe())


@main.command()
@click.argument("alert_id", type=int)
@click.option("--by", "by", required=True, help="Who acknowledges.")
@click.option("--note", "note", required=True, help="Why / what was done.")
@click.option("--json", "as_json", is_flag=True, help="Print the alert as JSON.")
@click.pass_obj
@handles_user_errors
def ack(obj: Context, alert_id: int, by: str, note: str, as_json: bool) -> None:
    """Acknowledge an open alert with who and a note."""
    from monitor.assess.alerts import acknowledge

    doc = acknowledge(obj.config, alert_id, by, note)
    if as_json:
        print_json(doc)
    else:
        click.echo(f"Alert {alert_id} acknowledged by {by}.")


@main.command()
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.option(
    "--list-skipped",
    is_flag=True,
    help="List every file skipped as already ingested in --json (default: their count).",
)
@click.pass_obj
@handles_user_errors
def nightly(obj: Context, as_json: bool, list_skipped: bool) -> None:
    """Run ingest -> refit -> assess once (for cron / systemd timers)."""
    from monitor.nightly import run_nightly

    with _busy("Nightly run: ingest, refit, assess ...", enabled=not as_json):
        summary = run_nightly(obj.config)
    if as_json:
        print_json(summary.to_json(list_skipped=list_skipped))
    else:
        click.echo(summary.describe())
    if summary.status == "ok_with_failed_deliveries":
        fail(summary.message, EXIT_NOT_DELIVERED)
    if summary.status != "ok":
        fail(summary.message)


@main.command()
@click.pass_obj
@handles_user_errors
def schedule(obj: Context) -> None:
    """Run the nightly job on the configured cron schedule until stopped (SIGTERM/Ctrl-C)."""
    import logging

    from monitor.nightly import run_nightly
    from monitor.schedule import crontab_to_trigger, next_fire_times, run_schedule

    logging.basicConfig(
        level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s"
    )
    cfg = obj.config
    crontab_to_trigger(cfg.schedule.cron, cfg.schedule.timezone)  # validate before starting
    from monitor.store.rules import utc_now

    nxt = next_fire_times(cfg.schedule.cron, cfg.schedule.timezone, utc_now(), 1)
    click.echo(
        f"Scheduling the nightly job '{cfg.schedule.cron}' ({cfg.schedule.timezone}); next run {nxt[0] if nxt else '?'}."
    )
    summary = run_schedule(cfg, lambda: run_nightly(cfg))
    click.echo(summary.describe())


@main.command()
@click.option(
    "--dir",
    "demo_dir",
    default="demo_run",
    show_default=True,
    type=click.Path(file_okay=False),
    help="Folder for the scenario, landing folders, store and outputs.",
)
@click.option("--no-dashboard", is_flag=True, help="Stop after the pipeline and the audit pack.")
@click.option(
    "--port", type=int, default=8501, show_default=True, help="Dashboard port on 127.0.0.1."
)
@click.option(
    "--days",
    type=click.IntRange(28, 730),
    default=730,
    show_default=True,
    help="Days of decisions in the scenario (fewer = a quicker try).",
)
@click.option(
    "--handlers",
    type=click.IntRange(6, 200),
    default=36,
    show_default=True,
    help="Claims handlers in the scenario.",
)
@click.option(
    "--daily-tail",
    "tail_days",
    type=click.IntRange(0, 365),
    default=35,
    show_default=True,
    help="The last N days arrive one nightly run per day (after a backfill).",
)
@handles_user_errors
def demo(
    demo_dir: str, no_dashboard: bool, port: int, days: int, handlers: int, tail_days: int
) -> None:
    """The Ostwyn Mutual scenario end to end: generate, nightly runs, alerts, audit, dashboard."""
    from monitor.demo import describe_demo, run_demo

    result = run_demo(
        Path(demo_dir).resolve(),
        say=click.echo,
        days=days,
        n_handlers=handlers,
        tail_days=tail_days,
    )
    click.echo(describe_demo(result))
    if no_dashboard:
        return
    from monitor.config import load_config
    from monitor.dashboard.start import launch

    click.echo(f"Starting the dashboard on http://127.0.0.1:{port} (Ctrl-C stops it) ...")
    sys.exit(launch(load_config(result["config"]), port=port))
