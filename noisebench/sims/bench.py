"""The in-process simulated bench: DUT, noise source, cables, analyzer, generator, supply.

``SimulatedBench`` wires the component models of :mod:`noisebench.sims.models` into the three
connections an operator makes (:class:`Path`) and exposes instruments that implement the abstract
interfaces of :mod:`noisebench.bench.instruments`. Everything random comes from ``seed``; the
simulated clock (:class:`~noisebench.sims.clock.SimClock`) carries instrument time.

Signal chain (noise temperatures, K; reference plane = analyzer input):

* ``DUT``: source plane -> input cable -> [mismatch] -> DUT (gain, Te, compression) ->
  output cable -> [mismatch] -> analyzer.
* ``THROUGH``: source plane -> output cable -> [mismatch] -> analyzer (system calibration for
  Y-factor and the reference pass of a gain measurement). The input cable belongs to the DUT's
  fixture: de-embed it as an input loss.
* ``TERMINATION``: matched load at ambient -> output cable -> analyzer (floor measurement).

The source plane holds the noise source, or the generator while its output is on.
``truth(freq_hz)`` returns what the models say, for tests and benchmarks.

Size: the bench wiring: the signal chain for each path, the instruments it exposes and the truth
tables the tests compare with all read the same component models.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from enum import Enum
from pathlib import Path as FsPath
from typing import Any, Literal

import numpy as np

from noisebench.bench.instruments import Bench
from noisebench.errors import InputError
from noisebench.sims.analyzer import SimAnalyzer
from noisebench.sims.clock import SimClock
from noisebench.sims.generator import SimGenerator
from noisebench.sims.models import (
    BOLTZMANN_J_PER_K,
    T0_K,
    AnalyzerFrontEnd,
    CableModel,
    ConverterModel,
    DutModel,
    NoiseSourceModel,
    SpectrumAtInput,
    check_freq,
    compression_gain_factor,
    db_to_lin,
    dbm_to_w,
    lin_to_db,
    mismatch_factor,
    mismatched_temperature_k,
)
from noisebench.sims.noise_source import ANALYZER_DRIVE, SimNoiseSource, SimSupply
from noisebench.sims.scenario import (
    CableSpec,
    DutSpec,
    Scenario,
    deep_merge,
    load_scenario,
    nest_overrides,
)
from noisebench.units import format_frequency_range

logger = logging.getLogger(__name__)

BAND_GRID_POINTS = 512  # grid for total-power integrals (compression)
CALIBRATION_ERROR_CLIP_SIGMA = 2.0


IDEAL_OVERRIDES: dict[str, Any] = {
    "noise_source__calibration_error_scale": 0.0,
    "noise_source__calibration_error_db": None,
    "noise_source__cold_reflection": {"magnitude": 0.0},
    "noise_source__hot_reflection": {"magnitude": 0.0},
    "dut__input_reflection": {"magnitude": 0.0},
    "dut__output_reflection": {"magnitude": 0.0},
    "dut__spurs": [],
    "analyzer__amplitude_error_db": 0.0,
    "analyzer__input_reflection": {"magnitude": 0.0},
    "generator__level_error_db": 0.0,
    "generator__level_slope_db_per_ghz": 0.0,
    "interference": {"tones": [], "combs": [], "mains_sideband_dbc": None},
}
"""Overrides that remove every systematic error a method cannot know about (ENR calibration
error, reflections, level errors, spurs, interference). Physics stays: source and cable
temperatures, losses, the analyzer's own noise. Used by ``from_scenario(..., ideal=True)``."""


class Path(str, Enum):
    """What the analyzer input is connected to."""

    DUT = "dut"
    THROUGH = "through"
    TERMINATION = "termination"


def _cable(spec: CableSpec, ambient_k: float) -> CableModel:
    return CableModel(
        freq_hz=np.asarray(spec.freq_hz, dtype=float),
        loss_db=np.asarray(spec.loss_db, dtype=float),
        temperature_k=spec.temperature_k or ambient_k,
        delay_s=spec.delay_s,
        sqrt_f_scaling=spec.sqrt_f_scaling,
    )


