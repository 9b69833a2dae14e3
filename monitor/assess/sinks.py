"""Alert delivery: the file, e-mail and webhook sinks.

An *alert notification* is a plain JSON-serialisable dict with the fields of
``alerts --json`` (DESIGN.md, "Contracts") plus ``event`` ("opened" | "resolved").
``deliver`` sends one notification to one sink and either returns (delivered) or
raises ``SinkError`` (not delivered).  It keeps no state of its own: the outbox that
calls it once per (alert event, sink) records the outcome and decides when to try
again, so a failed ``deliver`` leaves nothing behind but the attempt itself.

Secrets never appear in the configuration: the e-mail credentials and the webhook
signing secret are read from environment variables whose *names* the configuration
gives, at the moment of delivery.
"""

from __future__ import annotations

import hashlib
import hmac
import http.client
import json
import logging
import os
import smtplib
import ssl
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from pathlib import Path

from monitor.assess.wording import email_body, email_subject
from monitor.config import AlertsConfig, EmailConfig, WebhookConfig

log = logging.getLogger(__name__)

SINK_NAMES = ("file", "email", "webhook")

SIGNATURE_HEADER = "X-Cuewatch-Signature"
DELIVERY_HEADER = "X-Cuewatch-Delivery"

# 408 (request timeout) and 429 (too many requests) say "try later", like a 5xx;
# every other 4xx says the request itself is wrong and would fail again unchanged.
_RETRYABLE_4XX = frozenset({408, 429})
_ERROR_SNIPPET = 200


class SinkError(Exception):
    """A notification could not be delivered; the message says which sink and why."""


# --- which sinks ---------------------------------------------------------------------


def configured_sinks(cfg: AlertsConfig) -> list[str]:
    """Names of the sinks the configuration enables, in the order file, email, webhook."""
    present = {"file": cfg.file, "email": cfg.email, "webhook": cfg.webhook}
    return [name for name in SINK_NAMES if present[name] is not None]


