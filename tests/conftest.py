"""Shared pytest fixtures. Warnings are errors (pyproject.toml)."""

from __future__ import annotations

import os

# matplotlib must never try to open a window in tests or CI
os.environ.setdefault("MPLBACKEND", "Agg")

# Throwaway PostgreSQL cluster fixtures (pg_cluster, postgres_url): tests/pg_fixture.py
pytest_plugins = ("pg_fixture",)
