"""Replay labelled history through the service's own scoring and alert code, beside baselines.

The model's path is exactly the service's: each asset's readings are fed, in the file's
order and in batches as `kilter replay` posts them, through the service's streaming core
(service.stream: the windows a batch makes due, filled by the one gap policy of
service.grid), the due windows are scored by service.scoring.OnnxScorer, and alerts come
from service.alerting.replay (the rule's one `step`) with the manifest's thresholds and
alert timing, over the windows the live rule would see. Figures are defined in
training/metrics.py.

Which history is evaluated: by default only windows lying wholly after the end of the
model's training data (manifest `training.end`), so nothing the model or its calibration
saw is scored; `start_s`/`end_s` narrow or move that stretch.

Baselines (training/baselines.py) are fitted on the same training split as the model —
the logs up to `training.end`, cut by training.dataset.prepare with the model's data
settings and the labelled events excluded — scaled by the model's own scaler,
calibrated on the same calibration split with service.thresholds.threshold_for_budget
(the model's warning budget and alert timing), and replayed through the same rule on the
same evaluation windows.
"""

from __future__ import annotations

import json
import math
import os
import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from service import stream
from service.alerting import AlertRule, manifest_rule, replay
from service.manifest import Manifest, load_calibration, load_manifest
from service.scoring import OnnxScorer
from service.thresholds import CalibrationSet, method_label, threshold_for_budget
from training.baselines import BASELINE_NAMES, Baseline, Scaling, fit_baselines, score_windows
from training.metrics import (
    DEFAULT_IGNORE_KINDS,
    FIGURE_KEYS,
    EventLike,
    EventScores,
    Track,
    WindowScores,
    event_scores,
    figures,
    window_labels,
    window_scores,
)

CHUNK_WINDOWS = 1024  # windows cut and scored at a time, so memory stays bounded
MODEL_ROW = "kilter"


class EvaluationError(ValueError):
    """Inputs that cannot be evaluated together; the message says which and why."""


@dataclass(frozen=True)
class AssetSeries:
    """One asset's readings: epoch-second times (N,) and values (N, C) in the manifest's channel order."""

    asset: str
    times_s: np.ndarray
    values: np.ndarray


@dataclass
class DetectorResult:
    name: str
    rule: AlertRule  # levels and timing the alerts were replayed with
    threshold_method: str
    events: EventScores
    windows: WindowScores
    tracks: list[Track] = field(default_factory=list)

    @property
    def warning(self) -> float:
        return self.rule.warning

    @property
    def critical(self) -> float:
        return self.rule.critical

    def figures(self) -> dict[str, float]:
        return figures(self.events, self.windows)


@dataclass
class Evaluation:
    model: DetectorResult
    baselines: dict[str, DetectorResult]
    start_s: float
    end_s: float
    tolerance_s: float
    window_period_s: float
    window_span_s: float
    assets: list[str]
    windows: int
    abnormal_windows: int
    events_in_span: int
    budget_per_week: float | None
    notes: list[str] = field(default_factory=list)

    def rows(self) -> list[DetectorResult]:
        return [self.model, *self.baselines.values()]

    def as_json(self) -> dict:
        """The shape issue 5 gives: {"model": {...}, "baselines": {"<name>": {...}}}; NaN -> null."""

        def clean(d: dict[str, float]) -> dict[str, float | None]:
            return {k: (None if v is None or (isinstance(v, float) and math.isnan(v)) else float(v)) for k, v in d.items()}

        return {
            "model": clean(self.model.figures()),
            "baselines": {name: clean(r.figures()) for name, r in self.baselines.items()},
        }


# ------------------------------------------------------------------------ progress


def progress_enabled() -> bool:
    """A progress bar only for a person watching: not under CI, not when stderr is a file."""
    return not os.environ.get("CI") and sys.stderr.isatty()


def _bar(total: int, desc: str, show: bool):  # type: ignore[no-untyped-def]
    if not show:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit="win", file=sys.stderr, leave=False)


# ------------------------------------------------------------------------ windows


REPLAY_BATCH = 5000  # readings per batch fed to the streaming core (any size gives the same windows)


