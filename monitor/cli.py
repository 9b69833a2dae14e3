"""The `cuewatch` command line: parse, call one stage function, print a summary or --json.

No logic lives here that a test cannot reach through the stage modules.  User errors
(bad configuration, bad input, a busy store) print one sentence to stderr and exit 2.
"""

from __future__ import annotations

import functools
import json
import sys
from pathlib import Path

import click

from monitor import __version__
from monitor.config import ENV_VAR, Config, ConfigError, load_config

EXIT_USER_ERROR = 2


def user_errors() -> tuple[type[Exception], ...]:
    """Exception types that are the user's to fix (one line, exit 2)."""
    from monitor.ingest import IngestUsageError
    from monitor.ingest_checks import FileRejected
    from monitor.store import StoreBusy, StoreMismatch

    errors: list[type[Exception]] = [
        ConfigError,
        IngestUsageError,
        FileRejected,
        StoreBusy,
        StoreMismatch,
    ]
    for module, name in (
        ("monitor.windows", "RefitUsageError"),
        ("monitor.alerts", "AlertUsageError"),
        ("monitor.audit", "ExportUsageError"),
        ("monitor.schedule", "ScheduleUsageError"),
    ):
        try:
            mod = __import__(module, fromlist=[name])
            errors.append(getattr(mod, name))
        except (ImportError, AttributeError):
            continue
    return tuple(errors)


def fail(message: str) -> None:
    click.echo(f"cuewatch: {message}", err=True)
    sys.exit(EXIT_USER_ERROR)


def handles_user_errors(fn):
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except user_errors() as exc:
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
    from monitor.store import Store

    result = Store(obj.config).init()
    if as_json:
        print_json(result)
        return
    if result["created"]:
        click.echo(f"Created store {result['path']} (schema version {result['schema_version']}).")
    elif result["applied"] or result["cue_columns_added"]:
        click.echo(
            f"Migrated store {result['path']} to schema version {result['schema_version']}"
            + (f"; added cue columns {', '.join(result['cue_columns_added'])}" if result["cue_columns_added"] else "")
            + "."
        )
    else:
        click.echo(f"Store {result['path']} is up to date (schema version {result['schema_version']}).")


@main.command()
@click.argument("paths", nargs=-1)
@click.option("--kind", type=click.Choice(["decisions", "outcomes"]), help="What the files hold.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.pass_obj
@handles_user_errors
def ingest(obj: Context, paths: tuple[str, ...], kind: str | None, as_json: bool) -> None:
    """Append decision / outcome files (or the landing folders; '-' = JSON Lines on stdin)."""
    from monitor.ingest import ingest as run_ingest

    summary = _with_progress(
        lambda on_file: run_ingest(obj.config, paths, kind=kind, on_file=on_file),
        enabled=not as_json,
    )
    if as_json:
        print_json(summary.to_json())
    else:
        click.echo(format_ingest_summary(summary))
    if summary.failed_files:
        first = summary.failed_files[0]
        fail(f"{len(summary.failed_files)} file(s) failed; first: {first.path}: {first.message}")


def _with_progress(run, enabled: bool):
    """Run ``run(on_file)`` with a rich progress bar on stderr when it is a terminal."""
    if not enabled or not sys.stderr.isatty():
        return run(None)
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    with Progress(
        TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), transient=True
    ) as progress:
        task = progress.add_task("ingest", total=None)

        def on_file(i: int, total: int, path: Path) -> None:
            progress.update(task, total=total, completed=i, description=f"ingest {path.name}")

        return run(on_file)


def format_ingest_summary(summary) -> str:
    ingested = sum(f.status == "ingested" for f in summary.files)
    lines = [
        f"{ingested} file(s) ingested, {summary.skipped_files} skipped (already ingested), "
        f"{len(summary.failed_files)} failed.",
        f"Rows: {summary.accepted} accepted, {summary.quarantined} quarantined, "
        f"{summary.duplicates} duplicates.",
    ]
    if summary.quarantine_reasons:
        reasons = ", ".join(f"{k} {v}" for k, v in summary.quarantine_reasons.items())
        lines.append(f"Quarantine reasons: {reasons}.")
    for f in summary.failed_files:
        lines.append(f"FAILED {f.path}: {f.message}")
    return "\n".join(lines)


@main.command()
@click.option("--full", is_flag=True, help="Recompute every bucket and window from scratch.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as JSON.")
@click.pass_obj
@handles_user_errors
def refit(obj: Context, full: bool, as_json: bool) -> None:
    """Bring the rolling window fits up to date (incremental by default)."""
    from monitor.windows import refit as run_refit

    summary = run_refit(obj.config, full=full)
    if as_json:
        print_json(summary.to_json())
        return
    click.echo(
        f"Refit ({summary.mode}): {summary.dirty_buckets} dirty bucket(s), "
        f"{summary.windows_fitted} window fit(s) written "
        f"({summary.windows_refit_from_rows} refitted from raw rows) in {summary.seconds:.2f} s."
    )


@main.command()
@click.option("--decision-maker", "decision_maker", help="Only this decision-maker (or team, or 'all').")
@click.option("--latest", is_flag=True, help="Only the newest window of each series.")
@click.option("--scope", type=click.Choice(["decision_maker", "team", "all"]), help="Only this scope.")
@click.option("--json", "as_json", is_flag=True, help="Print the fits as a JSON array.")
@click.pass_obj
@handles_user_errors
def fits(obj: Context, decision_maker: str | None, latest: bool, scope: str | None, as_json: bool) -> None:
    """Show stored window fits: weights, consistency, achievement."""
    from monitor.windows import read_fits

    rows = read_fits(obj.config, decision_maker=decision_maker, latest=latest, scope=scope)
    if as_json:
        print_json(rows)
        return
    click.echo(format_fits_table(rows))


def format_fits_table(rows: list[dict]) -> str:
    if not rows:
        return "No fits stored yet: run 'cuewatch refit'."
    from rich.console import Console
    from rich.table import Table

    def num(v, fmt="{:.2f}"):
        return "-" if v is None else fmt.format(v)

    table = Table(title="Window fits (R_s consistency, r_a achievement, G matching)")
    for col in ("scope", "who", "window", "n", "linked", "R_s", "R_e", "r_a", "G", "C", "strongest cues (std weight)", "note"):
        table.add_column(col)
    for r in rows:
        cues = sorted((c for c in r["cues"] if c["std_weight"] is not None), key=lambda c: -abs(c["std_weight"]))[:3]
        table.add_row(
            r["scope"], str(r["decision_maker"]), f"{r['window_start']}..{r['window_end']}",
            str(r["n_decisions"]), str(r["n_linked"]), num(r["R_s"]), num(r["R_e"]), num(r["r_a"]),
            num(r["G"]), num(r["C"]),
            ", ".join(f"{c['cue']} {c['std_weight']:+.2f}" for c in cues),
            r.get("reason") or "",
        )
    console = Console(width=200, record=True, file=open("/dev/null", "w"))
    console.print(table)
    return console.export_text()


def _register_optional_commands() -> None:
    """Commands owned by later stages register themselves when their module exists."""
    for module in (
        "monitor.cli_fits",
        "monitor.cli_alerts",
        "monitor.cli_audit",
        "monitor.cli_demo",
    ):
        try:
            mod = __import__(module, fromlist=["register"])
        except ImportError as exc:
            if exc.name != module:
                raise
            continue
        mod.register(main)


_register_optional_commands()
