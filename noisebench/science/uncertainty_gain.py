"""The gain-method measurement model of the uncertainty budget."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from noisebench.errors import MeasurementError
from noisebench.science.mismatch import Reflections
from noisebench.science.physics import (
    BOLTZMANN_J_PER_K,
    T0_K,
    floor_corrected_density_w_per_hz,
    te_k_from_output_density,
)
from noisebench.science.propagation import (
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
from noisebench.science.uncertainty_yfactor import _positive_freq
from noisebench.units import format_frequency

# =========================================================================== gain method


@dataclass(frozen=True)
class _GainData:
    """Nominal values of one gain-method point (W/Hz, linear path gain, K)."""

    dut: float
    gain_lin: float
    ts_k: float
    floor: float | None = None
    floor_tk: float | None = None
    gain_includes_input_loss: bool = True  # False: the stated gain did not hold that loss
    gain_includes_output_loss: bool = True


def _gain_model(
    d: _GainData, losses: _Losses, t0_k: float, extras: list[tuple[InputQuantity, float]]
) -> Model:
    """The gain-method measurement model (deviation form; see the module docstring)."""

    def model(**x: Any) -> np.ndarray:
        scale = _lin(x.get("d_abs_db", 0.0))
        n_dut = (
            d.dut
            * (1.0 + x.get("j_dut", 0.0) / 100.0)
            * scale
            * _lin(x.get("d_lin_db", 0.0) + x.get("d_mm_out_db", 0.0))
        )
        # path gain; a loss the stated gain did not hold was subtracted from it, so an error
        # in that loss moves the path gain too (dB for dB)
        gain = d.gain_lin * _lin(
            x.get("d_gain_db", 0.0)
            + x.get("d_mm_in_db", 0.0)
            - (0.0 if d.gain_includes_input_loss else x.get("d_loss_in_db", 0.0))
            - (0.0 if d.gain_includes_output_loss else x.get("d_loss_out_db", 0.0))
        )
        d_t = x.get("d_ts_k", 0.0)
        ts = d.ts_k + d_t
        if d.floor is not None:
            t_term = (d.floor_tk if d.floor_tk is not None else d.ts_k) + d_t
            n_floor = d.floor * (1.0 + x.get("j_floor", 0.0) / 100.0) * scale
            n_src = floor_corrected_density_w_per_hz(n_dut, n_floor, t_term)
            te = te_k_from_output_density(np.where(n_src > 0, n_src, np.nan), gain, ts)
        else:
            te = te_k_from_output_density(n_dut, gain, ts)
        return _nf_db(_deembed_te(te, gain, losses, x), t0_k, x, extras)

    return model


def gain_method_budget(
    *,
    freq_hz: float,
    dut_w_per_hz: float,
    gain_db: float,
    inputs: UncertaintyInputs,
    u_dut_w_per_hz: float = 0.0,
    floor_w_per_hz: float | None = None,
    u_floor_w_per_hz: float = 0.0,
    floor_temperature_k: float | None = None,
    u_gain_db: float | None = None,
    source_temperature_k: float = T0_K,
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    t0_k: float = T0_K,
    reflections: Reflections | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
    gain_includes_input_loss: bool = True,
    gain_includes_output_loss: bool = True,
) -> Budget:
    """Budget of a gain-method NF (densities W/Hz, path gain dB, temperatures K)
    [docs/references.md §4].

    Same physics as :func:`noisebench.science.methods.gain_method_point`: ``gain_db`` is the
    measured
    path gain (termination to analyzer), losses inside it are de-embedded; with
    ``floor_w_per_hz`` the exact floor correction ``Te = (N_dut - N_floor + k*T_term)/(k*G) -
    Ts`` is used. ``u_gain_db`` (the gain's own standard uncertainty) applies when
    ``inputs.dut_gain_db`` is None. Loss and floor temperatures default to the source's.
    ``gain_includes_*_loss=False``: the gain the path gain was made from did not hold that
    loss (a DUT's own gain, or a THROUGH-referenced one), so the loss's error also moves the
    path gain (the point's notes say which).
    ``reflections`` default to ``inputs.reflections_at(freq_hz)``.
    """
    freq_hz = _positive_freq(freq_hz)
    t0_k = _temperature_value("t0_k", t0_k)
    ts_k = _temperature_value("source_temperature_k", source_temperature_k)
    data = _GainData(
        dut=_positive_density("dut_w_per_hz", dut_w_per_hz),
        gain_lin=float(_lin(_finite("gain_db", gain_db))),
        ts_k=ts_k,
        floor=None
        if floor_w_per_hz is None
        else _positive_density("floor_w_per_hz", floor_w_per_hz),
        floor_tk=None
        if floor_temperature_k is None
        else _temperature_value("floor_temperature_k", floor_temperature_k),
        gain_includes_input_loss=bool(gain_includes_input_loss),
        gain_includes_output_loss=bool(gain_includes_output_loss),
    )
    if (
        data.floor is not None
        and (data.dut - data.floor + BOLTZMANN_J_PER_K * (data.floor_tk or ts_k)) <= 0
    ):
        raise MeasurementError(
            f"DUT density at {format_frequency(freq_hz)} is not above the floor minus "
            "the termination's kT: no DUT noise left",
            freq_hz=freq_hz,
        )
    if u_gain_db is not None:
        _finite_nonneg("u_gain_db", u_gain_db)
    losses = _losses(
        input_loss_db, input_loss_temperature_k, output_loss_db, output_loss_temperature_k, ts_k
    )
    refl = reflections if reflections is not None else inputs.reflections_at(freq_hz)
    omitted: list[str] = []
    termination = refl.source_cold if refl.source_cold is not None else refl.source
    qs: list[InputQuantity | None] = [
        _jitter("j_dut", "N_dut jitter", _percent("dut", dut_w_per_hz, u_dut_w_per_hz))
    ]
    if data.floor is not None:
        qs.append(
            _jitter(
                "j_floor",
                "N_floor (floor correction)",
                _percent("floor", floor_w_per_hz, u_floor_w_per_hz),
            )
        )
    qs += [
        _type_b_quantity(
            inputs,
            "dut_gain_db",
            "d_gain_db",
            "DUT gain",
            "dB",
            _STEP_DB,
            omitted,
            override=u_gain_db,
        ),
        _type_b_quantity(
            inputs,
            "absolute_amplitude_db",
            "d_abs_db",
            "absolute amplitude",
            "dB",
            _STEP_DB,
            omitted,
        ),
        _type_b_quantity(
            inputs, "cold_temperature_k", "d_ts_k", "termination temperature", "K", _STEP_K, omitted
        ),
    ]
    if data.floor is not None:
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
    qs += [
        _mismatch_quantity(
            "d_mm_in_db", "mismatch termination / DUT input", termination, refl.dut_input, omitted
        ),
        _mismatch_quantity(
            "d_mm_out_db",
            "mismatch DUT output / analyzer",
            refl.dut_output,
            refl.analyzer_input,
            omitted,
        ),
    ]
    qs += _loss_quantities(inputs, losses, omitted)
    extras = _extra_quantities(inputs)
    quantities = [q for q in qs if q is not None] + [q for q, _ in extras]
    model = _gain_model(data, losses, t0_k, extras)
    try:
        return _budget(freq_hz, "gain", model, quantities, inputs, method, omitted)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="gain") from None
