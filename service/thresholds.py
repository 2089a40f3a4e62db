"""False-alarm rate <-> threshold, with a peaks-over-threshold tail fit (numpy only).

A threshold is chosen from a false-alarm budget people understand (alerts per asset per
week) by replaying held-out *normal* calibration scores through the alert rule
(service/alerting.py) and counting the alerts it would have opened. When the budget is
rarer than the calibration data can show (fewer than MIN_RESOLVABLE_ALERTS allowed over
the whole calibration stretch), the tail of the score distribution is fitted instead:

Peaks over threshold (Siffer et al., "Anomaly Detection in Streams with Extreme Value
Theory", KDD 2017): excesses over an initial threshold t (the 98% quantile) follow a
generalized Pareto distribution (shape gamma, scale sigma); for a per-window risk q

    z_q = t + (sigma / gamma) * ((q * n / N_t) ** (-gamma) - 1)      (gamma -> 0: t - sigma * ln(q n / N_t))

with n scores and N_t peaks. The budget maps to a per-window risk conservatively: an
alert needs at least on_k windows over the threshold, so at most exceedances / on_k
alerts open, and q = budget * on_k / windows_per_week keeps the alert rate within budget.

Too little data for either (fewer than MIN_TAIL_PEAKS scores above the initial threshold):
the level is set just above the highest normal calibration score ("highest_normal"), the
highest level the data can defend without extrapolating a tail it has not seen; replaying
the calibration scores then opens no alert, and all the data can say of the false-alarm
rate is that it is below one per calibration stretch. The trainer marks such a model
provisional (training/calibrate.py) and says how much more normal history it needs.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from service.alerting import AlertRule, count_alerts

WEEK_S = 7 * 86400.0
MIN_RESOLVABLE_ALERTS = 3.0  # below this many allowed alerts the empirical count is too coarse
POT_INITIAL_QUANTILE = 0.98  # Siffer et al. 2017 use the 98% quantile in their experiments
MAX_CANDIDATES = 4000
# Common practice (from memory): a generalized Pareto fit on fewer than ~30 excesses is too
# uncertain to extrapolate from; below it the level falls back to the highest normal score.
MIN_TAIL_PEAKS = 30

# What each threshold method means, spelled out for people (CLI, report, dashboard). The
# codes stay short in the manifest and the API.
METHOD_LABELS: dict[str, str] = {
    "empirical": "alerts counted on the calibration replay",
    "pot": "peaks-over-threshold tail fit (generalized Pareto)",
    "highest_normal": "highest normal calibration score (too little data for a tail fit)",
    "spaced": "warning level plus the spread of normal scores",
    "manual": "set by hand",
}


def method_label(method: str) -> str:
    """The spelled-out name of a threshold method code."""
    return METHOD_LABELS.get(method, method)


def calibrated_reason(method: str, provisional: bool = False) -> str:
    """The threshold history's reason for a model's own levels (version 1 of an asset)."""
    text = f"calibrated by the trainer: {method_label(method)}"
    return text + ("; provisional model, too little calibration data" if provisional else "")


def tail_peaks(scores: np.ndarray, initial_quantile: float = POT_INITIAL_QUANTILE) -> int:
    """How many scores lie above their `initial_quantile` (the excesses a tail fit would use)."""
    s = np.asarray(scores, dtype=np.float64)
    s = s[np.isfinite(s)]
    if len(s) == 0:
        return 0
    return int(np.count_nonzero(s > np.quantile(s, initial_quantile)))


def windows_for_tail_fit(initial_quantile: float = POT_INITIAL_QUANTILE) -> int:
    """Calibration windows needed for MIN_TAIL_PEAKS excesses above the initial quantile."""
    return int(np.ceil(MIN_TAIL_PEAKS / (1.0 - initial_quantile)))


@dataclass(frozen=True)
class GPDFit:
    """Generalized Pareto fit of the excesses over `t`: shape gamma (xi), scale sigma."""

    t: float
    gamma: float
    sigma: float
    n: int  # observations
    n_peaks: int  # N_t
    loglik: float

    def quantile(self, q: float) -> float:
        """z_q: the level exceeded with probability q per observation (Siffer et al. 2017)."""
        r = q * self.n / self.n_peaks
        if abs(self.gamma) < 1e-9:
            return self.t - self.sigma * np.log(r)
        return self.t + (self.sigma / self.gamma) * (r ** (-self.gamma) - 1.0)

    def exceedance(self, z: float) -> float:
        """P(score > z) per observation, for z >= t."""
        base = self.n_peaks / self.n
        if z <= self.t:
            return base
        y = z - self.t
        if abs(self.gamma) < 1e-9:
            return base * float(np.exp(-y / self.sigma))
        inner = 1.0 + self.gamma * y / self.sigma
        if inner <= 0:
            return 0.0
        return base * float(inner ** (-1.0 / self.gamma))


def gpd_loglik(excess: np.ndarray, gamma: float, sigma: float) -> float:
    """Log-likelihood of a GPD (location 0) on non-negative excesses."""
    y = np.asarray(excess, dtype=np.float64)
    if sigma <= 0:
        return -np.inf
    if abs(gamma) < 1e-12:
        return float(-len(y) * np.log(sigma) - y.sum() / sigma)
    z = 1.0 + gamma * y / sigma
    if np.any(z <= 0):
        return -np.inf
    return float(-len(y) * np.log(sigma) - (1.0 + 1.0 / gamma) * np.log(z).sum())


def _profile(theta: float, y: np.ndarray) -> tuple[float, float, float]:
    """Grimshaw's reduction: for theta = gamma/sigma the MLE gamma is mean(log(1 + theta y))."""
    if abs(theta) < 1e-14:
        sigma = float(y.mean())
        return -len(y) * np.log(sigma) - len(y), 0.0, sigma
    g = float(np.log1p(theta * y).mean())
    sigma = g / theta
    if sigma <= 0:
        return -np.inf, g, sigma
    return -len(y) * np.log(sigma) - len(y) * (1.0 + g), g, sigma


