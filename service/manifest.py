"""The trainer <-> service contract: what a model folder's manifest.json must say.

The trainer writes it (training imports this module), the service validates it on load.
Only numpy-free pydantic here, so both halves share one definition.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path
from collections.abc import Sequence
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

SCHEMA_VERSION = 1
MANIFEST_FILE = "manifest.json"
ONNX_FILE = "model.onnx"
FILE_NAME_PATTERN = r"^[A-Za-z0-9_][A-Za-z0-9_.\-]*$"  # a plain file name: no folder, no '..', no absolute path
CALIBRATION_FILE = "calibration_scores.json"

# Graph I/O names (DESIGN.md, "The model contract").
INPUT_NAME = "readings"
OUTPUT_NAMES = ("reconstruction", "residual", "score")

MergeMode = Literal["concat", "sum", "multiply", "average"]
ScoreMethod = Literal["mean_squared", "mahalanobis", "mahalanobis_bias"]
# Spelled out in service.thresholds.METHOD_LABELS.
ThresholdMethod = Literal["empirical", "pot", "highest_normal", "spaced", "manual"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Channel(_Strict):
    name: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")
    unit: str = Field(min_length=1, max_length=32)


class Scaler(_Strict):
    """Per-channel affine scaling: scaled = (raw - center) / scale, in input order."""

    center: list[float]
    scale: list[float]

    @field_validator("scale")
    @classmethod
    def _positive(cls, v: list[float]) -> list[float]:
        if any(not (s > 0) for s in v):
            raise ValueError("every scale must be > 0")
        return v


# Plausible limits (decided here, the one home; DEVELOPERS.md repeats it). A reading is
# plausible for a channel when it lies within PLAUSIBLE_SCALES scaler scales of the
# channel's centre, widened to every value the trainer saw for that channel, and never
# beyond +-FLOAT32_SAFE. Why these numbers:
# * 10,000 scales is far outside anything a working or failing machine produces (the demo
#   pump's bearing: 31.6 +- 40,000 degC; its vibration 1.4 +- 2,260 mm/s, a hundred times
#   ISO 10816's zone D), so a real fault is always scored and alerted, never refused; what
#   it refuses are sentinels and overflows (1e300, 3e38, a float32 max sent as a value).
# * Inside it the graph's arithmetic cannot overflow float32: the scaled input stays
#   within +-1e4 (plus the training range), its squared error within ~1e8, a Mahalanobis
#   score within ~n * max|precision| * 1e8, all far below float32's 3.4e38, so no stored
#   reading can make scoring fail.
# * The raw value itself must survive the cast to float32 (the graph's input type), hence
#   the clip to +-1e38.
# A manifest written before limits existed gets them derived from its scaler on load (the
# same rule without the training range): the rule above with the centre standing in for it.
PLAUSIBLE_SCALES = 10_000.0
FLOAT32_SAFE = 1e38


class PlausibleLimits(_Strict):
    """Per-channel bounds of a plausible raw reading, in input order (rule: PLAUSIBLE_SCALES)."""

    low: list[float]
    high: list[float]
    source: Literal["training", "scaler"] = Field(
        description="training: centre +- scales widened to the training data; scaler: derived from the scaler alone"
    )

    @model_validator(mode="after")
    def _ordered(self) -> PlausibleLimits:
        if len(self.low) != len(self.high):
            raise ValueError("plausible low and high need one value per channel each")
        for lo, hi in zip(self.low, self.high):
            if not (-FLOAT32_SAFE <= lo < hi <= FLOAT32_SAFE):
                raise ValueError(f"plausible limits must satisfy -{FLOAT32_SAFE:g} <= low < high <= {FLOAT32_SAFE:g}, got {lo} .. {hi}")
        return self


def plausible_limits(
    center: Sequence[float],
    scale: Sequence[float],
    *,
    observed_low: Sequence[float] | None = None,
    observed_high: Sequence[float] | None = None,
) -> PlausibleLimits:
    """The plausible limits the trainer writes (observed_*: per-channel min and max of the
    data it trained on) or a loader derives for an older manifest (no observed range)."""
    seen_lo = observed_low if observed_low is not None else center
    seen_hi = observed_high if observed_high is not None else center
    low, high = [], []
    for c, s, lo, hi in zip(center, scale, seen_lo, seen_hi):
        low.append(max(-FLOAT32_SAFE, min(float(c), float(lo)) - PLAUSIBLE_SCALES * float(s)))
        high.append(min(FLOAT32_SAFE, max(float(c), float(hi)) + PLAUSIBLE_SCALES * float(s)))
    return PlausibleLimits(low=low, high=high, source="training" if observed_low is not None else "scaler")


class GapPolicy(_Strict):
    """How missing grid points are filled before the graph sees them (service/grid.py)."""

    method: Literal["ffill"] = "ffill"
    max_fill_steps: int = Field(ge=0, description="longest run of missing points filled; longer gaps break windows")


class LayerSpec(_Strict):
    hidden: int = Field(ge=1)
    bidirectional: bool = True
    merge: MergeMode = "concat"


class Architecture(_Strict):
    kind: Literal["lstm_reconstructor"] = "lstm_reconstructor"
    encoder: list[LayerSpec]
    latent: int = Field(ge=1, description="width of the bottleneck vector")
    decoder: list[LayerSpec]
    dropout: float = Field(ge=0, lt=1)
    parameters: int = Field(ge=0)
    flops_per_window: int = Field(ge=0, description="multiply-adds x2 of one window's forward pass")


class ScoreSpec(_Strict):
    """How the graph's `score` output is computed from the residual.

    mean_squared: mean over steps and channels of the squared error in scaled units.
    mahalanobis: per step d_t = (e_t - mu)^T Sigma^-1 (e_t - mu) with e_t = |x_t - x_hat_t|
    in scaled units (Malhotra et al. 2016), then the mean over steps.
    mahalanobis_bias: the mahalanobis score plus b^T S^-1 b with b = the window's mean signed
    error (x - x_hat, scaled units) less its normal mean, S its covariance over normal
    windows: a slow drift or wear shifts the error one way for the whole window, which the
    per-step term dilutes among the step-to-step noise (issue 13).
    """

    method: ScoreMethod = "mean_squared"
    error_mean: list[float] | None = None
    error_precision: list[list[float]] | None = None
    # issue 13, mahalanobis_bias only: normal mean and precision of the window's mean signed error.
    bias_mean: list[float] | None = None
    bias_precision: list[list[float]] | None = None


class CalibrationSummary(_Strict):
    """What the threshold calibration saw."""

    windows: int = Field(ge=0)
    assets: int = Field(ge=0)
    span_s: float = Field(ge=0, description="sum over assets of the calibration stretch's duration")
    score_quantiles: dict[str, float] = Field(default_factory=dict, description="e.g. {'0.5': .., '0.99': ..}")
    max_score: float | None = None


class Thresholds(_Strict):
    warning: float = Field(gt=0)
    critical: float = Field(gt=0)
    method: ThresholdMethod
    warning_budget_per_week: float | None = Field(default=None, ge=0, description="false alerts per asset-week")
    critical_budget_per_week: float | None = Field(default=None, ge=0)
    calibration: CalibrationSummary
    # How each level was found (issue 12); None in manifests written before these fields.
    warning_method: ThresholdMethod | None = None
    critical_method: ThresholdMethod | None = None

    @model_validator(mode="after")
    def _ordered(self) -> Thresholds:
        if self.critical < self.warning:
            raise ValueError("critical threshold must be >= warning threshold")
        return self


class Provisional(_Strict):
    """Why a model's levels are provisional: what they rest on and what would settle them."""

    reason: str
    calibration_windows: int = Field(ge=0)
    calibration_asset_days: float = Field(ge=0)
    windows_needed: int = Field(ge=0, description="calibration windows a tail fit needs")
    asset_days_needed: float = Field(ge=0, description="calibration asset-days a tail fit needs")
    advice: str = Field(description="what normal history to add, in plain words")


