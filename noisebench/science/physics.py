"""Pure physics of noise: kT, dB conversions, noise factor and temperature, Friis, losses, SSB/DSB.

Every function is vectorized: it accepts a float or a numpy array and returns a float for a
scalar input, an array of the broadcast shape otherwise. Units are SI inside (Hz, W, W/Hz, K);
dB and dBm appear only in the names of the conversion functions. Power ratios (gain, loss, noise
factor, ENR, Y) are linear unless the name ends in ``_db``. Gains are available power gains,
losses are linear values >= 1 (``loss_lin = 1 / gain_lin``).

Policy on unphysical noise temperatures: a negative noise temperature (noise factor below 1,
noise figure below 0 dB) cannot describe a real passive or active two-port, so the conversions
refuse it with :class:`~noisebench.errors.InputError` by default. Measurements of very quiet
devices can legitimately scatter below zero, so the methods pass ``allow_negative=True`` and flag
the point instead. A noise factor <= 0 (Te <= -T0) has no dB value and is always refused.

References: docs/references.md §1-§5 and §10 (Friis 1944; IRE/IEEE Std 161; Kerr & Randa 2010).

Size: the one formula set (array kernels and their checked public forms), kept in one module on
purpose so every relation and its citation is found in one place.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import scipy.constants

from noisebench.errors import InputError, require_finite

T0_K: float = 290.0
"""Standard reference temperature of noise figure and ENR, K (IRE/IEEE Std 161)."""

BOLTZMANN_J_PER_K: float = float(scipy.constants.k)
"""Boltzmann constant, J/K (exact since the 2019 SI redefinition)."""

DB_PER_NEPER_POWER: float = 10.0 / math.log(10.0)
"""d(10 log10 x)/d(ln x) = 4.342945 dB: turns a relative uncertainty into dB."""

FloatOrArray = float | np.ndarray
ArrayLike = float | int | Sequence[float] | np.ndarray


# --------------------------------------------------------------------------- array kernels
#
# The formulas themselves, once: numpy arrays (or floats) in, arrays out, SI units, no input
# checks (callers validate; the budgets' propagation models run them on perturbed copies of
# checked values). The checked public functions below, the methods, the uncertainty models and the
# running layer all evaluate these, so the checks against the outside world in
# tests/test_physics.py and tests/test_reference_cascade.py exercise the code a measurement runs.
# The simulator deliberately does NOT use them (noisebench/sims/models.py has its own forms), so
# an error here shows up against the simulator instead of cancelling.


def ratio_from_db(db: ArrayLike) -> np.ndarray:
    """Power ratio from dB: ``10**(db/10)``."""
    return 10.0 ** (np.asarray(db, dtype=float) / 10.0)


def db_from_ratio(ratio: ArrayLike) -> np.ndarray:
    """dB from a power ratio: ``10*log10(ratio)`` (NaN/-inf for ratios <= 0)."""
    return 10.0 * np.log10(np.asarray(ratio, dtype=float))


def thermal_density_w_per_hz(temperature_k: ArrayLike) -> np.ndarray:
    """Available noise density of a matched load, ``k*T``, W/Hz (docs/references.md §1)."""
    return BOLTZMANN_J_PER_K * np.asarray(temperature_k, dtype=float)


def nf_db_from_te_k(te_k: ArrayLike, t0_k: float = T0_K) -> np.ndarray:
    """``NF = 10*log10(1 + Te/T0)``, dB (docs/references.md §2)."""
    return 10.0 * np.log10(1.0 + np.asarray(te_k, dtype=float) / t0_k)


def te_k_from_nf_db(nf_db: ArrayLike, t0_k: float = T0_K) -> np.ndarray:
    """``Te = T0*(10**(NF/10) - 1)``, K (docs/references.md §2)."""
    return t0_k * (10.0 ** (np.asarray(nf_db, dtype=float) / 10.0) - 1.0)


def source_hot_temperature_k(
    enr_lin: ArrayLike, tc_k: ArrayLike, t0_k: float = T0_K, enr_reference: str = "t0"
) -> np.ndarray:
    """Hot noise temperature of a noise source from its linear ENR, K (docs/references.md §5).

    ``"t0"``: ``T0*ENR + Tc`` (the excess noise does not change with the physical temperature
    Tc, common practice); ``"absolute"``: ``T0*(ENR + 1)`` whatever Tc.
    """
    enr = np.asarray(enr_lin, dtype=float)
    if enr_reference == "t0":
        return t0_k * enr + np.asarray(tc_k, dtype=float)
    return t0_k * (enr + 1.0) + 0.0 * np.asarray(tc_k, dtype=float)  # broadcast like "t0"


def te_k_from_y(y: ArrayLike, th_k: ArrayLike, tc_k: ArrayLike) -> np.ndarray:
    """``Te = (Th - Y*Tc)/(Y - 1)``, K, exact for any Th, Tc (docs/references.md §5)."""
    yy = np.asarray(y, dtype=float)
    return (np.asarray(th_k) - yy * np.asarray(tc_k)) / (yy - 1.0)


def gain_from_hot_cold(
    n_hot: ArrayLike,
    n_cold: ArrayLike,
    th_k: ArrayLike,
    tc_k: ArrayLike,
    n_hot_ref: ArrayLike,
    n_cold_ref: ArrayLike,
    th_ref_k: ArrayLike,
    tc_ref_k: ArrayLike,
) -> np.ndarray:
    """Gain between two hot/cold pairs: ``[(Nh - Nc)/(Th - Tc)] / [(Nh,ref - Nc,ref)/(Th,ref -
    Tc,ref)]`` (linear; the DUT's gain in the Y-factor method, docs/references.md §5)."""
    return ((np.asarray(n_hot) - n_cold) / (np.asarray(th_k) - tc_k)) / (
        (np.asarray(n_hot_ref) - n_cold_ref) / (np.asarray(th_ref_k) - tc_ref_k)
    )


def second_stage_corrected_te_k(
    te_total_k: ArrayLike, te_second_k: ArrayLike, first_gain_lin: ArrayLike
) -> np.ndarray:
    """First stage's Te from the cascade's: ``Te1 = Te12 - Te2/G1``, K (Friis 1944, §3)."""
    return np.asarray(te_total_k) - np.asarray(te_second_k) / np.asarray(first_gain_lin)


def floor_corrected_density_w_per_hz(
    n_meas_w_per_hz: ArrayLike, n_floor_w_per_hz: ArrayLike, floor_termination_k: ArrayLike
) -> np.ndarray:
    """The DUT's part of a reading: ``N_m - N_f + k*T_term``, W/Hz (docs/references.md §4)."""
    return (
        np.asarray(n_meas_w_per_hz)
        - np.asarray(n_floor_w_per_hz)
        + BOLTZMANN_J_PER_K * np.asarray(floor_termination_k)
    )


def te_k_from_output_density(
    n_w_per_hz: ArrayLike, gain_lin: ArrayLike, source_temperature_k: ArrayLike
) -> np.ndarray:
    """Te of a two-port from its output density: ``N/(k*G) - Ts``, K (docs/references.md §4)."""
    return np.asarray(n_w_per_hz) / (BOLTZMANN_J_PER_K * np.asarray(gain_lin)) - np.asarray(
        source_temperature_k
    )


def loss_te_k(loss_lin: ArrayLike, physical_temperature_k: ArrayLike) -> np.ndarray:
    """Noise temperature of a matched passive loss: ``(L - 1)*Tp``, K (docs/references.md §3)."""
    return (np.asarray(loss_lin, dtype=float) - 1.0) * np.asarray(physical_temperature_k)


def deembed_path_te_k(
    te_path_k: ArrayLike,
    path_gain_lin: ArrayLike,
    input_loss_lin: ArrayLike,
    input_loss_temperature_k: ArrayLike,
    output_loss_lin: ArrayLike,
    output_loss_temperature_k: ArrayLike,
) -> tuple[np.ndarray, np.ndarray]:
    """(Te_DUT, G_DUT) from a measured path [input loss, DUT, output loss] (Friis, §3).

    ``Te_path = (L_in - 1) Tp_in + L_in (Te_DUT + (L_out - 1) Tp_out / G_DUT)`` with
    ``G_DUT = G_path L_in L_out``.
    """
    dut_gain = np.asarray(path_gain_lin) * input_loss_lin * output_loss_lin
    te_after_input = (
        np.asarray(te_path_k) - (np.asarray(input_loss_lin) - 1.0) * input_loss_temperature_k
    ) / input_loss_lin
    te_dut = (
        te_after_input - (np.asarray(output_loss_lin) - 1.0) * output_loss_temperature_k / dut_gain
    )
    return te_dut, dut_gain


def two_port_output_temperature_k(
    t_in_k: ArrayLike, gain_lin: ArrayLike, te_k: ArrayLike
) -> np.ndarray:
    """Output noise temperature of a two-port: ``(T_in + Te)*G``, K (Friis 1944, §3)."""
    return (np.asarray(t_in_k) + np.asarray(te_k)) * np.asarray(gain_lin)


def loss_output_temperature_k(
    t_in_k: ArrayLike, loss_lin: ArrayLike, physical_temperature_k: ArrayLike
) -> np.ndarray:
    """Output noise temperature of a matched loss ``L`` at ``Tp``: ``T/L + Tp*(1 - 1/L)``, K."""
    loss = np.asarray(loss_lin, dtype=float)
    return np.asarray(t_in_k) / loss + np.asarray(physical_temperature_k) * (1.0 - 1.0 / loss)


# Frequency converters (two responses: signal band gain G_s, image band G_i, r = G_i / G_s;
# docs/references.md §10 and §17). A converter's input temperatures are referred to the signal
# band, so every single-response kernel above applies with T replaced by ``T_s + r T_i``.


def two_response_temperature_k(
    t_signal_k: ArrayLike, t_image_k: ArrayLike, image_ratio: ArrayLike
) -> np.ndarray:
    """Input temperature of a two-response converter referred to its signal band:
    ``T_s + r T_i``, K (IF noise ``k G_s (T_s + r T_i + Te_SSB)``, docs/references.md §17)."""
    return np.asarray(t_signal_k, dtype=float) + np.asarray(image_ratio) * np.asarray(t_image_k)


def ssb_factor_from_te_k(
    te_ssb_k: ArrayLike, image_ratio: ArrayLike, t0_k: float = T0_K
) -> np.ndarray:
    """Single-sideband noise factor ``1 + r + Te_SSB/T0`` (docs/references.md §10, §17)."""
    return 1.0 + np.asarray(image_ratio, dtype=float) + np.asarray(te_ssb_k, dtype=float) / t0_k


def dsb_from_ssb(value_ssb: ArrayLike, image_ratio: ArrayLike) -> np.ndarray:
    """Double-sideband value from the single-sideband one, ``x / (1 + r)``: the noise factor
    (``F_DSB = F_SSB/(1 + r)``) and the added temperature (``Te_DSB = Te_SSB/(1 + r)``)
    alike (docs/references.md §10, §17)."""
    return np.asarray(value_ssb, dtype=float) / (1.0 + np.asarray(image_ratio, dtype=float))


# --------------------------------------------------------------------------- sensitivity kernels
#
# First partial derivatives of the array kernels above, derived by hand (docs/references.md §20),
# for the first-order (GUM) propagation in the point functions: each ``*_partials`` returns one
# partial per argument of its kernel, in the kernel's argument order (T0 and the ENR convention
# are constants, not inputs). Same rules as the kernels: arrays or floats in, no input checks.
# tests/test_sensitivities.py checks every one against central differences of its kernel.


def ratio_from_db_slope(db: ArrayLike) -> np.ndarray:
    """``d(10**(db/10))/d(db) = 10**(db/10) / DB_PER_NEPER_POWER``, per dB."""
    return ratio_from_db(db) / DB_PER_NEPER_POWER


def db_from_ratio_slope(ratio: ArrayLike) -> np.ndarray:
    """``d(10 log10 x)/dx = DB_PER_NEPER_POWER / x``, dB per unit ratio."""
    return DB_PER_NEPER_POWER / np.asarray(ratio, dtype=float)


def nf_db_from_te_k_slope(te_k: ArrayLike, t0_k: float = T0_K) -> np.ndarray:
    """``dNF_dB/dTe = DB_PER_NEPER_POWER / (T0 + Te)``, dB/K."""
    return DB_PER_NEPER_POWER / (t0_k + np.asarray(te_k, dtype=float))


def source_hot_temperature_partials(
    enr_lin: ArrayLike, tc_k: ArrayLike, t0_k: float = T0_K, enr_reference: str = "t0"
) -> tuple[np.ndarray, np.ndarray]:
    """(dTh/dENR_lin, dTh/dTc): ``(T0, 1)`` for ``"t0"``, ``(T0, 0)`` for ``"absolute"``."""
    zero = 0.0 * np.asarray(enr_lin, dtype=float) * np.asarray(tc_k)  # the broadcast shape
    return zero + t0_k, zero + (1.0 if enr_reference == "t0" else 0.0)


def te_k_from_y_partials(
    y: ArrayLike, th_k: ArrayLike, tc_k: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(dTe/dY, dTe/dTh, dTe/dTc) of ``Te = (Th - Y Tc)/(Y - 1)``:
    ``((Tc - Th)/(Y - 1)^2, 1/(Y - 1), -Y/(Y - 1))``."""
    yy = np.asarray(y, dtype=float)
    inv = 1.0 / (yy - 1.0)
    return (np.asarray(tc_k) - np.asarray(th_k)) * inv * inv, inv, -yy * inv


def gain_from_hot_cold_partials(
    n_hot: ArrayLike,
    n_cold: ArrayLike,
    th_k: ArrayLike,
    tc_k: ArrayLike,
    n_hot_ref: ArrayLike,
    n_cold_ref: ArrayLike,
    th_ref_k: ArrayLike,
    tc_ref_k: ArrayLike,
) -> tuple[np.ndarray, ...]:
    """The eight partials of ``G = [(Nh - Nc)/(Th - Tc)] / [(Nh,ref - Nc,ref)/(Th,ref - Tc,ref)]``:
    with ``a = G/(Nh - Nc)``, ``b = G/(Th - Tc)``, ``c = G/(Nh,ref - Nc,ref)``,
    ``d = G/(Th,ref - Tc,ref)`` they are ``(a, -a, -b, b, -c, c, d, -d)``."""
    g = gain_from_hot_cold(n_hot, n_cold, th_k, tc_k, n_hot_ref, n_cold_ref, th_ref_k, tc_ref_k)
    a = g / (np.asarray(n_hot) - n_cold)
    b = g / (np.asarray(th_k) - tc_k)
    c = g / (np.asarray(n_hot_ref) - n_cold_ref)
    d = g / (np.asarray(th_ref_k) - tc_ref_k)
    return a, -a, -b, b, -c, c, d, -d


def second_stage_corrected_te_k_partials(
    te_total_k: ArrayLike, te_second_k: ArrayLike, first_gain_lin: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(d/dTe12, d/dTe2, d/dG1) of ``Te1 = Te12 - Te2/G1``: ``(1, -1/G1, Te2/G1^2)``."""
    inv = 1.0 / np.asarray(first_gain_lin, dtype=float)
    return np.ones_like(np.asarray(te_total_k, dtype=float) * inv), -inv, te_second_k * inv * inv


def floor_corrected_density_partials(
    n_meas_w_per_hz: ArrayLike, n_floor_w_per_hz: ArrayLike, floor_termination_k: ArrayLike
) -> tuple[float, float, float]:
    """(d/dN_m, d/dN_f, d/dT_term) of ``N_m - N_f + k T_term``: ``(1, -1, k)``."""
    return 1.0, -1.0, BOLTZMANN_J_PER_K


def te_k_from_output_density_partials(
    n_w_per_hz: ArrayLike, gain_lin: ArrayLike, source_temperature_k: ArrayLike
) -> tuple[np.ndarray, np.ndarray, float]:
    """(d/dN, d/dG, d/dTs) of ``Te = N/(k G) - Ts``: ``(1/(k G), -N/(k G^2), -1)``."""
    per_n = 1.0 / (BOLTZMANN_J_PER_K * np.asarray(gain_lin, dtype=float))
    return per_n, -np.asarray(n_w_per_hz) * per_n / gain_lin, -1.0


def deembed_path_te_k_partials(
    te_path_k: ArrayLike,
    path_gain_lin: ArrayLike,
    input_loss_lin: ArrayLike,
    input_loss_temperature_k: ArrayLike,
    output_loss_lin: ArrayLike,
    output_loss_temperature_k: ArrayLike,
) -> tuple[np.ndarray, ...]:
    """Partials of Te_DUT from :func:`deembed_path_te_k` with respect to (Te_path, G_path, L_in,
    Tp_in, L_out, Tp_out). With ``x = (L_out - 1) Tp_out / (G_path L_in L_out)``:
    ``(1/L_in, x/G_path, (x - (Te_path + Tp_in)/L_in)/L_in, -(L_in - 1)/L_in,
    -Tp_out/(G_path L_in L_out^2), -(L_out - 1)/(G_path L_in L_out))``. (The DUT gain
    ``G_path L_in L_out`` is linear in each of its factors.)"""
    g = np.asarray(path_gain_lin, dtype=float)
    lin = np.asarray(input_loss_lin, dtype=float)
    lout = np.asarray(output_loss_lin, dtype=float)
    dut_gain = g * lin * lout
    x = (lout - 1.0) * output_loss_temperature_k / dut_gain
    return (
        1.0 / lin + 0.0 * g,
        x / g,
        (x - (np.asarray(te_path_k) + input_loss_temperature_k) / lin) / lin,
        -(lin - 1.0) / lin,
        -np.asarray(output_loss_temperature_k) / (dut_gain * lout),
        -(lout - 1.0) / dut_gain,
    )


def loss_output_temperature_partials(
    t_in_k: ArrayLike, loss_lin: ArrayLike, physical_temperature_k: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(d/dT, d/dL, d/dTp) of ``T/L + Tp (1 - 1/L)``: ``(1/L, (Tp - T)/L^2, 1 - 1/L)``."""
    inv = 1.0 / np.asarray(loss_lin, dtype=float)
    return (
        inv + 0.0 * np.asarray(t_in_k),
        (np.asarray(physical_temperature_k) - t_in_k) * inv * inv,
        1.0 - inv,
    )


def two_response_temperature_partials(
    t_signal_k: ArrayLike, t_image_k: ArrayLike, image_ratio: ArrayLike
) -> tuple[float, np.ndarray, np.ndarray]:
    """(d/dT_s, d/dT_i, d/dr) of ``T_s + r T_i``: ``(1, r, T_i)``."""
    return 1.0, np.asarray(image_ratio, dtype=float), np.asarray(t_image_k, dtype=float)


def ssb_factor_from_te_k_partials(
    te_ssb_k: ArrayLike, image_ratio: ArrayLike, t0_k: float = T0_K
) -> tuple[float, float]:
    """(d/dTe_SSB, d/dr) of ``1 + r + Te_SSB/T0``: ``(1/T0, 1)``."""
    return 1.0 / t0_k, 1.0


def dsb_from_ssb_partials(
    value_ssb: ArrayLike, image_ratio: ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """(d/dx, d/dr) of ``x/(1 + r)``: ``(1/(1 + r), -x/(1 + r)^2)``."""
    inv = 1.0 / (1.0 + np.asarray(image_ratio, dtype=float))
    return inv, -np.asarray(value_ssb, dtype=float) * inv * inv


# --------------------------------------------------------------------------- helpers


def checked_array(field: str, value: ArrayLike) -> np.ndarray:
    """``value`` as a float array; refuses NaN/inf with InputError naming ``field``."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(
            field, f"must be a number or an array of numbers (got {value!r})", fix="pass floats"
        ) from exc
    require_finite(field, arr)
    return arr


def scalar_or_array(arr: np.ndarray) -> FloatOrArray:
    """Return a Python float for 0-d results, the array otherwise."""
    return float(arr) if np.ndim(arr) == 0 else arr


def _require(field: str, arr: np.ndarray, ok: np.ndarray, rule: str, fix: str) -> None:
    if not np.all(ok):
        bad = np.asarray(arr)[~np.asarray(ok)] if np.ndim(arr) else arr
        first = float(np.ravel(bad)[0])
        raise InputError(field, f"must be {rule} (got {first!r})", value=first, fix=fix)


def _temperature(field: str, value: ArrayLike, *, allow_zero: bool = True) -> np.ndarray:
    arr = checked_array(field, value)
    ok = arr >= 0 if allow_zero else arr > 0
    _require(
        field,
        arr,
        ok,
        ">= 0 K" if allow_zero else "> 0 K",
        "give an absolute temperature in kelvin (K = degC + 273.15)",
    )
    return arr


# --------------------------------------------------------------------------- kT and dB


def kt_w_per_hz(temperature_k: ArrayLike) -> FloatOrArray:
    """Available thermal noise density k*T of a matched load at ``temperature_k``, W/Hz."""
    return scalar_or_array(thermal_density_w_per_hz(_temperature("temperature_k", temperature_k)))


def db_to_linear(db: ArrayLike) -> FloatOrArray:
    """Power ratio from dB: 10**(db/10)."""
    return scalar_or_array(ratio_from_db(checked_array("db", db)))


def linear_to_db(lin: ArrayLike) -> FloatOrArray:
    """dB from a power ratio: 10*log10(lin). Refuses ratios <= 0."""
    arr = checked_array("lin", lin)
    _require("lin", arr, arr > 0, "> 0 (a power ratio)", "a ratio <= 0 has no dB value")
    return scalar_or_array(db_from_ratio(arr))


def dbm_to_w(dbm: ArrayLike) -> FloatOrArray:
    """Power in W from dBm."""
    return scalar_or_array(1e-3 * 10.0 ** (checked_array("dbm", dbm) / 10.0))


def w_to_dbm(w: ArrayLike) -> FloatOrArray:
    """Power in dBm from W. Refuses powers <= 0."""
    arr = checked_array("w", w)
    _require("w", arr, arr > 0, "> 0 W", "a power <= 0 has no dBm value")
    return scalar_or_array(10.0 * np.log10(arr / 1e-3))


def dbm_per_hz_to_w_per_hz(dbm_per_hz: ArrayLike) -> FloatOrArray:
    """Noise density in W/Hz from dBm/Hz."""
    return scalar_or_array(1e-3 * 10.0 ** (checked_array("dbm_per_hz", dbm_per_hz) / 10.0))


def w_per_hz_to_dbm_per_hz(w_per_hz: ArrayLike) -> FloatOrArray:
    """Noise density in dBm/Hz from W/Hz. Refuses densities <= 0."""
    arr = checked_array("w_per_hz", w_per_hz)
    _require("w_per_hz", arr, arr > 0, "> 0 W/Hz", "a density <= 0 has no dBm/Hz value")
    return scalar_or_array(10.0 * np.log10(arr / 1e-3))


# --------------------------------------------------------------------------- NF, F, Te


def _check_t0(t0_k: float) -> float:
    arr = _temperature("t0_k", t0_k, allow_zero=False)
    return float(arr)


def _check_factor(field: str, f: np.ndarray, allow_negative: bool) -> None:
    if allow_negative:
        _require(field, f, f > 0, "> 0", "a noise factor <= 0 has no noise figure")
    else:
        _require(
            field,
            f,
            f >= 1,
            ">= 1 (NF >= 0 dB)",
            "a noise factor below 1 means a negative noise temperature; "
            "pass allow_negative=True to accept measurement scatter",
        )


def _check_te(field: str, te: np.ndarray, t0_k: float, allow_negative: bool) -> None:
    if allow_negative:
        _require(
            field, te, te > -t0_k, f"> -t0_k = {-t0_k} K", "Te <= -T0 gives a noise factor <= 0"
        )
    else:
        _require(
            field,
            te,
            te >= 0,
            ">= 0 K",
            "pass allow_negative=True to accept measurement scatter below 0 K",
        )


def nf_db_to_factor(nf_db: ArrayLike, *, allow_negative: bool = False) -> FloatOrArray:
    """Noise factor F (linear) from noise figure in dB. NF < 0 dB refused unless allowed."""
    f = 10.0 ** (checked_array("nf_db", nf_db) / 10.0)
    _check_factor("nf_db", f, allow_negative)
    return scalar_or_array(f)


def factor_to_nf_db(factor: ArrayLike, *, allow_negative: bool = False) -> FloatOrArray:
    """Noise figure in dB from noise factor F. F < 1 refused unless allowed; F <= 0 always."""
    f = checked_array("factor", factor)
    _check_factor("factor", f, allow_negative)
    return scalar_or_array(10.0 * np.log10(f))


def factor_to_te_k(
    factor: ArrayLike, t0_k: float = T0_K, *, allow_negative: bool = False
) -> FloatOrArray:
    """Effective noise temperature Te = T0*(F - 1), K."""
    t0 = _check_t0(t0_k)
    f = checked_array("factor", factor)
    _check_factor("factor", f, allow_negative)
    return scalar_or_array(t0 * (f - 1.0))


def te_k_to_factor(
    te_k: ArrayLike, t0_k: float = T0_K, *, allow_negative: bool = False
) -> FloatOrArray:
    """Noise factor F = 1 + Te/T0 from the effective noise temperature in K."""
    t0 = _check_t0(t0_k)
    te = checked_array("te_k", te_k)
    _check_te("te_k", te, t0, allow_negative)
    return scalar_or_array(1.0 + te / t0)


def nf_db_to_te_k(
    nf_db: ArrayLike, t0_k: float = T0_K, *, allow_negative: bool = False
) -> FloatOrArray:
    """Effective noise temperature in K from noise figure in dB."""
    t0 = _check_t0(t0_k)
    nf = checked_array("nf_db", nf_db)
    _check_factor("nf_db", ratio_from_db(nf), allow_negative)
    return scalar_or_array(te_k_from_nf_db(nf, t0))


def te_k_to_nf_db(
    te_k: ArrayLike, t0_k: float = T0_K, *, allow_negative: bool = False
) -> FloatOrArray:
    """Noise figure in dB from the effective noise temperature in K."""
    t0 = _check_t0(t0_k)
    te = checked_array("te_k", te_k)
    _check_te("te_k", te, t0, allow_negative)
    return scalar_or_array(nf_db_from_te_k(te, t0))


# --------------------------------------------------------------------------- Friis cascade


def _stages(field: str, values: ArrayLike) -> np.ndarray:
    """Stack per-stage values into an array with stages on axis 0."""
    if isinstance(values, np.ndarray):
        arr = checked_array(field, values)
    else:
        try:
            if isinstance(values, (int, float)):
                raise TypeError("a scalar is not a sequence of stages")
            arr = np.stack(np.broadcast_arrays(*[np.asarray(v, dtype=float) for v in values]))
        except (TypeError, ValueError) as exc:
            raise InputError(
                field,
                "must be a sequence of per-stage values (scalars or arrays of one shape)",
                fix="pass e.g. [f1, f2] or a stage x freq array",
            ) from exc
        require_finite(field, arr)
    if arr.ndim == 0 or arr.shape[0] == 0:
        raise InputError(field, "needs at least one stage", fix="pass one value per stage")
    return arr


def _cascade_gains(gains: ArrayLike, n_stages: int) -> np.ndarray:
    if n_stages == 1 and not isinstance(gains, np.ndarray) and len(gains) == 0:  # type: ignore[arg-type]
        return np.ones(1)
    g = _stages("gains", gains)
    if g.shape[0] not in (n_stages, n_stages - 1):
        raise InputError(
            "gains",
            f"has {g.shape[0]} stages for {n_stages} noise stages",
            fix="give one gain per stage (the last one may be omitted)",
        )
    _require(
        "gains",
        g,
        g > 0,
        "> 0 (linear available gain)",
        "convert dB with db_to_linear; a loss L has gain 1/L",
    )
    # cumulative gain ahead of stage i: 1, G1, G1*G2, ...
    ahead = np.cumprod(g[: n_stages - 1], axis=0)
    ones = np.ones((1,) + ahead.shape[1:])
    return np.concatenate([ones, ahead], axis=0) if n_stages > 1 else ones


def _align_stages(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Broadcast two stage-first arrays against each other, keeping axis 0 as the stage axis."""
    ndim = max(a.ndim, b.ndim)
    a = a.reshape(a.shape + (1,) * (ndim - a.ndim))
    b = b.reshape(b.shape + (1,) * (ndim - b.ndim))
    try:
        return tuple(np.broadcast_arrays(a, b))  # type: ignore[return-value]
    except ValueError as exc:
        raise InputError(
            "gains",
            f"shape {b.shape[1:]} does not match the noise stages' {a.shape[1:]}",
            fix="give every stage the same frequency grid",
        ) from exc


def friis_noise_factor(factors: ArrayLike, gains: ArrayLike) -> FloatOrArray:
    """Cascade noise factor F = F1 + (F2-1)/G1 + (F3-1)/(G1 G2) + ... (Friis 1944).

    ``factors``: per-stage noise factors (linear, >= 1); ``gains``: per-stage linear available
    gains (the last stage's may be omitted). Each may be a sequence of scalars/arrays or a
    stage x frequency array; returns a float or an array over frequency.
    """
    f = _stages("factors", factors)
    _require("factors", f, f >= 1, ">= 1", "noise factors are linear and >= 1")
    f, ahead = _align_stages(f, _cascade_gains(gains, f.shape[0]))
    total = f[0] + np.sum((f[1:] - 1.0) / ahead[1:], axis=0)
    return scalar_or_array(np.asarray(total))


def friis_te_k(te_k: ArrayLike, gains: ArrayLike) -> FloatOrArray:
    """Cascade noise temperature Te = Te1 + Te2/G1 + Te3/(G1 G2) + ..., K (Friis 1944)."""
    te = _stages("te_k", te_k)
    _require("te_k", te, te >= 0, ">= 0 K", "noise temperatures of real stages are >= 0 K")
    te, ahead = _align_stages(te, _cascade_gains(gains, te.shape[0]))
    return scalar_or_array(np.asarray(np.sum(te / ahead, axis=0)))


# --------------------------------------------------------------------------- passive losses


def _loss(field: str, loss_lin: ArrayLike) -> np.ndarray:
    arr = checked_array(field, loss_lin)
    _require(
        field,
        arr,
        arr >= 1,
        ">= 1 (a linear loss)",
        "a loss of x dB is 10**(x/10); a loss below 1 would be gain",
    )
    return arr


def passive_loss_te_k(
    loss_lin: ArrayLike, physical_temperature_k: ArrayLike = T0_K
) -> FloatOrArray:
    """Noise temperature of a matched passive loss L at physical temperature Tp: (L-1)*Tp, K."""
    loss = _loss("loss_lin", loss_lin)
    tp = _temperature("physical_temperature_k", physical_temperature_k)
    return scalar_or_array(loss_te_k(loss, tp))


def passive_loss_factor(
    loss_lin: ArrayLike, physical_temperature_k: ArrayLike = T0_K, t0_k: float = T0_K
) -> FloatOrArray:
    """Noise factor of a matched passive loss: F = 1 + (L-1)*Tp/T0 (= L at Tp = T0)."""
    t0 = _check_t0(t0_k)
    te_loss = np.asarray(passive_loss_te_k(loss_lin, physical_temperature_k))
    return scalar_or_array(1.0 + te_loss / t0)


def deembed_input_loss_te_k(
    te_meas_k: ArrayLike, loss_lin: ArrayLike, physical_temperature_k: ArrayLike = T0_K
) -> FloatOrArray:
    """Te of the DUT behind an input loss: Te_DUT = (Te_meas - (L-1)*Tp) / L, K.

    Inverts Friis for [loss, DUT]: Te_meas = (L-1)*Tp + L*Te_DUT. The result may be negative
    for a noisy reading of a quiet DUT; the caller decides whether to flag it.
    """
    te = checked_array("te_meas_k", te_meas_k)
    loss = _loss("loss_lin", loss_lin)
    tp = _temperature("physical_temperature_k", physical_temperature_k)
    return scalar_or_array(deembed_path_te_k(te, 1.0, loss, tp, 1.0, 0.0)[0])


def deembed_input_loss(
    f_meas: ArrayLike,
    loss_lin: ArrayLike,
    physical_temperature_k: ArrayLike = T0_K,
    t0_k: float = T0_K,
) -> FloatOrArray:
    """Noise factor of the DUT behind an input loss: F_DUT = 1 + (F_meas - F_L)/L.

    ``F_L = 1 + (L-1)*Tp/T0`` is the loss's own noise factor (docs/references.md §3, generalised to
    Tp != T0).
    """
    t0 = _check_t0(t0_k)
    f = checked_array("f_meas", f_meas)
    loss = _loss("loss_lin", loss_lin)
    f_loss = np.asarray(passive_loss_factor(loss, physical_temperature_k, t0))
    return scalar_or_array(1.0 + (f - f_loss) / loss)


def deembed_output_loss_te_k(
    te_meas_k: ArrayLike,
    dut_gain_lin: ArrayLike,
    loss_lin: ArrayLike,
    physical_temperature_k: ArrayLike = T0_K,
) -> FloatOrArray:
    """Te of the DUT followed by a loss (a second stage): Te_DUT = Te_meas - (L-1)*Tp/G_DUT, K."""
    te = checked_array("te_meas_k", te_meas_k)
    gain = checked_array("dut_gain_lin", dut_gain_lin)
    _require("dut_gain_lin", gain, gain > 0, "> 0 (linear gain)", "convert dB with db_to_linear")
    loss = _loss("loss_lin", loss_lin)
    tp = _temperature("physical_temperature_k", physical_temperature_k)
    # the path gain G_DUT / L_out makes the kernel's G_DUT the DUT's own gain
    return scalar_or_array(deembed_path_te_k(te, gain / loss, 1.0, 0.0, loss, tp)[0])


def deembed_output_loss(
    f_meas: ArrayLike,
    dut_gain_lin: ArrayLike,
    loss_lin: ArrayLike,
    physical_temperature_k: ArrayLike = T0_K,
    t0_k: float = T0_K,
) -> FloatOrArray:
    """Noise factor of the DUT followed by a loss: F_DUT = F_meas - (F_L - 1)/G_DUT (Friis)."""
    t0 = _check_t0(t0_k)
    f = checked_array("f_meas", f_meas)
    gain = checked_array("dut_gain_lin", dut_gain_lin)
    _require("dut_gain_lin", gain, gain > 0, "> 0 (linear gain)", "convert dB with db_to_linear")
    f_loss = np.asarray(passive_loss_factor(loss_lin, physical_temperature_k, t0))
    return scalar_or_array(f - (f_loss - 1.0) / gain)


def deembed_gain(
    gain_meas_lin: ArrayLike, input_loss_lin: ArrayLike = 1.0, output_loss_lin: ArrayLike = 1.0
) -> FloatOrArray:
    """DUT gain from the measured path gain: G_DUT = G_meas * L_in * L_out (linear)."""
    gain = checked_array("gain_meas_lin", gain_meas_lin)
    _require("gain_meas_lin", gain, gain > 0, "> 0 (linear gain)", "convert dB with db_to_linear")
    return scalar_or_array(
        gain * _loss("input_loss_lin", input_loss_lin) * _loss("output_loss_lin", output_loss_lin)
    )


# --------------------------------------------------------------------------- SSB / DSB


def _image_ratio(ratio: ArrayLike) -> np.ndarray:
    arr = checked_array("image_to_signal_gain_ratio", ratio)
    _require(
        "image_to_signal_gain_ratio",
        arr,
        arr >= 0,
        ">= 0 (G_image / G_signal, linear)",
        "use 1.0 for equal sideband gains, 0 for a perfect image rejection",
    )
    return arr


def ssb_from_dsb_factor(
    f_dsb: ArrayLike, image_to_signal_gain_ratio: ArrayLike = 1.0
) -> FloatOrArray:
    """Single-sideband noise factor from double-sideband: F_SSB = F_DSB*(1 + G_i/G_s)."""
    f = checked_array("f_dsb", f_dsb)
    _require("f_dsb", f, f > 0, "> 0", "noise factors are linear")
    return scalar_or_array(f * (1.0 + _image_ratio(image_to_signal_gain_ratio)))


def dsb_from_ssb_factor(
    f_ssb: ArrayLike, image_to_signal_gain_ratio: ArrayLike = 1.0
) -> FloatOrArray:
    """Double-sideband noise factor from single-sideband: F_DSB = F_SSB/(1 + G_i/G_s)."""
    f = checked_array("f_ssb", f_ssb)
    _require("f_ssb", f, f > 0, "> 0", "noise factors are linear")
    return scalar_or_array(dsb_from_ssb(f, _image_ratio(image_to_signal_gain_ratio)))


def ssb_from_dsb_te_k(
    te_dsb_k: ArrayLike, image_to_signal_gain_ratio: ArrayLike = 1.0
) -> FloatOrArray:
    """Te_SSB = Te_DSB*(1 + G_i/G_s), K. Note F_SSB = 1 + G_i/G_s + Te_SSB/T0 (docs/references.md
    §10)."""
    te = checked_array("te_dsb_k", te_dsb_k)
    return scalar_or_array(te * (1.0 + _image_ratio(image_to_signal_gain_ratio)))


def dsb_from_ssb_te_k(
    te_ssb_k: ArrayLike, image_to_signal_gain_ratio: ArrayLike = 1.0
) -> FloatOrArray:
    """Te_DSB = Te_SSB/(1 + G_i/G_s), K."""
    te = checked_array("te_ssb_k", te_ssb_k)
    return scalar_or_array(dsb_from_ssb(te, _image_ratio(image_to_signal_gain_ratio)))


# --------------------------------------------------------------------------- quantum correction


def planck_correction(freq_hz: ArrayLike, temperature_k: ArrayLike) -> FloatOrArray:
    """Planck factor x/(e^x - 1), x = h f / (k T): available noise over k*T (dimensionless).

    Near 1 for ordinary RF work (0.99917 at 10 GHz, 290 K); matters at mm-wave and for
    cryogenic loads. Returns 1 exactly at f = 0.
    """
    f = checked_array("freq_hz", freq_hz)
    _require("freq_hz", f, f >= 0, ">= 0 Hz", "frequencies are in Hz")
    t = _temperature("temperature_k", temperature_k, allow_zero=False)
    x = scipy.constants.h * f / (BOLTZMANN_J_PER_K * t)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(x == 0, 1.0, x / np.expm1(np.where(x == 0, 1.0, x)))
    return scalar_or_array(np.asarray(ratio, dtype=float))
