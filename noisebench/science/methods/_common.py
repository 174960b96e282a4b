"""Input checks, density-derived flags and the one :class:`PointResult` builder shared by the
methods (their physics is in :mod:`noisebench.science.physics`)."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any, TypeVar

import numpy as np

from noisebench.errors import InputError, MeasurementError, YNotSignificantError
from noisebench.science.density import NoiseDensity
from noisebench.science.physics import T0_K, nf_db_from_te_k, ratio_from_db
from noisebench.science.point import ConversionInfo, Method, PointFlag, PointResult
from noisebench.units import format_frequency

DEFAULT_SCATTER_LIMIT = 1.5
"""Observed/predicted scatter above which a density is flagged EXCESS_SCATTER.

The estimator's ``scatter_ratio`` is ~1 for clean Gaussian noise and its own sampling spread is
a few percent for the hundreds of bins a band holds; 1.5 is far outside that spread and means
drift, interference or a wrong statistical model, not bad luck.
"""

DEFAULT_LOW_GAIN_DB = 10.0
"""DUT gain below which a point is flagged LOW_GAIN.

Below 10 dB the second-stage term (F2 - 1)/G1 is more than a tenth of the analyzer's excess
noise factor; with the 10-25 dB NF of an analyzer it rivals or exceeds the DUT's own excess
noise, so the result leans on the correction and on the gain value (common practice: the
analyzer-based methods suit DUTs with gain well above the analyzer's noise figure).
"""

DEFAULT_FLOOR_WARNING_DB = 3.0
"""Margin (DUT noise over the analyzer's own noise) below which NEAR_ANALYZER_FLOOR is set.

At a 3 dB margin the second-stage correction is 1.76 dB, the density jitter is amplified by
sqrt(1 + r^2)/(1 - r) = 2.24 (r = 10^(-margin/10), docs/references.md §4) and a floor error enters
the
NF at about half its size.
"""

NEGATIVE_TE_REFUSE_SIGMAS = 4.0
"""A Te below zero by more than this many of its own standard uncertainties is refused.

A noise temperature cannot be negative: a reading below what the source termination alone
gives means the DUT is off, the wrong path is connected or the gain/ENR is wrong. A Te slightly
below zero from scatter (a very quiet DUT) stays possible: a true Te >= 0 reads below
-4 u with probability 3.2e-5 (one-sided normal tail), so refusing there almost never rejects a
good point, while a dead DUT reads hundreds of u below zero. Kept negative points are flagged
NEGATIVE_TE, which keeps them from passing a limit (see the flag policy in DEVELOPERS.md).
"""

Y_SIGNIFICANCE_SIGMAS = 4.0
"""Y - 1 below this many of its own standard uncertainties u(Y) refuses the pair (no Y-factor).

With the source dead (not powered, supply off, not connected, wrong path) hot and cold are two
readings of the same noise: Y - 1 scatters around zero with standard deviation u(Y), so the old
rule "refuse only when hot <= cold" let half of all dead sources through as a confident, huge
noise figure. Refusing below 4 u lets a dead source through with probability 3.2e-5 (one-sided
normal tail, the same design rate as NEGATIVE_TE_REFUSE_SIGMAS). The cost is small: the relative
uncertainty of the noise factor from Y alone is u(F)/F = u(Y)/(Y - 1) (docs/references.md §7),
so a refused pair is one whose NF would carry more than 10 log10(e)/4 = 1.09 dB of statistical
uncertainty from Y alone; a live source with (Y - 1)/u(Y) = 8 is refused with probability
3.2e-5 (the same tail), and ordinary benches read (Y - 1)/u(Y) in the tens to thousands.
"""

FREQ_REL_TOL = 1e-6
"""Two densities belong to the same point when their frequencies agree to 1 ppm."""


def check_number(field: str, value: float) -> float:
    """A finite float, or InputError naming ``field``."""
    try:
        x = float(value)
    except (TypeError, ValueError) as exc:
        raise InputError(field, f"must be a number (got {value!r})") from exc
    if not math.isfinite(x):
        raise InputError(
            field, f"must be finite (got {x!r})", fix="check the reading or the table it came from"
        )
    return x


def check_temperature(field: str, value: float) -> float:
    """A physical temperature in K (> 0), or InputError naming ``field``."""
    t = check_number(field, value)
    if t <= 0:
        raise InputError(
            field,
            f"must be > 0 K (got {t!r})",
            fix="give an absolute temperature in kelvin (K = degC + 273.15)",
        )
    return t


def check_non_negative(field: str, value: float, fix: str) -> float:
    x = check_number(field, value)
    if x < 0:
        raise InputError(field, f"must be >= 0 (got {x!r})", fix=fix)
    return x


def check_loss_db(field: str, value: float) -> float:
    return check_non_negative(
        field, value, "give a loss as a positive number of dB (0.5 for a 0.5 dB cable)"
    )


_Kelvin = TypeVar("_Kelvin", float, np.ndarray)


def check_losses(
    input_loss_db: float,
    output_loss_db: float,
    input_loss_temperature_k: float | None,
    output_loss_temperature_k: float | None,
    default_temperature_k: _Kelvin,
) -> tuple[float, float, float | _Kelvin, float | _Kelvin]:
    """``(L_in, L_out, Tp_in, Tp_out)``: linear losses (>= 1) and their physical temperatures
    in K, a missing temperature taking ``default_temperature_k``."""
    lin = float(ratio_from_db(check_loss_db("input_loss_db", input_loss_db)))
    lout = float(ratio_from_db(check_loss_db("output_loss_db", output_loss_db)))
    tp_in = (
        default_temperature_k
        if input_loss_temperature_k is None
        else check_temperature("input_loss_temperature_k", input_loss_temperature_k)
    )
    tp_out = (
        default_temperature_k
        if output_loss_temperature_k is None
        else check_temperature("output_loss_temperature_k", output_loss_temperature_k)
    )
    return lin, lout, tp_in, tp_out


def check_density(field: str, density: object) -> NoiseDensity:
    if not isinstance(density, NoiseDensity):
        raise InputError(
            field,
            f"must be a NoiseDensity (got {type(density).__name__})",
            fix="build it with noisebench.science.estimator or NoiseDensity(...)",
        )
    return density


def check_same_frequency(reference: NoiseDensity, others: dict[str, NoiseDensity]) -> float:
    """Common frequency of the densities of one point, Hz; InputError on a mismatch."""
    f0 = reference.freq_hz
    for name, d in others.items():
        if not math.isclose(d.freq_hz, f0, rel_tol=FREQ_REL_TOL):
            raise InputError(
                f"{name}.freq_hz",
                f"is {format_frequency(d.freq_hz, 9)} but the point is at "
                f"{format_frequency(f0, 9)}",
                fix="combine densities measured at the same frequency",
            )
    return f0


def density_flags(densities: Iterable[NoiseDensity], scatter_limit: float) -> list[PointFlag]:
    """SPURS_EXCLUDED / EXCESS_SCATTER when any of the point's densities carries them."""
    flags: list[PointFlag] = []
    ds = list(densities)
    if any(d.excluded_freq_hz for d in ds):
        flags.append(PointFlag.SPURS_EXCLUDED)
    if any(d.scatter_ratio is not None and d.scatter_ratio > scatter_limit for d in ds):
        flags.append(PointFlag.EXCESS_SCATTER)
    return flags


def instrument_time_s(densities: Iterable[NoiseDensity]) -> float | None:
    """Total acquisition time of the point's own densities, or None if any is unknown."""
    times = [d.acquisition_time_s for d in densities]
    if not times or any(t is None for t in times):
        return None
    return float(sum(times))  # type: ignore[arg-type]


def check_te_plausible(
    te_k: float, u_te_k: float, freq_hz: float, method: str, causes: str
) -> None:
    """MeasurementError when Te is below zero by more than NEGATIVE_TE_REFUSE_SIGMAS * u."""
    if te_k < 0 and te_k < -NEGATIVE_TE_REFUSE_SIGMAS * u_te_k:
        sigmas = -te_k / u_te_k if u_te_k > 0 else math.inf
        raise MeasurementError(
            f"{method} at {format_frequency(freq_hz)}: the DUT's noise temperature came out "
            f"{te_k:.1f} K, "
            f"{sigmas:.3g} standard uncertainties below zero (u = {u_te_k:.3g} K); a noise "
            f"temperature cannot be negative, so the reading is a fault: {causes}",
            freq_hz=freq_hz,
        )


def y_significance(hot: NoiseDensity, cold: NoiseDensity) -> float:
    """(Y - 1) / u(Y) of a hot/cold pair, u(Y) from the two densities' independent standard
    uncertainties: ``u(Y)/Y = sqrt(u_h^2/h^2 + u_c^2/c^2)`` (first-order propagation of a
    ratio, JCGM 100:2008 eq. 10); +inf when both are exact and hot > cold."""
    h, c = hot.density_w_per_hz, cold.density_w_per_hz
    y = h / c
    u_y = y * math.hypot(hot.relative_u, cold.relative_u)
    if u_y > 0:
        return (y - 1.0) / u_y
    return math.inf if y > 1.0 else -math.inf


def check_y_significant(
    hot: NoiseDensity,
    cold: NoiseDensity,
    freq_hz: float,
    what: str,
    source_plane: str,
    causes: str = "",
) -> None:
    """YNotSignificantError when hot - cold is not Y_SIGNIFICANCE_SIGMAS standard
    uncertainties above zero: the one rule every Y-factor path (point, calibration, converter)
    applies before using a Y. ``source_plane`` names where the source should be connected;
    ``causes`` adds the path's own likely causes (a converter's LO)."""
    z = y_significance(hot, cold)
    if z >= Y_SIGNIFICANCE_SIGMAS:
        return
    y = hot.density_w_per_hz / cold.density_w_per_hz
    if y <= 1.0:
        what_happened = f"hot reading is not above the cold one (Y - 1 = {y - 1.0:.2g})"
    else:
        what_happened = (
            f"hot reading is above the cold one by only {z:.2g} standard uncertainties "
            f"(Y - 1 = {y - 1.0:.2g}; a usable Y needs {Y_SIGNIFICANCE_SIGMAS:g})"
        )
    ratios = [d.scatter_ratio for d in (hot, cold) if d.scatter_ratio is not None]
    if ratios and max(ratios) > DEFAULT_SCATTER_LIMIT:
        cause = (
            f"the readings scatter {max(ratios):.3g} times more than their averaging predicts "
            "(drift, a source that does not settle, interference): let the bench warm up, "
            "check the source supply and cables; if the source's output is in doubt, check "
            "that the source is "
        )
    else:
        cause = "the noise source's output does not reach the analyzer: check that the source is "
    if y > 1.0:
        # a live source whose excess noise is small against the system's own noise reads
        # the same at few averages as a dead one: say both, the user knows the bench
        cause = (
            "either the source is alive but its excess noise is small against the system's "
            "own noise (more averages: raise time_limit_s or max_averages; or a lower-noise "
            "system: a preamplifier before the analyzer, a higher-ENR source), or " + cause
        )
    raise YNotSignificantError(
        f"{what} at {format_frequency(freq_hz)}: no usable Y-factor, {what_happened}; {cause}"
        f"powered (supply on, drive cable), connected to {source_plane}, the switch path is "
        f"right, {causes}the DUT is powered and connected, and the ENR table is this source's",
        significance=z,
        freq_hz=freq_hz,
    )


def averages_for_significance(done: int, significance: float) -> int:
    """Averages per reading at which a pair now ``significance`` standard uncertainties above
    zero (at ``done`` averages) is expected at twice the refusal threshold: (Y - 1)/u(Y) grows
    as the square root of the averages (radiometer equation), and at 2 x 4 u the next look
    refuses a live source with probability norm.sf(4) = 3.2e-5. A pair at or below zero (a dead
    source, or a live one drowned in noise) asks for 16 times more; the caller caps the
    growth of a round and stops at its average or time limit."""
    if not math.isfinite(significance) or significance <= 0.25:
        return 16 * max(1, done)
    return max(done + 1, math.ceil(done * (2 * Y_SIGNIFICANCE_SIGMAS / significance) ** 2))


def nf_db_from_te(te_k: float, t0_k: float = T0_K) -> float:
    """NF in dB of a (possibly slightly negative) Te; caller guarantees Te > -T0."""
    return float(nf_db_from_te_k(te_k, t0_k))


def margin_db(dut_noise: float, analyzer_noise: float) -> float | None:
    """10 log10(DUT noise / analyzer's own noise); None when the analyzer noise is not > 0."""
    if analyzer_noise <= 0 or dut_noise <= 0:
        return None
    return 10.0 * math.log10(dut_noise / analyzer_noise)


def build_point_result(
    *,
    freq_hz: float,
    method: Method,
    nf_db: float,
    te_k: float,
    u_nf_db: float,
    u_te_k: float,
    densities: Mapping[str, NoiseDensity],
    timed: Iterable[NoiseDensity],
    flags: list[PointFlag],
    contributions: Mapping[str, float],
    contributions_total_key: str,
    t0_k: float,
    floor_warning_db: float,
    low_gain_db: float,
    gain_db: float | None = None,
    floor_margin_db: float | None = None,
    negative_te_k: float | None = None,
    conversion: ConversionInfo | None = None,
    notes: Mapping[str, Any] | None = None,
    **fields: Any,
) -> PointResult:
    """The one place a method turns its numbers into a :class:`PointResult`.

    Adds the flags every method sets the same way, after the method's own ``flags``:
    NEAR_ANALYZER_FLOOR when ``floor_margin_db`` is below ``floor_warning_db``, LOW_GAIN when
    ``gain_db`` (None: not known, no flag) is below ``low_gain_db``, NEGATIVE_TE when
    ``negative_te_k`` (default ``te_k``; a converter passes its SSB Te) is below zero. Keeps the
    raw densities and their uncertainties, the signed per-input NF contributions (dB) with their
    root-sum-square under ``notes[contributions_total_key]``, the instrument time of ``timed``
    (the point's own readings, not a shared calibration) and ``t0_k``. ``notes`` holds the
    method's own notes; ``fields`` the remaining PointResult fields (``y_db``, ``u_gain_db``,
    ``floor_correction_db``, ``enr_db``, ``source_temperature_k``).
    """
    flags = list(flags)
    if floor_margin_db is not None and floor_margin_db < floor_warning_db:
        flags.append(PointFlag.NEAR_ANALYZER_FLOOR)
    if gain_db is not None and gain_db < low_gain_db:
        flags.append(PointFlag.LOW_GAIN)
    if (te_k if negative_te_k is None else negative_te_k) < 0:
        flags.append(PointFlag.NEGATIVE_TE)
    contributions = {name: float(value) for name, value in contributions.items()}
    return PointResult(
        freq_hz=freq_hz,
        method=method,
        nf_db=nf_db,
        te_k=te_k,
        gain_db=gain_db,
        u_nf_db=u_nf_db,
        u_te_k=u_te_k,
        floor_margin_db=floor_margin_db,
        densities_w_per_hz={k: d.density_w_per_hz for k, d in densities.items()},
        flags=flags,
        instrument_time_s=instrument_time_s(timed),
        conversion=conversion,
        notes={
            "u_densities_w_per_hz": {k: d.u_density_w_per_hz for k, d in densities.items()},
            "u_nf_db_contributions": contributions,
            contributions_total_key: math.sqrt(sum(c**2 for c in contributions.values())),
            **(notes or {}),
            "t0_k": t0_k,
        },
        **fields,
    )