def _expand_lines(scenario: Scenario) -> list[tuple[float, float]]:
    """Interference tones and comb lines (with mains sidebands) as (freq_hz, power_w)."""
    itf = scenario.interference
    lines = [(t.freq_hz, float(dbm_to_w(t.level_dbm))) for t in itf.tones]
    for comb in itf.combs:
        p = float(dbm_to_w(comb.level_dbm))
        lines += [(comb.start_hz + i * comb.spacing_hz, p) for i in range(comb.count)]
    if itf.mains_sideband_dbc is not None:
        rel = float(db_to_lin(itf.mains_sideband_dbc))
        sidebands = [
            (f + n * itf.mains_hz, p * rel / n**2) for f, p in lines for n in (-2, -1, 1, 2)
        ]
        lines += sidebands
    return lines


def _dut_model(d: DutSpec, ambient_k: float) -> DutModel:
    """The DUT's physics model from its scenario spec (tables, ripple, P1dB, reflections).

    A DUT with ``powered = false`` is a passive network at ambient with its isolation as gain
    (an unpowered amplifier only attenuates), keeping its reflections and dropping its lines.
    """
    if not d.powered:
        return DutModel(
            freq_hz=np.asarray(d.freq_hz, dtype=float),
            gain_table_db=np.full(len(d.freq_hz), float(d.unpowered_gain_db)),
            nf_table_db=None,
            passive_temperature_k=ambient_k,
            input_gamma=d.input_reflection.complex,
            output_gamma=d.output_reflection.complex,
        )
    return DutModel(
        freq_hz=np.asarray(d.freq_hz, dtype=float),
        gain_table_db=np.asarray(d.gain_db, dtype=float),
        nf_table_db=None if d.nf_db is None else np.asarray(d.nf_db, dtype=float),
        passive_temperature_k=d.passive_temperature_k,
        ripple_db=d.gain_ripple_db,
        ripple_period_hz=d.gain_ripple_period_hz,
        ripple_phase_rad=float(np.deg2rad(d.gain_ripple_phase_deg)),
        output_p1db_w=None if d.output_p1db_dbm is None else float(dbm_to_w(d.output_p1db_dbm)),
        input_gamma=d.input_reflection.complex,
        output_gamma=d.output_reflection.complex,
        spurs=tuple((s.freq_hz, float(dbm_to_w(s.level_dbm))) for s in d.spurs),
    )


def _converter_model(d: DutSpec, dut: DutModel) -> ConverterModel | None:
    """The conversion around the DUT model, when the DUT converts frequency (and is powered:
    a switched-off converter converts nothing)."""
    c = d.conversion
    if c is None or not d.powered:
        return None
    return ConverterModel(
        dut=dut,
        if_min_hz=c.if_min_hz,
        if_max_hz=c.if_max_hz,
        rejected_sideband=c.rejected_sideband,
        sideband_rejection_db=c.sideband_rejection_db,
        lo_nominal_dbm=c.lo_nominal_dbm,
        lo_min_dbm=c.lo_min_dbm,
        lo_leakage_dbm=c.lo_leakage_dbm,
        lo_harmonics_dbc=tuple(c.lo_harmonics_dbc),
        external_lo_hz=c.external_lo_hz,
        external_lo_dbm=c.external_lo_dbm,
    )


class _AnalyzerConnector:
    """The analyzer's view of the bench (implements ``sims.analyzer.AnalyzerInput``)."""

    def __init__(self, bench: SimulatedBench) -> None:
        self._bench = bench

    def spectrum(self, freq_hz: np.ndarray) -> SpectrumAtInput:
        return self._bench.spectrum_at_analyzer(freq_hz)

    def hot_fraction(self, t_s: np.ndarray) -> np.ndarray:
        if self._bench.generator.output_on or self._bench.path is Path.TERMINATION:
            return np.zeros_like(np.asarray(t_s, dtype=float))
        return self._bench.noise_source.hot_fraction(t_s)

    def steady_hot_fraction(self, t_start_s: float, t_stop_s: float) -> float | None:
        if self._bench.generator.output_on or self._bench.path is Path.TERMINATION:
            return 0.0
        return self._bench.noise_source.steady_hot_fraction(t_start_s, t_stop_s)


