"""Shared fixtures. Keep module-level imports light: heavy libraries are imported in the tests."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
TEST_SWITCHES = {"NIGHTBANK_REQUIRE_POSTGRES", "NIGHTBANK_TEST_PG"}
sys.path.insert(0, str(Path(__file__).resolve().parent))  # tests/factories.py


@pytest.fixture(autouse=True)
def _clean_nightbank_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every test starts without NIGHTBANK_* settings from the calling shell (test switches excepted)."""
    for key in list(os.environ):
        if key.startswith("NIGHTBANK_") and key not in TEST_SWITCHES:
            monkeypatch.delenv(key, raising=False)
