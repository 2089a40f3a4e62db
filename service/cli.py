"""The `kilter` command. Each owner module registers its subcommands; training
commands are imported lazily inside their handlers, so the service never loads torch."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

# Modules exposing `register(subparsers)`; each must import only argparse-level things at
# module scope (training.commands imports torch inside its handlers).
COMMAND_MODULES = ("service.commands", "service.ops_commands", "service.notify_commands", "service.export_commands", "training.commands", "training.evaluate_commands", "training.data_commands")


class CommandError(Exception):
    """A user-facing failure: printed as `kilter: <message>` with exit status 2."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="kilter",
        description="Learn normal from equipment sensor logs, score live readings, raise calibrated alerts.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as e:
            if e.name == name:
                continue  # that half is not installed
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        result = args.handler(args)
    except CommandError as e:
        print(f"kilter: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("kilter: interrupted", file=sys.stderr)
        return 130
    return int(result or 0)


if __name__ == "__main__":
    sys.exit(main())
