"""Thresholds from held-out normal windows, chosen as false-alarm budgets.

The calibration windows (the last, held-out stretch of every asset's normal data) are
scored per asset in time order and replayed through the service's alert rule
(service/alerting.py) by service.thresholds.threshold_for_budget: the warning level is the
lowest one whose replay opens at most `warning_budget_per_week` alerts per asset-week,
the critical level likewise with its own (rarer) budget. Where a budget is rarer than
the calibration stretch can resolve, threshold_for_budget fits the score tail by peaks
over threshold (Siffer et al. 2017) instead; which one was used is recorded per level.

Too little calibration data never stops a run (issue 12). The rule, in order:

1. A level the tail fit cannot support (fewer than service.thresholds.MIN_TAIL_PEAKS
   scores above the 98% quantile) is set just above the highest normal calibration
   score: the highest level the data defends without extrapolating (threshold_for_budget).
2. Critical is always strictly above warning: when its budget gives no higher level (both
   fell back to the highest score, or the fitted tail ends below the warning), critical =
   warning + (warning - median normal score), one "normal spread" above the warning.
3. A model with any level from rule 1 is provisional: Calibration.provisional() says how
   many windows and asset-days the levels rest on and how much normal history to add.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import torch

from service.alerting import AlertRule, count_alerts
from service.manifest import (
    AlertRuleDefaults,
    CalibrationScores,
    CalibrationSeries,
    CalibrationSummary,
    Provisional,
    Thresholds,
)
from service.thresholds import (
    MIN_TAIL_PEAKS,
    CalibrationSet,
    ThresholdChoice,
    alerts_per_week,
    method_label,
    tail_peaks,
    threshold_for_budget,
    windows_for_tail_fit,
)
from training.config import CalibrationConfig, ModelConfig
from training.model import Reconstructor, error_statistics

QUANTILES = (0.5, 0.9, 0.99, 0.999)


class IndexedWindows(Protocol):
    """A WindowSet: windows by index, each with its asset and absolute grid end index."""

    end_index: np.ndarray

    def __len__(self) -> int: ...

    def gather(self, idx: np.ndarray) -> np.ndarray: ...

    def asset_of(self, idx: np.ndarray) -> np.ndarray: ...


@torch.inference_mode()
def model_outputs(model: Reconstructor, windows, idx: np.ndarray | None = None, batch: int = 512):  # type: ignore[no-untyped-def]
    """Yield (idx_part, reconstruction, residual, score) numpy arrays batch by batch, eval mode."""
    model.eval()
    idx = np.arange(len(windows), dtype=np.int64) if idx is None else np.asarray(idx, dtype=np.int64)
    for start in range(0, len(idx), batch):
        part = idx[start : start + batch]
        x = torch.from_numpy(np.ascontiguousarray(windows.gather(part), dtype=np.float32))
        recon, resid, score = model(x)
        yield part, recon.numpy(), resid.numpy(), score.numpy()


def score_windows(model: Reconstructor, windows, idx: np.ndarray | None = None) -> np.ndarray:  # type: ignore[no-untyped-def]
    """Window scores (float64) of `windows[idx]` (all when idx is None), by the model's score method."""
    parts = [s for _, _, _, s in model_outputs(model, windows, idx)]
    return np.concatenate(parts).astype(np.float64) if parts else np.empty(0)


def fit_mahalanobis(model: Reconstructor, validation, config: ModelConfig, limit: int = 4000) -> int:  # type: ignore[no-untyped-def]
    """Fit mu, Sigma of e = |z - z_hat| on normal validation windows into the model; returns steps used."""
    from training.fit import even_subset

    idx = even_subset(len(validation), limit)
    errors = [np.sqrt(resid).reshape(-1, resid.shape[-1]) for _, _, resid, _ in model_outputs(model, validation, idx)]
    stats = error_statistics(np.concatenate(errors), config.ridge)
    model.set_mahalanobis(stats.mean, stats.precision)
    if config.score == "mahalanobis_bias":
        fit_window_bias(model, validation, idx, config)
    return stats.steps


