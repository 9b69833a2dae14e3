"""Benchmark of the dashboard's first render (`python -m benchmarks.bench_dashboard`).

A store of 5,000,000 decisions (200 decision-makers in 10 teams, 10 numeric cues, two
years; rows generated with DuckDB SQL straight into ``decisions`` and ``outcomes`` by
``benchmarks.bench_refit.build_store``) is brought up to date with `cuewatch refit` and
`cuewatch assess`, then the "Team at a glance" page is timed three ways, each in a
fresh process so nothing is cached:

(a) ``overview_data_s``: ``dashboard_data.window_range`` + ``overview`` (the page's reads);
(b) ``apptest_first_run_s``: the whole app script run once by streamlit's AppTest;
(c) in headless Chromium, ``--repeat`` rounds, each with freshly started servers: the
    dashboard as `cuewatch dashboard` starts it, and a one-line Streamlit app
    (``floor_app_*``: the cost every Streamlit page pays on this machine - server,
    websocket, front end); with ``--unwarmed`` also the dashboard under plain
    `streamlit run` (no start-up warm-up, as before ``monitor.dashboard.serve``).  Per
    server: ``*_server_up_s`` from launch until its health check answers;
    ``*_first_render_s``: the first tab on the fresh server (the cold visit), from
    navigation until the flagged list is shown and the run has finished;
    ``*_warm_render_s``: the median of ``--loads - 1`` more fresh tabs.  Each is given
    as the best (``*_s``) and the median over rounds (``*_median_s``), and
    ``*_first_vs_floor`` as the median over rounds of the ratio to the floor app's
    figure in the same round (the machine is shared: only same-round ratios compare).  Skipped without /usr/bin/chromium.

Goal: under 1.5 s for the first render (the best round); the overview reads only the
latest fits, never raw decisions.  Results go to ``benchmarks/out/bench_dashboard.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
OUT = Path(__file__).resolve().parent / "out"
APP = REPO / "dashboards" / "app.py"
GOAL_S = 1.5
CHROMIUM = Path("/usr/bin/chromium")

_DATA_CHILD = """
import sys, time
t0 = time.perf_counter()
from monitor.config import load_config
from monitor.dashboard import data as dd
cfg = load_config(sys.argv[1])
t1 = time.perf_counter()
view = dd.overview(cfg, dd.window_range(cfg))
t2 = time.perf_counter()
print(t2 - t1, t1 - t0, len(view.rows), len(view.flagged))
"""

_APPTEST_CHILD = """
import os, sys, time
os.environ["CUEWATCH_CONFIG"] = sys.argv[1]
from streamlit.testing.v1 import AppTest
at = AppTest.from_file(sys.argv[2], default_timeout=120)
t0 = time.perf_counter()
at.run()
t1 = time.perf_counter()
assert not at.exception, [e.value for e in at.exception]
print(t1 - t0, len(at.dataframe[0].value))
"""


def _env() -> dict:
    env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    env["PYTHONPATH"] = str(REPO)
    return env


def _cli(cfg: Path, *args: str) -> float:
    t0 = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "monitor", "--config", str(cfg), *args],
        check=True, cwd=REPO, env=_env(), stdout=subprocess.DEVNULL,
    )  # fmt: skip
    return time.perf_counter() - t0


def _child(code: str, *args: str) -> list[str]:
    out = subprocess.run(
        [sys.executable, "-c", code, *args],
        check=True, cwd=REPO, env=_env(), capture_output=True, text=True,
    )  # fmt: skip
    return out.stdout.split()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _serve(cmd: list[str], port: int) -> subprocess.Popen:
    server = subprocess.Popen(
        cmd, cwd=REPO, env=_env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2):
                return server
        except OSError:
            time.sleep(0.2)
    server.kill()
    raise RuntimeError("the dashboard did not start within 60 s")


def _render_times(port: int, text: str, loads: int) -> list[float]:
    """Seconds from navigation until ``text`` is shown and the script run has finished,
    for ``loads`` fresh tabs in one headless Chromium (the first is a cold server)."""
    from playwright.sync_api import sync_playwright

    times = []
    with tempfile.TemporaryDirectory() as profile, sync_playwright() as p:
        ctx = p.chromium.launch_persistent_context(
            profile, executable_path=str(CHROMIUM), headless=True,
            args=["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update",
                  "--disable-sync"],
        )  # fmt: skip
        for _ in range(loads):
            page = ctx.new_page()
            t0 = time.perf_counter()
            page.goto(f"http://127.0.0.1:{port}", wait_until="commit")
            page.get_by_text(text).first.wait_for(timeout=60_000)
            page.wait_for_selector(
                '[data-testid="stStatusWidget"]', state="detached", timeout=60_000
            )
            times.append(time.perf_counter() - t0)
            assert page.locator('[data-testid="stException"]').count() == 0
            page.close()
        ctx.close()
    return times


def _server_commands(cfg: Path, floor_app: Path, port: int, unwarmed: bool) -> dict:
    from monitor.config import load_config
    from monitor.dashboard.start import launch_command

    runs = {
        "browser": [sys.executable, "-m", "monitor", "--config", str(cfg), "dashboard",
                    "--port", str(port)],
        "floor_app": [sys.executable, "-m", "streamlit", "run", str(floor_app),
                      "--server.headless", "true", "--server.address", "127.0.0.1",
                      "--server.port", str(port)],
    }  # fmt: skip
    if unwarmed:
        # The same app and options under plain `streamlit run`: no start-up warm-up.
        dashboard = launch_command(load_config(cfg), port)
        runs["unwarmed"] = [sys.executable, "-m", "streamlit", *dashboard[3:]]
    return runs


def browser_render(cfg: Path, loads: int = 6, repeat: int = 3, unwarmed: bool = False) -> dict:
    """The overview in headless Chromium, and for scale a one-line Streamlit app on the
    same machine, ``repeat`` interleaved rounds of freshly started servers."""
    if not CHROMIUM.exists():
        return {"browser_skipped": "no /usr/bin/chromium"}
    rounds: dict[str, list[dict]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        floor_app = Path(tmp) / "floor.py"
        floor_app.write_text('import streamlit as st\nst.title("Flagged now")\n')
        for _ in range(repeat):
            for label in _server_commands(cfg, floor_app, 0, unwarmed):
                port = _free_port()
                cmd = _server_commands(cfg, floor_app, port, unwarmed)[label]
                t0 = time.perf_counter()
                server = _serve(cmd, port)
                up = time.perf_counter() - t0
                try:
                    times = _render_times(port, "Flagged now", loads)
                finally:
                    server.terminate()
                    server.wait(timeout=20)
                rounds.setdefault(label, []).append(
                    {"up": up, "first": times[0], "warm": statistics.median(times[1:])}
                )
    out: dict = {"browser_rounds": repeat}
    for label, runs in rounds.items():
        for key, name in (("up", "server_up"), ("first", "first_render"),
                          ("warm", "warm_render")):  # fmt: skip
            values = [r[key] for r in runs]
            out[f"{label}_{name}_s"] = min(values)
            out[f"{label}_{name}_median_s"] = statistics.median(values)
        if label != "floor_app":
            for key, name in (("first", "first_vs_floor"), ("warm", "warm_vs_floor")):
                ratios = [r[key] / f[key] for r, f in zip(runs, rounds["floor_app"], strict=True)]
                out[f"{label}_{name}"] = statistics.median(ratios)
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=5_000_000)
    parser.add_argument("--makers", type=int, default=200)
    parser.add_argument("--days", type=int, default=730)
    parser.add_argument("--keep", type=Path, help="build the store here and keep it")
    parser.add_argument(
        "--reuse", action="store_true", help="time the store already built in --keep"
    )
    parser.add_argument("--repeat", type=int, default=3, help="rounds of fresh servers")
    parser.add_argument("--loads", type=int, default=6, help="tabs per server (first cold)")
    parser.add_argument(
        "--unwarmed", action="store_true", help="also time the app under plain `streamlit run`"
    )
    args = parser.parse_args(argv)
    from benchmarks.bench_refit import build_store

    with tempfile.TemporaryDirectory(prefix="cuewatch-bench-dash-") as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        result: dict = {"rows": args.rows, "makers": args.makers, "days": args.days}
        cfg = folder / "bench.toml"
        if not (args.reuse and cfg.exists()):
            t0 = time.perf_counter()
            cfg = build_store(folder, args.rows, args.days, args.makers)
            result["build_s"] = time.perf_counter() - t0
            result["refit_s"] = _cli(cfg, "refit")
            result["assess_s"] = _cli(cfg, "assess")
        secs, import_s, n_rows, n_flagged = _child(_DATA_CHILD, str(cfg))
        result.update(overview_data_s=float(secs), import_and_config_s=float(import_s),
                      overview_rows=int(n_rows), flagged=int(n_flagged))  # fmt: skip
        secs, shown = _child(_APPTEST_CHILD, str(cfg), str(APP))
        result.update(apptest_first_run_s=float(secs), apptest_rows_shown=int(shown))
        result.update(browser_render(cfg, args.loads, args.repeat, args.unwarmed))
    result["goal_s"] = GOAL_S
    result["load_average_1min"] = os.getloadavg()[0]
    result["cpus"] = os.cpu_count()
    first = result.get("browser_first_render_s", result["apptest_first_run_s"])
    result["meets_goal_first_render"] = first < GOAL_S
    OUT.mkdir(exist_ok=True)
    (OUT / "bench_dashboard.json").write_text(json.dumps(result, indent=2))
    for key, value in result.items():
        print(f"{key:36s} {value:.3f}" if isinstance(value, float) else f"{key:36s} {value}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
