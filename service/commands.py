"""The service's subcommands: serve, keys create, db upgrade, replay, demo.

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

    db = subparsers.add_parser("db", help="database schema")
    db_sub = db.add_subparsers(dest="db_command", metavar="ACTION", required=True)
    u = db_sub.add_parser("upgrade", help="apply Alembic migrations up to the newest")
    u.set_defaults(handler=cmd_db_upgrade)

    r = subparsers.add_parser("replay", help="play a readings file into a running service, as machines would")
    r.add_argument("--data", required=True, type=Path, help="readings file (CSV or Parquet; wide or long layout)")
    r.add_argument("--url", required=True, help="service base URL, e.g. http://127.0.0.1:8000")
    r.add_argument("--key", required=True, help="a machine key")
    r.add_argument("--speed", type=float, default=None, help="times real time (default: as fast as possible)")
    r.add_argument("--batch", type=int, default=60, help="readings per request (default 60)")
    r.add_argument("--assets", help="comma-separated subset of the file's assets")
    r.add_argument("--retries", type=int, default=6, help="retries per batch on connection errors, 5xx and 429")
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


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from service.app import StartupError, load_registry, open_database
    from service.errors import ModelError

    settings = _settings()
    if args.workers < 1:
        raise CommandError("--workers must be at least 1")
    # Fail here, with the reason, rather than in each worker's startup.
    try:
        db = open_database(settings)
        db.dispose()
    except StartupError as e:
        raise CommandError(str(e)) from e
    except Exception as e:
        raise CommandError(f"database {settings.database_url}: {e}") from e
    try:
        registry = load_registry(settings)
    except ModelError as e:
        raise CommandError(f"refusing to start: {e.message}") from e
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
                         speed=args.speed, retries=args.retries)
    except ReplayError as e:
        raise CommandError(str(e)) from e
    print(summary.line())
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import DemoError, run_demo

    try:
        return run_demo(folder=args.dir, port=args.port)
    except DemoError as e:
        raise CommandError(str(e)) from e
