"""Shared pytest fixtures. Keep this file small: one fixture per shared resource."""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import pytest
from hypothesis import settings

# In CI (CI=true) property tests draw the same examples every run, so a red run can be
# reproduced locally with CI=true pytest ...; deadline off: a loaded machine is not a bug.
settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI", "").lower() in {"1", "true", "yes"} else "dev")

# Test folders on a RAM file system when there is one with room: every journalled point and
# every atomic write is fsync'ed (results/journal.py), milliseconds each on a disk and
# thousands in a suite, free on tmpfs. The code runs unchanged (fsync is called, the kernel
# has nothing to flush); no test can observe the difference, as none cuts the power (kill -9
# leaves the page cache intact). An explicit --basetemp wins; the folder is removed at the end.
RAM_TMP = Path("/dev/shm")
RAM_TMP_MIN_FREE_BYTES = 1 << 30
_ram_basetemp: Path | None = None


def pytest_configure(config: pytest.Config) -> None:
    global _ram_basetemp
    if config.option.basetemp or not RAM_TMP.is_dir() or not os.access(RAM_TMP, os.W_OK):
        return
    if shutil.disk_usage(RAM_TMP).free < RAM_TMP_MIN_FREE_BYTES:
        return
    _ram_basetemp = Path(tempfile.mkdtemp(prefix="noisebench-tests-", dir=RAM_TMP))
    config.option.basetemp = str(_ram_basetemp / "t")


def pytest_unconfigure(config: pytest.Config) -> None:
    if _ram_basetemp is not None:
        shutil.rmtree(_ram_basetemp, ignore_errors=True)


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


@pytest.fixture(scope="session")
def postgres_server():
    """URL of a throw-away PostgreSQL server (tests/_postgres.py) started once per session and
    shared by the database tests, each on databases of its own (``fresh_database``); skipped
    with the printed reason when none can be started."""
    from _postgres import temporary_postgres

    context = temporary_postgres()
    try:
        url = context.__enter__()
    except RuntimeError as exc:
        print(f"PostgreSQL not available: {exc}")
        pytest.skip(f"PostgreSQL could not be started: {exc}")
    try:
        yield url
    finally:
        context.__exit__(None, None, None)
