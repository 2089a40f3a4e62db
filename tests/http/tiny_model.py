"""A small real ONNX model folder for tests that need scores they can steer.

The graph reconstructs every window as the scaler's centre, so a window's score is the
mean squared scaled distance of its readings from the centre: readings at the centre
score 0, readings k scales away score k^2. It runs through the real ONNX Runtime and the
real manifest validation like the bundled model does.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from service.manifest import CALIBRATION_FILE, MANIFEST_FILE, ONNX_FILE, file_sha256

CHANNELS = ("flow_m3h", "suction_kpa", "discharge_kpa", "current_a", "bearing_temp_c", "vibration_mm_s")
UNITS = ("m3/h", "kPa", "kPa", "A", "degC", "mm/s")
CENTER = (100.0, 250.0, 650.0, 40.0, 45.0, 1.5)
SCALE = (10.0, 5.0, 10.0, 2.0, 1.0, 0.2)


def _graph(window: int, c: int) -> onnx.ModelProto:
    center = numpy_helper.from_array(np.asarray(CENTER[:c], np.float32).reshape(1, 1, c), "center")
    scale = numpy_helper.from_array(np.asarray(SCALE[:c], np.float32).reshape(1, 1, c), "scale")
    zero = numpy_helper.from_array(np.zeros((1, 1, 1), np.float32), "zero")
    nodes = [
        helper.make_node("Sub", ["readings", "center"], ["diff"]),
        helper.make_node("Div", ["diff", "scale"], ["scaled"]),
        helper.make_node("Mul", ["scaled", "scaled"], ["residual"]),
        helper.make_node("ReduceMean", ["residual"], ["score"], axes=[1, 2], keepdims=0),
        helper.make_node("Mul", ["readings", "zero"], ["zeros"]),
        helper.make_node("Add", ["zeros", "center"], ["reconstruction"]),
    ]
    graph = helper.make_graph(
        nodes,
        "centre_reconstructor",
        [helper.make_tensor_value_info("readings", TensorProto.FLOAT, ["batch", window, c])],
        [
            helper.make_tensor_value_info("reconstruction", TensorProto.FLOAT, ["batch", window, c]),
            helper.make_tensor_value_info("residual", TensorProto.FLOAT, ["batch", window, c]),
            helper.make_tensor_value_info("score", TensorProto.FLOAT, ["batch"]),
        ],
        initializer=[center, scale, zero],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def build(
    root: Path,
    *,
    model_id: str = "test-pumps",
    version: str = "1",
    window: int = 6,
    stride: int = 2,
    period_s: float = 60.0,
    max_fill_steps: int = 2,
    warning: float = 4.0,
    critical: float = 25.0,
    on_k: int = 2,
    on_n: int = 3,
    off_m: int = 2,
    deadband_frac: float = 0.1,
    assets: tuple[str, ...] = ("pump-01", "pump-02"),
    provisional: dict | None = None,
) -> Path:
    """Write <root>/<model_id>/<version>/ and return that folder."""
    folder = Path(root) / model_id / version
    folder.mkdir(parents=True, exist_ok=True)
    c = len(CHANNELS)
    onnx.save(_graph(window, c), str(folder / ONNX_FILE))
    now = datetime(2026, 10, 1, tzinfo=timezone.utc).isoformat()
    manifest = {
        "schema_version": 1,
        "model_id": model_id,
        "version": version,
        "created_at": now,
        "channels": [{"name": n, "unit": u} for n, u in zip(CHANNELS, UNITS)],
        "sample_period_s": period_s,
        "window": window,
        "stride": stride,
        "gap_policy": {"method": "ffill", "max_fill_steps": max_fill_steps},
        "scaler": {"center": list(CENTER), "scale": list(SCALE)},
        "score": {"method": "mean_squared"},
        "thresholds": {
            "warning": warning,
            "critical": critical,
            "method": "manual",
            "calibration": {"windows": 200, "assets": 2, "span_s": 200 * stride * period_s},
        },
        "alert_rule": {"on_k": on_k, "on_n": on_n, "off_m": off_m, "deadband_frac": deadband_frac},
        "architecture": {
            "kind": "lstm_reconstructor",
            "encoder": [{"hidden": 1}],
            "latent": 1,
            "decoder": [{"hidden": 1}],
            "dropout": 0.0,
            "parameters": 0,
            "flops_per_window": 4 * window * c,
        },
        "training": {
            "data_sha256": "0" * 64,
            "source": "tests/http/tiny_model.py",
            "assets": list(assets),
            "rows": 0,
            "windows_train": 0,
            "windows_validation": 0,
            "windows_calibration": 200,
            "excluded_periods": 0,
            "start": now,
            "end": now,
            "epochs_run": 0,
            "seed": 0,
        },
        "validation": {"val_loss": 0.0, "onnx_max_abs_error": 0.0, "onnx_score_rel_error": 0.0},
        "onnx_sha256": file_sha256(folder / ONNX_FILE),
    }
    if provisional is not None:
        manifest["provisional"] = provisional
    rng = np.random.default_rng(0)
    calib = {
        "model_id": model_id,
        "version": version,
        "sample_period_s": period_s,
        "stride": stride,
        "assets": {
            a: {"window_end_index": list(range(0, 100 * stride, stride)), "score": [float(x) for x in rng.chisquare(6, 100) / 6]}
            for a in assets
        },
    }
    (folder / CALIBRATION_FILE).write_text(json.dumps(calib), encoding="utf-8")
    (folder / MANIFEST_FILE).write_text(json.dumps(manifest, indent=1), encoding="utf-8")
    return folder
