"""The LSTM sequence reconstructor: raw readings in, reconstruction, residual and score out.

    readings (B, W, C) raw units
      -> scaled z = (x - centre) / scale                    (buffers, inside the graph)
      -> encoder: stacked LSTM layers (uni/bidirectional, directions merged per step)
      -> many-to-one summary: the last layer's final states, merged        (B, E)
      -> Linear to the latent vector (the information bottleneck)         (B, L)
      -> repeated over the window                                         (B, W, L)
      -> decoder: stacked LSTM layers, many-to-many                       (B, W, D)
      -> per-step Linear head, one output per channel: z_hat              (B, W, C)
      -> reconstruction = z_hat * scale + centre (raw), residual = (z - z_hat)^2 (scaled)
      -> score (B,): mean_squared, mahalanobis or mahalanobis_bias (ScoreSpec in service/manifest.py)

The exported ONNX graph is exactly this forward pass (DESIGN.md "The model contract").

Defaults (training/config.py) were chosen by measurement on the default demo scenario
(6 pumps x 42 days, seed 7, labelled events excluded from training; window 60 x 60 s,
stride 10, train_stride 2). Two things were measured: detection on held-out demo days
(README "How well it works": train on the days before 2026-10-05, 3 epochs x 8,000
windows, Mahalanobis score, evaluate the last 8 days) and scoring speed through the
service's path (bench/scoring.py: ONNX Runtime, one thread, vs torch eager, one thread;
random weights, since speed does not depend on them; best of repeats, shared machine).

    hidden latent enc/dec layers params  MFLOP/win | held-out: event F1  false/wk  ROC-AUC  PR-AUC  worst delay
      16     4       1 / 1        6,218    0.67    |           1.000     0.00     0.892    0.762   100.6 h
      64     4       1 / 1       73,994    8.58    |           1.000     0.00     0.845    0.712   116.7 h
      64     4       2 / 1      173,322   20.37    |           1.000     0.00     0.912    0.840    77.7 h

    speed (lean graph, chunks)   ORT/torch at b1    b32         b256        ORT GFLOP/s, best batch
      16/4 1/1 (old graph)            5.7x          1.9x        1.1x          5.5
      64/4 1/1                        3.3-3.9x      1.5-2.0x    1.4-1.7x     26-32
      96/4 1/1                        2.5x          1.7x        1.4x         37
      128/4 1/1                       2.5x          1.5x        1.35x        40
      64/4 2/2                        3.3-3.8x      1.6-2.0x    1.5x         40-45
      64/4 2/1                        3.9-4.5x      1.8x        1.6x         41
      64/4 2/1 bundle, quiet          3.1-3.3x   1.7-1.8x    1.51-1.58x   47-48
      64/4 2/1 bundle, loaded         2.9-3.6x   1.4-1.8x    1.3-1.5x     36-48
    (numpy float32 matmul on one thread measured 51-83 GFLOP/s in the same runs; the
    bundle rows are bench/scoring.py on models/booster-pumps/1: two runs at load < 1,
    six under other jobs' load; the batch-256 ratio is the one that falls below 1.5x
    when the machine is busy)

A 16-wide LSTM spends its time in the element-wise gate work (which scales with H), not
in the gate matmuls (H^2), so it cannot use the machine's matmul rate; at 96-128 wide
torch's oneDNN LSTM catches up with ONNX Runtime at large batches. 64 wide with a second
encoder layer is where both come closest to holding: the second layer reads the first one's 128-wide
output, so most of its work is one large input-projection matmul per window, and the
decoder stays one layer (it only unrolls the latent). It also detected best: the same
events caught with no false alarm, the window-level ROC-AUC up from 0.892 to 0.912 and
the worst detection delay down from 100.6 h to 77.7 h. The bottleneck stays at 4 numbers per
window: an earlier sweep (3 epochs x 20k windows, mean-squared score) found 32/8 and
64/16 separating faults worse than 16/4 (ROC-AUC 0.80 and 0.79 vs 0.83): given a wider
bottleneck the model learns to reconstruct the faults too.
Window 60 (one hour) spans the demand cycle's fastest swings and a whole spike burst;
stride 10 scores every 10 minutes, which the alert rule's 3-of-5 on-delay turns into a
30-50 minute confirmation. Sweeping window and stride is left for a quieter machine.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from service.manifest import LayerSpec, MergeMode, ScoreSpec
from training.config import ModelConfig

def merge_directions(forward: torch.Tensor, backward: torch.Tensor, mode: MergeMode) -> torch.Tensor:
    """Combine the two directions' outputs step by step (last axis is the feature axis)."""
    if mode == "concat":
        return torch.cat([forward, backward], dim=-1)  # (..., 2H)
    if mode == "sum":
        return forward + backward  # (..., H)
    if mode == "multiply":
        return forward * backward  # (..., H)
    if mode == "average":
        return 0.5 * (forward + backward)  # (..., H)
    raise ValueError(f"unknown merge mode {mode!r}: use concat, sum, multiply or average")


