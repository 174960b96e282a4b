"""Linear (first-order GUM) propagation of standard uncertainties with analytic sensitivities.

The point functions evaluate their model once at the measured values and carry, beside each
intermediate quantity, its partial derivatives with respect to the named inputs (forward-mode
chain rule): :func:`chain` combines them through the partials of the physics kernels
(``physics.*_partials``, derived in docs/references.md §20). :func:`linear_propagation` turns
the output's sensitivities into signed contributions ``c_i u_i``. Inputs are treated as
uncorrelated; a fully correlated pair is one input name used in both places (JCGM 100:2008, 5.1
and 5.2). The numerical central-difference propagation these replaced is kept in the tests
(``tests/_numeric_propagation.py``) as the independent check of every point function.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

Slope = float | np.ndarray
"""A partial derivative at the point: a float or the 0-d array a kernel returns."""

Sensitivities = dict[str, float]
"""Partial derivatives of one quantity with respect to named inputs (absent: zero)."""


def chain(*terms: tuple[Slope, Mapping[str, float]]) -> Sensitivities:
    """Sensitivities of ``f(q_1, q_2, ...)`` from ``(df/dq_j, dq_j/dx)`` pairs (chain rule)."""
    out: Sensitivities = {}
    for slope, sens in terms:
        s = float(slope)
        for name, d in sens.items():
            out[name] = out.get(name, 0.0) + s * d
    return out


@dataclass(frozen=True)
class Propagation:
    """One model output: value, each input's sensitivity and signed contribution c_i * u_i."""

    value: float
    sensitivities: dict[str, float]
    contributions: dict[str, float]

    def u(self, names: Iterable[str] | None = None) -> float:
        """Combined standard uncertainty from the named inputs (default: all of them)."""
        keys = self.contributions if names is None else list(names)
        return math.sqrt(sum(self.contributions[k] ** 2 for k in keys))


def linear_propagation(
    value: float, sensitivities: Mapping[str, float], uncertainties: Mapping[str, float]
) -> Propagation:
    """The output ``value`` with one contribution ``c_i u_i`` per entry of ``uncertainties``
    (in its order; an input the output does not depend on contributes 0)."""
    sens = {name: float(sensitivities.get(name, 0.0)) for name in uncertainties}
    return Propagation(
        value=float(value),
        sensitivities=sens,
        contributions={name: sens[name] * float(u) for name, u in uncertainties.items()},
    )
