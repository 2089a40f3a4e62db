"""Fit the reconstructor on normal windows: AdamW, gradient clipping, early stopping.

Deterministic for a seed: the weights are initialised right after torch.manual_seed(seed),
and the batch order comes from numpy's Generator(seed), so two runs with the same data
and settings give identical weights (tests/training/test_model.py checks it).
Batches are gathered from a WindowSet by index, so no full copy of the windows is made.

Precision (FitConfig.precision, issue 12). "float32" (the default) as before; "auto" trains
under bfloat16 autocast when the CPU has native bfloat16 arithmetic (the `amx_bf16` or
`avx512_bf16` flag in /proc/cpuinfo, checked at run time) and in float32 otherwise;
"bfloat16" forces it. Under autocast the LSTM and Linear layers compute in bfloat16 while
the weights, the gradients, AdamW's state, the loss and every validation, calibration and
export pass stay float32, so the exported ONNX model is float32 and parity-checked as before.

Measured (2026-12-03, this 2-core AMX machine, torch 2.13.0): bench/training.py on a quiet
machine, the default model, one thread: float32 batch 64 831 windows/s (31 % of the
one-thread float32 matmul rate, forward + backward), bfloat16 1,298 (1.56x), bfloat16 at
batch 32 1,496 (1.8x); batch 256 with the learning rate x2 was no faster (0.87x in
float32, 1.58x in bfloat16); a second thread gave 1.72x with bfloat16 on the idle machine
but is 3-10x slower whenever another job holds the other core; torch.compile took 165 s to
compile one training step (loaded machine), more than it could save on runs of this size,
so it is not used.
Quality, the README's held-out run (3 epochs x 8,000 windows): validation loss 0.03261
(float32) vs 0.03456 (bfloat16, +6.0 %) with seed 7, 0.03409 vs 0.03408 with
--seed 8 (weights and batch order);
the held-out event figures matched (seed 7: P = R = F1 = 1.000, 0 false alerts in both;
seed 8: F1 0.880 vs 0.889). One seed misses the 5 % loss criterion, so float32 stays the
default and bfloat16 is `kilter train --precision auto`.
"""

from __future__ import annotations

import copy
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import torch
from torch.nn import functional as F

from training.config import FitConfig, ModelConfig
from training.model import Reconstructor


class Windows(Protocol):
    """What fit needs from a WindowSet (training/dataset.py) or ArrayWindows."""

    def __len__(self) -> int: ...

    def gather(self, idx: np.ndarray) -> np.ndarray: ...


def make_model(
    config: ModelConfig, n_channels: int, window: int, center: np.ndarray, scale: np.ndarray, seed: int
) -> Reconstructor:
    """A freshly initialised model; the same seed gives the same initial weights."""
    torch.manual_seed(seed)
    return Reconstructor(config, n_channels, window, center, scale)


def progress_enabled() -> bool:
    """A progress bar only for a person watching: not under CI, not when stderr is a file."""
    return not os.environ.get("CI") and sys.stderr.isatty()


CPU_BF16_FLAGS = ("amx_bf16", "avx512_bf16")


def cpu_has_native_bf16(cpuinfo: str = "/proc/cpuinfo") -> bool:
    """True when the CPU computes bfloat16 natively (AMX or AVX-512 BF16) and torch can use it."""
    try:
        with open(cpuinfo, encoding="ascii", errors="replace") as f:
            flags = next((line.split(":", 1)[1].split() for line in f if line.startswith("flags")), [])
    except OSError:
        return False
    return any(flag in flags for flag in CPU_BF16_FLAGS) and torch.backends.mkldnn.is_available()


def resolve_precision(requested: str) -> str:
    """"float32" or "bfloat16" for FitConfig.precision ("auto" decides by the CPU)."""
    if requested == "auto":
        return "bfloat16" if cpu_has_native_bf16() else "float32"
    if requested not in ("float32", "bfloat16"):
        raise ValueError(f"precision must be auto, float32 or bfloat16, got {requested!r}")
    return requested


def scaled_loss(model: Reconstructor, batch: torch.Tensor, config: FitConfig, bf16: bool = False) -> torch.Tensor:
    """Training loss in scaled units: MSE (default) or Huber between z and its reconstruction.

    With `bf16` the forward pass runs under bfloat16 autocast; the loss is taken in float32.
    """
    with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
        z, z_hat = model.reconstruct_scaled(batch)  # (B, W, C) each
    z_hat = z_hat.float()
    if config.loss == "huber":
        return F.huber_loss(z_hat, z, delta=config.huber_delta)
    return F.mse_loss(z_hat, z)


