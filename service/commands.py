"""The service's subcommands: serve, keys create|list|revoke|rotate, db upgrade, replay, demo.

Settings come from KILTER_* environment variables or `.env` (service/settings.py).
`keys create` prints the key alone on one stdout line; everything else goes to stderr.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from service.cli import CommandError


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser("serve", help="run the HTTP service (upgrades a new database first)")
    p.add_argument("--host", default="127.0.0.1", help="interface to bind (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="TCP port (default 8000)")
    p.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--log-level", default="info", choices=["critical", "error", "warning", "info", "debug"])
    p.set_defaults(handler=cmd_serve)

    keys = subparsers.add_parser("keys", help="API keys")
    keys_sub = keys.add_subparsers(dest="keys_command", metavar="ACTION", required=True)
    k = keys_sub.add_parser("create", help="create a key; prints it once, alone on stdout")
    k.add_argument("--role", required=True, choices=["machine", "maintenance", "operator", "admin"])
    k.add_argument("--name", required=True, help="who or what holds the key (shown in histories)")
    k.add_argument("--assets", help="machine keys only: comma-separated asset ids the key may post for")
    k.set_defaults(handler=cmd_keys_create)
    ls = keys_sub.add_parser("list", help="list keys (id, name, role, assets, prefix, created, revoked); keys themselves are never stored")
    ls.set_defaults(handler=cmd_keys_list)
    rv = keys_sub.add_parser("revoke", help="revoke a key: its next API request gets 401 and its dashboard sessions end")
    rv.add_argument("key_id", type=int, help="the key's id (kilter keys list)")
    rv.set_defaults(handler=cmd_keys_revoke)
    ro = keys_sub.add_parser("rotate", help="replace a key by a new one with the same name, role and assets; prints the new key alone on stdout")
    ro.add_argument("key_id", type=int, help="the key's id (kilter keys list)")
    ro.set_defaults(handler=cmd_keys_rotate)

    db = subparsers.add_parser("db", help="database schema")
    db_sub = db.add_subparsers(dest="db_command", metavar="ACTION", required=True)
    u = db_sub.add_parser("upgrade", help="apply Alembic migrations up to the newest")
    u.set_defaults(handler=cmd_db_upgrade)

    r = subparsers.add_parser("replay", help="play a readings file into a running service, as machines would")
    r.add_argument("--data", required=True, type=Path, help="readings file (CSV or Parquet; wide or long layout)")
    r.add_argument("--url", required=True, help="service base URL, e.g. http://127.0.0.1:8000")
    r.add_argument("--key", required=True, help="a machine key (an admin key with --backfill)")
    r.add_argument("--speed", type=float, default=None, help="times real time (default: as fast as possible)")
    r.add_argument("--batch", type=int, default=60, help="readings per request (default 60)")
    r.add_argument("--assets", help="comma-separated subset of the file's assets")
    r.add_argument("--retries", type=int, default=6, help="retries per batch on connection errors, 5xx and 429")
    r.add_argument("--stop-on-refusal", action="store_true",
                   help="stop at the first batch the service refuses (default: skip it, report it at the end, exit 1)")
    r.add_argument("--backfill", action="store_true",
                   help="history, with an admin key: score every due window (no lateness limit), mark its alerts backfilled")
    r.set_defaults(handler=cmd_replay)

    d = subparsers.add_parser("demo", help="serve the bundled model on a fresh database and replay a demo day with faults")
    d.add_argument("--port", type=int, default=None, help="port (default 8000 when free, else any free port)")
    d.add_argument("--dir", type=Path, default=Path("var/demo"), help="folder of the demo database (default var/demo)")
    d.set_defaults(handler=cmd_demo)


def _settings():  # noqa: ANN202 - pydantic-settings validation errors become CommandError
    from pydantic import ValidationError

    from service.settings import load_settings, settings_error_text

    try:
        return load_settings()
    except ValidationError as e:
        raise CommandError(f"settings: {settings_error_text(e)}") from e


def _private_metrics_dir() -> tuple[str, str | None]:
    """A fresh folder (mode 0700) for prometheus_client's multiprocess files, given to every
    worker through PROMETHEUS_MULTIPROC_DIR before any of them imports prometheus_client
    (service/metrics.py). A folder already named there is the parent of the fresh one, so
    figures from an earlier run never leak into this one."""
    import os
    import tempfile

    from service.metrics import MULTIPROC_ENV  # imports prometheus_client only after the variable is set below

    parent = os.environ.get(MULTIPROC_ENV) or None
    if parent:
        os.makedirs(parent, mode=0o700, exist_ok=True)
    folder = tempfile.mkdtemp(prefix="kilter-metrics-", dir=parent)
    os.environ[MULTIPROC_ENV] = folder
    _pick_value_class()
    return folder, parent


def _pick_value_class() -> None:
    import prometheus_client.values

    # With one worker uvicorn serves in this very process: its values follow the variable too.
    prometheus_client.values.ValueClass = prometheus_client.values.get_value_class()


def cmd_serve(args: argparse.Namespace) -> int:
    import shutil

    if args.workers < 1:
        raise CommandError("--workers must be at least 1")
    import os

    from service.metrics import MULTIPROC_ENV

    metrics_dir, parent = _private_metrics_dir()
    try:
        return _serve(args)
    finally:
        # Leave the process as it was (the command also runs in-process, in tests).
        if parent is None:
            os.environ.pop(MULTIPROC_ENV, None)
        else:
            os.environ[MULTIPROC_ENV] = parent
        _pick_value_class()
        shutil.rmtree(metrics_dir, ignore_errors=True)


def _serve(args: argparse.Namespace) -> int:
    import uvicorn

    from service.app import StartupError, load_registry, open_database
    from service.errors import ModelError, Unavailable

    settings = _settings()
    # Fail here, with the reason, rather than in each worker's startup.
    try:
        db = open_database(settings)
    except StartupError as e:
        raise CommandError(str(e)) from e
    except Exception as e:
        raise CommandError(f"database {settings.database_url}: {e}") from e
    try:
        registry = load_registry(settings)
        # Bind model ids the database does not know yet here, once, rather than in every
        # worker at once, and check that this machine holds the versions the cluster serves.
        registry.attach(db)
    except (ModelError, Unavailable) as e:
        raise CommandError(f"refusing to start: {e.message}") from e
    finally:
        db.dispose()
    import os

    from service.http_timeouts import ENV as HEADER_TIMEOUT_ENV
    from service.http_timeouts import HeaderDeadlineProtocol

    # The workers read the head deadline from the environment (a .env value reaches them so too).
    os.environ[HEADER_TIMEOUT_ENV] = str(settings.header_timeout_s)
    served = ", ".join(f"{m.model_id}/{m.version}" for m in registry.models())
    print(f"kilter: serving {served} on http://{args.host}:{args.port} ({args.workers} worker(s))", file=sys.stderr)
    uvicorn.run(
        "service.app:app_from_env",
        factory=True,
        host=args.host,
        port=args.port,
        workers=args.workers,
        log_level=args.log_level,
        access_log=False,
        # X-Forwarded-* are believed only from KILTER_TRUSTED_PROXIES, by the app itself
        # (service/api/ratelimit.py); uvicorn would otherwise trust any loopback peer.
        proxy_headers=False,
        http=HeaderDeadlineProtocol,  # uvicorn's own protocol plus a deadline for the request head
    )
    return 0


def cmd_keys_create(args: argparse.Namespace) -> int:
    from service.db.keys import create_key
    from service.db.migrate import upgrade
    from service.db.session import Database

    settings = _settings()
    assets = [a.strip() for a in args.assets.split(",") if a.strip()] if args.assets is not None else None
    db = Database(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
    try:
        if settings.auto_upgrade:
            upgrade(db.engine)
        with db.transaction() as session:
            try:
                key, row = create_key(session, name=args.name, role=args.role, assets=assets)
            except ValueError as e:
                raise CommandError(str(e)) from e
            key_id, prefix = row.id, row.prefix
    finally:
        db.dispose()
    print(key)
    scope = f" for assets {', '.join(assets)}" if assets else ""
    print(f"created {args.role} key #{key_id} ({prefix}...) named {args.name!r}{scope}; it is shown only once", file=sys.stderr)
    return 0


def _keys_db():  # noqa: ANN202 - a Database, upgraded when the settings allow
    from service.db.migrate import upgrade
    from service.db.session import Database

    settings = _settings()
    db = Database(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
    if settings.auto_upgrade:
        upgrade(db.engine)
    return db


def cmd_keys_list(args: argparse.Namespace) -> int:
    from service.db.keys import list_keys

    db = _keys_db()
    try:
        with db.session() as s:
            rows = [(r.id, r.name, r.role, ",".join(r.assets) if r.assets else "*", r.prefix + "...",
                     r.created_at.strftime("%Y-%m-%dT%H:%M:%SZ"), r.revoked_at.strftime("%Y-%m-%dT%H:%M:%SZ") if r.revoked_at else "-")
                    for r in list_keys(s)]
    finally:
        db.dispose()
    head = ("id", "name", "role", "assets", "prefix", "created", "revoked")
    widths = [max(len(str(x)) for x in col) for col in zip(head, *rows)]
    for line in (head, *rows):
        print("  ".join(str(x).ljust(w) for x, w in zip(line, widths)).rstrip())
    return 0


def cmd_keys_revoke(args: argparse.Namespace) -> int:
    from service.db.keys import get_key, revoke_key

    db = _keys_db()
    try:
        with db.transaction() as s:
            row = get_key(s, key_id=args.key_id, for_update=True)
            if row is None:
                raise CommandError(f"no API key #{args.key_id} (kilter keys list shows them)")
            if not revoke_key(s, key_id=args.key_id, actor="cli"):
                raise CommandError(f"API key #{args.key_id} ({row.name}) is already revoked")
            name = row.name
    finally:
        db.dispose()
    print(f"revoked key #{args.key_id} named {name!r}: it is refused from its next request on, and its dashboard sessions have ended", file=sys.stderr)
    return 0


def cmd_keys_rotate(args: argparse.Namespace) -> int:
    from service.db.keys import get_key, rotate_key

    db = _keys_db()
    try:
        with db.transaction() as s:
            if get_key(s, key_id=args.key_id) is None:
                raise CommandError(f"no API key #{args.key_id} (kilter keys list shows them)")
            rotated = rotate_key(s, key_id=args.key_id, actor="cli")
            if rotated is None:
                raise CommandError(f"API key #{args.key_id} is revoked; create a new one with kilter keys create")
            key, row = rotated
            new_id, name = row.id, row.name
    finally:
        db.dispose()
    print(key)
    print(f"key #{args.key_id} replaced by key #{new_id} named {name!r} (same role and assets) and revoked; the new key is shown only once", file=sys.stderr)
    return 0


def cmd_db_upgrade(args: argparse.Namespace) -> int:
    from service.db.migrate import upgrade
    from service.db.session import Database

    settings = _settings()
    db = Database(settings.database_url, busy_timeout_ms=settings.db_busy_timeout_ms)
    try:
        before, after = upgrade(db.engine)
    except Exception as e:
        raise CommandError(f"database {settings.database_url}: upgrade failed: {e}") from e
    finally:
        db.dispose()
    if before == after:
        print(f"database already at revision {after}", file=sys.stderr)
    else:
        print(f"database upgraded from {before or 'empty'} to {after}", file=sys.stderr)
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    from service.replay import ReplayError, read_file, replay

    try:
        channels, series = read_file(args.data)
        if args.assets:
            wanted = [a.strip() for a in args.assets.split(",") if a.strip()]
            missing = [a for a in wanted if a not in series]
            if missing:
                raise ReplayError(f"{args.data}: no readings for {', '.join(missing)}; the file has {', '.join(series)}")
            series = {a: series[a] for a in wanted}
        summary = replay(url=args.url, key=args.key, channels=channels, series=series, batch=args.batch,
                         speed=args.speed, retries=args.retries, stop_on_refusal=args.stop_on_refusal,
                         backfill=args.backfill)
    except ReplayError as e:
        raise CommandError(str(e)) from e
    print(summary.line())
    for refused in summary.refused:
        print(refused.line(), file=sys.stderr)
    return 1 if summary.refused else 0


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import DemoError, run_demo

    try:
        return run_demo(folder=args.dir, port=args.port)
    except DemoError as e:
        raise CommandError(str(e)) from e