@dataclass
class DueWindows:
    """The windows the streaming core formed for one asset, as the live service would."""

    plans: list[stream.BatchPlan]
    window: int

    def ends(self) -> np.ndarray:
        """Window ends (grid indexes) the live rule sees, in the order it sees them."""
        parts = [p.ends[p.rule_saw] for p in self.plans if len(p.ends)]
        return np.concatenate(parts) if parts else np.empty(0, np.int64)

    def chunks(self, keep: Callable[[np.ndarray], np.ndarray], chunk: int = CHUNK_WINDOWS) -> Iterator[np.ndarray]:
        """The kept windows (keep(ends) is a mask over the rule's ends), cut `chunk` at a time, in order."""
        for p in self.plans:
            if not len(p.ends):
                continue
            sel = p.rule_saw.copy()
            sel[sel] = keep(p.ends[p.rule_saw])
            if not np.any(sel):
                continue
            at = np.flatnonzero(sel)
            for i in range(0, len(at), chunk):
                part = np.zeros(len(sel), dtype=bool)
                part[at[i : i + chunk]] = True
                yield p.windows(self.window, part)


def due_windows(series: AssetSeries, manifest: Manifest, *, batch: int = REPLAY_BATCH, hold_steps: int = 0) -> DueWindows:
    """Feed the asset's readings through the service's streaming core in batches of `batch`."""
    spec = stream.StreamSpec.of(manifest, hold_steps=hold_steps, lateness_windows=None)
    plans: list[stream.BatchPlan] = []
    stream.replay_series(spec, series.times_s, series.values, batch=batch, on_plan=plans.append)
    return DueWindows(plans, manifest.window)


def evaluation_ends(ends: np.ndarray, manifest: Manifest, start_s: float, end_s: float) -> np.ndarray:
    """Mask over window ends (grid indexes) whose whole window lies in [start_s, end_s]."""
    period = manifest.sample_period_s
    first_point_s = (ends - manifest.window + 1) * period
    return (first_point_s >= start_s) & (ends * period <= end_s)


# ------------------------------------------------------------------------ inputs


@dataclass(frozen=True)
class EvalInputs:
    model_dir: Path
    manifest: Manifest
    logs: object  # training.logs.LogSet, channels in the manifest's order
    events: list[EventLike]

    @property
    def series(self) -> list[AssetSeries]:
        return [AssetSeries(a.asset, a.times_s, a.values) for a in self.logs.assets.values()]  # type: ignore[attr-defined]


def load_inputs(
    model_dir: Path, data_path: Path, events_path: Path, *, tz: str | None = None, units: dict[str, str] | None = None
) -> EvalInputs:
    """Read the model's manifest, the readings (in the model's channel order) and the events."""
    from training.logs import read_events, read_logs

    model_dir = Path(model_dir)
    manifest = load_manifest(model_dir)
    logs = read_logs(data_path, tz=tz, units=units, channels=manifest.channel_names)
    for ch in manifest.channels:
        found = logs.units.get(ch.name)
        if found is not None and found != ch.unit:
            raise EvaluationError(
                f"{data_path}: channel {ch.name!r} is in {found!r} but the model was trained on {ch.unit!r}; "
                "convert the readings or give --units"
            )
    events = read_events(events_path, tz=tz)
    unknown = sorted({e.asset for e in events} - set(logs.asset_ids))
    if unknown:
        raise EvaluationError(
            f"{events_path}: events name asset(s) {', '.join(unknown)} that have no readings in {data_path}"
        )
    return EvalInputs(model_dir, manifest, logs, list(events))


# ------------------------------------------------------------------------ thresholds for baselines


@dataclass(frozen=True)
class BaselineSplits:
    """What the baselines are fitted and calibrated on: the model's own training cut."""

    train: object  # a WindowSet (len, gather)
    calibration_series: list[np.ndarray]  # raw windows per asset, time order
    calibration_span_s: float


def training_data_settings(model_dir: Path) -> dict:
    """The data settings the model was trained with (report/report.json), else the defaults."""
    from dataclasses import asdict

    from training.config import DataConfig

    settings = asdict(DataConfig())
    path = Path(model_dir) / "report" / "report.json"
    try:
        recorded = json.loads(path.read_text(encoding="utf-8")).get("settings", {}).get("data", {})
    except (OSError, ValueError, AttributeError):
        recorded = {}
    settings.update({k: v for k, v in recorded.items() if k in settings})
    return settings


