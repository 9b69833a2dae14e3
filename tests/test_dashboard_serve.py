"""The dashboard's server process: its command line and the start-up warm-up, which must
leave exactly the read the overview page makes first in the cache and never break the
server when it cannot do its work."""

from __future__ import annotations

import functools
import logging
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from helpers.monthly_demo import APP, REPO, build_demo
from streamlit.testing.v1 import AppTest

from monitor.dashboard import data as dd
from monitor.dashboard import runtime
from monitor.dashboard.serve import app_config_path, start_warmup

# The dashboards folder is not an installed package (the app puts it on sys.path itself).
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))
from dashboards import ui, warmup  # noqa: E402


@pytest.fixture(scope="session")
def demo_config(tmp_path_factory) -> Path:
    # The same build as tests/test_dashboard.py (reused when that file ran first).
    return build_demo(tmp_path_factory.getbasetemp() / "dashboard_demo")


def test_config_path_is_read_after_the_double_dash_then_from_the_environment(monkeypatch):
    # Source: common practice - `streamlit run APP [options] -- ARGS` hands ARGS to the app.
    monkeypatch.setenv("CUEWATCH_CONFIG", "env.toml")
    argv = ["run", "app.py", "--server.port", "1", "--", "--config", "given.toml"]
    assert app_config_path(argv) == "given.toml"
    assert app_config_path(["run", "app.py", "--config", "not-the-apps.toml"]) == "env.toml"
    monkeypatch.delenv("CUEWATCH_CONFIG")
    assert app_config_path(["run", "app.py"]) is None


def test_no_warm_up_without_an_app_to_run():
    assert start_warmup(["hello"]) is None
    assert start_warmup(["run"]) is None


def test_a_warm_up_that_cannot_read_the_store_does_not_raise(tmp_path, caplog):
    missing = tmp_path / "missing.toml"
    with caplog.at_level(logging.INFO, logger="cuewatch.dashboard"):
        seconds = warmup.warm(str(missing))  # must return, not raise
    assert isinstance(seconds, float) and 0.0 < seconds < 60.0
    # It tried the configuration it was given, failed on it and said so in the log.
    skipped = [r.getMessage() for r in caplog.records if "warm-up skipped" in r.getMessage()]
    assert len(skipped) == 1 and str(missing) in skipped[0], caplog.records


def test_warm_up_leaves_the_overview_pages_first_read_cached(demo_config, monkeypatch):
    monkeypatch.setenv("CUEWATCH_CONFIG", str(demo_config))
    # No Streamlit runtime in a test process: let the warm-up fill the cache anyway.
    monkeypatch.setattr(runtime, "server_started", lambda timeout_s: True)
    ui._cached.clear()
    warmup.warm(str(demo_config))

    calls = []
    real = dd.overview

    @functools.wraps(real)  # same __name__: the cache key names the function
    def counted(*args, **kwargs):
        calls.append((args, kwargs))
        return real(*args, **kwargs)

    monkeypatch.setattr(dd, "overview", counted)
    at = AppTest.from_file(str(APP), default_timeout=60)
    at.run()
    assert not at.exception, [e.value for e in at.exception]
    assert at.title[0].value == "Team at a glance" and len(at.dataframe[0].value) > 0
    assert calls == [], "the page's first overview read missed the warmed cache"
    # A read with other arguments is not in the cache: the check above can fail.
    ui._cached(
        "monitor.dashboard.data",
        "overview",
        ui.config_path(),
        dd.store_stamp(ui.config()),
        (None,),
        (("team", "x"),),
    )
    assert len(calls) == 1


def _answers(url: str) -> bool:
    try:
        with urllib.request.urlopen(url, timeout=1) as r:
            return r.read().strip() == b"ok"
    except OSError:
        return False


def test_stopping_cuewatch_dashboard_stops_the_server(demo_config):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    env["PYTHONPATH"] = str(REPO)
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(demo_config), "dashboard",
         "--port", str(port)],
        cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )  # fmt: skip
    health = f"http://127.0.0.1:{port}/_stcore/health"
    try:
        deadline = time.monotonic() + 60
        while not _answers(health):
            assert proc.poll() is None and time.monotonic() < deadline, "did not start"
            time.sleep(0.2)
        proc.terminate()  # what a service manager or a test harness sends
        # It handles the signal (passes it on, waits for the server, exits with the
        # server's status) rather than being killed by it: killed, it would report
        # -SIGTERM and leave the server running.  TimeoutExpired here: it did not stop.
        code = proc.wait(timeout=20)
        assert code != -signal.SIGTERM, "SIGTERM killed `cuewatch dashboard` unhandled"
        assert code == 0, f"`cuewatch dashboard` exited with {code} after SIGTERM"
        deadline = time.monotonic() + 15
        while _answers(health) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not _answers(health), "the Streamlit server outlived `cuewatch dashboard`"
    finally:
        if proc.poll() is None:
            proc.kill()
