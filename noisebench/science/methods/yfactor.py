"""Y-factor method: NF from hot/cold noise densities with a calibrated noise source.

Physics (docs/references.md §5): ``Y = N_hot / N_cold`` and, for hot and cold source temperatures
Th and Tc, ``Te = (Th - Y Tc) / (Y - 1)`` exactly. ENR is referred to T0 = 290 K.

How ENR becomes Th (``enr_reference``):

- ``"t0"`` (default, common practice): the table was calibrated with the source at T0 and its
  excess noise T0*ENR does not change with the source's physical temperature, so
  ``Th = T0 ENR + Tc``. Then ``F = ENR/(Y-1) - (Tc - T0)/T0``.
- ``"absolute"``: the table defines the hot temperature itself, ``Th = T0 (ENR + 1)``, whatever
  the physical temperature. Then ``F = [ENR - Y (Tc/T0 - 1)] / (Y - 1)``.

Second-stage correction: a calibration without the DUT (:func:`calibrate_point`) gives the
measurement system's Te2; with the DUT, ``G1 = [(Nh - Nc)/(Th - Tc)] / [(Nh,cal - Nc,cal)/
(Th,cal - Tc,cal)]`` (the usual ratio of differences when the source's Th - Tc is the same in
both) and ``Te1 = Te12 - Te2/G1`` (Friis). Losses between the noise source and the DUT input
(``input_loss_db``) and after the DUT but outside the calibration path (``output_loss_db``) are
de-embedded so the result is the DUT's own NF and gain.

Uncertainty: ``u_nf_db`` is the statistical part (the four densities' standard uncertainties,
propagated linearly with analytic sensitivities, docs/references.md §20). The ENR's
uncertainty does not average down; its contribution, with the ENR fully correlated between
calibration and measurement when the same value is used (same source, same frequency), is
reported beside it in ``notes``.

Size: one method: the point function, its vectorized sweep form and the calibration step share
one model function, which must stay in one place so the point and sweep forms cannot drift
apart.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from datetime import datetime, timezone
from typing import Literal, NamedTuple

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods._common import (
    DEFAULT_FLOOR_WARNING_DB,
    DEFAULT_LOW_GAIN_DB,
    DEFAULT_SCATTER_LIMIT,
    FREQ_REL_TOL,
    build_point_result,
    check_density,
    check_losses,
    check_non_negative,
    check_number,
    check_same_frequency,
    check_te_plausible,
    check_temperature,
    check_y_significant,
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
    DB_PER_NEPER_POWER,
    T0_K,
    ArrayLike,
    FloatOrArray,
    checked_array,
    db_from_ratio,
    db_from_ratio_slope,
    deembed_path_te_k,
    deembed_path_te_k_partials,
    gain_from_hot_cold,
    gain_from_hot_cold_partials,
    nf_db_from_te_k,
    ratio_from_db,
    ratio_from_db_slope,
    scalar_or_array,
    second_stage_corrected_te_k,
    second_stage_corrected_te_k_partials,
    source_hot_temperature_k,
    source_hot_temperature_partials,
    te_k_from_y,
    te_k_from_y_partials,
)
from noisebench.science.point import Method, PointFlag, PointResult, calibration_point_flags
from noisebench.units import format_frequency, format_frequency_range

__all__ = [
    "DEFAULT_Y_MIN_DB",
    "EnrReference",
    "CalibrationPoint",
    "SystemCalibration",
    "YFactorSweep",
    "y_factor",
    "hot_temperature_k",
    "te_from_y_k",
    "noise_factor_from_y",
    "calibrate_point",
    "y_factor_point",
    "y_factor_sweep",
    "y_factor_nf_db",
]

EnrReference = Literal["t0", "absolute"]

DEFAULT_Y_MIN_DB = 1.0
"""Y below which a point is flagged Y_TOO_SMALL.

The NF's sensitivity to errors in Y is Y/(Y-1) (docs/references.md §7): 4.9 at Y = 1 dB, so a 0.01
dB
linearity or jitter error in Y becomes ~0.05 dB of NF, and it grows without bound as Y -> 1.
Above 1 dB the method behaves; below it a higher-ENR source is the fix. A DUT with NF 20 dB
measured with a 15 dB ENR source gives Y = 1.2 dB, right at the edge.
"""


# --------------------------------------------------------------------------- pure functions


def _positive(field: str, value: ArrayLike, fix: str) -> np.ndarray:
    arr = checked_array(field, value)
    if np.any(arr <= 0):
        raise InputError(field, f"must be > 0 (got {float(np.ravel(arr[arr <= 0])[0])!r})", fix=fix)
    return arr


_KELVIN_FIX = "give an absolute temperature in kelvin (K = degC + 273.15)"


def _check_u_enr(u_enr_db: float | None) -> float | None:
    """The ENR's standard uncertainty in dB (>= 0), or None when it is unknown."""
    if u_enr_db is None:
        return None
    return check_non_negative(
        "u_enr_db", u_enr_db, "give a standard uncertainty in dB, or None when the table has none"
    )


