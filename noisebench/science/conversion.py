"""Frequency-converting DUTs (mixers, downconverters, receivers): frequency plan and noise physics.

Pure, vectorized functions (float in -> float out, array in -> array out), SI units inside.

Frequency plan
--------------
A difference-frequency converter maps an input (RF) frequency to ``IF = |RF - LO|``. The
**sideband** names where the wanted input lies relative to the LO: ``"upper"`` (RF above LO,
``RF = LO + IF``) or ``"lower"`` (RF below LO, ``RF = LO - IF``). The **image** is the other
input frequency that lands on the same IF: ``f_image = 2 LO - RF``. Three sweep modes:

- ``fixed_lo``: the LO stays put and the RF is swept; the IF moves with it.
- ``fixed_if``: the IF stays put and the LO follows the RF (a receiver's usual case).
- ``triples``: explicit (RF, LO, IF) triples, checked for ``IF = |RF - LO|``.

Noise of a two-response converter
---------------------------------
Let the converter's available conversion gains be ``G_s`` from the signal band and ``G_i``
from the image band to the IF, and ``r = G_i / G_s`` (the image response; image rejection
``IRR = -10 log10 r``). With input terminations at (available) noise temperatures ``T_s`` in
the signal band and ``T_i`` in the image band, the available IF noise density is

    N_out = k [G_s T_s + G_i T_i] + N_a,           N_a: noise the converter adds itself.   (1)

The noise factor of a multiple-response transducer (IRE Standards on Methods of Measuring Noise
in Linear Twoports, Proc. IRE 48 (1960) 60-68, and the IRE/IEEE definitions of noise factor,
IEEE Std 161) is the ratio of the total output noise with every input termination at
T0 = 290 K to the part of it that the input termination produces through the signal
("principal") response. The single-sideband (SSB) factor counts only the signal band in the
denominator; the double-sideband (DSB) factor counts both bands as signal (radiometry, DSB
receivers):

    F_SSB = [k T0 (G_s + G_i) + N_a] / (k T0 G_s),
    F_DSB = [k T0 (G_s + G_i) + N_a] / (k T0 (G_s + G_i)),    so  F_SSB = F_DSB (1 + r).    (2)

(The wording of the definitions above is quoted from memory; the relations (2) follow from it.)
Writing the added noise as an input-referred temperature in the signal band,
``N_a = k G_s Te_SSB`` (and ``N_a = k (G_s + G_i) Te_DSB``):

    F_SSB = 1 + r + Te_SSB / T0,    F_DSB = 1 + Te_DSB / T0,    Te_DSB = Te_SSB / (1 + r).    (3)

So a converter with equal responses (r = 1) has F_SSB = 2 F_DSB (the familiar "+3 dB", a special
case), and one with no image response (r = 0) has F_SSB = F_DSB.

Y-factor. A broadband noise source drives both bands: hot temperatures ``Th_s``/``Th_i`` from
ENR(RF) and ENR(image), cold ``Tc_s``/``Tc_i``. With (1) and N_a = k G_s Te:

    Y = [Th_s + r Th_i + Te] / [Tc_s + r Tc_i + Te]
    => Te_SSB = [Th_s + r Th_i - Y (Tc_s + r Tc_i)] / (Y - 1).                            (4)

The analyzer (second stage) is calibrated at the IF with ENR(IF): ``Te2 = (Th_IF - Y2 Tc)/(Y2-1)``,
and the conversion gain follows from the ratio of differences

    G_s = [(N_h - N_c) / ((Th_s - Tc_s) + r (Th_i - Tc_i))]
          / [(N_h,cal - N_c,cal) / (Th_IF - Tc)]                                          (5)

so that the second-stage correction is ``Te1 = Te12 - Te2 / G_s`` (Friis at the IF).

Input losses at the signal and image frequencies are applied to the source temperatures
(a matched loss L at physical temperature Tp delivers ``T/L + Tp (1 - 1/L)``), so the result is
referred to the converter's own input; an output loss at the IF is de-embedded by Friis,
``Te = Te_path - (L_out - 1) Tp_out / G_s``.

Gain method. With the input terminated at Ts (both bands, after the input loss), the
conversion gain known and a floor reading ``N_f = k T_term + N_sa`` at the IF:

    Te_SSB = (N_m - N_f + k T_term) / (k G_s) - (T_s + r T_i).                            (6)

References: docs/references.md §10 and §17. The rest is common practice.
"""

