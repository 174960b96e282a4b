"""Simulated-bench addresses: ``sim://<scenario>[?seed=N][&receiver=sampled&...]``.

``receiver=sampled`` puts the simulated sampled receiver (:mod:`noisebench.sims.samples`) in
place of the simulated spectrum analyzer; the options of
:mod:`noisebench.sampled.address` (window, overlap, scale, iq_correction) then apply."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from noisebench.errors import InputError

if TYPE_CHECKING:
    from noisebench.sampled.address import SampledOptions


@dataclass(frozen=True)
class SimAddress:
    """A parsed ``sim://<scenario>?seed=N`` address."""

    scenario: str
    seed: int = 0
    receiver: str = "analyzer"  # or "sampled"
    sampled: SampledOptions | None = None  # set when receiver=sampled


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


def simulated_bench_problems(
    resource: str, spans_hz: list[tuple[float, float]] | None = None
) -> list[str]:
    """Plan-time problems of a ``sim://`` analyzer address, one line each: the address itself,
    the scenario it names, and (``spans_hz``: each point's lowest and highest frequency) points
    outside the simulated analyzer's range, so they are refused before anything is measured."""
    key = "bench.analyzer.resource"
    try:
        address = parse_sim_address(resource)
    except InputError as exc:
        return [f"{key}: {exc.message.split(': ', 1)[-1]}"]
    problems = _check_scenario(address.scenario)
    if problems or spans_hz is None:
        return problems
    return _check_sim_range(address.scenario, spans_hz)


def _check_scenario(name: str) -> list[str]:
    """A ``sim://`` scenario must exist (packaged name or .toml path), as the run will need."""
    from noisebench.sims.scenario import SCENARIO_SUFFIX, available_scenarios

    names = available_scenarios()
    if name in names or (Path(name).suffix == SCENARIO_SUFFIX and Path(name).is_file()):
        return []
    return [
        f"bench.analyzer.resource: no scenario {name!r} (use one of {names} "
        f"or a path to a {SCENARIO_SUFFIX} file)"
    ]


def _check_sim_range(scenario: str, spans_hz: list[tuple[float, float]]) -> list[str]:
    """Every point's span must lie within the simulated analyzer's frequency range."""
    from noisebench.sims.scenario import load_scenario

    try:
        spec = load_scenario(scenario).analyzer
    except InputError:  # reported at run time with its own message
        return []
    lo, hi = spec.min_freq_hz, spec.max_freq_hz
    bad = [(a + b) / 2 for a, b in spans_hz if a < lo or b > hi]
    if not bad:
        return []
    shown = ", ".join(f"{f:.6g}" for f in bad[:3]) + (" ..." if len(bad) > 3 else "")
    return [
        f"sweep: {len(bad)} point(s) ({shown} Hz) with their span fall outside the "
        f"simulated analyzer's range {lo:.6g}..{hi:.6g} Hz (move them inside or narrow "
        "span_hz)"
    ]
