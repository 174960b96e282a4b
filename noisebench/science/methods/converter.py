"""Y-factor and gain method for frequency-converting DUTs (mixers, downconverters, receivers).

The physics (eqs. 1-6) is derived in :mod:`noisebench.science.conversion`. Readings are IF
densities (their ``freq_hz`` is the IF); results are reported at the RF with the frequency plan,
both SSB and DSB values and the image correction in :class:`~noisebench.science.point.
ConversionInfo`.

- Y-factor: ENR(RF) and ENR(image) give the hot temperatures of the two bands the broadband
  noise source drives; the analyzer is calibrated at the IF with ENR(IF)
  (:func:`~noisebench.science.methods.yfactor.calibrate_point` at the IF); conversion gain from
  hot/cold (eq. 5); second-stage correction at the IF.
- Gain method: conversion gain (file, constant or measured RF -> IF) and the IF floor.

Input losses are evaluated at the RF and at the image (two values, the same cable); the output
loss at the IF. The image response is stated as the image rejection in dB (``None`` or
``math.inf``: no image response). ``u_nf_db`` is the statistical part only; the ENR terms (three
separate variables: RF, image and IF are different frequencies of the table) and the image
rejection's uncertainty are reported beside it in ``notes`` like the amplifier methods do.
Sensitivities are analytic (docs/references.md §20), chained through the kernels' partials.

Size: two methods (Y-factor and gain) for frequency-converting DUTs that share the frequency
plan, the image-response model and the loss de-embedding of this module; the physics is in
science/conversion.py.
"""

from __future__ import annotations

import math
from typing import Literal, NamedTuple

import numpy as np

from noisebench.errors import InputError, MeasurementError
from noisebench.science.conversion import Sideband, image_ratio_from_rejection_db
from noisebench.science.density import NoiseDensity
from noisebench.science.methods._common import (
    DEFAULT_FLOOR_WARNING_DB,
    DEFAULT_LOW_GAIN_DB,
    DEFAULT_SCATTER_LIMIT,
    FREQ_REL_TOL,
    build_point_result,
    check_density,
    check_loss_db,
    check_non_negative,
    check_number,
    check_same_frequency,
    check_te_plausible,
    check_temperature,
    check_y_significant,
    density_flags,
    margin_db,
)
from noisebench.science.methods._propagation import (
    Sensitivities,
    chain,
    linear_propagation,
)
from noisebench.science.methods.yfactor import (
    DEFAULT_Y_MIN_DB,
    Y_MINUS_ONE_MIN,
    CalibrationPoint,
    EnrReference,
    _pair_sensitivities,
    _y_too_close_to_one,
)
from noisebench.science.physics import (
    DB_PER_NEPER_POWER,
    T0_K,
    ArrayLike,
    db_from_ratio,
    db_from_ratio_slope,
    deembed_path_te_k,
    deembed_path_te_k_partials,
    dsb_from_ssb,
    dsb_from_ssb_partials,
    floor_corrected_density_partials,
    floor_corrected_density_w_per_hz,
    gain_from_hot_cold,
    gain_from_hot_cold_partials,
    loss_output_temperature_k,
    loss_output_temperature_partials,
    loss_te_k,
    ratio_from_db,
    ratio_from_db_slope,
    second_stage_corrected_te_k,
    second_stage_corrected_te_k_partials,
    source_hot_temperature_k,
    source_hot_temperature_partials,
    ssb_factor_from_te_k,
    ssb_factor_from_te_k_partials,
    te_k_from_output_density,
    te_k_from_output_density_partials,
    te_k_from_y,
    te_k_from_y_partials,
    thermal_density_w_per_hz,
    two_response_temperature_k,
    two_response_temperature_partials,
)
from noisebench.science.point import ConversionInfo, Method, PointFlag, PointResult
from noisebench.units import format_frequency

__all__ = [
    "ConverterSweep",
    "NfType",
    "converter_y_factor_sweep",
    "converter_gain_method_sweep",
    "converter_y_factor_point",
    "converter_gain_method_point",
]

NfType = Literal["ssb", "dsb"]


class ConverterSweep(NamedTuple):
    """Array results of the converter sweep functions (one element per point)."""

    nf_ssb_db: np.ndarray
    nf_dsb_db: np.ndarray
    te_ssb_k: np.ndarray
    te_dsb_k: np.ndarray
    gain_db: np.ndarray | None  # DUT conversion gain (signal band), dB
    y_db: np.ndarray | None  # Y-factor only
    nf_ssb_uncorrected_db: np.ndarray | None  # before the second-stage correction


# --------------------------------------------------------------------------- shared checks


def _rejection(image_rejection_db: float | None) -> tuple[float | None, float]:
    """(image rejection in dB or None, linear r)."""
    if image_rejection_db is None or image_rejection_db == math.inf:
        return None, 0.0
    x = check_number("image_rejection_db", image_rejection_db)
    if x < -300.0:  # an image response 1e30 times the signal's: let the checked form decide
        return x, float(image_ratio_from_rejection_db(x))
    return x, float(ratio_from_db(-x))  # what image_ratio_from_rejection_db gives, faster


def _db(ratio) -> float:
    """10 log10 of a scalar ratio, as a float."""
    return float(db_from_ratio(ratio))


def _factor_checks(te_ssb: np.ndarray, r, t0: float, what: str, freq_hz=None) -> None:
    bad = ssb_factor_from_te_k(te_ssb, r, t0) <= 0
    if np.any(bad):
        where = f" at {format_frequency(freq_hz)}" if freq_hz is not None else ""
        raise MeasurementError(
            f"{what}{where}: noise factor <= 0; the reading is below what the source "
            "terminations alone deliver: check the ENR, the image rejection and the temperatures"
        )