def _check_reference(enr_reference: str) -> EnrReference:
    if enr_reference == "t0":
        return "t0"
    if enr_reference == "absolute":
        return "absolute"
    raise InputError(
        "enr_reference",
        f"must be 't0' or 'absolute' (got {enr_reference!r})",
        fix="'t0': excess noise T0*ENR added to the physical temperature; "
        "'absolute': Th = T0*(ENR+1)",
    )


def _where(freq_hz: ArrayLike | None, mask: np.ndarray) -> str:
    idx = int(np.flatnonzero(np.ravel(mask))[0])
    if freq_hz is None:
        return f"element {idx}"
    freqs = np.broadcast_to(np.asarray(freq_hz, dtype=float), np.shape(mask)).ravel()
    return f"{format_frequency(freqs[idx])}"


def y_factor(hot: ArrayLike, cold: ArrayLike) -> FloatOrArray:
    """Y = hot / cold (linear) from two noise powers or densities in the same unit."""
    h = _positive("hot", hot, "pass linear powers or densities (W, W/Hz)")
    c = _positive("cold", cold, "pass linear powers or densities (W, W/Hz)")
    return scalar_or_array(h / c)


def hot_temperature_k(
    enr_lin: ArrayLike, tc_k: ArrayLike, t0_k: float = T0_K, enr_reference: EnrReference = "t0"
) -> FloatOrArray:
    """Hot noise temperature of the source, K: ``T0 ENR + Tc`` ("t0") or ``T0 (ENR+1)``."""
    enr = _positive("enr_lin", enr_lin, "pass the linear ENR, 10**(enr_db/10)")
    tc = _positive("tc_k", tc_k, _KELVIN_FIX)
    t0 = float(_positive("t0_k", t0_k, _KELVIN_FIX))
    return scalar_or_array(source_hot_temperature_k(enr, tc, t0, _check_reference(enr_reference)))


def te_from_y_k(y: ArrayLike, th_k: ArrayLike, tc_k: ArrayLike) -> FloatOrArray:
    """Noise temperature from Y: ``Te = (Th - Y Tc)/(Y - 1)``, K. Refuses Y <= 1."""
    yy = checked_array("y", y)
    th = _positive("th_k", th_k, _KELVIN_FIX)
    tc = _positive("tc_k", tc_k, _KELVIN_FIX)
    if np.any(yy <= 1):
        raise MeasurementError(
            f"Y <= 1 ({_where(None, yy <= 1)}): the hot reading is not above "
            "the cold one; check that the noise source switches and is "
            "connected"
        )
    return scalar_or_array(te_k_from_y(yy, th, tc))


def noise_factor_from_y(
    y: ArrayLike,
    enr_lin: ArrayLike,
    tc_k: ArrayLike,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
) -> FloatOrArray:
    """Noise factor F = 1 + Te/T0 from Y, the linear ENR and the cold temperature (general)."""
    th = hot_temperature_k(enr_lin, tc_k, t0_k, enr_reference)
    te = np.asarray(te_from_y_k(y, th, tc_k))
    return scalar_or_array(1.0 + te / float(t0_k))


# --------------------------------------------------------------------------- the vectorized core


class _Cal(NamedTuple):
    hot: np.ndarray
    cold: np.ndarray
    enr_db: np.ndarray
    tc_k: np.ndarray


class _Core(NamedTuple):
    y: np.ndarray
    te12_k: np.ndarray  # Te of everything behind the source (path + second stage)
    te2_k: np.ndarray | None  # second stage (calibration)
    g1_lin: np.ndarray | None  # path gain source plane -> calibration plane
    te1_k: np.ndarray  # path Te after the second-stage correction
    te_dut_k: np.ndarray
    te_dut_uncorrected_k: np.ndarray | None
    gain_dut_lin: np.ndarray | None
    th_k: np.ndarray  # hot temperature of the measurement's source
    th_cal_k: np.ndarray | None  # and of the calibration's


