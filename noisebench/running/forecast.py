"""Forecast a plan without touching an instrument: instrument time and expected uncertainty.

For each group of points (the sequencer's grouping) the forecast

1. takes the analyzer settings: on a ``sim://`` bench the simulated analyzer's own rounding and
   sweep-time model (a model, no instrument); otherwise the plan's settings with the swept
   sweep time ``k * span / (RBW * min(RBW, VBW))`` (``expect.sweep_time_factor``, common
   practice k = 2.5) and ``detector_samples = B_stat * sweep_time / points``;
2. predicts the relative variance of one trace's band-averaged density from the radiometer
   equation in the form the estimator uses: the point model of the detector and averaging scale
   (:mod:`noisebench.science.detection`) times the correlation sum of the points in the band
   (:func:`noisebench.science.filters.frequency_power_correlation`); in zero span with a power
   detector
   it is the radiometer equation itself, ``1 / (B_stat * sweep_time)``;
3. builds the densities the method will read from the priors (DUT NF and gain, analyzer NF,
   ENR, temperatures: ``[expect]`` or, on the simulator, the scenario's declared models) and
   propagates their relative uncertainty through the method itself, which gives the NF
   uncertainty for one average per reading (and the Y significance (Y - 1)/u(Y));
4. plays the schedule the sequencer will run through with those uncertainties
   (:mod:`noisebench.running.forecast_schedule`): sweep-level Y-factor blocks (a pilot round
   of every group, two noise-source switches per block) or group-by-group rounds, each round
   planned as the sequencer plans it from ``u ~ 1/sqrt(averages)``, capped by the limits. That
   gives the averages, acquisitions, switches and instrument time, and the groups whose
   calibration Y will not be significant within the time limit (refused by the run: the
   forecast warns, with the time limit that would do).

It is a forecast: the adaptive sequencer measures what it needs; the forecast says what to
expect and which points will hit their time limit.

Size: one job, the forecast of a plan; the priors (declared or from a bench model, amplifiers
and converters), the per-point uncertainty and the time model share the plan look-ups, and the
sequencer imports its sizing helpers from here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from noisebench.bench.acquisition import AcquisitionSettings, Detector, SweepMode
from noisebench.bench.instruments import Analyzer
from noisebench.errors import InputError, MeasurementError
from noisebench.running.forecast_schedule import Timing
from noisebench.running.groups import PointGroup, plan_groups
from noisebench.running.plan import Plan
from noisebench.science.density import NoiseDensity
from noisebench.science.filters import GAUSSIAN, frequency_power_correlation
from noisebench.science.methods._common import Y_SIGNIFICANCE_SIGMAS
from noisebench.science.physics import (
    BOLTZMANN_J_PER_K,
    T0_K,
    ratio_from_db,
    source_hot_temperature_k,
    te_k_from_nf_db,
    thermal_density_w_per_hz,
    two_port_output_temperature_k,
    two_response_temperature_k,
)
from noisebench.science.point import Method
from noisebench.units import format_frequency

DEFAULT_ZERO_SPAN_SWEEP_S = 1e-3
MIN_SWEEP_TIME_S = 1e-3  # common practice: analyzers rarely sweep faster than about 1 ms
CORRELATION_FLOOR = 1e-6


# --------------------------------------------------------------------------- radiometer


def band_relative_variance(
    settings: AcquisitionSettings, freq_hz: float, band_hz: float | None
) -> float:
    """Predicted Var/mean^2 of one trace's density estimate over ``band_hz`` around ``freq_hz``.

    Uses the applied settings (averages, detector samples, filter shape, points)."""
    from noisebench.science.detection import point_model_for

    model = point_model_for(settings, field="settings")
    rel_var_point = model.relative_variance()
    bstat = settings.rbw_filter.stat_bw_hz(settings.rbw_hz)
    if settings.span_hz == 0 or settings.points == 1:
        sweep = settings.sweep_time_s or DEFAULT_ZERO_SPAN_SWEEP_S
        if settings.detector is not Detector.SAMPLE:
            return 1.0 / (settings.averages * max(1.0, bstat * sweep))  # radiometer equation
        return rel_var_point * min(1.0, 1.0 / settings.points + 1.0 / (bstat * sweep))
    freqs = settings.frequencies_hz()
    half = (band_hz if band_hz is not None else settings.span_hz) / 2
    n = int(np.count_nonzero(np.abs(freqs - freq_hz) <= half * (1 + 1e-9)))
    if n < 1:
        raise InputError(
            "band_hz", f"the band around {format_frequency(freq_hz)} holds no trace point"
        )
    spacing = settings.span_hz / (settings.points - 1)
    lags = np.arange(1, n, dtype=float)
    rho = frequency_power_correlation(settings.rbw_filter, lags * spacing, settings.rbw_hz)
    corr = model.correlation(rho) if lags.size else np.zeros(0)
    s1 = n + 2.0 * float(np.sum((n - lags) * corr))
    return rel_var_point * s1 / n**2


def swept_time_s(span_hz: float, rbw_hz: float, vbw_hz: float | None, factor: float) -> float:
    """Sweep time of a swept analyzer, ``k span / (RBW min(RBW, VBW))``, at least 1 ms, s."""
    narrow = min(rbw_hz, vbw_hz) if vbw_hz else rbw_hz
    return max(MIN_SWEEP_TIME_S, factor * span_hz / (rbw_hz * narrow))


def nominal_settings(
    group: PointGroup, averages: int, sweep_time_factor: float
) -> AcquisitionSettings:
    """Settings a generic swept analyzer would apply for ``group`` (no rounding)."""
    p = group.policy
    if group.span_hz == 0:
        sweep = p.sweep_time_s or DEFAULT_ZERO_SPAN_SWEEP_S
    else:
        sweep = p.sweep_time_s or swept_time_s(group.span_hz, p.rbw_hz, p.vbw_hz, sweep_time_factor)
    samples = None
    if p.detector is not Detector.SAMPLE:
        samples = max(1.0, round(GAUSSIAN.stat_bw_hz(p.rbw_hz) * sweep / group.trace_points))
    return AcquisitionSettings(
        center_hz=group.center_hz,
        span_hz=group.span_hz,
        rbw_hz=p.rbw_hz,
        vbw_hz=p.vbw_hz,
        detector=p.detector,
        averaging_scale=p.averaging_scale,
        averages=averages,
        points=group.trace_points,
        attenuation_db=p.attenuation_db,
        preamp=p.preamp,
        mode=SweepMode.SWEPT,
        sweep_time_s=sweep,
        detector_samples=samples,
    )


# --------------------------------------------------------------------------- priors


@dataclass(frozen=True)
class ConverterPriors:
    """A frequency-converting DUT's point: its plan and the ENR at the image and the IF."""

    rf_hz: float
    lo_hz: float
    image_rejection_db: float | None  # None: no image response
    enr_image_db: float | None
    enr_if_db: float | None
    nf_type: str