class AlertRuleDefaults(_Strict):
    """The alert rule's defaults (service/alerting.py); per-asset overrides live in the service."""

    on_k: int = Field(ge=1, description="open when k of the last n windows are at/above the threshold")
    on_n: int = Field(ge=1)
    off_m: int = Field(ge=1, description="return after m consecutive windows below threshold*(1-deadband)")
    deadband_frac: float = Field(ge=0, lt=1, description="fraction of the threshold subtracted for the return")

    @model_validator(mode="after")
    def _k_le_n(self) -> AlertRuleDefaults:
        if self.on_k > self.on_n:
            raise ValueError("on_k must be <= on_n")
        return self


class TrainingSummary(_Strict):
    data_sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    source: str = ""
    assets: list[str]
    rows: int = Field(ge=0)
    windows_train: int = Field(ge=0)
    windows_validation: int = Field(ge=0)
    windows_calibration: int = Field(ge=0)
    excluded_periods: int = Field(ge=0)
    start: datetime
    end: datetime
    epochs_run: int = Field(ge=0)
    seed: int


class ValidationFigures(_Strict):
    val_loss: float
    onnx_max_abs_error: float = Field(description="max |ORT - torch| over all outputs on the check windows")
    onnx_score_rel_error: float = Field(description="max relative score error ORT vs torch")
    extra: dict[str, float] = Field(default_factory=dict)


