"""Starting the dashboard: the Streamlit command line and the process that runs it."""

from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

from monitor.config import Config
from monitor.palette import COLOURS

# Our own palette, passed as theme options so no file outside the package is needed.
THEME = {
    "theme.base": "light",
    "theme.primaryColor": COLOURS["person"],
    "theme.backgroundColor": "#fbfaf7",
    "theme.secondaryBackgroundColor": "#eef2ef",
    "theme.textColor": COLOURS["ink"],
}


def app_path() -> Path:
    """The Streamlit app, ``app.py`` of the installed ``dashboards`` package."""
    import dashboards

    path = Path(dashboards.__file__).resolve().parent / "app.py"
    if not path.exists():
        raise FileNotFoundError(f"the dashboard app was not found at {path}; reinstall cuewatch.")
    return path


def launch_command(config: Config, port: int) -> list[str]:
    """`streamlit run` of the app through ``monitor.dashboard.serve``, which warms the
    first page's imports and reads once the server is up."""
    cmd = [sys.executable, "-m", "monitor.dashboard.serve", "run", str(app_path()),
           "--server.address", "127.0.0.1", "--server.port", str(int(port)),
           "--server.headless", "true", "--browser.gatherUsageStats", "false",
           "--client.toolbarMode", "viewer"]  # fmt: skip
    for key, value in THEME.items():
        cmd += [f"--{key}", value]
    return [*cmd, "--", "--config", str(config.source)]


def launch(config: Config, port: int) -> int:
    """Run the Streamlit app on 127.0.0.1:``port`` until it stops; its exit code.

    A SIGTERM to this process is passed on to the server (else it would outlive us)."""
    proc = subprocess.Popen(launch_command(config, port))
    try:
        previous = signal.signal(signal.SIGTERM, lambda signum, frame: proc.terminate())
    except ValueError:  # not the main thread: signals cannot be handled here
        previous = None
    try:
        return proc.wait()
    except KeyboardInterrupt:
        proc.terminate()
        try:
            return proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            return proc.wait()
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