@dataclass(frozen=True)
class Priors:
    """What is expected at one frequency: densities at the analyzer, W/Hz (relative scale)."""

    readings: dict[str, float]  # dut/floor or hot/cold/hot_cal/cold_cal
    enr_db: float | None
    gain_db: float
    source_temperature_k: float
    t0_k: float
    conversion: ConverterPriors | None = None  # a converter: readings at the IF

    @property
    def y_factor_enr_db(self) -> float:
        """The ENR, dB, that a Y-factor forecast needs (None only for the gain method)."""
        if self.enr_db is None:
            raise InputError(
                "expect.enr_db",
                "is needed to forecast a Y-factor plan",
                fix="declare enr_db in [expect] or an ENR table in [enr]",
            )
        return self.enr_db


class BenchModel(Protocol):
    """A model of the bench a forecast can ask (a back end may supply one through
    :func:`noisebench.bench.registry.bench_model`; the simulated bench does)."""

    @property
    def analyzer(self) -> Analyzer:
        """An analyzer to configure: its applied settings and acquisition times."""

    @property
    def settle_time_s(self) -> float:
        """The noise source's settling time, s."""

    def source_temperature_k(self, y_factor: bool) -> float:
        """The source's (Y-factor) or termination's (gain method) temperature, K."""

    def expected_readings(
        self, freq_hz: float, y_factor: bool
    ) -> tuple[dict[str, float], float | None, float, float]:
        """(densities W/Hz by reading, ENR dB or None, DUT path gain dB, source temperature K)."""

    def expected_conversion(
        self, rf_hz: float, lo_hz: float, lo_dbm: float | None
    ) -> dict[str, float]:
        """A converter DUT at (RF, LO): ``te_ssb_k``, ``gain_signal_db``,
        ``image_rejection_db`` (inf: none), ``analyzer_te_k`` (at the IF) and the ENR table's
        ``enr_rf_table_db``, ``enr_image_table_db``, ``enr_if_table_db``."""