from __future__ import annotations

from enum import Enum
from typing import NamedTuple

import numpy as np

from noisebench.errors import InputError
from noisebench.science.physics import (
    T0_K,
    ArrayLike,
    FloatOrArray,
    checked_array,
    db_from_ratio,
    dsb_from_ssb,
    floor_corrected_density_w_per_hz,
    gain_from_hot_cold,
    loss_output_temperature_k,
    ratio_from_db,
    scalar_or_array,
    ssb_factor_from_te_k,
    te_k_from_output_density,
    te_k_from_y,
    thermal_density_w_per_hz,
    two_port_output_temperature_k,
    two_response_temperature_k,
)
from noisebench.units import format_frequency

__all__ = [
    "Sideband",
    "SweepMode",
    "FrequencyPlan",
    "image_frequency_hz",
    "plan_fixed_lo",
    "plan_fixed_if",
    "plan_triples",
    "lo_leakage_frequencies_hz",
    "image_ratio_from_rejection_db",
    "rejection_db_from_image_ratio",
    "band_temperature_k",
    "converter_output_density_w_per_hz",
    "ssb_factor",
    "dsb_factor",
    "te_dsb_from_ssb_k",
    "image_correction_db",
    "converter_te_from_y_k",
    "converter_gain_from_hot_cold",
    "converter_gain_method_te_k",
]

TRIPLE_REL_TOL = 1e-9
"""|RF - LO| and the stated IF of a triple must agree to 1 ppb (or 1 mHz absolute)."""


class Sideband(str, Enum):
    """Where the wanted input (RF) lies relative to the LO."""

    LOWER = "lower"  # RF below the LO: RF = LO - IF
    UPPER = "upper"  # RF above the LO: RF = LO + IF


class SweepMode(str, Enum):
    FIXED_LO = "fixed_lo"  # LO fixed, RF swept, IF follows
    FIXED_IF = "fixed_if"  # IF fixed, LO follows the RF
    TRIPLES = "triples"  # explicit (RF, LO, IF)


class FrequencyPlan(NamedTuple):
    """Per-point frequencies (Hz arrays of one length) and the sideband of each point."""

    rf_hz: np.ndarray
    lo_hz: np.ndarray
    if_hz: np.ndarray
    image_hz: np.ndarray
    sideband: tuple[Sideband, ...]

    def __len__(self) -> int:
        return int(self.rf_hz.size)


def _freqs(field: str, value: ArrayLike) -> np.ndarray:
    arr = np.atleast_1d(checked_array(field, value)).astype(float)
    if arr.ndim != 1 or arr.size == 0:
        raise InputError(field, "must be one frequency or a list of them", fix="pass Hz values")
    if np.any(arr <= 0):
        bad = float(arr[arr <= 0][0])
        raise InputError(field, f"must be > 0 Hz (got {bad!r})", value=bad, fix="give Hz values")
    return arr


def image_frequency_hz(rf_hz: ArrayLike, lo_hz: ArrayLike) -> FloatOrArray:
    """Image frequency ``2 LO - RF``, Hz: the other input that lands on the same IF."""
    return scalar_or_array(2.0 * checked_array("lo_hz", lo_hz) - checked_array("rf_hz", rf_hz))


def _finish(rf: np.ndarray, lo: np.ndarray, if_: np.ndarray, field: str) -> FrequencyPlan:
    image = 2.0 * lo - rf
    if np.any(image <= 0):
        idx = int(np.flatnonzero(image <= 0)[0])
        raise InputError(
            field,
            f"point {idx} (RF {format_frequency(rf[idx])}, LO {format_frequency(lo[idx])}) puts "
            "the image at "
            f"{format_frequency(image[idx])} (not > 0): the LO is below the IF",
            fix="use an LO above the IF (LO > IF), or the other sideband",
        )
    sidebands = tuple(
        Sideband.UPPER if r > lo_ else Sideband.LOWER for r, lo_ in zip(rf, lo, strict=True)
    )
    return FrequencyPlan(rf, lo, if_, image, sidebands)


