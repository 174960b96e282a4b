"""Drift check for readings taken on a hot/cold schedule symmetric in time.

Each state's readings (hot, cold) are modelled as a level plus a linear drift in time, on the
log scale: ``ln P_i = a_state + b_state t_i``. A schedule symmetric in time cancels such a drift
in Y (each point's mean hot time equals its mean cold time), whether it is common (receiver gain)
or the source's own (excess-noise output); what it cannot cancel - curvature, steps - leaves
residuals about the fitted lines. Their weighted sum of squares is chi-square with ``n - 4``
degrees of freedom when the drift is linear and the stated uncertainties are right (weighted
least squares, e.g. NIST/SEMATECH e-Handbook of Statistical Methods, 4.4.3), so a point whose
statistic exceeds the ``1 - DRIFT_ALPHA`` quantile is flagged.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

DRIFT_ALPHA = 1e-3  # false-alarm probability per point of the drift check


@dataclass(frozen=True)
class DriftCheck:
    """Result of :func:`drift_check`: chi-square of the residuals, its degrees of freedom,
    the tail probability, and each state's fitted slope (per second, natural-log units)."""

    chi2: float
    dof: int
    p_value: float
    slopes_per_s: dict[str, float]

    @property
    def flagged(self) -> bool:
        return self.p_value < DRIFT_ALPHA


def drift_check(
    times_s: np.ndarray,
    states: list[str],
    density_w_per_hz: np.ndarray,
    u_density_w_per_hz: np.ndarray,
) -> DriftCheck | None:
    """Fit a line in time per state to ln(density); None without a residual degree of freedom
    (each state needs three readings at distinct times)."""
    t = np.asarray(times_s, dtype=float)
    d = np.asarray(density_w_per_hz, dtype=float)
    u = np.asarray(u_density_w_per_hz, dtype=float)
    names = sorted(set(states))
    if not names:
        return None
    usable = (d > 0) & (u > 0)
    columns = []
    for name in names:
        member = np.array([s == name for s in states]) & usable
        if np.unique(t[member]).size < 2:
            return None
        columns += [member.astype(float), np.where(member, t - t[member].mean(), 0.0)]
    x = np.column_stack(columns)[usable]
    y = np.log(d[usable])
    w = d[usable] / u[usable]  # 1 / sigma of ln(density)
    dof = int(y.size - x.shape[1])
    if dof < 1:
        return None
    coef, *_ = np.linalg.lstsq(x * w[:, None], y * w, rcond=None)
    resid = (y - x @ coef) * w
    chi2 = float(resid @ resid)
    slopes = {name: float(coef[2 * i + 1]) for i, name in enumerate(names)}
    return DriftCheck(chi2, dof, float(stats.chi2.sf(chi2, dof)), slopes)