def _te_of_pair(hot, cold, enr_db, tc, t0, ref, freq_hz, what: str):
    mask = np.asarray(hot <= cold)
    if mask.any():
        raise MeasurementError(
            f"{what} at {_where(freq_hz, mask)}: hot reading is not above the cold one; check "
            "that the noise source switches, is connected and has settled, and that the DUT is "
            "powered and connected (an unpowered DUT passes no source noise)"
        )
    # the callers checked enr_db (finite), tc (> 0), t0 and ref; only the ENR's range is left
    th = np.asarray(source_hot_temperature_k(ratio_from_db(enr_db), tc, t0, ref))
    if not np.isfinite(th).all():
        raise InputError(
            "enr_db",
            f"gives a hot temperature that is not finite ({_where(freq_hz, ~np.isfinite(th))})",
            fix="give the ENR in dB (e.g. 15.0), not as a linear ratio",
        )
    if (th <= tc).any():
        raise InputError(
            "enr_db",
            f"gives a hot temperature not above the cold temperature ({_where(freq_hz, th <= tc)})",
            fix="check enr_db, cold_temperature_k and enr_reference",
        )
    y = hot / cold
    return y, te_k_from_y(y, th, tc), th


def _core(
    hot, cold, enr_db, tc, t0, ref, cal: _Cal | None, lin, tp_in, lout, tp_out, freq_hz=None
) -> _Core:
    y, te12, th = _te_of_pair(hot, cold, enr_db, tc, t0, ref, freq_hz, "Y-factor measurement")
    if cal is None:
        if lout != 1.0:
            raise InputError(
                "output_loss_db",
                "needs the DUT gain, which only a calibration gives",
                fix="calibrate first, or leave the output loss inside the calibration path",
            )
        te_dut = np.asarray(deembed_path_te_k(te12, 1.0, lin, tp_in, 1.0, tp_out)[0])
        return _Core(y, te12, None, None, te12, te_dut, None, None, th, None)
    y2, te2, th_cal = _te_of_pair(
        cal.hot, cal.cold, cal.enr_db, cal.tc_k, t0, ref, freq_hz, "Y-factor calibration"
    )
    g1 = gain_from_hot_cold(hot, cold, th, tc, cal.hot, cal.cold, th_cal, cal.tc_k)
    te1 = second_stage_corrected_te_k(te12, te2, g1)
    te_dut, g_dut = deembed_path_te_k(te1, g1, lin, tp_in, lout, tp_out)
    te_unc = deembed_path_te_k(te12, g1, lin, tp_in, lout, tp_out)[0]
    return _Core(y, te12, te2, g1, te1, np.asarray(te_dut), np.asarray(te_unc), g_dut, th, th_cal)


def _pair_sensitivities(
    hot: float,
    cold: float,
    th: float,
    tc: float,
    enr_db: float,
    t0: float,
    ref: str,
    names: tuple[str, str, str],
) -> tuple[Sensitivities, float]:
    """(dTe/d(hot, cold, ENR_dB) under ``names``, dTh/dENR_dB) of one hot/cold pair:
    ``Te = (Th - Y Tc)/(Y - 1)``, ``Y = hot/cold`` (dY/dhot = 1/cold, dY/dcold = -Y/cold),
    ``Th`` from the ENR (docs/references.md §20)."""
    y = hot / cold
    d_y, d_th = (float(x) for x in te_k_from_y_partials(y, th, tc)[:2])
    d_th_d_enr_lin = source_hot_temperature_partials(ratio_from_db(enr_db), tc, t0, ref)[0]
    d_th_d_enr = float(d_th_d_enr_lin) * float(ratio_from_db_slope(enr_db))
    h_name, c_name, enr_name = names
    return {h_name: d_y / cold, c_name: -d_y * y / cold, enr_name: d_th * d_th_d_enr}, d_th_d_enr


