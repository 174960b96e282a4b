"""Fixtures of the example LNA tests: this folder's plan unless --nb-plan names another."""

from __future__ import annotations

from pathlib import Path

import pytest

from noisebench.frontends.pytest_plugin import configured_plan_path

HERE = Path(__file__).resolve().parent


@pytest.fixture(scope="session")
def nb_plan_path(pytestconfig: pytest.Config) -> Path:
    """``--nb-plan`` / ini ``nb_plan`` when given, else ``lna_plan.toml`` next to this file."""
    return configured_plan_path(pytestconfig) or HERE / "lna_plan.toml"
