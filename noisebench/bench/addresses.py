"""Which back end an address string names, without importing any back end."""

from __future__ import annotations

SIM_SCHEME = "sim://"
"""The in-process simulated bench: ``sim://<scenario>[?seed=N]`` (the simulated bench)."""


def is_simulated(resource: str) -> bool:
    """True for a ``sim://`` address (the in-process simulated bench)."""
    return resource.startswith(SIM_SCHEME)