def plan_fixed_lo(rf_hz: ArrayLike, lo_hz: float) -> FrequencyPlan:
    """Fixed LO, swept RF: ``IF = |RF - LO|``. Every RF must lie on one side of the LO."""
    rf = _freqs("rf_hz", rf_hz)
    lo_arr = _freqs("lo_hz", lo_hz)
    if lo_arr.size != 1:
        raise InputError("lo_hz", "must be one frequency in fixed-LO mode", fix="give one LO")
    lo = np.full_like(rf, float(lo_arr[0]))
    if np.any(rf == lo):
        raise InputError(
            "rf_hz",
            f"includes the LO frequency {format_frequency(lo[0])} (IF = 0)",
            fix="exclude the LO",
        )
    above = rf > lo
    if above.any() and not above.all():
        raise InputError(
            "rf_hz",
            f"lies on both sides of the LO ({format_frequency(lo[0])}): the sideband would change "
            "mid-sweep "
            "and the image would sweep through the signal band",
            fix="sweep RF on one side of the LO, or split the sweep into two plans",
        )
    return _finish(rf, lo, np.abs(rf - lo), "rf_hz")


def plan_fixed_if(rf_hz: ArrayLike, if_hz: float, sideband: Sideband | str) -> FrequencyPlan:
    """Fixed IF, LO following the RF: ``LO = RF - IF`` (upper) or ``RF + IF`` (lower)."""
    rf = _freqs("rf_hz", rf_hz)
    if_arr = _freqs("if_hz", if_hz)
    if if_arr.size != 1:
        raise InputError("if_hz", "must be one frequency in fixed-IF mode", fix="give one IF")
    try:
        sb = Sideband(sideband)
    except ValueError as exc:
        raise InputError(
            "sideband", f"must be 'lower' or 'upper' (got {sideband!r})", fix="RF below/above LO"
        ) from exc
    if_ = np.full_like(rf, float(if_arr[0]))
    lo = rf - if_ if sb is Sideband.UPPER else rf + if_
    if np.any(lo <= 0):
        idx = int(np.flatnonzero(lo <= 0)[0])
        raise InputError(
            "rf_hz",
            f"point {idx} ({format_frequency(rf[idx])}) is not above the IF "
            f"({format_frequency(if_[0])}), so the "
            "upper-sideband LO would be <= 0",
            fix="use RF above the IF, or the lower sideband",
        )
    return _finish(rf, lo, if_, "rf_hz")


def plan_triples(rf_hz: ArrayLike, lo_hz: ArrayLike, if_hz: ArrayLike) -> FrequencyPlan:
    """Explicit (RF, LO, IF) triples, each checked for ``IF = |RF - LO|``."""
    rf, lo, if_ = _freqs("rf_hz", rf_hz), _freqs("lo_hz", lo_hz), _freqs("if_hz", if_hz)
    if not (rf.size == lo.size == if_.size):
        raise InputError(
            "triples",
            f"have {rf.size} RF, {lo.size} LO and {if_.size} IF values",
            fix="give one (RF, LO, IF) per point",
        )
    diff = np.abs(rf - lo)
    bad = np.abs(diff - if_) > np.maximum(TRIPLE_REL_TOL * np.maximum(rf, lo), 1e-3)
    if np.any(bad):
        idx = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"triples[{idx}]",
            f"IF {format_frequency(if_[idx], 9)} is not |RF - LO| = "
            f"{format_frequency(diff[idx], 9)} "
            f"(RF {format_frequency(rf[idx], 9)}, LO {format_frequency(lo[idx], 9)})",
            fix="this tool measures difference-frequency conversion: IF = |RF - LO|",
        )
    return _finish(rf, lo, if_, "triples")


def lo_leakage_frequencies_hz(lo_hz: ArrayLike, harmonics: int) -> np.ndarray:
    """LO leakage lines at the IF port: ``n LO`` for n = 1..harmonics, shape (..., harmonics)."""
    if int(harmonics) != harmonics or harmonics < 1:
        raise InputError("harmonics", f"must be an integer >= 1 (got {harmonics!r})")
    lo = checked_array("lo_hz", lo_hz)
    n = np.arange(1, int(harmonics) + 1, dtype=float)
    return np.asarray(lo)[..., None] * n


