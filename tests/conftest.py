"""Shared fixtures: small random GPT-2-layout checkpoints (tests/small_checkpoint.py)."""

from __future__ import annotations

import os

import pytest

from .small_checkpoint import random_gpt2  # noqa: F401  (tests import it from here too)

os.environ.setdefault("HF_HUB_OFFLINE", "1")


@pytest.fixture
def small_model(tmp_path):
    return random_gpt2(str(tmp_path / "model"))
