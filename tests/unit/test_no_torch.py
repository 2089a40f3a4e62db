"""The service never imports torch, not even indirectly (DESIGN.md "One source of truth")."""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

PROBE = textwrap.dedent(
    """
    import importlib, pkgutil, sys

    class BlockTorch:
        def find_spec(self, name, path=None, target=None):
            if name == "torch" or name.startswith("torch."):
                raise ImportError(f"torch is blocked in the service: {name}")
            return None

    sys.meta_path.insert(0, BlockTorch())
    import service

    names = ["service"]
    for info in pkgutil.walk_packages(service.__path__, "service."):
        names.append(info.name)
    for name in names:
        if ".migrations." in name or name.endswith(".migrations"):
            continue  # Alembic revision scripts are loaded by Alembic, not imported
        importlib.import_module(name)
    assert not any(m == "torch" or m.startswith("torch.") for m in sys.modules), "torch got imported"
    print(len(names))
    """
)


def test_every_service_module_imports_with_torch_blocked() -> None:
    done = subprocess.run(
        [sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert int(done.stdout.strip()) >= 8  # the service package and its modules were walked


def test_the_blocker_does_block_torch() -> None:
    """Guard against a probe that cannot fail: the same finder stops a direct torch import."""
    probe = PROBE.split("import service")[0] + "\ntry:\n    import torch\nexcept ImportError:\n    print('blocked')\n"
    done = subprocess.run([sys.executable, "-c", probe], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert done.stdout.strip() == "blocked", done.stderr