def _declared_priors(plan: Plan, freq_hz: float, source_k: float) -> Priors:
    e = plan.expect
    missing = [
        name
        for name, value in (
            ("dut_nf_db", e.dut_nf_db),
            ("dut_gain_db", e.dut_gain_db),
            ("analyzer_nf_db", e.analyzer_nf_db),
        )
        if value is None
    ]
    if plan.method is Method.Y_FACTOR and e.enr_db is None and plan.enr.table is None:
        missing.append("enr_db")
    if missing:
        raise InputError(
            f"expect.{missing[0]}",
            "is needed to forecast a plan on real instruments",
            fix=f"declare {', '.join(missing)} in [expect]",
        )
    t0 = plan.corrections.t0_k
    te1 = float(te_k_from_nf_db(e.dut_nf_db, t0))  # type: ignore[arg-type]
    te_sa = float(te_k_from_nf_db(e.analyzer_nf_db, t0))  # type: ignore[arg-type]
    g = float(ratio_from_db(e.dut_gain_db))  # type: ignore[arg-type]
    enr_db = e.enr_db
    if plan.method is Method.Y_FACTOR and enr_db is None:
        from noisebench.science.enr import EnrTable

        table = EnrTable.from_csv(plan.resolve_path(str(plan.enr.table)))
        enr_db = float(table.at(freq_hz, extrapolate="clamp").enr_db)
    k = BOLTZMANN_J_PER_K
    ts = source_k
    if plan.method is Method.GAIN:
        readings = {"dut": k * (g * (ts + te1) + te_sa), "floor": k * (ts + te_sa)}
    else:
        th = float(source_hot_temperature_k(ratio_from_db(enr_db), ts, t0))  # type: ignore[arg-type]
        readings = {
            "hot": k * (g * (th + te1) + te_sa),
            "cold": k * (g * (ts + te1) + te_sa),
            "hot_cal": k * (th + te_sa),
            "cold_cal": k * (ts + te_sa),
        }
    return Priors(readings, enr_db, float(e.dut_gain_db), ts, t0)  # type: ignore[arg-type]


def _converter_priors(
    plan: Plan, group: PointGroup, if_hz: float, source_k: float, model: BenchModel | None
) -> Priors:
    """Readings at the IF of a converter point (eq. 1 of science/conversion.py, losses left
    out): the signal band and the image band's share ``r`` both carry the source's noise."""
    from noisebench.running.conversion import ImageRejection

    conv = plan.conversion
    assert conv is not None and group.lo_hz is not None
    rf, lo = group.rf_of(if_hz), group.lo_hz
    image = 2.0 * lo - rf
    rejection = ImageRejection(conv, plan.resolve_path).at(rf)
    t0 = plan.corrections.t0_k
    r = 0.0 if rejection is None else float(ratio_from_db(-rejection))
    if model is not None:
        truth = model.expected_conversion(rf, lo, conv.lo.level_dbm)
        te_ssb, gain_db = truth["te_ssb_k"], truth["gain_signal_db"]
        te_sa = truth["analyzer_te_k"]
        enr: tuple[float | None, ...] = (
            truth["enr_rf_table_db"],
            truth["enr_image_table_db"],
            truth["enr_if_table_db"],
        )
    else:
        e = plan.expect
        declared = _declared_priors(plan, if_hz, source_k)  # checks what [expect] must hold
        nf = float(e.dut_nf_db)  # type: ignore[arg-type]
        f_ssb = float(ratio_from_db(nf)) * ((1.0 + r) if conv.nf_type == "dsb" else 1.0)
        te_ssb = t0 * (f_ssb - 1.0 - r)
        gain_db = declared.gain_db
        te_sa = float(te_k_from_nf_db(e.analyzer_nf_db, t0))  # type: ignore[arg-type]
        enr = tuple(_declared_enr_db(plan, f) for f in (rf, image, if_hz))
    gs = float(ratio_from_db(gain_db))
    ts = source_k

    def at_if(t_signal: float, t_image: float) -> float:
        t_in = two_response_temperature_k(t_signal, t_image, r)
        return float(
            thermal_density_w_per_hz(two_port_output_temperature_k(t_in, gs, te_ssb) + te_sa)
        )

    if plan.method is Method.GAIN:
        readings = {"dut": at_if(ts, ts), "floor": float(thermal_density_w_per_hz(ts + te_sa))}
        enr_rf = enr_img = enr_if = None
    else:
        enr_rf, enr_img, enr_if = (float(x) if x is not None else None for x in enr)
        th_s = float(source_hot_temperature_k(ratio_from_db(enr_rf), ts, t0))  # type: ignore[arg-type]
        th_i = float(source_hot_temperature_k(ratio_from_db(enr_img), ts, t0))  # type: ignore[arg-type]
        th_if = float(source_hot_temperature_k(ratio_from_db(enr_if), ts, t0))  # type: ignore[arg-type]
        readings = {
            "hot": at_if(th_s, th_i),
            "cold": at_if(ts, ts),
            "hot_cal": float(thermal_density_w_per_hz(th_if + te_sa)),
            "cold_cal": float(thermal_density_w_per_hz(ts + te_sa)),
        }
    conversion = ConverterPriors(rf, lo, rejection, enr_img, enr_if, conv.nf_type)
    return Priors(readings, enr_rf, gain_db, ts, t0, conversion)


