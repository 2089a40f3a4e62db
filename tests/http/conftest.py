"""Fixtures for the HTTP tests; the machinery is in service_env.py and tiny_model.py."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

import tiny_model  # noqa: E402
from service_env import Env, bundled_model_dir, start_env  # noqa: E402


@pytest.fixture
def tiny_dir(tmp_path: Path) -> Path:
    root = tmp_path / "models"
    tiny_model.build(root)
    return root


@pytest.fixture
def env(tmp_path: Path, tiny_dir: Path) -> Iterator[Env]:
    """The app on the steerable tiny model (window 6, stride 2, 60 s grid, fill 2 steps)."""
    yield from start_env(tmp_path, tiny_dir)


@pytest.fixture
def bundled_env(tmp_path: Path) -> Iterator[Env]:
    """The app on the bundled model."""
    yield from start_env(tmp_path, bundled_model_dir())