def merged_width(spec: LayerSpec) -> int:
    return 2 * spec.hidden if spec.bidirectional and spec.merge == "concat" else spec.hidden


class LSTMLayer(nn.Module):
    """One LSTM layer, uni- or bidirectional; a bidirectional layer merges its directions per step."""

    def __init__(self, input_size: int, spec: LayerSpec) -> None:
        super().__init__()
        self.spec = spec
        self.lstm = nn.LSTM(input_size, spec.hidden, batch_first=True, bidirectional=spec.bidirectional)
        self.out_size = merged_width(spec)

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """x (B, T, I) -> per-step outputs (B, T, O) and the final summary (B, O)."""
        y, (h, _) = self.lstm(x)  # y (B, T, D*H), h (D, B, H)
        if not self.spec.bidirectional:
            return y, h[0]
        hid = self.spec.hidden
        # nn.LSTM already lays the directions out as concat: slicing and re-joining them
        # would be two copies of the widest tensor (in torch and in the exported graph).
        steps = y if self.spec.merge == "concat" else merge_directions(y[..., :hid], y[..., hid:], self.spec.merge)  # (B, T, O)
        # h[0]: forward direction after the last step; h[1]: backward direction after the first.
        summary = merge_directions(h[0], h[1], self.spec.merge)  # (B, O)
        return steps, summary


class LSTMStack(nn.Module):
    def __init__(self, input_size: int, specs: list[LayerSpec], dropout: float) -> None:
        super().__init__()
        layers = []
        size = input_size
        for spec in specs:
            layers.append(LSTMLayer(size, spec))
            size = layers[-1].out_size
        self.layers = nn.ModuleList(layers)
        self.dropout = nn.Dropout(dropout)
        self.out_size = size

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """x (B, T, I) -> last layer's steps (B, T, O) and summary (B, O)."""
        summary = x[:, -1]
        for i, layer in enumerate(self.layers):
            if i > 0:
                x = self.dropout(x)
            x, summary = layer(x)
        return x, summary


