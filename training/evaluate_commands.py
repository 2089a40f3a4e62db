"""`kilter evaluate`: replay labelled history through the service's scoring and alert rule,
beside simple baselines. Heavy imports happen inside the handler."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

BASELINE_CHOICES = ("robust_z", "pca", "iforest")


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = subparsers.add_parser(
        "evaluate",
        help="measure detection quality on labelled history (event precision/recall, delay, false alarms)",
        description="Replay labelled history through the exact scoring and alert-rule code the service uses and "
        "report event-wise precision/recall/F1, detection delay, false alarms per asset-week, window-level "
        "ROC-AUC, PR-AUC and F1, optionally beside baselines fitted and calibrated the same way. By default only "
        "windows lying wholly after the model's training data are evaluated.",
    )
    p.add_argument("--model", required=True, type=Path, metavar="MODEL_DIR", help="model folder (manifest.json, model.onnx)")
    p.add_argument("--data", required=True, type=Path, metavar="FILE", help="readings, CSV or Parquet (wide or long layout)")
    p.add_argument("--events", required=True, type=Path, metavar="EVENTS.csv", help="labelled periods: asset,start,end,kind")
    p.add_argument(
        "--baselines",
        nargs="?",
        const=",".join(BASELINE_CHOICES),
        default="",
        metavar="NAMES",
        help=f"also run baselines (all when no names are given; comma-separated from {', '.join(BASELINE_CHOICES)})",
    )
    p.add_argument("--json", type=Path, metavar="FILE", help="write the figures as JSON")
    p.add_argument("--plot", type=Path, metavar="FILE", help="write a PNG of scores, thresholds, faults and alerts (default: beside --json)")
    p.add_argument("--plot-asset", metavar="ASSET", help="asset to plot (default: the one with most faults evaluated)")
    p.add_argument("--from", dest="start", metavar="TIME", help="evaluate windows starting at/after TIME (default: end of the model's training data)")
    p.add_argument("--until", dest="end", metavar="TIME", help="evaluate windows ending at/before TIME (default: end of the data)")
    p.add_argument("--tolerance-s", type=float, metavar="S", help="an alert up to S seconds after a fault's end still catches it (default: one window span)")
    p.add_argument("--ignore-kinds", default="maintenance", metavar="KINDS", help="event kinds that are neither faults nor normal (default: maintenance)")
    p.add_argument(
        "--warning-budget",
        type=float,
        metavar="PER_WEEK",
        help="re-choose the model's warning level from its calibration scores for this many false alerts per "
        "asset-week (baselines get the same budget; default: the manifest's thresholds and budget)",
    )
    p.add_argument("--tz", metavar="ZONE", help="IANA zone of naive timestamps in the files")
    p.add_argument("--units", metavar="CH=UNIT,...", help="units of channels whose names do not say")
    p.add_argument("--seed", type=int, default=0, help="seed of the baselines' sampling and isolation forest")
    p.set_defaults(handler=run_evaluate)


def run_evaluate(args: argparse.Namespace) -> int:
    from service.cli import CommandError
    from service.grid import TimestampError, parse_timestamp
    from service.scoring import ScoringError
    from training import evaluate as ev
    from training.logs import DataError, parse_units

    names = [n.strip() for n in args.baselines.split(",") if n.strip()]
    unknown = [n for n in names if n not in BASELINE_CHOICES]
    if unknown:
        raise CommandError(f"--baselines: unknown {', '.join(unknown)}; choose from {', '.join(BASELINE_CHOICES)}")
    try:
        start = parse_timestamp(args.start, args.tz) if args.start else None
        end = parse_timestamp(args.end, args.tz) if args.end else None
    except TimestampError as e:
        raise CommandError(f"--from/--until: {e}") from e
    try:
        units = parse_units(args.units) if args.units else None
        data = ev.load_inputs(args.model, args.data, args.events, tz=args.tz, units=units)
        result = ev.evaluate(
            args.model,
            data.series,
            data.events,
            baselines=names,
            baseline_splits=(lambda: ev.baseline_splits(data)) if names else None,
            start_s=start,
            end_s=end,
            tolerance_s=args.tolerance_s,
            ignore_kinds=[k.strip() for k in args.ignore_kinds.split(",") if k.strip()],
            seed=args.seed,
            budget_per_week=args.warning_budget,
        )
    except (DataError, ev.EvaluationError, ScoringError, ValueError) as e:
        raise CommandError(f"evaluate: {e}") from e
    print(ev.describe(result), file=sys.stderr)
    print(ev.table(result))
    print()
    print("faults caught by kind (caught/total):")
    print(ev.recall_table(result))
    if args.json:
        ev.write_json(result, args.json)
        print(f"wrote {args.json}", file=sys.stderr)
    plot_path = args.plot or (args.json.with_suffix(".png") if args.json else None)
    if plot_path:
        try:
            asset = ev.plot(result, data.events, plot_path, args.plot_asset)
        except ev.EvaluationError as e:
            raise CommandError(f"evaluate: {e}") from e
        print(f"wrote {plot_path} ({asset})", file=sys.stderr)
    return 0
