"""Shared pytest fixtures. Keep this file small: one fixture per shared resource."""

from __future__ import annotations

import os

import pytest
from hypothesis import settings

# In CI (CI=true) property tests draw the same examples every run, so a red run can be
# reproduced locally with CI=true pytest ...; deadline off: a loaded machine is not a bug.
settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI", "").lower() in {"1", "true", "yes"} else "dev")


@pytest.fixture
def sim_server():
    """A started SCPI simulator (scenario "demo-lna", seed 1), stopped after the test."""
    from noisebench.sims.bench import SimulatedBench
    from noisebench.sims.scpi_server import SimServer

    server = SimServer(SimulatedBench.from_scenario("demo-lna", seed=1)).start()
    try:
        yield server
    finally:
        server.stop()
