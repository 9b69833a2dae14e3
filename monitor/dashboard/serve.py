"""The dashboard's server process: `python -m monitor.dashboard.serve run APP [options] -- ARGS`.

The same command line as `streamlit run`, plus one thing: as soon as the server is up,
a background thread warms what the first page view would otherwise pay for once
(``dashboards.warmup``: imports, the first store read, Altair's schema validator), while
the browser loads the front end.  Started by ``monitor.dashboard.start.launch_command``.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import threading

from monitor.dashboard.runtime import server_started

log = logging.getLogger("cuewatch.dashboard")
SERVER_WAIT_S = 60.0


def app_config_path(argv: list[str]) -> str | None:
    """``--config FILE`` among the app's arguments (after ``--``), else $CUEWATCH_CONFIG."""
    app_args = argv[argv.index("--") + 1 :] if "--" in argv else []
    parser = argparse.ArgumentParser(add_help=False)
    parser.add_argument("--config")
    known, _ = parser.parse_known_args(app_args)
    if known.config:
        return known.config
    from monitor.config import ENV_VAR

    return os.environ.get(ENV_VAR)


def _warm(app: str, argv: list[str]) -> None:
    from pathlib import Path

    # The app puts its project folder on sys.path itself; the warm-up runs before it.
    root = str(Path(app).resolve().parent.parent)
    if root not in sys.path:
        sys.path.insert(0, root)
    # Python threads share one core: warming during Streamlit's own start would only
    # delay it.  Once the server is up, the warm-up runs while the browser loads and
    # compiles the front end (another process, another core).
    if not server_started(SERVER_WAIT_S):
        return
    try:
        from dashboards.warmup import warm
    except ImportError as exc:  # an app folder without the warm-up: nothing to do
        log.info("dashboard warm-up not available: %s", exc)
        return
    log.info("dashboard warm-up done in %.2f s", warm(app_config_path(argv)))


def start_warmup(argv: list[str]) -> threading.Thread | None:
    """Start warming the app named after ``run`` in ``argv`` in a daemon thread."""
    if "run" not in argv or argv.index("run") + 1 >= len(argv):
        return None
    app = argv[argv.index("run") + 1]
    thread = threading.Thread(
        target=_warm, args=(app, list(argv)), name="cuewatch-warmup", daemon=True
    )
    thread.start()
    return thread


def main(argv: list[str] | None = None) -> None:
    """Start the warm-up, then hand the command line to Streamlit (does not return
    until the server stops)."""
    args = sys.argv[1:] if argv is None else argv
    start_warmup(args)
    from streamlit.web import cli

    sys.argv = ["streamlit", *args]
    cli.main(prog_name="streamlit")


if __name__ == "__main__":
    main()
