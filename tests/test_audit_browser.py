"""The audit report renders offline in headless Chromium (screenshot in test-artifacts/).

Skipped when /usr/bin/chromium is missing (``make browser`` installs it).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pytest
from helpers.configs import REPO

from monitor.audit.pack import export
from monitor.config import load_config
from monitor.ingest.batches import ingest
from monitor.store.connection import Store

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = REPO / "test-artifacts"
SAMPLE = REPO / "synthetic_logs" / "sample"

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="chromium not installed (make browser)"),
]


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("report")
    raw = (REPO / "config" / "ostwyn.toml").read_text(encoding="utf-8")
    cfg = root / "ostwyn.toml"
    cfg.write_text(raw.replace("../demo_run", str(root / "run")), encoding="utf-8")
    config = load_config(cfg)
    Store(config).init()
    # One file per kind keeps the set-up fast; row order is the files' order.
    for kind in ("decisions", "outcomes"):
        files = sorted((SAMPLE / kind).glob("*.csv"))
        joined = pd.concat([pd.read_csv(f, dtype=str) for f in files], ignore_index=True)
        path = root / f"{kind}.csv"
        joined.to_csv(path, index=False)
        ingest(config, [str(path)], kind=kind)
    export(config, quarter="2024Q4", out_dir=root / "out", formats=["html"])
    return next((root / "out").glob("*.html"))


def test_report_renders_offline_in_headless_chromium(report, tmp_path):
    sync_api = pytest.importorskip("playwright.sync_api")
    requests: list[str] = []
    with sync_api.sync_playwright() as pw:
        context = pw.chromium.launch_persistent_context(
            str(tmp_path / "profile"),
            executable_path=str(CHROMIUM),
            headless=True,
            args=[
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
            ],
            viewport={"width": 1280, "height": 900},
        )
        try:
            # Offline: anything but the report file itself is refused and recorded.
            def guard(route):
                if route.request.url.startswith("file://"):
                    route.continue_()
                else:
                    requests.append(route.request.url)
                    route.abort()

            context.route("**/*", guard)
            page = context.new_page()
            page.goto(report.as_uri(), wait_until="load")
            assert page.title().startswith("cuewatch audit 2024Q4")
            charts = page.locator("svg.chart")
            assert charts.count() == 2
            for i in range(charts.count()):
                box = charts.nth(i).bounding_box()
                assert box and box["width"] > 300 and box["height"] > 60
            bars = page.locator("svg.chart rect").count()
            assert bars > 10  # one bar per decision-maker and figure, not an empty frame
            for table in ("decision_makers", "cue_weights", "forbidden_cues", "coverage"):
                assert page.locator(f"h2#{table} + div table tbody tr").count() > 0, table
            assert "not proof of intent" in page.inner_text("body")
            ARTIFACTS.mkdir(exist_ok=True)
            shot = ARTIFACTS / "audit_report.png"
            page.screenshot(path=str(shot), full_page=False)
            assert shot.stat().st_size > 10_000
            shutil.copy(report, ARTIFACTS / "audit_report.html")
        finally:
            context.close()
    assert requests == []


def test_report_prints_every_row_it_holds(report, tmp_path):
    """Printed (print media, an A4 page's width of about 720 CSS px inside its margins),
    no table sits in a scroll box: each box is as tall and as wide as its table, and no
    table is wider than the page."""
    sync_api = pytest.importorskip("playwright.sync_api")
    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(
            executable_path=str(CHROMIUM), headless=True, args=["--no-sandbox", "--disable-gpu"]
        )
        try:
            page = browser.new_page(viewport={"width": 720, "height": 1000})
            page.goto(report.as_uri(), wait_until="load")
            page.emulate_media(media="print")
            boxes = page.eval_on_selector_all(
                "div.wrap",
                "els => els.map(e => ({id: e.previousElementSibling.id, "
                "sh: e.scrollHeight, ch: e.clientHeight, sw: e.scrollWidth, cw: e.clientWidth, "
                "rows: e.querySelectorAll('tbody tr').length, "
                "right: e.querySelector('table').getBoundingClientRect().right}))",
            )
            assert len(boxes) >= 5
            assert max(b["rows"] for b in boxes) > 30  # a table longer than one screen
            for b in boxes:
                assert b["sh"] <= b["ch"] + 1, b  # nothing hidden below the box
                assert b["sw"] <= b["cw"] + 1, b  # nothing hidden to its right
                assert b["right"] <= 720 + 1, b
            pdf = tmp_path / "report.pdf"
            page.pdf(path=str(pdf), format="A4")
            assert pdf.stat().st_size > 10_000
        finally:
            browser.close()
