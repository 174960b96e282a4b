"""What an analyzer is asked to do, what it really did, and what it returned.

``AcquisitionRequest`` is what the sequencer asks for; ``AcquisitionSettings`` is what the
instrument reports it applied (instruments round RBW, points, averages — the physics must use
the applied values). ``Trace`` and ``MarkerReading`` always carry the applied settings, so the
estimator never guesses.

Units: Hz, seconds, dB, dBm; trace values in the unit named by ``Trace.unit``.
"""

from __future__ import annotations

import functools
from datetime import datetime, timezone
from enum import Enum
from typing import Any

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    field_serializer,
    field_validator,
    model_validator,
)

from noisebench.errors import InputError
from noisebench.science.filters import GAUSSIAN, RbwFilter

# The filter shape is part of the settings an instrument reports; back ends name it from here.
from noisebench.science.filters import FilterKind as FilterKind


class Detector(str, Enum):
    """How the analyzer reduces the samples that fall into one trace point."""

    SAMPLE = "sample"  # one sample per point
    RMS = "rms"  # power (RMS) average over the point's samples
    AVERAGE = "average"  # average over the point's samples on the averaging scale
    PEAK = "peak"  # max hold within the point: biased for noise, refused by the estimator
    NEGATIVE_PEAK = "negative_peak"


class AveragingScale(str, Enum):
    """The scale on which trace averaging (and the AVERAGE detector) combines values."""

    POWER = "power"  # linear power: unbiased for noise
    LOG_POWER = "log_power"  # dB values averaged: reads 2.507 dB low for Gaussian noise
    VOLTAGE = "voltage"  # envelope volts averaged: reads ~1.049 dB low for many averages


class SweepMode(str, Enum):
    SWEPT = "swept"
    FFT = "fft"


class TraceUnit(str, Enum):
    DBM = "dBm"  # power in the RBW, per point
    WATT = "W"  # power in the RBW, per point
    DBM_PER_HZ = "dBm/Hz"  # density already normalised by the instrument (noise marker style)
    W_PER_HZ = "W/Hz"


class AcquisitionRequest(BaseModel):
    """Settings the caller asks for; ``None`` leaves the instrument's current/default value."""

    model_config = ConfigDict(extra="forbid")

    center_hz: float = Field(gt=0)
    span_hz: float = Field(ge=0)
    rbw_hz: float = Field(gt=0)
    vbw_hz: float | None = Field(default=None, gt=0)
    detector: Detector = Detector.RMS
    averaging_scale: AveragingScale = AveragingScale.POWER
    averages: int = Field(default=1, ge=1, le=1_000_000)
    points: int = Field(default=1001, ge=1, le=1_000_001)
    ref_level_dbm: float | None = None
    attenuation_db: float | None = Field(default=None, ge=0)
    preamp: bool | None = None
    mode: SweepMode = SweepMode.SWEPT
    sweep_time_s: float | None = Field(default=None, gt=0)

    @property
    def start_hz(self) -> float:
        return self.center_hz - self.span_hz / 2.0

    @property
    def stop_hz(self) -> float:
        return self.center_hz + self.span_hz / 2.0