def _declared_enr_db(plan: Plan, freq_hz: float) -> float | None:
    if plan.method is not Method.Y_FACTOR:
        return None
    if plan.expect.enr_db is not None:
        return float(plan.expect.enr_db)
    from noisebench.science.enr import EnrTable

    table = EnrTable.from_csv(plan.resolve_path(str(plan.enr.table)))
    return float(table.at(freq_hz, extrapolate="clamp").enr_db)


def _model_priors(plan: Plan, model: BenchModel, freq_hz: float) -> Priors:
    readings, enr, gain, ts = model.expected_readings(freq_hz, plan.method is Method.Y_FACTOR)
    return Priors(readings, enr, gain, ts, plan.corrections.t0_k)


# --------------------------------------------------------------------------- one point


def _density(freq_hz: float, value: float, rel_u: float) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=value, u_density_w_per_hz=value * rel_u)


def point_uncertainty_db(
    method: Method, freq_hz: float, priors: Priors, rel_u: dict[str, float]
) -> float:
    """NF standard uncertainty (dB) for readings with relative uncertainties ``rel_u``."""
    r = priors.readings
    if priors.conversion is not None:
        return _converter_uncertainty_db(method, freq_hz, priors, rel_u)
    if method is Method.GAIN:
        from noisebench.science.methods.gain import gain_method_point

        point = gain_method_point(
            _density(freq_hz, r["dut"], rel_u.get("dut", 0.0)),
            priors.gain_db,
            floor=_density(freq_hz, r["floor"], rel_u.get("floor", 0.0)),
            source_temperature_k=priors.source_temperature_k,
            t0_k=priors.t0_k,
        )
        return point.u_nf_db
    from noisebench.science.methods.yfactor import calibrate_point, y_factor_point

    cal = calibrate_point(
        _density(freq_hz, r["hot_cal"], rel_u.get("hot_cal", 0.0)),
        _density(freq_hz, r["cold_cal"], rel_u.get("cold_cal", 0.0)),
        float(priors.y_factor_enr_db),
        cold_temperature_k=priors.source_temperature_k,
        t0_k=priors.t0_k,
        require_significant_y=False,  # a model: at one average even a good Y is within 4 u
    )
    point = y_factor_point(
        _density(freq_hz, r["hot"], rel_u.get("hot", 0.0)),
        _density(freq_hz, r["cold"], rel_u.get("cold", 0.0)),
        float(priors.y_factor_enr_db),
        cold_temperature_k=priors.source_temperature_k,
        calibration=cal,
        t0_k=priors.t0_k,
        require_significant_y=False,
    )
    return point.u_nf_db


