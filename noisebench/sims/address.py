"""Simulated-bench addresses: ``sim://<scenario>[?seed=N][&receiver=sampled&...]``.

``receiver=sampled`` puts the simulated sampled receiver (:mod:`noisebench.sims.samples`) in
place of the simulated spectrum analyzer; the options of
:mod:`noisebench.sampled.address` (window, overlap, scale, iq_correction) then apply."""

from __future__ import annotations

from dataclasses import dataclass

from noisebench.errors import InputError


@dataclass(frozen=True)
class SimAddress:
    """A parsed ``sim://<scenario>?seed=N`` address."""

    scenario: str
    seed: int = 0
    receiver: str = "analyzer"  # or "sampled"
    sampled: object = None  # noisebench.sampled.address.SampledOptions when receiver=sampled


def parse_sim_address(resource: str) -> SimAddress:
    """Parse ``sim://<scenario>[?seed=N]``; raise InputError naming what is wrong."""
    from urllib.parse import parse_qs, urlsplit

    parts = urlsplit(resource)
    if parts.scheme != "sim":
        raise InputError("resource", f"{resource!r} is not a sim:// address")
    scenario = (parts.netloc + parts.path).strip("/")
    if not scenario:
        raise InputError(
            "resource", f"{resource!r} names no scenario", fix="e.g. sim://demo-lna?seed=1"
        )
    query = parse_qs(parts.query, keep_blank_values=True)
    receiver = query.get("receiver", ["analyzer"])[-1]
    if receiver not in ("analyzer", "sampled"):
        raise InputError(
            "resource",
            f"receiver={receiver!r} in {resource!r}",
            fix="use receiver=analyzer (default) or receiver=sampled",
        )
    allowed = {"seed", "receiver"}
    sampled = None
    if receiver == "sampled":
        from noisebench.sampled.address import OPTIONS, parse_options

        allowed |= set(OPTIONS)
        sampled = parse_options(query, resource)
    unknown = sorted(set(query) - allowed)
    if unknown:
        raise InputError(
            "resource",
            f"unknown option {unknown[0]!r} in {resource!r}",
            fix="options are seed=N and receiver=sampled (then window, overlap, scale, "
            "iq_correction)",
        )
    seed_text = query.get("seed", ["0"])[-1]
    try:
        seed = int(seed_text)
    except ValueError:
        raise InputError(
            "resource",
            f"seed {seed_text!r} in {resource!r} is not an integer",
            fix="e.g. sim://demo-lna?seed=1",
        ) from None
    if seed < 0:
        raise InputError("resource", f"seed {seed} must be >= 0")
    return SimAddress(scenario, seed, receiver, sampled)
