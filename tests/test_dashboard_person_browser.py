"""Headless Chromium on the person page: the comparison with the rest of the team shows
the command line's figures for the latest common window, and the weight-history download
gives the same file as `cuewatch weights` (the reference for both: the command line run
on the same store)."""

from __future__ import annotations

import json

import pytest
from helpers.cli import run_cli, text
from test_dashboard_browser import ARTIFACTS, CHROMIUM, browser, open_page, served

__all__ = ["browser", "served"]  # fixtures shared with the page-by-page browser tests

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium (/usr/bin/chromium) is not installed; run `make browser`"),
]  # fmt: skip


def _someone_with_a_team(cfg) -> str:
    people = json.loads(text(run_cli(cfg, "people", "--json"))[0])
    rows = people["decision_makers"] if isinstance(people, dict) else people
    return next(r["decision_maker"] for r in rows if r.get("team"))


def test_person_page_compares_with_the_team_as_the_command_line_does(served, browser):
    cfg, url = served
    who = _someone_with_a_team(cfg)
    ref = json.loads(text(run_cli(cfg, "compare", who, "--json"))[0])
    latest = ref["windows"][-1]
    page = open_page(browser, url, f"person?who={who}", "Compared with the team or a colleague")
    page.get_by_text(f"against {ref['second_label']}", exact=False).first.wait_for(timeout=30_000)
    body = page.inner_text("body")
    assert f"window {latest['window_start']} to {latest['window_end']}" in body
    assert f"(n = {latest['n_first']} and {latest['n_second']} decisions)" in body
    page.screenshot(path=str(ARTIFACTS / "dashboard-person-compare.png"), full_page=True)


def test_weight_history_download_is_the_command_lines_csv(served, browser, tmp_path):
    cfg, url = served
    who = _someone_with_a_team(cfg)
    page = open_page(browser, url, f"person?who={who}", "Weights over time, for a report")
    with page.expect_download(timeout=30_000) as got:
        page.get_by_text("Download the weight history (CSV)").click()
    saved = tmp_path / "weights.csv"
    got.value.save_as(saved)
    ref = tmp_path / "ref.csv"
    assert run_cli(cfg, "weights", who, "--out", str(ref)).returncode == 0
    assert saved.read_bytes() == ref.read_bytes()
    assert saved.read_bytes().count(b"\n") > 10