class Reconstructor(nn.Module):
    """Raw readings (B, W, C) -> (reconstruction raw, residual scaled^2, score (B,))."""

    def __init__(
        self,
        config: ModelConfig,
        n_channels: int,
        window: int,
        center: np.ndarray,
        scale: np.ndarray,
    ) -> None:
        super().__init__()
        center = np.asarray(center, dtype=np.float32).reshape(-1)
        scale = np.asarray(scale, dtype=np.float32).reshape(-1)
        if center.shape != (n_channels,) or scale.shape != (n_channels,):
            raise ValueError(f"scaler needs {n_channels} centre and scale values, got {center.shape}, {scale.shape}")
        if not np.all(scale > 0):
            raise ValueError("every scaler scale must be > 0")
        self.config = config
        self.n_channels = n_channels
        self.window = window
        self.register_buffer("center", torch.from_numpy(center.copy()))
        self.register_buffer("scale", torch.from_numpy(scale.copy()))
        self.encoder = LSTMStack(n_channels, config.encoder_specs(), config.dropout)
        self.to_latent = nn.Linear(self.encoder.out_size, config.latent)
        self.decoder = LSTMStack(config.latent, config.decoder_specs(), config.dropout)
        self.head = nn.Linear(self.decoder.out_size, n_channels)
        self.score_method = config.score
        self.register_buffer("error_mean", torch.zeros(n_channels))
        self.register_buffer("error_precision", torch.eye(n_channels))
        self.register_buffer("bias_mean", torch.zeros(n_channels))  # mahalanobis_bias only
        self.register_buffer("bias_precision", torch.eye(n_channels))

    def reconstruct_scaled(self, readings: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """readings (B, W, C) raw -> (z, z_hat), both (B, W, C) in scaled units."""
        z = (readings - self.center) / self.scale  # (B, W, C)
        _, summary = self.encoder(z)  # (B, E)
        latent = self.to_latent(summary)  # (B, L)
        repeated = latent.unsqueeze(1).repeat(1, self.window, 1)  # (B, W, L)
        steps, _ = self.decoder(repeated)  # (B, W, D)
        z_hat = self.head(steps)  # (B, W, C)
        return z, z_hat

    def forward(self, readings: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        z, z_hat = self.reconstruct_scaled(readings)
        reconstruction = z_hat * self.scale + self.center  # (B, W, C) raw units
        diff = z - z_hat  # (B, W, C)
        residual = diff * diff  # (B, W, C) squared error, scaled units
        if self.score_method in ("mahalanobis", "mahalanobis_bias"):
            d = torch.abs(diff) - self.error_mean  # (B, W, C): e_t - mu
            per_step = (torch.matmul(d, self.error_precision) * d).sum(dim=-1)  # (B, W)
            score = per_step.mean(dim=1)  # (B,)
            if self.score_method == "mahalanobis_bias":
                b = diff.mean(dim=1) - self.bias_mean  # (B, C): the window's signed error bias
                score = score + (torch.matmul(b, self.bias_precision) * b).sum(dim=-1)  # (B,)
        else:
            score = residual.mean(dim=(1, 2))  # (B,)
        return reconstruction, residual, score

    def set_mahalanobis(self, error_mean: np.ndarray, error_precision: np.ndarray) -> None:
        self.error_mean.copy_(torch.as_tensor(error_mean, dtype=torch.float32))
        self.error_precision.copy_(torch.as_tensor(error_precision, dtype=torch.float32))
        self.score_method = "mahalanobis"

    def set_bias(self, bias_mean: np.ndarray, bias_precision: np.ndarray) -> None:
        """Add the window-bias term (method mahalanobis_bias); needs set_mahalanobis first."""
        self.bias_mean.copy_(torch.as_tensor(bias_mean, dtype=torch.float32))
        self.bias_precision.copy_(torch.as_tensor(bias_precision, dtype=torch.float32))
        self.score_method = "mahalanobis_bias"

    def score_spec(self) -> ScoreSpec:
        if self.score_method == "mahalanobis_bias":
            return ScoreSpec(
                method="mahalanobis_bias",
                error_mean=[float(v) for v in self.error_mean.tolist()],
                error_precision=[[float(v) for v in row] for row in self.error_precision.tolist()],
                bias_mean=[float(v) for v in self.bias_mean.tolist()],
                bias_precision=[[float(v) for v in row] for row in self.bias_precision.tolist()],
            )
        if self.score_method == "mahalanobis":
            return ScoreSpec(
                method="mahalanobis",
                error_mean=[float(v) for v in self.error_mean.tolist()],
                error_precision=[[float(v) for v in row] for row in self.error_precision.tolist()],
            )
        return ScoreSpec(method="mean_squared")

    @property
    def parameters_count(self) -> int:
        return sum(p.numel() for p in self.parameters())


def lstm_stack_flops(input_size: int, specs: list[LayerSpec], steps: int) -> tuple[int, int]:
    """(FLOPs, output width) of a stack over `steps` steps: 2 x gate multiply-adds per direction."""
    flops = 0
    size = input_size
    for spec in specs:
        directions = 2 if spec.bidirectional else 1
        # Four gates, each W_ih x + W_hh h: 4H(I + H) multiply-adds per step and direction.
        flops += 2 * directions * steps * 4 * spec.hidden * (size + spec.hidden)
        size = merged_width(spec)
    return flops, size


def flops_per_window(config: ModelConfig, n_channels: int, window: int) -> int:
    """Matmul FLOPs (2 x multiply-adds) of one window's forward pass; element-wise ops not counted."""
    enc, enc_out = lstm_stack_flops(n_channels, config.encoder_specs(), window)
    dec, dec_out = lstm_stack_flops(config.latent, config.decoder_specs(), window)
    latent = 2 * enc_out * config.latent
    head = 2 * window * dec_out * n_channels
    score = 2 * window * n_channels * n_channels if config.score in ("mahalanobis", "mahalanobis_bias") else 0
    return int(enc + dec + latent + head + score)


@dataclass(frozen=True)
class ErrorStatistics:
    """Mean and regularised precision of per-step error vectors e = |z - z_hat| (scaled units)."""

    mean: np.ndarray  # (C,)
    covariance: np.ndarray  # (C, C), ridge included
    precision: np.ndarray  # (C, C)
    steps: int  # error vectors the fit saw


def error_statistics(errors: np.ndarray, ridge: float) -> ErrorStatistics:
    """Fit mu and Sigma on error vectors (N, C) (Malhotra et al. 2016), Sigma + ridge*mean(var)*I."""
    e = np.asarray(errors, dtype=np.float64)
    if e.ndim != 2 or len(e) < 2:
        raise ValueError(f"need at least two error vectors of shape (N, C), got {e.shape}")
    mu = e.mean(axis=0)
    cov = np.cov(e, rowvar=False).reshape(e.shape[1], e.shape[1])
    cov = cov + ridge * max(float(np.mean(np.diag(cov))), 1e-12) * np.eye(e.shape[1])
    precision = np.linalg.inv(cov)
    precision = 0.5 * (precision + precision.T)
    return ErrorStatistics(mean=mu, covariance=cov, precision=precision, steps=len(e))
