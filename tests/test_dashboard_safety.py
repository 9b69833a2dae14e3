"""Dashboard safety (issue #13, items 13 and 17): user data is shown as text, never acted
on as Markdown, and acknowledging records the operating-system account and, when
configured, needs a shared secret.

The store is built by the real pipeline from the committed sample with hostile handler
ids and team names (tests/helpers/hostile_store.py).  Every string the pages hand to
Streamlit as Markdown (markdown, captions, alert boxes, expander and metric labels,
metric values) is rendered with markdown-it-py's CommonMark parser, the reference
grammar Streamlit's renderer follows, and the HTML must show the hostile text literally:
no <img>, no <strong> made from data.
"""

from __future__ import annotations

import html
import os
import shutil
from pathlib import Path

import pytest
from helpers.hostile_store import BOLD_MD, IMAGE_MD, build_hostile_store
from helpers.monthly_demo import run_page
from helpers.store_rows import read_store
from markdown_it import MarkdownIt
from streamlit.testing.v1 import AppTest

from monitor.assess.alerts import os_user
from monitor.config import load_config

COMMONMARK = MarkdownIt("commonmark")
TEAM = "__Alder__"
SECRET_ENV = "CUEWATCH_TEST_ACK_SECRET"


@pytest.fixture(scope="module")
def hostile(tmp_path_factory) -> tuple[Path, int]:
    """(config path, planted open alert on the image-id handler) in a built store."""
    root = tmp_path_factory.mktemp("hostile_dashboard")
    return build_hostile_store(
        root / "base", handlers={"H002": IMAGE_MD, "H003": BOLD_MD}, teams={"Alder": TEAM}
    )


def copy_of(hostile, dest: Path, extra_config: str = "") -> tuple[Path, int]:
    """An independent copy of the built store (for tests that write)."""
    cfg, alert_id = hostile
    shutil.copytree(cfg.parent / "run", dest / "run")
    text = cfg.read_text(encoding="utf-8").replace(str(cfg.parent / "run"), str(dest / "run"))
    (dest / "ostwyn.toml").write_text(text + extra_config, encoding="utf-8")
    return dest / "ostwyn.toml", alert_id


def markdown_strings(at: AppTest) -> list[str]:
    """Every string on the page that Streamlit renders as Markdown."""
    out = [e.value for kind in ("markdown", "caption", "success", "error", "warning", "info")
           for e in at.get(kind)]  # fmt: skip
    out += [e.label for e in at.get("expander")]
    out += [m.label for m in at.metric] + [str(m.value) for m in at.metric]
    return out


def rendered(at: AppTest) -> list[str]:
    return [COMMONMARK.render(s) for s in markdown_strings(at)]


def assert_literal(at: AppTest, *texts: str) -> None:
    """No rendered string holds an image or bold text made from data, and each of
    ``texts`` appears literally (as CommonMark renders plain text) somewhere."""
    pages = rendered(at)
    joined = "\n".join(pages)
    assert "<img" not in joined, joined
    assert "<strong>bold</strong>" not in joined and "<strong>Alder</strong>" not in joined
    for t in texts:
        assert html.escape(t, quote=False) in joined, (t, joined)


def test_team_page_lists_hostile_ids_and_teams_as_text(hostile, monkeypatch):
    at = run_page(hostile[0], monkeypatch)
    assert_literal(at, IMAGE_MD, TEAM)
    # The flagged list still names the person in bold (our Markdown, their text).
    assert any(f"<strong>{html.escape(IMAGE_MD, quote=False)}</strong>" in r for r in rendered(at))


def test_person_page_shows_the_team_metric_as_text(hostile, monkeypatch):
    at = run_page(hostile[0], monkeypatch, "page_person.py")
    at.selectbox(key="who").select(IMAGE_MD).run()
    assert not at.exception
    assert_literal(at, TEAM)


