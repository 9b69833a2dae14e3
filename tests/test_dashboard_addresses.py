"""Headless Chromium on `cuewatch dashboard`: every page answers at its own address (the
root opens /team), the sidebar says what the dashboard writes, an open alert shows no
acknowledgement it does not have, and the data-health page gives the quarantine's counts
and the commands that list and re-admit the records."""

from __future__ import annotations

import json
import re

import pytest
from helpers.cli import run_cli, text
from test_dashboard_browser import ARTIFACTS, CHROMIUM, browser, open_page, served

__all__ = ["browser", "served"]  # fixtures shared with the page-by-page browser tests

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium (/usr/bin/chromium) is not installed; run `make browser`"),
]  # fmt: skip


def test_the_team_page_has_its_own_address_and_the_root_opens_it(served, browser):
    cfg, url = served
    page = open_page(browser, url, "team", "Flagged now")
    assert page.url.rstrip("/").endswith("/team")
    assert "Page not found" not in page.inner_text("body")
    page = open_page(browser, url, "", "Flagged now")
    page.wait_for_url(re.compile(r"/team/?$"), timeout=30_000)
    sidebar = page.locator('[data-testid="stSidebar"]').inner_text()
    assert "acknowledging an alert is the one write" in sidebar
    assert "read-only" not in sidebar


def test_open_alerts_show_no_acknowledgement_they_do_not_have(served, browser):
    cfg, url = served
    listed = json.loads(text(run_cli(cfg, "alerts", "--state", "open", "--json"))[0])
    assert listed, "the demo store has open alerts"
    page = open_page(browser, url, "alerts", "Acknowledged")
    body = page.inner_text("body")
    assert "Acknowledged by" not in body
    assert body.count("Not acknowledged.") >= 1
    assert not re.search(r"\bnan\b", body)
    page.screenshot(path=str(ARTIFACTS / "dashboard-alerts-open.png"), full_page=True)


def test_data_health_gives_the_quarantine_and_the_commands_to_readmit(served, browser):
    cfg, url = served
    # Reference: the command line's own count of the records still quarantined.
    listing = json.loads(text(run_cli(cfg, "quarantine", "--json"))[0])
    page = open_page(browser, url, "health", "Still quarantined")
    body = page.inner_text("body")
    assert f"{listing['total']:,} of the" in body
    commands = page.locator('[data-testid="stCode"]').inner_text()
    assert f"cuewatch --config {cfg} quarantine" in commands
    # The commonest reason (ties: the first by name) is the example.
    top = min(listing["by_reason"], key=lambda r: (-listing["by_reason"][r], r))
    assert f"quarantine --reason {top} --readmit" in commands
    first_batch = listing["by_batch"][0]
    assert f"quarantine --batch {first_batch['batch_id']}" in commands
    page.screenshot(path=str(ARTIFACTS / "dashboard-health-quarantine.png"), full_page=True)
