"""Drift check for readings taken on a hot/cold schedule symmetric in time.

The null hypothesis is what the schedule can cancel and the Y-factor needs: a receiver gain
drifting linearly in time, common to both states, and a stable noise source. On the log scale
``ln P_i = a_state + b t_i``: one level per state, ONE slope (a gain is a factor on hot and cold
alike). A schedule symmetric in time cancels such a drift in Y (each point's mean hot time
equals its mean cold time). Everything else leaves residuals about the fit: curvature of the
gain, a step of the gain, and any change of the source's own output. Their weighted sum of
squares is chi-square with ``n - (states + 1)`` degrees of freedom when the null holds and the
stated uncertainties are right (weighted least squares, e.g. NIST/SEMATECH e-Handbook of
Statistical Methods, 4.4.3), so a check whose statistic exceeds the ``1 - DRIFT_ALPHA``
quantile is flagged.

Why one slope and not one per state: the hot readings of a block lie in two clusters (first
and last pass), so a line per state absorbs anything that moves the hot readings between the
passes - a step of the gain just after the first pass (which puts Y off by half the step) looks
exactly like a linear drift of the hot state, and only the half-reading lever arm inside a pass
(a few per cent of the block) is left to see it (measured: a 0.3 dB step there read p = 0.2).
A common slope is pinned by the cold passes in the middle, so the hot passes must agree with
it. The price is that a source whose output drifts is flagged even when the drift is linear -
as it should be: its excess noise is then not what its ENR table says, an error no schedule
cancels (the calibration and the measurement read different ENRs).

Several checks of independent readings - the frequencies of one trace (disjoint bins), the
blocks of a sweep - combine by adding chi-square and degrees of freedom
(:func:`combined_check`): the sum of independent chi-square variables is chi-square with the
summed degrees of freedom, so the false-alarm rate stays ``DRIFT_ALPHA`` and a drift common to
them (the receiver gain, the source's output: alike at every frequency) adds up. Taking the
worst of ``m`` checks instead would raise the false-alarm rate about ``m``-fold.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

DRIFT_ALPHA = 1e-3  # false-alarm probability per point of the drift check


def _chi2_sf(chi2: float, dof: int) -> float:
    """Upper tail of the chi-square distribution: scipy's ``chdtrc``, the function
    ``scipy.stats.chi2.sf`` evaluates, without the distribution object's per-call argument
    handling (the check runs once per block and frequency)."""
    return float(special.chdtrc(dof, chi2))


@dataclass(frozen=True)
class DriftCheck:
    """Result of :func:`drift_check`: chi-square of the residuals, its degrees of freedom,
    the tail probability, and the fitted common slope ``{"gain": ...}`` (per second,
    natural-log units)."""

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
    """Fit per-state levels and one common slope in time to ln(density); None without a
    residual degree of freedom (or without two distinct times)."""
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
        if not member.any():
            return None
        columns.append(member.astype(float))
    if np.unique(t[usable]).size < 2:
        return None
    columns.append(t - t[usable].mean())  # the one slope all states share
    x = np.column_stack(columns)[usable]
    y = np.log(d[usable])
    w = d[usable] / u[usable]  # 1 / sigma of ln(density)
    dof = int(y.size - x.shape[1])
    if dof < 1:
        return None
    coef, *_ = np.linalg.lstsq(x * w[:, None], y * w, rcond=None)
    resid = (y - x @ coef) * w
    chi2 = float(resid @ resid)
    slopes = {"gain": float(coef[-1])}
    return DriftCheck(chi2, dof, _chi2_sf(chi2, dof), slopes)


def combined_check(checks: list[DriftCheck]) -> DriftCheck | None:
    """Checks of independent readings as one: chi-square and degrees of freedom added, the
    slopes averaged per state (None for no checks)."""
    if not checks:
        return None
    chi2 = float(sum(c.chi2 for c in checks))
    dof = int(sum(c.dof for c in checks))
    names = sorted({name for c in checks for name in c.slopes_per_s})
    slopes = {
        name: float(np.mean([c.slopes_per_s[name] for c in checks if name in c.slopes_per_s]))
        for name in names
    }
    return DriftCheck(chi2, dof, _chi2_sf(chi2, dof), slopes)
