"""Train end to end: a log file in, a calibrated, checked model folder out.

read logs -> prepare (grid, gap fill, exclusions, split, scaler, windows) -> fit ->
(Mahalanobis statistics on validation windows) -> calibrate thresholds -> export ONNX,
check it against PyTorch, write <out>/<model_id>/<version>/ atomically with its report.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import torch

from service import grid as G
from service.thresholds import method_label
from service.manifest import Channel, GapPolicy, Manifest, Provisional, Scaler, TrainingSummary, ValidationFigures, plausible_limits
from training.baseline_check import baseline_check
from training.calibrate import Calibration, calibrate, fit_mahalanobis, model_outputs, score_windows
from training.config import TrainConfig
from training.dataset import ArrayWindows, Prepared, prepare_with, resolve_data_config
from training.export import Parity, write_model_folder
from training.fit import FitResult, even_subset, evaluate_loss, fit, make_model
from training.logs import Event, LogSet, read_events, read_logs
from training.metrics import roc_auc, window_labels
from training.model import Reconstructor, flops_per_window
from training.report import Example, ReportInputs, write_report

Log = Callable[[str], None]
MAX_EVENT_WINDOWS = 3000  # labelled fault windows scored for the report's separation figure
PARITY_REAL_WINDOWS = 64
# Wall-clock figures go to the report only, so a rerun writes the same manifest.
TIMING_FIGURES = frozenset({"train_windows_per_s"})


def stderr_log(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def utc_stamp(now: datetime | None = None) -> str:
    """A version name such as 20261201T190300Z."""
    return (now or datetime.now(timezone.utc)).astimezone(timezone.utc).strftime("%Y%m%dT%H%M%SZ")


@dataclass
class TrainOutcome:
    folder: Path
    report_dir: Path
    manifest: Manifest
    fit: FitResult
    calibration: Calibration
    parity: Parity
    figures: dict[str, float]


@dataclass(frozen=True)
class EventWindows:
    """Windows touching labelled faults, cut from the filled (unmasked) grid; raw units."""

    windows: np.ndarray  # (N, W, C) float32
    kinds: np.ndarray  # (N,) str: the event kind each window touches
    assets: np.ndarray  # (N,) str


def event_windows(
    logs: LogSet, events: Sequence[Event], config: TrainConfig, limit: int = MAX_EVENT_WINDOWS
) -> EventWindows | None:
    """Serving-stride windows that touch a labelled fault (maintenance ignored), or None if none."""
    d = resolve_data_config(logs, config.data)
    faults = [e for e in events if e.kind != "maintenance"]
    cut, kinds, assets = [], [], []
    for name, log in logs.assets.items():
        mine = [e for e in faults if e.asset == name]
        if not mine or len(log.times_s) == 0:
            continue
        g = G.align(log.times_s, log.values, d.period_s)
        filled = G.Grid(g.start, G.fill_gaps(g.values, d.max_fill_steps))
        ends = G.window_ends(filled, d.window, d.stride)
        if len(ends) == 0:
            continue
        end_s = ends * d.period_s
        abnormal, keep = window_labels(end_s, d.window * d.period_s, d.period_s, events=[e for e in events if e.asset == name])
        chosen = ends[abnormal & keep]
        if len(chosen) == 0:
            continue
        start_s = (chosen - d.window + 1) * d.period_s
        kind = np.empty(len(chosen), dtype=object)
        for e in mine:
            kind[(start_s <= e.end_s) & (chosen * d.period_s >= e.start_s)] = e.kind
        cut.append(G.cut_windows(filled, chosen, d.window))
        kinds.append(kind.astype(str))
        assets.append(np.full(len(chosen), name))
    if not cut:
        return None
    windows, kind_arr, asset_arr = np.concatenate(cut), np.concatenate(kinds), np.concatenate(assets)
    pick = even_subset(len(windows), limit)
    return EventWindows(windows[pick], kind_arr[pick], asset_arr[pick])


def separation(
    model: Reconstructor, normal_scores: np.ndarray, faulty: EventWindows
) -> tuple[dict[str, float], np.ndarray]:
    """Fault vs normal window scores: median ratio and ROC-AUC, pooled and per fault kind."""
    fault_scores = score_windows(model, ArrayWindows(faulty.windows))
    labels = np.r_[np.zeros(len(normal_scores)), np.ones(len(fault_scores))]
    out = {
        "fault_windows": float(len(fault_scores)),
        "fault_over_normal_median": float(np.median(fault_scores) / np.median(normal_scores)),
        "fault_vs_normal_roc_auc": roc_auc(labels, np.r_[normal_scores, fault_scores]),
    }
    for kind in sorted(set(faulty.kinds.tolist())):
        s = fault_scores[faulty.kinds == kind]
        out[f"roc_auc_{kind}"] = roc_auc(np.r_[np.zeros(len(normal_scores)), np.ones(len(s))], np.r_[normal_scores, s])
    return out, fault_scores


def _log_calibration(cal: Calibration, provisional: Provisional | None, log: Log) -> None:
    """The levels with their methods spelled out, what they rest on and, if provisional, what to add."""
    for line in cal.describe().splitlines():
        log(line)
    if provisional is not None:
        log(f"PROVISIONAL model: {provisional.reason}.")
        log(f"To settle the levels: {provisional.advice}.")


def _threshold_detail(cal: Calibration) -> dict[str, dict]:
    out = {}
    for level, choice in (("warning", cal.warning), ("critical", cal.critical)):
        out[level] = {
            "method": choice.method,
            "method_label": method_label(choice.method),
            "budget_per_week": choice.budget_per_week,
            "expected_per_week": choice.expected_per_week,
            "level_chosen": choice.threshold,
            **{k: float(v) for k, v in choice.detail.items()},
        }
    out["critical"]["level_used"] = cal.rule.critical
    return out


def _examples(
    model: Reconstructor,
    prepared: Prepared,
    cal_scores: np.ndarray,
    faulty: EventWindows | None,
    fault_scores: np.ndarray,
) -> list[Example]:
    ws = prepared.parts["calibration"]
    median_i = int(np.argsort(cal_scores)[len(cal_scores) // 2])
    examples = []
    for _, recon, _, score in model_outputs(model, ws, np.array([median_i])):
        asset = str(ws.asset_of(np.array([median_i]))[0])
        examples.append(
            Example(f"normal window ({asset}, median calibration score)", ws.gather(np.array([median_i]))[0], recon[0], float(score[0]))
        )
    if faulty is not None and len(fault_scores):
        for kind in ("cavitation", "impeller_clog", "bearing_wear"):
            mask = faulty.kinds == kind
            if not np.any(mask):
                continue
            idx = np.flatnonzero(mask)
            i = int(idx[np.argsort(fault_scores[idx])[len(idx) // 2]])
            for _, recon, _, score in model_outputs(model, ArrayWindows(faulty.windows), np.array([i])):
                examples.append(
                    Example(f"faulty window ({faulty.assets[i]}, labelled {kind}, median of its kind)", faulty.windows[i], recon[0], float(score[0]))
                )
            break
    return examples


def _write_report(folder: Path, manifest: Manifest, inputs: ReportInputs) -> None:
    write_report(folder, manifest, inputs)


def train_logs(
    logs: LogSet,
    events: Sequence[Event],
    out_dir: Path,
    config: TrainConfig,
    *,
    progress: bool | None = None,
    log: Log = stderr_log,
    overwrite: bool = False,
    created_at: datetime | None = None,
    check_events: Sequence[Event] | None = None,
) -> TrainOutcome:
    """Prepare, fit, calibrate and export; returns where the model folder was written.

    `events` are kept out of training and calibration; `check_events` (default: `events`)
    are the labelled faults the separation figures and the baseline check score, never fitted on.
    """
    # Grid period, window and strides left unset come from the data (issue 13); from here
    # on the config holds numbers only, so the manifest and report record what was used.
    config = replace(config, data=resolve_data_config(logs, config.data, log))
    d, mc, fc = config.data, config.model, config.fit
    prepared = prepare_with(logs, d, events)
    parts = prepared.parts
    n_channels = len(prepared.channels)
    log(
        f"windows: train {len(parts['train'])}, validation {len(parts['validation'])}, "
        f"calibration {len(parts['calibration'])} over {len(prepared.assets)} assets"
    )
    model = make_model(mc, n_channels, d.window, prepared.scaler_center, prepared.scaler_scale, fc.seed)
    result = fit(
        model,
        parts["train"],
        parts["validation"],
        fc,
        progress=progress,
        on_epoch=lambda e, tr, va: log(f"epoch {e}: train loss {tr:.5f}, validation loss {va:.5f}"),
    )
    log(
        f"fit: {result.epochs_run} epochs in {result.seconds:.0f} s ({result.windows_per_s:.0f} windows/s, "
        f"{result.precision}), kept epoch {result.best_epoch}"
    )
    if mc.score in ("mahalanobis", "mahalanobis_bias"):
        steps = fit_mahalanobis(model, parts["validation"], mc)
        log(f"Mahalanobis error statistics fitted on {steps} validation steps")
    val_idx = even_subset(len(parts["validation"]), fc.max_validation_windows)
    val_loss = evaluate_loss(model, parts["validation"], val_idx, replace(fc, loss="mse"))
    period_window_s = d.stride * d.period_s
    cal = calibrate(
        model, parts["calibration"], prepared.span_s("calibration"), period_window_s, config.calibration, list(prepared.assets)
    )
    provisional = cal.provisional(d.fractions[2])
    _log_calibration(cal, provisional, log)
    cal_scores = cal.pooled
    figures: dict[str, float] = {
        "train_windows_per_s": result.windows_per_s,
        "calibration_warning_alerts_per_week": cal.replayed_per_week("warning"),
        "calibration_critical_alerts_per_week": cal.replayed_per_week("critical"),
    }
    checked = events if check_events is None else check_events
    faulty = event_windows(logs, checked, config) if checked else None
    fault_scores = np.empty(0)
    if faulty is not None:
        sep, fault_scores = separation(model, cal_scores, faulty)
        figures.update(sep)
        log(
            f"labelled fault windows vs normal calibration windows: median ratio "
            f"{sep['fault_over_normal_median']:.2f}, ROC-AUC {sep['fault_vs_normal_roc_auc']:.3f}"
        )
    # The honest check (issue 13): PCA fitted on the same training windows, compared on
    # held-out windows and, when known, the labelled faults (training/baseline_check.py).
    check = baseline_check(
        model,
        parts["train"],
        {"validation": parts["validation"], "calibration": parts["calibration"]},
        prepared.scaler_center,
        prepared.scaler_scale,
        normal_scores=cal_scores,
        fault_windows=None if faulty is None else faulty.windows,
        fault_scores=fault_scores,
        seed=fc.seed,
    )
    for line in check.lines():
        log(line)
    figures.update(check.figures())

    version = config.version or utc_stamp()
    created = (created_at or datetime.now(timezone.utc)).astimezone(timezone.utc)
    target = Path(out_dir) / config.model_id / version
    flops = flops_per_window(mc, n_channels, d.window)
    t_all = np.concatenate([a.times_s for a in logs.assets.values()])
    own_events = [e for e in events if e.asset in logs.assets]
    seen = np.concatenate([g.values for g in prepared.grids.values()])  # (T, C) every aligned point, NaN = missing
    plausible = plausible_limits(prepared.scaler_center, prepared.scaler_scale,
                                 observed_low=np.nanmin(seen, axis=0).tolist(), observed_high=np.nanmax(seen, axis=0).tolist())

    def build_manifest(onnx_sha256: str, parity: Parity) -> Manifest:
        return Manifest(
            model_id=config.model_id,
            version=version,
            created_at=created,
            channels=[Channel(name=c, unit=prepared.units[c]) for c in prepared.channels],
            sample_period_s=d.period_s,
            window=d.window,
            stride=d.stride,
            gap_policy=GapPolicy(max_fill_steps=d.max_fill_steps),
            scaler=Scaler(center=[float(v) for v in prepared.scaler_center], scale=[float(v) for v in prepared.scaler_scale]),
            score=model.score_spec(),
            thresholds=cal.thresholds(),
            alert_rule=cal.alert_rule_defaults(),
            architecture=mc.architecture(model.parameters_count, flops),
            training=TrainingSummary(
                data_sha256=prepared.fingerprint,
                source=Path(logs.source).name,
                assets=list(prepared.assets),
                rows=int(logs.n_rows),
                windows_train=len(parts["train"]),
                windows_validation=len(parts["validation"]),
                windows_calibration=len(parts["calibration"]),
                excluded_periods=len(own_events),
                start=datetime.fromtimestamp(float(t_all.min()), timezone.utc),
                end=datetime.fromtimestamp(float(t_all.max()), timezone.utc),
                epochs_run=result.epochs_run,
                seed=fc.seed,
            ),
            validation=ValidationFigures(
                val_loss=float(val_loss),
                onnx_max_abs_error=parity.overall_max_abs_error,
                onnx_score_rel_error=parity.score_rel_error,
                extra={k: float(v) for k, v in figures.items() if np.isfinite(v) and k not in TIMING_FIGURES},
            ),
            onnx_sha256=onnx_sha256,
            plausible=plausible,
            provisional=provisional,
        )

    examples = _examples(model, prepared, cal_scores, faulty, fault_scores)
    report_inputs = ReportInputs(
        train_loss=result.train_loss,
        val_loss=result.val_loss,
        best_epoch=result.best_epoch,
        calibration_scores=cal_scores,
        warning=cal.rule.warning,
        critical=cal.rule.critical,
        threshold_detail=_threshold_detail(cal),
        examples=examples,
        figures=figures,
        settings={**config.as_dict(), "precision_used": result.precision},
        baseline_check=check,
    )
    real = parts["validation"].gather(even_subset(len(parts["validation"]), PARITY_REAL_WINDOWS))
    manifest, parity = write_model_folder(
        target,
        model,
        build_manifest,
        cal.scores_file(config.model_id, version, d.period_s, d.stride),
        real,
        write_extras=lambda folder, m: _write_report(folder, m, report_inputs),
        overwrite=overwrite,
        seed=fc.seed,
    )
    log(f"ONNX check: score relative error {parity.score_rel_error:.2g}, max abs error {parity.overall_max_abs_error:.2g}")
    return TrainOutcome(target, target / "report", manifest, result, cal, parity, figures)


def train_file(
    data: Path,
    out_dir: Path,
    config: TrainConfig,
    *,
    exclude: Path | None = None,
    tz: str | None = None,
    units: Mapping[str, str] | None = None,
    progress: bool | None = None,
    log: Log = stderr_log,
    overwrite: bool = False,
    created_at: datetime | None = None,
    check_events: Path | None = None,
) -> TrainOutcome:
    """`kilter train`: read the log file (and events to exclude, events to check on), then train_logs."""
    torch.set_num_threads(max(int(config.fit.threads), 1))
    logs = read_logs(data, tz=tz, units=units)
    events = read_events(exclude, tz=tz) if exclude is not None else []
    checked = read_events(check_events, tz=tz) if check_events is not None else None
    log(f"read {logs.n_rows} rows of {len(logs.assets)} assets, {len(logs.channels)} channels from {data}")
    return train_logs(
        logs, events, out_dir, config, progress=progress, log=log, overwrite=overwrite, created_at=created_at, check_events=checked
    )
