"""Simple detectors to put beside the LSTM: each fitted on the same normal training windows,
scaled with the same per-channel scaler, producing one score per window (higher = more
abnormal) that goes through the same calibration and alert rule as the model's score.

* robust_z  — per channel, |x - median| / (1.4826 * MAD) from the training points, averaged
              over the window's steps; the window's score is the largest channel's mean.
* pca       — reconstruction of the flattened scaled window from the leading principal
              components of the training windows (numpy SVD); score = mean squared error.
              Components: the fewest that explain PCA_VARIANCE of the training variance.
* iforest   — scikit-learn's IsolationForest on per-channel window summaries (mean,
              standard deviation, min, max, last minus first); score = -score_samples, the
              forest's anomaly score, which is positive.

numpy and scikit-learn only: no torch here.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

MAD_TO_SIGMA = 1.4826  # MAD of a normal distribution times this is its standard deviation
PCA_VARIANCE = 0.90
MAX_FIT_WINDOWS = 4000  # PCA and the forest are fitted on at most this many training windows
BASELINE_NAMES = ("robust_z", "pca", "iforest")


class Windows(Protocol):
    """Anything with len() and gather(idx) -> float32 (B, W, C) raw windows (a WindowSet)."""

    def __len__(self) -> int: ...

    def gather(self, idx: np.ndarray) -> np.ndarray: ...


@dataclass(frozen=True)
class Scaling:
    """The model's per-channel scaler: scaled = (raw - center) / scale."""

    center: np.ndarray
    scale: np.ndarray

    def apply(self, raw: np.ndarray) -> np.ndarray:
        arr = np.asarray(raw, dtype=np.float64)
        if arr.ndim != 3 or arr.shape[2] != len(self.center):
            raise ValueError(f"windows must be (batch, window, {len(self.center)}), got {arr.shape}")
        return (arr - self.center) / self.scale


class Baseline(Protocol):
    name: str

    def fit(self, scaled: np.ndarray) -> Baseline: ...

    def score(self, scaled: np.ndarray) -> np.ndarray: ...


@dataclass
class RobustZ:
    name: str = "robust_z"
    median: np.ndarray | None = None
    sigma: np.ndarray | None = None

    def fit(self, scaled: np.ndarray) -> RobustZ:
        points = scaled.reshape(-1, scaled.shape[2])
        self.median = np.median(points, axis=0)
        mad = np.median(np.abs(points - self.median), axis=0)
        # A channel that barely moves in training would divide by ~0: floor the spread.
        self.sigma = np.maximum(MAD_TO_SIGMA * mad, 1e-3)
        return self

    def score(self, scaled: np.ndarray) -> np.ndarray:
        if self.median is None or self.sigma is None:
            raise RuntimeError("fit the robust z-score before scoring")
        z = np.abs(scaled - self.median) / self.sigma  # (B, W, C)
        return z.mean(axis=1).max(axis=1)  # (B,)


@dataclass
class PcaReconstruction:
    variance: float = PCA_VARIANCE
    name: str = "pca"
    mean: np.ndarray | None = None
    components: np.ndarray | None = None  # (k, W*C)

    def fit(self, scaled: np.ndarray) -> PcaReconstruction:
        flat = scaled.reshape(len(scaled), -1)
        self.mean = flat.mean(axis=0)
        _, sv, vt = np.linalg.svd(flat - self.mean, full_matrices=False)
        explained = np.cumsum(sv**2) / max(float(np.sum(sv**2)), 1e-300)
        k = int(np.searchsorted(explained, self.variance) + 1)
        self.components = vt[: min(k, len(vt))]
        return self

    @property
    def n_components(self) -> int:
        return 0 if self.components is None else len(self.components)

    def score(self, scaled: np.ndarray) -> np.ndarray:
        if self.mean is None or self.components is None:
            raise RuntimeError("fit the PCA baseline before scoring")
        flat = scaled.reshape(len(scaled), -1) - self.mean
        recon = (flat @ self.components.T) @ self.components
        return np.mean((flat - recon) ** 2, axis=1)


def summary_features(scaled: np.ndarray) -> np.ndarray:
    """(B, 5*C): per channel mean, std, min, max and last-minus-first of each window."""
    return np.concatenate(
        [
            scaled.mean(axis=1),
            scaled.std(axis=1),
            scaled.min(axis=1),
            scaled.max(axis=1),
            scaled[:, -1, :] - scaled[:, 0, :],
        ],
        axis=1,
    )


@dataclass
class IsolationForestSummary:
    seed: int = 0
    n_estimators: int = 200
    name: str = "iforest"
    forest: object | None = field(default=None, repr=False)

    def fit(self, scaled: np.ndarray) -> IsolationForestSummary:
        from sklearn.ensemble import IsolationForest

        self.forest = IsolationForest(n_estimators=self.n_estimators, random_state=self.seed).fit(
            summary_features(scaled)
        )
        return self

    def score(self, scaled: np.ndarray) -> np.ndarray:
        if self.forest is None:
            raise RuntimeError("fit the isolation forest before scoring")
        return -self.forest.score_samples(summary_features(scaled))  # type: ignore[attr-defined]


def make_baselines(names: Sequence[str] = BASELINE_NAMES, seed: int = 0) -> list[Baseline]:
    out: list[Baseline] = []
    for name in names:
        if name == "robust_z":
            out.append(RobustZ())
        elif name == "pca":
            out.append(PcaReconstruction())
        elif name == "iforest":
            out.append(IsolationForestSummary(seed=seed))
        else:
            raise ValueError(f"unknown baseline {name!r}: choose from {', '.join(BASELINE_NAMES)}")
    return out


def fit_sample(train: Windows, max_windows: int = MAX_FIT_WINDOWS, seed: int = 0) -> np.ndarray:
    """Raw training windows to fit on: all of them, or an evenly spread random subset."""
    n = len(train)
    if n == 0:
        raise ValueError("no training windows to fit the baselines on")
    if n <= max_windows:
        idx = np.arange(n)
    else:
        idx = np.sort(np.random.default_rng(seed).choice(n, size=max_windows, replace=False))
    return np.asarray(train.gather(idx))


def fit_baselines(
    train: Windows, scaling: Scaling, names: Sequence[str] = BASELINE_NAMES, seed: int = 0
) -> list[Baseline]:
    """Fit every named baseline on (a sample of) the scaled training windows."""
    scaled = scaling.apply(fit_sample(train, seed=seed))
    return [b.fit(scaled) for b in make_baselines(names, seed=seed)]


def score_windows(baseline: Baseline, scaling: Scaling, raw: np.ndarray, chunk: int = 4096) -> np.ndarray:
    """Score raw (B, W, C) windows in chunks so memory stays bounded."""
    parts = [baseline.score(scaling.apply(raw[i : i + chunk])) for i in range(0, len(raw), chunk)]
    return np.concatenate(parts) if parts else np.empty(0)
