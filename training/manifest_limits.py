"""Give an existing model folder's manifest its plausible limits without retraining.

    python -m training.manifest_limits models/booster-pumps/1

Reads manifest.json, derives the limits from its scaler by the one rule in
service/manifest.py (`plausible_limits`, the centre standing in for the training range,
`source: "scaler"`), and writes the manifest back the way the trainer writes it (indented
JSON of the validated model, to a temporary name renamed into place). model.onnx is not
touched, so the manifest's onnx_sha256 stays valid; the script checks it. A manifest that
already has limits is left as it is. Reproducible: the same manifest gives the same bytes.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

from service.manifest import MANIFEST_FILE, Manifest, file_sha256


def add_limits(folder: Path) -> bool:
    """True when the manifest was rewritten with limits, False when it had them already."""
    path = Path(folder) / MANIFEST_FILE
    raw = json.loads(path.read_text(encoding="utf-8"))
    if raw.get("plausible") is not None:
        return False
    manifest = Manifest.model_validate(raw)  # derives the limits from the scaler
    digest = file_sha256(Path(folder) / manifest.onnx_file)
    if digest != manifest.onnx_sha256:
        raise SystemExit(f"{folder}: {manifest.onnx_file} does not match the manifest's onnx_sha256; not touching it")
    pending = path.with_name(path.name + ".tmp")
    pending.write_text(json.dumps(manifest.model_dump(mode="json"), indent=2) + "\n", encoding="utf-8")
    os.replace(pending, path)
    return True


def main(argv: list[str]) -> int:
    if not argv:
        print(__doc__, file=sys.stderr)
        return 2
    for folder in argv:
        print(f"{folder}: {'limits added' if add_limits(Path(folder)) else 'already has limits'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