def _core_sensitivities(
    values: dict[str, float],
    enr_cal_name: str,
    tc: float,
    tc_cal: float | None,
    t0: float,
    ref: str,
    lin: float,
    tp_in: float,
    lout: float,
    tp_out: float,
    r: _Core,
) -> tuple[Sensitivities, Sensitivities | None]:
    """Sensitivities of the DUT's Te (K) and, with a calibration, of its gain (dB) to the
    inputs named in ``values`` (h, c, hc, cc, enr, and ``enr_cal_name`` for the calibration's
    ENR: "enr" when one ENR serves both), by the chain rule through the kernels of
    :func:`_core` (docs/references.md §20)."""
    h, c, th = values["h"], values["c"], float(r.th_k)
    d_te12, d_th = _pair_sensitivities(h, c, th, tc, values["enr"], t0, ref, ("h", "c", "enr"))
    if r.g1_lin is None or r.te2_k is None or r.th_cal_k is None or tc_cal is None:
        q_te = deembed_path_te_k_partials(r.te12_k, 1.0, lin, tp_in, 1.0, tp_out)[0]
        return chain((q_te, d_te12)), None
    hc, cc, th_cal = values["hc"], values["cc"], float(r.th_cal_k)
    d_te2, d_th_cal = _pair_sensitivities(
        hc, cc, th_cal, tc_cal, values["enr_cal"], t0, ref, ("hc", "cc", enr_cal_name)
    )
    g_h, g_c, g_th, _, g_hc, g_cc, g_thc, _ = gain_from_hot_cold_partials(
        h, c, th, tc, hc, cc, th_cal, tc_cal
    )
    d_g1 = chain(
        (g_h, {"h": 1.0}),
        (g_c, {"c": 1.0}),
        (g_hc, {"hc": 1.0}),
        (g_cc, {"cc": 1.0}),
        (g_th * d_th, {"enr": 1.0}),
        (g_thc * d_th_cal, {enr_cal_name: 1.0}),
    )
    s_12, s_2, s_g = second_stage_corrected_te_k_partials(r.te12_k, r.te2_k, r.g1_lin)
    d_te1 = chain((s_12, d_te12), (s_2, d_te2), (s_g, d_g1))
    q_te, q_g = deembed_path_te_k_partials(r.te1_k, r.g1_lin, lin, tp_in, lout, tp_out)[:2]
    # G_DUT = G1 L_in L_out with constant losses: dG_DUT_dB/dG1 = (10/ln 10)/G1
    return chain((q_te, d_te1), (q_g, d_g1)), chain((db_from_ratio_slope(r.g1_lin), d_g1))


Y_MINUS_ONE_MIN = 1e-6
"""Y - 1 below which a pair is refused as too close to 1 to evaluate.

Hot and cold then agree to six digits: the sensitivity to Y grows as 1/(Y - 1)^2 and a
first-order uncertainty means nothing; no noise source reaching the analyzer gives this. (The
numerical propagation this replaced failed at the same place, its 1e-6 relative step crossing
Y = 1.)
"""


def _y_too_close_to_one(freq_hz: float, what: str, y: float) -> MeasurementError:
    """Hot is above cold, but by so little that the model cannot be evaluated around it."""
    return MeasurementError(
        f"{what} at {format_frequency(freq_hz)}: Y - 1 = {y - 1.0:.2g}, the hot reading is above "
        "the cold "
        "one by too little to give a noise figure; the source's excess noise is barely reaching "
        "the analyzer: check that the noise source is driven and connected, that its ENR "
        "suits the DUT, and that the DUT is powered",
        freq_hz=freq_hz,
    )


# --------------------------------------------------------------------------- calibration


def _now() -> datetime:
    return datetime.now(timezone.utc)


class CalibrationPoint(BaseModel):
    """System calibration at one frequency: the measurement system without the DUT.

    ``te_k`` / ``nf_db`` are the system's (second stage's) noise temperature (K) and noise
    figure (dB) from the hot/cold densities, with ``u_te_k`` its statistical standard
    uncertainty. ``hot``/``cold`` keep the densities (with their acquisition settings).
    """

    model_config = ConfigDict(extra="forbid")

    freq_hz: float = Field(gt=0)
    hot: NoiseDensity
    cold: NoiseDensity
    enr_db: float
    u_enr_db: float | None = Field(default=0.0, ge=0)  # None: unknown (no table column)
    enr_extrapolated: bool = False
    enr_reference: EnrReference = "t0"
    cold_temperature_k: float = Field(gt=0)
    t0_k: float = Field(default=T0_K, gt=0)
    y_db: float
    te_k: float
    u_te_k: float = Field(ge=0)
    nf_db: float
    calibrated_at: datetime = Field(default_factory=_now)
    settings: AcquisitionSettings | None = None
    flags: list[PointFlag] = Field(default_factory=list)

    @property
    def noise_factor(self) -> float:
        """Linear noise factor F2 of the measurement system."""
        return 1.0 + self.te_k / self.t0_k


_SETTINGS_THAT_MATTER = (
    "rbw_hz",
    "rbw_filter",
    "vbw_hz",
    "detector",
    "averaging_scale",
    "ref_level_dbm",
    "attenuation_db",
    "preamp",
    "mode",
)