def _converter_uncertainty_db(
    method: Method, if_hz: float, priors: Priors, rel_u: dict[str, float]
) -> float:
    from noisebench.science.methods.converter import (
        converter_gain_method_point,
        converter_y_factor_point,
    )
    from noisebench.science.methods.yfactor import calibrate_point

    c, r = priors.conversion, priors.readings
    assert c is not None
    common: dict[str, Any] = dict(
        rf_hz=c.rf_hz,
        lo_hz=c.lo_hz,
        image_rejection_db=c.image_rejection_db,
        nf_type=c.nf_type,
        t0_k=priors.t0_k,
    )
    if method is Method.GAIN:
        return converter_gain_method_point(
            _density(if_hz, r["dut"], rel_u.get("dut", 0.0)),
            priors.gain_db,
            floor=_density(if_hz, r["floor"], rel_u.get("floor", 0.0)),
            source_temperature_k=priors.source_temperature_k,
            **common,
        ).u_nf_db
    cal = calibrate_point(
        _density(if_hz, r["hot_cal"], rel_u.get("hot_cal", 0.0)),
        _density(if_hz, r["cold_cal"], rel_u.get("cold_cal", 0.0)),
        float(c.enr_if_db),  # type: ignore[arg-type]
        cold_temperature_k=priors.source_temperature_k,
        t0_k=priors.t0_k,
        require_significant_y=False,  # a model: at one average even a good Y is within 4 u
    )
    return converter_y_factor_point(
        _density(if_hz, r["hot"], rel_u.get("hot", 0.0)),
        _density(if_hz, r["cold"], rel_u.get("cold", 0.0)),
        enr_rf_db=float(priors.enr_db),  # type: ignore[arg-type]
        enr_image_db=c.enr_image_db,
        cold_temperature_k=priors.source_temperature_k,
        calibration=cal,
        require_significant_y=False,
        **common,
    ).u_nf_db


@dataclass(frozen=True)
class PointForecast:
    """Forecast for one frequency: averages (all readings), instrument time (s), u (dB)."""

    freq_hz: float
    averages: int
    calibration_averages: int
    time_s: float
    calibration_time_s: float
    u_nf_db: float
    target_u_nf_db: float
    # None, "time_limit", "max_averages", "calibration", "no signal", "weak Y" (the sequencer
    # will refuse the point: its Y is not significant within the time limit)
    limited_by: str | None
    rf_hz: float | None = None  # a converter's RF (freq_hz is then the IF the analyzer reads)


@dataclass
class PlanForecast:
    """The points' forecasts and the schedule's totals: ``schedule`` (``per_sweep`` or
    ``per_group``), noise-source ``switches`` and their ``settle_time_s``, analyzer
    acquisitions (``traces``) and their ``trace_averages``; ``warnings``: one line each with
    the fix (e.g. a time limit too tight for a weak Y)."""

    points: list[PointForecast]
    schedule: str = "per_group"
    switches: int = 0
    settle_time_s: float = 0.0
    traces: int = 0
    trace_averages: int = 0
    warnings: list[str] = field(default_factory=list)

    @property
    def measurement_time_s(self) -> float:
        return sum(p.time_s for p in self.points)

    @property
    def calibration_time_s(self) -> float:
        return sum(p.calibration_time_s for p in self.points)

    @property
    def total_time_s(self) -> float:
        return self.measurement_time_s + self.calibration_time_s

    def format(self) -> str:
        from noisebench.running.progress import format_duration, format_freq

        converter = any(p.rf_hz is not None for p in self.points)
        lines = [
            (f"{'RF':>12} {'IF':>12} " if converter else f"{'freq':>12} ")
            + f"{'averages':>9} {'cal avg':>8} {'time':>10} {'u NF dB':>8} {'target':>7}  note"
        ]
        for p in self.points:
            where = format_freq(p.freq_hz)
            if converter:
                where = f"{format_freq(p.rf_hz or p.freq_hz):>12} {where:>12}"
            lines.append(
                f"{where:>12} {p.averages:>9d} "
                f"{p.calibration_averages:>8d} {format_duration(p.time_s):>10} "
                f"{p.u_nf_db:>8.4f} {p.target_u_nf_db:>7.3f}  {p.limited_by or ''}"
            )
        limited = sum(1 for p in self.points if p.limited_by)
        lines.append(
            f"{len(self.points)} points: measurement "
            f"{format_duration(self.measurement_time_s)}, calibration "
            f"{format_duration(self.calibration_time_s)}, total "
            f"{format_duration(self.total_time_s)} of instrument time"
            + (f"; {limited} point(s) will not reach the target" if limited else "")
        )
        schedule = "sweep-level blocks" if self.schedule == "per_sweep" else "group by group"
        lines.append(
            f"schedule: {schedule}; {self.switches} noise-source switches "
            f"({format_duration(self.settle_time_s)} settling), {self.traces} acquisitions"
        )
        lines += [f"warning: {w}" for w in self.warnings]
        return "\n".join(lines)


