"""The trainer's honest check: does the LSTM beat a PCA reconstruction of the same windows?

The PCA baseline of training/baselines.py (the one `kilter evaluate --baselines` shows) is
fitted on the model's own training windows, scaled by the model's scaler, and both are
compared on windows neither was fitted on:

* reconstruction: mean squared error per point (scaled units) on the validation and the
  calibration windows, the model's `residual` output against PCA's reconstruction error;
* separation (only when labelled faults are known: `--events`, else the faults among
  `--exclude`): ROC-AUC of each detector's window score, fault windows against the normal
  calibration windows. The labels are used for this comparison only, never to fit.

When the baseline does as well or better on any of these, the CLI and the report say so
plainly and name what to try. The figures go into the manifest's validation figures and
report.json ("baseline_check").
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from training.baselines import PcaReconstruction, Scaling, fit_baselines
from training.baselines import score_windows as baseline_scores
from training.calibrate import model_outputs
from training.metrics import roc_auc

ADVICE = (
    "try longer windows (--window-s, or a coarser --period-s), a wider bottleneck (--latent), "
    "or more days of normal data"
)


@dataclass(frozen=True)
class PartComparison:
    part: str  # "validation" or "calibration"
    windows: int
    model_mse: float  # mean squared reconstruction error per point, scaled units
    pca_mse: float

    @property
    def baseline_as_good(self) -> bool:
        return self.pca_mse <= self.model_mse


@dataclass(frozen=True)
class SeparationComparison:
    fault_windows: int
    normal_windows: int
    model_roc_auc: float  # the model's window score, faults vs normal calibration windows
    pca_roc_auc: float

    @property
    def baseline_as_good(self) -> bool:
        return self.pca_roc_auc >= self.model_roc_auc


@dataclass(frozen=True)
class BaselineCheck:
    pca_components: int
    parts: list[PartComparison]
    separation: SeparationComparison | None

    @property
    def baseline_as_good(self) -> bool:
        """True when PCA reconstructs any held-out part as well or separates the faults as well."""
        return any(p.baseline_as_good for p in self.parts) or (self.separation is not None and self.separation.baseline_as_good)

    def lines(self) -> list[str]:
        """What the CLI prints and the report shows, one finding a line."""
        out = [
            f"baseline check: PCA reconstruction ({self.pca_components} components, fitted on the same training "
            "windows) against the model, on windows neither was fitted on"
        ]
        for p in self.parts:
            word = "as well or better" if p.baseline_as_good else "worse"
            out.append(
                f"  {p.part} ({p.windows} windows): mean squared error model {p.model_mse:.4g}, PCA {p.pca_mse:.4g} "
                f"(PCA reconstructs {word})"
            )
        if self.separation is not None:
            s = self.separation
            word = "as well or better" if s.baseline_as_good else "worse"
            out.append(
                f"  labelled faults ({s.fault_windows} windows) vs normal calibration windows: ROC-AUC model "
                f"{s.model_roc_auc:.3f}, PCA {s.pca_roc_auc:.3f} (PCA separates {word}; labels used for this check only)"
            )
        if self.baseline_as_good:
            out.append(
                "  WARNING: a linear PCA baseline does as well as the LSTM on this data, so the model is not yet "
                f"earning its cost; {ADVICE}"
            )
        else:
            out.append("  the model does better than the PCA baseline on every comparison above")
        return out

    def figures(self) -> dict[str, float]:
        """Flat figures for the manifest's validation.extra."""
        out: dict[str, float] = {"baseline_pca_components": float(self.pca_components)}
        for p in self.parts:
            out[f"{p.part}_mse_model"] = p.model_mse
            out[f"{p.part}_mse_pca"] = p.pca_mse
        if self.separation is not None:
            out["fault_vs_normal_roc_auc_pca"] = self.separation.pca_roc_auc
        out["baseline_as_good"] = float(self.baseline_as_good)
        return out

    def as_dict(self) -> dict:
        return {
            "baseline": "pca",
            "pca_components": self.pca_components,
            "parts": [asdict(p) | {"baseline_as_good": p.baseline_as_good} for p in self.parts],
            "separation": None
            if self.separation is None
            else asdict(self.separation) | {"baseline_as_good": self.separation.baseline_as_good},
            "baseline_as_good": self.baseline_as_good,
            "advice": ADVICE if self.baseline_as_good else None,
        }


def _model_mse(model, windows) -> float:  # type: ignore[no-untyped-def]
    sums = [float(resid.sum(dtype=np.float64)) for _, _, resid, _ in model_outputs(model, windows)]
    return sum(sums) / max(len(windows) * windows.window * windows.n_channels, 1)


def _pca_scores(pca: PcaReconstruction, scaling: Scaling, windows, chunk: int = 2048) -> np.ndarray:  # type: ignore[no-untyped-def]
    n = len(windows)
    parts = [baseline_scores(pca, scaling, windows.gather(np.arange(i, min(i + chunk, n)))) for i in range(0, n, chunk)]
    return np.concatenate(parts) if parts else np.empty(0)


def baseline_check(
    model,  # type: ignore[no-untyped-def]
    train,
    held_out: dict,
    center: np.ndarray,
    scale: np.ndarray,
    *,
    normal_scores: np.ndarray | None = None,
    fault_windows: np.ndarray | None = None,
    fault_scores: np.ndarray | None = None,
    seed: int = 0,
) -> BaselineCheck:
    """Fit PCA on `train` (a WindowSet) and compare it with `model` on each part of `held_out`.

    `held_out`: part name -> WindowSet (the validation and calibration windows).
    `normal_scores` (the model's calibration scores), `fault_windows` (raw (N, W, C)) and
    `fault_scores` (the model's scores of them), when given, add the separation figures.
    """
    scaling = Scaling(np.asarray(center, dtype=np.float64), np.asarray(scale, dtype=np.float64))
    (pca,) = fit_baselines(train, scaling, ["pca"], seed=seed)
    assert isinstance(pca, PcaReconstruction)
    parts = []
    pca_cal: np.ndarray | None = None
    for name, ws in held_out.items():
        if len(ws) == 0:
            continue
        pca_s = _pca_scores(pca, scaling, ws)
        if name == "calibration":
            pca_cal = pca_s
        # PcaReconstruction.score is already the mean squared error per point of each window.
        parts.append(PartComparison(name, len(ws), _model_mse(model, ws), float(np.mean(pca_s))))
    separation = None
    if fault_windows is not None and len(fault_windows) and normal_scores is not None and pca_cal is not None:
        pca_fault = baseline_scores(pca, scaling, np.asarray(fault_windows))
        labels = np.r_[np.zeros(len(normal_scores)), np.ones(len(fault_windows))]
        separation = SeparationComparison(
            fault_windows=len(fault_windows),
            normal_windows=len(normal_scores),
            model_roc_auc=roc_auc(labels, np.r_[normal_scores, fault_scores]),
            pca_roc_auc=roc_auc(labels, np.r_[pca_cal, pca_fault]),
        )
    return BaselineCheck(pca.n_components, parts, separation)
