"""`kilter export`: stored readings and closed alerts in the trainer's input formats
(service/export_data.py). Service code only, so it runs in the torch-free image."""

from __future__ import annotations

import argparse
import sys
from datetime import datetime, timezone
from pathlib import Path

from service.cli import CommandError


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = subparsers.add_parser(
        "export",
        help="write stored readings and alert outcomes as training input (readings.csv, events.csv)",
        description="Write DIR/readings.csv (wide layout) and DIR/events.csv (asset,start,end,kind,note) from the "
        "service's database: alerts closed as confirmed faults or planned work, and unreviewed ones, become events to "
        "exclude from training; false alarms stay in as normal. Then: kilter train --data DIR/readings.csv "
        "--exclude DIR/events.csv ...",
    )
    p.add_argument("--out", required=True, type=Path, metavar="DIR", help="folder to write (created if missing)")
    p.add_argument("--asset", action="append", metavar="ID", help="an asset to export (repeat, or ID,ID,...; default: all)")
    p.add_argument("--since", metavar="TIME", help="first reading time, ISO-8601 or a date; without an offset it is UTC (default: all)")
    p.add_argument("--until", metavar="TIME", help="end of the stretch, exclusive (default: the newest reading)")
    p.add_argument("--overwrite", action="store_true", help="replace readings.csv and events.csv in DIR")
    p.set_defaults(handler=cmd_export)


def _time(value: str | None, option: str) -> datetime | None:
    from service.grid import TimestampError, parse_timestamp

    if value is None:
        return None
    try:
        return datetime.fromtimestamp(parse_timestamp(value, default_tz="UTC"), tz=timezone.utc)
    except TimestampError as e:
        raise CommandError(f"export: {option}: {e}") from e


def cmd_export(args: argparse.Namespace) -> int:
    from service.app import StartupError, open_database
    from service.commands import _settings
    from service.export_data import ExportError, export

    assets = sorted({a.strip() for item in args.asset for a in item.split(",") if a.strip()}) if args.asset else None
    since, until = _time(args.since, "--since"), _time(args.until, "--until")
    settings = _settings()
    try:
        db = open_database(settings)
    except StartupError as e:
        raise CommandError(f"export: {e}") from e
    try:
        summary = export(db, settings.model_dir, args.out, assets=assets, since=since, until=until, overwrite=args.overwrite)
    except (ExportError, OSError) as e:
        raise CommandError(f"export: {e}") from e
    finally:
        db.dispose()
    print(summary.line(), file=sys.stderr)
    units = ",".join(f"{c}={u}" for c, u in summary.units.items())
    print(
        f"next: kilter train --data {args.out / 'readings.csv'} --exclude {args.out / 'events.csv'}"
        + (f" --units {units}" if units else "")
        + " --out MODEL_DIR, then POST /v1/models/reload; evaluate with --ignore-kinds maintenance,unreviewed",
        file=sys.stderr,
    )
    print(args.out)
    return 0
