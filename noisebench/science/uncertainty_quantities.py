"""Influence quantities of the budgets: densities, jitter, Type B terms, mismatch, losses, extra
terms, and the de-embedding shared by both models."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from noisebench.errors import InputError
from noisebench.science.mismatch import mismatch_standard_uncertainty_db
from noisebench.science.physics import T0_K, deembed_path_te_k, nf_db_from_te_k, ratio_from_db
from noisebench.science.propagation import (
    Distribution,
    InputQuantity,
)
from noisebench.science.uncertainty_inputs import _TYPE_B_FIELDS, UncertaintyInputs


def _finite_nonneg(field: str, value: float) -> None:
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not (math.isfinite(value) and value >= 0)
    ):
        raise InputError(
            field,
            f"must be a finite number >= 0 (got {value!r})",
            value=value,
            fix="give a standard uncertainty as a positive number",
        )


# =========================================================================== quantities

_STEP_DB = 1e-4
_STEP_PERCENT = 1e-4
_STEP_K = 1e-3


def _positive_density(field: str, value: Any) -> float:
    """A density in W/Hz: finite and > 0, or InputError naming ``field``."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not (math.isfinite(value) and value > 0)
    ):
        raise InputError(
            field,
            f"must be a finite density > 0 W/Hz (got {value!r})",
            value=value,
            fix="pass the estimator's density_w_per_hz",
        )
    return float(value)


def _percent(name: str, value: Any, u: Any) -> float:
    """The relative standard uncertainty ``100*u/value`` (%) of a density and its u (W/Hz)."""
    value = _positive_density(f"{name}_w_per_hz", value)
    if isinstance(u, bool) or not isinstance(u, (int, float)) or not (math.isfinite(u) and u >= 0):
        raise InputError(
            f"u_{name}_w_per_hz",
            f"must be a finite standard uncertainty >= 0 W/Hz (got {u!r})",
            value=u,
            fix="pass the estimator's u_density_w_per_hz",
        )
    return 100.0 * float(u) / value


def _jitter(key: str, name: str, u_percent: float) -> InputQuantity:
    return InputQuantity(key=key, name=name, u=u_percent, unit="%", step=_STEP_PERCENT)


def _type_b_quantity(
    inputs: UncertaintyInputs,
    field: str,
    key: str,
    name: str,
    unit: str,
    step: float,
    omitted: list[str],
    *,
    override: float | None = None,
) -> InputQuantity | None:
    spec = inputs.spec(field)
    if spec is None and override is not None:
        spec = (override, _TYPE_B_FIELDS[field])
    if spec is None:
        omitted.append(f"{name} (no {field} given)")
        return None
    u, dist = spec
    return InputQuantity(key=key, name=name, u=u, unit=unit, step=step, distribution=dist)


def _mismatch_quantity(
    key: str, name: str, gamma_s: float | None, gamma_l: float | None, omitted: list[str]
) -> InputQuantity | None:
    if gamma_s is None or gamma_l is None:
        omitted.append(f"{name} (reflection not given)")
        return None
    return InputQuantity(
        key=key,
        name=name,
        u=mismatch_standard_uncertainty_db(gamma_s, gamma_l),
        unit="dB",
        step=_STEP_DB,
        distribution=Distribution.U_SHAPED,
        mismatch_rho=gamma_s * gamma_l,
    )


def _extra_quantities(inputs: UncertaintyInputs) -> list[tuple[InputQuantity, float]]:
    out = []
    for i, term in enumerate(inputs.extra):
        dist = term.uncertainty.shape(Distribution.NORMAL)
        q = InputQuantity(
            key=f"extra_{i}",
            name=term.name,
            u=term.uncertainty.standard_uncertainty(Distribution.NORMAL),
            unit=term.unit,
            step=_STEP_DB,
            distribution=dist,
        )
        out.append((q, term.sensitivity))
    return out


def _temperature_value(field: str, value: float) -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        raise InputError(
            field,
            f"must be an absolute temperature > 0 K (got {value!r})",
            value=value,
            fix="give kelvin (K = degC + 273.15)",
        )
    return float(value)


def _finite(field: str, value: float) -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value)):
        raise InputError(field, f"must be a finite number (got {value!r})", value=value)
    return float(value)


_lin = ratio_from_db


def _deembed_te(te_path_k: Any, path_gain_lin: Any, losses: _Losses, x: Mapping[str, Any]) -> Any:
    """Te of the DUT inside [input loss, DUT, output loss] (Friis; as the methods do)."""
    l_in = _lin(losses.input_db + x.get("d_loss_in_db", 0.0))
    l_out = _lin(losses.output_db + x.get("d_loss_out_db", 0.0))
    te_dut, _ = deembed_path_te_k(
        te_path_k, path_gain_lin, l_in, losses.input_tp_k, l_out, losses.output_tp_k
    )
    return te_dut


def _nf_db(
    te_k: Any, t0_k: float, x: Mapping[str, Any], extras: list[tuple[InputQuantity, float]]
) -> Any:
    """NF in dB from Te (NaN where F <= 0) plus the extra terms."""
    te = np.asarray(te_k)
    nf = nf_db_from_te_k(np.where(1.0 + te / t0_k > 0, te, np.nan), t0_k)
    for q, sensitivity in extras:
        nf = nf + sensitivity * x.get(q.key, 0.0)
    return nf


@dataclass(frozen=True)
class _Losses:
    input_db: float = 0.0
    input_tp_k: float = T0_K
    output_db: float = 0.0
    output_tp_k: float = T0_K


def _losses(
    input_db: float,
    input_tp_k: float | None,
    output_db: float,
    output_tp_k: float | None,
    default_tp_k: float,
) -> _Losses:
    for field, value in (("input_loss_db", input_db), ("output_loss_db", output_db)):
        if _finite(field, value) < 0:
            raise InputError(
                field, f"must be >= 0 dB (got {value!r})", fix="a loss is a positive number of dB"
            )
    tp_in = (
        default_tp_k
        if input_tp_k is None
        else _temperature_value("input_loss_temperature_k", input_tp_k)
    )
    tp_out = (
        default_tp_k
        if output_tp_k is None
        else _temperature_value("output_loss_temperature_k", output_tp_k)
    )
    return _Losses(float(input_db), tp_in, float(output_db), tp_out)


def _loss_quantities(
    inputs: UncertaintyInputs, losses: _Losses, omitted: list[str]
) -> list[InputQuantity | None]:
    out: list[InputQuantity | None] = []
    if losses.input_db != 0.0:
        out.append(
            _type_b_quantity(
                inputs, "input_loss_db", "d_loss_in_db", "input loss", "dB", _STEP_DB, omitted
            )
        )
    if losses.output_db != 0.0:
        out.append(
            _type_b_quantity(
                inputs, "output_loss_db", "d_loss_out_db", "output loss", "dB", _STEP_DB, omitted
            )
        )
    return out
