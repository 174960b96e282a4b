"""Fixtures of the example LNA tests: this folder's plan unless --nb-plan names another.

SAFETY: on real instruments (``--nb-bench TCPIP0::...``) read the bench-safety cautions first
(README "Safety first", or ``noisebench run --help``); the plugin prints them when it opens real
instruments. They do not replace the instrument manuals, local codes and licensed practice.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from noisebench.frontends.pytest_plugin import configured_plan_path

HERE = Path(__file__).resolve().parent


@pytest.fixture(scope="session")
def nb_plan_path(pytestconfig: pytest.Config) -> Path:
    """``--nb-plan`` / ini ``nb_plan`` when given, else ``lna_plan.toml`` next to this file."""
    return configured_plan_path(pytestconfig) or HERE / "lna_plan.toml"
