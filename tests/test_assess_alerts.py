"""The alert lifecycle end to end: `assess` on the demo store, delivery to a real SMTP
server and a real HTTP receiver on 127.0.0.1, the outbox's retry after a failure,
idempotence, hysteresis through the stored lifecycle, and `ack` / `alerts --json`
through the command line.

The demo store (seed 7, 365 days, 12 handlers) is built once per session; tests that
change it work on a copy.  Its planted changes come from the scenario's own truth
record (``synthetic_logs.ostwyn.load_truth``), not from cuewatch.
"""

from __future__ import annotations

import base64
import email
import email.policy
import hashlib
import hmac
import json
import shutil
from datetime import UTC, datetime, timedelta
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
from aiosmtpd.controller import Controller
from helpers.cli import run_cli, text
from helpers.configs import make_config
from helpers.demo_store import build_demo_store
from helpers.local_servers import SmtpInbox, WebhookReceiver, free_port

from monitor.assess.alerts import _reconcile, acknowledge, assess, list_alerts
from monitor.assess.stored import FINDING_COLUMNS
from monitor.config import load_config
from monitor.store.connection import Store
from synthetic_logs.ostwyn import load_truth

ALERT_TABLES = ("alerts", "alert_history", "alert_deliveries")
NO_SLEEP = {"sleep": lambda _s: None}


@pytest.fixture(scope="session")
def demo_config(tmp_path_factory) -> Path:
    # A fixed folder under the session's base: test_findings builds the same one, and
    # build_demo_store's marker makes the second call free.
    return build_demo_store(tmp_path_factory.getbasetemp() / "demo_seed7")


def _copy(demo_config: Path, tmp_path: Path) -> Path:
    target = tmp_path / "demo"
    shutil.copytree(demo_config.parent, target, ignore=shutil.ignore_patterns("scenario", "*.lock"))
    return target / demo_config.name


def _append(config_path: Path, toml: str) -> None:
    with open(config_path, "a", encoding="utf-8") as fh:
        fh.write("\n" + toml.strip() + "\n")


def _forget_assessment(config_path: Path) -> None:
    """Return the copy to 'fitted but never assessed', so the next `assess` opens the
    current episodes afresh and notifies them."""
    con = duckdb.connect(str(load_config(config_path).store.path))
    try:
        for table in (*ALERT_TABLES, "finding_versions", "proxy_part_versions"):
            con.execute(f"DELETE FROM {table}")
        con.execute("DELETE FROM store_facts WHERE key = 'assessed_fits'")
    finally:
        con.close()


def _tables(config_path: Path, names=ALERT_TABLES) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(load_config(config_path).store.path), read_only=True)
    try:
        return {t: con.execute(f"SELECT * FROM {t} ORDER BY ALL").df() for t in names}
    finally:
        con.close()


def _assert_same(a: dict[str, pd.DataFrame], b: dict[str, pd.DataFrame]) -> None:
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], obj=name)


def _webhook_section(url: str, secret_env: str = "CW_TEST_HOOK_SECRET") -> str:
    return (
        f'[alerts.webhook]\nurl = "{url}"\nsecret_env = "{secret_env}"\n'
        "timeout_s = 5\nretries = 1\nbackoff_s = 0\n"
    )


# --- delivery --------------------------------------------------------------------------


def test_assess_e_mails_each_opened_alert_to_a_local_smtp_server(demo_config, tmp_path):
    cfg_path = _copy(demo_config, tmp_path)
    _forget_assessment(cfg_path)
    inbox = SmtpInbox()
    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port())
    ctl.start()
    try:
        _append(
            cfg_path,
            f'[alerts.email]\nhost = "127.0.0.1"\nport = {ctl.port}\n'
            'sender = "cuewatch@example.org"\nto = ["oversight@example.org"]\ntimeout_s = 5\n',
        )
        config = load_config(cfg_path)
        summary = assess(config, **NO_SLEEP)
    finally:
        ctl.stop()
    open_docs = list_alerts(config, "open")
    # Episodes already over when first seen are recorded, not notified (alerts.py).
    assert sorted(summary.opened) == [d["id"] for d in open_docs]
    assert len(inbox.messages) == len(open_docs) and summary.delivery_failures == []
    mails = {
        int(m["X-Cuewatch-Alert"]): m
        for m in (
            email.message_from_bytes(b, policy=email.policy.default) for _, _, b in inbox.messages
        )
    }
    doc = next(d for d in open_docs if d["kind"] == "forbidden_cue")
    truth = load_truth(demo_config.parent / "scenario")
    planted = next(c for c in truth.changes if c.kind == "forbidden_cue_direct")
    assert (doc["decision_maker"], doc["cue"]) == (planted.handler_ids[0], planted.forbidden_cue)
    body = mails[doc["id"]].get_content()
    ev = doc["evidence"]
    assert (
        f"Decision-maker {doc['decision_maker']}'s judgments give material weight to "
        f"{doc['cue']} (forbidden by policy) in the window "
        f"{ev['window']['start']}..{ev['window']['end']}."
    ) in body
    # n counted independently from the raw decisions of that handler and window.
    con = duckdb.connect(str(config.store.path), read_only=True)
    n = con.execute(
        "SELECT count(*) FROM decisions WHERE decision_maker = ? AND decided_day BETWEEN ? AND ?",
        [doc["decision_maker"], ev["window"]["start"], ev["window"]["end"]],
    ).fetchone()[0]
    con.close()
    assert ev["n"] == n and f"n = {n} decisions" in body
    lo, hi = ev["interval"]
    assert 0 < lo <= ev["std_weight"] <= hi  # a flagged finding's interval excludes zero
    assert f"{ev['std_weight']:.3f} (interval {lo:.3f} to {hi:.3f})" in body
    assert "not proof of intent" in body
    assert f"--config {cfg_path.resolve()} ack {doc['id']} --by NAME --note TEXT" in body


