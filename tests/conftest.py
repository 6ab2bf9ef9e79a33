"""Shared pytest fixtures. Warnings are errors (pyproject.toml)."""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

# matplotlib must never try to open a window in tests or CI
os.environ.setdefault("MPLBACKEND", "Agg")

# Property tests: the same examples on every run (derandomize) and nothing written to the
# source tree (no example database), so a CI run cannot fail on an example no one has seen;
# no timing checks (deadline, too_slow), which a loaded machine would trip. For a wider random
# search run with HYPOTHESIS_PROFILE=explore.
settings.register_profile("benchrun", derandomize=True, database=None, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("explore", deadline=None, database=None,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "benchrun"))

# Throwaway PostgreSQL cluster fixtures (pg_cluster, postgres_url): tests/pg_fixture.py
pytest_plugins = ("pg_fixture",)