def fit_window_bias(model: Reconstructor, validation, idx: np.ndarray, config: ModelConfig) -> int:  # type: ignore[no-untyped-def]
    """Fit mean and precision of each normal validation window's mean signed error (issue 13); returns windows used.

    The signed error z - z_hat is recovered from the model's own outputs: reconstruction is
    z_hat in raw units, so z - z_hat = (x - reconstruction) / scale.
    """
    scale = model.scale.numpy().astype(np.float64)
    biases = []
    for part, recon, _, _ in model_outputs(model, validation, idx):
        x = np.asarray(validation.gather(part), dtype=np.float64)
        biases.append(((x - recon) / scale).mean(axis=1))  # (B, C)
    stats = error_statistics(np.concatenate(biases), config.ridge)
    model.set_bias(stats.mean, stats.precision)
    return stats.steps


@dataclass(frozen=True)
class Calibration:
    rule: AlertRule  # timing defaults with the chosen warning and critical levels
    warning: ThresholdChoice
    critical: ThresholdChoice
    assets: list[str]
    series: dict[str, tuple[np.ndarray, np.ndarray]]  # asset -> (window_end_index, score), time order
    span_s: float
    window_period_s: float

    @property
    def pooled(self) -> np.ndarray:
        return np.concatenate([s for _, s in self.series.values()]) if self.series else np.empty(0)

    @property
    def calibration_set(self) -> CalibrationSet:
        return CalibrationSet([s for _, s in self.series.values()], self.span_s, self.window_period_s)

    @property
    def method(self) -> str:
        """The manifest's one-word method: the least supported of the two levels' methods."""
        methods = (self.warning.method, self.critical.method)
        for m in ("highest_normal", "pot"):
            if m in methods:
                return m
        return "empirical"

    @property
    def is_provisional(self) -> bool:
        return "highest_normal" in (self.warning.method, self.critical.method)

    @property
    def asset_days(self) -> float:
        return self.span_s / 86400.0

    def provisional(self, calibration_fraction: float) -> Provisional | None:
        """What the levels rest on and what to add, when the data was too little for a tail fit.

        `calibration_fraction` is the share of each asset's normal history held out for
        calibration (the last part in time), so more history adds to it in that proportion.
        """
        if not self.is_provisional:
            return None
        have = int(len(self.pooled))
        need = windows_for_tail_fit()
        need_days = need * self.window_period_s / 86400.0
        missing_days = max(need_days - self.asset_days, 0.0)
        history_days = missing_days / calibration_fraction if calibration_fraction > 0 else float("inf")
        n_assets = max(len(self.series), 1)
        per_asset = history_days / n_assets
        return Provisional(
            reason=(
                f"the thresholds rest on {have} normal calibration windows ({self.asset_days:.1f} asset-days on "
                f"{len(self.series)} assets) with {tail_peaks(self.pooled)} scores above the 98% quantile; a "
                f"peaks-over-threshold tail fit needs at least {MIN_TAIL_PEAKS} ({need} windows, "
                f"{need_days:.1f} asset-days), so the warning level is set just above the highest normal score "
                "and the false-alarm budgets are not shown to be met"
            ),
            calibration_windows=have,
            calibration_asset_days=round(self.asset_days, 3),
            windows_needed=need,
            asset_days_needed=round(need_days, 3),
            advice=(
                f"add about {per_asset:.0f} more days of normal history per asset ({history_days:.0f} asset-days in all; "
                f"calibration holds out the last {calibration_fraction:.0%} of each asset's normal data), or more assets "
                "of the same kind, then train again"
            ),
        )

    def describe(self) -> str:
        """One line per level and one on the data, for the CLI."""
        lines = [
            f"warning level {self.rule.warning:.4g}: {method_label(self.warning.method)}",
            f"critical level {self.rule.critical:.4g}: {method_label(self.critical.method)}",
            f"calibration data: {len(self.pooled)} normal windows over {self.asset_days:.1f} asset-days on "
            f"{len(self.series)} assets ({tail_peaks(self.pooled)} above the 98% quantile)",
        ]
        return "\n".join(lines)

    def replayed_per_week(self, level: str = "warning") -> float:
        """Alerts per asset-week the rule opens at the chosen warning (or critical) level."""
        value = self.rule.warning if level == "warning" else self.rule.critical
        return alerts_per_week(self.calibration_set, self.rule.with_thresholds(value, value))

    def summary(self) -> CalibrationSummary:
        pooled = self.pooled
        return CalibrationSummary(
            windows=int(len(pooled)),
            assets=len(self.series),
            span_s=float(self.span_s),
            score_quantiles={str(q): float(np.quantile(pooled, q)) for q in QUANTILES} if len(pooled) else {},
            max_score=float(pooled.max()) if len(pooled) else None,
        )

    def thresholds(self) -> Thresholds:
        return Thresholds(
            warning=float(self.rule.warning),
            critical=float(self.rule.critical),
            method=self.method,  # type: ignore[arg-type]
            warning_budget_per_week=self.warning.budget_per_week,
            critical_budget_per_week=self.critical.budget_per_week,
            calibration=self.summary(),
            warning_method=self.warning.method,
            critical_method=self.critical.method,
        )

    def alert_rule_defaults(self) -> AlertRuleDefaults:
        return AlertRuleDefaults(
            on_k=self.rule.on_k, on_n=self.rule.on_n, off_m=self.rule.off_m, deadband_frac=self.rule.deadband_frac
        )

    def scores_file(self, model_id: str, version: str, sample_period_s: float, stride: int) -> CalibrationScores:
        return CalibrationScores(
            model_id=model_id,
            version=version,
            sample_period_s=sample_period_s,
            stride=stride,
            assets={
                a: CalibrationSeries(window_end_index=[int(e) for e in ends], score=[float(s) for s in scores])
                for a, (ends, scores) in self.series.items()
            },
        )

    def false_alerts(self) -> dict[str, int]:
        """Warning alerts the chosen rule opens on each asset's calibration scores."""
        return {a: count_alerts(s, self.rule) for a, (_, s) in self.series.items()}


