"""Alert delivery: the file, e-mail and webhook sinks.

An *alert notification* is a plain JSON-serialisable dict with the fields of
``alerts --json`` (DESIGN.md, "Contracts") plus ``event`` ("opened" | "resolved").
``deliver`` sends one notification to one sink and either returns (delivered) or
raises ``SinkError`` (not delivered).  It keeps no state of its own: the outbox that
calls it once per (alert event, sink) records the outcome and decides when to try
again, so a failed ``deliver`` leaves nothing behind but the attempt itself.

Secrets never appear in the configuration: the e-mail credentials and the webhook
signing secret are read from environment variables whose *names* the configuration
gives, at the moment of delivery.  Nor do they appear in what cuewatch says: every
message about a delivery goes through ``redact``.

Receivers can drop duplicates: each (alert, event, sink) has one ``delivery_id``, sent
on every attempt (the webhook's ``webhook-id``, the e-mail's ``Message-ID``, the file
line's ``delivery_id``).  Webhooks are signed as the Standard Webhooks specification
says (github.com/standard-webhooks/standard-webhooks, spec/standard-webhooks.md).

``deliver`` takes an optional ``deadline`` (``time.monotonic()`` seconds): no wait on
the network, no retry and no back-off goes past it, so a receiver that accepts a
connection and never answers costs a run at most its delivery budget.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import http.client
import json
import logging
import os
import re
import smtplib
import ssl
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable, Iterable
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from pathlib import Path

from monitor.assess.wording import email_body, email_subject
from monitor.config import AlertsConfig, EmailConfig, WebhookConfig

log = logging.getLogger(__name__)

SINK_NAMES = ("file", "email", "webhook")

# Standard Webhooks headers and the prefix of a base64 secret (spec, "Webhook headers").
ID_HEADER = "webhook-id"
TIMESTAMP_HEADER = "webhook-timestamp"
SIGNATURE_HEADER = "webhook-signature"
SECRET_PREFIX = "whsec_"

# 408 (request timeout) and 429 (too many requests) say "try later", like a 5xx;
# every other 4xx says the request itself is wrong and would fail again unchanged.
_RETRYABLE_4XX = frozenset({408, 429})
_ERROR_SNIPPET = 200


class SinkError(Exception):
    """A notification could not be delivered; the message says which sink and why."""


# --- redaction -------------------------------------------------------------------------

REDACTED = "***"
_URL = re.compile(r"\b[A-Za-z][A-Za-z0-9+.-]*://[^\s<>\"'`]+")
_QUERY_PAIR = re.compile(r"([?&][^=\s&#?/]+=)([^&\s#\"'`<>]+)")
_URL_TRAILER = ".,;:!?)]}"


def redact(text: str, urls: Iterable[str] = ()) -> str:
    """``text`` without the secrets a URL can carry, for messages, logs and stored errors.

    Every URL in ``text`` keeps its scheme, host, port and path shape, but loses its
    user:password (``***@``), every query value (``key=***``), its fragment and each
    path segment that looks like a token (``looks_like_token``).  Query pairs outside a
    URL (a receiver echoing its request line) lose their values too.  The secret parts
    of ``urls`` (say the configured webhook URL) are also removed wherever they appear
    on their own, e.g. a password or a path token quoted by an error message.
    """
    out = _URL.sub(_redact_url_match, text)
    out = _QUERY_PAIR.sub(_redact_pair_match, out)
    for secret in sorted({s for u in urls for s in _url_secrets(u)}, key=len, reverse=True):
        out = out.replace(secret, REDACTED)
    return out


def looks_like_token(segment: str) -> bool:
    """A path segment that is probably a credential rather than a name: 8+ characters
    mixing letters and digits (ids, keys, UUIDs), 16+ mixing upper and lower case, or
    any run of 32+ URL-safe characters."""
    s = urllib.parse.unquote(segment)
    has_digit = any(c.isdigit() for c in s)
    has_alpha = any(c.isalpha() for c in s)
    if len(s) >= 8 and has_digit and has_alpha:
        return True
    if len(s) >= 16 and any(c.islower() for c in s) and any(c.isupper() for c in s):
        return True
    return len(s) >= 32 and re.fullmatch(r"[A-Za-z0-9_\-=~+]+", s) is not None


def _redact_url_match(match: re.Match) -> str:
    url = match.group(0)
    kept = len(url.rstrip(_URL_TRAILER))
    return _redact_url(url[:kept]) + url[kept:]


def _redact_pair_match(match: re.Match) -> str:
    value = match.group(2)
    trailer = value[len(value.rstrip(_URL_TRAILER)) :]
    return match.group(1) + REDACTED + trailer


def _redact_url(url: str) -> str:
    try:
        parts = urllib.parse.urlsplit(url)
        host = parts.hostname or ""
        port = f":{parts.port}" if parts.port is not None else ""
    except ValueError:  # not parseable (a bad port, say): keep only the scheme
        return url.split("://", 1)[0] + "://" + REDACTED
    if ":" in host:
        host = f"[{host}]"
    userinfo = REDACTED + "@" if "@" in parts.netloc else ""
    path = "/".join(REDACTED if looks_like_token(seg) else seg for seg in parts.path.split("/"))
    query = "&".join(
        (pair.split("=", 1)[0] + "=" + REDACTED) if "=" in pair else REDACTED
        for pair in parts.query.split("&")
        if pair
    )
    return urllib.parse.urlunsplit(
        (parts.scheme, userinfo + host + port, path, query, REDACTED if parts.fragment else "")
    )


def _url_secrets(url: str) -> set[str]:
    """The parts of ``url`` to remove wherever they appear on their own: the password
    (4+ characters) and every path segment, query value or fragment that looks like a
    token.  Plain words (``channel=alerts``) stay, so that ordinary text is not garbled;
    inside a URL or a query string they are redacted anyway."""
    try:
        parts = urllib.parse.urlsplit(url)
    except ValueError:
        return set()
    found: set[str] = set()
    if parts.password and len(parts.password) >= 4:
        found.update({parts.password, urllib.parse.unquote(parts.password)})
    pieces = [*parts.path.split("/"), *(p.split("=", 1)[-1] for p in parts.query.split("&"))]
    for piece in [*pieces, parts.fragment]:
        if piece and looks_like_token(piece):
            found.update({piece, urllib.parse.unquote(piece)})
    return found


# --- which sinks ---------------------------------------------------------------------


def configured_sinks(cfg: AlertsConfig) -> list[str]:
    """Names of the sinks the configuration enables, in the order file, email, webhook."""
    present = {"file": cfg.file, "email": cfg.email, "webhook": cfg.webhook}
    return [name for name in SINK_NAMES if present[name] is not None]


def delivery_id(alert_id: int | str, event: str, sink: str, queued: str) -> str:
    """The one id of the notification of ``event`` of ``alert_id`` to ``sink``.

    ``queued`` is when the outbox row was written (any stable text), so two stores that
    reuse alert ids do not share delivery ids.  Letters, digits and '_' only: it is a
    Standard Webhooks ``webhook-id`` (no '.') and the left part of a ``Message-ID``.
    """
    digest = hashlib.sha256(f"{alert_id}|{event}|{sink}|{queued}".encode()).hexdigest()
    return f"cw_{alert_id}_{event}_{sink}_{digest[:16]}"


def _document_delivery_id(document: dict, sink: str) -> str:
    """The outbox's id when the document carries one, else one derived from the alert
    (same id, event and event time -> same delivery id)."""
    if document.get("delivery_id"):
        return str(document["delivery_id"])
    event = str(document.get("event") or "event")
    if document.get("id") is None:
        queued = hashlib.sha256(_canonical_json(document)).hexdigest()
    else:
        queued = str(document.get("resolved_at" if event == "resolved" else "opened_at"))
    return delivery_id(re.sub(r"\W", "", str(document.get("id", "x"))), event, sink, queued)


def deliver(
    cfg: AlertsConfig,
    alert: dict,
    sink: str,
    *,
    ack_hint: str | None = None,
    ssl_context: ssl.SSLContext | None = None,
    sleep: Callable[[float], None] = time.sleep,
    deadline: float | None = None,
) -> None:
    """Deliver one alert notification to the sink named ``sink`` or raise ``SinkError``.

    The notification carries ``delivery_id`` (the document's own, else derived from
    the alert); it is the same on every attempt.  ``ack_hint`` is the command a reader
    runs to acknowledge (for the e-mail); by default a generic one naming the alert
    id.  ``ssl_context`` and ``sleep`` are passed to the e-mail and webhook senders
    (tests inject them); ``deadline`` (``time.monotonic()`` seconds) bounds every wait.
    An unknown sink name is a programming error (``ValueError``); a known sink that
    the configuration does not enable is a ``SinkError`` (the outbox may hold events
    for a sink that was since removed).
    """
    if sink not in SINK_NAMES:
        raise ValueError(f"unknown sink {sink!r}; expected one of {', '.join(SINK_NAMES)}")
    alert = {**alert, "delivery_id": _document_delivery_id(alert, sink)}
    if sink == "file":
        if cfg.file is None:
            raise SinkError("sink 'file' is not configured ([alerts] file).")
        append_jsonl(cfg.file, alert)
    elif sink == "email":
        if cfg.email is None:
            raise SinkError("sink 'email' is not configured ([alerts.email]).")
        msg = render_email(alert, ack_hint=ack_hint or _default_ack_hint(alert))
        msg["Message-ID"] = message_id(alert["delivery_id"], cfg.email.sender)
        send_email(cfg.email, msg, ssl_context=ssl_context, deadline=deadline)
    else:
        if cfg.webhook is None:
            raise SinkError("sink 'webhook' is not configured ([alerts.webhook]).")
        post_webhook(cfg.webhook, alert, sleep=sleep, ssl_context=ssl_context, deadline=deadline)


def _default_ack_hint(alert: dict) -> str:
    return f"cuewatch --config FILE ack {alert.get('id', 'ALERT_ID')} --by NAME --note TEXT"


def _time_left(deadline: float | None, what: str) -> float | None:
    """Seconds to ``deadline`` (None: no deadline); a ``SinkError`` once it has passed."""
    if deadline is None:
        return None
    left = deadline - time.monotonic()
    if left <= 0:
        raise SinkError(f"{what}; the run's delivery budget ran out (left for the next run).")
    return left


def _budget_note(deadline: float | None) -> str:
    """Why a wait was cut short, when it was the budget that cut it."""
    if deadline is not None and time.monotonic() >= deadline:
        return "; the run's delivery budget ran out (left for the next run)"
    return ""


def _bounded(timeout_s: float, left: float | None) -> float:
    return timeout_s if left is None else min(timeout_s, left)


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


def message_id(delivery: str, sender: str) -> str:
    """``<delivery@sender's domain>`` (RFC 5322 msg-id): the same on every attempt, so a
    mail system or reader can drop a re-sent copy."""
    domain = sender.rpartition("@")[2].strip().strip(">") or "cuewatch.invalid"
    return f"<{delivery}@{domain}>"


def send_email(
    cfg: EmailConfig,
    msg: EmailMessage,
    *,
    ssl_context: ssl.SSLContext | None = None,
    deadline: float | None = None,
) -> None:
    """Send ``msg`` through the SMTP server of ``cfg`` or raise ``SinkError``.

    ``cfg.security``: "none" (plain SMTP), "starttls" (upgrade, which must succeed)
    or "ssl" (TLS from the first byte).  TLS verifies the server certificate and
    host name with ``ssl_context`` (default: the system trust store).  Credentials
    come from the environment variables named by ``username_env``/``password_env``
    (both or neither); a missing variable is a ``SinkError`` naming it, raised before
    any connection.  They are sent without TLS only when ``allow_plaintext_auth`` is
    set, which the configuration accepts for a loopback relay only.  Every wait on
    the server is bounded by ``cfg.timeout_s`` and by ``deadline``.  From/To/Message-ID
    are filled in when ``msg`` lacks them.  Recipients the server refuses while
    accepting others are logged, not raised: retrying would send duplicates to those
    who did receive it.
    """
    credentials = _smtp_credentials(cfg)
    if credentials is not None and cfg.security == "none" and not cfg.allow_plaintext_auth:
        raise SinkError("e-mail sink: refusing to send the credentials without TLS.")
    if msg["From"] is None:
        msg["From"] = cfg.sender
    if msg["To"] is None:
        msg["To"] = ", ".join(cfg.to)
    if msg["Message-ID"] is None:
        msg["Message-ID"] = make_msgid(domain=cfg.sender.rpartition("@")[2] or None)
    context = ssl_context or ssl.create_default_context()
    where = f"{cfg.host}:{cfg.port}"
    what = f"e-mail sink: {where} did not finish"
    try:
        timeout = _bounded(cfg.timeout_s, _time_left(deadline, what))
        if cfg.security == "ssl":
            server = smtplib.SMTP_SSL(cfg.host, cfg.port, timeout=timeout, context=context)
        else:
            server = smtplib.SMTP(cfg.host, cfg.port, timeout=timeout)
        with server:
            _tighten(server, cfg, deadline, what)
            server.ehlo()
            if cfg.security == "starttls":
                _tighten(server, cfg, deadline, what)
                server.starttls(context=context)
                server.ehlo()
            if credentials is not None:
                _tighten(server, cfg, deadline, what)
                server.login(*credentials)
            _tighten(server, cfg, deadline, what)
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
        raise SinkError(f"e-mail sink: {where}: {exc}{_budget_note(deadline)}.") from None
    except (OSError, ssl.SSLError) as exc:
        raise SinkError(
            f"e-mail sink: cannot reach {where} ({exc}){_budget_note(deadline)}."
        ) from None
    if refused:
        log.warning("e-mail sink: %s refused recipients %s", where, sorted(refused))


def _tighten(server: smtplib.SMTP, cfg: EmailConfig, deadline: float | None, what: str) -> None:
    """Before the next exchange: no socket wait may outlast the deadline."""
    if deadline is not None and server.sock is not None:
        server.sock.settimeout(_bounded(cfg.timeout_s, _time_left(deadline, what)))


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


def signing_key(secret: str) -> bytes:
    """The HMAC key of a webhook secret: with the Standard Webhooks prefix ``whsec_``
    the rest is base64 (padding optional), as the specification serialises secrets;
    any other secret is used as its UTF-8 bytes.  ``ValueError`` if a ``whsec_``
    secret is not base64."""
    if not secret.startswith(SECRET_PREFIX):
        return secret.encode("utf-8")
    body = secret[len(SECRET_PREFIX) :].strip()
    try:
        key = base64.b64decode(body + "=" * (-len(body) % 4), validate=True)
    except (binascii.Error, ValueError):
        raise ValueError("a secret starting with whsec_ must continue in base64") from None
    if not key:
        raise ValueError("the webhook secret is empty after whsec_")
    return key


def webhook_signature(key: bytes, msg_id: str, timestamp: int, body: bytes) -> str:
    """The ``webhook-signature`` value: ``v1,`` + base64 of HMAC-SHA256 under ``key`` of
    ``"{msg_id}.{timestamp}.{body}"`` (Standard Webhooks, "Signature scheme")."""
    signed = f"{msg_id}.{int(timestamp)}.".encode() + body
    return "v1," + base64.b64encode(hmac.new(key, signed, hashlib.sha256).digest()).decode()


def post_webhook(
    cfg: WebhookConfig,
    document: dict,
    *,
    sleep: Callable[[float], None] = time.sleep,
    ssl_context: ssl.SSLContext | None = None,
    deadline: float | None = None,
    clock: Callable[[], float] = time.time,
) -> None:
    """POST ``document`` as JSON to ``cfg.url``; return on a 2xx, else raise ``SinkError``.

    Up to ``1 + cfg.retries`` attempts, sleeping ``cfg.backoff_s * 2**attempt``
    seconds after failed attempt number ``attempt`` (0-based); no attempt, wait or
    back-off goes past ``deadline``.  Retried: 5xx, 408, 429, time-outs and connection
    failures.  Not retried: other 4xx and 3xx (redirects are not followed, so a signed
    body never goes to a second address).  Headers (Standard Webhooks): ``webhook-id``
    (the delivery id, the same on every attempt), ``webhook-timestamp`` (the attempt's
    Unix time from ``clock``) and, when ``cfg.secret_env`` is set,
    ``webhook-signature``; a missing or malformed secret is a ``SinkError`` raised
    before any request.  A user:password in the URL is sent as HTTP basic
    authentication.  Messages and log lines show the URL redacted (``redact``).
    """
    url, auth = _split_userinfo(cfg.url)
    shown = redact(cfg.url, [cfg.url])

    def problem(text: str) -> SinkError:
        return SinkError(redact(f"webhook sink: {shown} {text}", [cfg.url]))

    key = None
    if cfg.secret_env:
        try:
            key = signing_key(_env_secret(cfg.secret_env, "webhook sink"))
        except ValueError as exc:
            raise SinkError(f"webhook sink: {cfg.secret_env}: {exc}.") from None
    try:
        body = _canonical_json(document)
    except (TypeError, ValueError) as exc:
        raise SinkError(f"webhook sink: the document is not JSON-serialisable ({exc}).") from None
    msg_id = _document_delivery_id(document, "webhook")
    headers = {
        "Content-Type": "application/json; charset=utf-8",
        "User-Agent": "cuewatch-alerts",
        ID_HEADER: msg_id,
    }
    if auth is not None:
        headers["Authorization"] = auth
    opener = urllib.request.build_opener(
        _NoRedirect, urllib.request.HTTPSHandler(context=ssl_context)
    )
    last_problem = "was not tried"
    for attempt in range(cfg.retries + 1):
        left = _time_left(deadline, redact(f"webhook sink: {shown} {last_problem}", [cfg.url]))
        stamp = int(clock())
        headers[TIMESTAMP_HEADER] = str(stamp)
        if key is not None:
            headers[SIGNATURE_HEADER] = webhook_signature(key, msg_id, stamp, body)
        request = urllib.request.Request(url, data=body, headers=headers, method="POST")
        retry, last_problem = _attempt(opener, request, _bounded(cfg.timeout_s, left))
        if last_problem == "":
            return
        if not retry:
            raise problem(f"{last_problem}; not retried.")
        if attempt < cfg.retries:
            pause = cfg.backoff_s * 2**attempt
            if deadline is not None and time.monotonic() + pause >= deadline:
                raise problem(
                    f"{last_problem}; the run's delivery budget ran out before the next "
                    "attempt (left for the next run)."
                )
            note = f"webhook sink: attempt {attempt + 1} {last_problem}; retrying"
            log.info("%s", redact(note, [cfg.url]))
            sleep(pause)
    raise problem(f"{last_problem} after {cfg.retries + 1} attempt(s).")


def _split_userinfo(url: str) -> tuple[str, str | None]:
    """``url`` without user:password, and the HTTP basic ``Authorization`` value they
    make (RFC 7617), or None when the URL has none."""
    parts = urllib.parse.urlsplit(url)
    if "@" not in parts.netloc:
        return url, None
    host = parts.netloc.rpartition("@")[2]
    user = urllib.parse.unquote(parts.username or "")
    password = urllib.parse.unquote(parts.password or "")
    token = base64.b64encode(f"{user}:{password}".encode()).decode("ascii")
    return urllib.parse.urlunsplit(parts._replace(netloc=host)), f"Basic {token}"


def _attempt(
    opener: urllib.request.OpenerDirector, request: urllib.request.Request, timeout: float
) -> tuple[bool, str]:
    """One POST.  Returns (retryable, problem); problem "" means delivered."""
    try:
        with opener.open(request, timeout=timeout) as response:
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
    # Sorted keys and no spaces: the same document always gives the same bytes.  The
    # receiver still verifies the bytes it received, never a re-serialisation.
    return json.dumps(
        document, sort_keys=True, separators=(",", ":"), allow_nan=False, ensure_ascii=False
    ).encode("utf-8")