def baseline_splits(data: EvalInputs) -> BaselineSplits:
    """The model's training cut rebuilt from the same logs: readings within the manifest's
    training stretch, prepared by training.dataset.prepare with the model's grid, window,
    strides, fractions and the labelled events excluded (as `kilter train --exclude`)."""
    from training.config import DataConfig
    from training.dataset import prepare_with
    from training.logs import AssetLog, LogSet

    m = data.manifest
    t0, t1 = m.training.start.timestamp(), m.training.end.timestamp()
    logs: LogSet = data.logs  # type: ignore[assignment]
    cut: dict[str, AssetLog] = {}
    for asset in m.training.assets:
        a = logs.assets.get(asset)
        if a is None:
            continue
        keep = (a.times_s >= t0) & (a.times_s <= t1)
        if np.any(keep):
            cut[asset] = AssetLog(asset, a.times_s[keep], a.values[keep], a.lines[keep])
    if not cut:
        raise EvaluationError(
            f"the data hold none of the model's training stretch ({m.training.start.isoformat()} .. "
            f"{m.training.end.isoformat()}), which the baselines are fitted on; give the file the model was trained "
            "on plus the evaluation days"
        )
    sub = LogSet(logs.source, logs.channels, logs.units, cut, logs.sha256, sum(len(a.times_s) for a in cut.values()), logs.layout)
    s = training_data_settings(data.model_dir)
    data_cfg = DataConfig(
        period_s=m.sample_period_s,
        window=m.window,
        stride=m.stride,
        train_stride=s["train_stride"],
        max_fill_steps=m.gap_policy.max_fill_steps,
        margin_s=s["margin_s"],
        fractions=tuple(s["fractions"]),
    )
    prepared = prepare_with(sub, data_cfg, data.events)
    cal = prepared.parts["calibration"]
    idx = np.arange(len(cal))
    owners = np.asarray(cal.asset_of(idx))
    ends = np.asarray(cal.end_index)
    series = []
    for asset in dict.fromkeys(owners.tolist()):
        mine = idx[owners == asset]
        mine = mine[np.argsort(ends[mine], kind="stable")]
        series.append(np.asarray(cal.gather(mine)))
    return BaselineSplits(prepared.parts["train"], series, float(prepared.span_s("calibration")))


def calibrate_baseline(
    baseline: Baseline, scaling: Scaling, splits: BaselineSplits, timing: AlertRule, budget_per_week: float, period_s: float
) -> tuple[float, str]:
    """Warning level for a baseline from the same budget and alert timing as the model."""
    series = [score_windows(baseline, scaling, w) for w in splits.calibration_series]
    cal = CalibrationSet(series, splits.calibration_span_s, period_s)
    choice = threshold_for_budget(cal, timing, budget_per_week)
    return choice.threshold, choice.method


# ------------------------------------------------------------------------ the run


def _result(
    name: str,
    rule: AlertRule,
    method: str,
    per_asset: Sequence[tuple[str, np.ndarray, np.ndarray]],
    labels: Sequence[tuple[np.ndarray, np.ndarray]],
    events: Sequence[EventLike],
    window_period_s: float,
    tolerance_s: float,
    ignore_kinds: frozenset[str],
) -> DetectorResult:
    tracks: list[Track] = []
    for asset, end_s, score in per_asset:
        spans = replay(score, rule)
        alerts = [(float(end_s[s.start]), float(end_s[s.end])) for s in spans]
        tracks.append(Track(asset, end_s, score, alerts))
    ev = event_scores(tracks, events, window_period_s, tolerance_s, ignore_kinds)
    kept_labels = [y[keep] for y, keep in labels]
    kept_scores = [score[keep] for (_, _, score), (_, keep) in zip(per_asset, labels, strict=True)]
    win = window_scores(kept_labels, kept_scores, rule.warning)
    return DetectorResult(name, rule, method, ev, win, tracks)