def _to_sweep(te_ssb, r, t0, gain_lin, y, te_unc) -> ConverterSweep:
    f_ssb = ssb_factor_from_te_k(te_ssb, r, t0)
    return ConverterSweep(
        nf_ssb_db=db_from_ratio(f_ssb),
        nf_dsb_db=db_from_ratio(dsb_from_ssb(f_ssb, r)),
        te_ssb_k=te_ssb,
        te_dsb_k=dsb_from_ssb(te_ssb, r),
        gain_db=None if gain_lin is None else db_from_ratio(gain_lin),
        y_db=None if y is None else db_from_ratio(y),
        nf_ssb_uncorrected_db=None
        if te_unc is None
        else db_from_ratio(ssb_factor_from_te_k(te_unc, r, t0)),
    )


# --------------------------------------------------------------------------- Y-factor core


def _y_core(
    hot,
    cold,
    enr_rf_db,
    enr_image_db,
    tc,
    r,
    t0,
    ref,
    lin_s,
    lin_i,
    tp_in,
    lout,
    tp_out,
    cal=None,  # (hot_cal, cold_cal, enr_if_db, tc_cal) or None
    gain_scale=1.0,  # the budget's first-order output mismatch on the conversion gain
    parts: dict[str, np.ndarray] | None = None,
):
    """(Te_SSB of the DUT, DUT conversion gain or None, Y, Te_SSB before the second-stage
    correction or None), all arrays; eqs. 4 and 5 with losses applied to the temperatures.
    ``parts``, when given, receives the intermediate quantities (for the sensitivities)."""
    if np.any(hot <= cold):
        raise MeasurementError(
            "converter Y-factor: hot reading is not above the cold one; check that the noise "
            "source switches, is connected to the RF port and the LO is on"
        )
    th_s = source_hot_temperature_k(ratio_from_db(enr_rf_db), tc, t0, ref)
    th_i = source_hot_temperature_k(ratio_from_db(enr_image_db), tc, t0, ref)
    # both bands' source temperatures through the input loss, referred to the signal band
    hot_i = loss_output_temperature_k(th_i, lin_i, tp_in)
    cold_i = loss_output_temperature_k(tc, lin_i, tp_in)
    hot_in = two_response_temperature_k(loss_output_temperature_k(th_s, lin_s, tp_in), hot_i, r)
    cold_in = two_response_temperature_k(loss_output_temperature_k(tc, lin_s, tp_in), cold_i, r)
    y = hot / cold
    te12 = te_k_from_y(y, hot_in, cold_in)
    if parts is not None:
        parts.update(th_s=th_s, th_i=th_i, hot_i=hot_i, cold_i=cold_i, te12=te12)
        parts.update(hot_in=hot_in, cold_in=cold_in)
    if cal is None:
        return te12, None, y, None
    hc, cc, enr_if_db, tc_cal = cal
    if np.any(hc <= cc):
        raise MeasurementError(
            "converter Y-factor calibration at the IF: hot reading is not above the cold one"
        )
    th_if = source_hot_temperature_k(ratio_from_db(enr_if_db), tc_cal, t0, ref)
    te2 = te_k_from_y(hc / cc, th_if, tc_cal)
    g_path = gain_from_hot_cold(hot, cold, hot_in, cold_in, hc, cc, th_if, tc_cal) * gain_scale
    te1 = second_stage_corrected_te_k(te12, te2, g_path)
    if parts is not None:
        parts.update(th_if=th_if, te2=te2, g_path=g_path, te1=te1)
    te_dut, g_dut = deembed_path_te_k(te1, g_path, 1.0, 0.0, lout, tp_out)
    te_unc = deembed_path_te_k(te12, g_path, 1.0, 0.0, lout, tp_out)[0]
    return te_dut, g_dut, y, te_unc


def converter_y_factor_sweep(
    hot_w_per_hz: ArrayLike,
    cold_w_per_hz: ArrayLike,
    enr_rf_db: ArrayLike,
    enr_image_db: ArrayLike,
    *,
    cold_temperature_k: ArrayLike,
    image_rejection_db: float | None,
    hot_cal_w_per_hz: ArrayLike | None = None,
    cold_cal_w_per_hz: ArrayLike | None = None,
    cal_if_enr_db: ArrayLike | None = None,
    cal_cold_temperature_k: ArrayLike | None = None,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_image_db: float | None = None,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
) -> ConverterSweep:
    """Converter NF (SSB and DSB), Te and conversion gain by the Y-factor, over arrays.

    ``hot``/``cold``: IF densities with the noise source on the RF port; ``enr_rf_db`` /
    ``enr_image_db``: the source's ENR at the RF and at the image; ``cal_*``: the IF
    calibration (source straight into the analyzer at the IF, ENR(IF)), which enables the
    second-stage correction and the gain. Losses in dB; ``input_loss_image_db`` defaults to
    ``input_loss_db``; temperatures default to the cold temperature.
    """
    hot = np.asarray(hot_w_per_hz, dtype=float)
    cold = np.asarray(cold_w_per_hz, dtype=float)
    for name, arr in (("hot_w_per_hz", hot), ("cold_w_per_hz", cold)):
        if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
            raise InputError(name, "must be finite densities > 0 W/Hz", fix="pass linear W/Hz")
    tc = np.asarray(cold_temperature_k, dtype=float)
    if np.any(tc <= 0):
        raise InputError("cold_temperature_k", "must be > 0 K", fix="give kelvin")
    _, r = _rejection(image_rejection_db)
    t0 = check_temperature("t0_k", t0_k)
    lin_s, lin_i, lout, tp_in, tp_out = _losses(
        input_loss_db,
        input_loss_image_db,
        output_loss_db,
        input_loss_temperature_k,
        output_loss_temperature_k,
        tc,
    )
    cal = None
    if (hot_cal_w_per_hz is None) != (cold_cal_w_per_hz is None) or (
        hot_cal_w_per_hz is not None and cal_if_enr_db is None
    ):
        raise InputError(
            "hot_cal_w_per_hz",
            "cold_cal_w_per_hz and cal_if_enr_db go together",
            fix="pass the IF calibration's hot and cold densities and ENR(IF), or none of them",
        )
    if hot_cal_w_per_hz is not None:
        cal = (
            np.asarray(hot_cal_w_per_hz, dtype=float),
            np.asarray(cold_cal_w_per_hz, dtype=float),
            np.asarray(cal_if_enr_db, dtype=float),
            tc if cal_cold_temperature_k is None else np.asarray(cal_cold_temperature_k, float),
        )
    elif lout != 1.0:
        raise InputError(
            "output_loss_db",
            "needs the conversion gain, which only an IF calibration gives",
            fix="calibrate at the IF first, or leave the output loss inside the calibration path",
        )
    te, g, y, te_unc = _y_core(
        hot,
        cold,
        np.asarray(enr_rf_db, float),
        np.asarray(enr_image_db, float),
        tc,
        r,
        t0,
        enr_reference,
        lin_s,
        lin_i,
        tp_in,
        lout,
        tp_out,
        cal,
    )
    _factor_checks(te, r, t0, "converter Y-factor")
    return _to_sweep(te, r, t0, g, y, te_unc)


