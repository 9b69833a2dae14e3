"""Alert sinks against real servers on 127.0.0.1: an aiosmtpd SMTP server and an
http.server webhook receiver.  Signatures are re-computed here with ``hmac``."""

from __future__ import annotations

import email
import email.policy
import hashlib
import hmac
import json
import shutil
import ssl
import subprocess

import pytest
from aiosmtpd.controller import Controller
from helpers.local_servers import SmtpInbox, WebhookReceiver, free_port

from monitor.assess.sinks import (
    SinkError,
    append_jsonl,
    configured_sinks,
    deliver,
    delivery_id,
    post_webhook,
    render_email,
    send_email,
    signature_header,
)
from monitor.assess.wording import describe_finding
from monitor.cautions import CAUTION
from monitor.config import AlertsConfig, EmailConfig, WebhookConfig

ALERT = {
    "id": 17,
    "kind": "forbidden_cue",
    "event": "opened",
    "decision_maker": "H07",
    "cue": "claimant_gender",
    "state": "open",
    "opened_at": "2026-06-30T02:00:00+00:00",
    "resolved_at": None,
    "acknowledged_by": None,
    "note": None,
    "evidence": {
        "window": {"start": "2026-04-01", "end": "2026-06-29"},
        "std_weight": 0.183,
        "interval": [0.091, 0.275],
        "q_value": 0.004,
        "n": 412,
        "direct": 2.41,
    },
}
ACK = "cuewatch --config /etc/cuewatch.toml ack 17 --by NAME --note TEXT"
SENTENCE = (
    "Decision-maker H07's judgments give material weight to claimant_gender "
    "(forbidden by policy) in the window 2026-04-01..2026-06-29."
)


@pytest.fixture(autouse=True)
def _no_proxy(monkeypatch):
    # urllib honours proxy variables; the receivers here are local.
    for name in ("http_proxy", "HTTP_PROXY", "https_proxy", "HTTPS_PROXY", "all_proxy"):
        monkeypatch.delenv(name, raising=False)


# --- wording -------------------------------------------------------------------------


def test_finding_sentence_and_email_body():
    msg = render_email(ALERT, ack_hint=ACK)
    body = msg.get_content()
    assert describe_finding(ALERT) == SENTENCE
    assert body.startswith(SENTENCE)
    for figure in ("n = 412", "0.183", "interval 0.091 to 0.275", "0.004", "direct: 2.410"):
        assert figure in body, figure
    assert CAUTION in body and "not proof of intent" in body
    assert ACK in body
    assert "H07" in msg["Subject"] and "claimant_gender" in msg["Subject"]
    assert len(msg["Subject"]) < 90


def test_resolved_event_says_resolved():
    resolved = {**ALERT, "event": "resolved", "state": "resolved", "resolved_at": "2026-08-01"}
    assert "resolved" in render_email(resolved, ack_hint=ACK)["Subject"]
    assert describe_finding(resolved).startswith("Alert 17 is resolved")
    assert "H07" in describe_finding(resolved)


@pytest.mark.parametrize(
    ("kind", "cue", "phrase"),
    [
        ("proxy_use", "claimant_gender", "indirectly"),
        ("drift", "claim_amount", "weight on claim_amount has changed"),
        ("consistency", None, "less consistent"),
        ("achievement", None, "predict the outcome less well"),
    ],
)
def test_every_kind_has_a_sentence(kind, cue, phrase):
    alert = {**ALERT, "kind": kind, "cue": cue}
    sentence = describe_finding(alert)
    assert phrase in sentence and "H07" in sentence and "2026-04-01..2026-06-29" in sentence
    assert sentence.replace("..", "~").count(".") == 1 and sentence.endswith(".")
    assert kind.split("_")[0] in render_email(alert, ack_hint=ACK)["Subject"].lower()


def test_scope_and_kind_specific_figures():
    team = {**ALERT, "scope": "team", "decision_maker": "Motor"}
    assert describe_finding(team).startswith("Team Motor's judgments")
    pooled = describe_finding({**ALERT, "scope": "all", "decision_maker": "all"})
    assert pooled.startswith("All decision-makers' (pooled) judgments")
    ev = {**ALERT["evidence"], "std_weight": 0.41, "figure": "R_s", "value": 0.41, "level": None}
    body = render_email({**ALERT, "kind": "consistency", "cue": None, "evidence": ev},
                        ack_hint=ACK).get_content()  # fmt: skip
    assert "R_s: 0.410" in body and "standardised weight" not in body and "level" not in body


def test_configured_sinks(tmp_path):
    assert configured_sinks(AlertsConfig()) == []
    cfg = AlertsConfig(file=tmp_path / "a.jsonl", webhook=WebhookConfig(url="http://127.0.0.1:9/x"))
    assert configured_sinks(cfg) == ["file", "webhook"]
    with pytest.raises(SinkError, match="'email' is not configured"):
        deliver(cfg, ALERT, "email")
    with pytest.raises(ValueError):
        deliver(cfg, ALERT, "pager")


# --- file sink -----------------------------------------------------------------------