def _max_per_trace(plan: Plan, analyzer: Any) -> int | None:
    """Most averages per trace: the analyzer's, else the plan's analyzer profile's."""
    if analyzer is not None:
        value = analyzer.max_averages_per_trace
        return None if value is None else int(value)
    from noisebench.running.profile_check import _profile_of

    profile = _profile_of(plan)
    if profile is None or profile.analyzer is None:
        return None
    value = profile.analyzer.settings.averages.max
    return None if value is None else int(value)


def _group_settings(
    plan: Plan, group: PointGroup, analyzer: Any
) -> tuple[AcquisitionSettings, Timing]:
    """(applied settings for 1 average, trace timing)."""
    most = _max_per_trace(plan, analyzer)
    if analyzer is not None:
        one = analyzer.configure(group.request(1))
        t1 = analyzer.expected_acquisition_time_s()
        analyzer.configure(group.request(11))
        t11 = analyzer.expected_acquisition_time_s()
        per_average = (t11 - t1) / 10.0
        return one, Timing(per_average, max(t1 - per_average, 0.0), most)
    settings = nominal_settings(group, 1, plan.expect.sweep_time_factor)
    assert settings.sweep_time_s is not None  # nominal_settings always sets it
    return settings, Timing(float(settings.sweep_time_s), plan.expect.overhead_s, most)


def _switched(plan: Plan, groups: int, settle_s: float) -> bool:
    """``SwitchedSweep._switched``: whether the run reads Y-factor in sweep-level blocks."""
    if plan.method is not Method.Y_FACTOR or plan.conversion is not None:
        return False
    mode = plan.switching.mode
    if mode != "auto":
        return mode == "per_sweep"
    return groups > 1 and settle_s > 0


def _block_limit_s(plan: Plan) -> float:
    """``SwitchedSweep._block_limit_s``."""
    from noisebench.running.sequencer_switched import CURVATURE_SHARE

    sw = plan.switching
    limit = sw.max_block_s
    if sw.drift_curvature_db_per_s2:
        target = plan.acquisition.target_u_nf_db
        limit = min(limit, math.sqrt(2 * CURVATURE_SHARE * target / sw.drift_curvature_db_per_s2))
    return limit


@dataclass
class _PointNeed:
    freq_hz: float
    rf_hz: float | None
    target: float
    meas_u1: float = math.inf  # inf: no signal
    fix_u1: float = 0.0
    cal_u1: float = 0.0
    cal_z1: float = math.inf
    meas_z1: float = math.inf


def forecast_plan(plan: Plan, *, model: BenchModel | None = None) -> PlanForecast:
    """Forecast every point of ``plan``: the schedule the sequencer will run (sweep-level
    blocks or group by group, :mod:`noisebench.running.forecast_schedule`) played through
    with the uncertainties the radiometer equation predicts.

    ``model``: a model of the bench (None: the one the plan's bench address offers, e.g. the
    simulated bench's, else the plan's ``[expect]`` priors)."""
    from noisebench.running.forecast_schedule import GroupNeed, play_per_group, play_per_sweep

    if model is None:
        from noisebench.bench.registry import bench_model

        model = bench_model(plan.bench)
    source_k = _source_temperature(plan, model)
    settle_s = model.settle_time_s if model is not None else plan.bench.noise_source.settle_time_s
    from noisebench.bench.registry import settings_analyzer

    analyzer = settings_analyzer(plan.bench, model)
    y_factor = plan.method is Method.Y_FACTOR
    calibrated_ifs: set[float] = set()
    needs: list[tuple[PointGroup, list[_PointNeed]]] = []
    groups: list[GroupNeed] = []
    for group in plan_groups(plan.points()):
        settings, timing = _group_settings(plan, group, analyzer)
        points = []
        for f in group.freqs_hz:
            if plan.conversion is not None:
                priors = _converter_priors(plan, group, f, source_k, model)
            elif model is not None:
                priors = _model_priors(plan, model, f)
            else:
                priors = _declared_priors(plan, f, source_k)
            rel = math.sqrt(band_relative_variance(settings, f, group.band_hz))
            points.append(_point_need(plan, group, f, priors, rel))
        needs.append((group, points))
        live = [p for p in points if math.isfinite(p.meas_u1)]
        if not live:
            continue
        calibrate = True
        if plan.conversion is not None:  # calibrations are found by IF: a fixed IF once
            calibrate = not set(group.freqs_hz) <= calibrated_ifs
            calibrated_ifs.update(group.freqs_hz)
        groups.append(
            GroupNeed(
                index=group.index,
                share=len(group.freqs_hz),
                policy=group.policy,
                timing=timing,
                y_factor=y_factor,
                cal_u1=max(p.cal_u1 for p in live),
                cal_target=plan.calibration.target_ratio * group.policy.target_u_nf_db,
                meas_u1=[p.meas_u1 for p in live],
                fix_u1=[p.fix_u1 for p in live],
                cal_z1=min(p.cal_z1 for p in live),
                meas_z1=min(p.meas_z1 for p in live),
                calibrate=calibrate,
            )
        )
    if _switched(plan, len(groups), settle_s):
        played = play_per_sweep(groups, settle_s, _block_limit_s(plan))
    else:
        guard = plan.safety.dut_max_gain_db is None or plan.expect.dut_nf_db is None
        played = play_per_group(groups, settle_s, cold_look=y_factor and guard)
    return _assemble(plan, needs, played)


