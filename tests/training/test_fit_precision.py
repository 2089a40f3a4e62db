"""Training precision (issue 12, training speed): bfloat16 autocast only where the CPU has
it natively, decided at run time; weights, gradients and everything after fit stay float32."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from training.config import FitConfig, ModelConfig  # noqa: E402
from training.dataset import ArrayWindows  # noqa: E402
from training.fit import cpu_has_native_bf16, fit, make_model, resolve_precision  # noqa: E402

C, W = 3, 10
CENTER, SCALE = np.zeros(C), np.ones(C)


def _windows(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(W)[None, :, None] + rng.uniform(0, 6, (n, 1, 1))
    return (np.sin(t / 2.0 + np.arange(C)) + 0.05 * rng.normal(size=(n, W, C))).astype(np.float32)


def _fit(precision: str, seed: int = 2):  # type: ignore[no-untyped-def]
    cfg = FitConfig(epochs=2, batch_size=32, lr=1e-2, patience=5, seed=seed, threads=1, precision=precision)  # type: ignore[arg-type]
    model = make_model(ModelConfig(hidden=8, latent=2), C, W, CENTER, SCALE, seed)
    return model, fit(model, ArrayWindows(_windows(128, 1)), ArrayWindows(_windows(32, 2)), cfg, progress=False)


def test_native_bfloat16_is_read_from_the_cpu_flags(tmp_path: Path) -> None:
    with_amx = tmp_path / "amx"
    with_amx.write_text("processor\t: 0\nflags\t\t: fpu sse2 avx512f amx_bf16 amx_tile\n")
    without = tmp_path / "plain"
    without.write_text("processor\t: 0\nflags\t\t: fpu sse2 avx2 fma\n")
    assert cpu_has_native_bf16(str(with_amx)) == torch.backends.mkldnn.is_available()
    assert cpu_has_native_bf16(str(without)) is False
    assert cpu_has_native_bf16(str(tmp_path / "missing")) is False
    assert resolve_precision("float32") == "float32"
    assert resolve_precision("auto") == ("bfloat16" if cpu_has_native_bf16() else "float32")
    with pytest.raises(ValueError, match="precision"):
        resolve_precision("float16")


@pytest.mark.skipif(not cpu_has_native_bf16(), reason="no native bfloat16 on this CPU")
def test_bfloat16_training_keeps_float32_weights_is_deterministic_and_differs_from_float32() -> None:
    a, ra = _fit("bfloat16")
    b, _ = _fit("bfloat16")
    f, rf = _fit("float32")
    assert ra.precision == "bfloat16" and rf.precision == "float32"
    assert all(p.dtype == torch.float32 for p in a.parameters())
    sa, sb, sf = a.state_dict(), b.state_dict(), f.state_dict()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)  # same seed, same weights
    assert not all(torch.equal(sa[k], sf[k]) for k in sa)  # autocast really ran in bfloat16
    assert ra.val_loss[-1] < ra.val_loss[0] * 1.5 and np.isfinite(ra.val_loss).all()