class SystemCalibration(BaseModel):
    """A set of calibration points (one per frequency) made with one set of settings."""

    model_config = ConfigDict(extra="forbid")

    points: list[CalibrationPoint] = Field(min_length=1)
    created_at: datetime = Field(default_factory=_now)
    notes: dict[str, str] = Field(default_factory=dict)

    @property
    def frequencies_hz(self) -> list[float]:
        return [p.freq_hz for p in self.points]

    def point_at(self, freq_hz: float) -> CalibrationPoint:
        """The calibration point at ``freq_hz`` (1 ppm match); InputError naming what exists."""
        f = check_number("freq_hz", freq_hz)
        for p in self.points:
            if math.isclose(p.freq_hz, f, rel_tol=FREQ_REL_TOL):
                return p
        freqs = self.frequencies_hz
        raise InputError(
            "freq_hz",
            f"{format_frequency(f, 9)} has no calibration point (calibrated "
            f"{len(freqs)} points, {format_frequency_range(min(freqs), max(freqs))})",
            fix="calibrate at the frequencies you measure",
        )

    def covers(self, freqs_hz: Iterable[float]) -> bool:
        """True when every frequency has a calibration point."""
        have = self.frequencies_hz
        return all(
            any(math.isclose(h, float(f), rel_tol=FREQ_REL_TOL) for h in have) for f in freqs_hz
        )

    def settings_match(self, settings: AcquisitionSettings) -> bool:
        """True when ``settings`` equal the calibration's in everything that changes the system
        noise (RBW and filter, VBW, detector, averaging scale, reference level, attenuation,
        preamp, sweep mode). Centre, span, points and averages do not matter."""
        for p in self.points:
            if p.settings is None:
                continue
            for name in _SETTINGS_THAT_MATTER:
                if getattr(p.settings, name) != getattr(settings, name):
                    return False
        return True


def calibrate_point(
    hot: NoiseDensity,
    cold: NoiseDensity,
    enr_db: float,
    *,
    cold_temperature_k: float,
    u_enr_db: float | None = 0.0,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
    enr_extrapolated: bool = False,
    y_min_db: float = DEFAULT_Y_MIN_DB,
    calibrated_at: datetime | None = None,
    require_significant_y: bool = True,
) -> CalibrationPoint:
    """Calibrate the measurement system at one frequency (noise source on the system input).

    ``hot``/``cold``: densities with the source on/off; ``enr_db``: the source's ENR at this
    frequency; ``cold_temperature_k``: the source's physical temperature (K) when off.
    ``u_enr_db``: the ENR's standard uncertainty, dB (None: unknown).
    Raises MeasurementError when hot <= cold or the system's Te comes out negative, and
    YNotSignificantError when hot - cold is within 4 standard uncertainties of zero.
    ``require_significant_y=False`` skips the refusal of a Y within 4 u(Y) of 1
    (``_common.check_y_significant``; planning only: the forecast and the averaging loops need
    the uncertainty a weak pair would have).
    """
    hot = check_density("hot", hot)
    cold = check_density("cold", cold)
    freq_hz = check_same_frequency(hot, {"cold": cold})
    enr_db = check_number("enr_db", enr_db)
    u_enr_db = _check_u_enr(u_enr_db)
    tc = check_temperature("cold_temperature_k", cold_temperature_k)
    t0 = check_temperature("t0_k", t0_k)
    ref = _check_reference(enr_reference)

    if require_significant_y:
        check_y_significant(hot, cold, freq_hz, "Y-factor calibration", "the system input")
    h, c = hot.density_w_per_hz, cold.density_w_per_hz
    y_arr, te2_arr, th = _te_of_pair(
        h, c, np.asarray(enr_db), tc, t0, ref, freq_hz, "Y-factor calibration"
    )
    te2, y = float(te2_arr), float(y_arr)
    if y - 1.0 <= Y_MINUS_ONE_MIN:
        raise _y_too_close_to_one(freq_hz, "Y-factor calibration", y)
    prop = linear_propagation(
        te2,
        _pair_sensitivities(h, c, float(th), tc, enr_db, t0, ref, ("h", "c", "enr"))[0],
        {"h": hot.u_density_w_per_hz, "c": cold.u_density_w_per_hz},
    )
    if te2 <= 0:
        raise MeasurementError(
            f"Y-factor calibration at {format_frequency(freq_hz)}: the system noise temperature "
            "came out "
            f"{te2:.1f} K (not > 0); check the ENR value, enr_reference and cold_temperature_k",
            freq_hz=freq_hz,
        )
    flags = density_flags([hot, cold], DEFAULT_SCATTER_LIMIT)
    if 10.0 * math.log10(y) < y_min_db:
        flags.append(PointFlag.Y_TOO_SMALL)
    if enr_extrapolated:
        flags.append(PointFlag.ENR_EXTRAPOLATED)
    return CalibrationPoint(
        freq_hz=freq_hz,
        hot=hot,
        cold=cold,
        enr_db=enr_db,
        u_enr_db=u_enr_db,
        enr_extrapolated=enr_extrapolated,
        enr_reference=ref,
        cold_temperature_k=tc,
        t0_k=t0,
        y_db=10.0 * math.log10(y),
        te_k=te2,
        u_te_k=float(prop.u()),
        nf_db=nf_db_from_te(te2, t0),
        calibrated_at=calibrated_at or _now(),
        settings=hot.settings,
        flags=flags,
    )


