"""Shared fixtures. FIELDPLAN_FULL=1 runs slow sweeps at full size; CI runs them reduced."""

import os

import matplotlib
import pytest

matplotlib.use("Agg")

FULL = os.environ.get("FIELDPLAN_FULL") == "1"


@pytest.fixture(autouse=True)
def _cache_dir(tmp_path_factory, monkeypatch):
    # Keep on-disk field caches out of the user's home during tests.
    monkeypatch.setenv("FIELDPLAN_CACHE", str(tmp_path_factory.getbasetemp() / "fieldplan-cache"))


@pytest.fixture
def full():
    """True when the full-size slow sweeps were asked for."""
    return FULL
