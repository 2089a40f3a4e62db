"""The reconstructor's shapes, bottleneck, FLOP count, Mahalanobis fit and the fit's determinism."""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from service.manifest import LayerSpec  # noqa: E402
from training.config import FitConfig, ModelConfig  # noqa: E402
from training.dataset import ArrayWindows  # noqa: E402
from training.fit import even_subset, fit, make_model  # noqa: E402
from training.model import (  # noqa: E402
    LSTMLayer,
    Reconstructor,
    error_statistics,
    flops_per_window,
    merge_directions,
)

C, W = 4, 12
CENTER = np.array([10.0, -2.0, 300.0, 0.5])
SCALE = np.array([2.0, 0.5, 25.0, 0.1])


def sine_windows(n: int, seed: int) -> np.ndarray:
    """Smooth coupled channels with a random phase per window, raw units."""
    rng = np.random.default_rng(seed)
    t = np.arange(W)[None, :, None]
    phase = rng.uniform(0, 2 * np.pi, size=(n, 1, 1))
    base = np.sin(0.4 * t + phase)
    x = np.concatenate([base, 0.5 * base, -base, base**2], axis=2)
    return CENTER + SCALE * (x + 0.05 * rng.normal(size=x.shape))


@pytest.mark.parametrize("merge", ["concat", "sum", "multiply", "average"])
@pytest.mark.parametrize("bidirectional", [True, False])
def test_forward_shapes_and_merge_widths(merge: str, bidirectional: bool) -> None:
    cfg = ModelConfig(hidden=6, latent=3, layers=2, merge=merge, bidirectional=bidirectional, score="mean_squared")
    model = Reconstructor(cfg, C, W, CENTER, SCALE).eval()
    x = torch.from_numpy(sine_windows(5, 0).astype(np.float32))
    recon, resid, score = model(x)
    assert recon.shape == (5, W, C) and resid.shape == (5, W, C) and score.shape == (5,)
    width = 12 if (bidirectional and merge == "concat") else 6
    assert model.encoder.out_size == width and model.decoder.out_size == width
    # residual is the squared error in scaled units; score its mean (mean_squared)
    z = (x - model.center) / model.scale
    z_hat = (recon - model.center) / model.scale
    torch.testing.assert_close(resid, (z - z_hat) ** 2, rtol=1e-4, atol=1e-5)
    torch.testing.assert_close(score, resid.mean(dim=(1, 2)))


def test_merge_modes_combine_step_by_step() -> None:
    f = torch.tensor([[1.0, 2.0]])
    b = torch.tensor([[3.0, 5.0]])
    assert merge_directions(f, b, "concat").tolist() == [[1.0, 2.0, 3.0, 5.0]]
    assert merge_directions(f, b, "sum").tolist() == [[4.0, 7.0]]
    assert merge_directions(f, b, "multiply").tolist() == [[3.0, 10.0]]
    assert merge_directions(f, b, "average").tolist() == [[2.0, 3.5]]
    with pytest.raises(ValueError, match="merge mode"):
        merge_directions(f, b, "max")  # type: ignore[arg-type]


def test_bidirectional_summary_reads_both_ends() -> None:
    """The backward direction's summary is its state after the first step (it read the whole window)."""
    torch.manual_seed(0)
    layer = LSTMLayer(3, LayerSpec(hidden=4, bidirectional=True, merge="concat")).eval()
    x = torch.randn(2, 7, 3)
    steps, summary = layer(x)
    torch.testing.assert_close(summary[:, :4], steps[:, -1, :4])  # forward: last step
    torch.testing.assert_close(summary[:, 4:], steps[:, 0, 4:])  # backward: first step


def test_the_bottleneck_decoder_sees_only_the_latent_vector() -> None:
    """Two windows with the same latent vector get the same reconstruction (no identity path)."""
    cfg = ModelConfig(hidden=5, latent=2)
    model = Reconstructor(cfg, C, W, CENTER, SCALE).eval()
    x = torch.from_numpy(sine_windows(2, 1).astype(np.float32))
    with torch.no_grad():
        _, summary = model.encoder((x - model.center) / model.scale)
        latent = model.to_latent(summary)
        assert latent.shape == (2, 2)
        rep = latent[:1].unsqueeze(1).repeat(2, W, 1)
        steps, _ = model.decoder(rep)
        out = model.head(steps)
    torch.testing.assert_close(out[0], out[1])


def test_flops_count_the_gate_matmuls_and_linears() -> None:
    """Hand count for one bidirectional concat layer each side (2 x multiply-adds)."""
    cfg = ModelConfig(hidden=8, latent=3, layers=1, bidirectional=True, merge="concat", score="mean_squared")
    enc = 2 * 2 * W * 4 * 8 * (C + 8)  # two directions, four gates, W_ih x + W_hh h
    dec = 2 * 2 * W * 4 * 8 * (3 + 8)
    to_latent = 2 * 16 * 3
    head = 2 * W * 16 * C
    assert flops_per_window(cfg, C, W) == enc + dec + to_latent + head
    maha = ModelConfig(hidden=8, latent=3, layers=1, score="mahalanobis")
    assert flops_per_window(maha, C, W) == enc + dec + to_latent + head + 2 * W * C * C