@dataclass(frozen=True)
class EnrCalibration:
    """The simulated noise source's calibration sheet, as plain numbers: ENR (dB, relative to
    T0) and its standard uncertainty per frequency. The core's ENR table type is built from it
    by the composition root (:func:`noisebench.bench.registry.simulated_enr_table`), so the
    simulator needs none of the measurement code."""

    freq_hz: tuple[float, ...]
    enr_db: tuple[float, ...]
    u_enr_db: tuple[float, ...] | None
    serial: str | None
    nominal_drive_v: float | None
    description: str
    enr_reference: Literal["t0", "absolute"] = "t0"


class SimulatedBench:
    """A complete simulated bench built from a :class:`~noisebench.sims.scenario.Scenario`."""

    def __init__(self, scenario: Scenario, seed: int = 0) -> None:
        self.scenario = scenario
        self.seed = int(seed)
        noise_seq, cal_seq = np.random.SeedSequence(self.seed).spawn(2)
        self.clock = SimClock()
        self.ambient_k = scenario.ambient_k
        self._build_models(scenario)
        ns = scenario.noise_source
        self.noise_source = SimNoiseSource(ns, self.source_model, self.clock)
        self.supply = SimSupply(scenario.supply, self.noise_source)
        self.generator = SimGenerator(scenario.generator)
        self.lo_generator = SimGenerator(scenario.lo_generator)
        self.path = Path.DUT
        self._lines = _expand_lines(scenario)
        self._calibration_error_db = self._draw_calibration_error(np.random.default_rng(cal_seq))
        self.analyzer = SimAnalyzer(
            scenario.analyzer,
            self.front_end,
            self.clock,
            _AnalyzerConnector(self),
            np.random.default_rng(noise_seq),
            on_noise_drive=self._analyzer_drive,
        )
        self.noise_source.drive_switch = self.analyzer.set_noise_drive

    @classmethod
    def from_scenario(
        cls, name_or_path: str | FsPath, seed: int = 0, *, ideal: bool = False, **overrides: Any
    ) -> SimulatedBench:
        """Build from a packaged scenario name or a TOML path.

        ``overrides`` as in :func:`~noisebench.sims.scenario.load_scenario`
        (``analyzer__amplitude_error_db=0`` or ``analyzer={"amplitude_error_db": 0}``);
        ``ideal=True`` first applies :data:`IDEAL_OVERRIDES` (no systematic errors).
        """
        if ideal:
            overrides = deep_merge(nest_overrides(IDEAL_OVERRIDES), nest_overrides(overrides))
        return cls(load_scenario(name_or_path, **overrides), seed=seed)

    def _build_models(self, sc: Scenario) -> None:
        ns, an = sc.noise_source, sc.analyzer
        self.dut_model = _dut_model(sc.dut, sc.ambient_k)
        self.converter_model = _converter_model(sc.dut, self.dut_model)
        self.input_cable = _cable(sc.input_cable, sc.ambient_k)
        self.output_cable = _cable(sc.output_cable, sc.ambient_k)
        self.source_model = NoiseSourceModel(
            freq_hz=np.asarray(ns.freq_hz, dtype=float),
            enr_db=np.asarray(ns.enr_db, dtype=float),
            physical_temperature_k=ns.physical_temperature_k,
            cold_gamma=ns.cold_reflection.complex,
            hot_gamma=ns.hot_reflection.complex,
            nominal_drive_v=ns.nominal_drive_v,
            enr_drive_coefficient_db_per_v=ns.enr_drive_coefficient_db_per_v,
        )
        self.front_end = AnalyzerFrontEnd(
            freq_hz=np.asarray(an.freq_hz, dtype=float),
            nf_table_db=np.asarray(an.nf_db, dtype=float),
            preamp_nf_db=an.preamp_nf_db,
            preamp_gain_db=an.preamp_gain_db,
            internal_temperature_k=an.internal_temperature_k or sc.ambient_k,
            mixer_p1db_w=float(dbm_to_w(an.mixer_p1db_dbm)),
            input_gamma=an.input_reflection.complex,
        )

    def _analyzer_drive(self, on: bool) -> None:
        volts = self.scenario.noise_source.nominal_drive_v if on else 0.0
        self.noise_source.set_drive(ANALYZER_DRIVE, volts)

    # ------------------------------------------------------------ operator actions ----------

    def set_path(self, path: Path | str) -> None:
        """Move the cables: DUT, THROUGH or TERMINATION (accepts the enum or its value)."""
        try:
            self.path = Path(path.lower() if isinstance(path, str) else path)
        except ValueError:
            raise InputError(
                "path", f"unknown path {path!r}", fix="use 'dut', 'through' or 'termination'"
            ) from None
        logger.debug("bench path -> %s", self.path.value)

    def replace_dut(self, spec: DutSpec) -> None:
        """Put another DUT on the bench (station mode: the next unit); nothing else changes.

        The model is built from ``spec`` as at construction and ``scenario.dut`` becomes
        ``spec``. Time, random state, the operator's ENR table, the path, the analyzer's
        settings and the THROUGH / TERMINATION paths stay as they are.
        """
        if not isinstance(spec, DutSpec):
            raise InputError(
                "dut",
                f"must be a DUT spec of a scenario (got {type(spec).__name__})",
                fix="pass Scenario.dut, e.g. load_scenario(name, dut__...).dut",
            )
        model = _dut_model(spec, self.scenario.ambient_k)
        self.scenario = self.scenario.model_copy(update={"dut": spec})
        self.dut_model = model
        self.converter_model = _converter_model(spec, model)
        logger.debug("DUT replaced by %r", spec.name)

    def reset(self) -> None:
        """Reboot: analyzer settings back to their power-on defaults, noise drive off."""
        self.analyzer.reset()

    def as_bench(self) -> Bench:
        """The instruments as a :class:`noisebench.bench.instruments.Bench` (extras: supply,
        sim)."""
        return Bench(
            analyzer=self.analyzer,
            noise_source=self.noise_source,
            generator=self.generator,
            ambient_k=self.ambient_k,
            lo_generator=self.lo_generator if self.scenario.dut.conversion is not None else None,
            extras={"supply": self.supply, "sim": self},
        )

    def close(self) -> None:
        """Safe state on every instrument."""
        for inst in (self.noise_source, self.generator, self.lo_generator, self.supply):
            inst.close()
        self.analyzer.close()

    # ------------------------------------------------------------ noise source table --------

    def _draw_calibration_error(self, rng: np.random.Generator) -> np.ndarray:
        ns = self.scenario.noise_source
        if ns.calibration_error_db is not None:
            return np.asarray(ns.calibration_error_db, dtype=float)
        if ns.u_enr_db is None:
            return np.zeros(len(ns.freq_hz))
        z = np.clip(
            rng.standard_normal(len(ns.freq_hz)),
            -CALIBRATION_ERROR_CLIP_SIGMA,
            CALIBRATION_ERROR_CLIP_SIGMA,
        )
        return np.asarray(ns.u_enr_db) * z * ns.calibration_error_scale

    @property
    def enr_calibration(self) -> EnrCalibration:
        """The ENR table the operator holds: the true ENR plus a calibration error."""
        ns = self.scenario.noise_source
        enr = np.asarray(ns.enr_db, dtype=float) + self._calibration_error_db
        return EnrCalibration(
            freq_hz=tuple(float(f) for f in ns.freq_hz),
            enr_db=tuple(round(float(e), 4) for e in enr),
            u_enr_db=None if ns.u_enr_db is None else tuple(float(u) for u in ns.u_enr_db),
            serial=ns.serial,
            nominal_drive_v=ns.nominal_drive_v,
            description=f"simulated source of scenario {self.scenario.name!r} (seed {self.seed})",
        )

    # ------------------------------------------------------------ signal chain --------------

    def _drive_for_hot(self) -> float:
        ns = self.noise_source
        lo, hi = ns.spec.drive_window_v
        v = ns.drive_v
        return v if lo <= v <= hi else ns.spec.nominal_drive_v

    def _source_plane(
        self, f: np.ndarray, hot: float, use_generator: bool
    ) -> tuple[np.ndarray, complex, list[tuple[float, float]]]:
        """Noise temperature, reflection and tones at the source plane."""
        gen = self.generator
        if use_generator and gen.output_on:
            p_w = float(dbm_to_w(gen.true_level_dbm))
            extra_k = p_w * float(db_to_lin(gen.spec.noise_floor_dbc_per_hz)) / BOLTZMANN_J_PER_K
            return np.full(f.shape, self.ambient_k + extra_k), 0j, [(gen.freq_hz, p_w)]
        temp = self.source_model.temperature_k(f, hot, self._drive_for_hot())
        return np.asarray(temp, dtype=float), self.source_model.gamma(hot), []

    def lo_state(self) -> tuple[float, float | None]:
        """The converter's LO: (frequency in Hz, delivered level in dBm or None when off)."""
        conv = self.converter_model
        if conv is not None and conv.external_lo_hz is not None:
            level = conv.external_lo_dbm
            return conv.external_lo_hz, conv.lo_nominal_dbm if level is None else level
        lo = self.lo_generator
        return lo.freq_hz, lo.true_level_dbm if lo.output_on else None

    def _converter_input_k(self, f_in: np.ndarray, hot: float, use_generator: bool) -> np.ndarray:
        """Noise temperature delivered to the converter's input at input frequencies ``f_in``."""
        ts, gs, _ = self._source_plane(f_in, hot, use_generator)
        cab = self.input_cable
        t1 = cab.output_temperature_k(ts, f_in)
        m1 = mismatch_factor(cab.seen_reflection(gs, f_in), self.dut_model.input_gamma)
        return mismatched_temperature_k(t1, self.ambient_k, m1)

    def _converter_output(
        self, f: np.ndarray, hot: float, use_generator: bool, compression: float
    ) -> tuple[np.ndarray, list[tuple[float, float]]]:
        conv = self.converter_model
        assert conv is not None
        lo_hz, lo_dbm = self.lo_state()
        t2 = conv.output_temperature_k(
            f,
            lo_hz,
            lo_dbm,
            lambda fin: self._converter_input_k(fin, hot, use_generator),
            self.ambient_k,
        )
        if lo_dbm is not None:
            t2 = np.where(conv.in_if_band(f), t2 * compression, t2)
        _, gs, tones = self._source_plane(np.asarray([1.0]), hot, use_generator)
        out_tones = []
        cab = self.input_cable
        for ft, p in tones:
            fa = np.asarray([ft])
            g = conv.response_gain_lin(fa, lo_hz, lo_dbm)
            if g[0] <= 0:
                continue
            m = mismatch_factor(cab.seen_reflection(gs, fa), self.dut_model.input_gamma)
            out_tones.append((abs(ft - lo_hz), float(p * g[0] / cab.loss_lin(fa)[0] * m[0])))
        out_tones = [(ft, p * compression) for ft, p in out_tones]
        out_tones += list(self.dut_model.spurs) + conv.leakage_lines(lo_hz, lo_dbm)
        return t2, out_tones

    def _dut_output(
        self, f: np.ndarray, hot: float, use_generator: bool, compression: float = 1.0
    ) -> tuple[np.ndarray, list[tuple[float, float]]]:
        """Noise temperature at the DUT output (before the output cable) and tones there."""
        if self.converter_model is not None:
            return self._converter_output(f, hot, use_generator, compression)
        ts, gs, tones = self._source_plane(f, hot, use_generator)
        cab, dut = self.input_cable, self.dut_model
        t1 = cab.output_temperature_k(ts, f)
        m1 = mismatch_factor(cab.seen_reflection(gs, f), dut.input_gamma)
        t1 = mismatched_temperature_k(t1, self.ambient_k, m1)
        t2 = (t1 + dut.te_k(f)) * dut.gain_lin(f) * compression
        out_tones = []
        for ft, p in tones:
            fa = np.asarray([ft])
            gain = (
                dut.gain_lin(fa)
                / cab.loss_lin(fa)
                * mismatch_factor(cab.seen_reflection(gs, fa), dut.input_gamma)
            )
            out_tones.append((ft, float(p * gain[0] * compression)))
        out_tones += list(dut.spurs)
        return t2, out_tones

    def _dut_compression(self, hot: float, use_generator: bool) -> float:
        """Gain factor of the DUT from its total output power (noise over its band + tones)."""
        p1db = self.dut_model.output_p1db_w
        if p1db is None:
            return 1.0
        lo, hi = self.dut_model.band_hz
        if self.converter_model is not None:
            lo, hi = self.converter_model.if_min_hz, self.converter_model.if_max_hz
        grid = np.linspace(lo, hi, BAND_GRID_POINTS)
        t2, tones = self._dut_output(grid, hot, use_generator)
        total = BOLTZMANN_J_PER_K * float(np.trapezoid(t2, grid))
        total += sum(p for _, p in tones)
        return float(compression_gain_factor(total, p1db))

    def _to_analyzer(self, f: np.ndarray, temp_k: np.ndarray, gamma_back: complex) -> np.ndarray:
        """Through the output cable and the mismatch at the analyzer input."""
        cab = self.output_cable
        t = cab.output_temperature_k(temp_k, f)
        m = mismatch_factor(cab.seen_reflection(gamma_back, f), self.front_end.input_gamma)
        return mismatched_temperature_k(t, self.ambient_k, m)

    def _tone_to_analyzer(self, ft: float, p_w: float, gamma_back: complex) -> float:
        fa = np.asarray([ft])
        cab = self.output_cable
        m = mismatch_factor(cab.seen_reflection(gamma_back, fa), self.front_end.input_gamma)
        return float(p_w / cab.loss_lin(fa)[0] * m[0])

    def _path_temperature_k(
        self, path: Path, f: np.ndarray, hot: float, use_generator: bool
    ) -> tuple[np.ndarray, list[tuple[float, float]]]:
        """Delivered noise temperature at the analyzer input and the tones there."""
        if path is Path.TERMINATION:
            t = self._to_analyzer(f, np.full(f.shape, self.ambient_k), 0j)
            return t, list(self._lines)
        if path is Path.THROUGH:
            ts, gs, src_tones = self._source_plane(f, hot, use_generator)
            t = self._to_analyzer(f, ts, gs)
            tones = [(ft, self._tone_to_analyzer(ft, p, gs)) for ft, p in src_tones]
            return t, tones + list(self._lines)
        comp = self._dut_compression(hot, use_generator)
        t2, dut_tones = self._dut_output(f, hot, use_generator, comp)
        gback = self.dut_model.output_gamma
        t = self._to_analyzer(f, t2, gback)
        tones = [(ft, self._tone_to_analyzer(ft, p, gback)) for ft, p in dut_tones]
        return t, tones + list(self._lines)

    def _integration_band(self, path: Path) -> tuple[float, float]:
        an = self.scenario.analyzer
        if path is Path.DUT and self.converter_model is not None:
            lo, hi = self.converter_model.if_min_hz, self.converter_model.if_max_hz
        elif path is Path.DUT:
            lo, hi = self.dut_model.band_hz
        elif path is Path.THROUGH:
            lo, hi = self.source_model.freq_hz[0], self.source_model.freq_hz[-1]
        else:
            return an.min_freq_hz, an.min_freq_hz
        lo, hi = max(lo, an.min_freq_hz), min(hi, an.max_freq_hz)
        return (lo, hi) if hi > lo else (an.min_freq_hz, an.min_freq_hz)

    def _total_noise_w(self, path: Path, hot: float, use_generator: bool) -> float:
        """Total noise power into the analyzer over its input range, W."""
        an = self.scenario.analyzer
        lo, hi = self._integration_band(path)
        total = BOLTZMANN_J_PER_K * self.ambient_k * ((an.max_freq_hz - an.min_freq_hz) - (hi - lo))
        if hi > lo:
            grid = np.linspace(lo, hi, BAND_GRID_POINTS)
            t, _ = self._path_temperature_k(path, grid, hot, use_generator)
            total += BOLTZMANN_J_PER_K * float(np.trapezoid(t, grid))
        return total

    def spectrum_at_analyzer(self, freq_hz: np.ndarray) -> SpectrumAtInput:
        """What the analyzer input sees now, linear in the noise source's hot fraction."""
        f = np.asarray(freq_hz, dtype=float)
        path = self.path
        use_gen = path is not Path.TERMINATION
        cold, tones_cold = self._path_temperature_k(path, f, 0.0, use_gen)
        hot, tones_hot = self._path_temperature_k(path, f, 1.0, use_gen)
        tones = tones_hot if self.noise_source.is_hot else tones_cold
        p_cold = self._total_noise_w(path, 0.0, use_gen)
        p_hot = self._total_noise_w(path, 1.0, use_gen)
        return SpectrumAtInput(
            freq_hz=f,
            base_k=cold,
            excess_k=hot - cold,
            tones=tones,
            total_base_w=p_cold,
            total_excess_w=p_hot - p_cold,
        )

    # ------------------------------------------------------------ truth --------------------

    def converter_truth(
        self, rf_hz: float, lo_hz: float | None = None, lo_dbm: float | None = None
    ) -> dict[str, float]:
        """What the models say about a converter point: RF ``rf_hz`` with the LO at ``lo_hz``
        (default: the LO now), driven at ``lo_dbm`` (default: the LO's level now, or nominal).

        Keys: ``nf_ssb_db``, ``nf_dsb_db``, ``te_ssb_k``, ``gain_signal_db``, ``gain_image_db``,
        ``image_rejection_db`` (inf: no image response), ``image_hz``, ``if_hz``,
        ``enr_rf_db``/``enr_image_db``/``enr_if_db`` (true) and ``*_table_db`` (the operator's),
        ``input_loss_rf_db``, ``input_loss_image_db``, ``output_loss_if_db``, ``analyzer_te_k``
        (at the IF, applied settings), ``cold_k``, ``ambient_k``.
        """
        conv = self.converter_model
        if conv is None:
            raise InputError(
                "dut.conversion", "this scenario's DUT does not convert frequency", fix=""
            )
        now_hz, now_dbm = self.lo_state()
        lo = now_hz if lo_hz is None else float(lo_hz)
        level = (
            lo_dbm
            if lo_dbm is not None
            else (now_dbm if now_dbm is not None else conv.lo_nominal_dbm)
        )
        out = conv.ssb_dsb_truth(float(rf_hz), lo, level)
        image, if_hz = out["image_hz"], abs(float(rf_hz) - lo)
        src, drive = self.source_model, self._drive_for_hot()
        table = src.enr_db + self._calibration_error_db
        s = self.analyzer.settings
        att = (
            float(s.attenuation_db)
            if s is not None and s.attenuation_db is not None
            else self.scenario.analyzer.default_attenuation_db
        )
        pre = bool(s.preamp) if s is not None else False
        for name, f in (("rf", float(rf_hz)), ("image", image), ("if", if_hz)):
            fa = np.asarray([max(f, 1.0)])
            out[f"enr_{name}_db"] = float(src.true_enr_db(fa, drive)[0])
            out[f"enr_{name}_table_db"] = float(np.interp(fa, src.freq_hz, table)[0])
        out["if_hz"] = if_hz
        out["input_loss_rf_db"] = float(lin_to_db(self.input_cable.loss_lin(float(rf_hz))))
        out["input_loss_image_db"] = float(lin_to_db(self.input_cable.loss_lin(max(image, 1.0))))
        out["output_loss_if_db"] = float(lin_to_db(self.output_cable.loss_lin(if_hz)))
        out["analyzer_te_k"] = float(self.front_end.te_k(np.asarray([if_hz]), att, pre)[0])
        out["cold_k"] = float(src.physical_temperature_k)
        out["ambient_k"] = float(self.ambient_k)
        return out

    def truth(self, freq_hz: np.ndarray | float) -> dict[str, np.ndarray]:
        """What the models say at ``freq_hz`` (inside the DUT's table), arrays keyed by name.

        DUT: ``nf_db``, ``gain_db``, ``te_k``. Source: ``enr_db`` (true), ``enr_table_db`` (the
        operator's), ``u_enr_db``, ``hot_k``, ``cold_k``. Bench: ``ambient_k``,
        ``input_loss_db``, ``output_loss_db``, ``analyzer_nf_db``/``analyzer_te_k`` (at the
        applied attenuation and preamp), ``system_nf_db`` (input cable + DUT + output cable +
        analyzer, matched, Friis), ``through_nf_db`` (output cable + analyzer),
        ``amplitude_error_db``. Densities at the analyzer input (W/Hz, noise source, no
        generator): ``density_<path>_<cold|hot>_w_per_hz`` and what the analyzer displays
        (own noise, compression and level error included): ``displayed_<path>_<cold|hot>_w_per_hz``.
        """
        f = np.atleast_1d(check_freq("freq_hz", freq_hz))
        lo, hi = self.dut_model.band_hz
        if np.any(f < lo * (1 - 1e-12)) or np.any(f > hi * (1 + 1e-12)):
            raise InputError(
                "freq_hz",
                f"outside the DUT table {format_frequency_range(lo, hi)} of scenario "
                f"{self.scenario.name!r}",
                fix="ask inside the table",
            )
        dut, src, fe = self.dut_model, self.source_model, self.front_end
        s = self.analyzer.settings
        # the simulated analyzer applies its power-on settings when it is made
        assert s is not None and s.attenuation_db is not None
        att, pre = float(s.attenuation_db), bool(s.preamp)
        te_sa = fe.te_k(f, att, pre)
        l_in, l_out = self.input_cable.loss_lin(f), self.output_cable.loss_lin(f)
        te_in = (l_in - 1.0) * self.input_cable.temperature_k
        te_out = (l_out - 1.0) * self.output_cable.temperature_k
        g = dut.gain_lin(f)
        te_sys = te_in + dut.te_k(f) * l_in + te_out * l_in / g + te_sa * l_in * l_out / g
        te_thru = te_out + te_sa * l_out
        enr_table = np.interp(f, src.freq_hz, src.enr_db + self._calibration_error_db)
        u_tab = self.scenario.noise_source.u_enr_db
        out: dict[str, np.ndarray] = {
            "freq_hz": f,
            "nf_db": dut.nf_db(f),
            "gain_db": dut.gain_db(f),
            "te_k": dut.te_k(f),
            "enr_db": src.true_enr_db(f, self._drive_for_hot()),
            "enr_table_db": enr_table,
            "u_enr_db": np.interp(f, src.freq_hz, u_tab) if u_tab else np.zeros_like(f),
            "hot_k": src.hot_temperature_k(f, self._drive_for_hot()),
            "cold_k": np.full(f.shape, src.physical_temperature_k),
            "ambient_k": np.full(f.shape, self.ambient_k),
            "input_loss_db": lin_to_db(l_in),
            "output_loss_db": lin_to_db(l_out),
            "analyzer_nf_db": fe.nf_db(f, att, pre),
            "analyzer_te_k": te_sa,
            "system_nf_db": lin_to_db(1.0 + te_sys / T0_K),
            "through_nf_db": lin_to_db(1.0 + te_thru / T0_K),
            "amplitude_error_db": np.full(f.shape, self.scenario.analyzer.amplitude_error_db),
        }
        amp = float(db_to_lin(self.scenario.analyzer.amplitude_error_db))
        for path in Path:
            for name, h in (("cold", 0.0), ("hot", 1.0)):
                if path is Path.TERMINATION and name == "hot":
                    continue
                t, _ = self._path_temperature_k(path, f, h, use_generator=False)
                mixer = fe.mixer_gain_factor(self._total_noise_w(path, h, False), att, pre)
                out[f"density_{path.value}_{name}_w_per_hz"] = BOLTZMANN_J_PER_K * t
                out[f"displayed_{path.value}_{name}_w_per_hz"] = (
                    BOLTZMANN_J_PER_K * (t + te_sa) * amp * mixer
                )
        return out