def _losses(in_db, in_image_db, out_db, tp_in, tp_out, default_tp):
    lin_s = float(ratio_from_db(check_loss_db("input_loss_db", in_db)))
    lin_i = (
        lin_s
        if in_image_db is None
        else float(ratio_from_db(check_loss_db("input_loss_image_db", in_image_db)))
    )
    lout = float(ratio_from_db(check_loss_db("output_loss_db", out_db)))
    tpi = default_tp if tp_in is None else check_temperature("input_loss_temperature_k", tp_in)
    tpo = default_tp if tp_out is None else check_temperature("output_loss_temperature_k", tp_out)
    return lin_s, lin_i, lout, tpi, tpo


# --------------------------------------------------------------------------- gain-method core


def _gain_core(n_meas, n_floor, g_db, ts, r, lin_s, lin_i, tp_in, lout, tp_out, t_term):
    """(Te_SSB of the DUT, DUT conversion gain). ``g_db``: the DUT's own conversion gain."""
    g_dut = ratio_from_db(g_db)
    g_path = g_dut / lout  # converter input -> analyzer
    n = n_meas if n_floor is None else floor_corrected_density_w_per_hz(n_meas, n_floor, t_term)
    if np.any(n <= 0):
        raise MeasurementError(
            "converter gain method: no DUT noise is left after the floor correction; check that "
            "the converter is powered, the LO is on and the floor used the same settings"
        )
    t_in = two_response_temperature_k(
        loss_output_temperature_k(ts, lin_s, tp_in), loss_output_temperature_k(ts, lin_i, tp_in), r
    )
    te_path = te_k_from_output_density(n, g_path, t_in)
    return deembed_path_te_k(te_path, g_path, 1.0, 0.0, lout, tp_out)[0], g_dut


def converter_gain_method_sweep(
    n_meas_w_per_hz: ArrayLike,
    conversion_gain_db: ArrayLike,
    *,
    image_rejection_db: float | None,
    n_floor_w_per_hz: ArrayLike | None = None,
    source_temperature_k: float = T0_K,
    floor_temperature_k: float | None = None,
    t0_k: float = T0_K,
    input_loss_db: float = 0.0,
    input_loss_image_db: float | None = None,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
) -> ConverterSweep:
    """Converter NF (SSB and DSB) and Te by the gain method, over arrays (eq. 6).

    ``n_meas_w_per_hz``: IF density with the RF input terminated at ``source_temperature_k``;
    ``conversion_gain_db``: the converter's own signal-band conversion gain (losses not
    included); ``n_floor_w_per_hz``: the analyzer floor at the IF with a load at
    ``floor_temperature_k`` (default: the source temperature).
    """
    n = np.asarray(n_meas_w_per_hz, dtype=float)
    if not np.all(np.isfinite(n)) or np.any(n <= 0):
        raise InputError("n_meas_w_per_hz", "must be finite densities > 0 W/Hz", fix="W/Hz")
    ts = check_temperature("source_temperature_k", source_temperature_k)
    t_term = (
        ts
        if floor_temperature_k is None
        else check_temperature("floor_temperature_k", floor_temperature_k)
    )
    t0 = check_temperature("t0_k", t0_k)
    _, r = _rejection(image_rejection_db)
    lin_s, lin_i, lout, tp_in, tp_out = _losses(
        input_loss_db,
        input_loss_image_db,
        output_loss_db,
        input_loss_temperature_k,
        output_loss_temperature_k,
        ts,
    )
    floor = None if n_floor_w_per_hz is None else np.asarray(n_floor_w_per_hz, dtype=float)
    g_db = np.asarray(conversion_gain_db, dtype=float)
    te, g = _gain_core(n, floor, g_db, ts, r, lin_s, lin_i, tp_in, lout, tp_out, t_term)
    _factor_checks(te, r, t0, "converter gain method")
    te_unc = None
    if floor is not None:
        te_unc = _gain_core(n, None, g_db, ts, r, lin_s, lin_i, tp_in, lout, tp_out, t_term)[0]
    return _to_sweep(te, r, t0, g, None, te_unc)


# --------------------------------------------------------------------------- sensitivities
#
# First partial derivatives of the point models above with respect to their named inputs, by the
# chain rule through the kernels' partials (docs/references.md §20); the point functions
# evaluate the model once and propagate with these.


def _rejection_sensitivities(rejection: float | None, r: float) -> Sensitivities:
    """dr/d(image rejection in dB): ``r = 10**(-IRR/10)`` gives ``-r/(10/ln 10)``; none when
    the converter has no image response."""
    if rejection is None:
        return {}
    return {"rej_db": -float(ratio_from_db_slope(-rejection))}


def _input_temperature_sensitivities(
    t_s: float,
    d_t_s: Sensitivities,
    t_i: float,
    d_t_i: Sensitivities,
    t_i_out: float,
    r: float,
    d_r: Sensitivities,
    lin_s: float,
    lin_i: float,
    tp_in: float,
) -> Sensitivities:
    """Sensitivities of ``T_s' + r T_i'`` (each band's source temperature through the input
    loss, referred to the signal band; ``t_i_out`` = T_i') from those of T_s, T_i and r."""
    a_s = loss_output_temperature_partials(t_s, lin_s, tp_in)[0]
    a_i = loss_output_temperature_partials(t_i, lin_i, tp_in)[0]
    w_s, w_i, w_r = two_response_temperature_partials(0.0, t_i_out, r)
    return chain((w_s * a_s, d_t_s), (w_i * a_i, d_t_i), (w_r, d_r))


