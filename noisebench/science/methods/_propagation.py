"""Linear (first-order GUM) propagation of standard uncertainties through a model function.

Sensitivities come from central differences, so the methods state their model once and get
the uncertainty of any output without hand-derived partial derivatives. The model must be
vectorized: all perturbed copies of the inputs are stacked on a new leading axis and the model
runs once. Inputs are treated as uncorrelated; a fully correlated pair is modelled by letting the
model use one variable in both places (JCGM 100:2008, 5.1 and 5.2).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

import numpy as np

_REL_STEP = 1e-6


@dataclass(frozen=True)
class Propagation:
    """One model output: value, each input's sensitivity and signed contribution c_i * u_i."""

    value: np.ndarray
    sensitivities: dict[str, np.ndarray]
    contributions: dict[str, np.ndarray]

    def u(self, names: Iterable[str] | None = None) -> np.ndarray:
        """Combined standard uncertainty from the named inputs (default: all of them)."""
        keys = self.contributions if names is None else list(names)
        return np.sqrt(
            sum((self.contributions[k] ** 2 for k in keys), start=np.zeros_like(self.value))
        )


def propagate(
    model: Callable[..., Mapping[str, np.ndarray]],
    values: Mapping[str, object],
    uncertainties: Mapping[str, object],
) -> dict[str, Propagation]:
    """Propagate ``uncertainties`` (same units as ``values``) through every output of
    ``model(**values)`` (a mapping of named arrays).

    Step: 1e-6 of the input's magnitude (or of its uncertainty when the input is 0), so the
    truncation error of the central difference is ~1e-12 relative.
    """
    names = list(uncertainties)
    base = {k: np.asarray(v, dtype=float) for k, v in values.items()}
    shape = np.broadcast_shapes(*(v.shape for v in base.values()))
    n = 1 + 2 * len(names)
    stacked = {k: np.broadcast_to(v, (n,) + shape).copy() for k, v in base.items()}
    steps = {}
    for i, name in enumerate(names):
        x = np.broadcast_to(base[name], shape)
        u = np.broadcast_to(np.asarray(uncertainties[name], dtype=float), shape)
        step = _REL_STEP * np.where(x != 0, np.abs(x), np.where(u > 0, u, 1.0))
        stacked[name][1 + 2 * i] = x + step
        stacked[name][2 + 2 * i] = x - step
        steps[name] = (step, u)
    outputs = model(**stacked)
    result = {}
    for out_name, raw in outputs.items():
        y = np.asarray(raw, dtype=float)
        sens, contrib = {}, {}
        for i, name in enumerate(names):
            step, u = steps[name]
            sens[name] = (y[1 + 2 * i] - y[2 + 2 * i]) / (2.0 * step)
            contrib[name] = sens[name] * u
        result[out_name] = Propagation(value=y[0], sensitivities=sens, contributions=contrib)
    return result