def test_assess_posts_signed_webhooks_that_verify_independently(demo_config, tmp_path, monkeypatch):
    secret = "whsec_" + base64.b64encode(b"a test secret of 24 bytes").decode()
    monkeypatch.setenv("CW_TEST_HOOK_SECRET", secret)
    cfg_path = _copy(demo_config, tmp_path)
    _forget_assessment(cfg_path)
    with WebhookReceiver() as rx:
        _append(cfg_path, _webhook_section(rx.url))
        config = load_config(cfg_path)
        summary = assess(config, **NO_SLEEP)
    open_docs = {d["id"]: d for d in list_alerts(config, "open")}
    assert len(rx.requests) == len(open_docs) == len(summary.opened) > 0
    kinds = {d["kind"] for d in open_docs.values()}
    assert {"forbidden_cue", "proxy_use"} <= kinds
    for headers, body in rx.requests:
        h = {k.lower(): v for k, v in headers.items()}
        # Standard Webhooks (spec/standard-webhooks.md, "Signature scheme"): HMAC-SHA256
        # under the base64 key after "whsec_" over "{id}.{timestamp}.{body}", sent as
        # "v1,<base64>"; computed here with hmac and base64 only.
        key = base64.b64decode(secret.removeprefix("whsec_"))
        signed = f"{h['webhook-id']}.{h['webhook-timestamp']}.".encode() + body
        expected = "v1," + base64.b64encode(hmac.new(key, signed, hashlib.sha256).digest()).decode()
        assert hmac.compare_digest(h["webhook-signature"], expected)
        got = json.loads(body)
        assert got.pop("delivery_id") == h["webhook-id"]
        assert got == {**open_docs[got["id"]], "event": "opened"}
    ids = {v for h, _ in rx.requests for k, v in h.items() if k.lower() == "webhook-id"}
    assert len(ids) == len(rx.requests)  # one id per alert event


def test_a_failing_receiver_gets_each_alert_once_after_it_recovers(
    demo_config, tmp_path, monkeypatch
):
    monkeypatch.setenv("CW_TEST_HOOK_SECRET", "s")
    cfg_path = _copy(demo_config, tmp_path)
    _forget_assessment(cfg_path)
    db = None
    with WebhookReceiver(status=503) as rx:
        _append(cfg_path, _webhook_section(rx.url))
        config = load_config(cfg_path)
        db = str(config.store.path)
        first = assess(config, **NO_SLEEP)
        n_open = len(first.opened)
        assert n_open > 0 and len(first.delivery_failures) == n_open
        assert len(rx.requests) == 2 * n_open  # retries = 1: two attempts per alert
        con = duckdb.connect(db, read_only=True)
        rows = con.execute(
            "SELECT sink, status, attempts, last_error FROM alert_deliveries ORDER BY sink"
        ).fetchall()
        con.close()
        hooks = [r for r in rows if r[0] == "webhook"]
        assert len(hooks) == n_open
        assert all(r[1] == "failed" and r[2] == 1 and "HTTP 503" in r[3] for r in hooks)
        assert all(r[1] == "delivered" for r in rows if r[0] == "file")

        rx.status = 200
        second = assess(config, **NO_SLEEP)
        assert not second.evaluated and second.delivered == n_open
        third = assess(config, **NO_SLEEP)
        assert third.delivered == 0 and third.delivery_failures == []
    ids = [d["id"] for d in rx.delivered()]
    assert sorted(ids) == sorted(first.opened)  # each alert exactly once
    con = duckdb.connect(db, read_only=True)
    hooks = con.execute(
        "SELECT status, attempts, last_error FROM alert_deliveries WHERE sink = 'webhook'"
    ).fetchall()
    con.close()
    assert hooks == [("delivered", 2, None)] * n_open