def test_append_jsonl_appends_and_survives_a_torn_line(tmp_path):
    path = tmp_path / "sub" / "alerts.jsonl"
    deliver(AlertsConfig(file=path), ALERT, "file")
    with path.open("ab") as fh:  # a writer that died mid-record
        fh.write(b'{"id": 3, "kin')
    append_jsonl(path, {**ALERT, "id": 18})
    lines = path.read_text().splitlines()
    assert json.loads(lines[0]) == ALERT
    assert lines[1] == '{"id": 3, "kin'
    assert json.loads(lines[2])["id"] == 18


def test_append_jsonl_rejects_nan(tmp_path):
    with pytest.raises(SinkError, match="not JSON"):
        append_jsonl(tmp_path / "a.jsonl", {"x": float("nan")})
    assert not (tmp_path / "a.jsonl").exists()


# --- e-mail sink ---------------------------------------------------------------------


@pytest.fixture(scope="module")
def tls_files(tmp_path_factory):
    """A throw-away self-signed certificate for 127.0.0.1, made with the openssl CLI."""
    if shutil.which("openssl") is None:
        pytest.skip("openssl CLI not available to make a test certificate (`make openssl`)")
    d = tmp_path_factory.mktemp("tls")
    cert, key = d / "cert.pem", d / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
         "-nodes", "-keyout", str(key), "-out", str(cert), "-days", "2", "-subj", "/CN=127.0.0.1",
         "-addext", "subjectAltName=IP:127.0.0.1"],
        check=True, capture_output=True,
    )  # fmt: skip
    return cert, key


def _smtp(inbox: SmtpInbox, **params) -> Controller:
    ctl = Controller(inbox, hostname="127.0.0.1", port=free_port(), **params)
    ctl.start()
    return ctl


def _email_cfg(port: int, **kw) -> EmailConfig:
    base = {"host": "127.0.0.1", "port": port, "sender": "cuewatch@example.org",
            "to": ["oversight@example.org", "audit@example.org"], "timeout_s": 5}  # fmt: skip
    return EmailConfig(**{**base, **kw})


def _received(inbox: SmtpInbox) -> email.message.EmailMessage:
    assert len(inbox.messages) == 1
    mail_from, rcpts, content = inbox.messages[0]
    assert mail_from == "cuewatch@example.org"
    assert rcpts == ["oversight@example.org", "audit@example.org"]
    return email.message_from_bytes(content, policy=email.policy.default)


def test_email_plain_smtp_delivers_the_whole_message():
    inbox = SmtpInbox()
    ctl = _smtp(inbox)
    try:
        alerts = AlertsConfig(email=_email_cfg(ctl.port))
        deliver(alerts, ALERT, "email", ack_hint=ACK)
    finally:
        ctl.stop()
    got = _received(inbox)
    assert got["Subject"] == render_email(ALERT, ack_hint=ACK)["Subject"]
    assert got["To"] == "oversight@example.org, audit@example.org"
    body = got.get_content()
    assert SENTENCE in body and "n = 412" in body and "0.091 to 0.275" in body
    assert "not proof of intent" in body and ACK in body


def test_email_starttls_with_auth_from_env(tls_files, monkeypatch):
    cert, key = tls_files
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    inbox = SmtpInbox()
    ctl = _smtp(inbox, tls_context=server_ctx, require_starttls=True,
                authenticator=inbox.authenticate, auth_require_tls=True)  # fmt: skip
    monkeypatch.setenv("CW_SMTP_USER", "alerts")
    monkeypatch.setenv("CW_SMTP_PASS", "s3cret")
    client_ctx = ssl.create_default_context(cafile=str(cert))
    cfg = _email_cfg(ctl.port, security="starttls", username_env="CW_SMTP_USER",
                     password_env="CW_SMTP_PASS")  # fmt: skip
    try:
        send_email(cfg, render_email(ALERT, ack_hint=ACK), ssl_context=client_ctx)
        monkeypatch.setenv("CW_SMTP_PASS", "wrong")
        with pytest.raises(SinkError, match="refused the credentials"):
            send_email(cfg, render_email(ALERT, ack_hint=ACK), ssl_context=client_ctx)
        # Without the test CA the self-signed certificate must be refused.
        monkeypatch.setenv("CW_SMTP_PASS", "s3cret")
        with pytest.raises(SinkError, match="cannot reach|CERTIFICATE"):
            send_email(cfg, render_email(ALERT, ack_hint=ACK))
    finally:
        ctl.stop()
    assert inbox.logins[0] == (b"alerts", b"s3cret")
    assert SENTENCE in _received(inbox).get_content()


def test_email_implicit_ssl(tls_files):
    cert, key = tls_files
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    inbox = SmtpInbox()
    ctl = _smtp(inbox, ssl_context=server_ctx)
    try:
        cfg = _email_cfg(ctl.port, security="ssl")
        send_email(cfg, render_email(ALERT, ack_hint=ACK),
                   ssl_context=ssl.create_default_context(cafile=str(cert)))  # fmt: skip
    finally:
        ctl.stop()
    assert SENTENCE in _received(inbox).get_content()