class AcquisitionSettings(BaseModel):
    """Settings the instrument reports it applied. Everything the physics depends on is here."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    center_hz: float = Field(gt=0)
    span_hz: float = Field(ge=0)
    rbw_hz: float = Field(gt=0)
    rbw_filter: RbwFilter = GAUSSIAN
    vbw_hz: float | None = Field(default=None, gt=0)
    detector: Detector
    averaging_scale: AveragingScale
    averages: int = Field(ge=1)
    points: int = Field(ge=1)
    ref_level_dbm: float | None = None
    attenuation_db: float | None = None
    preamp: bool | None = None
    mode: SweepMode = SweepMode.SWEPT
    sweep_time_s: float | None = Field(default=None, gt=0)
    detector_samples: float | None = Field(
        default=None,
        gt=0,
        description="independent power samples the detector combined per point (1 for SAMPLE)",
    )

    @property
    def start_hz(self) -> float:
        return self.center_hz - self.span_hz / 2.0

    @property
    def stop_hz(self) -> float:
        return self.center_hz + self.span_hz / 2.0

    @property
    def enbw_hz(self) -> float:
        """Equivalent noise bandwidth of the applied RBW filter, Hz."""
        return self.rbw_filter.enbw_hz(self.rbw_hz)

    def frequencies_hz(self) -> np.ndarray:
        """Frequency of every trace point, Hz (zero span: all at the centre)."""
        if self.points == 1 or self.span_hz == 0:
            return np.full(self.points, self.center_hz)
        # a copy of the kept axis: the same numbers as a fresh np.linspace, without its cost
        # on every trace of a group
        return _linear_axis(self.start_hz, self.stop_hz, self.points).copy()


@functools.lru_cache(maxsize=256)
def _linear_axis(start_hz: float, stop_hz: float, points: int) -> np.ndarray:
    axis = np.linspace(start_hz, stop_hz, points)
    axis.flags.writeable = False  # kept: callers get copies
    return axis


def _now() -> datetime:
    return datetime.now(timezone.utc)


class Trace(BaseModel):
    """An averaged trace: one value per point, in ``unit``, with the applied settings."""

    model_config = ConfigDict(arbitrary_types_allowed=True, extra="forbid")

    freq_hz: np.ndarray
    values: np.ndarray
    unit: TraceUnit = TraceUnit.DBM
    settings: AcquisitionSettings
    acquisition_time_s: float | None = Field(
        default=None, ge=0, description="instrument time spent on the trace"
    )
    timestamp: datetime = Field(default_factory=_now)
    instrument: str | None = None
    excluded: np.ndarray | None = Field(
        default=None,
        description="points the instrument marks unusable (a sampled receiver's LO leakage); "
        "the estimator leaves them out and reports them like spurs",
    )

    @field_validator("freq_hz", "values", mode="before")
    @classmethod
    def _as_array(cls, v: Any) -> np.ndarray:
        arr = np.asarray(v, dtype=float)
        if arr.ndim != 1:
            raise InputError("trace", f"must be one-dimensional (got shape {arr.shape})")
        return arr

    @field_validator("excluded", mode="before")
    @classmethod
    def _as_mask(cls, v: Any) -> np.ndarray | None:
        if v is None:
            return None
        arr = np.asarray(v, dtype=bool)
        if arr.ndim != 1:
            raise InputError("trace.excluded", f"must be one-dimensional (got shape {arr.shape})")
        return arr

    @model_validator(mode="after")
    def _check(self) -> Trace:
        if self.freq_hz.shape != self.values.shape:
            raise InputError(
                "trace.values",
                f"has {self.values.size} points but freq_hz has {self.freq_hz.size}",
                fix="pass one value per frequency",
            )
        if self.values.size == 0:
            raise InputError("trace.values", "is empty")
        if self.excluded is not None and self.excluded.shape != self.values.shape:
            raise InputError(
                "trace.excluded",
                f"has {self.excluded.size} flags for {self.values.size} points",
                fix="pass one flag per point (or None)",
            )
        if not np.all(np.isfinite(self.freq_hz)):
            raise InputError("trace.freq_hz", "must be finite")
        return self

    @field_serializer("freq_hz", "values")
    def _ser(self, v: np.ndarray) -> list[float]:
        return v.tolist()

    @field_serializer("excluded")
    def _ser_mask(self, v: np.ndarray | None) -> list[bool] | None:
        return None if v is None else v.tolist()


class MarkerKind(str, Enum):
    BAND_POWER = "band_power"  # total power in a band, dBm
    NOISE_DENSITY = "noise_density"  # instrument-normalised density, dBm/Hz


class MarkerReading(BaseModel):
    """A marker reading: band power (dBm over ``band_hz``) or density (dBm/Hz) at ``freq_hz``."""

    model_config = ConfigDict(extra="forbid")

    freq_hz: float = Field(gt=0)
    kind: MarkerKind
    value_db: float  # dBm for BAND_POWER, dBm/Hz for NOISE_DENSITY
    band_hz: float | None = Field(default=None, gt=0)
    settings: AcquisitionSettings
    acquisition_time_s: float | None = Field(default=None, ge=0)
    timestamp: datetime = Field(default_factory=_now)
    instrument: str | None = None
    instrument_corrected: bool = Field(
        default=False,
        description="True when the instrument already applied detector and ENBW corrections",
    )