# --------------------------------------------------------------------------- image response


def image_ratio_from_rejection_db(rejection_db: ArrayLike) -> FloatOrArray:
    """Image response r = G_i / G_s (linear) from the image rejection in dB (+inf -> 0)."""
    arr = np.asarray(rejection_db, dtype=float)
    if np.any(np.isnan(arr)) or np.any(arr == -np.inf):
        raise InputError(
            "image_rejection_db", "must be a number of dB or +inf", fix="0 dB = equal responses"
        )
    with np.errstate(over="ignore"):
        return scalar_or_array(np.where(np.isposinf(arr), 0.0, ratio_from_db(-arr)))


def rejection_db_from_image_ratio(image_ratio: ArrayLike) -> FloatOrArray:
    """Image rejection in dB from r = G_i / G_s; r = 0 gives +inf."""
    r = _ratio(image_ratio)
    with np.errstate(divide="ignore"):
        return scalar_or_array(-db_from_ratio(r))


def _ratio(image_ratio: ArrayLike) -> np.ndarray:
    r = checked_array("image_ratio", image_ratio)
    if np.any(r < 0):
        raise InputError(
            "image_ratio",
            f"must be >= 0 (got {float(r[r < 0].ravel()[0])!r})",
            fix="r = G_image / G_signal, linear: 1 for equal responses, 0 for none",
        )
    return r


def band_temperature_k(
    source_temperature_k: ArrayLike, loss_lin: ArrayLike = 1.0, physical_temperature_k=T0_K
) -> FloatOrArray:
    """Noise temperature delivered through a matched loss L at Tp: ``T/L + Tp (1 - 1/L)``, K."""
    t = checked_array("source_temperature_k", source_temperature_k)
    loss = checked_array("loss_lin", loss_lin)
    if np.any(loss < 1):
        raise InputError("loss_lin", "must be >= 1 (a linear loss)", fix="10**(loss_db/10)")
    tp = checked_array("physical_temperature_k", physical_temperature_k)
    return scalar_or_array(loss_output_temperature_k(t, loss, tp))


def converter_output_density_w_per_hz(
    gain_signal_lin: ArrayLike,
    gain_image_lin: ArrayLike,
    signal_temperature_k: ArrayLike,
    image_temperature_k: ArrayLike,
    te_ssb_k: ArrayLike,
) -> FloatOrArray:
    """Available IF noise density ``k [G_s T_s + G_i T_i + G_s Te_SSB]``, W/Hz (eq. 1)."""
    gs = checked_array("gain_signal_lin", gain_signal_lin)
    gi = checked_array("gain_image_lin", gain_image_lin)
    ts = checked_array("signal_temperature_k", signal_temperature_k)
    ti = checked_array("image_temperature_k", image_temperature_k)
    te = checked_array("te_ssb_k", te_ssb_k)
    # G_s (T_s + Te_SSB) + G_i T_i: the signal band as a two-port, the image band's share added
    t_out = two_port_output_temperature_k(ts, gs, te) + gi * ti
    return scalar_or_array(thermal_density_w_per_hz(t_out))


def ssb_factor(te_ssb_k: ArrayLike, image_ratio: ArrayLike, t0_k: float = T0_K) -> FloatOrArray:
    """Single-sideband noise factor ``1 + r + Te_SSB / T0`` (eq. 3)."""
    return scalar_or_array(
        ssb_factor_from_te_k(checked_array("te_ssb_k", te_ssb_k), _ratio(image_ratio), t0_k)
    )


def dsb_factor(te_ssb_k: ArrayLike, image_ratio: ArrayLike, t0_k: float = T0_K) -> FloatOrArray:
    """Double-sideband noise factor ``(1 + r + Te_SSB / T0) / (1 + r)`` (eq. 2, 3)."""
    r = _ratio(image_ratio)
    return scalar_or_array(
        dsb_from_ssb(ssb_factor_from_te_k(checked_array("te_ssb_k", te_ssb_k), r, t0_k), r)
    )


def te_dsb_from_ssb_k(te_ssb_k: ArrayLike, image_ratio: ArrayLike) -> FloatOrArray:
    """``Te_DSB = Te_SSB / (1 + r)``, K: the added noise referred to both bands (eq. 3)."""
    return scalar_or_array(dsb_from_ssb(checked_array("te_ssb_k", te_ssb_k), _ratio(image_ratio)))