class Manifest(_Strict):
    schema_version: Literal[1] = SCHEMA_VERSION
    model_id: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")
    version: str = Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")
    created_at: datetime
    channels: list[Channel] = Field(min_length=1)
    sample_period_s: float = Field(gt=0)
    window: int = Field(ge=2, description="grid points per window")
    stride: int = Field(ge=1, description="window ends on grid indexes that are multiples of this")
    gap_policy: GapPolicy
    scaler: Scaler
    score: ScoreSpec
    thresholds: Thresholds
    alert_rule: AlertRuleDefaults
    architecture: Architecture
    training: TrainingSummary
    validation: ValidationFigures
    # File names inside the model folder, never paths: a manifest cannot point the service
    # at another folder's graph or at any other file on the machine.
    onnx_file: str = Field(default=ONNX_FILE, max_length=128, pattern=FILE_NAME_PATTERN)
    onnx_sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    calibration_file: str = Field(default=CALIBRATION_FILE, max_length=128, pattern=FILE_NAME_PATTERN)
    plausible: PlausibleLimits = Field(description="readings outside these are refused (see PLAUSIBLE_SCALES)")

    @model_validator(mode="before")
    @classmethod
    def _derive_plausible(cls, data: Any) -> Any:
        """A manifest from before plausible limits gets them from its scaler (same rule)."""
        if isinstance(data, dict) and data.get("plausible") is None and isinstance(data.get("scaler"), (dict, Scaler)):
            scaler = data["scaler"] if isinstance(data["scaler"], Scaler) else Scaler.model_validate(data["scaler"])
            data = {**data, "plausible": plausible_limits(scaler.center, scaler.scale)}
        return data
    # Issue 12: set when the thresholds rest on too little calibration data; None otherwise.
    provisional: Provisional | None = None

    @field_validator("created_at")
    @classmethod
    def _utc(cls, v: datetime) -> datetime:
        if v.tzinfo is None:
            raise ValueError("created_at must carry a time zone")
        return v.astimezone(timezone.utc)

    @model_validator(mode="after")
    def _consistent(self) -> Manifest:
        n = len(self.channels)
        names = [c.name for c in self.channels]
        if len(set(names)) != n:
            raise ValueError("channel names must be unique")
        if len(self.scaler.center) != n or len(self.scaler.scale) != n:
            raise ValueError(f"scaler needs {n} centre and scale values, one per channel")
        if len(self.plausible.low) != n:
            raise ValueError(f"plausible limits need {n} low and high values, one per channel")
        for name, c, lo, hi in zip(names, self.scaler.center, self.plausible.low, self.plausible.high):
            if not lo <= c <= hi:
                raise ValueError(f"plausible limits of {name!r} ({lo} .. {hi}) must contain the scaler centre {c}")
        if self.score.method in ("mahalanobis", "mahalanobis_bias"):
            if self.score.error_mean is None or self.score.error_precision is None:
                raise ValueError("mahalanobis score needs error_mean and error_precision")
            if len(self.score.error_mean) != n or len(self.score.error_precision) != n:
                raise ValueError(f"mahalanobis parameters must be {n}-dimensional")
        if self.score.method == "mahalanobis_bias":
            if self.score.bias_mean is None or self.score.bias_precision is None:
                raise ValueError("mahalanobis_bias score needs bias_mean and bias_precision")
            if len(self.score.bias_mean) != n or len(self.score.bias_precision) != n:
                raise ValueError(f"mahalanobis_bias parameters must be {n}-dimensional")
        return self

    @property
    def channel_names(self) -> list[str]:
        return [c.name for c in self.channels]

    @property
    def window_span_s(self) -> float:
        return self.window * self.sample_period_s

    @property
    def window_period_s(self) -> float:
        """Time between consecutive window ends."""
        return self.stride * self.sample_period_s


class CalibrationScores(_Strict):
    """Scores of the held-out normal calibration windows, per asset in time order.

    Shipped beside the manifest so the service can convert between thresholds and rates.
    `window_end_index` are grid indexes (epoch seconds / sample period).
    """

    model_id: str
    version: str
    sample_period_s: float
    stride: int
    assets: dict[str, CalibrationSeries]


class CalibrationSeries(_Strict):
    window_end_index: list[int]
    score: list[float]

    @model_validator(mode="after")
    def _same_length(self) -> CalibrationSeries:
        if len(self.window_end_index) != len(self.score):
            raise ValueError("window_end_index and score must have the same length")
        return self


CalibrationScores.model_rebuild()


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def load_manifest(model_dir: Path) -> Manifest:
    """Read and validate `model_dir/manifest.json`; raises ValueError naming the file."""
    path = Path(model_dir) / MANIFEST_FILE
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise ValueError(f"{path}: no manifest.json in this model folder") from e
    except json.JSONDecodeError as e:
        raise ValueError(f"{path}: not valid JSON ({e})") from e
    try:
        return Manifest.model_validate(raw)
    except Exception as e:  # pydantic.ValidationError carries the field paths
        raise ValueError(f"{path}: {e}") from e


def load_calibration(model_dir: Path, manifest: Manifest) -> CalibrationScores:
    path = Path(model_dir) / manifest.calibration_file
    if not path.resolve().is_relative_to(Path(model_dir).resolve()):
        raise ValueError(f"{path}: the calibration file must lie inside the model folder {model_dir}")
    try:
        return CalibrationScores.model_validate_json(path.read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise ValueError(f"{path}: calibration scores missing") from e
    except Exception as e:
        raise ValueError(f"{path}: {e}") from e
