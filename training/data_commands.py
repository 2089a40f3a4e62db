"""`kilter demo-data`: write the invented demo scenario (readings.csv, events.csv)."""

from __future__ import annotations

import argparse


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = subparsers.add_parser(
        "demo-data",
        help="write invented pump-station logs with labelled faults (readings.csv, events.csv)",
        description="Write DIR/readings.csv (wide layout, one row a minute per pump) and DIR/events.csv "
        "(asset,start,end,kind) for the invented booster-pump fleet; deterministic for a seed.",
    )
    p.add_argument("--out", required=True, metavar="DIR", help="folder to write (created if missing)")
    p.add_argument("--assets", type=int, default=6, metavar="N", help="number of pumps (default 6)")
    p.add_argument("--days", type=float, default=None, metavar="D", help="length in days (default 42; 1 for demo_day)")
    p.add_argument("--seed", type=int, default=7, metavar="S", help="random seed (default 7)")
    p.add_argument(
        "--start",
        default=None,
        metavar="TIME",
        help="first reading: a date (2026-10-01), ISO-8601 or epoch seconds; without an offset it is UTC, the invented "
        "district's time (default 2026-09-01T00:00:00Z for fleet; for demo_day the 24 hours up to the current minute, "
        "so a replay leaves the pumps reporting, not silent)",
    )
    p.add_argument("--scenario", choices=("fleet", "demo_day"), default="fleet", help="fleet: faults of every kind spread over the period; demo_day: normal hours then two clear faults")
    p.set_defaults(handler=run_demo_data)


def run_demo_data(args: argparse.Namespace) -> int:
    from service.cli import CommandError
    from service.grid import TimestampError, parse_timestamp
    from training import demo_data

    days = args.days if args.days is not None else (1.0 if args.scenario == "demo_day" else float(demo_data.DEFAULT_DAYS))
    try:
        start = parse_timestamp(args.start, default_tz="UTC") if args.start is not None else None
        if start is None and args.scenario == "demo_day":
            start = demo_data.recent_start(days)
        demo = demo_data.generate(assets=args.assets, days=days, seed=args.seed, start=start, scenario=args.scenario)
    except (ValueError, TimestampError) as e:
        raise CommandError(f"demo-data: {e}") from e
    readings, events = demo_data.write(demo, args.out)
    print(f"wrote {readings} ({demo.n_rows} rows, {len(demo.assets)} assets, {demo.days:g} days) and {events} ({len(demo.events)} events)")
    return 0
