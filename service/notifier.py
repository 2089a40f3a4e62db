"""The background sender: queues "still unacknowledged" reminders, claims due outbox
messages one at a time under a lease and delivers them (service/db/outbox.py says what is
guaranteed). Every replica and worker runs one; the database decides who sends what.

`run_once` is plain blocking code (the app runs it in a thread; tests call it directly).
A claimed message is delivered outside any database transaction, so a slow receiver never
holds SQLite's write lock; the claim and the mark are short transactions of their own.
"""

from __future__ import annotations

import asyncio
import logging
import secrets
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from service.background import in_thread_to_completion
from service.db import outbox
from service.db.session import Database
from service.notify_channels import DeliveryError, SmtpConfig, email_message, send_email, send_webhook
from service.settings import Settings

log = logging.getLogger("kilter.notify")
MAX_PER_ROUND = 50  # messages a round delivers before it lets the loop look up


@dataclass
class RoundResult:
    reminders: int = 0
    sent: int = 0
    retried: int = 0
    dead: int = 0
    lost_lease: int = 0
    errors: list[str] = field(default_factory=list)


def new_owner() -> str:
    """A sender's name in the lease column: unique per process and start."""
    return f"sender-{secrets.token_hex(6)}"


def smtp_config(settings: Settings) -> SmtpConfig | None:
    if not settings.smtp_host:
        return None
    return SmtpConfig(
        host=settings.smtp_host,
        port=settings.smtp_port,
        user=settings.smtp_user,
        password=settings.smtp_password.get_secret_value() if settings.smtp_password else None,
        sender=settings.smtp_from,
        starttls=settings.smtp_starttls,
        ca_file=settings.smtp_ca_file,
        timeout_s=settings.notify_timeout_s,
    )


def deliver(message: outbox.Claimed, settings: Settings) -> None:
    """Send one claimed message through its route's channel; DeliveryError on failure."""
    if message.channel == "webhook":
        if not message.secret:
            raise DeliveryError(f"route {message.route_name!r} has no signing secret", permanent=True)
        payload = message.payload
        if settings.public_url and payload.get("alert"):  # a link people can open, the same on every attempt
            payload = {**payload, "url": settings.public_url.rstrip("/") + payload["alert"]["path"]}
        send_webhook(message.target, message.secret, payload, key=message.idempotency_key, timeout_s=settings.notify_timeout_s)
        return
    config = smtp_config(settings)
    if config is None:
        raise DeliveryError("e-mail route but no SMTP relay configured: set KILTER_SMTP_HOST (and port, user, password, from)")
    to = [a.strip() for a in message.target.split(",") if a.strip()]
    send_email(config, to, email_message(message.payload, key=message.idempotency_key, sender=config.sender, to=to,
                                         public_url=settings.public_url))


def run_once(db: Database, settings: Settings, *, owner: str, now: datetime | None = None, limit: int = MAX_PER_ROUND) -> RoundResult:
    """One round: queue due reminders, then claim and deliver due messages until none is left
    (or `limit`). `now` moves the clock for tests; deliveries use the real one."""
    result = RoundResult()
    after = timedelta(minutes=settings.notify_unack_after_min) if settings.notify_unack_after_min > 0 else None
    with db.session() as s:
        reminders, messages = outbox.work_waiting(s, reminders_after=after, now=now)
    if reminders and after is not None:
        with db.transaction() as s:
            result.reminders = outbox.queue_reminders(s, older_than=after, now=now)
    if not (messages or result.reminders):
        return result
    for _ in range(limit):
        with db.transaction() as s:
            message = outbox.claim_one(s, owner=owner, lease_s=settings.notify_lease_s, now=now)
        if message is None:
            break
        try:
            deliver(message, settings)
        except DeliveryError as e:
            with db.transaction() as s:
                status = outbox.mark_failed(
                    s, row_id=message.id, owner=owner, error=str(e), attempts=message.attempts, permanent=e.permanent,
                    max_attempts=settings.notify_max_attempts, base_s=settings.notify_backoff_s,
                    max_s=settings.notify_backoff_max_s, now=now,
                )
            result.errors.append(str(e))
            if status == "dead":
                result.dead += 1
                log.warning("notification %s dead-lettered after %d attempt(s): %s", message.idempotency_key, message.attempts, e)
            elif status == "pending":
                result.retried += 1
            else:
                result.lost_lease += 1
            continue
        with db.transaction() as s:
            if outbox.mark_sent(s, row_id=message.id, owner=owner, now=now):
                result.sent += 1
            else:
                result.lost_lease += 1
    return result


async def sender_loop(app: Any) -> None:
    """The app's background task: a round in a worker thread, then a pause when the round
    found nothing to do. A shutdown that cancels the loop waits for a running round, so the
    pool is disposed only after its connections are back (as the retention loop does)."""
    settings: Settings = app.state.settings
    owner = new_owner()
    while True:
        busy = False
        try:
            result = await in_thread_to_completion(run_once, app.state.db, settings, owner=owner)
        except Exception as e:  # keep serving; the next round retries
            log.warning("notification round failed: %s", e)
        else:
            busy = result.sent + result.retried + result.dead + result.lost_lease >= MAX_PER_ROUND
        if not busy:
            await asyncio.sleep(settings.notify_poll_s)
