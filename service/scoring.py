"""Scoring windows with ONNX Runtime on the CPU: the one path the service, the evaluator
and the benchmarks use.

`OnnxScorer` owns an InferenceSession for one model folder, checks inputs against the
manifest, and splits large requests into chunks of `chunk_size` windows (ONNX Runtime's
LSTM is fastest at moderate batch sizes on one thread; see bench/scoring.py).

DEFAULT_CHUNK = 16, measured on the bundled model (64-wide LSTM, two encoder layers, one
decoder layer) at batch 256, one thread, best of 10 interleaved rounds on the shared
machine: chunks of 8 / 16 / 24 / 32 / 64 windows scored 1,960 / 2,408 / 2,182 / 2,037 /
~2,000 windows/s (torch eager at batch 256: 1,250-1,520 in the bench runs). Larger
chunks make each LSTM's per-run gate buffer larger (steps x chunk x 4 x hidden floats
per direction, ~1 MB at 16, ~4 MB at 64); smaller ones pay the per-run overhead more
often. 8, 16 and 32 trade places from run to run under load (bench/scoring.py prints the
chunk table every run), so a model of another shape can be given its own `chunk_size`
(settings: KILTER_ONNX_CHUNK).
Session options were measured too and left at ONNX Runtime's defaults (full graph
optimisation, memory pattern, arena): basic optimisation, no memory pattern and
denormals-as-zero were all within the run-to-run noise.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import numpy as np

from service.manifest import INPUT_NAME, OUTPUT_NAMES, Manifest, file_sha256, load_manifest

DEFAULT_CHUNK = 16


class ScoringError(RuntimeError):
    """The model could not be loaded or could not score the given windows."""


@dataclass(frozen=True)
class ScoreResult:
    score: np.ndarray  # (B,) float32 window anomaly score
    residual: np.ndarray  # (B, W, C) float32 squared error in scaled units
    reconstruction: np.ndarray  # (B, W, C) float32 raw units

    @property
    def contributions(self) -> np.ndarray:
        """(B, C) share of each channel in the window's residual, rows summing to 1."""
        return channel_shares(self.residual)


def channel_shares(residual: np.ndarray) -> np.ndarray:
    """Per-channel share of the squared error summed over the window's steps."""
    per_channel = np.asarray(residual, dtype=np.float64).sum(axis=1)  # (B, C)
    total = per_channel.sum(axis=1, keepdims=True)
    c = per_channel.shape[1]
    return np.where(total > 0, per_channel / np.where(total > 0, total, 1.0), 1.0 / c)


class Scorer(Protocol):
    manifest: Manifest

    def score(self, windows: np.ndarray) -> ScoreResult: ...


def validate_windows(windows: np.ndarray, manifest: Manifest) -> np.ndarray:
    """float32 (B, W, C) with the manifest's W and C and no NaN/inf, or a ValueError saying why."""
    arr = np.asarray(windows, dtype=np.float32)
    w, c = manifest.window, len(manifest.channels)
    if arr.ndim != 3 or arr.shape[1:] != (w, c):
        raise ValueError(f"windows must have shape (batch, {w}, {c}) for this model, got {tuple(arr.shape)}")
    if not np.all(np.isfinite(arr)):
        b, t, ch = np.argwhere(~np.isfinite(arr))[0]
        raise ValueError(
            f"window {b} step {t} channel {manifest.channels[ch].name!r} is not a finite number; fill gaps first"
        )
    return arr


def first_implausible(values: np.ndarray, manifest: Manifest) -> tuple[int, ...] | None:
    """Index of the first value (in C order) outside the manifest's plausible limits, None if
    all lie inside; the last axis is the channel, NaN (missing) is never implausible."""
    low = np.asarray(manifest.plausible.low, dtype=np.float64)
    high = np.asarray(manifest.plausible.high, dtype=np.float64)
    arr = np.asarray(values, dtype=np.float64)
    bad = (arr < low) | (arr > high)  # NaN compares False both ways
    if not bad.any():
        return None
    return tuple(int(i) for i in np.argwhere(bad)[0])


def implausible_message(value: float, channel: int, manifest: Manifest) -> str:
    """What was wrong with an implausible value and what would be accepted."""
    ch = manifest.channels[channel]
    lo, hi = manifest.plausible.low[channel], manifest.plausible.high[channel]
    return (
        f"{value!r} {ch.unit} is outside the plausible range of channel {ch.name!r} for model "
        f"{manifest.model_id} {manifest.version} ({lo:.6g} .. {hi:.6g} {ch.unit}, far beyond anything it was trained on); "
        "send null for a value that was not measured, and check the sensor's scaling"
    )


