"""Compare one plan's results from two back ends that drew the same noise (same simulator seed).

The in-process simulated analyzer hands the estimator float64 trace values; the SCPI simulator
sends its trace memory, float32 dBm (noisebench/sims/scpi_analyzer.py). Rounding a value v to
float32
moves it by at most half a float32 step at |v| (IEEE 754 round-to-nearest). A trace power
10^(v/10) then moves by a relative ln(10)/10 * step/2 at most, and so does any weighted mean
of such powers: every band density. To first order the NF then moves by at most
sum_i |dNF/d ln d_i| * that bound, and the point states its own sensitivities: its signed
contribution c_i = (dNF/d d_i) * u_i, so dNF/d ln d_i = c_i * d_i / u_i.
"""

from __future__ import annotations

import math

import numpy as np

TRACE_SPREAD_DB = 30.0
"""How far below its band density a trace point may lie, dB. Only the float32 step matters,
and that changes at |v| = 64, 128 dBm: averaged RMS-detected noise never sits 30 dB below
its mean (even one exponential power sample does so with probability 1e-3), so the step at
|v| + 30 dB bounds every point of the band."""


def density_bound_rel(density_w_per_hz: float, rbw_hz: float) -> float:
    """Largest relative change of a band density whose trace went through float32 dBm."""
    lowest_dbm = 10.0 * math.log10(density_w_per_hz * rbw_hz / 1e-3) - TRACE_SPREAD_DB
    step_db = float(np.spacing(np.float32(abs(lowest_dbm))))
    return math.log(10.0) / 10.0 * step_db / 2.0


def nf_bound_db(point, rbw_hz: float) -> float:
    """Largest NF change (dB) float32 trace transfer can cause in ``point``."""
    contributions = point.notes["u_nf_db_contributions"]
    u_density = point.notes["u_densities_w_per_hz"]
    total = 0.0
    for name, density in point.densities_w_per_hz.items():
        sensitivity_db = contributions[name] * density / u_density[name]
        total += abs(sensitivity_db) * density_bound_rel(density, rbw_hz)
    return total


def assert_same_points(reference, other, rbw_hz: float) -> list[float]:
    """Every point of ``other`` equals ``reference``'s up to float32 trace transfer.

    The same decisions (averages, readings per state, flags), every density within its
    bound, NF within :func:`nf_bound_db`. Returns |dNF| / bound per point."""
    assert [p.freq_hz for p in other.points] == [p.freq_hz for p in reference.points]
    ratios = []
    for ref, got in zip(reference.points, other.points, strict=True):
        assert got.averages == ref.averages, ref.freq_hz
        assert got.notes["readings"] == ref.notes["readings"], ref.freq_hz
        assert got.flags == ref.flags, ref.freq_hz
        for name, density in ref.densities_w_per_hz.items():
            change = abs(got.densities_w_per_hz[name] / density - 1.0)
            assert change <= density_bound_rel(density, rbw_hz), (ref.freq_hz, name, change)
        bound = nf_bound_db(ref, rbw_hz)
        assert abs(got.nf_db - ref.nf_db) <= bound, (ref.freq_hz, got.nf_db, ref.nf_db, bound)
        ratios.append(abs(got.nf_db - ref.nf_db) / bound)
    return ratios