def test_decoder_layers_set_apart_from_the_encoder() -> None:
    """Two encoder layers, one decoder layer: shapes, manifest specs and the hand FLOP count."""
    cfg = ModelConfig(hidden=8, latent=3, layers=2, decoder_layers=1, score="mean_squared")
    model = Reconstructor(cfg, C, W, np.zeros(C), np.ones(C))
    assert len(model.encoder.layers) == 2 and len(model.decoder.layers) == 1
    arch = cfg.architecture(model.parameters_count, flops_per_window(cfg, C, W))
    assert len(arch.encoder) == 2 and len(arch.decoder) == 1
    enc = 2 * 2 * W * 4 * 8 * (C + 8) + 2 * 2 * W * 4 * 8 * (16 + 8)  # layer 2 reads the 16-wide concat
    dec = 2 * 2 * W * 4 * 8 * (3 + 8)
    assert flops_per_window(cfg, C, W) == enc + dec + 2 * 16 * 3 + 2 * W * 16 * C
    recon, resid, score = model(torch.randn(4, W, C))
    assert recon.shape == resid.shape == (4, W, C) and score.shape == (4,)


def test_error_statistics_regularise_a_singular_covariance() -> None:
    rng = np.random.default_rng(3)
    e = np.abs(rng.normal(size=(500, 1))) * np.ones((1, 3))  # three identical columns: singular
    stats = error_statistics(e, ridge=1e-3)
    assert np.all(np.isfinite(stats.precision))
    np.testing.assert_allclose(stats.mean, e.mean(axis=0))
    np.testing.assert_allclose(stats.covariance @ stats.precision, np.eye(3), atol=1e-6)
    with pytest.raises(ValueError, match="two error vectors"):
        error_statistics(e[:1], ridge=1e-3)


def _tiny_fit(seed: int, epochs: int = 2) -> tuple[Reconstructor, object]:
    train, val = ArrayWindows(sine_windows(256, 10)), ArrayWindows(sine_windows(64, 11))
    cfg = FitConfig(epochs=epochs, batch_size=32, lr=1e-2, patience=5, seed=seed, threads=1)
    model = make_model(ModelConfig(hidden=6, latent=3), C, W, CENTER, SCALE, seed)
    return model, fit(model, train, val, cfg, progress=False)


def test_same_seed_gives_identical_weights_and_another_seed_does_not() -> None:
    a, ra = _tiny_fit(seed=5)
    b, rb = _tiny_fit(seed=5)
    c, _ = _tiny_fit(seed=6)
    sa, sb, sc = a.state_dict(), b.state_dict(), c.state_dict()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)
    assert ra.train_loss == rb.train_loss and ra.val_loss == rb.val_loss
    assert not all(torch.equal(sa[k], sc[k]) for k in sa)


def test_fit_lowers_the_loss_and_keeps_the_best_epoch() -> None:
    model, result = _tiny_fit(seed=1, epochs=6)
    assert result.epochs_run >= 2
    assert result.val_loss[result.best_epoch - 1] == min(result.val_loss)
    assert min(result.val_loss) < result.val_loss[0]
    assert result.train_loss[-1] < result.train_loss[0]
    assert result.windows_seen == 256 * result.epochs_run


def test_early_stopping_restores_best_weights(monkeypatch: pytest.MonkeyPatch) -> None:
    """With a validation loss that worsens after epoch 1, fit stops after `patience` and restores epoch 1."""
    import training.fit as fit_module

    seen: list[dict] = []
    losses = iter([1.0, 2.0, 3.0, 4.0, 5.0])

    def fake_loss(model, windows, idx, config, batch=512):  # type: ignore[no-untyped-def]
        seen.append({k: v.clone() for k, v in model.state_dict().items()})
        return next(losses)

    monkeypatch.setattr(fit_module, "evaluate_loss", fake_loss)
    model = make_model(ModelConfig(hidden=4, latent=2), C, W, CENTER, SCALE, 0)
    cfg = FitConfig(epochs=10, batch_size=32, lr=1e-2, patience=2, seed=0, threads=1)
    result = fit(model, ArrayWindows(sine_windows(64, 0)), ArrayWindows(sine_windows(16, 1)), cfg, progress=False)
    assert result.epochs_run == 3 and result.best_epoch == 1
    final = model.state_dict()
    assert all(torch.equal(final[k], seen[0][k]) for k in final)
    assert not all(torch.equal(final[k], seen[-1][k]) for k in final)


def test_huber_loss_option_trains() -> None:
    model = make_model(ModelConfig(hidden=4, latent=2), C, W, CENTER, SCALE, 0)
    cfg = FitConfig(epochs=2, batch_size=32, lr=1e-2, loss="huber", seed=0, threads=1)
    result = fit(model, ArrayWindows(sine_windows(64, 0)), ArrayWindows(sine_windows(16, 1)), cfg, progress=False)
    assert np.all(np.isfinite(result.val_loss))


def test_fit_refuses_empty_parts() -> None:
    model = make_model(ModelConfig(hidden=4, latent=2), C, W, CENTER, SCALE, 0)
    with pytest.raises(ValueError, match="no training windows"):
        fit(model, ArrayWindows(np.empty((0, W, C))), ArrayWindows(sine_windows(4, 0)), FitConfig(threads=1), progress=False)
    with pytest.raises(ValueError, match="no validation windows"):
        fit(model, ArrayWindows(sine_windows(4, 0)), ArrayWindows(np.empty((0, W, C))), FitConfig(threads=1), progress=False)


def test_even_subset_spreads_over_the_range() -> None:
    assert even_subset(5, None).tolist() == [0, 1, 2, 3, 4]
    idx = even_subset(1000, 10)
    assert len(idx) == 10 and idx[0] == 0 and idx[-1] == 999


def test_scaler_shape_and_sign_are_checked() -> None:
    with pytest.raises(ValueError, match="scaler needs 4"):
        Reconstructor(ModelConfig(hidden=4, latent=2), C, W, CENTER[:3], SCALE)
    with pytest.raises(ValueError, match="> 0"):
        Reconstructor(ModelConfig(hidden=4, latent=2), C, W, CENTER, -SCALE)