def evaluate(
    model_dir: Path,
    series: Sequence[AssetSeries],
    events: Sequence[EventLike],
    *,
    baselines: Sequence[str] = (),
    baseline_splits: Callable[[], BaselineSplits] | None = None,
    start_s: float | None = None,
    end_s: float | None = None,
    tolerance_s: float | None = None,
    ignore_kinds: Sequence[str] = tuple(DEFAULT_IGNORE_KINDS),
    progress: bool | None = None,
    seed: int = 0,
    budget_per_week: float | None = None,
) -> Evaluation:
    """Score every evaluation window with the model (and baselines), replay the alert rule, measure.

    `series` values must be in the manifest's channel order. `baseline_splits` builds the
    baselines' training and calibration data (called only when baselines are asked for).
    `budget_per_week` re-chooses the model's warning level from its shipped calibration
    scores for that false-alarm budget (same timing); baselines are calibrated to the same
    budget. By default the manifest's thresholds and budget are used as they are.
    """
    manifest = load_manifest(Path(model_dir))
    scorer = OnnxScorer(Path(model_dir), manifest=manifest)
    period = manifest.sample_period_s
    window_period_s = manifest.window_period_s
    window_span_s = manifest.window_span_s
    tol = window_span_s if tolerance_s is None else float(tolerance_s)
    start = manifest.training.end.timestamp() if start_s is None else float(start_s)
    end = math.inf if end_s is None else float(end_s)
    if not end > start:
        raise EvaluationError(f"the evaluation stretch is empty: start {start} is not before end {end}")
    ignore = frozenset(ignore_kinds)
    show = progress_enabled() if progress is None else progress
    notes: list[str] = []

    grids: dict[str, tuple[DueWindows, np.ndarray]] = {}
    for s in series:
        if s.values.ndim != 2 or s.values.shape[1] != len(manifest.channels):
            raise EvaluationError(
                f"asset {s.asset!r}: readings have {s.values.shape[-1]} channels, the model needs "
                f"{len(manifest.channels)} ({', '.join(manifest.channel_names)})"
            )
        due = due_windows(s, manifest)
        all_ends = due.ends()
        ends = all_ends[evaluation_ends(all_ends, manifest, start, end)]
        if len(ends):
            grids[s.asset] = (due, ends)
        else:
            notes.append(f"asset {s.asset}: no complete window in the evaluation stretch")
    if not grids:
        raise EvaluationError(
            "no window to evaluate: the data hold no complete window after the model's training data "
            f"(training ended {manifest.training.end.isoformat()}); give later data or --from"
        )

    fitted: list[Baseline] = []
    scaling = Scaling(np.asarray(manifest.scaler.center), np.asarray(manifest.scaler.scale))
    timing = manifest_rule(manifest)
    budget = manifest.thresholds.warning_budget_per_week
    model_method: str = manifest.thresholds.method
    if budget_per_week is not None:
        budget = float(budget_per_week)
        shipped = load_calibration(Path(model_dir), manifest)
        cal = CalibrationSet(
            [np.asarray(c.score, dtype=np.float64) for c in shipped.assets.values()],
            manifest.thresholds.calibration.span_s,
            window_period_s,
        )
        choice = threshold_for_budget(cal, timing, budget)
        timing = timing.with_thresholds(choice.threshold)
        model_method = choice.method
        notes.append(f"model warning level re-chosen for {budget:g} false alerts per asset-week from its calibration scores")
    baseline_rules: dict[str, tuple[AlertRule, str]] = {}
    if baselines:
        if baseline_splits is None:
            raise EvaluationError("baselines need the training data: no way to build their splits was given")
        if budget is None:
            raise EvaluationError("the model's manifest records no warning budget, so baselines cannot be calibrated alike")
        splits = baseline_splits()
        fitted = fit_baselines(splits.train, scaling, baselines, seed=seed)  # type: ignore[arg-type]
        ratio = manifest.thresholds.critical / manifest.thresholds.warning
        for b in fitted:
            level, method = calibrate_baseline(b, scaling, splits, timing, budget, window_period_s)
            baseline_rules[b.name] = (timing.with_thresholds(level, level * ratio), method)

    total = sum(len(e) for _, e in grids.values())
    bar = _bar(total, "evaluate", show)
    model_scores: list[tuple[str, np.ndarray, np.ndarray]] = []
    base_scores: dict[str, list[tuple[str, np.ndarray, np.ndarray]]] = {b.name: [] for b in fitted}
    labels: list[tuple[np.ndarray, np.ndarray]] = []
    by_asset: dict[str, list[EventLike]] = {}
    for ev in events:
        by_asset.setdefault(ev.asset, []).append(ev)
    for asset, (due, ends) in grids.items():
        end_times = ends.astype(np.float64) * period
        m_parts: list[np.ndarray] = []
        b_parts: dict[str, list[np.ndarray]] = {b.name: [] for b in fitted}
        keep = lambda e: evaluation_ends(e, manifest, start, end)  # noqa: E731
        for raw in due.chunks(keep):
            m_parts.append(scorer.score(raw).score.astype(np.float64))
            for b in fitted:
                b_parts[b.name].append(score_windows(b, scaling, raw))
            if bar is not None:
                bar.update(len(raw))
        model_scores.append((asset, end_times, np.concatenate(m_parts)))
        for b in fitted:
            base_scores[b.name].append((asset, end_times, np.concatenate(b_parts[b.name])))
        labels.append(window_labels(end_times, window_span_s, period, by_asset.get(asset, []), ignore))
    if bar is not None:
        bar.close()

    model = _result(
        MODEL_ROW, timing, model_method, model_scores, labels, events, window_period_s, tol, ignore
    )
    results = {
        name: _result(name, rule, method, base_scores[name], labels, events, window_period_s, tol, ignore)
        for name, (rule, method) in baseline_rules.items()
    }
    first = min(float(t[0]) for _, t, _ in model_scores) - window_span_s + period
    last = max(float(t[-1]) for _, t, _ in model_scores)
    return Evaluation(
        model=model,
        baselines=results,
        start_s=first,
        end_s=last,
        tolerance_s=tol,
        window_period_s=window_period_s,
        window_span_s=window_span_s,
        assets=list(grids),
        windows=model.windows.windows,
        abnormal_windows=model.windows.abnormal_windows,
        events_in_span=len(model.events.outcomes),
        budget_per_week=budget,
        notes=notes,
    )


