"""`kilter notify ...`: manage notification routes and look at the outbox from the shell,
on the database the settings name (the same functions as the admin API; actor "cli").

  kilter notify add-webhook --name ops-hook --url https://hooks.example.org/kilter [--asset A] [--min-severity critical] [--events opened,returned]
  kilter notify add-email --name night-shift --to a@example.org,b@example.org [...]
  kilter notify list                 routes, one a line
  kilter notify disable|enable ID
  kilter notify test ID              queue a test message (the running service sends it)
  kilter notify outbox [--status dead]
  kilter notify retry MESSAGE_ID     put a dead-lettered message back in the queue

`add-webhook` prints the route's signing secret alone on stdout (everything else goes to
stderr), as `keys create` does with a key.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from service.cli import CommandError

ACTOR = "cli"
ALL_EVENTS = "opened,escalated,returned,unacknowledged"


def register(subparsers: argparse._SubParsersAction) -> None:
    n = subparsers.add_parser("notify", help="notification routes (webhook, e-mail) and the outbox")
    sub = n.add_subparsers(dest="notify_command", metavar="ACTION", required=True)
    for name, what in (("add-webhook", "a signed HTTP webhook"), ("add-email", "e-mail through the SMTP relay in the settings")):
        p = sub.add_parser(name, help=f"add a route: {what}")
        p.add_argument("--name", required=True, help="unique name of the route")
        if name == "add-webhook":
            p.add_argument("--url", required=True, help="where to POST the signed JSON")
            p.add_argument("--secret", help="signing secret (default: a new random one, printed on stdout)")
        else:
            p.add_argument("--to", required=True, help="comma-separated e-mail addresses")
        p.add_argument("--asset", help="only this asset's alerts (default every asset)")
        p.add_argument("--min-severity", default="warning", choices=["warning", "critical"])
        p.add_argument("--events", default=ALL_EVENTS, help=f"comma-separated subset of {ALL_EVENTS} (default all)")
        p.set_defaults(handler=cmd_add, channel="webhook" if name == "add-webhook" else "email")
    p = sub.add_parser("list", help="routes, one a line")
    p.set_defaults(handler=cmd_list)
    for name in ("enable", "disable"):
        p = sub.add_parser(name, help=f"{name} a route")
        p.add_argument("route_id", type=int)
        p.set_defaults(handler=cmd_enable, enabled=name == "enable")
    p = sub.add_parser("test", help="queue a test message through a route")
    p.add_argument("route_id", type=int)
    p.set_defaults(handler=cmd_test)
    p = sub.add_parser("outbox", help="the newest outbox messages")
    p.add_argument("--status", choices=["pending", "sending", "sent", "dead"])
    p.add_argument("--limit", type=int, default=20)
    p.set_defaults(handler=cmd_outbox)
    p = sub.add_parser("retry", help="put a dead-lettered message back in the queue")
    p.add_argument("message_id", type=int)
    p.set_defaults(handler=cmd_retry)


@contextmanager
def _db() -> Iterator[Any]:
    from service.commands import _settings
    from service.db.migrate import upgrade
    from service.db.session import Database

    settings = _settings()
    db = Database(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
    try:
        if settings.auto_upgrade:
            upgrade(db.engine)
        yield db
    finally:
        db.dispose()


@contextmanager
def _write() -> Iterator[Any]:
    from service.errors import KilterError

    with _db() as db:
        try:
            with db.transaction() as session:
                yield session
        except KilterError as e:
            raise CommandError(e.message) from e


def _line(r: Any) -> str:
    scope = r.asset_id or "every asset"
    state = "on" if r.enabled else "off"
    return f"{r.id}\t{r.name}\t{r.channel}\t{r.target}\t{scope}\t{r.min_severity}+\t{','.join(r.events)}\t{state}"


def cmd_add(args: argparse.Namespace) -> int:
    from service.db import outbox

    events = [e.strip() for e in args.events.split(",") if e.strip()]
    target = args.url if args.channel == "webhook" else args.to
    with _write() as s:
        route, secret = outbox.add_route(s, name=args.name, channel=args.channel, target=target, actor=ACTOR, asset_id=args.asset,
                                         min_severity=args.min_severity, events=events, secret=getattr(args, "secret", None))
        line = _line(route)
    if secret is not None:
        print(secret)
        print("the line above is the route's signing secret; give it to the receiver (it is not shown again)", file=sys.stderr)
    print(f"added route {line}", file=sys.stderr)
    return 0


def cmd_list(args: argparse.Namespace) -> int:
    from service.db import outbox

    with _db() as db, db.session() as s:
        routes = outbox.list_routes(s)
    print("id\tname\tchannel\ttarget\tassets\tseverity\tevents\tstate")
    for r in routes:
        print(_line(r))
    return 0


def cmd_enable(args: argparse.Namespace) -> int:
    from service.db import outbox

    with _write() as s:
        route = outbox.set_enabled(s, route_id=args.route_id, enabled=args.enabled, actor=ACTOR)
        line = _line(route)
    print(line)
    return 0


def cmd_test(args: argparse.Namespace) -> int:
    from service.db import outbox

    with _write() as s:
        row = outbox.queue_test(s, route_id=args.route_id, actor=ACTOR)
        key = row.idempotency_key
    print(key)
    print("queued; a running service delivers it within a few seconds (see `kilter notify outbox`)", file=sys.stderr)
    return 0


def cmd_outbox(args: argparse.Namespace) -> int:
    from service.db import outbox

    with _db() as db, db.session() as s:
        rows = outbox.list_outbox(s, status=args.status, limit=max(1, min(args.limit, 200)))
    print("id\tkey\tkind\tstatus\tattempts\tlast_error")
    for r in rows:
        print(f"{r.id}\t{r.idempotency_key}\t{r.kind}\t{r.status}\t{r.attempts}\t{r.last_error or ''}")
    return 0


def cmd_retry(args: argparse.Namespace) -> int:
    from service.db import outbox

    with _write() as s:
        row = outbox.retry_dead(s, row_id=args.message_id, actor=ACTOR)
        key = row.idempotency_key
    print(f"{key} queued again")
    return 0
