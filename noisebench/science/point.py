"""The result of one frequency point, whatever the method."""

from __future__ import annotations

from enum import Enum
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field


class Method(str, Enum):
    GAIN = "gain"
    Y_FACTOR = "y_factor"


class PointFlag(str, Enum):
    """Qualifiers attached to a point result. Each one means 'read this point with care'."""

    Y_TOO_SMALL = "y_too_small"  # Y close to 1: NF very sensitive to jitter
    NEAR_ANALYZER_FLOOR = "near_analyzer_floor"  # DUT noise within a few dB of the floor
    ENR_EXTRAPOLATED = "enr_extrapolated"  # ENR clamped outside the table's range
    SPURS_EXCLUDED = "spurs_excluded"  # narrowband lines removed from the band
    TIME_LIMIT = "time_limit"  # target uncertainty not reached within the time limit
    EXCESS_SCATTER = "excess_scatter"  # trace scatter well above the statistics' prediction
    LOW_GAIN = "low_gain"  # DUT gain low: second-stage correction large
    COMPRESSION_RISK = "compression_risk"  # total power near the analyzer's limit
    NEGATIVE_TE = "negative_te"  # corrected Te below zero: physically implausible reading
    DRIFT = "drift"  # hot/cold readings drifted in a way the symmetric schedule cannot cancel
    GAIN_NOT_MEASURED = "gain_not_measured"  # gain stated (file/constant), not measured here
    # the calibration this point was computed with carried a flag of its own
    CAL_Y_TOO_SMALL = "cal_y_too_small"  # system calibration Y close to 1
    CAL_TIME_LIMIT = "cal_time_limit"  # calibration stopped by its time limit before its target
    CAL_EXCESS_SCATTER = "cal_excess_scatter"  # a calibration reading scattered too much
    CAL_SPURS_EXCLUDED = "cal_spurs_excluded"  # lines removed from a calibration reading
    CAL_NEAR_ANALYZER_FLOOR = "cal_near_analyzer_floor"  # calibration close to the floor


VERDICT_BLOCKING_FLAGS: frozenset[PointFlag] = frozenset(
    {PointFlag.NEGATIVE_TE, PointFlag.ENR_EXTRAPOLATED, PointFlag.DRIFT}
)
"""Flags that say the number itself cannot be defended: a point carrying one is never PASS
(a check that would pass becomes INDETERMINATE; FAIL stays FAIL). NEGATIVE_TE: the reading is
below what the source termination alone gives, which no working DUT does (a DUT at the analyzer
floor reads like this). ENR_EXTRAPOLATED: the ENR was clamped outside its calibrated range, so
its error is unknown and in no budget. DRIFT: the hot/cold readings drifted in a way the
symmetric schedule cannot cancel (curvature, a step, or a linear drift so fast that its
second-order residual is no longer small against the target), so Y carries an error that is in
no budget. Every other flag annotates: its effect on the number is inside the stated
uncertainty (Y_TOO_SMALL, NEAR_ANALYZER_FLOOR, LOW_GAIN, EXCESS_SCATTER, TIME_LIMIT,
SPURS_EXCLUDED, the CAL_* flags) or is a caution with a 20 dB margin (COMPRESSION_RISK);
GAIN_NOT_MEASURED only concerns gain checks (``GAIN_CHECK_BLOCKING_FLAGS``)."""

GAIN_CHECK_BLOCKING_FLAGS: frozenset[PointFlag] = frozenset({PointFlag.GAIN_NOT_MEASURED})
"""Flags that make a point's gain unfit for a gain limit (minimum, maximum, flatness): such a
check is INDETERMINATE whatever the numbers, a FAIL included, because the gain was not measured
on this unit. GAIN_NOT_MEASURED: the gain method used a stated gain (``[gain] source = "file"``
or ``"constant"``), which is what the point's ``gain_db`` reports; judged against a gain limit
it would pass (or fail) trivially, whatever the unit does. The NF check is unaffected."""

_CALIBRATION_FLAG_FOR = {
    "y_too_small": PointFlag.CAL_Y_TOO_SMALL,
    "time_limit": PointFlag.CAL_TIME_LIMIT,
    "excess_scatter": PointFlag.CAL_EXCESS_SCATTER,
    "spurs_excluded": PointFlag.CAL_SPURS_EXCLUDED,
    "near_analyzer_floor": PointFlag.CAL_NEAR_ANALYZER_FLOOR,
    "enr_extrapolated": PointFlag.ENR_EXTRAPOLATED,
}