# ------------------------------------------------------------------------ output


def _fmt(v: float | None, kind: str) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if kind == "s":
        return f"{v / 60:.0f} min" if v < 3 * 3600 else f"{v / 3600:.1f} h"
    if kind == "rate":
        return f"{v:.2f}"
    return f"{v:.3f}"


def table(ev: Evaluation) -> str:
    """The comparison as a fixed-width text table (also valid Markdown)."""
    head = [
        "detector",
        "event P",
        "event R",
        "event F1",
        "false/asset-wk",
        "median delay",
        "worst delay",
        "ROC-AUC",
        "PR-AUC",
        "F1",
        "F1 (PA)",
    ]
    rows = []
    for r in ev.rows():
        f = r.figures()
        rows.append(
            [
                r.name,
                _fmt(f["event_precision"], "p"),
                _fmt(f["event_recall"], "p"),
                _fmt(f["event_f1"], "p"),
                _fmt(f["false_alarms_per_asset_week"], "rate"),
                _fmt(f["median_delay_s"], "s"),
                _fmt(f["worst_delay_s"], "s"),
                _fmt(f["roc_auc"], "p"),
                _fmt(f["pr_auc"], "p"),
                _fmt(f["f1"], "p"),
                _fmt(r.windows.f1_point_adjusted, "p"),
            ]
        )
    widths = [max(len(h), *(len(row[i]) for row in rows)) for i, h in enumerate(head)]
    line = lambda cells: "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)) + " |"  # noqa: E731
    out = [line(head), "|" + "|".join("-" * (w + 2) for w in widths) + "|"]
    out += [line(row) for row in rows]
    return "\n".join(out)


def recall_table(ev: Evaluation) -> str:
    kinds = sorted({k for r in ev.rows() for k in r.events.recall_by_kind()})
    head = ["detector", *kinds]
    rows = []
    for r in ev.rows():
        by = r.events.recall_by_kind()
        rows.append([r.name, *(f"{by[k][0]}/{by[k][1]}" if k in by else "-" for k in kinds)])
    widths = [max(len(h), *(len(row[i]) for row in rows)) for i, h in enumerate(head)]
    line = lambda cells: "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)) + " |"  # noqa: E731
    return "\n".join([line(head), "|" + "|".join("-" * (w + 2) for w in widths) + "|", *(line(r) for r in rows)])