def _point_need(
    plan: Plan, group: PointGroup, freq_hz: float, priors: Priors, rel1: float
) -> _PointNeed:
    """The point's uncertainties and Y significance at one average per reading."""
    meas, cal = (
        (("hot", "cold"), ("hot_cal", "cold_cal"))
        if plan.method is Method.Y_FACTOR
        else (("dut",), ("floor",))
    )
    rf = priors.conversion.rf_hz if priors.conversion is not None else None
    need = _PointNeed(freq_hz, rf, group.policy.target_u_nf_db)
    try:
        need.meas_u1 = point_uncertainty_db(plan.method, freq_hz, priors, dict.fromkeys(meas, rel1))
        need.cal_u1 = _calibration_design_u1(plan, freq_hz, priors, rel1)
        need.fix_u1 = point_uncertainty_db(plan.method, freq_hz, priors, dict.fromkeys(cal, rel1))
    except MeasurementError:
        need.meas_u1 = math.inf
        return need
    if plan.method is Method.Y_FACTOR:
        r = priors.readings
        need.cal_z1 = _significance1(r["hot_cal"], r["cold_cal"], rel1)
        need.meas_z1 = _significance1(r["hot"], r["cold"], rel1)
    return need


def _significance1(hot: float, cold: float, rel1: float) -> float:
    """(Y - 1)/u(Y) of a pair read with one average each (``y_significance``: u(Y)/Y is the
    two readings' relative uncertainties added in quadrature)."""
    y = hot / cold
    return (y - 1.0) / (y * math.sqrt(2.0) * rel1) if rel1 > 0 else math.inf


def _assemble(plan: Plan, needs: list, played: Any) -> PlanForecast:
    """Per point: the played group's averages and time (shared by its points), the u they give
    and what limits it; the plan's totals and warnings."""
    from noisebench.running.forecast_schedule import PhaseRun

    states = 2 if plan.method is Method.Y_FACTOR else 1
    out: list[PointForecast] = []
    weak: list[tuple[PointGroup, PhaseRun, float]] = []
    last_cal = PhaseRun(done=1, stop="target")
    for group, points in needs:
        share = len(group.freqs_hz)
        cal = played.calibration.get(group.index)
        if cal is not None:
            last_cal = cal
        cal_used = cal if cal is not None else last_cal  # a converter's shared IF calibration
        meas = played.measurement.get(group.index)
        for p in points:
            if not math.isfinite(p.meas_u1):
                out.append(
                    PointForecast(
                        p.freq_hz, 0, 0, 0.0, 0.0, math.inf, p.target, "no signal", p.rf_hz
                    )
                )
                continue
            cal_time = cal.time_s / share if cal is not None else 0.0
            cal_avg = cal.done * states if cal is not None else 0
            if meas is None:  # refused: the calibration's Y is not significant
                out.append(
                    PointForecast(
                        p.freq_hz, 0, cal_avg, 0.0, cal_time, math.inf, p.target, "weak Y", p.rf_hz
                    )
                )
                continue
            n_cal = max(cal_used.done, 1)
            u = math.sqrt(p.meas_u1**2 / meas.done + p.fix_u1**2 / n_cal)
            limited = None
            if u > p.target * (1 + 1e-9):
                limited = meas.stop if meas.stop != "target" else None
            if meas.stop == "weak_y":
                limited = "weak Y"
            out.append(
                PointForecast(
                    p.freq_hz,
                    meas.done * states,
                    cal_avg,
                    meas.time_s / share,
                    cal_time,
                    u,
                    p.target,
                    limited,
                    p.rf_hz,
                )
            )
        if cal is not None and cal.stop == "weak_y":
            z1 = min(p.cal_z1 for p in points if math.isfinite(p.meas_u1))
            weak.append((group, cal, z1))
    runs = [*played.calibration.values(), *played.measurement.values()]
    forecast = PlanForecast(
        out,
        schedule=played.schedule,
        switches=played.switches,
        settle_time_s=played.settle_s,
        traces=sum(r.traces for r in runs),
        trace_averages=sum(r.trace_averages for r in runs),
    )
    if weak:
        forecast.warnings.append(_weak_warning(plan, weak))
    return forecast


