"""Measure a DUT's gain with a CW generator and the analyzer (substitution method).

Procedure, per frequency and for each of two passes - THROUGH (generator to analyzer with the
DUT replaced by a through connection: the reference) and DUT:

1. generator output off: band-power marker reading of the noise in the marker band;
2. generator on at one level for the whole sweep: ``readings`` band-power readings of the
   tone, each a fresh acquisition;
3. tone power = mean reading minus the noise (linear power).

Gain = DUT tone power / THROUGH tone power, so the generator's absolute level, the cables and
the analyzer's absolute accuracy cancel. ``connect(stage)`` is called before each pass (an
operator prompt, a switch matrix, or the simulator's path).

The level is the highest that keeps the DUT output ``compression_backoff_db`` (default 20 dB)
below its output P1dB and the analyzer input at or below ``analyzer_max_input_dbm``, both for
the largest expected gain. Every pass must then see the tone at least ``min_snr_db`` (default
30 dB) above the noise in the marker band, or the measurement stops with a message naming the
frequency and what to change. The narrow RBW keeps the noise in the band small: the noise
power in a band B is the analyzer's noise density times B, so halving the RBW (and with it
the band) gains 3 dB of SNR.

Standard uncertainty of each gain value (dB), root sum of squares of:

- repeatability: the standard deviation of the mean of the readings of each pass (type A);
- SNR: the noise contribution ``N/S`` of each pass taken as a rectangular half-width
  (``c_dB * (N/S) / sqrt(3)``), a bound on what subtracting the measured noise leaves;
- analyzer linearity between the two tone levels (``linearity_u_db``);
- mismatch between the two passes (``mismatch_u_db``, from the port reflections; default 0).

Only the abstract instrument interfaces are used, so the same code runs on SCPI instruments
and on the simulated bench.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from datetime import datetime, timezone
from enum import Enum

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AveragingScale,
    Detector,
    MarkerKind,
)
from noisebench.bench.instruments import Analyzer, Generator, NoiseSource
from noisebench.errors import InputError, MeasurementError, SafetyError
from noisebench.science.gain_files import GainTable
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)

__all__ = [
    "GainMeasurementPlan",
    "GainMeasurementResult",
    "GainPoint",
    "GainStage",
    "choose_level_dbm",
    "measure_gain",
    "snr_db",
]

C_DB = 10.0 / math.log(10.0)  # dB per neper of power: d(10 log10 x) = C_DB dx / x
NEAR_COMPRESSION_DB = 3.0  # flag a point whose DUT output is this much above the planned level


class GainStage(str, Enum):
    """What is connected between generator and analyzer (values match the simulator's paths)."""

    THROUGH = "through"
    DUT = "dut"


class GainMeasurementPlan(BaseModel):
    """How to measure gain. Levels in dBm, gains in dB, frequencies in Hz."""

    model_config = ConfigDict(extra="forbid")

    freqs_hz: list[float] = Field(min_length=1, description="frequencies, Hz, ascending")
    expected_gain_db: float = Field(
        ge=-100, le=100, description="the largest gain expected over the band, dB"
    )
    dut_p1db_out_dbm: float = Field(ge=-100, le=60, description="DUT output 1 dB compression")
    compression_backoff_db: float = Field(default=20.0, ge=10.0, le=80.0)
    analyzer_max_input_dbm: float = Field(
        default=-10.0,
        le=30.0,
        description="highest tone level at the analyzer input (keep "
        "its mixer well below compression)",
    )
    min_snr_db: float = Field(default=30.0, ge=10.0, le=100.0)
    rbw_hz: float = Field(default=1e3, gt=0)
    span_rbw: float = Field(default=20.0, ge=5.0, le=1000.0, description="span / RBW")
    band_rbw: float = Field(
        default=5.0,
        ge=3.0,
        le=100.0,
        description="marker band / RBW (5 RBW holds a Gaussian RBW's tone)",
    )
    points: int = Field(default=101, ge=11, le=100_001)
    averages: int = Field(default=4, ge=1, le=10_000)
    readings: int = Field(default=3, ge=2, le=100)
    attenuation_db: float | None = Field(default=None, ge=0)
    ref_level_dbm: float | None = None
    preamp: bool | None = False
    generator_min_dbm: float | None = None
    generator_max_dbm: float | None = None
    linearity_u_db: float = Field(default=0.02, ge=0.0, le=5.0)
    mismatch_u_db: float = Field(default=0.0, ge=0.0, le=5.0)

    @field_validator("freqs_hz")
    @classmethod
    def _ascending(cls, v: list[float]) -> list[float]:
        arr = np.asarray(v, dtype=float)
        if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
            raise ValueError("frequencies must be finite and > 0 Hz")
        if np.any(np.diff(arr) <= 0):
            raise ValueError("frequencies must be strictly ascending")
        return [float(x) for x in arr]


class GainPoint(BaseModel):
    """Gain at one frequency with its standard uncertainty and the raw readings."""

    model_config = ConfigDict(extra="forbid")

    freq_hz: float = Field(gt=0)
    gain_db: float
    u_gain_db: float = Field(ge=0)
    through_dbm: float = Field(description="tone power, THROUGH pass, noise removed")
    dut_dbm: float = Field(description="tone power, DUT pass, noise removed")
    noise_through_dbm: float
    noise_dut_dbm: float
    snr_through_db: float
    snr_dut_db: float
    readings_through_dbm: list[float]
    readings_dut_dbm: list[float]
    uncertainty_db: dict[str, float] = Field(description="standard-uncertainty components")
    flags: list[str] = Field(default_factory=list)


class GainMeasurementResult(BaseModel):
    """All points of one gain measurement, with the level and provenance."""

    model_config = ConfigDict(extra="forbid")

    plan: GainMeasurementPlan
    generator_level_dbm: float
    level_limited_by: str
    rbw_hz: float
    band_hz: float
    points: list[GainPoint]
    identities: dict[str, str]
    started_at: datetime
    ended_at: datetime

    def to_table(self) -> GainTable:
        """The measured gain as a :class:`~noisebench.science.gain_files.GainTable`."""
        return GainTable(
            freq_hz=np.asarray([p.freq_hz for p in self.points], dtype=float),
            gain_db=np.asarray([p.gain_db for p in self.points], dtype=float),
            u_gain_db=np.asarray([p.u_gain_db for p in self.points], dtype=float),
            metadata={
                "source": "measured with generator and analyzer",
                "measured": self.ended_at.isoformat(),
                "generator_level_dbm": f"{self.generator_level_dbm:.2f}",
            },
            source="gain measurement",
        )


# ----------------------------------------------------------------------------- pure parts


def choose_level_dbm(plan: GainMeasurementPlan) -> tuple[float, str]:
    """Generator level (dBm, rounded down to 0.1 dB) and the limit that sets it."""
    limits = {
        "DUT compression": plan.dut_p1db_out_dbm
        - plan.compression_backoff_db
        - plan.expected_gain_db,
        "analyzer input (DUT pass)": plan.analyzer_max_input_dbm - plan.expected_gain_db,
        "analyzer input (through pass)": plan.analyzer_max_input_dbm,
    }
    if plan.generator_max_dbm is not None:
        limits["generator maximum"] = plan.generator_max_dbm
    reason = min(limits, key=lambda name: limits[name])
    level = math.floor(limits[reason] * 10.0 + 1e-9) / 10.0
    if plan.generator_min_dbm is not None and level < plan.generator_min_dbm:
        raise MeasurementError(
            f"the generator level allowed by the {reason} limit, "
            f"{level:.1f} dBm, is below the generator's minimum "
            f"{plan.generator_min_dbm:.1f} dBm",
            fix="insert a known attenuator, or check expected_gain_db",
        )
    return level, reason


def snr_db(reading_w: float | np.ndarray, noise_w: float | np.ndarray) -> np.ndarray:
    """Tone-to-noise ratio (dB) of a band-power reading that holds tone plus noise (W)."""
    reading = np.asarray(reading_w, dtype=float)
    noise = np.asarray(noise_w, dtype=float)
    if np.any(noise <= 0) or np.any(reading <= noise):
        raise MeasurementError("the tone does not rise above the noise in the marker band")
    return 10.0 * np.log10((reading - noise) / noise)


def _dbm_to_w(dbm: float | np.ndarray) -> np.ndarray:
    return 1e-3 * 10.0 ** (np.asarray(dbm, dtype=float) / 10.0)


def _w_to_dbm(w: float | np.ndarray) -> np.ndarray:
    return 10.0 * np.log10(np.asarray(w, dtype=float) / 1e-3)


class _PassResult(BaseModel):
    tone_dbm: float
    noise_dbm: float
    snr_db: float
    readings_dbm: list[float]
    u_repeat_db: float
    u_snr_db: float


def _reduce_pass(
    readings_dbm: list[float], noise_dbm: float, *, freq_hz: float, stage: str, min_snr: float
) -> _PassResult:
    """Tone power, SNR and the pass's uncertainty terms from its readings (pure)."""
    readings = np.asarray(readings_dbm, dtype=float)
    mean_w = float(np.mean(_dbm_to_w(readings)))
    noise_w = float(_dbm_to_w(noise_dbm))
    if mean_w <= noise_w:
        raise MeasurementError(
            f"{stage} pass at {format_frequency(freq_hz)}: no tone above the noise "
            f"({10 * math.log10(mean_w / 1e-3):.2f} dBm vs noise "
            f"{noise_dbm:.2f} dBm)",
            fix="check the generator output and the connections",
        )
    ratio = float(snr_db(mean_w, noise_w))
    if ratio < min_snr:
        raise MeasurementError(
            f"{stage} pass at {format_frequency(freq_hz)}: tone only {ratio:.1f} dB above the "
            "noise in "
            f"the marker band (need {min_snr:.0f} dB)",
            fix="narrow the RBW (each halving gains 3 dB), raise the level limits, or lower "
            "the analyzer attenuation",
            freq_hz=freq_hz,
        )
    tone_w = mean_w - noise_w
    u_repeat = float(np.std(readings, ddof=1) / math.sqrt(readings.size))
    u_snr = C_DB * (noise_w / tone_w) / math.sqrt(3.0)
    return _PassResult(
        tone_dbm=float(_w_to_dbm(tone_w)),
        noise_dbm=noise_dbm,
        snr_db=ratio,
        readings_dbm=[float(x) for x in readings],
        u_repeat_db=u_repeat,
        u_snr_db=u_snr,
    )


def _combine(
    freq_hz: float,
    through: _PassResult,
    dut: _PassResult,
    plan: GainMeasurementPlan,
    level_dbm: float,
) -> GainPoint:
    parts = {
        "repeatability": math.hypot(through.u_repeat_db, dut.u_repeat_db),
        "snr": math.hypot(through.u_snr_db, dut.u_snr_db),
        "linearity": plan.linearity_u_db,
        "mismatch": plan.mismatch_u_db,
    }
    flags = []
    planned_out = level_dbm + plan.expected_gain_db
    if dut.tone_dbm > planned_out + NEAR_COMPRESSION_DB:
        flags.append("output_near_compression")
        logger.warning(
            "gain at %s: DUT output %.2f dBm is %.1f dB above the planned "
            "%.2f dBm (gain above expected_gain_db)",
            format_frequency(freq_hz),
            dut.tone_dbm,
            dut.tone_dbm - planned_out,
            planned_out,
        )
    return GainPoint(
        freq_hz=freq_hz,
        gain_db=dut.tone_dbm - through.tone_dbm,
        u_gain_db=math.sqrt(sum(v * v for v in parts.values())),
        through_dbm=through.tone_dbm,
        dut_dbm=dut.tone_dbm,
        noise_through_dbm=through.noise_dbm,
        noise_dut_dbm=dut.noise_dbm,
        snr_through_db=through.snr_db,
        snr_dut_db=dut.snr_db,
        readings_through_dbm=through.readings_dbm,
        readings_dut_dbm=dut.readings_dbm,
        uncertainty_db=parts,
        flags=flags,
    )


# ----------------------------------------------------------------------------- procedure


def _request(plan: GainMeasurementPlan, freq_hz: float) -> AcquisitionRequest:
    return AcquisitionRequest(
        center_hz=freq_hz,
        span_hz=plan.span_rbw * plan.rbw_hz,
        rbw_hz=plan.rbw_hz,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=plan.averages,
        points=plan.points,
        attenuation_db=plan.attenuation_db,
        ref_level_dbm=plan.ref_level_dbm,
        preamp=plan.preamp,
    )


def _check_safety(analyzer: Analyzer, plan: GainMeasurementPlan, level_dbm: float) -> None:
    rated = analyzer.max_input_power_dbm
    highest = max(level_dbm, level_dbm + plan.expected_gain_db)
    if rated is not None and highest > rated:
        raise SafetyError(
            f"the tone would reach {highest:.1f} dBm at the analyzer, above its "
            f"rated {rated:.1f} dBm",
            level_dbm=level_dbm,
        )


def tone_pass(
    analyzer: Analyzer,
    generator: Generator,
    plan: GainMeasurementPlan,
    level_dbm: float,
    *,
    tone_hz: float,
    read_hz: float,
    stage: str,
) -> tuple[_PassResult, float, float]:
    """One pass point: the band power at ``read_hz`` with the generator off (noise), then
    ``plan.readings`` times with the generator on at ``tone_hz`` and ``level_dbm``; the
    generator is off again on return. Returns the reduced pass, the applied RBW and the
    marker band (Hz). ``tone_hz`` differs from ``read_hz`` through a frequency converter."""
    settings = analyzer.configure(_request(plan, read_hz))
    band = plan.band_rbw * settings.rbw_hz
    generator.set_output(False)
    noise = analyzer.read_marker(read_hz, MarkerKind.BAND_POWER, band).value_db
    generator.set_cw(tone_hz, level_dbm)
    generator.set_output(True)
    readings = [
        analyzer.read_marker(read_hz, MarkerKind.BAND_POWER, band).value_db
        for _ in range(plan.readings)
    ]
    generator.set_output(False)
    result = _reduce_pass(readings, noise, freq_hz=tone_hz, stage=stage, min_snr=plan.min_snr_db)
    return result, settings.rbw_hz, band


def _measure_pass(
    analyzer: Analyzer,
    generator: Generator,
    plan: GainMeasurementPlan,
    level_dbm: float,
    stage: GainStage,
) -> tuple[list[_PassResult], float, float]:
    results = []
    rbw = band = 0.0
    for freq in plan.freqs_hz:
        result, rbw, band = tone_pass(
            analyzer, generator, plan, level_dbm, tone_hz=freq, read_hz=freq, stage=stage.value
        )
        results.append(result)
        logger.debug(
            "%s pass %s: tone %.2f dBm, SNR %.1f dB",
            stage.value,
            format_frequency(freq),
            results[-1].tone_dbm,
            results[-1].snr_db,
        )
    snrs = [r.snr_db for r in results]
    logger.info(
        "%s pass: %d frequencies, tone SNR %.1f to %.1f dB",
        stage.value,
        len(results),
        min(snrs),
        max(snrs),
    )
    return results, rbw, band


def measure_gain(
    analyzer: Analyzer,
    generator: Generator,
    plan: GainMeasurementPlan,
    connect: Callable[[GainStage], None],
    *,
    noise_source: NoiseSource | None = None,
) -> GainMeasurementResult:
    """Measure the DUT gain at ``plan.freqs_hz``: THROUGH pass, ``connect(DUT)``, DUT pass.

    ``noise_source`` (optional) is held cold during the measurement. The generator output is
    off when this returns or raises."""
    if not isinstance(plan, GainMeasurementPlan):
        raise InputError("plan", "must be a GainMeasurementPlan")
    level, reason = choose_level_dbm(plan)
    _check_safety(analyzer, plan, level)
    started = datetime.now(timezone.utc)
    logger.info("gain measurement at %.1f dBm (set by the %s limit)", level, reason)
    try:
        if noise_source is not None:
            noise_source.set_hot(False)
        connect(GainStage.THROUGH)
        through, rbw, band = _measure_pass(analyzer, generator, plan, level, GainStage.THROUGH)
        connect(GainStage.DUT)
        dut, _, _ = _measure_pass(analyzer, generator, plan, level, GainStage.DUT)
    finally:
        try:
            generator.set_output(False)
        except Exception as exc:  # noqa: BLE001 - keep the original error
            logger.error("could not switch the generator off: %s", exc)
    points = [
        _combine(f, t, d, plan, level) for f, t, d in zip(plan.freqs_hz, through, dut, strict=True)
    ]
    identities = {"analyzer": analyzer.identity, "generator": generator.identity}
    return GainMeasurementResult(
        plan=plan,
        generator_level_dbm=level,
        level_limited_by=reason,
        rbw_hz=rbw,
        band_hz=band,
        points=points,
        identities=identities,
        started_at=started,
        ended_at=datetime.now(timezone.utc),
    )
