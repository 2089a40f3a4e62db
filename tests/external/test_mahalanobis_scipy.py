"""The Mahalanobis score inside the exported graph against scipy.

Reference: scipy.spatial.distance.mahalanobis(u, v, VI) = sqrt((u - v) VI (u - v)^T)
(SciPy documentation); our per-step score is its square with u = e_t = |x_t - x_hat_t|
(scaled units), v = mu and VI = Sigma^-1 fitted on normal windows (Malhotra et al. 2016,
arXiv:1607.00148), and the window score is the mean over steps.
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")
distance = pytest.importorskip("scipy.spatial.distance")

from service.manifest import load_calibration, load_manifest  # noqa: E402
from service.scoring import OnnxScorer  # noqa: E402
from training.config import ModelConfig  # noqa: E402
from training.export import write_model_folder  # noqa: E402
from training.model import Reconstructor, error_statistics, flops_per_window  # noqa: E402

BUNDLED = Path(__file__).resolve().parents[2] / "models" / "booster-pumps" / "1"


def test_graph_mahalanobis_equals_scipy_squared_distance(tmp_path: Path) -> None:
    bundled = load_manifest(BUNDLED)  # channels, window and scaler only
    w, c = bundled.window, len(bundled.channels)
    center, scale = np.array(bundled.scaler.center), np.array(bundled.scaler.scale)
    cfg = ModelConfig(hidden=6, latent=2, score="mahalanobis")
    torch.manual_seed(1)
    model = Reconstructor(cfg, c, w, center, scale).eval()
    rng = np.random.default_rng(2)
    normal = (center + scale * rng.normal(0, 1, size=(64, w, c))).astype(np.float32)
    with torch.inference_mode():
        z, z_hat = model.reconstruct_scaled(torch.from_numpy(normal))
    stats = error_statistics(torch.abs(z - z_hat).reshape(-1, c).numpy(), ridge=1e-3)
    model.set_mahalanobis(stats.mean, stats.precision)

    def build(sha, parity):  # type: ignore[no-untyped-def]
        return bundled.model_copy(
            update={
                "version": "maha",
                "created_at": datetime(2026, 1, 1, tzinfo=timezone.utc),
                "onnx_sha256": sha,
                "score": model.score_spec(),
                "architecture": cfg.architecture(model.parameters_count, flops_per_window(cfg, c, w)),
            }
        )

    target = tmp_path / "m" / "1"
    write_model_folder(target, model, build, load_calibration(BUNDLED, bundled), normal[:8])
    test = (center + scale * rng.normal(0, 2, size=(9, w, c))).astype(np.float32)
    got = OnnxScorer(target, threads=1).score(test)
    e = np.abs((test - center) / scale - (got.reconstruction - center) / scale).astype(np.float64)  # (B, W, C)
    vi = np.array(got_precision(target))
    mu = np.array(load_manifest(target).score.error_mean)
    want = np.array([np.mean([distance.mahalanobis(e[b, t], mu, vi) ** 2 for t in range(w)]) for b in range(len(test))])
    # Source: scipy.spatial.distance.mahalanobis (squared), per step, mean over the window.
    np.testing.assert_allclose(got.score, want, rtol=2e-3)
    # e from the residual output agrees with e from the reconstruction output
    np.testing.assert_allclose(np.sqrt(got.residual), e, rtol=1e-3, atol=1e-4)


def got_precision(model_dir: Path) -> list[list[float]]:
    return load_manifest(model_dir).score.error_precision or []


def test_graph_window_bias_term_equals_scipy_squared_distance(tmp_path: Path) -> None:
    """mahalanobis_bias = the per-step score above + d(b, mu_b; S^-1)^2, b the window's mean signed error.

    Source: scipy.spatial.distance.mahalanobis (squared) for both terms.
    """
    from training.calibrate import fit_mahalanobis
    from training.dataset import ArrayWindows

    bundled = load_manifest(BUNDLED)
    w, c = bundled.window, len(bundled.channels)
    center, scale = np.array(bundled.scaler.center), np.array(bundled.scaler.scale)
    cfg = ModelConfig(hidden=6, latent=2, score="mahalanobis_bias")
    torch.manual_seed(3)
    model = Reconstructor(cfg, c, w, center, scale).eval()
    rng = np.random.default_rng(4)
    normal = (center + scale * rng.normal(0, 1, size=(96, w, c))).astype(np.float32)
    fit_mahalanobis(model, ArrayWindows(normal), cfg)  # fits both terms on these "normal" windows
    assert model.score_method == "mahalanobis_bias"

    def build(sha, parity):  # type: ignore[no-untyped-def]
        return bundled.model_copy(
            update={
                "version": "bias",
                "created_at": datetime(2026, 1, 1, tzinfo=timezone.utc),
                "onnx_sha256": sha,
                "score": model.score_spec(),
                "architecture": cfg.architecture(model.parameters_count, flops_per_window(cfg, c, w)),
            }
        )

    target = tmp_path / "b" / "1"
    write_model_folder(target, model, build, load_calibration(BUNDLED, bundled), normal[:8])
    test = (center + scale * rng.normal(0.3, 2, size=(7, w, c))).astype(np.float32)
    got = OnnxScorer(target, threads=1).score(test)
    spec = load_manifest(target).score
    signed = ((test - center) / scale - (got.reconstruction - center) / scale).astype(np.float64)  # (B, W, C)
    e, b = np.abs(signed), signed.mean(axis=1)
    vi, mu = np.array(spec.error_precision), np.array(spec.error_mean)
    vb, mb = np.array(spec.bias_precision), np.array(spec.bias_mean)
    want = np.array(
        [
            np.mean([distance.mahalanobis(e[i, t], mu, vi) ** 2 for t in range(w)]) + distance.mahalanobis(b[i], mb, vb) ** 2
            for i in range(len(test))
        ]
    )
    np.testing.assert_allclose(got.score, want, rtol=2e-3)