def test_alerts_page_shows_hostile_ids_notes_and_names_as_text(hostile, tmp_path, monkeypatch):
    cfg, alert_id = copy_of(hostile, tmp_path)
    at = run_page(cfg, monkeypatch, "page_alerts.py")
    assert_literal(at, IMAGE_MD)  # the expander label of the open alert
    note = f"{IMAGE_MD} and {BOLD_MD} <img src=http://127.0.0.1:9/y.png>"
    at.text_input(key=f"by-{alert_id}").input(BOLD_MD)
    at.text_area(key=f"note-{alert_id}").input(note)
    at.button(key=f"ack-btn-{alert_id}").click().run()
    assert not at.exception
    assert any("acknowledged" in s.value for s in at.success)
    assert_literal(at, BOLD_MD)  # the success message names who acknowledged
    at.run()
    assert_literal(at, note, BOLD_MD)  # "Acknowledged by ...: note" in the expander
    stored = read_store(
        cfg, "SELECT acknowledged_by, note FROM alerts WHERE alert_id = ?", [alert_id]
    )
    assert stored.iloc[0].tolist() == [BOLD_MD, note]  # stored as typed


# --- acknowledging: who, and the shared secret -------------------------------------------


def _history(cfg: Path, alert_id: int):
    return read_store(
        cfg,
        "SELECT changed_by, os_user, via FROM alert_history WHERE alert_id = ? "
        "AND to_state = 'acknowledged'",
        [alert_id],
    )


def _os_account() -> str:
    # Reference: the password database's name for this process's effective uid.
    import pwd

    return pwd.getpwuid(os.geteuid()).pw_name


def _ack_in_form(at: AppTest, alert_id: int, secret: str | None) -> AppTest:
    at.text_input(key=f"by-{alert_id}").input("R. Okafor")
    at.text_area(key=f"note-{alert_id}").input("seen")
    if secret is not None:
        at.text_input(key=f"secret-{alert_id}").input(secret)
    at.button(key=f"ack-btn-{alert_id}").click().run()
    assert not at.exception
    return at


def test_without_a_secret_the_form_records_the_dashboards_os_user(hostile, tmp_path, monkeypatch):
    cfg, alert_id = copy_of(hostile, tmp_path)
    at = run_page(cfg, monkeypatch, "page_alerts.py")
    assert not [t for t in at.text_input if t.key == f"secret-{alert_id}"]
    _ack_in_form(at, alert_id, None)
    assert any("acknowledged" in s.value for s in at.success)
    row = _history(cfg, alert_id).iloc[0].tolist()
    assert row == ["R. Okafor", _os_account(), "dashboard"]


def test_with_a_secret_the_form_refuses_a_wrong_one_and_takes_the_right_one(
    hostile, tmp_path, monkeypatch
):
    extra = f'\n[dashboard]\nack_secret_env = "{SECRET_ENV}"\n'
    cfg, alert_id = copy_of(hostile, tmp_path, extra)
    monkeypatch.setenv(SECRET_ENV, "correct horse")
    at = run_page(cfg, monkeypatch, "page_alerts.py")
    from streamlit.proto.TextInput_pb2 import TextInput

    assert at.text_input(key=f"secret-{alert_id}").proto.type == TextInput.Type.PASSWORD
    _ack_in_form(at, alert_id, "wrong")
    assert any("secret is wrong" in e.value for e in at.error)
    assert _history(cfg, alert_id).empty
    assert read_store(cfg, "SELECT state FROM alerts WHERE alert_id = ?", [alert_id]).iloc[
        0, 0
    ] == ("open")
    _ack_in_form(at, alert_id, "")
    assert _history(cfg, alert_id).empty  # an empty secret is not a secret
    _ack_in_form(at, alert_id, "correct horse")
    assert any("acknowledged" in s.value for s in at.success)
    row = _history(cfg, alert_id).iloc[0].tolist()
    assert row == ["R. Okafor", _os_account(), "dashboard, shared secret checked"]


def test_a_configured_secret_that_is_not_set_switches_acknowledging_off(
    hostile, tmp_path, monkeypatch
):
    extra = f'\n[dashboard]\nack_secret_env = "{SECRET_ENV}"\n'
    cfg, alert_id = copy_of(hostile, tmp_path, extra)
    monkeypatch.delenv(SECRET_ENV, raising=False)
    at = run_page(cfg, monkeypatch, "page_alerts.py")
    _ack_in_form(at, alert_id, "anything")
    assert any("switched off" in e.value for e in at.error)
    assert _history(cfg, alert_id).empty