def _nf_sensitivities(
    te_ssb: float, d_te: Sensitivities, r: float, d_r: Sensitivities, t0: float, nf_type: NfType
) -> Sensitivities:
    """Sensitivities of the NF (dB) of ``nf_type`` from those of Te_SSB and r."""
    f_ssb = float(ssb_factor_from_te_k(te_ssb, r, t0))
    p_te, p_r = ssb_factor_from_te_k_partials(te_ssb, r, t0)
    d_f = chain((p_te, d_te), (p_r, d_r))
    if nf_type == "ssb":
        return chain((db_from_ratio_slope(f_ssb), d_f))
    q_f, q_r = dsb_from_ssb_partials(f_ssb, r)
    return chain((db_from_ratio_slope(dsb_from_ssb(f_ssb, r)), chain((q_f, d_f), (q_r, d_r))))


def _y_sensitivities(
    values: dict[str, float],
    parts: dict[str, np.ndarray],
    tc: float,
    tc_cal: float | None,
    r: float,
    d_r: Sensitivities,
    t0: float,
    ref: str,
    lin_s: float,
    lin_i: float,
    tp_in: float,
    lout: float,
    tp_out: float,
) -> tuple[Sensitivities, Sensitivities | None]:
    """(dTe_SSB, dG_dB or None) of :func:`_y_core` (its intermediate quantities in ``parts``)
    with respect to h, c, hc, cc, enr_rf, enr_img, enr_if and rej_db."""
    h, c = values["h"], values["c"]
    y = h / c
    p = {k: float(v) for k, v in parts.items()}
    d_th = {}
    for key in ("enr_rf", "enr_img"):
        slope = source_hot_temperature_partials(ratio_from_db(values[key]), tc, t0, ref)[0]
        d_th[key] = {key: float(slope) * float(ratio_from_db_slope(values[key]))}
    d_hot_in = _input_temperature_sensitivities(
        p["th_s"],
        d_th["enr_rf"],
        p["th_i"],
        d_th["enr_img"],
        p["hot_i"],
        r,
        d_r,
        lin_s,
        lin_i,
        tp_in,
    )
    d_cold_in = _input_temperature_sensitivities(
        tc, {}, tc, {}, p["cold_i"], r, d_r, lin_s, lin_i, tp_in
    )
    hot_in, cold_in = p["hot_in"], p["cold_in"]
    p_y, p_th, p_tc = (float(x) for x in te_k_from_y_partials(y, hot_in, cold_in))
    d_te12 = chain(
        (p_y / c, {"h": 1.0}), (-p_y * y / c, {"c": 1.0}), (p_th, d_hot_in), (p_tc, d_cold_in)
    )
    if tc_cal is None:
        return d_te12, None
    hc, cc, th_if, g_path = values["hc"], values["cc"], p["th_if"], p["g_path"]
    d_te2, d_th_if = _pair_sensitivities(
        hc, cc, th_if, tc_cal, values["enr_if"], t0, ref, ("hc", "cc", "enr_if")
    )
    g_h, g_c, g_hot, g_cold, g_hc, g_cc, g_th, _ = (
        float(x) for x in gain_from_hot_cold_partials(h, c, hot_in, cold_in, hc, cc, th_if, tc_cal)
    )
    d_g = chain(
        (g_h, {"h": 1.0}),
        (g_c, {"c": 1.0}),
        (g_hot, d_hot_in),
        (g_cold, d_cold_in),
        (g_hc, {"hc": 1.0}),
        (g_cc, {"cc": 1.0}),
        (g_th * d_th_if, {"enr_if": 1.0}),
    )
    s_12, s_2, s_g = second_stage_corrected_te_k_partials(p["te12"], p["te2"], g_path)
    d_te1 = chain((s_12, d_te12), (s_2, d_te2), (s_g, d_g))
    q_te, q_g = deembed_path_te_k_partials(p["te1"], g_path, 1.0, 0.0, lout, tp_out)[:2]
    # G_DUT = G_path L_out with a constant loss: dG_DUT_dB/dG_path = (10/ln 10)/G_path
    return chain((q_te, d_te1), (q_g, d_g)), chain((db_from_ratio_slope(g_path), d_g))


def _gain_sensitivities(
    n_meas: float,
    n_floor: float | None,
    g_db: float,
    ts: float,
    r: float,
    d_r: Sensitivities,
    lin_s: float,
    lin_i: float,
    tp_in: float,
    lout: float,
    tp_out: float,
    t_term: float,
) -> Sensitivities:
    """dTe_SSB of :func:`_gain_core` with respect to n_meas, n_floor, g_db and rej_db."""
    g_path = float(ratio_from_db(g_db)) / lout
    d_g = {"g_db": float(ratio_from_db_slope(g_db)) / lout}
    if n_floor is None:
        n, d_n = n_meas, {"n_meas": 1.0}
    else:
        n = float(floor_corrected_density_w_per_hz(n_meas, n_floor, t_term))
        p_m, p_f, _ = floor_corrected_density_partials(n_meas, n_floor, t_term)
        d_n = {"n_meas": p_m, "n_floor": p_f}
    t_i = float(loss_output_temperature_k(ts, lin_i, tp_in))
    t_in = float(two_response_temperature_k(loss_output_temperature_k(ts, lin_s, tp_in), t_i, r))
    d_t_in = _input_temperature_sensitivities(ts, {}, ts, {}, t_i, r, d_r, lin_s, lin_i, tp_in)
    te_path = float(te_k_from_output_density(n, g_path, t_in))
    p_n, p_g, p_t = te_k_from_output_density_partials(n, g_path, t_in)
    d_te_path = chain((p_n, d_n), (p_g, d_g), (p_t, d_t_in))
    q_te, q_g = deembed_path_te_k_partials(te_path, g_path, 1.0, 0.0, lout, tp_out)[:2]
    return chain((q_te, d_te_path), (q_g, d_g))


