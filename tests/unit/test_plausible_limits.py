"""The plausible-limits rule (service/manifest.py): centre +- PLAUSIBLE_SCALES scales,
widened to the training range, within +-FLOAT32_SAFE; older manifests get it from the scaler."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from service.manifest import FLOAT32_SAFE, PLAUSIBLE_SCALES, Manifest, file_sha256, load_manifest, plausible_limits

BUNDLED = Path(__file__).resolve().parents[2] / "models" / "booster-pumps" / "1"


def test_rule_from_the_scaler_and_from_the_training_range() -> None:
    lim = plausible_limits([10.0, 0.0], [2.0, 1e35])
    assert lim.source == "scaler"
    assert lim.low[0] == 10.0 - 2.0 * PLAUSIBLE_SCALES and lim.high[0] == 10.0 + 2.0 * PLAUSIBLE_SCALES
    assert (lim.low[1], lim.high[1]) == (-FLOAT32_SAFE, FLOAT32_SAFE)  # never beyond float32
    assert np.isfinite(np.float32(lim.high[1]))
    wide = plausible_limits([10.0], [2.0], observed_low=[-1e5], observed_high=[11.0])
    assert wide.source == "training" and wide.low[0] == -1e5 - 2.0 * PLAUSIBLE_SCALES and wide.high[0] == 11.0 + 2.0 * PLAUSIBLE_SCALES


def test_the_bundled_manifest_carries_the_limits_its_scaler_gives_and_its_onnx_hash_holds() -> None:
    raw = json.loads((BUNDLED / "manifest.json").read_text())
    assert raw["plausible"]["source"] == "scaler"
    m = load_manifest(BUNDLED)
    assert m.plausible == plausible_limits(m.scaler.center, m.scaler.scale)
    assert file_sha256(BUNDLED / m.onnx_file) == m.onnx_sha256


def test_an_older_manifest_without_limits_gets_them_from_its_scaler() -> None:
    raw = json.loads((BUNDLED / "manifest.json").read_text())
    del raw["plausible"]
    m = Manifest.model_validate(raw)
    assert m.plausible == plausible_limits(m.scaler.center, m.scaler.scale)


def test_limits_that_do_not_fit_the_manifest_are_refused() -> None:
    raw = json.loads((BUNDLED / "manifest.json").read_text())
    raw["plausible"] = {**raw["plausible"], "high": [1e39] * 6}
    with pytest.raises(ValueError, match="plausible limits must satisfy"):
        Manifest.model_validate(raw)
    raw["plausible"] = {"low": [0.0] * 5, "high": [1.0] * 5, "source": "training"}
    with pytest.raises(ValueError, match="6 low and high"):
        Manifest.model_validate(raw)
