"""Shared pytest fixtures. Keep this file small: one fixture per shared resource."""

from __future__ import annotations

import pytest


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
