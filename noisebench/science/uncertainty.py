"""Uncertainty budgets for one noise-figure point: GUM law of propagation and Monte Carlo.

What it does
    A *measurement model* maps the measured densities and every influence quantity (ENR, cold
    temperature, linearity, mismatch, gain, loss, ...) to the DUT's noise figure in dB. Each
    influence quantity is an :class:`InputQuantity` written as a *deviation* from its best
    estimate (nominal 0, except where noted), with a standard uncertainty in its own unit and a
    probability distribution. :func:`propagate_gum` linearises the model (sensitivities by
    central differences, one vectorized model call) and combines with the law of propagation of
    uncertainty including correlations [JCGM 100:2008, §5]. :func:`propagate_monte_carlo`
    propagates the distributions themselves [JCGM 101:2008]: M draws per input (vectorized numpy,
    seeded), mean, standard deviation and the probabilistically symmetric coverage interval,
    optionally with the adaptive choice of M (§7.9) and the GUM validation (§8). Both live in
    :mod:`noisebench.science.propagation` and are re-exported here.

Measurement models (docs/references.md §4, §5, §9)
    Y-factor, with second-stage correction when a calibration is given (the same physics as
    :mod:`noisebench.science.methods.yfactor`)::

        ENR_m = ENR + dENR + M_in (dB)         ENR_c = ENR_cal + dENR' + M_cal (dB)
        Th = T0*ENR_m + Tc  (or T0*(ENR_m + 1) with enr_reference="absolute")
        Y12 = N_h/N_c * L12                    Y2 = N_h,cal/N_c,cal * L2
        Te = (Th - Y*Tc)/(Y - 1)               for (Y12, Th, Tc) and (Y2, Th,cal, Tc,cal)
        G1 = [(N_h - N_c)/(Th - Tc)] / [(N_h,cal - N_c,cal)/(Th,cal - Tc,cal)] * M_out
        Te1 = Te12 - Te2/G1

    ``dENR' = dENR`` (one quantity) when the same source serves calibration and measurement
    (docs/references.md §9); the cold temperature's error is shared by both (one thermometer).

    Gain method (docs/references.md §4, exact floor correction; as
    :mod:`noisebench.science.methods.gain`)::

        Te = (A*L*M_out*N_dut - A*N_floor + k*T_term) / (k*G*M_in) - Ts
        (no floor: Te = A*M_out*N_dut / (k*G*M_in) - Ts)

    G is the path gain (termination to analyzer). Where it was made from a gain that did not
    hold a loss (a DUT's own gain: both; a THROUGH-referenced gain: the output loss), that
    loss was subtracted from it, so the loss's error enters G as well: G = G_stated / L.

    Then losses inside the path are de-embedded (Friis, as the methods do),
    ``Te_DUT = (Te - (L_in - 1)*Tp_in)/L_in - (L_out - 1)*Tp_out/G_DUT``, and
    ``NF = 10*log10(1 + Te_DUT/T0)`` plus any user-defined extra terms (sensitivity in dB/unit).
    Densities carry relative jitter; L is the analyzer's linearity on a power ratio, A its
    absolute amplitude accuracy (gain method only: it cancels in a ratio).

Mismatch (common practice, first order)
    Each connection contributes a factor ``|1 + Gs*Gl|**2`` with unknown phase: U-shaped, limits
    ``20*log10(1 +/- |Gs||Gl|)`` [Harris & Warner 1981]. ``M_in`` (source / DUT input) and
    ``M_cal`` (source / analyzer input) act on the excess noise delivered by the source, ``M_out``
    (DUT output / analyzer input) on the gain seen by the second stage (Y-factor) or on the
    DUT's output noise (gain method); for the gain method ``M_in`` (termination / DUT input)
    acts on the gain. The source's reflection is the larger of its hot and cold values. The
    change of the DUT's own noise with source match needs its noise parameters (docs/references.md
    §9)
    and is outside this model; add it as an ``extra`` term if known.

Units: Hz, K, W/Hz inside; dB for ratios of the influence quantities; relative density jitter in
percent in the budget tables. The module does no I/O except reading an optional Touchstone file
of reflection coefficients (:func:`load_reflection_file`, through scikit-rf).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

from pydantic import (
    BaseModel,
)

from noisebench.errors import InputError
from noisebench.science.mismatch import (
    Reflections,
    gamma_from_vswr,
    load_reflection_file,
    mismatch_limits_db,
    mismatch_power_ratio_std,
    mismatch_standard_uncertainty_db,
    vswr_from_gamma,
)
from noisebench.science.physics import T0_K
from noisebench.science.point import Method, PointResult
from noisebench.science.propagation import (
    Distribution,
    GumResult,
    InputQuantity,
    MonteCarloResult,
    MonteCarloSettings,
    TypeB,
    propagate_gum,
    propagate_monte_carlo,
    sample_input,
    sensitivity_coefficients,
    standard_uncertainty_from_expanded,
    standard_uncertainty_from_half_width,
)
from noisebench.science.uncertainty_budget import Budget, Contribution
from noisebench.science.uncertainty_gain import gain_method_budget
from noisebench.science.uncertainty_inputs import ExtraTerm, UncertaintyInputs
from noisebench.science.uncertainty_yfactor import y_factor_budget

logger = logging.getLogger(__name__)

__all__ = [
    "Budget",
    "Contribution",
    "Distribution",
    "ExtraTerm",
    "GumResult",
    "InputQuantity",
    "MonteCarloResult",
    "MonteCarloSettings",
    "Reflections",
    "TypeB",
    "UncertaintyInputs",
    "budget_for_point",
    "budgets_for_points",
    "gain_method_budget",
    "gamma_from_vswr",
    "load_reflection_file",
    "mismatch_limits_db",
    "mismatch_power_ratio_std",
    "mismatch_standard_uncertainty_db",
    "propagate_gum",
    "propagate_monte_carlo",
    "sample_input",
    "sensitivity_coefficients",
    "standard_uncertainty_from_expanded",
    "standard_uncertainty_from_half_width",
    "vswr_from_gamma",
    "y_factor_budget",
]


# =========================================================================== from a point


def budget_for_point(
    point: PointResult,
    inputs: UncertaintyInputs,
    *,
    calibration: Any = None,
    u_enr_db: float | None = None,
    t0_k: float | None = None,
    base_dir: Path | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
) -> Budget:
    """The budget of a finished :class:`PointResult`, from what the methods stored in it.

    Uses ``point.densities_w_per_hz`` (``dut``/``floor`` or ``hot``/``cold``/``hot_cal``/
    ``cold_cal``), ``point.enr_db``, ``point.source_temperature_k`` and the notes the methods
    record (path gain, losses and their temperatures, ENR reference and u, calibration ENR and
    cold temperature, T0). The densities' standard uncertainties come from
    ``point.notes["u_densities_w_per_hz"]``; without them one common relative jitter is inferred
    that reproduces ``point.u_nf_db``. ``calibration`` (a ``CalibrationPoint`` or its dict)
    supplies the calibration when the point does not hold ``hot_cal``/``cold_cal``.
    ``u_enr_db`` overrides the ENR table's u stored in the notes; ``base_dir`` resolves
    relative Touchstone paths.
    """
    if not isinstance(point, PointResult):
        raise InputError(
            "point",
            f"must be a PointResult (got {type(point).__name__})",
            fix="pass the methods' result",
        )
    notes = point.notes or {}
    t0 = float(t0_k if t0_k is not None else notes.get("t0_k") or T0_K)
    refl = inputs.reflections_at(point.freq_hz, base_dir=base_dir)
    dens = dict(point.densities_w_per_hz)
    u_dens = dict(notes.get("u_densities_w_per_hz") or {})
    if point.conversion is not None:
        from noisebench.science.uncertainty_converter import converter_budget_for_point

        return converter_budget_for_point(
            point, inputs, dens, u_dens, t0, refl, method, u_enr_db=u_enr_db
        )
    if point.method is Method.GAIN:
        return _gain_point_budget(point, inputs, dens, u_dens, t0, refl, method)
    return _y_point_budget(point, inputs, dens, u_dens, calibration, u_enr_db, t0, refl, method)


def _losses_from_notes(notes: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "input_loss_db": float(notes.get("input_loss_db") or 0.0),
        "input_loss_temperature_k": notes.get("input_loss_temperature_k"),
        "output_loss_db": float(notes.get("output_loss_db") or 0.0),
        "output_loss_temperature_k": notes.get("output_loss_temperature_k"),
    }


def _need(point: PointResult, dens: Mapping[str, float], keys: Sequence[str]) -> None:
    missing = [k for k in keys if k not in dens]
    if missing:
        raise InputError(
            "densities_w_per_hz",
            f"point at {point.freq_hz:.6g} Hz lacks {', '.join(missing)}",
            fix="use a point produced by the methods",
        )


def _gain_point_budget(
    point: PointResult,
    inputs: UncertaintyInputs,
    dens: dict[str, float],
    u_dens: dict[str, float],
    t0_k: float,
    refl: Reflections,
    method: Literal["gum", "monte_carlo"] | None,
) -> Budget:
    _need(point, dens, ("dut",))
    notes = point.notes or {}
    gain_db = notes.get("path_gain_db", point.gain_db)
    if gain_db is None:
        raise InputError(
            "gain_db",
            f"gain-method point at {point.freq_hz:.6g} Hz has no gain",
            fix="the gain method needs the DUT gain",
        )
    keys = ("dut", "floor") if "floor" in dens else ("dut",)

    def make(u: Mapping[str, float], how: Literal["gum", "monte_carlo"] | None) -> Budget:
        return gain_method_budget(
            freq_hz=point.freq_hz,
            dut_w_per_hz=dens["dut"],
            u_dut_w_per_hz=u["dut"],
            floor_w_per_hz=dens.get("floor"),
            u_floor_w_per_hz=u.get("floor", 0.0),
            floor_temperature_k=notes.get("floor_temperature_k"),
            gain_db=float(gain_db),
            u_gain_db=point.u_gain_db,
            inputs=inputs,
            source_temperature_k=point.source_temperature_k or t0_k,
            t0_k=t0_k,
            reflections=refl,
            method=how,
            gain_includes_input_loss=bool(notes.get("gain_includes_input_loss", True)),
            gain_includes_output_loss=bool(notes.get("gain_includes_output_loss", True)),
            **_losses_from_notes(notes),
        )

    return make(_density_u(point, dens, u_dens, keys, make), method)


def _y_point_budget(
    point: PointResult,
    inputs: UncertaintyInputs,
    dens: dict[str, float],
    u_dens: dict[str, float],
    calibration: Any,
    u_enr_db: float | None,
    t0_k: float,
    refl: Reflections,
    method: Literal["gum", "monte_carlo"] | None,
) -> Budget:
    notes = point.notes or {}
    cal: dict[str, Any] = {
        "cal_enr_db": notes.get("cal_enr_db"),
        "cal_cold_temperature_k": notes.get("cal_cold_temperature_k"),
    }
    if calibration is not None and "hot_cal" not in dens:
        cal_dens, cal_u, cal = _calibration_data(calibration)
        dens.update(cal_dens)
        u_dens.update(cal_u)
    _need(point, dens, ("hot", "cold"))
    if point.enr_db is None:
        raise InputError(
            "enr_db",
            f"Y-factor point at {point.freq_hz:.6g} Hz has no ENR",
            fix="use a point produced by the Y-factor method",
        )
    enr_db = float(point.enr_db)
    corrected = "hot_cal" in dens and "cold_cal" in dens
    keys = ("hot", "cold", "hot_cal", "cold_cal") if corrected else ("hot", "cold")
    u_enr = u_enr_db if u_enr_db is not None else notes.get("u_enr_db")
    correlated = inputs.enr_correlated and bool(notes.get("enr_correlated", True))

    def make(u: Mapping[str, float], how: Literal["gum", "monte_carlo"] | None) -> Budget:
        return y_factor_budget(
            freq_hz=point.freq_hz,
            hot_w_per_hz=dens["hot"],
            cold_w_per_hz=dens["cold"],
            u_hot_w_per_hz=u["hot"],
            u_cold_w_per_hz=u["cold"],
            hot_cal_w_per_hz=dens.get("hot_cal") if corrected else None,
            cold_cal_w_per_hz=dens.get("cold_cal") if corrected else None,
            u_hot_cal_w_per_hz=u.get("hot_cal", 0.0),
            u_cold_cal_w_per_hz=u.get("cold_cal", 0.0),
            enr_db=enr_db,
            u_enr_db=u_enr,
            enr_correlated=correlated,
            cold_temperature_k=point.source_temperature_k or t0_k,
            inputs=inputs,
            enr_reference=notes.get("enr_reference", "t0"),
            t0_k=t0_k,
            reflections=refl,
            method=how,
            **cal,
            **_losses_from_notes(notes),
        )

    return make(_density_u(point, dens, u_dens, keys, make), method)


def _calibration_data(
    calibration: Any,
) -> tuple[dict[str, float], dict[str, float], dict[str, Any]]:
    """(densities, their u, ENR/Tc) of a CalibrationPoint or its dict dump."""
    data = calibration.model_dump() if isinstance(calibration, BaseModel) else calibration
    hot = data.get("hot") if isinstance(data, Mapping) else None
    cold = data.get("cold") if isinstance(data, Mapping) else None
    if not (isinstance(hot, Mapping) and isinstance(cold, Mapping)):
        raise InputError(
            "calibration",
            "has no hot/cold calibration densities",
            fix="pass the CalibrationPoint of this frequency",
        )
    dens = {"hot_cal": float(hot["density_w_per_hz"]), "cold_cal": float(cold["density_w_per_hz"])}
    u = {
        "hot_cal": float(hot.get("u_density_w_per_hz", 0.0)),
        "cold_cal": float(cold.get("u_density_w_per_hz", 0.0)),
    }
    return (
        dens,
        u,
        {
            "cal_enr_db": data.get("enr_db"),
            "cal_cold_temperature_k": data.get("cold_temperature_k"),
        },
    )


def _density_u(
    point: PointResult,
    dens: Mapping[str, float],
    u_dens: Mapping[str, Any],
    keys: Sequence[str],
    make: Callable[[Mapping[str, float], Literal["gum", "monte_carlo"] | None], Budget],
) -> dict[str, float]:
    """The densities' standard uncertainties (W/Hz): stored, or inferred from ``u_nf_db``.

    Inferred: one relative jitter s on every density, chosen so that the densities' terms of
    the budget alone give ``point.u_nf_db`` (the terms scale linearly with s).
    """
    if all(isinstance(u_dens.get(k), (int, float)) for k in keys):
        return {k: float(u_dens[k]) for k in keys}
    at_1pct = {k: 0.01 * dens[k] for k in keys}
    probe = make(at_1pct, "gum")
    u_probe = math.sqrt(sum(c.contribution_db**2 for c in probe.contributions if c.unit == "%"))
    scale = point.u_nf_db / u_probe if u_probe > 0 else 0.0
    logger.debug(
        "point %.6g Hz: no density u stored; inferred %.4g %% jitter from u_nf_db",
        point.freq_hz,
        scale,
    )
    return {k: v * scale for k, v in at_1pct.items()}


def budgets_for_points(
    points: Sequence[PointResult],
    inputs: UncertaintyInputs,
    *,
    calibrations: Mapping[float, Any] | None = None,
    base_dir: Path | None = None,
) -> list[Budget]:
    """:func:`budget_for_point` for every point (``calibrations`` keyed by frequency, Hz)."""
    cals = calibrations or {}
    return [
        budget_for_point(p, inputs, calibration=cals.get(p.freq_hz), base_dir=base_dir)
        for p in points
    ]
