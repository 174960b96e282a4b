"""Measurement plans: one TOML file that says what to measure, how, and on which bench.

A plan is validated completely before any instrument is touched. Every problem is reported on
its own line with the key path that holds it (``sweep.segments[2].rbw_hz: must be > 0``), the
schema checks (pydantic, ``extra="forbid"``) and the cross-field checks (ENR table covers the
sweep, gain source complete for the gain method, ...) together, so one edit fixes them all.

Units: Hz, s, K, dB, dBm, as the field names say. Relative file paths in a plan are relative to
the folder of the plan file.

Layout (all sections but ``bench`` and ``sweep`` optional)::

    method = "y_factor"                 # or "gain"
    operator = "..."; station = "..."
    [dut]          id, description
    [bench]        analyzer, noise_source, generator, lo, connect, ambient_k
    [acquisition]  rbw_hz, span_hz, detector, averaging_scale, target_u_nf_db, time_limit_s, ...
    [sweep]        freqs_hz = [...]  and/or  [[sweep.segments]] (ranges with their own settings)
    [enr]          table, extrapolate
    [corrections]  input_loss, output_loss, source_temperature_k, t0_k
    [gain]         source = "measure" | "file" | "constant"  (gain method)
    [calibration]  max_age_s, averages policy
    [safety]       DUT bandwidth / gain bounds, analyzer input limits
    [expect]       prior NF / gain / analyzer noise for `noisebench estimate`
    [output]       folder, plots, report
    [uncertainty]  budget inputs (noisebench.science.uncertainty)
    [limits]       pass/fail mask (noisebench.science.limits)
    [conversion]   frequency-converting DUT: LO/IF plan, sideband, image response, LO
                   (noisebench.running.conversion)

This module is the schema (one pydantic model per section, kept together so that the whole plan
reads in one place, hence its length) and the loader; the cross-field checks are in
:mod:`noisebench.running.plan_checks`, the one-line problem texts in
:mod:`noisebench.running.plan_errors`.

Size: one schema, the plan: the pydantic sections must live together to validate as one model;
the cross-field checks that reach other layers are already out in plan_checks.py.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from noisebench.bench.acquisition import AveragingScale, Detector, SweepMode
from noisebench.bench.addresses import is_simulated
from noisebench.errors import InputError
from noisebench.running.conversion import ConversionSection
from noisebench.running.plan_errors import PlanError, format_validation_error
from noisebench.science.point import Method
from noisebench.science.ranges import check_range, warn_unusual
from noisebench.units import format_frequency
from noisebench.user_files import MAX_PLAN_BYTES, check_file_size

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

try:  # budget inputs and limit masks belong to their own modules; accept plain tables until then
    from noisebench.science.uncertainty import UncertaintyInputs as _UncertaintySection
except ImportError:  # pragma: no cover - depends on the tree's state
    _UncertaintySection = dict[str, Any]  # type: ignore[misc,assignment]
try:
    from noisebench.science.limits import LimitMask as _LimitsSection
except ImportError:  # pragma: no cover
    _LimitsSection = dict[str, Any]  # type: ignore[misc,assignment]

T0_DEFAULT_K = 290.0

MAX_SPAN_OVER_RBW = 1e5
"""span/RBW above this needs more trace points than analyzers have (common practice: traces
of at most 100 001 points; a span/RBW near 1e6 is the 1e6 factor of an RBW given in MHz)."""

_STRICT = ConfigDict(extra="forbid", validate_default=True, allow_inf_nan=False)


def _ranged(key: str, section: str, *fields: str, purpose: str | None = None) -> Any:
    """A field validator checking ``fields`` (numbers or lists of numbers) against the
    plausible range ``RANGES[key]`` (noisebench.science.ranges): impossible values are refused
    with the likely slip, unusual ones warned once as ``<section>.<field>``. ``purpose`` names
    a boolean field declared earlier in the model that states an unusual value on purpose."""

    def check(cls: type, value: Any, info: ValidationInfo) -> Any:
        if value is None or isinstance(value, (str, bool)):
            return value
        on_purpose = bool(purpose and info.data.get(purpose))
        items = value if isinstance(value, list) else [value]
        for i, item in enumerate(items):
            field = str(info.field_name)  # always set for a field validator
            name = field if not isinstance(value, list) else f"{field}[{i}]"
            check_range(key, name, item, on_purpose=on_purpose, warn=False)
            warn_unusual(key, f"{section}.{name}", item)
        return value

    return field_validator(*fields, mode="after")(check)


#: the most frequency points one segment may hold (a typo in step_hz must not exhaust memory)
MAX_SEGMENT_POINTS = 100_000
#: the largest constant loss a plan accepts, dB (beyond it the noise figure is unmeasurable)
MAX_LOSS_DB = 100.0
#: the smallest statistical target, dB: 1e-3 dB needs >= 2 (4.343 / 1e-3)^2 ~ 4e7 independent
#: samples by the radiometer equation (far beyond max_averages); smaller is a typo
MIN_TARGET_U_NF_DB = 1e-3


# --------------------------------------------------------------------------- sections


class DutSection(BaseModel):
    """Identity of the device under test."""

    model_config = _STRICT
    id: str | None = Field(default=None, max_length=200)
    description: str | None = Field(default=None, max_length=2000)


class AnalyzerSection(BaseModel):
    """Spectrum analyzer: a resource string (VISA, ``sim://<scenario>?seed=N``, or a sampled
    receiver: ``sigmf://<folder>``, ``samples://<name>``, ``sim://...&receiver=sampled``)."""

    model_config = _STRICT
    resource: str = Field(min_length=1)
    profile: str = "generic"
    timeout_s: float = Field(default=10.0, gt=0)
    max_input_dbm: float | None = Field(
        default=None, description="rated maximum total RF input, dBm (overrides the driver's)"
    )
    compression_dbm: float | None = Field(
        default=None, description="total input power for 1 dB compression at 0 dB attenuation"
    )

    _max_input_range = _ranged("analyzer_max_input_dbm", "bench.analyzer", "max_input_dbm")
    _compression_range = _ranged("analyzer_compression_dbm", "bench.analyzer", "compression_dbm")

    @model_validator(mode="after")
    def _compression_below_damage(self) -> AnalyzerSection:
        if (
            self.max_input_dbm is not None
            and self.compression_dbm is not None
            and self.compression_dbm >= self.max_input_dbm
        ):
            raise InputError(
                "compression_dbm",
                f"{self.compression_dbm:g} dBm is not below max_input_dbm "
                f"{self.max_input_dbm:g} dBm: a mixer compresses well before its input is "
                "damaged (common practice: 20-30 dB apart)",
                fix="give the 1 dB compression level at 0 dB attenuation and the rated "
                "maximum input from the analyzer's manual",
            )
        return self


class NoiseSourceSection(BaseModel):
    """How the noise source is switched.

    ``drive``: ``auto`` (the simulated bench's source, else the analyzer's drive output),
    ``analyzer`` (analyzer's noise-source drive output), ``supply`` (a SCPI DC supply at
    ``resource``), ``operator`` (prompt the operator), ``none`` (gain method without a source).
    """

    model_config = _STRICT
    drive: Literal["auto", "analyzer", "supply", "operator", "none"] = "auto"
    resource: str | None = None
    profile: str = "generic"
    drive_v: float | None = Field(default=None, gt=0, le=60)
    current_limit_a: float = Field(default=0.06, gt=0, le=5)
    max_drive_v: float = Field(default=30.0, gt=0, le=60)
    settle_time_s: float = Field(default=0.05, ge=0, le=60)

    _drive_range = _ranged("drive_v", "bench.noise_source", "drive_v", "max_drive_v")

    @model_validator(mode="after")
    def _check(self) -> NoiseSourceSection:
        if self.drive == "supply" and not self.resource:
            raise InputError(
                "resource",
                "a supply-driven noise source needs the supply's resource string",
                fix='e.g. resource = "TCPIP0::10.0.0.5::5025::SOCKET"',
            )
        if self.drive_v is not None and self.drive_v > self.max_drive_v:
            raise InputError(
                "drive_v",
                f"{self.drive_v} V exceeds max_drive_v {self.max_drive_v} V",
                fix="lower drive_v or raise max_drive_v",
            )
        return self


class GeneratorSection(BaseModel):
    """CW signal generator for measured DUT gain."""

    model_config = _STRICT
    resource: str = Field(min_length=1)
    profile: str = "generic"
    timeout_s: float = Field(default=10.0, gt=0)
    max_level_dbm: float = Field(
        default=0.0, le=30.0, description="highest level the sequencer may ever set, dBm"
    )

    _level_range = _ranged("generator_level_dbm", "bench.generator", "max_level_dbm")


class BenchSection(BaseModel):
    """The instruments. A plain string for an instrument is shorthand for its resource."""

    model_config = _STRICT
    analyzer: AnalyzerSection
    noise_source: NoiseSourceSection = Field(default_factory=NoiseSourceSection)
    generator: GeneratorSection | None = None
    lo: GeneratorSection | None = Field(
        default=None, description="the LO generator of a frequency-converting DUT"
    )
    connect: Literal["auto", "operator"] = Field(
        default="auto",
        description="auto: the simulator moves the paths itself; "
        "operator: always prompt to move cables",
    )
    ambient_k: float | None = Field(default=None, gt=0)

    _ambient_range = _ranged("physical_temperature_k", "bench", "ambient_k")

    @field_validator("analyzer", "generator", "lo", mode="before")
    @classmethod
    def _resource_shorthand(cls, value: Any) -> Any:
        return {"resource": value} if isinstance(value, str) else value


class AcquisitionPolicy(BaseModel):
    """How each frequency point is acquired; segments may override any field.

    ``span_hz`` is the band integrated around each point (0 = zero span at the point).
    ``target_u_nf_db`` is the standard uncertainty (statistical part) to reach per point;
    averaging stops there, or at ``max_averages``, or when ``time_limit_s`` of instrument time
    per point is used up (flag ``time_limit``).
    """

    model_config = _STRICT
    rbw_hz: float = Field(default=1e6, gt=0)
    vbw_hz: float | None = Field(default=None, gt=0)
    span_hz: float = Field(default=10e6, ge=0)
    trace_points: int | None = Field(
        default=None, ge=3, le=100_001, description="points per trace (None: about 2 per RBW)"
    )
    detector: Detector = Detector.RMS
    averaging_scale: AveragingScale = AveragingScale.POWER
    mode: SweepMode = SweepMode.SWEPT
    sweep_time_s: float | None = Field(default=None, gt=0)
    attenuation_db: float | None = Field(default=None, ge=0, le=100)
    preamp: bool | None = None
    ref_level_dbm: float | None = None
    min_averages: int = Field(default=4, ge=1, le=1_000_000)
    max_averages: int = Field(default=20_000, ge=1, le=1_000_000)
    target_u_nf_db: float = Field(default=0.05, ge=MIN_TARGET_U_NF_DB, le=10)
    time_limit_s: float = Field(default=30.0, gt=0)
    _rbw_range = _ranged("rbw_hz", "acquisition", "rbw_hz")
    max_trace_span_hz: float = Field(
        default=0.0, ge=0, description="points whose bands fit in one trace this wide share it"
    )
    min_band_fill: float = Field(
        default=0.5, gt=0, le=1, description="share of a shared trace that must lie in bands"
    )

    @field_validator("detector", mode="after")
    @classmethod
    def _noise_detector(cls, value: Detector) -> Detector:
        if value in (Detector.PEAK, Detector.NEGATIVE_PEAK):
            raise InputError(
                "detector",
                f"{value.value!r} is biased for noise by an amount that depends on the sweep",
                fix='use "rms" or "sample"',
            )
        return value

    @model_validator(mode="after")
    def _check(self) -> AcquisitionPolicy:
        if self.min_averages > self.max_averages:
            raise InputError(
                "min_averages",
                f"{self.min_averages} exceeds max_averages {self.max_averages}",
                fix="make min_averages <= max_averages",
            )
        if 0 < self.span_hz < self.rbw_hz:
            raise InputError(
                "span_hz",
                f"{format_frequency(self.span_hz)} is narrower than rbw_hz "
                f"{format_frequency(self.rbw_hz)}",
                fix="use span_hz >= rbw_hz, or 0 for zero span",
            )
        if self.span_hz / self.rbw_hz > MAX_SPAN_OVER_RBW:
            raise InputError(
                "rbw_hz",
                f"{format_frequency(self.rbw_hz)} resolves the {format_frequency(self.span_hz)} "
                "span into "
                f"{self.span_hz / self.rbw_hz:.3g} cells, more than any analyzer's trace "
                f"holds (at most {MAX_SPAN_OVER_RBW:g}): looks like kHz or MHz given where Hz "
                "is asked",
                fix="give the RBW in Hz (1 MHz is 1e6), or narrow span_hz",
            )
        return self


_POLICY_FIELDS = tuple(AcquisitionPolicy.model_fields)


class Segment(BaseModel):
    """Frequencies (a list, or a linear/log range) with optional acquisition overrides."""

    model_config = _STRICT
    freqs_hz: list[float] | None = None
    start_hz: float | None = Field(default=None, gt=0)
    stop_hz: float | None = Field(default=None, gt=0)
    points: int | None = Field(default=None, ge=1, le=MAX_SEGMENT_POINTS)
    step_hz: float | None = Field(default=None, gt=0)
    spacing: Literal["linear", "log"] = "linear"
    # acquisition overrides (None: the plan's [acquisition] value)
    rbw_hz: float | None = Field(default=None, gt=0)
    vbw_hz: float | None = Field(default=None, gt=0)
    span_hz: float | None = Field(default=None, ge=0)
    trace_points: int | None = Field(default=None, ge=3, le=100_001)
    detector: Detector | None = None
    averaging_scale: AveragingScale | None = None
    mode: SweepMode | None = None
    sweep_time_s: float | None = Field(default=None, gt=0)
    attenuation_db: float | None = Field(default=None, ge=0, le=100)
    preamp: bool | None = None
    ref_level_dbm: float | None = None
    min_averages: int | None = Field(default=None, ge=1, le=1_000_000)
    max_averages: int | None = Field(default=None, ge=1, le=1_000_000)
    target_u_nf_db: float | None = Field(default=None, ge=MIN_TARGET_U_NF_DB, le=10)
    time_limit_s: float | None = Field(default=None, gt=0)
    max_trace_span_hz: float | None = Field(default=None, ge=0)
    min_band_fill: float | None = Field(default=None, gt=0, le=1)

    @field_validator("freqs_hz", mode="after")
    @classmethod
    def _positive_freqs(cls, value: list[float] | None) -> list[float] | None:
        if value is None:
            return value
        if not value:
            raise InputError("freqs_hz", "is empty", fix="list at least one frequency")
        for i, f in enumerate(value):
            if not math.isfinite(f) or f <= 0:
                raise InputError(f"freqs_hz[{i}]", f"must be a finite frequency > 0 (got {f!r})")
        return value

    _rbw_range = _ranged("rbw_hz", "sweep.segments", "rbw_hz")
    _freq_range = _ranged(  # after the sign check
        "frequency_hz", "sweep.segments", "start_hz", "stop_hz", "freqs_hz"
    )

    @model_validator(mode="after")
    def _one_form(self) -> Segment:
        has_list = self.freqs_hz is not None
        has_range = self.start_hz is not None or self.stop_hz is not None
        if has_list and has_range:
            raise InputError("freqs_hz", "give either freqs_hz or start_hz/stop_hz, not both")
        if not has_list and not has_range:
            raise InputError(
                "start_hz",
                "a segment needs freqs_hz or start_hz and stop_hz",
                fix="e.g. start_hz = 1e9, stop_hz = 2e9, points = 11",
            )
        if has_range:
            self._check_range()
        return self

    def _check_range(self) -> None:
        if self.start_hz is None or self.stop_hz is None:
            missing = "stop_hz" if self.start_hz is not None else "start_hz"
            raise InputError(missing, "is missing: a range needs start_hz and stop_hz")
        if self.points is not None and self.step_hz is not None:
            raise InputError("step_hz", "give either points or step_hz, not both")
        if self.points is None and self.step_hz is None:
            raise InputError("points", "a range needs points or step_hz", fix="e.g. points = 51")
        if self.stop_hz < self.start_hz:
            raise InputError(
                "stop_hz",
                f"{format_frequency(self.stop_hz)} is below start_hz "
                f"{format_frequency(self.start_hz)}",
                fix="swap them",
            )
        if self.stop_hz == self.start_hz and (self.points or 1) > 1:
            raise InputError(
                "stop_hz", "equals start_hz but points > 1", fix="use points = 1 or a wider range"
            )
        if self.step_hz is not None and self.spacing == "log":
            raise InputError(
                "step_hz",
                "a fixed step needs linear spacing",
                fix='use points with spacing = "log"',
            )
        if (
            self.step_hz is not None
            and (self.stop_hz - self.start_hz) / self.step_hz >= MAX_SEGMENT_POINTS
        ):
            raise InputError(
                "step_hz",
                f"{format_frequency(self.step_hz)} makes more than "
                f"{MAX_SEGMENT_POINTS} points between {format_frequency(self.start_hz)} and "
                f"{format_frequency(self.stop_hz)}",
                fix="use a larger step (step_hz is in Hz)",
            )

    def frequencies_hz(self) -> np.ndarray:
        """The segment's frequencies, Hz, ascending."""
        if self.freqs_hz is not None:
            return np.array(sorted(self.freqs_hz), dtype=float)
        start, stop = float(self.start_hz), float(self.stop_hz)  # type: ignore[arg-type]
        if self.step_hz is not None:
            n = int(math.floor((stop - start) / self.step_hz * (1 + 1e-12))) + 1
            return start + self.step_hz * np.arange(n)
        n = int(self.points)  # type: ignore[arg-type]
        if n == 1:
            return np.array([start])
        if self.spacing == "log":
            return np.geomspace(start, stop, n)
        return np.linspace(start, stop, n)

    def overrides(self) -> dict[str, Any]:
        """Acquisition fields this segment sets."""
        return {
            name: getattr(self, name) for name in _POLICY_FIELDS if getattr(self, name) is not None
        }


class SweepSection(BaseModel):
    """Frequency points: ``freqs_hz`` (plan-wide settings) and/or ``segments``."""

    model_config = _STRICT
    freqs_hz: list[float] | None = None
    segments: list[Segment] = Field(default_factory=list)

    @field_validator("freqs_hz", mode="after")
    @classmethod
    def _positive(cls, value: list[float] | None) -> list[float] | None:
        return Segment._positive_freqs(value)

    _freq_range = _ranged("frequency_hz", "sweep", "freqs_hz")  # after the sign check

    @model_validator(mode="after")
    def _not_empty(self) -> SweepSection:
        if self.freqs_hz is None and not self.segments:
            raise InputError(
                "sweep",
                "has no frequency points",
                fix="add freqs_hz = [...] or a [[sweep.segments]] table",
            )
        return self


class EnrSection(BaseModel):
    """The noise source's ENR table (our CSV format, see noisebench.science.enr)."""

    model_config = _STRICT
    table: str | None = Field(default=None, description="CSV path; None: the simulator's table")
    extrapolate: Literal["refuse", "clamp"] = "refuse"


LossValue = float | str


class CorrectionsSection(BaseModel):
    """Losses around the DUT and temperatures.

    ``input_loss`` / ``output_loss``: a constant in dB (>= 0), or a file: our CSV
    (``freq_hz,gain_db``: a cable's gain is minus its loss) or Touchstone ``.s2p`` (|S21|).
    ``source_temperature_k``: the physical temperature of the termination / cold noise source,
    K, or ``"bench"`` to read it from the bench.
    """

    model_config = _STRICT
    cryogenic: bool = Field(
        default=False,
        description="true: a termination, cold load or loss below 200 K is meant (e.g. a cold "
        "load in liquid nitrogen, 77 K); otherwise such a value is refused as a typo",
    )
    input_loss: LossValue = 0.0
    output_loss: LossValue = 0.0
    input_loss_temperature_k: float | None = Field(default=None, gt=0)
    output_loss_temperature_k: float | None = Field(default=None, gt=0)
    source_temperature_k: float | Literal["bench"] = "bench"
    t0_k: float = Field(
        default=T0_DEFAULT_K,
        ge=200,
        le=400,
        description="reference temperature of the noise figure, K",
    )

    _temperature_range = _ranged(
        "physical_temperature_k",
        "corrections",
        "input_loss_temperature_k",
        "output_loss_temperature_k",
        "source_temperature_k",
        purpose="cryogenic",
    )
    _t0_range = _ranged("reference_temperature_k", "corrections", "t0_k")

    @field_validator("input_loss", "output_loss", mode="after")
    @classmethod
    def _loss(cls, value: LossValue, info: ValidationInfo) -> LossValue:
        field = str(info.field_name)  # always set for a field validator
        if isinstance(value, str):
            if not value.strip():
                raise InputError(
                    field,
                    "is an empty file name",
                    fix="give a dB value or a CSV/.s2p path",
                )
            return value
        if not math.isfinite(value) or value < 0:
            raise InputError(
                field,
                f"must be a finite loss >= 0 dB (got {value!r})",
                fix="a loss is positive dB; an amplifier is not a loss",
            )
        if value > MAX_LOSS_DB:
            raise InputError(
                field,
                f"{value:g} dB is not a plausible loss (at most {MAX_LOSS_DB:g} dB)",
                fix="give the loss in dB, not linear",
            )
        return value

    @field_validator("source_temperature_k", mode="after")
    @classmethod
    def _temperature(cls, value: float | str) -> float | str:
        if isinstance(value, float) and not (0 < value <= 500):
            raise InputError(
                "source_temperature_k",
                f"{value!r} K is not a plausible bench temperature",
                fix='give kelvin (e.g. 296.5) or "bench"',
            )
        return value


DEFAULT_FLATNESS_U_DB = 0.3
"""Standard u of a generator's level, or an analyzer's response, at two frequencies relative to
each other, when the plan states none (common practice: level-accuracy and frequency-response
figures of +/-0.5 dB read as rectangular half-widths, 0.5/sqrt(3) = 0.29 dB)."""


class GainSection(BaseModel):
    """DUT gain for the gain method: measured with the generator, from a file, or constant.

    ``file`` / ``value_db`` give the DUT's own gain. ``measure`` uses the substitution method
    (noisebench.running.gain_measurement): a THROUGH pass then a DUT pass, so what it measures is
    the
    gain between the THROUGH reference planes (the input loss and the DUT); the sequencer
    accounts for that. ``max_gain_db`` (largest gain expected) and ``dut_p1db_out_dbm`` set
    the generator level, kept well below compression. For a frequency-converting DUT
    ``measure`` measures the conversion gain, the generator at the RF and the analyzer at the IF,
    against THROUGH references at both (noisebench.running.conversion_gain); ``max_gain_db`` is
    then the largest conversion gain and ``dut_p1db_out_dbm`` the IF output's P1dB, and
    ``u_generator_flatness_db`` / ``u_analyzer_flatness_db`` weight the two references.
    """

    model_config = _STRICT
    source: Literal["measure", "file", "constant"]
    value_db: float | None = None
    u_gain_db: float = Field(
        default=0.0, ge=0, le=10, description="standard uncertainty of a file/constant gain, dB"
    )
    file: str | None = None
    max_gain_db: float | None = None
    dut_p1db_out_dbm: float | None = None
    rbw_hz: float = Field(default=1e3, gt=0, description="RBW of the tone measurement")
    readings: int = Field(default=3, ge=2, le=100)
    averages: int = Field(default=4, ge=1, le=10_000)
    linearity_u_db: float = Field(default=0.02, ge=0, le=5)
    u_generator_flatness_db: float | None = Field(
        default=None,
        ge=0,
        le=10,
        description="frequency-converting DUT: the generator's level difference between RF "
        "and IF, standard u, dB",
    )
    u_analyzer_flatness_db: float | None = Field(
        default=None,
        ge=0,
        le=10,
        description="frequency-converting DUT: the analyzer's response difference between IF "
        "and RF, standard u, dB",
    )

    _gain_range = _ranged("dut_gain_db", "gain", "value_db", "max_gain_db")

    def flatness_u_db(self, instrument: Literal["generator", "analyzer"]) -> float:
        """The declared flatness u of ``instrument`` (a converter's measured gain), dB; else
        :data:`DEFAULT_FLATNESS_U_DB`."""
        value = getattr(self, f"u_{instrument}_flatness_db")
        return DEFAULT_FLATNESS_U_DB if value is None else float(value)

    _p1db_range = _ranged("dut_p1db_dbm", "gain", "dut_p1db_out_dbm")

    @model_validator(mode="after")
    def _complete(self) -> GainSection:
        needs = {
            "constant": ("value_db", "e.g. value_db = 20.0"),
            "file": ("file", 'e.g. file = "dut_gain.s2p"'),
        }
        if self.source in needs and getattr(self, needs[self.source][0]) is None:
            name, fix = needs[self.source]
            raise InputError(name, f'is required with source = "{self.source}"', fix=fix)
        if self.source == "measure":
            for name in ("max_gain_db", "dut_p1db_out_dbm"):
                if getattr(self, name) is None:
                    raise InputError(
                        name,
                        'is required with source = "measure" (it sets the generator level)',
                        fix="give the DUT's datasheet value",
                    )
        if self.source != "measure":
            for name in ("u_generator_flatness_db", "u_analyzer_flatness_db"):
                if getattr(self, name) is not None:
                    raise InputError(
                        name,
                        f'is only used with source = "measure" (source is "{self.source}")',
                        fix=f"remove {name}",
                    )
        for name, used_by in (("value_db", "constant"), ("file", "file")):
            if self.source != used_by and getattr(self, name) is not None:
                raise InputError(
                    name,
                    f'is only used with source = "{used_by}" (source is "{self.source}")',
                    fix=f"remove {name}",
                )
        return self


class CalibrationSection(BaseModel):
    """When a stored calibration (floor or system) may be reused."""

    model_config = _STRICT
    max_age_s: float = Field(
        default=3600.0, gt=0, description="older calibrations are measured again"
    )
    target_ratio: float = Field(
        default=0.5,
        gt=0,
        le=10,
        description="calibration densities aim at this fraction of the point target",
    )


class SafetySection(BaseModel):
    """Bounds for the pre-switch power checks (see noisebench.running.safety)."""

    model_config = _STRICT
    dut_bandwidth_hz: float | None = Field(
        default=None, gt=0, description="band over which the DUT has gain (None: 2 x top freq)"
    )
    dut_max_gain_db: float | None = None
    dut_max_input_dbm: float | None = None
    compression_backoff_db: float = Field(default=10.0, ge=0, le=60)
    caution_backoff_db: float = Field(default=20.0, ge=0, le=80)

    _gain_range = _ranged("dut_gain_db", "safety", "dut_max_gain_db")


class ExpectSection(BaseModel):
    """Prior knowledge for ``noisebench estimate`` (the simulator supplies what is missing)."""

    model_config = _STRICT
    dut_nf_db: float | None = None
    dut_gain_db: float | None = None
    analyzer_nf_db: float | None = None
    enr_db: float | None = None
    sweep_time_factor: float = Field(
        default=2.5, gt=0, le=100, description="k in sweep time = k span / RBW^2"
    )
    overhead_s: float = Field(default=0.02, ge=0, le=60, description="per trace, s")

    _gain_range = _ranged("dut_gain_db", "expect", "dut_gain_db")
    _nf_range = _ranged("nf_db", "expect", "dut_nf_db", "analyzer_nf_db")
    _enr_range = _ranged("enr_db", "expect", "enr_db")


class OutputSection(BaseModel):
    """Where results go: ``folder/<date>_<dut>_<method>/``."""

    model_config = _STRICT
    folder: str = "runs"
    plots: bool = True
    report: bool = True


# --------------------------------------------------------------------------- the plan


@dataclass(frozen=True)
class FrequencyPoint:
    """One frequency to measure with its effective acquisition policy.

    ``freq_hz`` is where the analyzer reads. For a frequency-converting DUT that is the IF;
    ``rf_hz``/``lo_hz`` then name the point (results are reported at the RF).
    """

    freq_hz: float
    segment: int | None
    policy: AcquisitionPolicy
    rf_hz: float | None = None
    lo_hz: float | None = None

    @property
    def report_hz(self) -> float:
        """The frequency the result is stored at: the RF of a converter, else ``freq_hz``."""
        return self.rf_hz if self.rf_hz is not None else self.freq_hz


class SwitchingSection(BaseModel):
    """How the noise source's hot and cold readings are ordered (Y-factor).

    ``per_sweep``: the whole sweep (or a block of groups) is read in four passes, cold forward,
    hot backward, hot forward, cold backward: every point's hot and cold readings are
    symmetric in time, so a linear drift cancels, with two switches per block instead of
    three or four per point. ``per_group``: hot-cold-cold-hot at each group. ``auto`` takes
    ``per_sweep`` when there are several groups and the source needs settling time. A block
    lasts at most ``max_block_s`` of instrument time: common practice takes a warmed-up
    receiver's gain drift as close to linear over a minute; with a drift model
    (``drift_curvature_db_per_s2``, the t^2 coefficient of the gain in dB) the block is kept
    short enough that the curvature's residual stays below a tenth of the target.
    """

    model_config = _STRICT
    mode: Literal["auto", "per_sweep", "per_group"] = "auto"
    max_block_s: float = Field(default=60.0, gt=0)
    drift_curvature_db_per_s2: float | None = Field(default=None, gt=0)


class Plan(BaseModel):
    """A complete, validated measurement plan."""

    model_config = _STRICT
    method: Method
    name: str | None = Field(default=None, max_length=200)
    operator: str | None = Field(default=None, max_length=200)
    station: str | None = Field(default=None, max_length=200)
    dut: DutSection = Field(default_factory=DutSection)
    bench: BenchSection
    acquisition: AcquisitionPolicy = Field(default_factory=AcquisitionPolicy)
    sweep: SweepSection
    enr: EnrSection = Field(default_factory=EnrSection)
    corrections: CorrectionsSection = Field(default_factory=CorrectionsSection)
    gain: GainSection | None = None
    calibration: CalibrationSection = Field(default_factory=CalibrationSection)
    switching: SwitchingSection = Field(default_factory=SwitchingSection)
    safety: SafetySection = Field(default_factory=SafetySection)
    expect: ExpectSection = Field(default_factory=ExpectSection)
    output: OutputSection = Field(default_factory=OutputSection)
    uncertainty: _UncertaintySection | None = None
    limits: _LimitsSection | None = None
    conversion: ConversionSection | None = None

    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)

    @model_validator(mode="before")
    @classmethod
    def _triples_make_the_sweep(cls, data: Any) -> Any:
        """In ``triples`` mode the triples list the RF points: the sweep is made from them."""
        if not isinstance(data, dict):
            return data
        conv = data.get("conversion")
        if isinstance(conv, dict) and conv.get("mode") == "triples":
            if "sweep" in data:
                raise InputError(
                    "sweep",
                    "is not used in conversion mode 'triples' (the triples list the RF)",
                    fix="delete the [sweep] section, or use mode fixed_lo / fixed_if",
                )
            triples = conv.get("triples")
            if isinstance(triples, list) and triples:
                rf = [t[0] for t in triples if isinstance(t, list) and t]
                data = {**data, "sweep": {"freqs_hz": rf}}
        return data

    @property
    def base_dir(self) -> Path:
        """Folder that relative paths in the plan are relative to."""
        return self._base_dir

    def with_base_dir(self, folder: Path) -> Plan:
        self._base_dir = Path(folder)
        return self

    def resolve_path(self, name: str) -> Path:
        """A plan file name resolved against the plan's folder."""
        path = Path(name).expanduser()
        return path if path.is_absolute() else self._base_dir / path

    def points(self) -> list[FrequencyPoint]:
        """Every frequency point, ascending, with its merged acquisition policy.

        With a ``[conversion]`` section the points are read at their IF (``freq_hz``) and
        carry their RF and LO; they are ordered by RF."""
        if self.conversion is not None:
            return self._conversion_points()
        return self._sweep_points()

    def _conversion_points(self) -> list[FrequencyPoint]:
        from noisebench.running.conversion import frequency_plan

        section = self.conversion
        assert section is not None
        rf_points = self._sweep_points() if section.mode != "triples" else []
        fp = frequency_plan(section, [p.freq_hz for p in rf_points])
        policies = [p.policy for p in rf_points] or [self.acquisition] * len(fp.rf_hz)
        segments = [p.segment for p in rf_points] or [None] * len(fp.rf_hz)
        out = [
            FrequencyPoint(float(i), seg, pol, float(r), float(lo))
            for i, r, lo, pol, seg in zip(
                fp.if_hz, fp.rf_hz, fp.lo_hz, policies, segments, strict=True
            )
        ]
        return sorted(out, key=lambda p: p.report_hz)

    def frequency_plan(self):
        """The conversion's :class:`~noisebench.science.conversion.FrequencyPlan` (or None)."""
        if self.conversion is None:
            return None
        from noisebench.running.conversion import frequency_plan

        rf = [] if self.conversion.mode == "triples" else [p.freq_hz for p in self._sweep_points()]
        return frequency_plan(self.conversion, rf)

    def _sweep_points(self) -> list[FrequencyPoint]:
        out: list[FrequencyPoint] = []
        if self.sweep.freqs_hz is not None:
            out += [
                FrequencyPoint(float(f), None, self.acquisition)
                for f in sorted(self.sweep.freqs_hz)
            ]
        for i, seg in enumerate(self.sweep.segments):
            policy = self.segment_policy(i)
            out += [FrequencyPoint(float(f), i, policy) for f in seg.frequencies_hz()]
        return sorted(out, key=lambda p: p.freq_hz)

    def segment_policy(self, index: int) -> AcquisitionPolicy:
        """The acquisition policy of segment ``index`` (plan defaults + its overrides)."""
        merged = self.acquisition.model_dump()
        merged.update(self.sweep.segments[index].overrides())
        return AcquisitionPolicy.model_validate(merged)

    def freqs_hz(self) -> np.ndarray:
        return np.array([p.freq_hz for p in self.points()])

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dump (stored with the results)."""
        return self.model_dump(mode="json", exclude_none=True)

    @property
    def is_simulated(self) -> bool:
        return is_simulated(self.bench.analyzer.resource)


# --------------------------------------------------------------------------- loading


def parse_plan(
    data: dict[str, Any],
    *,
    base_dir: Path | None = None,
    source: str | None = None,
    check_files: bool = True,
) -> Plan:
    """Validate a plan table (schema and cross-field checks); raise :class:`PlanError`."""
    try:
        plan = Plan.model_validate(data)
    except ValidationError as exc:
        raise PlanError(format_validation_error(exc), source=source) from None
    from noisebench.running.plan_checks import (
        _resolve_profiles,
        _resolve_sampled,
        cross_check,
    )

    plan.with_base_dir(base_dir or Path.cwd())
    _resolve_profiles(plan)
    _resolve_sampled(plan)
    problems = cross_check(plan, check_files=check_files)
    if problems:
        raise PlanError(problems, source=source)
    return plan


def load_plan(
    path: str | Path, *, check_files: bool = True, defines: Mapping[str, str] | None = None
) -> Plan:
    """Read and validate a TOML plan file. Raises :class:`PlanError` (all problems) or OSError.

    ``${NAME}`` placeholders in ``[bench]`` take ``defines``, else the environment
    (:mod:`noisebench.running.plan_values`)."""
    path = Path(path)
    try:
        check_file_size(path, MAX_PLAN_BYTES, field="plan", what="plan")
    except InputError as exc:
        raise PlanError([str(exc)], source=str(path)) from None
    try:
        text = path.read_text(encoding="utf-8-sig")  # a byte-order mark (Windows editors) is ok
    except UnicodeDecodeError as exc:
        raise PlanError(
            [f"not UTF-8 text (byte {exc.start}); save the plan as UTF-8"], source=str(path)
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PlanError([f"not valid TOML: {exc}"], source=str(path)) from None
    from noisebench.running.plan_values import expand_placeholders

    data, problems = expand_placeholders(data, defines)
    if problems:
        raise PlanError(problems, source=str(path))
    return parse_plan(
        data, base_dir=path.resolve().parent, source=str(path), check_files=check_files
    )


def validate_plan_file(path: str | Path) -> list[str]:
    """Every problem of a plan file as a line (empty list: the plan is good)."""
    try:
        load_plan(path)
    except PlanError as exc:
        return exc.problems
    except OSError as exc:
        return [f"{path}: cannot read ({exc.strerror or exc})"]
    return []
