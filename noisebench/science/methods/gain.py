"""Gain method ("cold source"): NF from one noise density with the DUT input terminated.

Physics (docs/references.md §4): with the DUT input terminated by a matched load at physical
temperature Ts and the DUT's available gain G known, the analyzer reads

    N_m = k (Ts + Te_DUT) G + N_sa                 (N_sa: the analyzer's own noise)

A floor reading with the analyzer input terminated by a matched load at T_term (normally the
same Ts) gives ``N_f = k T_term + N_sa``, so the exact correction is

    Te_DUT = (N_m - N_f + k T_term) / (k G) - Ts,      F = 1 + Te_DUT / T0.

Plain subtraction ``N_m - N_f`` forgets that the floor reading holds the termination's k T_term
and under-reads F by exactly 1/G. The gain passed to :func:`gain_method_point` is the measured
path gain from the source plane (the termination) to the analyzer plane; input and output losses
named by the caller are de-embedded so the result is the DUT's own NF and gain.

Uncertainty: ``u_nf_db`` is the statistical part, the densities' standard uncertainties
propagated linearly (first-order GUM) with analytic sensitivities (docs/references.md §20).
The gain's own uncertainty ``u_gain_db`` does not average down, so it is reported beside it as
a contribution in ``notes`` (and enters 1:1 in dB).
"""

from __future__ import annotations

import math

import numpy as np

from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods._common import (
    DEFAULT_FLOOR_WARNING_DB,
    DEFAULT_LOW_GAIN_DB,
    DEFAULT_SCATTER_LIMIT,
    build_point_result,
    check_density,
    check_losses,
    check_non_negative,
    check_number,
    check_same_frequency,
    check_te_plausible,
    check_temperature,
    density_flags,
    margin_db,
    nf_db_from_te,
)
from noisebench.science.methods._propagation import (
    Sensitivities,
    chain,
    linear_propagation,
)
from noisebench.science.physics import (
    BOLTZMANN_J_PER_K,
    DB_PER_NEPER_POWER,
    T0_K,
    ArrayLike,
    FloatOrArray,
    checked_array,
    deembed_path_te_k,
    deembed_path_te_k_partials,
    floor_corrected_density_partials,
    floor_corrected_density_w_per_hz,
    nf_db_from_te_k,
    ratio_from_db,
    ratio_from_db_slope,
    scalar_or_array,
    te_k_from_output_density,
    te_k_from_output_density_partials,
)
from noisebench.science.point import Method, PointResult
from noisebench.units import format_frequency

__all__ = ["gain_method_te_k", "gain_method_nf_db", "gain_method_point"]


def _positive(field: str, value: ArrayLike, fix: str) -> np.ndarray:
    arr = checked_array(field, value)
    if np.any(arr <= 0):
        raise InputError(field, f"must be > 0 (got {float(np.ravel(arr[arr <= 0])[0])!r})", fix=fix)
    return arr


def _no_dut_noise(idx: int) -> MeasurementError:
    return MeasurementError(
        "DUT reading is not above the floor reading minus the termination's kT "
        f"(element {idx}): no DUT noise is left after the floor correction; check that "
        "the DUT is connected and powered, and that the floor was measured with the "
        "same settings",
        element=idx,
    )


def gain_method_te_k(
    n_meas_w_per_hz: ArrayLike,
    gain_lin: ArrayLike,
    *,
    n_floor_w_per_hz: ArrayLike | None = None,
    source_temperature_k: ArrayLike = T0_K,
    floor_temperature_k: ArrayLike | None = None,
) -> FloatOrArray:
    """Te of the measured path from the gain method, K (vectorized).

    ``n_meas_w_per_hz``: density read with the source termination at ``source_temperature_k``;
    ``gain_lin``: linear available gain from that termination to the analyzer;
    ``n_floor_w_per_hz``: the analyzer's floor reading with its input terminated by a matched
    load at ``floor_temperature_k`` (default: the source temperature). Without a floor the
    analyzer's noise is counted as the DUT's: Te = N_m/(k G) - Ts.

    Raises MeasurementError when the floor-corrected DUT noise N_m - N_f + k T_term <= 0.
    """
    n_meas = _positive("n_meas_w_per_hz", n_meas_w_per_hz, "pass linear densities in W/Hz")
    gain = _positive("gain_lin", gain_lin, "pass a linear gain; convert dB with db_to_linear")
    kelvin = "give an absolute temperature in kelvin (K = degC + 273.15)"
    ts = _positive("source_temperature_k", source_temperature_k, kelvin)
    n_dut = n_meas
    if n_floor_w_per_hz is not None:
        n_floor = _positive("n_floor_w_per_hz", n_floor_w_per_hz, "pass linear densities in W/Hz")
        t_term = (
            ts
            if floor_temperature_k is None
            else _positive("floor_temperature_k", floor_temperature_k, kelvin)
        )
        n_dut = floor_corrected_density_w_per_hz(n_meas, n_floor, t_term)
        if np.any(n_dut <= 0):
            raise _no_dut_noise(int(np.flatnonzero(np.ravel(n_dut <= 0))[0]))
    return scalar_or_array(te_k_from_output_density(n_dut, gain, ts))


