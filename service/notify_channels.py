"""Delivering one outbox message: signed HTTP webhooks and e-mail over SMTP (standard
library only). Blocking: the sender calls these from a worker thread.

Webhook scheme (version 1), documented in the README for receivers:
- `POST <target>` with the message as a JSON body (`Content-Type: application/json`).
- `Kilter-Timestamp: <epoch seconds, integer>` — when this attempt was signed.
- `Kilter-Signature: v1=<hex>` — HMAC-SHA256 (RFC 2104 with SHA-256) keyed with the
  route's secret over the bytes `<timestamp>` + `.` + `<body>`.
- `Kilter-Idempotency-Key: <key>` — the same for every attempt of one message (also in
  the body as `idempotency_key`): a receiver that has seen it drops the repeat.
A receiver recomputes the HMAC over the raw body it received, compares in constant time,
and refuses timestamps more than a few minutes from its clock (a replayed old request
fails the check, and a changed timestamp breaks the signature).
A 2xx answer is success; 408, 429 and 5xx (and connection errors) are retried with backoff;
any other 4xx is final (dead-lettered at once), since sending it again cannot change it.

E-mail: one plain-text message to the route's addresses, `Message-ID` derived from the
idempotency key (so a mail system can drop a repeat too) and the key in a
`Kilter-Idempotency-Key` header.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import smtplib
import ssl
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from email.message import EmailMessage
from email.utils import formatdate
from pathlib import Path
from typing import Any

SIGNATURE_HEADER = "Kilter-Signature"
TIMESTAMP_HEADER = "Kilter-Timestamp"
KEY_HEADER = "Kilter-Idempotency-Key"
SCHEME = "v1"
DEFAULT_TOLERANCE_S = 300


class DeliveryError(Exception):
    """A delivery that did not succeed; `permanent` when trying again cannot help."""

    def __init__(self, message: str, *, permanent: bool = False) -> None:
        super().__init__(message)
        self.permanent = permanent


def signature(secret: str, timestamp: int, body: bytes) -> str:
    """The `Kilter-Signature` value: 'v1=' + hex HMAC-SHA256(secret, '<timestamp>.' + body)."""
    mac = hmac.new(secret.encode(), str(int(timestamp)).encode() + b"." + body, hashlib.sha256).hexdigest()
    return f"{SCHEME}={mac}"


def verify(secret: str, timestamp: str, body: bytes, signature_header: str, *, now: float | None = None,
           tolerance_s: float = DEFAULT_TOLERANCE_S) -> bool:
    """What a receiver checks: the timestamp is an integer within `tolerance_s` of its clock
    and the signature matches the raw body (constant-time comparison)."""
    try:
        ts = int(timestamp)
    except (TypeError, ValueError):
        return False
    now = time.time() if now is None else now
    if abs(now - ts) > tolerance_s:
        return False
    return hmac.compare_digest(signature(secret, ts, body), signature_header or "")


def body_bytes(payload: dict[str, Any]) -> bytes:
    return json.dumps(payload, separators=(",", ":"), sort_keys=True).encode()


def send_webhook(url: str, secret: str, payload: dict[str, Any], *, key: str, timeout_s: float, now: float | None = None) -> int:
    """POST the signed message; the HTTP status on success, DeliveryError otherwise."""
    body = body_bytes(payload)
    ts = int(time.time() if now is None else now)
    request = urllib.request.Request(url, data=body, method="POST", headers={
        "Content-Type": "application/json",
        "User-Agent": "kilter-notify/1",
        TIMESTAMP_HEADER: str(ts),
        SIGNATURE_HEADER: signature(secret, ts, body),
        KEY_HEADER: key,
    })
    try:
        with urllib.request.urlopen(request, timeout=timeout_s) as response:  # noqa: S310 - admins set the URL
            response.read(65536)
            return int(response.status)
    except urllib.error.HTTPError as e:
        retry = e.code in (408, 429) or e.code >= 500
        raise DeliveryError(f"webhook {url} answered {e.code} {e.reason}", permanent=not retry) from None
    except (urllib.error.URLError, OSError, TimeoutError) as e:
        reason = getattr(e, "reason", e)
        raise DeliveryError(f"webhook {url}: {reason}") from None


@dataclass(frozen=True)
class SmtpConfig:
    host: str
    port: int
    user: str | None
    password: str | None
    sender: str
    starttls: bool
    ca_file: Path | None
    timeout_s: float


def email_message(payload: dict[str, Any], *, key: str, sender: str, to: list[str], public_url: str | None) -> EmailMessage:
    """The e-mail for one message: subject from its text, a plain body, a stable Message-ID."""
    msg = EmailMessage()
    msg["From"] = sender
    msg["To"] = ", ".join(to)
    msg["Subject"] = str(payload.get("text", "kilter notification"))[:200]
    msg["Date"] = formatdate(usegmt=True)
    msg["Message-ID"] = f"<{key}@kilter>"
    msg[KEY_HEADER] = key
    lines = [str(payload.get("text", ""))]
    alert = payload.get("alert")
    if alert:
        lines += ["", f"Asset: {alert['asset_id']}", f"Severity: {alert['severity']}", f"When (UTC): {alert['at']}"]
        if alert.get("peak_score") is not None:
            lines.append(f"Peak score so far: {alert['peak_score']:.4g}")
        if alert.get("top_channels"):
            lines.append(f"Channels that drove it: {', '.join(alert['top_channels'])}")
        if public_url:
            lines.append(f"Open it: {public_url.rstrip('/')}{alert['path']}")
    lines += ["", str(payload.get("caution", ""))]
    msg.set_content("\n".join(lines) + "\n")
    return msg


def send_email(config: SmtpConfig, to: list[str], message: EmailMessage) -> None:
    """Hand the message to the relay (STARTTLS and login when configured)."""
    try:
        with smtplib.SMTP(config.host, config.port, timeout=config.timeout_s) as smtp:
            smtp.ehlo()
            if config.starttls:
                context = ssl.create_default_context(cafile=str(config.ca_file) if config.ca_file else None)
                smtp.starttls(context=context)
                smtp.ehlo()
            if config.user:
                smtp.login(config.user, config.password or "")
            refused = smtp.send_message(message, to_addrs=to)
            if refused and len(refused) == len(to):
                raise DeliveryError(f"SMTP relay {config.host} refused every recipient: {refused}", permanent=True)
    except smtplib.SMTPAuthenticationError as e:
        raise DeliveryError(f"SMTP relay {config.host}: login refused ({e.smtp_code})", permanent=True) from None
    except smtplib.SMTPRecipientsRefused as e:
        raise DeliveryError(f"SMTP relay {config.host} refused the recipients: {sorted(e.recipients)}", permanent=True) from None
    except smtplib.SMTPResponseException as e:
        raise DeliveryError(f"SMTP relay {config.host} answered {e.smtp_code}", permanent=500 <= e.smtp_code < 600) from None
    except (smtplib.SMTPException, OSError, ssl.SSLError) as e:
        raise DeliveryError(f"SMTP relay {config.host}:{config.port}: {e}") from None
