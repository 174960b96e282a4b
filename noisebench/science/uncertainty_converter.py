"""Uncertainty budgets of frequency-converting DUTs (both methods), [docs/references.md §9, §17].

The models evaluate the converter methods' own cores (:mod:`noisebench.science.methods.converter`,
eqs. 4-6 of :mod:`noisebench.science.conversion`), in deviation form like the amplifier models,
so the budget's NF equals the point's. Influence quantities beyond the amplifier's:

- ENR at the RF, at the image and at the IF: three points of the noise source's table, three
  independent quantities (the IF one enters through the calibration);
- the image rejection (dB) the SSB/DSB split and the image band's share rest on;
- the input loss, read at the RF and at the image: one quantity (the same cable), applied to
  both; the output loss at the IF;
- mismatch source / converter input acts on the delivered excess noise of both bands,
  source / analyzer on the IF calibration, converter output / analyzer on the conversion gain
  (first order, common practice; reflections at the RF are used for all three).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Literal

import numpy as np

from noisebench.errors import InputError, MeasurementError
from noisebench.science.methods.converter import _gain_core, _y_core
from noisebench.science.mismatch import Reflections
from noisebench.science.physics import (
    db_from_ratio,
    dsb_from_ssb,
    ratio_from_db,
    ssb_factor_from_te_k,
)
from noisebench.science.point import PointResult
from noisebench.science.propagation import Distribution, InputQuantity
from noisebench.science.uncertainty_budget import Budget, _budget
from noisebench.science.uncertainty_inputs import UncertaintyInputs
from noisebench.science.uncertainty_quantities import (
    _STEP_DB,
    _STEP_K,
    _extra_quantities,
    _finite_nonneg,
    _jitter,
    _mismatch_quantity,
    _percent,
    _type_b_quantity,
)

__all__ = ["converter_budget_for_point"]


def _nf(te_ssb: Any, r: Any, t0: float, nf_type: str, x: Mapping[str, Any], extras) -> Any:
    """NF (SSB or DSB) in dB from Te_SSB (NaN where F <= 0), plus the extra terms."""
    f_ssb = ssb_factor_from_te_k(te_ssb, r, t0)
    f = f_ssb if nf_type == "ssb" else dsb_from_ssb(f_ssb, r)
    nf = db_from_ratio(np.where(f > 0, f, np.nan))
    for q, sensitivity in extras:
        nf = nf + sensitivity * x.get(q.key, 0.0)
    return nf


def _table_u(inputs: UncertaintyInputs, table_u: float | None, what: str, omitted: list[str]):
    """(u, distribution) of an ENR: the plan's ``enr_db`` term, else the table's u, else None."""
    spec = inputs.spec("enr_db")
    if spec is not None:
        return spec
    if table_u is None:
        omitted.append(f"ENR at the {what} (no enr_db given and no table u_enr_db)")
        return None
    _finite_nonneg("u_enr_db", table_u)
    return float(table_u), Distribution.NORMAL


def _quantity(key: str, name: str, spec, unit: str = "dB", step: float = _STEP_DB):
    if spec is None:
        return None
    u, dist = spec
    return InputQuantity(key=key, name=name, u=u, unit=unit, step=step, distribution=dist)


def converter_budget_for_point(
    point: PointResult,
    inputs: UncertaintyInputs,
    dens: Mapping[str, float],
    u_dens: Mapping[str, float],
    t0_k: float,
    refl: Reflections,
    method: Literal["gum", "monte_carlo"] | None = None,
    *,
    u_enr_db: float | None = None,
) -> Budget:
    """The budget of a converter point (``point.conversion`` set) from what the method stored.

    ``dens``/``u_dens``: the point's densities and their u (W/Hz); the ENR table's u at RF,
    image and IF come from the notes (``u_enr_db`` overrides the RF one); the image rejection's
    u from ``notes["u_image_rejection_db"]``.
    """
    conv = point.conversion
    if conv is None:
        raise InputError("point", "is not a converter point", fix="use budget_for_point")
    notes = point.notes or {}
    r = 0.0 if conv.image_rejection_db is None else float(ratio_from_db(-conv.image_rejection_db))
    rej = conv.image_rejection_db
    lin_s = float(ratio_from_db(float(notes.get("input_loss_db") or 0.0)))
    lin_i = float(ratio_from_db(float(notes.get("input_loss_image_db") or 0.0)))
    lout_db = float(notes.get("output_loss_db") or 0.0)
    tp_in = float(notes.get("input_loss_temperature_k") or point.source_temperature_k or t0_k)
    tp_out = float(notes.get("output_loss_temperature_k") or point.source_temperature_k or t0_k)
    omitted: list[str] = []
    qs: list[InputQuantity | None] = []
    extras = _extra_quantities(inputs)
    u_rej = notes.get("u_image_rejection_db")
    if r > 0 and u_rej:
        qs.append(
            InputQuantity(
                key="d_rej_db", name="image rejection", u=float(u_rej), unit="dB", step=_STEP_DB
            )
        )
    if float(notes.get("input_loss_db") or 0.0) or float(notes.get("input_loss_image_db") or 0.0):
        qs.append(
            _type_b_quantity(
                inputs,
                "input_loss_db",
                "d_loss_in_db",
                "input loss (RF and image)",
                "dB",
                _STEP_DB,
                omitted,
            )
        )
    if lout_db:
        qs.append(
            _type_b_quantity(
                inputs,
                "output_loss_db",
                "d_loss_out_db",
                "output loss (IF)",
                "dB",
                _STEP_DB,
                omitted,
            )
        )
    qs.append(
        _type_b_quantity(
            inputs, "cold_temperature_k", "d_tc_k", "cold temperature", "K", _STEP_K, omitted
        )
    )

    def rr(x: Mapping[str, Any]) -> Any:
        return 0.0 if rej is None else ratio_from_db(-(rej + x.get("d_rej_db", 0.0)))

    def losses(x: Mapping[str, Any]) -> tuple[Any, Any, Any]:
        d_in = ratio_from_db(x.get("d_loss_in_db", 0.0))
        return lin_s * d_in, lin_i * d_in, ratio_from_db(lout_db + x.get("d_loss_out_db", 0.0))

    if "hot" in dens:
        model, name = _y_model(
            point, dens, u_dens, notes, qs, inputs, refl, omitted, u_enr_db, t0_k
        )

        def full(**x: Any) -> Any:
            lin_s_x, lin_i_x, lout_x = losses(x)
            te = model(x, rr(x), lin_s_x, lin_i_x, tp_in, lout_x, tp_out)
            return _nf(te, rr(x), t0_k, conv.nf_type, x, extras)

    else:
        model, name = _gain_model(point, dens, u_dens, notes, qs, inputs, refl, omitted)

        def full(**x: Any) -> Any:
            lin_s_x, lin_i_x, lout_x = losses(x)
            te = model(x, rr(x), lin_s_x, lin_i_x, tp_in, lout_x, tp_out)
            return _nf(te, rr(x), t0_k, conv.nf_type, x, extras)

    quantities = [q for q in qs if q is not None] + [q for q, _ in extras]
    try:
        return _budget(point.freq_hz, name, full, quantities, inputs, method, omitted)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=point.freq_hz, method=name) from None


def _y_model(point, dens, u_dens, notes, qs, inputs, refl, omitted, u_enr_db, t0):
    """The converter Y-factor model (eqs. 4, 5) and its density, ENR and mismatch quantities."""
    conv = point.conversion
    if point.enr_db is None or "cold" not in dens:
        raise InputError("point", "converter Y-factor point without ENR or cold density")
    corrected = "hot_cal" in dens and "cold_cal" in dens
    tc = float(point.source_temperature_k)
    tc_cal = float(notes.get("cal_cold_temperature_k") or tc)
    enr_rf = float(point.enr_db)
    enr_img = float(conv.enr_image_db) if conv.enr_image_db is not None else enr_rf
    enr_if = float(conv.cal_if_enr_db) if conv.cal_if_enr_db is not None else None
    ref = str(notes.get("enr_reference") or "t0")
    has_image = conv.image_rejection_db is not None
    u_rf = u_enr_db if u_enr_db is not None else notes.get("u_enr_db")
    qs.append(_quantity("d_enr_rf_db", "ENR at the RF", _table_u(inputs, u_rf, "RF", omitted)))
    if has_image:
        spec = _table_u(inputs, notes.get("u_enr_image_db"), "image", omitted)
        qs.append(_quantity("d_enr_img_db", "ENR at the image", spec))
    if corrected:
        spec = _table_u(inputs, notes.get("u_cal_enr_db"), "IF", omitted)
        qs.append(_quantity("d_enr_if_db", "ENR at the IF (calibration)", spec))
    for key in ("hot", "cold") + (("hot_cal", "cold_cal") if corrected else ()):
        qs.append(
            _jitter(f"j_{key}", f"N_{key} jitter", _percent(key, dens[key], u_dens.get(key, 0.0)))
        )
    qs.append(
        _type_b_quantity(
            inputs,
            "linearity_db",
            "d_lin_meas_db",
            "linearity Y (measurement)",
            "dB",
            _STEP_DB,
            omitted,
        )
    )
    qs.append(
        _mismatch_quantity(
            "d_mm_in_db", "mismatch source / converter input", refl.source, refl.dut_input, omitted
        )
    )
    if corrected:
        qs.append(
            _type_b_quantity(
                inputs,
                "linearity_db",
                "d_lin_cal_db",
                "linearity Y (calibration)",
                "dB",
                _STEP_DB,
                [],
            )
        )
        qs.append(
            _mismatch_quantity(
                "d_mm_cal_db",
                "mismatch source / analyzer (IF calibration)",
                refl.source,
                refl.analyzer_input,
                omitted,
            )
        )
        qs.append(
            _mismatch_quantity(
                "d_mm_out_db",
                "mismatch converter output / analyzer",
                refl.dut_output,
                refl.analyzer_input,
                omitted,
            )
        )

    def model(x, r, lin_s, lin_i, tp_in, lout, tp_out):
        d_tc = x.get("d_tc_k", 0.0)
        mm_in = x.get("d_mm_in_db", 0.0)
        hot = dens["hot"] * (1.0 + x.get("j_hot", 0.0) / 100.0)
        cold = dens["cold"] * (1.0 + x.get("j_cold", 0.0) / 100.0)
        hot = hot * ratio_from_db(x.get("d_lin_meas_db", 0.0))  # an error on the ratio Y
        cal = None
        if corrected:
            hc = dens["hot_cal"] * (1.0 + x.get("j_hot_cal", 0.0) / 100.0)
            cc = dens["cold_cal"] * (1.0 + x.get("j_cold_cal", 0.0) / 100.0)
            hc = hc * ratio_from_db(x.get("d_lin_cal_db", 0.0))
            enr_c = enr_if + x.get("d_enr_if_db", 0.0) + x.get("d_mm_cal_db", 0.0)
            cal = (hc, cc, enr_c, tc_cal + d_tc)
        tcx = tc + d_tc
        te, _, _, _ = _y_core(
            hot,
            cold,
            enr_rf + x.get("d_enr_rf_db", 0.0) + mm_in,
            enr_img + x.get("d_enr_img_db", 0.0) + mm_in,
            tcx,
            r,
            t0,
            ref,
            lin_s,
            lin_i,
            tp_in,
            lout,
            tp_out,
            cal,
            # output mismatch scales the conversion gain (first order, as the amplifier model)
            gain_scale=ratio_from_db(x.get("d_mm_out_db", 0.0)),
        )
        return te

    return model, "converter_y_factor" if corrected else "converter_y_factor_uncorrected"


def _gain_model(point, dens, u_dens, notes, qs, inputs, refl, omitted):
    """The converter gain-method model (eq. 6) and its quantities."""
    if "dut" not in dens:
        raise InputError("point", "converter gain-method point without a dut density")
    with_floor = "floor" in dens
    ts = float(point.source_temperature_k)
    t_term = float(notes.get("floor_temperature_k") or ts)
    g_db = float(point.gain_db) if point.gain_db is not None else 0.0
    holds_in = bool(notes.get("gain_includes_input_loss", False))
    holds_out = bool(notes.get("gain_includes_output_loss", False))
    spec = inputs.spec("dut_gain_db")
    if spec is None and point.u_gain_db is not None:
        spec = (float(point.u_gain_db), Distribution.NORMAL)
    measured = point.conversion is not None and point.conversion.gain_source == "measured"
    name = "conversion gain (measured)" if measured else "conversion gain"
    qs.append(_quantity("d_gain_db", name, spec))
    for key in ("dut",) + (("floor",) if with_floor else ()):
        qs.append(
            _jitter(f"j_{key}", f"N_{key} jitter", _percent(key, dens[key], u_dens.get(key, 0.0)))
        )
    qs.append(
        _type_b_quantity(
            inputs,
            "absolute_amplitude_db",
            "d_abs_db",
            "absolute amplitude",
            "dB",
            _STEP_DB,
            omitted,
        )
    )
    if with_floor:
        qs.append(
            _type_b_quantity(
                inputs,
                "linearity_db",
                "d_lin_db",
                "linearity N_dut/N_floor",
                "dB",
                _STEP_DB,
                omitted,
            )
        )
    qs.append(
        _mismatch_quantity(
            "d_mm_out_db",
            "mismatch converter output / analyzer",
            refl.dut_output,
            refl.analyzer_input,
            omitted,
        )
    )

    def model(x, r, lin_s, lin_i, tp_in, lout, tp_out):
        scale = ratio_from_db(x.get("d_abs_db", 0.0))
        n = dens["dut"] * (1.0 + x.get("j_dut", 0.0) / 100.0) * scale
        floor = None
        if with_floor:
            floor = dens["floor"] * (1.0 + x.get("j_floor", 0.0) / 100.0) * scale
            n = floor + (n - floor) * ratio_from_db(x.get("d_lin_db", 0.0))
        # a gain measured through a loss had that loss added back (the converter's own gain =
        # the measured one + the loss), so the loss's error moves it dB for dB
        g = g_db + x.get("d_gain_db", 0.0) + x.get("d_mm_out_db", 0.0)
        if holds_in:
            g = g + x.get("d_loss_in_db", 0.0)
        if holds_out:
            g = g + x.get("d_loss_out_db", 0.0)
        tsx = ts + x.get("d_tc_k", 0.0)
        te, _ = _gain_core(
            n, floor, g, tsx, r, lin_s, lin_i, tp_in, lout, tp_out, t_term + x.get("d_tc_k", 0.0)
        )
        return te

    return model, "converter_gain"