def test_assess_again_or_forced_changes_nothing_and_sends_nothing(
    demo_config, tmp_path, monkeypatch
):
    monkeypatch.setenv("CW_TEST_HOOK_SECRET", "s")
    cfg_path = _copy(demo_config, tmp_path)
    _forget_assessment(cfg_path)
    with WebhookReceiver() as rx:
        _append(cfg_path, _webhook_section(rx.url))
        config = load_config(cfg_path)
        assess(config, **NO_SLEEP)
        hits = len(rx.requests)
        jsonl = Path(config.alerts.file).read_bytes()
        names = (*ALERT_TABLES, "policy_findings", "policy_proxy_parts")
        before = _tables(cfg_path, names)

        again = assess(config, **NO_SLEEP)
        assert not again.evaluated and again.delivered == 0
        _assert_same(before, _tables(cfg_path, names))

        forced = assess(config, force=True, **NO_SLEEP)
        assert forced.evaluated and forced.opened == [] and forced.resolved == []
        after = _tables(cfg_path, names)
        _assert_same({t: before[t] for t in ALERT_TABLES}, {t: after[t] for t in ALERT_TABLES})
        # A forced run rewrites the findings with a new evaluation time only.
        for t in ("policy_findings", "policy_proxy_parts"):
            pd.testing.assert_frame_equal(
                before[t].drop(columns="evaluated_at"), after[t].drop(columns="evaluated_at")
            )
        assert len(rx.requests) == hits and Path(config.alerts.file).read_bytes() == jsonl


# --- the planted scenario ----------------------------------------------------------------


def test_planted_forbidden_cue_handlers_open_alerts_and_stable_ones_do_not(demo_config):
    config = load_config(demo_config)
    truth = load_truth(demo_config.parent / "scenario")
    docs = [d for d in list_alerts(config) if d["kind"] in ("forbidden_cue", "proxy_use")]
    planted = {
        ("forbidden_cue" if c.kind == "forbidden_cue_direct" else "proxy_use", c.handler_ids[0],
         c.forbidden_cue): c
        for c in truth.changes if c.forbidden_cue
    }  # fmt: skip
    assert {(d["kind"], d["decision_maker"], d["cue"]) for d in docs} == set(planted)
    # A window lying wholly after the change carries the full planted weight, so the
    # alert must open by the end of that window plus the windows needed to confirm it.
    pol, win = config.policy, config.windows
    latest = timedelta(days=win.length_days + win.step_days * (pol.consecutive_windows - 1))
    for d in docs:
        change = planted[(d["kind"], d["decision_maker"], d["cue"])]
        opened = datetime.fromisoformat(d["opened_window_end"]).date()
        assert change.start < opened <= change.start + latest, (d, change.start)
        assert d["state"] == "open"


# --- hysteresis through the stored lifecycle ---------------------------------------------


def _findings(flags: list[bool | None]) -> pd.DataFrame:
    """Direct forbidden-cue findings of one series; None = window not assessable."""
    ends = pd.date_range("2025-01-05", periods=len(flags), freq="7D")
    f = pd.DataFrame({c: [np.nan] * len(flags) for c in FINDING_COLUMNS})
    f = f.astype(object)
    f["check_kind"], f["scope"], f["decision_maker"], f["team"] = (
        "forbidden_direct", "decision_maker", "h0", "t1")  # fmt: skip
    f["cue"], f["level"] = "region", "south"
    f["window_end"] = ends.date
    f["window_start"] = (ends - pd.Timedelta(days=89)).date
    f["n"] = 200
    f["std_weight"] = [0.3 if s else 0.01 for s in flags]
    f["ci_low"], f["ci_high"], f["q_value"] = 0.1, 0.5, 0.01
    f["flagged"] = [bool(s) for s in flags]
    f["assessable"] = [s is not None for s in flags]
    return f