def image_correction_db(image_ratio: ArrayLike) -> FloatOrArray:
    """``NF_SSB - NF_DSB = 10 log10(1 + r)``, dB (3.01 dB for equal responses, 0 for none)."""
    return scalar_or_array(db_from_ratio(1.0 + _ratio(image_ratio)))


def converter_te_from_y_k(
    y: ArrayLike,
    hot_signal_k: ArrayLike,
    cold_signal_k: ArrayLike,
    hot_image_k: ArrayLike,
    cold_image_k: ArrayLike,
    image_ratio: ArrayLike,
) -> FloatOrArray:
    """SSB noise temperature of everything behind the source from Y, K (eq. 4).

    ``Te = [Th_s + r Th_i - Y (Tc_s + r Tc_i)] / (Y - 1)``; Y <= 1 is refused by the caller.
    """
    yy = checked_array("y", y)
    r = _ratio(image_ratio)
    hot = two_response_temperature_k(
        checked_array("hot_signal_k", hot_signal_k), checked_array("hot_image_k", hot_image_k), r
    )
    cold = two_response_temperature_k(
        checked_array("cold_signal_k", cold_signal_k),
        checked_array("cold_image_k", cold_image_k),
        r,
    )
    return scalar_or_array(te_k_from_y(yy, hot, cold))


def converter_gain_from_hot_cold(
    hot_w_per_hz: ArrayLike,
    cold_w_per_hz: ArrayLike,
    hot_cal_w_per_hz: ArrayLike,
    cold_cal_w_per_hz: ArrayLike,
    excess_signal_k: ArrayLike,
    excess_image_k: ArrayLike,
    excess_cal_k: ArrayLike,
    image_ratio: ArrayLike,
) -> FloatOrArray:
    """Signal-band conversion gain G_s from hot/cold readings and an IF calibration (eq. 5).

    ``excess_*_k`` are the hot-minus-cold source temperatures at the converter's signal and
    image inputs and at the calibration plane (IF).
    """
    r = _ratio(image_ratio)
    excess = two_response_temperature_k(excess_signal_k, excess_image_k, r)
    return scalar_or_array(
        gain_from_hot_cold(
            hot_w_per_hz,
            cold_w_per_hz,
            excess,
            0.0,
            hot_cal_w_per_hz,
            cold_cal_w_per_hz,
            np.asarray(excess_cal_k),
            0.0,
        )
    )


def converter_gain_method_te_k(
    n_meas_w_per_hz: ArrayLike,
    conversion_gain_lin: ArrayLike,
    signal_temperature_k: ArrayLike,
    image_temperature_k: ArrayLike,
    image_ratio: ArrayLike,
    *,
    n_floor_w_per_hz: ArrayLike | None = None,
    floor_temperature_k: ArrayLike = T0_K,
) -> FloatOrArray:
    """SSB Te of the converter path by the gain method, K (eq. 6).

    ``n_meas_w_per_hz``: IF density with the input terminated (temperatures ``T_s``, ``T_i``
    in the two bands at the converter input); ``conversion_gain_lin``: signal-band conversion
    gain to the analyzer; ``n_floor_w_per_hz``: the analyzer's floor with a load at
    ``floor_temperature_k`` on its input (omitted: the analyzer's noise counts as the DUT's).
    """
    n = checked_array("n_meas_w_per_hz", n_meas_w_per_hz)
    g = checked_array("conversion_gain_lin", conversion_gain_lin)
    if np.any(g <= 0):
        raise InputError("conversion_gain_lin", "must be > 0", fix="10**(gain_db/10)")
    r = _ratio(image_ratio)
    if n_floor_w_per_hz is not None:
        n = floor_corrected_density_w_per_hz(
            n,
            checked_array("n_floor_w_per_hz", n_floor_w_per_hz),
            checked_array("floor_temperature_k", floor_temperature_k),
        )
    ts = checked_array("signal_temperature_k", signal_temperature_k)
    ti = checked_array("image_temperature_k", image_temperature_k)
    return scalar_or_array(te_k_from_output_density(n, g, two_response_temperature_k(ts, ti, r)))