# --------------------------------------------------------------------------- point functions


def _plan_point(rf_hz: float, lo_hz: float, if_hz: float) -> tuple[float, float, float, Sideband]:
    """(RF, LO, image, sideband) checked against the IF the densities were read at."""
    rf = check_number("rf_hz", rf_hz)
    lo = check_number("lo_hz", lo_hz)
    if rf <= 0 or lo <= 0:
        raise InputError("rf_hz", "RF and LO must be > 0 Hz", fix="give Hz")
    if not math.isclose(abs(rf - lo), if_hz, rel_tol=FREQ_REL_TOL, abs_tol=1e-3):
        raise InputError(
            "rf_hz",
            f"|RF - LO| = {format_frequency(abs(rf - lo), 9)} but the densities were read at "
            f"{format_frequency(if_hz, 9)}",
            fix="read the IF densities at |RF - LO|",
        )
    image = 2.0 * lo - rf
    if image <= 0:
        raise InputError("lo_hz", "puts the image at <= 0 Hz (LO below the IF)", fix="raise the LO")
    return rf, lo, image, Sideband.UPPER if rf > lo else Sideband.LOWER


def _check_nf_type(nf_type: str) -> NfType:
    if nf_type not in ("ssb", "dsb"):
        raise InputError(
            "nf_type", f"must be 'ssb' or 'dsb' (got {nf_type!r})", fix="ssb: signal band only"
        )
    return nf_type  # type: ignore[return-value]


def _u_optional(field: str, value: float | None) -> float | None:
    if value is None:
        return None
    return check_non_negative(field, value, "give a standard uncertainty in dB")


def _conversion_info(
    rf, lo, if_hz, image, sideband, nf_type, te_ssb, r, t0, rejection, enr_image, cal_enr, lo_dbm
) -> ConversionInfo:
    f_ssb = ssb_factor_from_te_k(te_ssb, r, t0)
    return ConversionInfo(
        rf_hz=rf,
        lo_hz=lo,
        if_hz=if_hz,
        image_hz=image,
        sideband=sideband.value,
        nf_type=nf_type,
        nf_ssb_db=_db(f_ssb),
        nf_dsb_db=_db(dsb_from_ssb(f_ssb, r)),
        te_ssb_k=te_ssb,
        te_dsb_k=float(dsb_from_ssb(te_ssb, r)),
        image_rejection_db=rejection,
        image_correction_db=_db(1.0 + r),
        enr_image_db=enr_image,
        cal_if_enr_db=cal_enr,
        lo_level_dbm=lo_dbm,
    )


def _nf_and_slope(
    te_ssb: float, r: float, t0: float, nf_type: NfType
) -> tuple[float, float, float]:
    """(NF in dB of the requested type, its Te, dNF_dB/dTe_SSB)."""
    f_ssb = float(ssb_factor_from_te_k(te_ssb, r, t0))
    if nf_type == "ssb":
        return _db(f_ssb), te_ssb, DB_PER_NEPER_POWER / (t0 * f_ssb)
    return (
        _db(dsb_from_ssb(f_ssb, r)),
        float(dsb_from_ssb(te_ssb, r)),
        DB_PER_NEPER_POWER / (t0 * f_ssb),
    )


