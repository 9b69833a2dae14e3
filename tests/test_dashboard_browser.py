"""End to end in headless Chromium: `cuewatch dashboard` on a free port, every page opened
in Debian's chromium through playwright, screenshots kept under test-artifacts/, and the
nightly job writing to the store while the pages are being read."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from helpers.monthly_demo import REPO, build_demo, copy_store
from helpers.store_rows import read_store as sql

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = REPO / "test-artifacts"
CHROMIUM_ARGS = [
    "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]  # fmt: skip
# (url path, text that proves the page rendered its content)
PAGES = [
    ("", "Flagged now"),  # the default page lives at the root
    ("person", "Cue weights window by window"),
    ("forbidden", "not proof of intent"),
    ("alerts", "Acknowledged"),
    ("health", "Quarantine by reason"),
    ("audit", "Audit pack"),
]

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium (/usr/bin/chromium) is not installed; run `make browser`"),
]  # fmt: skip


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def cli(cfg: Path, *args: str, **kw) -> subprocess.Popen:
    env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    env["PYTHONPATH"] = str(REPO)
    return subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(cfg), *args], cwd=REPO, env=env, **kw
    )


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """A private copy of the demo store with the dashboard serving it."""
    built = build_demo(tmp_path_factory.getbasetemp() / "dashboard_demo")
    cfg = copy_store(built, tmp_path_factory.mktemp("served"))
    port = free_port()
    log = open(cfg.parent / "dashboard.log", "wb")
    proc = cli(cfg, "dashboard", "--port", str(port), stdout=log, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while True:
        try:
            with urllib.request.urlopen(f"{url}/_stcore/health", timeout=2) as r:
                if r.read().strip() == b"ok":
                    break
        except OSError:
            pass
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"dashboard did not start: {(cfg.parent / 'dashboard.log').read_text()}")
        time.sleep(0.3)
    yield cfg, url
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
    log.close()


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        context = p.chromium.launch_persistent_context(
            str(tmp_path_factory.mktemp("chromium-profile")),
            executable_path=str(CHROMIUM),
            headless=True,
            args=CHROMIUM_ARGS,
            viewport={"width": 1400, "height": 1000},
        )
        yield context
        context.close()


def open_page(browser, url: str, path: str, text: str, timeout_ms: int = 45_000):
    page = browser.pages[0] if browser.pages else browser.new_page()
    page.goto(f"{url}/{path}", wait_until="domcontentloaded")
    page.get_by_text(text, exact=False).first.wait_for(timeout=timeout_ms)
    # Let the run finish (charts render after the text); the status widget shows a
    # running indicator until then.
    page.wait_for_selector('[data-testid="stStatusWidget"]', state="detached", timeout=timeout_ms)
    assert page.locator('[data-testid="stException"]').count() == 0, f"exception on /{path}"
    return page


def test_every_page_renders_without_an_exception(served, browser):
    cfg, url = served
    ARTIFACTS.mkdir(exist_ok=True)
    for path, text in PAGES:
        page = open_page(browser, url, path, text)
        page.wait_for_timeout(800)
        page.screenshot(path=str(ARTIFACTS / f"dashboard-{path or 'team'}.png"), full_page=True)
        if path == "":
            body = page.inner_text("body")
            open_people = sql(
                cfg, "SELECT DISTINCT decision_maker FROM alerts WHERE scope = 'decision_maker' "
                "AND state IN ('open', 'acknowledged')"
            )["decision_maker"]  # fmt: skip
            assert len(open_people) and all(who in body for who in open_people)
        if path == "forbidden":
            assert "compliance and legal advisers" in page.inner_text("body")


def test_pages_keep_working_while_the_nightly_job_writes(served, browser):
    cfg, url = served
    root = cfg.parent
    for kind in ("decisions", "outcomes"):
        for f in (root / "later" / kind).glob("*.csv"):
            shutil.copy(f, root / "run" / "landing" / kind / f.name)
    before = sql(cfg, "SELECT count(*) AS n FROM decisions")["n"][0]
    accepted_sql = "SELECT sum(rows_accepted) AS n FROM batches"
    accepted_before = int(sql(cfg, accepted_sql)["n"][0])
    nightly = cli(cfg, "nightly", stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    loads = during = 0
    while nightly.poll() is None or loads < len(PAGES):
        path, text = PAGES[loads % len(PAGES)]
        during += nightly.poll() is None
        open_page(browser, url, path, text, timeout_ms=90_000)
        loads += 1
    out, err = nightly.communicate(timeout=300)
    assert nightly.returncode == 0, err.decode()
    assert during >= 2, "the nightly job finished before the pages were read"
    assert sql(cfg, "SELECT count(*) AS n FROM decisions")["n"][0] > before
    ok_runs = sql(cfg, "SELECT count(*) AS n FROM runs WHERE command = 'nightly' AND status = 'ok'")
    assert ok_runs["n"][0] == 2
    # After the write the dashboard shows the new data (its cache key is the store mtime):
    # the health page's "Rows accepted" is the store's total of accepted rows (plain SQL
    # here), a figure only the nightly job's new batches can produce.
    accepted_after = int(sql(cfg, accepted_sql)["n"][0])
    assert accepted_after > accepted_before
    page = open_page(browser, url, "health", "Quarantine by reason")
    page.screenshot(path=str(ARTIFACTS / "dashboard-health-after-nightly.png"), full_page=True)
    metric = page.locator('[data-testid="stMetric"]').filter(has_text="Rows accepted")
    shown = metric.inner_text()
    assert f"{accepted_after:,}" in shown and f"{accepted_before:,}" not in shown, shown
