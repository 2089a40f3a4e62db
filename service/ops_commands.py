"""Operations subcommands: `db backup --to FILE` (a consistent copy of a live SQLite file).

Attaches to the `db` command that service.commands registers (or creates it), so
`kilter db upgrade` and `kilter db backup` sit side by side.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from service.cli import CommandError


def _db_actions(subparsers: argparse._SubParsersAction) -> argparse._SubParsersAction:
    db = subparsers.choices.get("db")
    if db is None:
        db = subparsers.add_parser("db", help="database schema and backups")
        return db.add_subparsers(dest="db_command", metavar="ACTION", required=True)
    for action in db._actions:  # argparse keeps a parser's subcommands as one of its actions
        if isinstance(action, argparse._SubParsersAction):
            return action
    return db.add_subparsers(dest="db_command", metavar="ACTION", required=True)


def register(subparsers: argparse._SubParsersAction) -> None:
    b = _db_actions(subparsers).add_parser("backup", help="copy the live SQLite database to FILE (online backup API, checked)")
    b.add_argument("--to", required=True, type=Path, metavar="FILE", help="the copy to write (a new file)")
    b.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    b.set_defaults(handler=cmd_db_backup)


def cmd_db_backup(args: argparse.Namespace) -> int:
    from pydantic import ValidationError

    from service.backup import BackupError, backup_sqlite
    from service.settings import load_settings, settings_error_text

    try:
        settings = load_settings()
    except ValidationError as e:
        raise CommandError(f"settings: {settings_error_text(e)}") from e
    try:
        result = backup_sqlite(settings.database_url, args.to, overwrite=args.overwrite)
    except BackupError as e:
        raise CommandError(str(e)) from e
    rows = ", ".join(f"{n} {c}" for n, c in result.tables.items() if n != "alembic_version")
    print(
        f"backed up {result.source} to {result.target}: {result.size_bytes} bytes, {result.pages} pages "
        f"in {result.seconds:.2f} s; integrity ok; rows: {rows}",
        file=sys.stderr,
    )
    return 0
