"""Linear (first-order GUM) propagation of standard uncertainties through a model function.

Sensitivities come from central differences, so the methods state their model once and get
the uncertainty of any output without hand-derived partial derivatives. Works elementwise on
arrays when the model is vectorized. Inputs are treated as uncorrelated; a fully correlated
pair is modelled by letting the model use one variable in both places (JCGM 100:2008, 5.1).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

_REL_STEP = 1e-6


@dataclass(frozen=True)
class Propagation:
    """Model value, its combined standard uncertainty, and each input's signed contribution."""

    value: np.ndarray
    u: np.ndarray
    sensitivities: dict[str, np.ndarray]
    contributions: dict[str, np.ndarray]


def propagate(model: Callable[..., np.ndarray], values: Mapping[str, object],
              uncertainties: Mapping[str, object]) -> Propagation:
    """Propagate ``uncertainties`` (same units as ``values``) through ``model(**values)``.

    Only the inputs named in ``uncertainties`` are varied. Step: 1e-6 of the input's magnitude
    (or of its uncertainty when the input is 0): the model's curvature error is then ~1e-12
    relative, far below any uncertainty this library reports.
    """
    base = {k: np.asarray(v, dtype=float) for k, v in values.items()}
    value = np.asarray(model(**base), dtype=float)
    sensitivities: dict[str, np.ndarray] = {}
    contributions: dict[str, np.ndarray] = {}
    for name, u_raw in uncertainties.items():
        u = np.asarray(u_raw, dtype=float)
        x = base[name]
        step = _REL_STEP * np.where(x != 0, np.abs(x), np.where(u > 0, u, 1.0))
        up = dict(base, **{name: x + step})
        down = dict(base, **{name: x - step})
        c = (np.asarray(model(**up), dtype=float) - np.asarray(model(**down), dtype=float)) \
            / (2.0 * step)
        sensitivities[name] = c
        contributions[name] = c * u
    total = sum((c**2 for c in contributions.values()), start=np.zeros_like(value))
    return Propagation(value=value, u=np.sqrt(total), sensitivities=sensitivities,
                       contributions=contributions)
