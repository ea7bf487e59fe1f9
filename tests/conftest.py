"""Shared pytest configuration: hypothesis profiles (select with HYPOTHESIS_PROFILE=ci), the tests' helper modules."""

from __future__ import annotations

import os
import sys
from pathlib import Path

from hypothesis import HealthCheck, settings

# The test files import their shared helpers (scenario_text.py,
# reproducibility.py) as plain modules. pytest's default import mode already
# puts this folder on sys.path; this keeps them importable under
# --import-mode=importlib too.
_TESTS = str(Path(__file__).resolve().parent)
if _TESTS not in sys.path:
    sys.path.insert(0, _TESTS)

# Simulation-heavy properties have no meaningful per-example deadline (STYLE.md, hypothesis).
settings.register_profile("ci", deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("dev", deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "dev"))


import pytest


@pytest.fixture(autouse=True)
def _own_results_store(tmp_path_factory, monkeypatch):
    """Every test gets an empty results store of its own (commands and their subprocesses read $DESIGNCALC_STORE).

    Tests never touch the user's ~/.cache, and a test that interrupts a run
    is not defeated by graphs another test stored.
    """
    monkeypatch.setenv("DESIGNCALC_STORE", str(tmp_path_factory.mktemp("store") / "results.sqlite"))
