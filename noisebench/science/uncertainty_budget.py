"""A budget table: the contributions of the influence quantities to the NF, combined by the GUM
law of propagation or by Monte Carlo."""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
)

from noisebench.errors import InputError
from noisebench.science.propagation import (
    Distribution,
    InputQuantity,
    Model,
    MonteCarloResult,
    propagate_gum,
    propagate_monte_carlo,
)
from noisebench.science.uncertainty_inputs import UncertaintyInputs

# =========================================================================== budget models


class Contribution(BaseModel):
    """One line of a budget: ``contribution_db = sensitivity * u`` (signed)."""

    model_config = ConfigDict(frozen=True)

    name: str
    u: float  # standard uncertainty, in `unit`
    unit: str
    sensitivity: float  # dB per `unit`
    contribution_db: float
    distribution: Distribution

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "u": self.u,
            "unit": self.unit,
            "sensitivity": self.sensitivity,
            "contribution_db": self.contribution_db,
            "distribution": self.distribution.value,
        }


class Budget(BaseModel):
    """The uncertainty budget of the noise figure at one frequency.

    ``nf_db`` is the model's value at the best estimates (equal to the point's NF);
    ``u_combined_db`` the combined standard uncertainty and ``U_expanded_db = k*u_c`` (GUM), or
    for ``method="monte_carlo"`` the Monte Carlo standard deviation and the half-width of its
    probabilistically symmetric coverage interval, with ``k`` the implied ratio. The GUM value
    is always kept in ``gum_u_combined_db``. ``omitted`` names the terms left out for lack of
    data (e.g. unknown reflections).
    """

    model_config = ConfigDict(frozen=True, populate_by_name=True)

    freq_hz: float
    model: Literal[
        "y_factor",
        "y_factor_uncorrected",
        "gain",
        "converter_y_factor",
        "converter_y_factor_uncorrected",
        "converter_gain",
    ]
    nf_db: float
    contributions: list[Contribution]
    u_combined_db: float
    k: float
    U_expanded_db: float
    method: Literal["gum", "monte_carlo"]
    gum_u_combined_db: float
    monte_carlo: MonteCarloResult | None = None
    omitted: list[str] = Field(default_factory=list)

    @property
    def interval_db(self) -> tuple[float, float]:
        """Coverage interval in dB: the MC interval, or ``nf +/- U`` for the GUM."""
        if self.monte_carlo is not None:
            return self.monte_carlo.interval_low, self.monte_carlo.interval_high
        return self.nf_db - self.U_expanded_db, self.nf_db + self.U_expanded_db

    def contribution(self, name: str) -> Contribution:
        """The line called ``name``; KeyError names the lines there are."""
        for line in self.contributions:
            if line.name == name:
                return line
        raise KeyError(f"{name!r} not in budget (has: {[c.name for c in self.contributions]})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict in the shape stored in ``RunRecord.budgets``."""
        mc = None
        if self.monte_carlo is not None:
            m = self.monte_carlo
            mc = {
                "trials": m.trials,
                "seed": m.seed,
                "coverage": m.coverage,
                "mean_db": m.mean,
                "std_db": m.std,
                "interval_db": [m.interval_low, m.interval_high],
                "adaptive": m.adaptive,
                "converged": m.converged,
                "numerical_tolerance_db": m.numerical_tolerance,
                "gum_validated": m.gum_validated,
            }
        return {
            "freq_hz": self.freq_hz,
            "model": self.model,
            "nf_db": self.nf_db,
            "contributions": [c.to_dict() for c in self.contributions],
            "u_combined_db": self.u_combined_db,
            "k": self.k,
            "U_expanded_db": self.U_expanded_db,
            "method": self.method,
            "gum_u_combined_db": self.gum_u_combined_db,
            "monte_carlo": mc,
            "omitted": list(self.omitted),
        }


def _budget(
    freq_hz: float,
    model_name: Literal["y_factor", "y_factor_uncorrected", "gain"],
    model: Model,
    quantities: list[InputQuantity],
    inputs: UncertaintyInputs,
    method: str | None,
    omitted: list[str],
) -> Budget:
    gum = propagate_gum(model, quantities)
    lines = [
        Contribution(
            name=q.name,
            u=q.u,
            unit=q.unit,
            sensitivity=c,
            contribution_db=cu,
            distribution=q.distribution,
        )
        for q, c, cu in zip(quantities, gum.sensitivities, gum.contributions, strict=True)
    ]
    chosen = method or inputs.method
    if chosen not in ("gum", "monte_carlo"):
        raise InputError("method", f"must be 'gum' or 'monte_carlo' (got {chosen!r})")
    k = inputs.coverage_factor
    if chosen == "gum":
        return Budget(
            freq_hz=freq_hz,
            model=model_name,
            nf_db=gum.value,
            contributions=lines,
            u_combined_db=gum.u_combined,
            k=k,
            U_expanded_db=k * gum.u_combined,
            method="gum",
            gum_u_combined_db=gum.u_combined,
            omitted=omitted,
        )
    settings = inputs.monte_carlo.model_copy(
        update={"seed": _point_seed(inputs.monte_carlo.seed, freq_hz)}
    )
    mc = propagate_monte_carlo(model, quantities, settings=settings, gum=gum)
    k_mc = mc.half_width / mc.std if mc.std > 0 else k
    return Budget(
        freq_hz=freq_hz,
        model=model_name,
        nf_db=gum.value,
        contributions=lines,
        u_combined_db=mc.std,
        k=k_mc,
        U_expanded_db=mc.half_width,
        method="monte_carlo",
        gum_u_combined_db=gum.u_combined,
        monte_carlo=mc,
        omitted=omitted,
    )


def _point_seed(seed: int, freq_hz: float) -> int:
    """A per-point seed: the plan's seed mixed with the frequency (reproducible, order-free)."""
    mixed = np.random.SeedSequence([seed, int(round(freq_hz)) & 0xFFFFFFFFFFFF])
    return int(mixed.generate_state(1, dtype=np.uint64)[0] >> 1)
