"""The Y-factor measurement model of the uncertainty budget (with second-stage correction)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from noisebench.errors import InputError, MeasurementError
from noisebench.science.mismatch import Reflections
from noisebench.science.physics import (
    T0_K,
    gain_from_hot_cold,
    second_stage_corrected_te_k,
    source_hot_temperature_k,
    te_k_from_y,
)
from noisebench.science.propagation import (
    Distribution,
    InputQuantity,
    Model,
)
from noisebench.science.uncertainty_budget import Budget, _budget
from noisebench.science.uncertainty_inputs import UncertaintyInputs
from noisebench.science.uncertainty_quantities import (
    _STEP_DB,
    _STEP_K,
    _deembed_te,
    _extra_quantities,
    _finite,
    _finite_nonneg,
    _jitter,
    _lin,
    _loss_quantities,
    _Losses,
    _losses,
    _mismatch_quantity,
    _nf_db,
    _percent,
    _positive_density,
    _temperature_value,
    _type_b_quantity,
)

# =========================================================================== Y-factor


EnrReference = Literal["t0", "absolute"]


def _hot_temperature(enr_db: Any, tc_k: Any, t0_k: float, enr_reference: str) -> Any:
    """Th from ENR in dB (docs/references.md §5), as the methods compute it."""
    return source_hot_temperature_k(_lin(enr_db), tc_k, t0_k, enr_reference)


def _te_from_y(y: Any, th_k: Any, tc_k: Any) -> Any:
    """Te = (Th - Y*Tc)/(Y - 1) (docs/references.md §5); NaN where Y <= 1."""
    yy = np.asarray(y)
    return te_k_from_y(np.where(yy > 1.0, yy, np.nan), th_k, tc_k)


@dataclass(frozen=True)
class _YData:
    """Nominal values of one Y-factor point (densities W/Hz, ENR dB, temperatures K)."""

    hot: float
    cold: float
    enr_db: float
    tc_k: float
    hot_cal: float | None = None
    cold_cal: float | None = None
    cal_enr_db: float | None = None
    cal_tc_k: float | None = None

    @property
    def corrected(self) -> bool:
        return self.hot_cal is not None


def _y_model(
    d: _YData,
    reference: str,
    losses: _Losses,
    t0_k: float,
    extras: list[tuple[InputQuantity, float]],
) -> Model:
    """The Y-factor measurement model (deviation form; see the module docstring)."""

    def model(**x: Any) -> np.ndarray:
        d_tc = x.get("d_tc_k", 0.0)
        tc = d.tc_k + d_tc
        n_hot = d.hot * (1.0 + x.get("j_hot", 0.0) / 100.0)
        n_cold = d.cold * (1.0 + x.get("j_cold", 0.0) / 100.0)
        enr_m = (
            d.enr_db
            + x.get("d_enr_db", 0.0)
            + x.get("d_enr_meas_db", 0.0)
            + x.get("d_mm_in_db", 0.0)
        )
        th = _hot_temperature(enr_m, tc, t0_k, reference)
        y12 = n_hot / n_cold * _lin(x.get("d_lin_meas_db", 0.0))
        te12 = _te_from_y(y12, th, tc)
        if not d.corrected:
            return _nf_db(_deembed_te(te12, 1.0, losses, x), t0_k, x, extras)
        assert d.hot_cal is not None and d.cold_cal is not None
        tc_cal = (d.cal_tc_k if d.cal_tc_k is not None else d.tc_k) + d_tc
        enr_c = (
            (d.cal_enr_db if d.cal_enr_db is not None else d.enr_db)
            + x.get("d_enr_db", 0.0)
            + x.get("d_enr_cal_db", 0.0)
            + x.get("d_mm_cal_db", 0.0)
        )
        th_cal = _hot_temperature(enr_c, tc_cal, t0_k, reference)
        n_hot_cal = d.hot_cal * (1.0 + x.get("j_hot_cal", 0.0) / 100.0)
        n_cold_cal = d.cold_cal * (1.0 + x.get("j_cold_cal", 0.0) / 100.0)
        y2 = n_hot_cal / n_cold_cal * _lin(x.get("d_lin_cal_db", 0.0))
        te2 = _te_from_y(y2, th_cal, tc_cal)
        g1 = gain_from_hot_cold(
            n_hot, n_cold, th, tc, n_hot_cal, n_cold_cal, th_cal, tc_cal
        ) * _lin(x.get("d_mm_out_db", 0.0))
        g1 = np.where(g1 > 0, g1, np.nan)
        te1 = second_stage_corrected_te_k(te12, te2, g1)
        return _nf_db(_deembed_te(te1, g1, losses, x), t0_k, x, extras)

    return model


def y_factor_budget(
    *,
    freq_hz: float,
    hot_w_per_hz: float,
    cold_w_per_hz: float,
    enr_db: float,
    cold_temperature_k: float,
    inputs: UncertaintyInputs,
    u_hot_w_per_hz: float = 0.0,
    u_cold_w_per_hz: float = 0.0,
    hot_cal_w_per_hz: float | None = None,
    cold_cal_w_per_hz: float | None = None,
    u_hot_cal_w_per_hz: float = 0.0,
    u_cold_cal_w_per_hz: float = 0.0,
    cal_enr_db: float | None = None,
    cal_cold_temperature_k: float | None = None,
    u_enr_db: float | None = None,
    enr_correlated: bool | None = None,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    t0_k: float = T0_K,
    reflections: Reflections | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
) -> Budget:
    """Budget of a Y-factor NF (densities W/Hz, ENR dB, temperatures K) [docs/references.md §5, §9].

    Same physics as :func:`noisebench.science.methods.y_factor_point`. With ``hot_cal``/``cold_cal``
    the model includes the second-stage correction ``Te1 = Te12 - Te2/G1`` (the calibration's
    ENR and cold temperature default to the measurement's); without them it is the system NF.
    ``u_enr_db`` is the ENR table's standard uncertainty, used when ``inputs.enr_db`` is None.
    Loss temperatures default to the cold temperature. ``reflections`` default to
    ``inputs.reflections_at(freq_hz)`` (relative Touchstone paths resolve against the cwd).
    """
    freq_hz = _positive_freq(freq_hz)
    t0_k = _temperature_value("t0_k", t0_k)
    if enr_reference not in ("t0", "absolute"):
        raise InputError("enr_reference", f"must be 't0' or 'absolute' (got {enr_reference!r})")
    data = _y_data(
        freq_hz,
        hot_w_per_hz,
        cold_w_per_hz,
        enr_db,
        cold_temperature_k,
        hot_cal_w_per_hz,
        cold_cal_w_per_hz,
        cal_enr_db,
        cal_cold_temperature_k,
    )
    losses = _losses(
        input_loss_db,
        input_loss_temperature_k,
        output_loss_db,
        output_loss_temperature_k,
        data.tc_k,
    )
    if losses.output_db != 0.0 and not data.corrected:
        raise InputError(
            "output_loss_db",
            "needs the DUT gain, which only a calibration gives",
            fix="pass the calibration densities, or leave the loss in the path",
        )
    refl = reflections if reflections is not None else inputs.reflections_at(freq_hz)
    omitted: list[str] = []
    correlated = inputs.enr_correlated if enr_correlated is None else bool(enr_correlated)
    qs: list[InputQuantity | None] = _enr_quantities(
        inputs, u_enr_db, data.corrected and not correlated, omitted
    )
    qs.append(
        _type_b_quantity(
            inputs, "cold_temperature_k", "d_tc_k", "cold temperature", "K", _STEP_K, omitted
        )
    )
    qs += [
        _jitter("j_hot", "N_hot jitter", _percent("hot", hot_w_per_hz, u_hot_w_per_hz)),
        _jitter("j_cold", "N_cold jitter", _percent("cold", cold_w_per_hz, u_cold_w_per_hz)),
    ]
    if data.corrected:
        qs += [
            _jitter(
                "j_hot_cal",
                "N_hot,cal jitter",
                _percent("hot_cal", hot_cal_w_per_hz, u_hot_cal_w_per_hz),
            ),
            _jitter(
                "j_cold_cal",
                "N_cold,cal jitter",
                _percent("cold_cal", cold_cal_w_per_hz, u_cold_cal_w_per_hz),
            ),
        ]
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
    if data.corrected:
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
            "d_mm_in_db", "mismatch source / DUT input", refl.source, refl.dut_input, omitted
        )
    )
    if data.corrected:
        qs.append(
            _mismatch_quantity(
                "d_mm_cal_db",
                "mismatch source / analyzer (calibration)",
                refl.source,
                refl.analyzer_input,
                omitted,
            )
        )
        qs.append(
            _mismatch_quantity(
                "d_mm_out_db",
                "mismatch DUT output / analyzer",
                refl.dut_output,
                refl.analyzer_input,
                omitted,
            )
        )
    qs += _loss_quantities(inputs, losses, omitted)
    extras = _extra_quantities(inputs)
    quantities = [q for q in qs if q is not None] + [q for q, _ in extras]
    model = _y_model(data, enr_reference, losses, t0_k, extras)
    name: Literal["y_factor", "y_factor_uncorrected"] = (
        "y_factor" if data.corrected else "y_factor_uncorrected"
    )
    try:
        return _budget(freq_hz, name, model, quantities, inputs, method, omitted)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="y_factor") from None


def _y_data(
    freq_hz: float,
    hot: float,
    cold: float,
    enr_db: float,
    tc_k: float,
    hot_cal: float | None,
    cold_cal: float | None,
    cal_enr_db: float | None,
    cal_tc_k: float | None,
) -> _YData:
    hot = _positive_density("hot_w_per_hz", hot)
    cold = _positive_density("cold_w_per_hz", cold)
    _hot_above_cold(freq_hz, hot, cold, "")
    if (hot_cal is None) != (cold_cal is None):
        raise InputError(
            "hot_cal_w_per_hz" if hot_cal is None else "cold_cal_w_per_hz",
            "the calibration needs both hot and cold densities",
            fix="pass both, or neither for an uncorrected budget",
        )
    if hot_cal is not None and cold_cal is not None:
        hot_cal = _positive_density("hot_cal_w_per_hz", hot_cal)
        cold_cal = _positive_density("cold_cal_w_per_hz", cold_cal)
        _hot_above_cold(freq_hz, hot_cal, cold_cal, " (calibration)")
    return _YData(
        hot=hot,
        cold=cold,
        enr_db=_finite("enr_db", enr_db),
        tc_k=_temperature_value("cold_temperature_k", tc_k),
        hot_cal=hot_cal,
        cold_cal=cold_cal,
        cal_enr_db=None if cal_enr_db is None else _finite("cal_enr_db", cal_enr_db),
        cal_tc_k=None
        if cal_tc_k is None
        else _temperature_value("cal_cold_temperature_k", cal_tc_k),
    )


def _enr_quantities(
    inputs: UncertaintyInputs, u_enr_db: float | None, separate: bool, omitted: list[str]
) -> list[InputQuantity | None]:
    spec = inputs.spec("enr_db")
    if spec is None and u_enr_db is not None:
        _finite_nonneg("u_enr_db", u_enr_db)
        spec = (float(u_enr_db), Distribution.NORMAL)
    if spec is None:
        omitted.append("ENR (no enr_db given and no table u_enr_db)")
        return []
    u, dist = spec
    if not separate:
        return [
            InputQuantity(
                key="d_enr_db", name="ENR", u=u, unit="dB", step=_STEP_DB, distribution=dist
            )
        ]
    return [
        InputQuantity(
            key="d_enr_meas_db",
            name="ENR (measurement)",
            u=u,
            unit="dB",
            step=_STEP_DB,
            distribution=dist,
        ),
        InputQuantity(
            key="d_enr_cal_db",
            name="ENR (calibration)",
            u=u,
            unit="dB",
            step=_STEP_DB,
            distribution=dist,
        ),
    ]


def _hot_above_cold(freq_hz: float, hot: float, cold: float, what: str) -> None:
    if hot <= cold:
        raise MeasurementError(
            f"hot density <= cold density{what} at {freq_hz:.6g} Hz: "
            "no Y-factor; check that the noise source switches",
            freq_hz=freq_hz,
        )


def _positive_freq(freq_hz: float) -> float:
    if not (isinstance(freq_hz, (int, float)) and math.isfinite(freq_hz) and freq_hz > 0):
        raise InputError(
            "freq_hz", f"must be a finite frequency > 0 Hz (got {freq_hz!r})", value=freq_hz
        )
    return float(freq_hz)