def fit_gpd(excess: np.ndarray) -> tuple[float, float, float]:
    """Maximum-likelihood (gamma, sigma, loglik) of a GPD with location 0 (profile over theta)."""
    y = np.asarray(excess, dtype=np.float64)
    y = y[np.isfinite(y)]
    if len(y) < 3 or float(y.max()) <= 0:
        raise ValueError(f"need at least 3 positive excesses for a tail fit, got {len(y)}")
    ymax, ymean = float(y.max()), float(y.mean())
    lo = -1.0 / ymax * (1 - 1e-9)
    neg = lo * (1 - np.geomspace(1e-8, 1, 200))
    pos = np.geomspace(1e-6 / ymean, 1e4 / ymean, 300)
    grid = np.concatenate([neg, [0.0], pos])
    values = np.array([_profile(th, y)[0] for th in grid])
    best = int(np.nanargmax(values))
    a = grid[max(best - 1, 0)]
    b = grid[min(best + 1, len(grid) - 1)]
    # Golden-section refinement inside the bracketing grid cells.
    phi = (np.sqrt(5) - 1) / 2
    c, d = b - phi * (b - a), a + phi * (b - a)
    fc, fd = _profile(c, y)[0], _profile(d, y)[0]
    for _ in range(200):
        if fc > fd:
            b, d, fd = d, c, fc
            c = b - phi * (b - a)
            fc = _profile(c, y)[0]
        else:
            a, c, fc = c, d, fd
            d = a + phi * (b - a)
            fd = _profile(d, y)[0]
        if abs(b - a) <= 1e-12 * max(1.0, abs(a) + abs(b)):
            break
    candidates = [grid[best], c, d]
    lls = [_profile(th, y) for th in candidates]
    i = int(np.argmax([v[0] for v in lls]))
    ll, gamma, sigma = lls[i]
    return gamma, sigma, float(ll)


def fit_tail(scores: np.ndarray, initial_quantile: float = POT_INITIAL_QUANTILE) -> GPDFit:
    """Peaks-over-threshold fit of the pooled scores above their `initial_quantile`."""
    s = np.asarray(scores, dtype=np.float64)
    s = s[np.isfinite(s)]
    t = float(np.quantile(s, initial_quantile))
    excess = s[s > t] - t
    gamma, sigma, ll = fit_gpd(excess)
    return GPDFit(t=t, gamma=gamma, sigma=sigma, n=len(s), n_peaks=len(excess), loglik=ll)


