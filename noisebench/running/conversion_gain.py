"""Measure a frequency-converting DUT's conversion gain: the generator at the RF, the analyzer at
the IF (substitution against THROUGH references at both frequencies).

Per point (RF, LO, IF) the DUT pass reads ``D = P_g(RF) G' X(IF)``: ``P_g(f)`` the generator's
delivered level, ``G'`` the conversion gain between the THROUGH planes (input cable and DUT),
``X(f)`` everything after the DUT at the frequency it works at (output cable, analyzer
response). A THROUGH reading at a frequency ``f`` is ``T(f) = P_g(f) X(f)``. Hence:

- **IF reference** ``G_IF = D / T(IF)``: output cable and analyzer cancel exactly (both at the
  IF in the DUT pass and in the reference); the generator's level difference between RF and IF
  remains, ``P_g(RF)/P_g(IF)`` (its flatness, ``u_generator_flatness_db``).
- **RF reference** ``G_RF = D / T(RF) * L_out(RF)/L_out(IF)``: the generator cancels exactly
  (at the RF in both); the output cable's known loss difference is de-embedded with the plan's
  ``output_loss``; the analyzer's response difference between IF and RF remains
  (``u_analyzer_flatness_db``).

No THROUGH reading at one frequency can see the remaining ratio
``[P_g(RF)/P_g(IF)] [X(IF)/X(RF)]``: multiplying P_g by any c(f) and dividing X by it leaves
every reading unchanged. So both flatnesses cannot cancel at once; each reference cancels one
instrument completely and the estimate is their minimum-variance blend in dB,
``G = (1 - w) G_IF + w G_RF`` with ``w = u_g^2/(u_g^2 + u_a^2)``, whose flatness term is
``u = u_g u_a / sqrt(u_g^2 + u_a^2)`` (JCGM 100:2008 §5.1.2 for the weighted sum;
docs/references.md §19). The two
references also give ``G_RF - G_IF``, an observation of the combined flatness error: beyond
3 sigma of what the declared flatness and the readings allow, the point is flagged
``flatness_exceeds_declared`` (the declared values are too small).

For the noise figure (gain method, ``Te ~ N / G``) one absolute scale stays, as for an
amplifier: with the IF reference the analyzer's scale at the IF (the noise is read there and
the gain no longer holds it), with the RF reference its scale at the RF. That is the budget's
``absolute_amplitude_db`` term, unchanged.

The level, the signal-to-noise rule and the per-pass uncertainty terms are those of
:mod:`noisebench.running.gain_measurement` (the amplifier procedure, reused, unchanged).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from datetime import datetime, timezone

from pydantic import BaseModel, ConfigDict, Field, model_validator

from noisebench.bench.instruments import Analyzer, Generator, NoiseSource
from noisebench.errors import InputError
from noisebench.running.gain_measurement import (
    NEAR_COMPRESSION_DB,
    GainMeasurementPlan,
    GainStage,
    _check_safety,
    _measure_pass,
    _PassResult,
    choose_level_dbm,
    tone_pass,
)
from noisebench.units import format_frequency

logger = logging.getLogger(__name__)

__all__ = [
    "ConversionGainPlan",
    "ConversionGainPoint",
    "ConversionGainResult",
    "FLATNESS_CHECK_SIGMA",
    "blend_weight",
    "measure_conversion_gain",
]

FLATNESS_CHECK_SIGMA = 3.0
"""``|G_RF - G_IF|`` beyond this many of its standard uncertainties flags the point: a normal
deviate exceeds 3 sigma with probability 0.27 % (common practice for a consistency check)."""


def blend_weight(u_generator_flatness_db: float, u_analyzer_flatness_db: float) -> float:
    """Weight of the RF reference in the blend (minimum variance; 0.5 when both are 0)."""
    vg, va = u_generator_flatness_db**2, u_analyzer_flatness_db**2
    return 0.5 if vg + va == 0 else vg / (vg + va)


class ConversionGainPlan(BaseModel):
    """How to measure conversion gain: the tone settings of the amplifier procedure
    (``tone``; its ``freqs_hz`` are the reference frequencies, RF and IF together) and the
    points. Frequencies in Hz, levels dBm, dB."""

    model_config = ConfigDict(extra="forbid")

    tone: GainMeasurementPlan
    rf_hz: list[float] = Field(min_length=1)
    lo_hz: list[float] = Field(min_length=1)
    if_hz: list[float] = Field(min_length=1)
    output_loss_rf_db: list[float] = Field(min_length=1)
    output_loss_if_db: list[float] = Field(min_length=1)
    u_generator_flatness_db: float = Field(ge=0, le=10)
    u_analyzer_flatness_db: float = Field(ge=0, le=10)

    @model_validator(mode="after")
    def _same_length(self) -> ConversionGainPlan:
        n = len(self.rf_hz)
        lists = (self.lo_hz, self.if_hz, self.output_loss_rf_db, self.output_loss_if_db)
        if any(len(v) != n for v in lists):
            raise InputError("points", "RF, LO, IF and output-loss lists differ in length")
        refs = set(self.tone.freqs_hz)
        missing = [f for f in self.rf_hz + self.if_hz if f not in refs]
        if missing:
            raise InputError(
                "tone.freqs_hz",
                f"lacks the reference frequency {format_frequency(missing[0])}",
                fix="list every RF and IF as a reference frequency",
            )
        return self


class ConversionGainPoint(BaseModel):
    """Conversion gain at one point with its standard uncertainty and the raw readings."""

    model_config = ConfigDict(extra="forbid")

    rf_hz: float = Field(gt=0)
    lo_hz: float = Field(gt=0)
    if_hz: float = Field(gt=0)
    gain_db: float = Field(description="blend of the two references (between THROUGH planes)")
    u_gain_db: float = Field(ge=0)
    gain_if_reference_db: float
    gain_rf_reference_db: float
    weight_rf_reference: float = Field(ge=0, le=1)
    dut_dbm: float
    through_rf_dbm: float
    through_if_dbm: float
    noise_dut_dbm: float
    snr_dut_db: float
    readings_dut_dbm: list[float]
    uncertainty_db: dict[str, float]
    flags: list[str] = Field(default_factory=list)


class ConversionGainResult(BaseModel):
    """All points of one conversion-gain measurement, with the level and provenance."""

    model_config = ConfigDict(extra="forbid")

    plan: ConversionGainPlan
    generator_level_dbm: float
    level_limited_by: str
    rbw_hz: float
    band_hz: float
    points: list[ConversionGainPoint]
    identities: dict[str, str]
    started_at: datetime
    ended_at: datetime


def _dut_pass(
    analyzer: Analyzer,
    generator: Generator,
    tone: GainMeasurementPlan,
    level_dbm: float,
    rf_hz: float,
    if_hz: float,
) -> _PassResult:
    """One DUT-pass point: the analyzer at the IF, the generator at the RF."""
    result, _, _ = tone_pass(
        analyzer, generator, tone, level_dbm, tone_hz=rf_hz, read_hz=if_hz, stage="DUT"
    )
    return result


def _combine(
    i: int,
    plan: ConversionGainPlan,
    dut: _PassResult,
    thru_rf: _PassResult,
    thru_if: _PassResult,
    level_dbm: float,
) -> ConversionGainPoint:
    tone = plan.tone
    rf, lo, if_ = plan.rf_hz[i], plan.lo_hz[i], plan.if_hz[i]
    w = blend_weight(plan.u_generator_flatness_db, plan.u_analyzer_flatness_db)
    g_if = dut.tone_dbm - thru_if.tone_dbm
    g_rf = dut.tone_dbm - thru_rf.tone_dbm - (plan.output_loss_rf_db[i] - plan.output_loss_if_db[i])
    gain = (1.0 - w) * g_if + w * g_rf
    ug, ua = plan.u_generator_flatness_db, plan.u_analyzer_flatness_db
    parts = {
        "repeatability": math.sqrt(
            dut.u_repeat_db**2
            + ((1 - w) * thru_if.u_repeat_db) ** 2
            + (w * thru_rf.u_repeat_db) ** 2
        ),
        "snr": math.sqrt(
            dut.u_snr_db**2 + ((1 - w) * thru_if.u_snr_db) ** 2 + (w * thru_rf.u_snr_db) ** 2
        ),
        "linearity": tone.linearity_u_db,
        "mismatch": tone.mismatch_u_db,
        "flatness": math.hypot((1 - w) * ug, w * ua),
    }
    flags: list[str] = []
    planned_out = level_dbm + tone.expected_gain_db
    if dut.tone_dbm > planned_out + NEAR_COMPRESSION_DB:
        flags.append("output_near_compression")
        logger.warning(
            "conversion gain at RF %s: IF output %.2f dBm is %.1f dB above the planned %.2f dBm "
            "(conversion gain above max_gain_db)",
            format_frequency(rf),
            dut.tone_dbm,
            dut.tone_dbm - planned_out,
            planned_out,
        )
    # G_RF - G_IF observes the combined flatness error; its own jitter is both references'
    spread_u = math.sqrt(
        ug**2
        + ua**2
        + thru_rf.u_repeat_db**2
        + thru_if.u_repeat_db**2
        + thru_rf.u_snr_db**2
        + thru_if.u_snr_db**2
    )
    if abs(g_rf - g_if) > FLATNESS_CHECK_SIGMA * spread_u:
        flags.append("flatness_exceeds_declared")
        logger.warning(
            "conversion gain at RF %s: the RF and IF references differ by %.2f dB, more than "
            "%.0f x %.2f dB the declared generator and analyzer flatness allow "
            "(raise u_generator_flatness_db / u_analyzer_flatness_db, or check the output "
            "loss table)",
            format_frequency(rf),
            g_rf - g_if,
            FLATNESS_CHECK_SIGMA,
            spread_u,
        )
    return ConversionGainPoint(
        rf_hz=rf,
        lo_hz=lo,
        if_hz=if_,
        gain_db=gain,
        u_gain_db=math.sqrt(sum(v * v for v in parts.values())),
        gain_if_reference_db=g_if,
        gain_rf_reference_db=g_rf,
        weight_rf_reference=w,
        dut_dbm=dut.tone_dbm,
        through_rf_dbm=thru_rf.tone_dbm,
        through_if_dbm=thru_if.tone_dbm,
        noise_dut_dbm=dut.noise_dbm,
        snr_dut_db=dut.snr_db,
        readings_dut_dbm=dut.readings_dbm,
        uncertainty_db=parts,
        flags=flags,
    )


def measure_conversion_gain(
    analyzer: Analyzer,
    generator: Generator,
    plan: ConversionGainPlan,
    connect: Callable[[GainStage], None],
    set_lo: Callable[[float], object],
    *,
    noise_source: NoiseSource | None = None,
) -> ConversionGainResult:
    """THROUGH pass at every RF and IF (generator and analyzer at the same frequency),
    ``connect(DUT)``, then per point ``set_lo(lo_hz)`` and the DUT pass (generator at the RF,
    analyzer at the IF). ``noise_source`` (optional) is held cold. The generator output is off
    when this returns or raises; the LO is left to the caller."""
    if not isinstance(plan, ConversionGainPlan):
        raise InputError("plan", "must be a ConversionGainPlan")
    tone = plan.tone
    level, reason = choose_level_dbm(tone)
    _check_safety(analyzer, tone, level)
    started = datetime.now(timezone.utc)
    logger.info("conversion-gain measurement at %.1f dBm (set by the %s limit)", level, reason)
    try:
        if noise_source is not None:
            noise_source.set_hot(False)
        connect(GainStage.THROUGH)
        refs, rbw, band = _measure_pass(analyzer, generator, tone, level, GainStage.THROUGH)
        by_freq = dict(zip(tone.freqs_hz, refs, strict=True))
        connect(GainStage.DUT)
        duts = []
        for rf, lo, if_ in zip(plan.rf_hz, plan.lo_hz, plan.if_hz, strict=True):
            set_lo(lo)
            duts.append(_dut_pass(analyzer, generator, tone, level, rf, if_))
            logger.debug(
                "DUT pass RF %s -> IF %s: tone %.2f dBm, SNR %.1f dB",
                format_frequency(rf),
                format_frequency(if_),
                duts[-1].tone_dbm,
                duts[-1].snr_db,
            )
    finally:
        try:
            generator.set_output(False)
        except Exception as exc:  # noqa: BLE001 - keep the original error
            logger.error("could not switch the generator off: %s", exc)
    points = [
        _combine(i, plan, d, by_freq[plan.rf_hz[i]], by_freq[plan.if_hz[i]], level)
        for i, d in enumerate(duts)
    ]
    return ConversionGainResult(
        plan=plan,
        generator_level_dbm=level,
        level_limited_by=reason,
        rbw_hz=rbw,
        band_hz=band,
        points=points,
        identities={"analyzer": analyzer.identity, "generator": generator.identity},
        started_at=started,
        ended_at=datetime.now(timezone.utc),
    )