def gain_method_nf_db(
    n_meas_w_per_hz: ArrayLike,
    gain_lin: ArrayLike,
    *,
    n_floor_w_per_hz: ArrayLike | None = None,
    source_temperature_k: ArrayLike = T0_K,
    floor_temperature_k: ArrayLike | None = None,
    t0_k: float = T0_K,
) -> FloatOrArray:
    """NF in dB of the measured path from the gain method (vectorized; see gain_method_te_k).

    Negative noise temperatures from scatter give NF < 0 dB; Te <= -T0 raises MeasurementError.
    """
    te = np.asarray(
        gain_method_te_k(
            n_meas_w_per_hz,
            gain_lin,
            n_floor_w_per_hz=n_floor_w_per_hz,
            source_temperature_k=source_temperature_k,
            floor_temperature_k=floor_temperature_k,
        )
    )
    t0 = check_temperature("t0_k", t0_k)
    if np.any(te <= -t0):
        raise MeasurementError(
            "gain-method noise factor <= 0: the reading is below the "
            "source termination's own noise; check gain and temperatures"
        )
    return scalar_or_array(nf_db_from_te_k(te, t0))


def _te_and_sensitivities(
    n_m: float,
    n_f: float | None,
    g_db: float,
    ts: float,
    t_term: float,
    lin: float,
    tp_in: float,
    lout: float,
    tp_out: float,
) -> tuple[float, Sensitivities]:
    """Te_DUT (K) of the gain method's model (the kernels of :func:`gain_method_te_k` and the
    loss de-embedding, on checked scalars) and dTe_DUT/d(n_meas, n_floor, g_db) by the chain
    floor correction -> Te from the output density -> de-embedding (docs/references.md §20).
    ``n_f`` None: no floor correction."""
    g_path = ratio_from_db(g_db)
    n_dut = n_m if n_f is None else floor_corrected_density_w_per_hz(n_m, n_f, t_term)
    if n_dut <= 0:
        raise _no_dut_noise(0)
    d_n_dut = {"n_meas": 1.0}
    if n_f is not None:
        d_m, d_f, _ = floor_corrected_density_partials(n_m, n_f, t_term)
        d_n_dut = {"n_meas": d_m, "n_floor": d_f}
    d_g_path = {"g_db": float(ratio_from_db_slope(g_db))}
    te_path = te_k_from_output_density(n_dut, g_path, ts)
    p_n, p_g, _ = te_k_from_output_density_partials(n_dut, g_path, ts)
    d_te_path = chain((p_n, d_n_dut), (p_g, d_g_path))
    te_dut = deembed_path_te_k(te_path, g_path, lin, tp_in, lout, tp_out)[0]
    q_te, q_g = deembed_path_te_k_partials(te_path, g_path, lin, tp_in, lout, tp_out)[:2]
    return float(te_dut), chain((q_te, d_te_path), (q_g, d_g_path))