def converter_y_factor_point(
    hot: NoiseDensity,
    cold: NoiseDensity,
    *,
    rf_hz: float,
    lo_hz: float,
    enr_rf_db: float,
    enr_image_db: float | None,
    cold_temperature_k: float,
    image_rejection_db: float | None,
    nf_type: NfType = "ssb",
    calibration: CalibrationPoint | None = None,
    u_enr_rf_db: float | None = 0.0,
    u_enr_image_db: float | None = 0.0,
    u_image_rejection_db: float = 0.0,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_image_db: float | None = None,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    lo_level_dbm: float | None = None,
    y_min_db: float = DEFAULT_Y_MIN_DB,
    enr_extrapolated: bool = False,
    floor_warning_db: float = DEFAULT_FLOOR_WARNING_DB,
    low_gain_db: float = DEFAULT_LOW_GAIN_DB,
    scatter_limit: float = DEFAULT_SCATTER_LIMIT,
    require_significant_y: bool = True,
) -> PointResult:
    """NF (SSB and DSB), Te and conversion gain of a converter at one point by the Y-factor.

    ``hot``/``cold``: IF densities (read at ``|rf_hz - lo_hz|``) with the noise source on the
    RF port on/off. ``enr_rf_db``/``enr_image_db``: ENR at the RF and at the image (the image
    ENR may be None only when ``image_rejection_db`` is None, i.e. no image response).
    ``calibration``: the analyzer calibrated at the IF with ENR(IF) (``calibrate_point`` at the
    IF); it enables the second-stage correction and the conversion gain. ``nf_type`` picks which
    of SSB/DSB goes into ``nf_db``/``te_k``; both are in ``result.conversion``. Losses in dB:
    input loss at the RF and at the image (default: the same), output loss at the IF.
    ``require_significant_y=False`` skips the refusal of a Y within 4 u(Y) of 1 (planning only:
    the forecast and the averaging loops need the uncertainty a weak pair would have).
    """
    hot = check_density("hot", hot)
    cold = check_density("cold", cold)
    densities = {"hot": hot, "cold": cold}
    if calibration is not None:
        if not isinstance(calibration, CalibrationPoint):
            raise InputError(
                "calibration", "must be a CalibrationPoint", fix="calibrate_point() at the IF"
            )
        densities.update(hot_cal=calibration.hot, cold_cal=calibration.cold)
    if_hz = check_same_frequency(hot, {k: v for k, v in densities.items() if k != "hot"})
    rf, lo, image, sideband = _plan_point(rf_hz, lo_hz, if_hz)
    nf_type = _check_nf_type(nf_type)
    rejection, r = _rejection(image_rejection_db)
    enr_rf = check_number("enr_rf_db", enr_rf_db)
    if enr_image_db is None:
        if r > 0:
            raise InputError(
                "enr_image_db",
                f"is needed: the converter responds at the image ({format_frequency(image)})",
                fix="extend the ENR table to the image, or declare the image rejection",
            )
        enr_img = enr_rf  # weighted by r = 0: no effect
    else:
        enr_img = check_number("enr_image_db", enr_image_db)
    u_rf = _u_optional("u_enr_rf_db", u_enr_rf_db)
    u_img = _u_optional("u_enr_image_db", u_enr_image_db)
    u_rej = check_non_negative("u_image_rejection_db", u_image_rejection_db, "dB")
    tc = check_temperature("cold_temperature_k", cold_temperature_k)
    t0 = check_temperature("t0_k", t0_k)
    if enr_reference not in ("t0", "absolute"):
        raise InputError("enr_reference", "must be 't0' or 'absolute'")
    if calibration is not None and (
        calibration.enr_reference != enr_reference or calibration.t0_k != t0
    ):
        raise InputError(
            "calibration",
            "was made with another ENR convention or T0",
            fix="calibrate and measure with the same enr_reference and t0_k",
        )
    lin_s, lin_i, lout, tp_in, tp_out = _losses(
        input_loss_db,
        input_loss_image_db,
        output_loss_db,
        input_loss_temperature_k,
        output_loss_temperature_k,
        tc,
    )
    if calibration is None and lout != 1.0:
        raise InputError(
            "output_loss_db",
            "needs the conversion gain, which only an IF calibration gives",
            fix="calibrate at the IF first",
        )

    values = {
        "h": hot.density_w_per_hz,
        "c": cold.density_w_per_hz,
        "hc": calibration.hot.density_w_per_hz if calibration else 1.0,
        "cc": calibration.cold.density_w_per_hz if calibration else 1.0,
        "enr_rf": enr_rf,
        "enr_img": enr_img,
        "enr_if": calibration.enr_db if calibration else 0.0,
        "rej_db": 0.0 if rejection is None else rejection,
    }
    u_stat = {"h": hot.u_density_w_per_hz, "c": cold.u_density_w_per_hz}
    if calibration is not None:
        u_stat.update(hc=calibration.hot.u_density_w_per_hz, cc=calibration.cold.u_density_w_per_hz)
    u_sys = {"enr_rf": u_rf or 0.0}
    if r > 0:
        u_sys.update(enr_img=u_img or 0.0, rej_db=u_rej)
    if calibration is not None:
        u_sys["enr_if"] = calibration.u_enr_db or 0.0
    cal = None
    if calibration is not None:
        cal = (values["hc"], values["cc"], values["enr_if"], calibration.cold_temperature_k)
    if require_significant_y:
        check_y_significant(
            hot,
            cold,
            rf,
            "converter Y-factor",
            "the converter's RF port",
            "the LO is on and at its level, the mixer is powered, ",
        )
    if require_significant_y and calibration is not None:
        check_y_significant(
            calibration.hot, calibration.cold, if_hz, "converter IF calibration", "the IF input"
        )
    parts: dict[str, np.ndarray] = {}
    try:
        te_value, g_value, _, te_unc_value = _y_core(
            values["h"],
            values["c"],
            enr_rf,
            enr_img,
            tc,
            r,
            t0,
            enr_reference,
            lin_s,
            lin_i,
            tp_in,
            lout,
            tp_out,
            cal,
            parts=parts,
        )
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=rf, method="y_factor") from None
    closest = values["h"] / values["c"]
    if calibration is not None:
        closest = min(closest, values["hc"] / values["cc"])
    if closest - 1.0 <= Y_MINUS_ONE_MIN:
        raise _y_too_close_to_one(rf, "converter Y-factor", closest)
    d_r = _rejection_sensitivities(rejection, r)
    d_te, d_gain = _y_sensitivities(
        values,
        parts,
        tc,
        calibration.cold_temperature_k if calibration else None,
        r,
        d_r,
        t0,
        enr_reference,
        lin_s,
        lin_i,
        tp_in,
        lout,
        tp_out,
    )
    props = {"te_ssb": linear_propagation(float(te_value), d_te, u_stat | u_sys)}
    if d_gain is not None:
        assert g_value is not None and te_unc_value is not None  # a calibration gives both
        props["gain_db"] = linear_propagation(_db(g_value), d_gain, u_stat | u_sys)
    te_ssb = float(props["te_ssb"].value)
    check_te_plausible(
        te_ssb,
        float(props["te_ssb"].u()),
        rf,
        "converter Y-factor",
        "Y is larger than the noise source's Th/Tc allows; check that the LO is on and at its "
        "level, the ENR at the RF and the image (right source, enr_reference), the image "
        "rejection (dB below the signal, positive), cold_temperature_k and that the "
        "calibration was made at the IF on this path",
    )
    if ssb_factor_from_te_k(te_ssb, r, t0) <= 0:
        raise MeasurementError(
            f"converter Y-factor at RF {format_frequency(rf)}: noise factor <= 0 (Te_SSB = "
            f"{te_ssb:.1f} K, "
            f"Y = {_db(hot.density_w_per_hz / cold.density_w_per_hz):.3f} dB); "
            "check that the noise source drives the RF port and the LO is on, then the ENR at "
            "RF and image, the image rejection and the cold temperature",
            freq_hz=rf,
        )
    nf_db, te_k, _ = _nf_and_slope(te_ssb, r, t0, nf_type)
    nf_prop = linear_propagation(
        nf_db, _nf_sensitivities(te_ssb, d_te, r, d_r, t0, nf_type), u_stat | u_sys
    )
    u_nf = float(nf_prop.u(u_stat))
    names = {
        "h": "hot",
        "c": "cold",
        "hc": "hot_cal",
        "cc": "cold_cal",
        "enr_rf": "enr",
        "enr_img": "enr_image",
        "enr_if": "enr_cal",
        "rej_db": "image_rejection",
    }
    contributions = {names[k]: float(v) for k, v in nf_prop.contributions.items()}
    y = hot.density_w_per_hz / cold.density_w_per_hz
    y_db = _db(y)
    flags = density_flags(densities.values(), scatter_limit)
    if y_db < y_min_db:
        flags.append(PointFlag.Y_TOO_SMALL)
    if enr_extrapolated or (calibration is not None and calibration.enr_extrapolated):
        flags.append(PointFlag.ENR_EXTRAPOLATED)
    gain_db = u_gain_db = margin = correction = nf_unc = None
    gain_contributions: dict[str, float] = {}
    if calibration is not None:
        gain_db = float(props["gain_db"].value)
        u_gain_db = float(props["gain_db"].u(u_stat))
        # the conversion gain rests on ENR(RF) (and ENR(image)) against ENR(IF): table points
        # at different frequencies, so their errors do not cancel as an amplifier's do
        gain_contributions = {names[k]: float(v) for k, v in props["gain_db"].contributions.items()}
        g_path = float(ratio_from_db(gain_db)) / lout
        t_in_cold = parts["cold_in"]  # both bands' cold source through the input loss
        te1 = te_ssb + loss_te_k(lout, tp_out) / (g_path * lout)
        margin = margin_db((t_in_cold + te1) * g_path, calibration.te_k)
        nf_unc = _nf_and_slope(float(te_unc_value), r, t0, nf_type)[0]
        correction = nf_unc - nf_db
    u_te_k = u_nf * t0 * float(ssb_factor_from_te_k(te_ssb, r, t0)) / DB_PER_NEPER_POWER
    if nf_type == "dsb":
        u_te_k /= 1.0 + r
    return build_point_result(
        freq_hz=rf,
        method=Method.Y_FACTOR,
        nf_db=nf_db,
        te_k=te_k,
        u_nf_db=u_nf,
        u_te_k=u_te_k,
        densities=densities,
        timed=[hot, cold],
        flags=flags,
        contributions=contributions,
        contributions_total_key="u_nf_db_with_enr",
        t0_k=t0,
        floor_warning_db=floor_warning_db,
        low_gain_db=low_gain_db,
        gain_db=gain_db,
        floor_margin_db=margin,
        negative_te_k=te_ssb,
        y_db=y_db,
        u_gain_db=u_gain_db,
        floor_correction_db=correction,
        enr_db=enr_rf,
        source_temperature_k=tc,
        conversion=_conversion_info(
            rf,
            lo,
            if_hz,
            image,
            sideband,
            nf_type,
            te_ssb,
            r,
            t0,
            rejection,
            enr_img if r > 0 else None,
            calibration.enr_db if calibration else None,
            lo_level_dbm,
        ),
        notes={
            "u_gain_db_contributions": gain_contributions or None,
            "u_gain_db_with_enr": math.sqrt(sum(c**2 for c in gain_contributions.values()))
            if gain_contributions
            else None,
            "u_enr_db": u_rf,
            "u_enr_image_db": u_img if r > 0 else None,
            "u_image_rejection_db": u_rej if r > 0 else None,
            "enr_correlated": False,
            "enr_reference": enr_reference,
            "cal_enr_db": calibration.enr_db if calibration else None,
            "u_cal_enr_db": calibration.u_enr_db if calibration else None,
            "cal_cold_temperature_k": calibration.cold_temperature_k if calibration else None,
            "system_te_k": calibration.te_k if calibration else None,
            "system_nf_db": calibration.nf_db if calibration else None,
            "cal_y_db": calibration.y_db if calibration else None,
            "nf_uncorrected_db": nf_unc,
            "input_loss_db": input_loss_db,
            "input_loss_image_db": input_loss_image_db
            if input_loss_image_db is not None
            else input_loss_db,
            "input_loss_temperature_k": tp_in,
            "output_loss_db": output_loss_db,
            "output_loss_temperature_k": tp_out,
        },
    )