def per_asset_series(
    scores: np.ndarray, assets: np.ndarray, end_index: np.ndarray, names: Sequence[str] | None = None
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Split pooled window scores into per-asset (end_index, score) sequences in time order."""
    assets = np.asarray(assets)
    order_names = list(names) if names is not None else sorted({str(a) for a in assets})
    out: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name in order_names:
        mask = assets == name
        if not np.any(mask):
            continue
        ends = np.asarray(end_index)[mask]
        order = np.argsort(ends, kind="stable")
        out[str(name)] = (ends[order].astype(np.int64), np.asarray(scores)[mask][order].astype(np.float64))
    return out


def spaced_critical(cal: CalibrationSet, warning: ThresholdChoice, budget_per_week: float) -> ThresholdChoice:
    """Critical one normal spread above warning (rule 2 of the module docstring)."""
    pooled = cal.pooled
    spread = warning.threshold - float(np.median(pooled))
    level = warning.threshold + max(spread, 1e-6 * max(warning.threshold, 1.0))
    return ThresholdChoice(
        level,
        "spaced",
        budget_per_week,
        min(warning.expected_per_week, 1.0 / cal.weeks) if cal.weeks > 0 else warning.expected_per_week,
        {"warning": warning.threshold, "median_normal": float(np.median(pooled))},
    )


def choose_thresholds(
    series: dict[str, tuple[np.ndarray, np.ndarray]],
    span_s: float,
    window_period_s: float,
    config: CalibrationConfig,
) -> Calibration:
    """Warning and critical levels for the configured budgets and alert timing."""
    if not series:
        raise ValueError("no calibration windows to choose thresholds from")
    cal = CalibrationSet([s for _, s in series.values()], span_s, window_period_s)
    timing = AlertRule(
        warning=1.0, critical=1.0, on_k=config.on_k, on_n=config.on_n, off_m=config.off_m, deadband_frac=config.deadband_frac
    )
    warning = threshold_for_budget(cal, timing, config.warning_budget_per_week)
    critical = threshold_for_budget(cal, timing, config.critical_budget_per_week)
    if not critical.threshold > warning.threshold:
        critical = spaced_critical(cal, warning, critical.budget_per_week)
    rule = timing.with_thresholds(warning.threshold, critical.threshold)
    return Calibration(
        rule=rule,
        warning=warning,
        critical=critical,
        assets=list(series),
        series=series,
        span_s=span_s,
        window_period_s=window_period_s,
    )


def calibrate(
    model: Reconstructor,
    calibration: IndexedWindows,
    span_s: float,
    window_period_s: float,
    config: CalibrationConfig,
    asset_names: Sequence[str] | None = None,
) -> Calibration:
    """Score the calibration windows with the model and choose both thresholds."""
    if len(calibration) == 0:
        raise ValueError("no calibration windows: give more data or a larger calibration fraction")
    idx = np.arange(len(calibration), dtype=np.int64)
    scores = score_windows(model, calibration, idx)
    series = per_asset_series(scores, calibration.asset_of(idx), np.asarray(calibration.end_index), asset_names)
    return choose_thresholds(series, span_s, window_period_s, config)