def calibration_point_flags(calibration_flags: list[str] | list[PointFlag]) -> list[PointFlag]:
    """The point flags that carry a calibration's own flags (``time_limit`` becomes
    ``cal_time_limit``; ENR_EXTRAPOLATED stays itself: the same ENR table was used)."""
    out: list[PointFlag] = []
    for flag in calibration_flags:
        name = flag.value if isinstance(flag, PointFlag) else str(flag)
        mapped = _CALIBRATION_FLAG_FOR.get(name)
        if mapped is not None and mapped not in out:
            out.append(mapped)
    return out


class ConversionInfo(BaseModel):
    """Frequency plan and SSB/DSB results of one point of a frequency-converting DUT.

    Frequencies in Hz (``image_hz = 2 lo_hz - rf_hz``); ``sideband``: ``"upper"`` when the RF
    lies above the LO. ``nf_type`` says which of the SSB/DSB values the point's ``nf_db`` and
    ``te_k`` hold. ``image_rejection_db``: the converter's image response below its signal
    response (None: no image response). ``image_correction_db = nf_ssb_db - nf_dsb_db =
    10 log10(1 + G_i/G_s)``. ``enr_image_db``: the ENR used for the image band's share;
    ``cal_if_enr_db``: the ENR at the IF used to calibrate the analyzer. Gain method:
    ``gain_source`` says where the conversion gain came from (``measured`` with the generator at
    the RF and the analyzer at the IF, or the plan's ``file``/``constant``); a measured one is
    ``measured_gain_db`` (between the THROUGH planes: input cable and converter) with its
    standard uncertainty ``u_measured_gain_db``; ``gain_db`` adds the input loss back.
    """

    model_config = ConfigDict(extra="forbid")

    rf_hz: float = Field(gt=0)
    lo_hz: float = Field(gt=0)
    if_hz: float = Field(gt=0)
    image_hz: float = Field(gt=0)
    sideband: Literal["lower", "upper"]
    nf_type: Literal["ssb", "dsb"]
    nf_ssb_db: float
    nf_dsb_db: float
    te_ssb_k: float
    te_dsb_k: float
    image_rejection_db: float | None = None
    image_correction_db: float = Field(ge=0)
    enr_image_db: float | None = None
    cal_if_enr_db: float | None = None
    lo_level_dbm: float | None = None
    gain_source: Literal["measured", "file", "constant"] | None = None
    measured_gain_db: float | None = None
    u_measured_gain_db: float | None = Field(default=None, ge=0)


class PointResult(BaseModel):
    """NF, noise temperature and gain at one frequency, with uncertainty and flags.

    ``u_nf_db`` is the standard uncertainty of the statistical part (jitter of the densities),
    propagated through the method; the full budget lives in :mod:`noisebench.science.uncertainty`.
    ``floor_margin_db`` is how far the DUT's output noise sits above the analyzer's own noise;
    ``floor_correction_db`` is how much the second-stage correction changed the NF.
    ``densities_w_per_hz`` keeps the raw inputs (e.g. ``dut``/``floor`` or
    ``hot``/``cold``/``hot_cal``/``cold_cal``) for plots and re-analysis.
    """

    model_config = ConfigDict(extra="forbid")

    freq_hz: float = Field(gt=0)
    method: Method
    nf_db: float
    te_k: float
    gain_db: float | None = None
    y_db: float | None = None
    u_nf_db: float = Field(ge=0)
    u_te_k: float = Field(ge=0)
    u_gain_db: float | None = Field(default=None, ge=0)
    floor_margin_db: float | None = None
    floor_correction_db: float | None = None
    enr_db: float | None = None
    source_temperature_k: float | None = None
    densities_w_per_hz: dict[str, float] = Field(default_factory=dict)
    flags: list[PointFlag] = Field(default_factory=list)
    averages: int | None = None
    instrument_time_s: float | None = None
    notes: dict[str, Any] = Field(default_factory=dict)
    conversion: ConversionInfo | None = None  # frequency-converting DUTs only; freq_hz is RF

    @property
    def noise_factor(self) -> float:
        return 10.0 ** (self.nf_db / 10.0)