# --------------------------------------------------------------------------- one point


def y_factor_point(
    hot: NoiseDensity,
    cold: NoiseDensity,
    enr_db: float,
    *,
    cold_temperature_k: float,
    calibration: CalibrationPoint | None = None,
    u_enr_db: float | None = 0.0,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    y_min_db: float = DEFAULT_Y_MIN_DB,
    enr_extrapolated: bool = False,
    floor_warning_db: float = DEFAULT_FLOOR_WARNING_DB,
    low_gain_db: float = DEFAULT_LOW_GAIN_DB,
    scatter_limit: float = DEFAULT_SCATTER_LIMIT,
    require_significant_y: bool = True,
) -> PointResult:
    """NF, Te (and with a calibration, gain) of the DUT at one frequency by the Y-factor method.

    ``hot``/``cold``: densities with the DUT in place and the source on/off; ``enr_db``: ENR at
    this frequency; ``cold_temperature_k``: source physical temperature when off (K).
    ``u_enr_db``: the ENR's standard uncertainty, dB; None (unknown) is kept as None in
    ``notes["u_enr_db"]`` so that budgets list the ENR term as omitted.
    ``calibration``: the system calibration at this frequency; it enables the second-stage
    correction and the gain. Losses: ``input_loss_db`` between source and DUT input,
    ``output_loss_db`` after the DUT but outside the calibration path; physical temperatures
    default to the cold temperature (the bench's ambient).

    Flags: Y_TOO_SMALL (Y < ``y_min_db``), ENR_EXTRAPOLATED, LOW_GAIN (DUT gain <
    ``low_gain_db``), NEAR_ANALYZER_FLOOR (DUT noise at the system input less than
    ``floor_warning_db`` above the system's own noise), NEGATIVE_TE, SPURS_EXCLUDED /
    EXCESS_SCATTER. Raises MeasurementError when hot <= cold, naming the frequency, and
    YNotSignificantError when its or the calibration's hot - cold is within 4 standard
    uncertainties of zero (a dead source).
    ``require_significant_y=False`` skips the refusal of a Y within 4 u(Y) of 1
    (``_common.check_y_significant``; planning only: the forecast and the averaging loops need
    the uncertainty a weak pair would have).
    """
    hot = check_density("hot", hot)
    cold = check_density("cold", cold)
    densities = {"hot": hot, "cold": cold}
    if calibration is not None:
        if not isinstance(calibration, CalibrationPoint):
            raise InputError(
                "calibration",
                "must be a CalibrationPoint",
                fix="use calibrate_point() or SystemCalibration.point_at(freq_hz)",
            )
        densities.update(hot_cal=calibration.hot, cold_cal=calibration.cold)
    freq_hz = check_same_frequency(hot, {k: v for k, v in densities.items() if k != "hot"})
    enr_db = check_number("enr_db", enr_db)
    u_enr_db = _check_u_enr(u_enr_db)
    tc = check_temperature("cold_temperature_k", cold_temperature_k)
    t0 = check_temperature("t0_k", t0_k)
    ref = _check_reference(enr_reference)
    lin, lout, tp_in, tp_out = check_losses(
        input_loss_db, output_loss_db, input_loss_temperature_k, output_loss_temperature_k, tc
    )

    if calibration is not None and (calibration.enr_reference != ref or calibration.t0_k != t0):
        raise InputError(
            "calibration",
            f"was made with enr_reference="
            f"{calibration.enr_reference!r}, t0_k={calibration.t0_k} but the "
            f"measurement uses {ref!r}, {t0}",
            fix="calibrate and measure with the same ENR convention and T0",
        )
    # One ENR variable when calibration and measurement use the same value (same source and
    # frequency): the ENR error is then fully correlated (docs/references.md §9).
    enr_shared = calibration is None or calibration.enr_db == enr_db

    if require_significant_y:
        check_y_significant(hot, cold, freq_hz, "Y-factor measurement", "the DUT input")
    if require_significant_y and calibration is not None:
        check_y_significant(
            calibration.hot, calibration.cold, freq_hz, "Y-factor calibration", "the system input"
        )

    def core(h, c, hc, cc, enr, enr_cal) -> _Core:
        cal = None
        if calibration is not None:
            cal = _Cal(
                hc, cc, enr if enr_shared else enr_cal, np.asarray(calibration.cold_temperature_k)
            )
        return _core(h, c, enr, tc, t0, ref, cal, lin, tp_in, lout, tp_out, freq_hz)

    values = {
        "h": hot.density_w_per_hz,
        "c": cold.density_w_per_hz,
        "hc": calibration.hot.density_w_per_hz if calibration else 1.0,
        "cc": calibration.cold.density_w_per_hz if calibration else 1.0,
        "enr": enr_db,
        "enr_cal": calibration.enr_db if calibration else enr_db,
    }
    u_stat = {"h": hot.u_density_w_per_hz, "c": cold.u_density_w_per_hz}
    if calibration is not None:
        u_stat.update(hc=calibration.hot.u_density_w_per_hz, cc=calibration.cold.u_density_w_per_hz)
    u_enr = {"enr": u_enr_db or 0.0}
    if not enr_shared:
        u_enr["enr_cal"] = calibration.u_enr_db or 0.0  # type: ignore[union-attr]

    try:
        result = core(**{k: np.asarray(v) for k, v in values.items()})
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="y_factor") from None
    closest = values["h"] / values["c"]
    if calibration is not None:
        closest = min(closest, values["hc"] / values["cc"])
    if closest - 1.0 <= Y_MINUS_ONE_MIN:
        raise _y_too_close_to_one(freq_hz, "Y-factor measurement", float(result.y))
    sens_te, sens_gain = _core_sensitivities(
        values,
        "enr" if enr_shared else "enr_cal",
        tc,
        calibration.cold_temperature_k if calibration else None,
        t0,
        ref,
        lin,
        tp_in,
        lout,
        tp_out,
        result,
    )
    props = {"te": linear_propagation(float(result.te_dut_k), sens_te, u_stat | u_enr)}
    if sens_gain is not None:
        assert result.gain_dut_lin is not None  # a calibration gives the gain (see _core)
        props["gain_db"] = linear_propagation(
            float(db_from_ratio(result.gain_dut_lin)), sens_gain, u_stat | u_enr
        )

    te_k = float(result.te_dut_k)
    check_te_plausible(
        te_k,
        float(props["te"].u()),
        freq_hz,
        "Y-factor",
        "Y is larger than the noise source's Th/Tc allows; check the ENR table (right source, "
        "right frequency, enr_reference), cold_temperature_k, that the DUT is powered and the "
        "calibration was made on this path",
    )
    if te_k <= -t0:
        raise MeasurementError(
            f"Y-factor at {format_frequency(freq_hz)}: noise factor <= 0 (Te = {te_k:.1f} K); Y "
            "is larger "
            "than the source's Th/Tc allows: check the ENR, the cold temperature and the "
            "calibration",
            freq_hz=freq_hz,
        )
    nf_db = nf_db_from_te(te_k, t0)
    dnf_dte = DB_PER_NEPER_POWER / (t0 + te_k)
    names = {
        "h": "hot",
        "c": "cold",
        "hc": "hot_cal",
        "cc": "cold_cal",
        "enr": "enr",
        "enr_cal": "enr_cal",
    }
    te_prop = props["te"]
    u_te_k = float(te_prop.u(u_stat))
    contributions = {names[k]: float(v) * dnf_dte for k, v in te_prop.contributions.items()}
    y_db = 10.0 * math.log10(float(result.y))

    flags = density_flags(densities.values(), scatter_limit)
    if y_db < y_min_db:
        flags.append(PointFlag.Y_TOO_SMALL)
    if enr_extrapolated or (calibration is not None and calibration.enr_extrapolated):
        flags.append(PointFlag.ENR_EXTRAPOLATED)
    if calibration is not None:  # the calibration's own flags travel with the point
        flags += [f for f in calibration_point_flags(calibration.flags) if f not in flags]

    gain_db = u_gain_db = margin = correction = nf_uncorrected = None
    if calibration is not None:
        # a calibration always gives the DUT gain, G1 and the uncorrected Te (see _core)
        assert result.gain_dut_lin is not None and result.g1_lin is not None
        assert result.te2_k is not None and result.te_dut_uncorrected_k is not None
        gain_db = 10.0 * math.log10(float(result.gain_dut_lin))
        u_gain_db = float(props["gain_db"].u(u_stat))
        g1, te1, te2 = float(result.g1_lin), float(result.te1_k), float(result.te2_k)
        margin = margin_db((tc + te1) * g1, te2)
        nf_uncorrected = nf_db_from_te(float(result.te_dut_uncorrected_k), t0)
        correction = nf_uncorrected - nf_db

    return build_point_result(
        freq_hz=freq_hz,
        method=Method.Y_FACTOR,
        nf_db=nf_db,
        te_k=te_k,
        u_nf_db=u_te_k * dnf_dte,
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
        y_db=y_db,
        u_gain_db=u_gain_db,
        floor_correction_db=correction,
        enr_db=enr_db,
        source_temperature_k=tc,
        notes={
            "u_enr_db": u_enr_db,
            "enr_correlated": enr_shared,
            "enr_reference": ref,
            "cal_enr_db": calibration.enr_db if calibration else None,
            "cal_cold_temperature_k": calibration.cold_temperature_k if calibration else None,
            "system_te_k": calibration.te_k if calibration else None,
            "system_nf_db": calibration.nf_db if calibration else None,
            "cal_y_db": calibration.y_db if calibration else None,
            "nf_uncorrected_db": nf_uncorrected,
            "input_loss_db": input_loss_db,
            "input_loss_temperature_k": tp_in,
            "output_loss_db": output_loss_db,
            "output_loss_temperature_k": tp_out,
        },
    )


