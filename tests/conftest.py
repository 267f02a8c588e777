"""Shared test set-up.

Warnings are errors (see pyproject.toml); tests that expect a warning say so
with ``pytest.warns``. Markers are strict: ``kafka``, ``slow``, ``browser``.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
sys.path.insert(0, str(Path(__file__).resolve().parent))
pytest_plugins = ["kafka_broker"]  # the real Kafka broker fixture and its report hook


@pytest.fixture
def fixtures_dir() -> Path:
    return FIXTURES


@pytest.fixture
def rng():
    import numpy as np

    # Fixed seed: tests are deterministic.
    return np.random.default_rng(20261201)
