"""Typed settings of one training run: data cut, model shape, fit, calibration.

Every default here was chosen by a measurement on the demo scenario; the measurement is
written beside the setting (see also training/model.py's docstring). The whole run's
settings travel into the manifest and the report, so a model folder describes itself.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Literal

from service.manifest import Architecture, LayerSpec, MergeMode, ScoreMethod

LossKind = Literal["mse", "huber"]


@dataclass(frozen=True)
class DataConfig:
    """Grid, window and split settings. Unset (None) step counts come from the data.

    The defaults are stated in time and converted to grid steps by
    training.dataset.resolve_data_config once the logs are read, so a 1-second and a
    10-minute log both get a window of sensible length without flags. The time defaults
    are what the bundled model (models/booster-pumps/1: 60 s grid, window 60, stride 10,
    train stride 2, fill 5) uses, so on 60-second logs they resolve to exactly its steps.
    """

    period_s: float | None = None  # sample grid period; None: the data's median sampling interval
    window_s: float = 3600.0  # window span when `window` is unset: one hour of context (bundled: 60 x 60 s)
    window: int | None = None  # grid points per window; None: window_s / period_s, clamped (see resolve_data_config)
    stride_frac: float = 1 / 6  # serving stride as a fraction of the window (bundled: 10 of 60, a window every 10 min)
    stride: int | None = None  # serving stride in grid points; None: stride_frac x window (at least 1)
    train_stride_frac: float = 1 / 30  # training windows' stride as a fraction of the window (bundled: 2 of 60)
    train_stride: int | None = None  # None: train_stride_frac x window (at least 1)
    max_fill_s: float = 300.0  # forward-fill gaps up to 5 min when `max_fill_steps` is unset (bundled: 5 x 60 s)
    max_fill_steps: int | None = None  # longest gap filled, in grid points; None: max_fill_s / period_s
    margin_s: float = 3600.0  # excluded events are widened by this on both sides
    fractions: tuple[float, float, float] = (0.70, 0.15, 0.15)  # train / validation / calibration, in time

    @property
    def resolved(self) -> bool:
        """True when every grid setting is a number (after resolve_data_config)."""
        return None not in (self.period_s, self.window, self.stride, self.train_stride, self.max_fill_steps)


@dataclass(frozen=True)
class ModelConfig:
    # Shape measured on held-out demo days and with bench/scoring.py (table in model.py):
    # 64 wide, two encoder layers and one decoder layer caught every held-out fault with no
    # false alarm, separated best (ROC-AUC 0.912 vs 0.892 for the former 16-wide 1/1), and
    # is the width at which the gate matmuls dominate, so ONNX Runtime reaches ~half the
    # single-thread matmul rate; at batch 256 it is 1.5-1.6x torch eager on a quiet
    # machine, 1.3-1.5x under load (oneDNN's LSTM is strong at large batches; see
    # DEVELOPERS.md "Benches").
    hidden: int = 64  # LSTM state width of every encoder and decoder layer
    layers: int = 2  # LSTM layers in the encoder (and in the decoder unless decoder_layers is set)
    decoder_layers: int | None = 1  # LSTM layers in the decoder; None: the same as layers
    latent: int = 4  # bottleneck width: one vector per window (wider ones reconstruct faults too)
    bidirectional: bool = True  # read the window both ways in every layer
    merge: MergeMode = "concat"  # how a bidirectional layer combines its two directions per step
    dropout: float = 0.0  # between stacked LSTM layers (only active with layers > 1)
    # Window score from the residual. mahalanobis_bias (issue 13) over mahalanobis, measured on
    # both demo seeds (README "How well it works") and on a screening split before the held-out
    # days: window ROC-AUC 0.905 -> 0.932 (seed 7), 0.850 -> 0.897 (seed 8), same events caught.
    score: ScoreMethod = "mahalanobis_bias"
    ridge: float = 1e-3  # Mahalanobis: added to Sigma's diagonal, relative to its mean variance

    def encoder_specs(self) -> list[LayerSpec]:
        return [LayerSpec(hidden=self.hidden, bidirectional=self.bidirectional, merge=self.merge)] * self.layers

    def decoder_specs(self) -> list[LayerSpec]:
        n = self.layers if self.decoder_layers is None else self.decoder_layers
        return [LayerSpec(hidden=self.hidden, bidirectional=self.bidirectional, merge=self.merge)] * n

    def architecture(self, parameters: int, flops_per_window: int) -> Architecture:
        return Architecture(
            encoder=self.encoder_specs(),
            latent=self.latent,
            decoder=self.decoder_specs(),
            dropout=self.dropout,
            parameters=parameters,
            flops_per_window=flops_per_window,
        )


@dataclass(frozen=True)
class FitConfig:
    epochs: int = 30  # upper bound; early stopping usually ends sooner
    batch_size: int = 64  # windows per optimiser step
    lr: float = 3e-3  # AdamW learning rate
    weight_decay: float = 1e-4  # AdamW decoupled weight decay
    clip_norm: float = 1.0  # gradient norm clip, guards the LSTM against rare exploding steps
    patience: int = 4  # epochs without validation improvement before stopping (best weights restored)
    min_delta: float = 1e-4  # relative improvement that counts as one
    loss: LossKind = "mse"  # training loss in scaled units
    huber_delta: float = 1.0  # only for loss="huber"
    seed: int = 7  # torch, numpy and batch order: same seed, same model
    # torch.set_num_threads. Measured (bench/training.py, the former 16-wide model, 1 M-row
    # fleet, the shared 2-core machine at load ~3): 1,937 training windows/s with 1 thread,
    # 349 with 2 (OpenMP threads of a small LSTM mostly wait on each other). Kept at 1 for
    # the 64-wide default too: the machine is shared (a second thread competes with the
    # other jobs on it) and a fixed thread count keeps the weights reproducible; the
    # default trained 218 windows/s in the bundle run (training/bundle.py). --threads 2 is
    # there for an idle machine (not measured for the 64-wide model).
    threads: int = 1
    max_train_windows: int | None = None  # per epoch, a fixed-seed subsample (None = all)
    # Issue 12, training speed (opt-in, see training/fit.py): "auto" = bfloat16 autocast where the CPU has native bfloat16
    # (AMX / AVX-512 BF16), float32 otherwise; "float32" or "bfloat16" to force (training/fit.py).
    precision: Literal["auto", "float32", "bfloat16"] = "float32"
    max_validation_windows: int = 4000  # validation loss on a fixed subset (all when fewer)


@dataclass(frozen=True)
class CalibrationConfig:
    warning_budget_per_week: float = 0.25  # false warnings per asset-week: about one a month
    critical_budget_per_week: float = 0.05  # false criticals per asset-week: about one in five months
    # Alert timing (service/alerting.py). With 10-min windows: open when 3 of the last 5
    # windows (50 min) are high, so one noisy window never alerts but a fault that lasts
    # half an hour does; return after 6 windows (1 h) below 90 % of the level, so an
    # alert hovering at the threshold does not chatter.
    on_k: int = 3
    on_n: int = 5
    off_m: int = 6
    deadband_frac: float = 0.1


@dataclass(frozen=True)
class TrainConfig:
    data: DataConfig = field(default_factory=DataConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    fit: FitConfig = field(default_factory=FitConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    model_id: str = "booster-pumps"
    version: str | None = None  # None: a UTC stamp such as 20261201T190300Z

    def as_dict(self) -> dict:
        return asdict(self)