def describe(ev: Evaluation) -> str:
    from datetime import datetime, timezone

    def iso(t: float) -> str:
        return datetime.fromtimestamp(t, timezone.utc).strftime("%Y-%m-%dT%H:%MZ")

    weeks = ev.model.events.evaluated_s / (7 * 86400)
    lines = [
        f"evaluated {iso(ev.start_s)} .. {iso(ev.end_s)}: {len(ev.assets)} assets, {weeks:.2f} asset-weeks, "
        f"{ev.windows} windows ({ev.abnormal_windows} touching a fault), {ev.events_in_span} faults",
        f"a fault is caught by an alert overlapping [start, end + {ev.tolerance_s / 60:g} min]; "
        f"planned work (maintenance) is neither fault nor false alarm; "
        f"F1 = window-level, score >= warning, no point adjustment; F1 (PA) = point-adjusted, shown only beside it",
        "thresholds: "
        + ", ".join(f"{r.name} {r.warning:.4g} ({method_label(r.threshold_method)})" for r in ev.rows())
        + (f"; budget {ev.budget_per_week:g} false alerts per asset-week" if ev.budget_per_week is not None else ""),
    ]
    return "\n".join(lines + ev.notes)


def write_json(ev: Evaluation, path: Path) -> None:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(ev.as_json(), indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, path)


def busiest_asset(ev: Evaluation) -> str:
    counts = {a: 0 for a in ev.assets}
    for o in ev.model.events.outcomes:
        counts[o.asset] = counts.get(o.asset, 0) + 1
    return max(ev.assets, key=lambda a: (counts.get(a, 0), a == ev.assets[0]))


def time_axis(ax) -> None:  # type: ignore[no-untyped-def]
    """A UTC date axis whose ticks suit the span: hours within a day, days across weeks.

    A fixed month-day format labelled every tick of a one-day plot with the same date;
    matplotlib's concise formatter names the date once and the hours beside it.
    """
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator(minticks=4, maxticks=10)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.set_xlabel("UTC")


def plot(ev: Evaluation, events: Sequence[EventLike], path: Path, asset: str | None = None) -> str:
    """PNG of one asset: each detector's score over time with its threshold, faults and alerts."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    asset = asset or busiest_asset(ev)
    if asset not in ev.assets:
        raise EvaluationError(f"no evaluated windows for asset {asset!r}; evaluated assets: {', '.join(ev.assets)}")
    rows = ev.rows()
    fig, axes = plt.subplots(len(rows), 1, figsize=(11, 1.9 * len(rows) + 0.8), sharex=True, squeeze=False)
    to_dt = lambda t: np.asarray(t, dtype="datetime64[s]").astype("datetime64[ms]").astype(object)  # noqa: E731
    lo, hi = ev.start_s, ev.end_s
    faults = [e for e in events if e.asset == asset and e.end_s >= lo and e.start_s <= hi]
    for ax, r in zip(axes[:, 0], rows, strict=True):
        track = next(t for t in r.tracks if t.asset == asset)
        ratio = np.maximum(track.score / r.warning, 1e-3)
        ax.plot(to_dt(np.round(track.end_s)), ratio, color="#22313f", linewidth=0.8, label="score / warning")
        ax.axhline(1.0, color="#c9822b", linewidth=1, linestyle="--", label="warning")
        ax.axhline(r.critical / r.warning, color="#b03a2e", linewidth=1, linestyle=":", label="critical")
        ax.set_yscale("log")
        for e in faults:
            colour = "#9aa5ad" if e.kind in DEFAULT_IGNORE_KINDS else "#e9c46a"
            ax.axvspan(to_dt(round(e.start_s)), to_dt(round(e.end_s)), color=colour, alpha=0.45, linewidth=0)
        for a0, a1 in track.alerts:
            ax.axvspan(to_dt(round(a0)), to_dt(round(max(a1, a0 + ev.window_period_s))), ymin=0.0, ymax=0.06, color="#b03a2e")
        ax.set_ylabel(r.name, fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0, 0].set_title(
        f"{asset}: score relative to each detector's warning level; faults shaded (grey = planned work), "
        "alerts as red bars",
        fontsize=9,
    )
    axes[0, 0].legend(fontsize=7, loc="upper left")
    for e in faults:
        axes[-1, 0].annotate(e.kind, (to_dt(round(max(e.start_s, lo))), 0.02), xycoords=("data", "axes fraction"), fontsize=6, rotation=90, va="bottom")
    axes[-1, 0].set_xlim(to_dt(round(lo)), to_dt(round(hi)))
    time_axis(axes[-1, 0])
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return asset


__all__ = [
    "BASELINE_NAMES",
    "FIGURE_KEYS",
    "AssetSeries",
    "BaselineSplits",
    "Evaluation",
    "EvaluationError",
    "evaluate",
    "plot",
    "recall_table",
    "table",
    "write_json",
]