def converter_gain_method_point(
    dut: NoiseDensity,
    conversion_gain_db: float,
    *,
    rf_hz: float,
    lo_hz: float,
    image_rejection_db: float | None,
    nf_type: NfType = "ssb",
    floor: NoiseDensity | None = None,
    u_gain_db: float = 0.0,
    u_image_rejection_db: float = 0.0,
    source_temperature_k: float = T0_K,
    floor_temperature_k: float | None = None,
    t0_k: float = T0_K,
    input_loss_db: float = 0.0,
    input_loss_image_db: float | None = None,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    gain_includes_input_loss: bool = False,
    gain_includes_output_loss: bool = False,
    lo_level_dbm: float | None = None,
    floor_warning_db: float = DEFAULT_FLOOR_WARNING_DB,
    low_gain_db: float = DEFAULT_LOW_GAIN_DB,
    scatter_limit: float = DEFAULT_SCATTER_LIMIT,
) -> PointResult:
    """NF (SSB and DSB) and Te of a converter at one point by the gain method.

    ``dut``: IF density (read at ``|rf_hz - lo_hz|``) with the RF port terminated at
    ``source_temperature_k``; ``conversion_gain_db``: signal-band conversion gain RF -> IF, by
    default the converter's own (``gain_includes_input_loss``/``_output_loss`` say that it was
    measured through the cables); ``floor``: the analyzer at the IF with a load at
    ``floor_temperature_k`` on its input. ``u_gain_db`` is reported as a contribution.
    """
    dut = check_density("dut", dut)
    densities = {"dut": dut}
    if floor is not None:
        densities["floor"] = check_density("floor", floor)
    if_hz = check_same_frequency(dut, {k: v for k, v in densities.items() if k != "dut"})
    rf, lo, image, sideband = _plan_point(rf_hz, lo_hz, if_hz)
    nf_type = _check_nf_type(nf_type)
    rejection, r = _rejection(image_rejection_db)
    gain_db = check_number("conversion_gain_db", conversion_gain_db)
    u_gain = check_non_negative("u_gain_db", u_gain_db, "give a standard uncertainty in dB")
    u_rej = check_non_negative("u_image_rejection_db", u_image_rejection_db, "dB")
    ts = check_temperature("source_temperature_k", source_temperature_k)
    t_term = (
        ts
        if floor_temperature_k is None
        else check_temperature("floor_temperature_k", floor_temperature_k)
    )
    t0 = check_temperature("t0_k", t0_k)
    lin_s, lin_i, lout, tp_in, tp_out = _losses(
        input_loss_db,
        input_loss_image_db,
        output_loss_db,
        input_loss_temperature_k,
        output_loss_temperature_k,
        ts,
    )
    dut_gain_db = (
        gain_db
        + (_db(lin_s) if gain_includes_input_loss else 0.0)
        + (_db(lout) if gain_includes_output_loss else 0.0)
    )

    def te_ssb_of(with_floor: bool) -> float:
        te, _ = _gain_core(
            dut.density_w_per_hz,
            n_f if with_floor else None,
            dut_gain_db,
            ts,
            r,
            lin_s,
            lin_i,
            tp_in,
            lout,
            tp_out,
            t_term,
        )
        return float(te)

    n_f = floor.density_w_per_hz if floor is not None else 1.0
    values = {
        "n_meas": dut.density_w_per_hz,
        "n_floor": n_f,
        "g_db": dut_gain_db,
        "rej_db": 0.0 if rejection is None else rejection,
    }
    u_stat = {"n_meas": dut.u_density_w_per_hz}
    if floor is not None:
        u_stat["n_floor"] = floor.u_density_w_per_hz
    u_sys = {"g_db": u_gain}
    if r > 0:
        u_sys["rej_db"] = u_rej
    try:
        te_ssb = te_ssb_of(floor is not None)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=rf, method="gain") from None
    d_r = _rejection_sensitivities(rejection, r)
    d_te = _gain_sensitivities(
        values["n_meas"],
        n_f if floor is not None else None,
        dut_gain_db,
        ts,
        r,
        d_r,
        lin_s,
        lin_i,
        tp_in,
        lout,
        tp_out,
        t_term,
    )
    check_te_plausible(
        te_ssb,
        linear_propagation(te_ssb, d_te, u_stat | u_sys).u(),
        rf,
        "converter gain method",
        "the converter delivers less than its conversion gain says (LO off or too weak, a "
        "dead mixer, the DUT unpowered or not connected) or conversion_gain_db is larger than "
        "the real gain; check the LO level and cable, the DUT supply and path, the gain source",
    )
    if ssb_factor_from_te_k(te_ssb, r, t0) <= 0:
        raise MeasurementError(
            f"converter gain method at RF {format_frequency(rf)}: noise factor <= 0 (Te_SSB = "
            f"{te_ssb:.1f} K); check the conversion gain, the image rejection and the "
            "temperatures",
            freq_hz=rf,
        )
    nf_db, te_k, _ = _nf_and_slope(te_ssb, r, t0, nf_type)
    nf_prop = linear_propagation(
        nf_db, _nf_sensitivities(te_ssb, d_te, r, d_r, t0, nf_type), u_stat | u_sys
    )
    u_nf = float(nf_prop.u(u_stat))
    names = {"n_meas": "dut", "n_floor": "floor", "g_db": "gain", "rej_db": "image_rejection"}
    contributions = {names[k]: float(v) for k, v in nf_prop.contributions.items()}
    flags = density_flags(densities.values(), scatter_limit)
    margin = correction = nf_unc = None
    if floor is not None:
        analyzer_noise = n_f - float(thermal_density_w_per_hz(t_term))
        if analyzer_noise <= 0:
            raise MeasurementError(
                f"converter gain method at RF {format_frequency(rf)}: the IF floor reading holds "
                "no "
                "analyzer noise above the termination's kT; check floor_temperature_k",
                freq_hz=rf,
            )
        margin = margin_db(dut.density_w_per_hz - analyzer_noise, analyzer_noise)
        te_unc = te_ssb_of(with_floor=False)
        nf_unc = _nf_and_slope(te_unc, r, t0, nf_type)[0]
        correction = nf_unc - nf_db
    u_te_k = u_nf * t0 * float(ssb_factor_from_te_k(te_ssb, r, t0)) / DB_PER_NEPER_POWER
    if nf_type == "dsb":
        u_te_k /= 1.0 + r
    return build_point_result(
        freq_hz=rf,
        method=Method.GAIN,
        nf_db=nf_db,
        te_k=te_k,
        u_nf_db=u_nf,
        u_te_k=u_te_k,
        densities=densities,
        timed=[dut],
        flags=flags,
        contributions=contributions,
        contributions_total_key="u_nf_db_with_gain",
        t0_k=t0,
        floor_warning_db=floor_warning_db,
        low_gain_db=low_gain_db,
        gain_db=dut_gain_db,
        floor_margin_db=margin,
        negative_te_k=te_ssb,
        u_gain_db=u_gain,
        floor_correction_db=correction,
        source_temperature_k=ts,
        conversion=_conversion_info(
            rf,
            lo,
            if_hz,
            image,
            sideband,
            nf_type,
            te_ssb,
            r,
            t0,
            rejection,
            None,
            None,
            lo_level_dbm,
        ),
        notes={
            "u_image_rejection_db": u_rej if r > 0 else None,
            "path_gain_db": gain_db,
            "gain_includes_input_loss": bool(gain_includes_input_loss),
            "gain_includes_output_loss": bool(gain_includes_output_loss),
            "input_loss_db": input_loss_db,
            "input_loss_image_db": input_loss_image_db
            if input_loss_image_db is not None
            else input_loss_db,
            "input_loss_temperature_k": tp_in,
            "output_loss_db": output_loss_db,
            "output_loss_temperature_k": tp_out,
            "floor_temperature_k": t_term if floor is not None else None,
            "nf_uncorrected_db": nf_unc,
        },
    )
