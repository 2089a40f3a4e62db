"""ONNX export through the service's scorer: parity with PyTorch, refusal, atomic model folders."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")
onnx = pytest.importorskip("onnx")

from service.manifest import (  # noqa: E402
    AlertRuleDefaults,
    CalibrationScores,
    CalibrationSeries,
    CalibrationSummary,
    Channel,
    GapPolicy,
    Manifest,
    Scaler,
    Thresholds,
    TrainingSummary,
    ValidationFigures,
    file_sha256,
    load_calibration,
    load_manifest,
)
from service.scoring import OnnxScorer  # noqa: E402
from training import export as export_module  # noqa: E402
from training.config import ModelConfig  # noqa: E402
from training.export import ExportError, Parity, write_model_folder  # noqa: E402
from training.model import Reconstructor, error_statistics, flops_per_window  # noqa: E402

C, W = 3, 10
CENTER = np.array([50.0, 200.0, 1.5])
SCALE = np.array([10.0, 20.0, 0.3])
NAMES = ["flow_m3h", "discharge_kpa", "vibration_mm_s"]


def real_like(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(W)[None, :, None]
    x = np.sin(0.5 * t + rng.uniform(0, 6, size=(n, 1, 1))) * np.array([1.0, -0.8, 0.5])
    return (CENTER + SCALE * (x + 0.05 * rng.normal(size=(n, W, C)))).astype(np.float32)


def tiny_model(
    merge: str = "concat", bidirectional: bool = True, score: str = "mean_squared", seed: int = 0, decoder_layers: int | None = None
) -> Reconstructor:
    torch.manual_seed(seed)
    cfg = ModelConfig(
        hidden=5, latent=2, layers=2, decoder_layers=decoder_layers, merge=merge, bidirectional=bidirectional, score=score
    )
    model = Reconstructor(cfg, C, W, CENTER, SCALE).eval()
    if score in ("mahalanobis", "mahalanobis_bias"):
        with torch.no_grad():
            z, z_hat = model.reconstruct_scaled(torch.from_numpy(real_like(200, 9)))
        stats = error_statistics(torch.abs(z - z_hat).reshape(-1, C).numpy(), ridge=1e-3)
        model.set_mahalanobis(stats.mean, stats.precision)
        if score == "mahalanobis_bias":
            bias = error_statistics((z - z_hat).mean(dim=1).numpy(), ridge=1e-3)
            model.set_bias(bias.mean, bias.precision)
    return model


def manifest_builder(model: Reconstructor, version: str = "t1"):  # type: ignore[no-untyped-def]
    cfg = model.config

    def build(sha: str, parity: Parity) -> Manifest:
        return Manifest(
            model_id="tiny",
            version=version,
            created_at=datetime(2026, 1, 1, tzinfo=timezone.utc),
            channels=[Channel(name=n, unit="u") for n in NAMES],
            sample_period_s=60.0,
            window=W,
            stride=2,
            gap_policy=GapPolicy(max_fill_steps=2),
            scaler=Scaler(center=CENTER.tolist(), scale=SCALE.tolist()),
            score=model.score_spec(),
            thresholds=Thresholds(
                warning=1.0, critical=2.0, method="empirical", calibration=CalibrationSummary(windows=1, assets=1, span_s=60.0)
            ),
            alert_rule=AlertRuleDefaults(on_k=3, on_n=5, off_m=6, deadband_frac=0.1),
            architecture=cfg.architecture(model.parameters_count, flops_per_window(cfg, C, W)),
            training=TrainingSummary(
                data_sha256="0" * 64,
                assets=["a"],
                rows=1,
                windows_train=1,
                windows_validation=1,
                windows_calibration=1,
                excluded_periods=0,
                start=datetime(2026, 1, 1, tzinfo=timezone.utc),
                end=datetime(2026, 1, 2, tzinfo=timezone.utc),
                epochs_run=0,
                seed=0,
            ),
            validation=ValidationFigures(
                val_loss=0.0, onnx_max_abs_error=parity.overall_max_abs_error, onnx_score_rel_error=parity.score_rel_error
            ),
            onnx_sha256=sha,
        )

    return build


CAL = CalibrationScores(
    model_id="tiny", version="t1", sample_period_s=60.0, stride=2, assets={"a": CalibrationSeries(window_end_index=[2, 4], score=[0.1, 0.2])}
)


@pytest.mark.parametrize(
    ("merge", "bidirectional", "score", "decoder_layers"),
    [
        ("concat", True, "mean_squared", None),
        ("sum", True, "mean_squared", None),
        ("multiply", True, "mean_squared", None),
        ("average", True, "mean_squared", None),
        ("concat", False, "mean_squared", None),
        ("concat", True, "mahalanobis", None),
        ("concat", True, "mahalanobis", 1),  # the bundled model's shape: two encoder layers, one decoder layer
        ("average", False, "mahalanobis", 1),
        ("concat", True, "mahalanobis_bias", 1),  # issue 13: the per-step term plus the window's error bias
    ],
)
def test_onnx_runtime_matches_torch_on_every_output_element(
    tmp_path: Path, merge: str, bidirectional: bool, score: str, decoder_layers: int | None
) -> None:
    """Reference: the PyTorch model itself, on fresh random windows and real-like windows."""
    model = tiny_model(merge, bidirectional, score, decoder_layers=decoder_layers)
    target = tmp_path / "tiny" / "t1"
    manifest, parity = write_model_folder(target, model, manifest_builder(model), CAL, real_like(16, 1))
    assert parity.score_rel_error <= 1e-4
    scorer = OnnxScorer(target, threads=1, chunk_size=16)  # the service's own loading path, sha checked
    rng = np.random.default_rng(123)  # windows the export check never saw
    fresh = (CENTER + SCALE * rng.normal(0, 3, size=(37, W, C))).astype(np.float32)
    windows = np.concatenate([fresh, real_like(20, 2)])
    got = scorer.score(windows)
    with torch.inference_mode():
        recon, resid, s = (t.numpy() for t in model(torch.from_numpy(windows)))
    np.testing.assert_allclose(got.reconstruction, recon, rtol=1e-5, atol=1e-4 * SCALE.max())
    np.testing.assert_allclose(got.residual, resid, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(got.score, s, rtol=1e-4)
    assert manifest.score.method == score
    assert load_manifest(target).onnx_sha256 == file_sha256(target / "model.onnx")
    assert load_calibration(target, manifest).assets["a"].score == [0.1, 0.2]
    graph = onnx.load(str(target / "model.onnx"))
    assert graph.opset_import[0].version >= 17
    dims = graph.graph.input[0].type.tensor_type.shape.dim
    assert dims[0].dim_param and [d.dim_value for d in dims[1:]] == [W, C]  # dynamic batch


def _ort_outputs(path: Path, windows: np.ndarray) -> list[np.ndarray]:
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return session.run(["reconstruction", "residual", "score"], {"readings": windows})


@pytest.mark.parametrize("decoder_layers", [None, 1])
def test_lean_graph_drops_the_layout_copies_and_computes_the_same(tmp_path: Path, decoder_layers: int | None) -> None:
    """The rewritten graph (training/graph_rewrite.py) against the exporter's own graph and torch."""
    model = tiny_model("concat", True, "mahalanobis", decoder_layers=decoder_layers)
    plain, lean = tmp_path / "plain.onnx", tmp_path / "lean.onnx"
    export_module.export_onnx(model, plain, lean=False)
    export_module.export_onnx(model, lean)
    ops_plain = [n.op_type for n in onnx.load(str(plain)).graph.node]
    g = onnx.load(str(lean)).graph
    ops_lean = [n.op_type for n in g.node]
    assert "Tile" in ops_plain and "Tile" not in ops_lean  # the latent is repeated time-major, no Tile + Transpose
    assert ops_lean.count("Transpose") < ops_plain.count("Transpose")
    assert "ConstantOfShape" not in ops_lean  # zero initial states are the LSTM op's default
    for node in g.node:
        if node.op_type == "LSTM":
            assert len(node.input) == 4  # X, W, R, B: no sequence_lens, no initial states
    # the head runs time-major: a MatMul over (T, B, 2H), then only its C-wide result is transposed
    (head,) = [n for n in g.node if "/head/MatMul_output_0" in n.output]
    (head_matmul,) = [n for n in g.node if head.input[0] in n.output]
    assert head.op_type == "Transpose" and head_matmul.op_type == "MatMul"
    windows = np.concatenate([real_like(9, 4), (CENTER + SCALE * np.random.default_rng(8).normal(0, 3, (7, W, C))).astype(np.float32)])
    for a, b in zip(_ort_outputs(plain, windows), _ort_outputs(lean, windows)):
        np.testing.assert_allclose(b, a, rtol=1e-5, atol=1e-6)
    with torch.inference_mode():
        ref = [t.numpy() for t in model(torch.from_numpy(windows))]
    np.testing.assert_allclose(_ort_outputs(lean, windows)[2], ref[2], rtol=1e-4)  # reference: PyTorch itself