@dataclass(frozen=True)
class CalibrationSet:
    """Normal scores per asset, each in time order, and the total time they cover."""

    series: Sequence[np.ndarray]
    span_s: float  # summed over assets
    window_period_s: float  # time between window ends

    @property
    def weeks(self) -> float:
        return self.span_s / WEEK_S

    @property
    def windows_per_week(self) -> float:
        return WEEK_S / self.window_period_s

    @property
    def pooled(self) -> np.ndarray:
        return np.concatenate([np.asarray(s, dtype=np.float64) for s in self.series]) if self.series else np.empty(0)


def alerts_per_week(cal: CalibrationSet, rule: AlertRule) -> float:
    """Alerts per asset-week the rule opens when replayed over the calibration scores."""
    if cal.weeks <= 0:
        raise ValueError("calibration data covers no time")
    return sum(count_alerts(s, rule) for s in cal.series) / cal.weeks


@dataclass(frozen=True)
class ThresholdChoice:
    threshold: float
    method: Literal["empirical", "pot", "highest_normal", "spaced"]
    budget_per_week: float
    expected_per_week: float
    detail: dict[str, float] = field(default_factory=dict)


def _level_rule(rule: AlertRule, level: float) -> AlertRule:
    return rule.with_thresholds(level, level)


def threshold_for_budget(cal: CalibrationSet, rule: AlertRule, budget_per_week: float) -> ThresholdChoice:
    """The lowest threshold whose replayed alert rate stays within `budget_per_week`.

    Only the rule's timing (k, n, m, deadband) is used; its levels are replaced.
    """
    if not budget_per_week > 0:
        raise ValueError(f"false-alarm budget must be > 0 alerts per week, got {budget_per_week}")
    pooled = cal.pooled
    if len(pooled) == 0:
        raise ValueError("no calibration scores")
    if budget_per_week * cal.weeks >= MIN_RESOLVABLE_ALERTS:
        cands = np.unique(pooled)
        if len(cands) > MAX_CANDIDATES:
            cands = np.unique(np.quantile(pooled, np.linspace(0, 1, MAX_CANDIDATES)))
        cands = cands[cands > 0]
        lo, hi = 0, len(cands) - 1
        # Alert count falls as the threshold rises; find the first candidate within budget.
        if alerts_per_week(cal, _level_rule(rule, float(cands[hi]))) > budget_per_week:
            hi_level = float(cands[hi]) * (1 + 1e-6)
            return ThresholdChoice(hi_level, "empirical", budget_per_week, alerts_per_week(cal, _level_rule(rule, hi_level)))
        while lo < hi:
            mid = (lo + hi) // 2
            if alerts_per_week(cal, _level_rule(rule, float(cands[mid]))) <= budget_per_week:
                hi = mid
            else:
                lo = mid + 1
        level = float(cands[lo])
        return ThresholdChoice(level, "empirical", budget_per_week, alerts_per_week(cal, _level_rule(rule, level)))
    peaks = tail_peaks(pooled)
    if peaks < MIN_TAIL_PEAKS:
        top = float(np.max(pooled))
        level = top * (1 + 1e-6) if top > 0 else 1e-6
        return ThresholdChoice(
            level,
            "highest_normal",
            budget_per_week,
            1.0 / cal.weeks if cal.weeks > 0 else float("inf"),  # an upper bound: no alert in the stretch
            {"n": float(len(pooled)), "n_peaks": float(peaks), "min_peaks": float(MIN_TAIL_PEAKS)},
        )
    fit = fit_tail(pooled)
    q = min(budget_per_week * rule.on_k / cal.windows_per_week, fit.n_peaks / fit.n)
    level = max(float(fit.quantile(q)), fit.t)
    return ThresholdChoice(
        level,
        "pot",
        budget_per_week,
        expected_alerts_per_week(cal, rule, level, fit),
        {"t": fit.t, "gamma": fit.gamma, "sigma": fit.sigma, "n": fit.n, "n_peaks": fit.n_peaks, "q": q},
    )


def expected_alerts_per_week(
    cal: CalibrationSet, rule: AlertRule, warning: float, fit: GPDFit | None = None
) -> float:
    """False alerts per asset-week a warning level would raise on normal data.

    The replayed count where the calibration data shows at least one alert; below that,
    the tail fit's bound exceedance_rate * windows_per_week / on_k (see module docstring).
    """
    observed = alerts_per_week(cal, _level_rule(rule, warning))
    if observed * cal.weeks >= 1:
        return observed
    fit = fit or fit_tail(cal.pooled)
    return min(fit.exceedance(warning) * cal.windows_per_week / rule.on_k, 1.0 / cal.weeks)
