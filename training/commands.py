"""`kilter train`: logs in, a calibrated, checked ONNX model folder out.

Only argparse at module scope: torch and the trainer are imported inside the handler, so
`kilter` without the train extra (the service image) still starts.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from training.config import CalibrationConfig, DataConfig, FitConfig, ModelConfig

_D, _M, _F, _C = DataConfig(), ModelConfig(), FitConfig(), CalibrationConfig()


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = subparsers.add_parser(
        "train",
        help="train, calibrate and export a model from normal equipment logs",
        description="Align the logs to the sample grid, drop the periods listed in --exclude, fit an LSTM "
        "reconstructor on normal windows, set warning/critical thresholds from false-alarm budgets, and "
        "write OUT/<model-id>/<version>/ (model.onnx, manifest.json, calibration_scores.json, report/). "
        "Prints the model folder on stdout; progress goes to stderr.",
    )
    p.add_argument("--data", required=True, type=Path, metavar="FILE", help="readings, CSV or Parquet, wide or long layout")
    p.add_argument("--out", required=True, type=Path, metavar="MODEL_DIR", help="models folder to write into")
    p.add_argument("--exclude", type=Path, metavar="EVENTS.csv", help="known fault/maintenance periods (asset,start,end,kind) kept out of training and calibration")
    p.add_argument("--events", type=Path, metavar="EVENTS.csv", help="labelled faults to check the model against (and the PCA baseline beside it), never fitted on; default: the faults in --exclude")
    p.add_argument("--tz", metavar="ZONE", help="IANA time zone of timestamps written without an offset (otherwise they are refused)")
    p.add_argument("--units", metavar="CH=UNIT,...", help="units of channels whose name does not say it, e.g. speed=rpm,level=m")

    g = p.add_argument_group("windows and grid")
    # Defaults stated in time, converted to grid points from the data's own interval (issue 13).
    g.add_argument("--period-s", type=float, default=_D.period_s, help="sample grid period in seconds (default: the data's median sampling interval; refused when assets disagree widely)")
    g.add_argument("--window-s", type=float, default=_D.window_s, help=f"window span in seconds when --window is not given (default {_D.window_s:g}: one hour; converted to 24-240 grid points)")
    g.add_argument("--window", type=int, default=_D.window, help="grid points per window (default: --window-s / period)")
    g.add_argument("--stride", type=int, default=_D.stride, help="serving stride in grid points (default: a sixth of the window)")
    g.add_argument("--train-stride", type=int, default=_D.train_stride, help="stride of training windows (default: a thirtieth of the window)")
    g.add_argument("--max-fill-steps", type=int, default=_D.max_fill_steps, help=f"longest gap forward-filled, in grid points (default: {_D.max_fill_s / 60:g} min of points)")
    g.add_argument("--margin-s", type=float, default=_D.margin_s, help=f"widen excluded periods by this on both sides (default {_D.margin_s:g})")

    m = p.add_argument_group("model")
    m.add_argument("--hidden", type=int, default=_M.hidden, help=f"LSTM state width (default {_M.hidden})")
    m.add_argument("--latent", type=int, default=_M.latent, help=f"bottleneck width (default {_M.latent})")
    m.add_argument("--layers", type=int, default=_M.layers, help=f"LSTM layers in the encoder (default {_M.layers})")
    m.add_argument("--decoder-layers", type=int, default=_M.decoder_layers, help="LSTM layers in the decoder (default: " + (str(_M.decoder_layers) if _M.decoder_layers is not None else "as --layers") + ")")
    m.add_argument("--merge", choices=("concat", "sum", "multiply", "average"), default=_M.merge, help=f"how bidirectional layers merge directions (default {_M.merge})")
    m.add_argument("--no-bidirectional", action="store_true", help="unidirectional LSTM layers")
    m.add_argument("--dropout", type=float, default=_M.dropout, help=f"between stacked layers (default {_M.dropout:g})")
    m.add_argument("--score", choices=("mean_squared", "mahalanobis", "mahalanobis_bias"), default=_M.score, help=f"window score (default {_M.score})")

    f = p.add_argument_group("fit")
    f.add_argument("--epochs", type=int, default=_F.epochs, help=f"at most this many epochs (default {_F.epochs})")
    f.add_argument("--batch-size", type=int, default=_F.batch_size, help=f"windows per step (default {_F.batch_size})")
    f.add_argument("--lr", type=float, default=_F.lr, help=f"AdamW learning rate (default {_F.lr:g})")
    f.add_argument("--patience", type=int, default=_F.patience, help=f"early-stopping patience in epochs (default {_F.patience})")
    f.add_argument("--loss", choices=("mse", "huber"), default=_F.loss, help=f"training loss in scaled units (default {_F.loss})")
    f.add_argument("--epoch-windows", type=int, default=_F.max_train_windows, help="training windows drawn per epoch (default: all)")
    f.add_argument("--seed", type=int, default=_F.seed, help=f"seed of weights and batch order (default {_F.seed})")
    f.add_argument("--threads", type=int, default=_F.threads, help=f"torch CPU threads (default {_F.threads})")
    f.add_argument("--precision", choices=("auto", "float32", "bfloat16"), default=_F.precision, help="training arithmetic: auto = bfloat16 autocast where the CPU has it natively (AMX / AVX-512 BF16), else float32; the exported model is float32 either way (default float32: bfloat16 missed the 5 %% validation-loss criterion on one of two seeds, training/fit.py)")

    c = p.add_argument_group("thresholds")
    c.add_argument("--warning-budget", type=float, default=_C.warning_budget_per_week, help=f"false warnings per asset-week (default {_C.warning_budget_per_week:g}, about one a month)")
    c.add_argument("--critical-budget", type=float, default=_C.critical_budget_per_week, help=f"false criticals per asset-week (default {_C.critical_budget_per_week:g})")

    o = p.add_argument_group("output")
    o.add_argument("--model-id", default="booster-pumps", help="model id, the folder under MODEL_DIR (default booster-pumps)")
    o.add_argument("--version", help="version folder name (default: a UTC stamp such as 20261201T190300Z)")
    p.set_defaults(handler=run_train)


def config_from_args(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from service.cli import CommandError
    from training.config import TrainConfig

    try:
        data = DataConfig(
            period_s=args.period_s,
            window_s=args.window_s,
            window=args.window,
            stride=args.stride,
            train_stride=args.train_stride,
            max_fill_steps=args.max_fill_steps,
            margin_s=args.margin_s,
        )
        model = ModelConfig(
            hidden=args.hidden,
            layers=args.layers,
            decoder_layers=args.decoder_layers,
            latent=args.latent,
            bidirectional=not args.no_bidirectional,
            merge=args.merge,
            dropout=args.dropout,
            score=args.score,
        )
        fit = FitConfig(
            epochs=args.epochs,
            batch_size=args.batch_size,
            lr=args.lr,
            patience=args.patience,
            loss=args.loss,
            seed=args.seed,
            threads=args.threads,
            max_train_windows=args.epoch_windows,
            precision=args.precision,
        )
        cal = CalibrationConfig(warning_budget_per_week=args.warning_budget, critical_budget_per_week=args.critical_budget)
        check_config(data, model, fit, cal)
    except ValueError as e:
        raise CommandError(f"train: {e}") from e
    return TrainConfig(data=data, model=model, fit=fit, calibration=cal, model_id=args.model_id, version=args.version)


def check_config(data: DataConfig, model: ModelConfig, fit: FitConfig, cal: CalibrationConfig) -> None:
    """Raise ValueError naming the option when a setting is out of range."""
    positive = {
        "--period-s": data.period_s if data.period_s is not None else 1.0,
        "--window-s": data.window_s,
        "--hidden": model.hidden,
        "--latent": model.latent,
        "--layers": model.layers,
        "--decoder-layers": model.decoder_layers if model.decoder_layers is not None else model.layers,
        "--epochs": fit.epochs,
        "--batch-size": fit.batch_size,
        "--lr": fit.lr,
        "--patience": fit.patience,
        "--threads": fit.threads,
        "--stride": data.stride if data.stride is not None else 1,
        "--train-stride": data.train_stride if data.train_stride is not None else 1,
        "--warning-budget": cal.warning_budget_per_week,
        "--critical-budget": cal.critical_budget_per_week,
    }
    for name, value in positive.items():
        if not value > 0:
            raise ValueError(f"{name} must be > 0, got {value}")
    if data.window is not None and data.window < 2:
        raise ValueError(f"--window must be at least 2 grid points, got {data.window}")
    if (data.max_fill_steps is not None and data.max_fill_steps < 0) or data.margin_s < 0:
        raise ValueError("--max-fill-steps and --margin-s must be >= 0")
    if not 0 <= model.dropout < 1:
        raise ValueError(f"--dropout must be in [0, 1), got {model.dropout}")
    if fit.max_train_windows is not None and fit.max_train_windows < 1:
        raise ValueError(f"--epoch-windows must be >= 1, got {fit.max_train_windows}")
    if cal.critical_budget_per_week > cal.warning_budget_per_week:
        raise ValueError("--critical-budget must not exceed --warning-budget (criticals are rarer than warnings)")


def run_train(args: argparse.Namespace) -> int:
    from service.cli import CommandError

    config = config_from_args(args)
    units = None
    try:
        from training.logs import DataError, parse_units

        if args.units:
            units = parse_units(args.units)
    except ValueError as e:
        raise CommandError(f"train: --units: {e}") from e

    from service.grid import TimestampError
    from training.export import ExportError
    from training.pipeline import train_file

    try:
        outcome = train_file(args.data, args.out, config, exclude=args.exclude, tz=args.tz, units=units, check_events=args.events)
    except (DataError, TimestampError, ExportError, FileNotFoundError, IsADirectoryError) as e:
        raise CommandError(f"train: {e}") from e
    except ValueError as e:
        raise CommandError(f"train: {e}") from e
    import sys

    print(f"report: {outcome.report_dir / 'report.md'}", file=sys.stderr)
    print(outcome.folder)
    return 0