def _weak_warning(plan: Plan, weak: list) -> str:
    """The refused groups and the time limit that lets the weakest reach a usable Y: the
    averages at which (Y - 1)/u(Y) reaches twice the refusal threshold (what the sequencer
    asks for, ``averages_for_significance``) at the time per average its calibration used."""
    from noisebench.running.progress import format_duration

    points = sum(len(g.freqs_hz) for g, _, _ in weak)
    wanted = 0.0
    for group, run, z1 in weak:
        n = (2 * Y_SIGNIFICANCE_SIGMAS / z1) ** 2 if z1 > 0 else math.inf
        wanted = max(wanted, run.time_s / max(run.done, 1) * n / len(group.freqs_hz))
    limit = plan.acquisition.time_limit_s
    first = weak[0][0]
    fix = (
        f"raise acquisition.time_limit_s to about {format_duration(wanted)}, or add a "
        "preamplifier (a larger Y)"
        if math.isfinite(wanted)
        else "the source's excess noise does not reach the analyzer: add a preamplifier or "
        "take out attenuation"
    )
    return (
        f"{points} point(s) (first {first.describe()}) will be refused: the system "
        f"calibration's Y - 1 is not {Y_SIGNIFICANCE_SIGMAS:g} u above zero within "
        f"time_limit_s = {limit:g} s per point; {fix}"
    )


def _source_temperature(plan: Plan, model: BenchModel | None) -> float:
    value = plan.corrections.source_temperature_k
    if value != "bench":
        return float(value)
    if model is not None:
        return model.source_temperature_k(plan.method is Method.Y_FACTOR)
    return plan.bench.ambient_k or T0_K


def _design_gain_db(plan: Plan, priors: Priors) -> float:
    """The gain the sequencer sizes calibrations for (see noisebench.running.calibration)."""
    from noisebench.running.calibration import DEFAULT_DESIGN_GAIN_DB

    if plan.method is Method.GAIN and plan.gain is not None:
        if plan.gain.source == "constant":
            return float(plan.gain.value_db)  # type: ignore[arg-type]
        if plan.gain.source == "file":
            return priors.gain_db
    if plan.expect.dut_gain_db is not None:
        return plan.expect.dut_gain_db
    return DEFAULT_DESIGN_GAIN_DB


def _calibration_design_u1(plan: Plan, freq_hz: float, priors: Priors, rel1: float) -> float:
    """Design-DUT NF uncertainty of a calibration with one average per reading, dB."""
    from noisebench.running.calibration import floor_design_u_db, system_design_u_db

    r = priors.readings
    if plan.method is Method.GAIN:
        return floor_design_u_db(
            _density(freq_hz, r["floor"], rel1),
            _design_gain_db(plan, priors),
            source_temperature_k=priors.source_temperature_k,
            t0_k=priors.t0_k,
        )
    cal_enr_db = (
        priors.y_factor_enr_db if priors.conversion is None else priors.conversion.enr_if_db
    )
    return system_design_u_db(
        _density(freq_hz, r["hot_cal"], rel1),
        _density(freq_hz, r["cold_cal"], rel1),
        float(cal_enr_db),  # type: ignore[arg-type]
        cold_temperature_k=priors.source_temperature_k,
        design_gain_db=_design_gain_db(plan, priors),
        t0_k=priors.t0_k,
    )