def gain_method_point(
    dut: NoiseDensity,
    gain_db: float,
    *,
    floor: NoiseDensity | None = None,
    u_gain_db: float = 0.0,
    source_temperature_k: float = T0_K,
    t0_k: float = T0_K,
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    floor_temperature_k: float | None = None,
    gain_includes_losses: bool = True,
    gain_includes_output_loss: bool | None = None,
    floor_warning_db: float = DEFAULT_FLOOR_WARNING_DB,
    low_gain_db: float = DEFAULT_LOW_GAIN_DB,
    scatter_limit: float = DEFAULT_SCATTER_LIMIT,
) -> PointResult:
    """NF, Te and gain of the DUT at one frequency by the gain method.

    ``dut``: density with the DUT in place and its input terminated at ``source_temperature_k``
    (K). ``gain_db``: measured path gain from that termination to the analyzer plane, dB; the
    ``input_loss_db`` (source side) and ``output_loss_db`` (analyzer side) inside that path are
    de-embedded at their physical temperatures (default: the source temperature, i.e. ambient).
    ``floor``: the analyzer's own reading with a matched load at ``floor_temperature_k``
    (default: the source temperature) on its input, same settings; without it the analyzer's
    noise is counted as the DUT's. ``u_gain_db``: standard uncertainty of ``gain_db``.
    ``gain_includes_losses=False`` says ``gain_db`` is the DUT's own gain (e.g. a gain measured
    against a through reference, where the cables cancel); the losses then only enter the noise.
    ``gain_includes_output_loss`` overrides that for the output loss alone (default: as
    ``gain_includes_losses``), e.g. ``False`` for a gain measured by substitution against a
    THROUGH that holds the output cable but not the input one. What the gain held is recorded
    in ``notes`` so that uncertainty budgets perturb the losses consistently.

    Flags: NEAR_ANALYZER_FLOOR (margin < ``floor_warning_db``), LOW_GAIN (DUT gain <
    ``low_gain_db``), NEGATIVE_TE, SPURS_EXCLUDED / EXCESS_SCATTER from the densities.
    Raises InputError for bad inputs, MeasurementError when no DUT noise is left after the floor
    correction or the noise factor would be <= 0.
    """
    dut = check_density("dut", dut)
    densities = {"dut": dut}
    if floor is not None:
        densities["floor"] = check_density("floor", floor)
    freq_hz = check_same_frequency(dut, {k: v for k, v in densities.items() if k != "dut"})
    gain_db = check_number("gain_db", gain_db)
    u_gain_db = check_non_negative("u_gain_db", u_gain_db, "give a standard uncertainty in dB")
    ts = check_temperature("source_temperature_k", source_temperature_k)
    t0 = check_temperature("t0_k", t0_k)
    t_term = (
        ts
        if floor_temperature_k is None
        else check_temperature("floor_temperature_k", floor_temperature_k)
    )
    lin, lout, tp_in, tp_out = check_losses(
        input_loss_db, output_loss_db, input_loss_temperature_k, output_loss_temperature_k, ts
    )
    includes_in = bool(gain_includes_losses)
    includes_out = (
        includes_in if gain_includes_output_loss is None else bool(gain_includes_output_loss)
    )
    path_gain_db = (
        gain_db
        - (0.0 if includes_in else 10.0 * math.log10(lin))
        - (0.0 if includes_out else 10.0 * math.log10(lout))
    )

    def te_dut(with_floor: bool) -> tuple[float, Sensitivities]:
        return _te_and_sensitivities(
            n_m, n_f if with_floor else None, path_gain_db, ts, t_term, lin, tp_in, lout, tp_out
        )

    n_m = dut.density_w_per_hz
    n_f = floor.density_w_per_hz if floor is not None else 1.0  # placeholder, unused w/o floor
    u_stat = {"n_meas": dut.u_density_w_per_hz}
    if floor is not None:
        u_stat["n_floor"] = floor.u_density_w_per_hz
    try:
        stat = linear_propagation(*te_dut(floor is not None), u_stat | {"g_db": u_gain_db})
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="gain") from None
    te_k = float(stat.value)
    check_te_plausible(
        te_k,
        float(stat.u()),
        freq_hz,
        "gain method",
        "the DUT reads at the analyzer floor (DUT unpowered or not connected), the wrong path "
        "is switched, or gain_db is larger than the DUT's real gain; check the DUT supply and "
        "connections, the path and the gain source",
    )
    if te_k <= -t0:
        raise MeasurementError(
            f"gain method at {format_frequency(freq_hz)}: noise factor <= 0 (Te = {te_k:.1f} K); "
            "the DUT "
            "reading is below the termination's own noise: check gain_db and the temperatures",
            freq_hz=freq_hz,
        )
    u_te_k = float(stat.u(u_stat))
    nf_db = nf_db_from_te(te_k, t0)
    dnf_dte = DB_PER_NEPER_POWER / (t0 + te_k)  # dNF_dB / dTe
    names = {"n_meas": "dut", "n_floor": "floor", "g_db": "gain"}
    contributions = {names[n]: float(c) * dnf_dte for n, c in stat.contributions.items()}
    dut_gain_db = path_gain_db + 10.0 * math.log10(lin * lout)

    flags = density_flags(densities.values(), scatter_limit)
    margin, correction, nf_uncorrected = None, None, None
    if floor is not None:
        analyzer_noise = n_f - BOLTZMANN_J_PER_K * t_term
        if analyzer_noise <= 0:
            raise MeasurementError(
                f"gain method at {format_frequency(freq_hz)}: the floor reading "
                f"({floor.density_dbm_per_hz:.2f} dBm/Hz) holds no analyzer noise above the "
                "termination's kT; check floor_temperature_k and that the floor was measured "
                "on the analyzer input with the same settings",
                freq_hz=freq_hz,
            )
        margin = margin_db(n_m - analyzer_noise, analyzer_noise)
        te_uncorrected = te_dut(with_floor=False)[0]
        nf_uncorrected = nf_db_from_te(te_uncorrected, t0)
        correction = nf_uncorrected - nf_db

    return build_point_result(
        freq_hz=freq_hz,
        method=Method.GAIN,
        nf_db=nf_db,
        te_k=te_k,
        u_nf_db=u_te_k * dnf_dte,
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
        u_gain_db=u_gain_db,
        floor_correction_db=correction,
        source_temperature_k=ts,
        notes={
            "path_gain_db": path_gain_db,
            "gain_includes_input_loss": includes_in,
            "gain_includes_output_loss": includes_out,
            "input_loss_db": input_loss_db,
            "input_loss_temperature_k": tp_in,
            "output_loss_db": output_loss_db,
            "output_loss_temperature_k": tp_out,
            "floor_temperature_k": t_term if floor is not None else None,
            "nf_uncorrected_db": nf_uncorrected,
        },
    )
