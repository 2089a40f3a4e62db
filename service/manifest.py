"""The trainer <-> service contract: what a model folder's manifest.json must say.

The trainer writes it (training imports this module), the service validates it on load.
Only numpy-free pydantic here, so both halves share one definition.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

SCHEMA_VERSION = 1
MANIFEST_FILE = "manifest.json"
ONNX_FILE = "model.onnx"
CALIBRATION_FILE = "calibration_scores.json"

# Graph I/O names (DESIGN.md, "The model contract").
INPUT_NAME = "readings"
OUTPUT_NAMES = ("reconstruction", "residual", "score")

MergeMode = Literal["concat", "sum", "multiply", "average"]
ScoreMethod = Literal["mean_squared", "mahalanobis"]
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
    """

    method: ScoreMethod = "mean_squared"
    error_mean: list[float] | None = None
    error_precision: list[list[float]] | None = None


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
    onnx_file: str = ONNX_FILE
    onnx_sha256: str = Field(pattern=r"^[0-9a-f]{64}$")
    calibration_file: str = CALIBRATION_FILE
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
        if self.score.method == "mahalanobis":
            if self.score.error_mean is None or self.score.error_precision is None:
                raise ValueError("mahalanobis score needs error_mean and error_precision")
            if len(self.score.error_mean) != n or len(self.score.error_precision) != n:
                raise ValueError(f"mahalanobis parameters must be {n}-dimensional")
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
    try:
        return CalibrationScores.model_validate_json(path.read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise ValueError(f"{path}: calibration scores missing") from e
    except Exception as e:
        raise ValueError(f"{path}: {e}") from e