def test_one_noisy_window_neither_opens_nor_closes_and_every_change_is_history(tmp_path):
    cfg_path = make_config(tmp_path, policy={"forbidden": ["region"], "consecutive_windows": 2})
    config = load_config(cfg_path)
    store = Store(config)
    store.init()
    F, C = True, False
    # Expected by the rule in DESIGN.md (two windows to open, two to resolve; a window
    # that is not assessable is skipped): w1 alone opens nothing; w5-w6 open; w7 alone
    # does not close; w11-w12 close; w13-w14 open a second, new alert.
    seq = [C, F, C, C, None, F, F, C, F, None, F, C, C, F, F]
    expected_states = {
        5: [], 6: ["open"], 11: ["acknowledged"], 12: ["resolved"], 13: ["resolved"],
        14: ["resolved", "open"],
    }  # fmt: skip
    # Assessment clocks straddle the real-time acknowledgement after run 8, so the
    # history's time order is the order of events.
    t0 = datetime.now(UTC) - timedelta(days=8.5)
    seen: list[list[str]] = []
    for i in range(1, len(seq) + 1):  # one assessment per new window, as nightly runs
        with store.writer() as con:
            _reconcile(con, config, _findings(seq[:i]), t0 + timedelta(days=i))
            states = [
                r[0] for r in con.execute("SELECT state FROM alerts ORDER BY alert_id").fetchall()
            ]
        seen.append(states)
        if i - 1 in expected_states:
            assert states == expected_states[i - 1], (i, states)
        if i - 1 == 7:  # acknowledged while open; resolution then starts from there
            acknowledge(config, 1, "auditor", "looking into it")
    assert seen[:6] == [[]] * 6  # the lone flagged w1 opened nothing
    assert seen[6:8] == [["open"]] * 2 and seen[8:12] == [["acknowledged"]] * 4
    # ... and the lone clear w7 closed nothing.
    con = duckdb.connect(str(config.store.path), read_only=True)
    hist = con.execute(
        "SELECT alert_id, from_state, to_state, changed_by FROM alert_history "
        "ORDER BY changed_at, alert_id"
    ).fetchall()
    alerts = con.execute(
        "SELECT alert_id, opened_window_end, resolved_window_end FROM alerts ORDER BY 1"
    ).fetchall()
    con.close()
    assert [h[:3] for h in hist] == [
        (1, None, "open"), (1, "open", "acknowledged"), (1, "acknowledged", "resolved"),
        (2, None, "open"),
    ]  # fmt: skip
    assert hist[1][3] == "auditor"
    ends = _findings(seq)["window_end"].tolist()
    assert alerts == [(1, ends[6], ends[12]), (2, ends[14], None)]


# --- ack and alerts --json through the command line ---------------------------------------

CONTRACT = {"id", "kind", "decision_maker", "cue", "state", "opened_at", "resolved_at",
            "acknowledged_by", "note", "evidence"}  # fmt: skip
EVIDENCE = {"window", "std_weight", "interval", "q_value", "n"}


def test_ack_and_alerts_json_through_the_command_line(demo_config, tmp_path):
    cfg_path = _copy(demo_config, tmp_path)
    proc = run_cli(cfg_path, "alerts", "--json")
    docs = json.loads(text(proc)[0])
    assert proc.returncode == 0 and docs
    for d in docs:
        assert CONTRACT <= set(d) and EVIDENCE <= set(d["evidence"])
        assert set(d["evidence"]["window"]) == {"start", "end"}
        assert len(d["evidence"]["interval"]) == 2
    target = next(d for d in docs if d["kind"] == "forbidden_cue")
    resolved = next(d for d in docs if d["state"] == "resolved")

    before = datetime.now(UTC)
    proc = run_cli(cfg_path, "ack", str(target["id"]), "--by", "A. Auditor", "--note", "reviewed")
    after = datetime.now(UTC)
    assert proc.returncode == 0, text(proc)
    acked = list_alerts(load_config(cfg_path), "acknowledged")
    assert [d["id"] for d in acked] == [target["id"]]
    a = acked[0]
    assert (a["state"], a["acknowledged_by"], a["note"]) == (
        "acknowledged",
        "A. Auditor",
        "reviewed",
    )
    assert before <= datetime.fromisoformat(a["acknowledged_at"]) <= after
    con = duckdb.connect(str(load_config(cfg_path).store.path), read_only=True)
    hist = con.execute(
        "SELECT from_state, to_state, changed_by, note FROM alert_history WHERE alert_id = ? "
        "ORDER BY changed_at",
        [target["id"]],
    ).fetchall()
    con.close()
    assert hist[-1] == ("open", "acknowledged", "A. Auditor", "reviewed")

    for alert_id in (999_999, resolved["id"], target["id"]):  # missing, resolved, already acked
        proc = run_cli(cfg_path, "ack", str(alert_id), "--by", "B", "--note", "x")
        out, err = text(proc)
        assert proc.returncode == 2, (alert_id, out, err)
        assert len(err.strip().splitlines()) == 1 and str(alert_id) in err
        assert "Traceback" not in err