class OnnxScorer:
    """ONNX Runtime session over one model folder (manifest.json + model.onnx)."""

    def __init__(
        self,
        model_dir: Path,
        threads: int = 1,
        chunk_size: int = DEFAULT_CHUNK,
        manifest: Manifest | None = None,
        verify_sha256: bool = True,
    ) -> None:
        import onnxruntime as ort

        self.model_dir = Path(model_dir)
        self.manifest = manifest or load_manifest(self.model_dir)
        self.chunk_size = max(int(chunk_size), 1)
        self._low = np.asarray(self.manifest.plausible.low, dtype=np.float32)
        self._high = np.asarray(self.manifest.plausible.high, dtype=np.float32)
        path = self.model_dir / self.manifest.onnx_file
        # The manifest names a plain file (service/manifest.py); a symlink must not lead out either.
        if not path.resolve().is_relative_to(self.model_dir.resolve()):
            raise ScoringError(f"{path}: the ONNX file must lie inside the model folder {self.model_dir}")
        if not path.is_file():
            raise ScoringError(f"{path}: ONNX file missing")
        if verify_sha256:
            digest = file_sha256(path)
            if digest != self.manifest.onnx_sha256:
                raise ScoringError(
                    f"{path}: sha256 {digest[:12]}... does not match the manifest's {self.manifest.onnx_sha256[:12]}..."
                )
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = max(int(threads), 1)
        opts.inter_op_num_threads = 1
        opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        try:
            self.session = ort.InferenceSession(str(path), sess_options=opts, providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own exception types
            raise ScoringError(f"{path}: ONNX Runtime could not load the model ({e})") from e
        self._check_signature()

    def _check_signature(self) -> None:
        inputs = self.session.get_inputs()
        outputs = [o.name for o in self.session.get_outputs()]
        if [i.name for i in inputs] != [INPUT_NAME]:
            raise ScoringError(f"model inputs are {[i.name for i in inputs]}, expected [{INPUT_NAME!r}]")
        if sorted(outputs) != sorted(OUTPUT_NAMES):
            raise ScoringError(f"model outputs are {outputs}, expected {list(OUTPUT_NAMES)}")
        shape = inputs[0].shape
        w, c = self.manifest.window, len(self.manifest.channels)
        if len(shape) != 3 or shape[1] != w or shape[2] != c or isinstance(shape[0], int):
            raise ScoringError(f"model input shape {shape} does not match [batch, {w}, {c}] with a dynamic batch")

    def score(self, windows: np.ndarray) -> ScoreResult:
        arr = validate_windows(windows, self.manifest)
        # Within the plausible limits the graph cannot overflow (service/manifest.py), and the
        # service refuses readings outside them; a value stored before (another model's
        # limits, an older version) is held at the limit, so scoring never fails on it.
        if first_implausible(arr, self.manifest) is not None:
            arr = np.clip(arr, self._low, self._high)
        if len(arr) == 0:
            w, c = arr.shape[1:]
            empty = np.empty((0, w, c), np.float32)
            return ScoreResult(np.empty(0, np.float32), empty, empty.copy())
        parts = [self._run(arr[i : i + self.chunk_size]) for i in range(0, len(arr), self.chunk_size)]
        if len(parts) == 1:
            return parts[0]
        return ScoreResult(
            np.concatenate([p.score for p in parts]),
            np.concatenate([p.residual for p in parts]),
            np.concatenate([p.reconstruction for p in parts]),
        )

    def _run(self, batch: np.ndarray) -> ScoreResult:
        try:
            recon, resid, score = self.session.run(list(OUTPUT_NAMES), {INPUT_NAME: batch})
        except Exception as e:
            raise ScoringError(f"ONNX Runtime failed on a batch of {len(batch)} windows ({e})") from e
        return ScoreResult(score=score, residual=resid, reconstruction=recon)

    def self_test(self) -> None:
        """Score one window at the scaler's centre; raise ScoringError unless outputs are finite."""
        centre = np.asarray(self.manifest.scaler.center, dtype=np.float32)
        window = np.broadcast_to(centre, (1, self.manifest.window, len(centre))).copy()
        result = self.score(window)
        for name, arr in (("score", result.score), ("residual", result.residual), ("reconstruction", result.reconstruction)):
            if not np.all(np.isfinite(arr)):
                raise ScoringError(f"model gives non-finite {name} on a test window")