@torch.inference_mode()
def evaluate_loss(model: Reconstructor, windows: Windows, idx: np.ndarray, config: FitConfig, batch: int = 512) -> float:
    """Mean loss over the windows `idx` (weighted by batch size), in eval mode."""
    was_training = model.training
    model.eval()
    total, count = 0.0, 0
    for start in range(0, len(idx), batch):
        part = idx[start : start + batch]
        x = torch.from_numpy(np.ascontiguousarray(windows.gather(part), dtype=np.float32))
        total += float(scaled_loss(model, x, config)) * len(part)
        count += len(part)
    model.train(was_training)
    return total / max(count, 1)


def even_subset(n: int, limit: int | None) -> np.ndarray:
    """Up to `limit` indexes spread evenly over 0..n-1 (all of them when n <= limit)."""
    if limit is None or n <= limit:
        return np.arange(n, dtype=np.int64)
    return np.unique(np.linspace(0, n - 1, limit).round().astype(np.int64))


@dataclass
class FitResult:
    train_loss: list[float] = field(default_factory=list)  # per epoch, mean over its batches
    val_loss: list[float] = field(default_factory=list)  # per epoch, on the fixed validation subset
    best_epoch: int = 0  # 1-based epoch whose weights were kept
    epochs_run: int = 0
    seconds: float = 0.0
    windows_seen: int = 0  # training windows passed forward and backward, all epochs
    precision: str = "float32"  # what the forward passes of training ran in

    @property
    def best_val_loss(self) -> float:
        return self.val_loss[self.best_epoch - 1] if self.val_loss else float("nan")

    @property
    def windows_per_s(self) -> float:
        return self.windows_seen / self.seconds if self.seconds > 0 else 0.0


def fit(
    model: Reconstructor,
    train: Windows,
    validation: Windows,
    config: FitConfig,
    progress: bool | None = None,
    on_epoch: Callable[[int, float, float], None] | None = None,
) -> FitResult:
    """Train in place; on return the model holds the weights of its best validation epoch."""
    if len(train) == 0:
        raise ValueError("no training windows")
    if len(validation) == 0:
        raise ValueError("no validation windows for early stopping")
    torch.set_num_threads(max(int(config.threads), 1))
    show = progress_enabled() if progress is None else progress
    rng = np.random.default_rng(config.seed)
    optimiser = make_optimiser(model, config)
    val_idx = even_subset(len(validation), config.max_validation_windows)
    result = FitResult(precision=resolve_precision(config.precision))
    bf16 = result.precision == "bfloat16"
    best_state = copy.deepcopy(model.state_dict())
    best = float("inf")
    stale = 0
    started = time.perf_counter()
    for epoch in range(1, config.epochs + 1):
        model.train()
        order = rng.permutation(len(train))
        if config.max_train_windows is not None:
            order = order[: config.max_train_windows]
        batches = [order[i : i + config.batch_size] for i in range(0, len(order), config.batch_size)]
        bar = _bar(len(batches), f"epoch {epoch}/{config.epochs}", show)
        running, seen = 0.0, 0
        for part in batches:
            x = torch.from_numpy(np.ascontiguousarray(train.gather(np.sort(part)), dtype=np.float32))  # (B, W, C)
            running += train_step(model, optimiser, x, config, bf16) * len(part)
            seen += len(part)
            if bar is not None:
                bar.update(1)
                bar.set_postfix(loss=f"{running / seen:.4f}")
        if bar is not None:
            bar.close()
        result.windows_seen += seen
        train_loss = running / max(seen, 1)
        val_loss = evaluate_loss(model, validation, val_idx, config)
        result.train_loss.append(train_loss)
        result.val_loss.append(val_loss)
        result.epochs_run = epoch
        if on_epoch is not None:
            on_epoch(epoch, train_loss, val_loss)
        if val_loss < best * (1 - config.min_delta):
            best = val_loss
            best_state = copy.deepcopy(model.state_dict())
            result.best_epoch = epoch
            stale = 0
        else:
            stale += 1
            if stale >= config.patience:
                break
    result.seconds = time.perf_counter() - started
    model.load_state_dict(best_state)
    model.eval()
    return result


def make_optimiser(model: Reconstructor, config: FitConfig) -> torch.optim.Optimizer:
    return torch.optim.AdamW(model.parameters(), lr=config.lr, weight_decay=config.weight_decay)


def train_step(model: Reconstructor, optimiser: torch.optim.Optimizer, x: torch.Tensor, config: FitConfig, bf16: bool) -> float:
    """One optimiser step on the batch x (B, W, C) raw units; returns its loss (float32)."""
    loss = scaled_loss(model, x, config, bf16)
    optimiser.zero_grad(set_to_none=True)
    loss.backward()
    torch.nn.utils.clip_grad_norm_(model.parameters(), config.clip_norm)
    optimiser.step()
    return float(loss.detach())


def _bar(total: int, desc: str, show: bool):  # type: ignore[no-untyped-def]
    if not show:
        return None
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, file=sys.stderr, leave=False, unit="batch")