# --------------------------------------------------------------------------- whole sweeps


class YFactorSweep(NamedTuple):
    """Array results of :func:`y_factor_sweep` (one element per frequency)."""

    nf_db: np.ndarray
    te_k: np.ndarray
    y_db: np.ndarray
    gain_db: np.ndarray | None  # only with a calibration
    nf_uncorrected_db: np.ndarray | None  # before the second-stage correction


def y_factor_sweep(
    hot_w_per_hz: ArrayLike,
    cold_w_per_hz: ArrayLike,
    enr_db: ArrayLike,
    *,
    cold_temperature_k: ArrayLike,
    hot_cal_w_per_hz: ArrayLike | None = None,
    cold_cal_w_per_hz: ArrayLike | None = None,
    cal_enr_db: ArrayLike | None = None,
    cal_cold_temperature_k: ArrayLike | None = None,
    t0_k: float = T0_K,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    freq_hz: ArrayLike | None = None,
) -> YFactorSweep:
    """Y-factor NF over whole frequency arrays at once (no flags, no uncertainty).

    Same physics as :func:`y_factor_point`. Calibration arrays (``hot_cal_w_per_hz``,
    ``cold_cal_w_per_hz``) enable the second-stage correction; their ENR and cold temperature
    default to the measurement's. ``freq_hz`` only names the frequency in error messages.
    """
    dens = "pass linear densities in W/Hz"
    hot = _positive("hot_w_per_hz", hot_w_per_hz, dens)
    cold = _positive("cold_w_per_hz", cold_w_per_hz, dens)
    enr = checked_array("enr_db", enr_db)
    tc = _positive("cold_temperature_k", cold_temperature_k, _KELVIN_FIX)
    t0 = check_temperature("t0_k", t0_k)
    ref = _check_reference(enr_reference)
    lin, lout, tp_in, tp_out = check_losses(
        input_loss_db, output_loss_db, input_loss_temperature_k, output_loss_temperature_k, tc
    )
    cal = None
    if (hot_cal_w_per_hz is None) != (cold_cal_w_per_hz is None):
        raise InputError(
            "hot_cal_w_per_hz",
            "and cold_cal_w_per_hz go together",
            fix="pass both calibration arrays or neither",
        )
    if hot_cal_w_per_hz is not None and cold_cal_w_per_hz is not None:
        cal = _Cal(
            _positive("hot_cal_w_per_hz", hot_cal_w_per_hz, dens),
            _positive("cold_cal_w_per_hz", cold_cal_w_per_hz, dens),
            enr if cal_enr_db is None else checked_array("cal_enr_db", cal_enr_db),
            tc
            if cal_cold_temperature_k is None
            else _positive("cal_cold_temperature_k", cal_cold_temperature_k, _KELVIN_FIX),
        )
    r = _core(hot, cold, enr, tc, t0, ref, cal, lin, tp_in, lout, tp_out, freq_hz)
    if np.any(r.te_dut_k <= -t0):
        raise MeasurementError(
            f"Y-factor at {_where(freq_hz, r.te_dut_k <= -t0)}: noise "
            "factor <= 0; check the ENR, the cold temperature and the "
            "calibration"
        )
    return YFactorSweep(
        nf_db=nf_db_from_te_k(r.te_dut_k, t0),
        te_k=r.te_dut_k,
        y_db=db_from_ratio(r.y),
        gain_db=None if r.gain_dut_lin is None else db_from_ratio(r.gain_dut_lin),
        nf_uncorrected_db=None
        if r.te_dut_uncorrected_k is None
        else nf_db_from_te_k(r.te_dut_uncorrected_k, t0),
    )


def y_factor_nf_db(
    hot_w_per_hz: ArrayLike,
    cold_w_per_hz: ArrayLike,
    enr_db: ArrayLike,
    *,
    cold_temperature_k: ArrayLike,
    **kwargs,
) -> np.ndarray:
    """NF in dB over frequency arrays; the keyword arguments are those of y_factor_sweep."""
    return y_factor_sweep(
        hot_w_per_hz, cold_w_per_hz, enr_db, cold_temperature_k=cold_temperature_k, **kwargs
    ).nf_db