def test_email_missing_credential_variable_is_named(monkeypatch):
    monkeypatch.setenv("CW_SMTP_USER", "alerts")
    monkeypatch.delenv("CW_SMTP_PASS_MISSING", raising=False)
    # Port 9 (discard) is never contacted: the check happens before connecting.
    cfg = _email_cfg(9, username_env="CW_SMTP_USER", password_env="CW_SMTP_PASS_MISSING")
    with pytest.raises(SinkError, match="CW_SMTP_PASS_MISSING"):
        send_email(cfg, render_email(ALERT, ack_hint=ACK))


def test_email_unreachable_server_is_a_sink_error():
    cfg = _email_cfg(free_port(), timeout_s=2)
    with pytest.raises(SinkError, match="cannot reach"):
        send_email(cfg, render_email(ALERT, ack_hint=ACK))


# --- webhook sink --------------------------------------------------------------------


def test_webhook_body_and_signature_verify_independently(monkeypatch):
    monkeypatch.setenv("CW_HOOK_SECRET", "hook-secret")
    with WebhookReceiver(script=[(200, 0)]) as rx:
        cfg = AlertsConfig(webhook=WebhookConfig(url=rx.url, secret_env="CW_HOOK_SECRET"))
        deliver(cfg, ALERT, "webhook")
    (headers, body), = rx.requests  # fmt: skip
    assert json.loads(body) == ALERT
    # Receiver-side check, computed with the standard library only.
    expected = "sha256=" + hmac.new(b"hook-secret", body, hashlib.sha256).hexdigest()
    assert hmac.compare_digest(headers["X-Cuewatch-Signature"], expected)
    assert headers["X-Cuewatch-Delivery"] == delivery_id(ALERT)
    assert headers["Content-Type"].startswith("application/json")


def test_signature_matches_rfc4231_vector():
    # RFC 4231, test case 2 (key "Jefe"), HMAC-SHA-256.
    sig = signature_header("Jefe", b"what do ya want for nothing?")
    assert sig == "sha256=5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"


def test_delivery_id_is_stable_per_event():
    assert delivery_id(ALERT) == delivery_id(json.loads(json.dumps(ALERT)))
    assert delivery_id(ALERT) == delivery_id({**ALERT, "note": "acknowledged later"})
    assert delivery_id(ALERT) != delivery_id({**ALERT, "event": "resolved"})


def test_webhook_retries_503_then_succeeds_once():
    sleeps: list[float] = []
    with WebhookReceiver(script=[(503, 0), (503, 0), (200, 0)]) as rx:
        cfg = WebhookConfig(url=rx.url, retries=3, backoff_s=0.5)
        post_webhook(cfg, ALERT, sleep=sleeps.append)
    assert len(rx.requests) == 3
    assert sleeps == [0.5, 1.0]  # backoff_s * 2**attempt
    ids = {h["X-Cuewatch-Delivery"] for h, _ in rx.requests}
    assert len(ids) == 1  # the same delivery id on every attempt: one logical delivery


def test_webhook_400_is_not_retried():
    sleeps: list[float] = []
    with WebhookReceiver(script=[(400, 0), (200, 0)]) as rx:
        cfg = WebhookConfig(url=rx.url, retries=3, backoff_s=0.1)
        with pytest.raises(SinkError, match="HTTP 400.*not retried"):
            post_webhook(cfg, ALERT, sleep=sleeps.append)
    assert len(rx.requests) == 1 and sleeps == []


def test_webhook_429_is_retried_and_exhaustion_is_reported():
    sleeps: list[float] = []
    with WebhookReceiver(script=[(429, 0), (500, 0), (502, 0)]) as rx:
        cfg = WebhookConfig(url=rx.url, retries=2, backoff_s=0.1)
        with pytest.raises(SinkError, match=r"HTTP 502\b.* after 3 attempt"):
            post_webhook(cfg, ALERT, sleep=sleeps.append)
    assert len(rx.requests) == 3 and sleeps == [0.1, 0.2]


def test_webhook_timeout_is_retried():
    sleeps: list[float] = []
    with WebhookReceiver(script=[(200, 1.0), (200, 0)]) as rx:
        cfg = WebhookConfig(url=rx.url, retries=1, backoff_s=0.0, timeout_s=0.3)
        post_webhook(cfg, ALERT, sleep=sleeps.append)
    assert len(rx.requests) == 2 and sleeps == [0.0]


def test_webhook_missing_secret_variable_is_named(monkeypatch):
    monkeypatch.delenv("CW_HOOK_SECRET_MISSING", raising=False)
    cfg = WebhookConfig(url="http://127.0.0.1:9/x", secret_env="CW_HOOK_SECRET_MISSING")
    with pytest.raises(SinkError, match="CW_HOOK_SECRET_MISSING"):
        post_webhook(cfg, ALERT, sleep=lambda s: None)


def test_webhook_redirect_is_not_followed():
    with WebhookReceiver(script=[(307, 0)]) as rx:
        with pytest.raises(SinkError, match="HTTP 307"):
            post_webhook(WebhookConfig(url=rx.url, retries=2), ALERT, sleep=lambda s: None)
    assert len(rx.requests) == 1