def test_cli_acks_record_the_os_user_too(hostile, tmp_path):
    from helpers.cli import run_cli, text

    cfg, alert_id = copy_of(hostile, tmp_path)
    proc = run_cli(cfg, "ack", str(alert_id), "--by", "auditor", "--note", "from the shell")
    assert proc.returncode == 0, text(proc)
    assert _history(cfg, alert_id).iloc[0].tolist() == ["auditor", _os_account(), "cli"]
    assert os_user() == _os_account()


def test_bad_ack_secret_env_is_a_configuration_error(tmp_path):
    from helpers.configs import make_config

    from monitor.config import ConfigError

    cfg = make_config(tmp_path, dashboard={"ack_secret_env": "not a name"})
    with pytest.raises(ConfigError, match="dashboard.ack_secret_env"):
        load_config(cfg)


# --- in a real browser: nothing named in the data is fetched -------------------------------

CHROMIUM = Path("/usr/bin/chromium")


@pytest.mark.browser
@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's chromium is not installed; run `make browser`")  # fmt: skip
def test_the_browser_requests_nothing_named_in_the_data(hostile, tmp_path):
    """`cuewatch dashboard` on the hostile store, pages opened in headless Chromium: every
    request the pages make is recorded (playwright's request event fires before any
    connection), and none goes to the address in the hostile id or note."""
    import socket
    import subprocess
    import sys
    import time
    import urllib.request

    from playwright.sync_api import sync_playwright

    from monitor.assess.alerts import acknowledge

    cfg, alert_id = copy_of(hostile, tmp_path)
    note = f"{IMAGE_MD} {BOLD_MD} <img src=http://127.0.0.1:9/y.png>"
    acknowledge(load_config(cfg), alert_id, BOLD_MD, note)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if k != "CUEWATCH_CONFIG"}
    log = open(tmp_path / "dashboard.log", "wb")
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor", "--config", str(cfg), "dashboard", "--port", str(port)],
        env=env, stdout=log, stderr=subprocess.STDOUT,
    )  # fmt: skip
    url = f"http://127.0.0.1:{port}"
    requested: list[str] = []
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                with urllib.request.urlopen(f"{url}/_stcore/health", timeout=2) as r:
                    if r.read().strip() == b"ok":
                        break
            except OSError:
                pass
            assert proc.poll() is None and time.monotonic() < deadline, "dashboard did not start"
            time.sleep(0.3)
        with sync_playwright() as p:
            browser = p.chromium.launch(
                executable_path=str(CHROMIUM), headless=True,
                args=["--no-sandbox", "--disable-gpu", "--no-first-run"],
            )  # fmt: skip
            page = browser.new_page()
            page.on("request", lambda req: requested.append(req.url))
            texts = {}
            for path, ready in (("", "Flagged now"), ("alerts", "Acknowledged")):
                page.goto(f"{url}/{path}", wait_until="domcontentloaded")
                page.get_by_text(ready, exact=False).first.wait_for(timeout=45_000)
                page.wait_for_selector(
                    '[data-testid="stStatusWidget"]', state="detached", timeout=45_000
                )
                if path == "alerts":  # show the acknowledged alert with its note
                    page.get_by_role("tab", name="Acknowledged").click()
                    page.locator('[data-testid="stExpander"] summary').last.click()
                    page.get_by_text("Acknowledged by", exact=False).first.wait_for(timeout=15_000)
                page.wait_for_timeout(1000)
                texts[path] = page.inner_text("body")
            browser.close()
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
        log.close()
    assert any(r.startswith(url) for r in requested)  # the recorder saw the page's own
    assert not [r for r in requested if "127.0.0.1:9/" in r], requested
    assert IMAGE_MD in texts[""] and TEAM in texts[""]  # shown as the literal text
    assert note in texts["alerts"] and BOLD_MD in texts["alerts"]
