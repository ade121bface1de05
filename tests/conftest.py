"""Suite-wide settings: engine="auto" picks per-shadow stepping unless a test (or the caller's
environment) says otherwise, so that runs compared bit for bit use one engine; the timing choice
itself is tested in tests/test_stacked.py."""

from __future__ import annotations

import os

import pytest

from sgdstab.shadows.stacked import AUTO_OVERRIDE_VARIABLE


@pytest.fixture(autouse=True)
def _fixed_auto_engine(monkeypatch):
    if AUTO_OVERRIDE_VARIABLE not in os.environ:
        monkeypatch.setenv(AUTO_OVERRIDE_VARIABLE, "per_shadow")
    yield