def deliver(
    cfg: AlertsConfig,
    alert: dict,
    sink: str,
    *,
    ack_hint: str | None = None,
    ssl_context: ssl.SSLContext | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> None:
    """Deliver one alert notification to the sink named ``sink`` or raise ``SinkError``.

    ``ack_hint`` is the command a reader runs to acknowledge (for the e-mail); by
    default a generic one naming the alert id.  ``ssl_context`` and ``sleep`` are
    passed to the e-mail and webhook senders (tests inject them).  An unknown sink
    name is a programming error (``ValueError``); a known sink that the configuration
    does not enable is a ``SinkError`` (the outbox may hold events for a sink that
    was since removed).
    """
    if sink not in SINK_NAMES:
        raise ValueError(f"unknown sink {sink!r}; expected one of {', '.join(SINK_NAMES)}")
    if sink == "file":
        if cfg.file is None:
            raise SinkError("sink 'file' is not configured ([alerts] file).")
        append_jsonl(cfg.file, alert)
    elif sink == "email":
        if cfg.email is None:
            raise SinkError("sink 'email' is not configured ([alerts.email]).")
        hint = ack_hint or _default_ack_hint(alert)
        send_email(cfg.email, render_email(alert, ack_hint=hint), ssl_context=ssl_context)
    else:
        if cfg.webhook is None:
            raise SinkError("sink 'webhook' is not configured ([alerts.webhook]).")
        post_webhook(cfg.webhook, alert, sleep=sleep, ssl_context=ssl_context)


def _default_ack_hint(alert: dict) -> str:
    return f"cuewatch --config FILE ack {alert.get('id', 'ALERT_ID')} --by NAME --note TEXT"


# --- file sink -----------------------------------------------------------------------


def append_jsonl(path: str | os.PathLike, alert: dict) -> None:
    """Append ``alert`` to ``path`` as one JSON line and fsync it before returning.

    The file is only ever appended to (created with its folder if missing).  If an
    earlier writer died mid-line, a newline is written first so the torn line stays
    on its own and this record remains parseable.  Raises ``SinkError`` if the alert
    is not JSON-serialisable (NaN included) or the file cannot be written.
    """
    try:
        line = json.dumps(alert, sort_keys=True, allow_nan=False, ensure_ascii=False) + "\n"
    except (TypeError, ValueError) as exc:
        raise SinkError(f"file sink: the alert is not JSON-serialisable ({exc}).") from None
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(target, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            data = line.encode("utf-8")
            if _ends_without_newline(fd):
                data = b"\n" + data
            # O_APPEND makes each write land at the current end, even with other writers.
            view = memoryview(data)
            while view:
                written = os.write(fd, view)
                view = view[written:]
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError as exc:
        raise SinkError(f"file sink: cannot append to {target} ({exc.strerror}).") from None


def _ends_without_newline(fd: int) -> bool:
    size = os.fstat(fd).st_size
    if size == 0:
        return False
    return os.pread(fd, 1, size - 1) != b"\n"


# --- e-mail sink ---------------------------------------------------------------------


def render_email(alert: dict, *, ack_hint: str) -> EmailMessage:
    """A plain-text e-mail for one alert notification (no From/To: ``send_email`` sets them).

    Body: the finding in one sentence, the figures with sample sizes and intervals,
    the caution that this is a statistical association and not proof, and how to
    acknowledge (``ack_hint``).  Missing fields are shown as "not reported" rather
    than failing, so a partial alert still reaches a person.
    """
    msg = EmailMessage()
    msg["Subject"] = email_subject(alert)
    msg["Date"] = formatdate(localtime=False, usegmt=True)
    # RFC 3834: tells vacation responders and ticket systems not to reply.
    msg["Auto-Submitted"] = "auto-generated"
    if alert.get("id") is not None:
        msg["X-Cuewatch-Alert"] = str(alert["id"])
    msg.set_content(email_body(alert, ack_hint=ack_hint))
    return msg


def send_email(
    cfg: EmailConfig, msg: EmailMessage, *, ssl_context: ssl.SSLContext | None = None
) -> None:
    """Send ``msg`` through the SMTP server of ``cfg`` or raise ``SinkError``.

    ``cfg.security``: "none" (plain SMTP), "starttls" (upgrade, which must succeed)
    or "ssl" (TLS from the first byte).  TLS verifies the server certificate and
    host name with ``ssl_context`` (default: the system trust store).  Credentials
    come from the environment variables named by ``username_env``/``password_env``
    (both or neither); a missing variable is a ``SinkError`` naming it, raised before
    any connection.  From/To/Message-ID are filled in when ``msg`` lacks them.
    Recipients the server refuses while accepting others are logged, not raised:
    retrying would send duplicates to those who did receive it.
    """
    credentials = _smtp_credentials(cfg)
    if msg["From"] is None:
        msg["From"] = cfg.sender
    if msg["To"] is None:
        msg["To"] = ", ".join(cfg.to)
    if msg["Message-ID"] is None:
        msg["Message-ID"] = make_msgid(domain=cfg.sender.rpartition("@")[2] or None)
    context = ssl_context or ssl.create_default_context()
    where = f"{cfg.host}:{cfg.port}"
    try:
        if cfg.security == "ssl":
            server = smtplib.SMTP_SSL(cfg.host, cfg.port, timeout=cfg.timeout_s, context=context)
        else:
            server = smtplib.SMTP(cfg.host, cfg.port, timeout=cfg.timeout_s)
        with server:
            server.ehlo()
            if cfg.security == "starttls":
                server.starttls(context=context)
                server.ehlo()
            if credentials is not None:
                server.login(*credentials)
            refused = server.send_message(msg, from_addr=cfg.sender, to_addrs=list(cfg.to))
    except smtplib.SMTPAuthenticationError as exc:
        raise SinkError(
            f"e-mail sink: {where} refused the credentials ({exc.smtp_code})."
        ) from None
    except smtplib.SMTPNotSupportedError as exc:
        raise SinkError(f"e-mail sink: {where} does not support {exc}.") from None
    except smtplib.SMTPRecipientsRefused as exc:
        raise SinkError(
            f"e-mail sink: {where} refused every recipient ({', '.join(exc.recipients)})."
        ) from None
    except smtplib.SMTPException as exc:
        raise SinkError(f"e-mail sink: {where}: {exc}.") from None
    except (OSError, ssl.SSLError) as exc:
        raise SinkError(f"e-mail sink: cannot reach {where} ({exc}).") from None
    if refused:
        log.warning("e-mail sink: %s refused recipients %s", where, sorted(refused))


def _smtp_credentials(cfg: EmailConfig) -> tuple[str, str] | None:
    if cfg.username_env is None and cfg.password_env is None:
        return None
    if cfg.username_env is None or cfg.password_env is None:
        raise SinkError(
            "e-mail sink: set both alerts.email.username_env and alerts.email.password_env, "
            "or neither."
        )
    return _env_secret(cfg.username_env, "e-mail sink"), _env_secret(
        cfg.password_env, "e-mail sink"
    )


def _env_secret(name: str, sink: str) -> str:
    value = os.environ.get(name)
    if not value:
        raise SinkError(f"{sink}: environment variable {name} is not set.")
    return value


# --- webhook sink --------------------------------------------------------------------


def delivery_id(document: dict) -> str:
    """A stable id for one alert event, sent so receivers can drop duplicates.

    The same (alert id, event, event time) gives the same id on every attempt and on
    later retries by the outbox; a document without an ``id`` falls back to a hash
    of its canonical JSON.
    """
    if document.get("id") is not None and document.get("event"):
        when = document.get("resolved_at" if document["event"] == "resolved" else "opened_at")
        key = f"alert:{document['id']}:{document['event']}:{when}"
    else:
        key = _canonical_json(document).decode("utf-8")
    return hashlib.sha256(key.encode("utf-8")).hexdigest()[:32]


def signature_header(secret: str, body: bytes) -> str:
    """``sha256=<hex>``: HMAC-SHA256 of the exact body bytes under ``secret``."""
    mac = hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()
    return f"sha256={mac}"


def post_webhook(
    cfg: WebhookConfig,
    document: dict,
    *,
    sleep: Callable[[float], None] = time.sleep,
    ssl_context: ssl.SSLContext | None = None,
) -> None:
    """POST ``document`` as JSON to ``cfg.url``; return on a 2xx, else raise ``SinkError``.

    Up to ``1 + cfg.retries`` attempts, sleeping ``cfg.backoff_s * 2**attempt``
    seconds after failed attempt number ``attempt`` (0-based).  Retried: 5xx, 408,
    429, time-outs and connection failures.  Not retried: other 4xx and 3xx
    (redirects are not followed, so a signed body never goes to a second address).
    Headers: ``X-Cuewatch-Delivery`` (``delivery_id``), and when ``cfg.secret_env``
    is set, ``X-Cuewatch-Signature`` (``signature_header`` of the body bytes); a
    missing secret variable is a ``SinkError`` raised before any request.
    """
    secret = _env_secret(cfg.secret_env, "webhook sink") if cfg.secret_env else None
    try:
        body = _canonical_json(document)
    except (TypeError, ValueError) as exc:
        raise SinkError(f"webhook sink: the document is not JSON-serialisable ({exc}).") from None
    headers = {
        "Content-Type": "application/json; charset=utf-8",
        "User-Agent": "cuewatch-alerts",
        DELIVERY_HEADER: delivery_id(document),
    }
    if secret is not None:
        headers[SIGNATURE_HEADER] = signature_header(secret, body)
    opener = urllib.request.build_opener(
        _NoRedirect, urllib.request.HTTPSHandler(context=ssl_context)
    )
    last_problem = "no attempt made"
    for attempt in range(cfg.retries + 1):
        retry, last_problem = _attempt(opener, cfg, body, headers)
        if last_problem == "":
            return
        if not retry:
            raise SinkError(f"webhook sink: {cfg.url} {last_problem}; not retried.")
        if attempt < cfg.retries:
            log.info("webhook sink: attempt %d %s; retrying", attempt + 1, last_problem)
            sleep(cfg.backoff_s * 2**attempt)
    raise SinkError(f"webhook sink: {cfg.url} {last_problem} after {cfg.retries + 1} attempt(s).")


def _attempt(
    opener: urllib.request.OpenerDirector, cfg: WebhookConfig, body: bytes, headers: dict
) -> tuple[bool, str]:
    """One POST.  Returns (retryable, problem); problem "" means delivered."""
    request = urllib.request.Request(cfg.url, data=body, headers=headers, method="POST")
    try:
        with opener.open(request, timeout=cfg.timeout_s) as response:
            response.read()
            status = response.status
    except urllib.error.HTTPError as exc:
        status = exc.code
        snippet = _snippet(exc)
        retry = status >= 500 or status in _RETRYABLE_4XX
        return retry, f"answered HTTP {status}{snippet}"
    except (OSError, http.client.HTTPException) as exc:  # time-outs, refusals, resets
        reason = getattr(exc, "reason", exc)
        return True, f"could not be reached ({reason})"
    if 200 <= status < 300:
        return False, ""
    return False, f"answered HTTP {status}"


def _snippet(exc: urllib.error.HTTPError) -> str:
    try:
        text = exc.read(_ERROR_SNIPPET).decode("utf-8", "replace").strip()
    except OSError:
        return ""
    return f": {text}" if text else ""


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, req, fp, code, msg, headers, newurl):  # noqa: D102
        return None  # urllib then raises HTTPError with the 3xx code


def _canonical_json(document: dict) -> bytes:
    # Sorted keys and no spaces: the same document always gives the same bytes, so a
    # receiver can recompute the signature over exactly what it received.
    return json.dumps(
        document, sort_keys=True, separators=(",", ":"), allow_nan=False, ensure_ascii=False
    ).encode("utf-8")