def _corrupting_scorer(tmp_path: Path):  # type: ignore[no-untyped-def]
    """A check scorer over a copy of the graph whose head bias was shifted: it must be refused."""

    def load(folder: Path, manifest: Manifest) -> OnnxScorer:
        graph = onnx.load(str(folder / "model.onnx"))
        for init in graph.graph.initializer:
            if init.name.endswith("head.bias"):
                arr = onnx.numpy_helper.to_array(init) + np.float32(0.5)
                init.CopyFrom(onnx.numpy_helper.from_array(arr, init.name))
                break
        else:
            raise AssertionError("head.bias not found in the graph")
        bad = tmp_path / "corrupted"
        bad.mkdir(exist_ok=True)
        onnx.save(graph, str(bad / "model.onnx"))
        return OnnxScorer(bad, threads=1, manifest=manifest, verify_sha256=False)

    return load


def test_export_refuses_a_disagreeing_graph_and_leaves_nothing(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    model = tiny_model()
    monkeypatch.setattr(export_module, "load_check_scorer", _corrupting_scorer(tmp_path))
    out = tmp_path / "models"
    with pytest.raises(ExportError, match="disagrees with PyTorch.*score relative error"):
        write_model_folder(out / "tiny" / "t1", model, manifest_builder(model), CAL, real_like(8, 0))
    assert list((out / "tiny").iterdir()) == []  # no model folder, no temporary folder


def test_existing_folder_is_refused_unless_overwrite(tmp_path: Path) -> None:
    model = tiny_model()
    target = tmp_path / "tiny" / "t1"
    write_model_folder(target, model, manifest_builder(model), CAL, None)
    first = file_sha256(target / "model.onnx")
    with pytest.raises(ExportError, match="already exists"):
        write_model_folder(target, model, manifest_builder(model), CAL, None)
    other = tiny_model(seed=3)
    write_model_folder(target, other, manifest_builder(other), CAL, None, overwrite=True)
    assert file_sha256(target / "model.onnx") != first
    assert sorted(p.name for p in target.parent.iterdir()) == ["t1"]


def test_failure_after_export_leaves_no_folder_and_manifest_is_written_last(tmp_path: Path) -> None:
    model = tiny_model()
    seen = {}

    def extras(folder: Path, manifest: Manifest) -> None:
        seen["files"] = sorted(p.name for p in folder.iterdir())
        raise OSError("disk full while writing the report")

    with pytest.raises(OSError, match="disk full"):
        write_model_folder(tmp_path / "tiny" / "t1", model, manifest_builder(model), CAL, None, write_extras=extras)
    assert seen["files"] == ["calibration_scores.json", "model.onnx"]  # no manifest before the extras
    assert list((tmp_path / "tiny").iterdir()) == []
