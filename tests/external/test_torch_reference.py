"""Our LSTM layer and exported graph against PyTorch itself.

References:
- PyTorch documentation of torch.nn.LSTM (https://pytorch.org/docs/stable/generated/torch.nn.LSTM.html):
  i_t = sigma(W_ii x_t + b_ii + W_hi h_{t-1} + b_hi), f_t = sigma(W_if x_t + b_if + W_hf h_{t-1} + b_hf),
  g_t = tanh(W_ig x_t + b_ig + W_hg h_{t-1} + b_hg), o_t = sigma(W_io x_t + b_io + W_ho h_{t-1} + b_ho),
  c_t = f_t * c_{t-1} + i_t * g_t, h_t = o_t * tanh(c_t); weight_ih_l0 stacks (W_ii|W_if|W_ig|W_io),
  and h_0 = c_0 = 0 when not given.
- The PyTorch model itself as the reference of the ONNX Runtime graph, on real demo windows.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from service.manifest import LayerSpec, Manifest, load_calibration, load_manifest  # noqa: E402
from service.scoring import OnnxScorer  # noqa: E402
from training import demo_data  # noqa: E402
from training.dataset import ArrayWindows  # noqa: E402
from training.model import LSTMLayer  # noqa: E402

BUNDLED = Path(__file__).resolve().parents[2] / "models" / "booster-pumps" / "1"


def sigmoid(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def lstm_by_hand(x: np.ndarray, w_ih: np.ndarray, w_hh: np.ndarray, b_ih: np.ndarray, b_hh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The nn.LSTM recurrence of the PyTorch docs, step by step in float64 numpy."""
    b, t_len, _ = x.shape
    hidden = w_hh.shape[1]
    h = np.zeros((b, hidden))
    c = np.zeros((b, hidden))
    out = np.zeros((b, t_len, hidden))
    for t in range(t_len):
        gates = x[:, t] @ w_ih.T + b_ih + h @ w_hh.T + b_hh  # (B, 4H), order i, f, g, o
        i = sigmoid(gates[:, :hidden])
        f = sigmoid(gates[:, hidden : 2 * hidden])
        g = np.tanh(gates[:, 2 * hidden : 3 * hidden])
        o = sigmoid(gates[:, 3 * hidden :])
        c = f * c + i * g
        h = o * np.tanh(c)
        out[:, t] = h
    return out, h


def test_unidirectional_layer_reproduces_the_documented_lstm_equations() -> None:
    torch.manual_seed(4)
    layer = LSTMLayer(5, LayerSpec(hidden=7, bidirectional=False)).eval()
    x = torch.randn(3, 11, 5)
    with torch.no_grad():
        steps, summary = layer(x)
    p = {k: v.detach().numpy().astype(np.float64) for k, v in layer.lstm.named_parameters()}
    want_steps, want_last = lstm_by_hand(x.numpy().astype(np.float64), p["weight_ih_l0"], p["weight_hh_l0"], p["bias_ih_l0"], p["bias_hh_l0"])
    # Source: torch.nn.LSTM documentation (gate equations and weight layout above).
    np.testing.assert_allclose(steps.numpy(), want_steps, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(summary.numpy(), want_last, rtol=1e-5, atol=1e-6)


def test_backward_direction_is_the_same_recurrence_over_the_reversed_window() -> None:
    torch.manual_seed(5)
    layer = LSTMLayer(4, LayerSpec(hidden=3, bidirectional=True, merge="concat")).eval()
    x = torch.randn(2, 9, 4)
    with torch.no_grad():
        steps, _ = layer(x)
    p = {k: v.detach().numpy().astype(np.float64) for k, v in layer.lstm.named_parameters()}
    rev, _ = lstm_by_hand(
        x.numpy()[:, ::-1].astype(np.float64),
        p["weight_ih_l0_reverse"],
        p["weight_hh_l0_reverse"],
        p["bias_ih_l0_reverse"],
        p["bias_hh_l0_reverse"],
    )
    # Source: torch.nn.LSTM documentation (bidirectional: the _reverse weights read the sequence backwards).
    np.testing.assert_allclose(steps.numpy()[:, :, 3:], rev[:, ::-1], rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("score", ["mean_squared", "mahalanobis"])
def test_exported_graph_matches_torch_on_real_demo_windows(tmp_path: Path, score: str) -> None:
    """Reference: the PyTorch model, on windows cut from the demo fleet by service/grid.py,
    scored through service.scoring.OnnxScorer (the service's path); every output element."""
    from training.calibrate import fit_mahalanobis
    from training.config import ModelConfig
    from training.export import write_model_folder
    from training.model import Reconstructor, flops_per_window

    bundled = load_manifest(BUNDLED)  # only its channels, grid and scaler are reused
    w, c = bundled.window, len(bundled.channels)
    cfg = ModelConfig(hidden=8, latent=3, score=score)
    torch.manual_seed(0)
    model = Reconstructor(cfg, c, w, np.array(bundled.scaler.center), np.array(bundled.scaler.scale)).eval()
    real = demo_data.sample_windows(w, 96, stride=10, days=1, seed=3)
    if score == "mahalanobis":
        fit_mahalanobis(model, ArrayWindows(real[:48]), cfg)

    def build(sha: str, parity) -> Manifest:  # type: ignore[no-untyped-def]
        return bundled.model_copy(
            update={
                "version": "ref",
                "onnx_sha256": sha,
                "score": model.score_spec(),
                "architecture": cfg.architecture(model.parameters_count, flops_per_window(cfg, c, w)),
            }
        )

    target = tmp_path / "ref" / "1"
    write_model_folder(target, model, build, load_calibration(BUNDLED, bundled), real[:16])
    got = OnnxScorer(target, threads=1).score(real)
    with torch.inference_mode():
        recon, resid, s = (t.numpy() for t in model(torch.from_numpy(real)))
    np.testing.assert_allclose(got.score, s, rtol=1e-4)
    np.testing.assert_allclose(got.residual, resid, rtol=1e-4, atol=1e-5)
    scale = np.array(bundled.scaler.scale)
    assert np.max(np.abs(got.reconstruction - recon) / scale) < 1e-4
