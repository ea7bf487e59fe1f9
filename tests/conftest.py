"""Shared pytest configuration: hypothesis profiles (select with HYPOTHESIS_PROFILE=ci)."""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

# Simulation-heavy properties have no meaningful per-example deadline (STYLE.md, hypothesis).
settings.register_profile("ci", deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("dev", deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "dev"))
