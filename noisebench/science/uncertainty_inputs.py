"""The `[uncertainty]` section of a plan: the budget inputs (Type B terms, reflections, extra
terms, Monte Carlo settings)."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from noisebench.errors import InputError, input_error_from_validation
from noisebench.science.mismatch import Reflections, _reflection_at, gamma_from_vswr
from noisebench.science.propagation import (
    Distribution,
    MonteCarloSettings,
    TypeB,
    as_type_b,
)

# =========================================================================== plan inputs


class ExtraTerm(BaseModel):
    """A user-defined contribution: ``sensitivity`` (dB per ``unit``) times an input of ``u``."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    name: str = Field(min_length=1, max_length=80)
    uncertainty: TypeB
    unit: str = Field(default="dB", min_length=1, max_length=20)
    sensitivity: float = 1.0

    @field_validator("uncertainty", mode="before")
    @classmethod
    def _bare(cls, value: Any) -> Any:
        return as_type_b(value)


_TYPE_B_FIELDS: dict[str, Distribution] = {
    "enr_db": Distribution.NORMAL,
    "cold_temperature_k": Distribution.RECTANGULAR,
    "linearity_db": Distribution.RECTANGULAR,
    "absolute_amplitude_db": Distribution.RECTANGULAR,
    "dut_gain_db": Distribution.NORMAL,
    "input_loss_db": Distribution.NORMAL,
    "output_loss_db": Distribution.NORMAL,
}

_GAMMA_FIELDS = ("source_hot", "source_cold", "dut_input", "dut_output", "analyzer_input")


class UncertaintyInputs(BaseModel):
    """The influence quantities of a budget (the plan's ``[uncertainty]`` section).

    Every uncertainty is a :class:`TypeB` (a bare number is a standard uncertainty); its default
    distribution for the Monte Carlo is given in brackets. ``None`` means "not given": the term
    is left out of the budget and listed in :attr:`Budget.omitted`.

    * ``enr_db`` [normal], dB: standard uncertainty of the ENR; when None, the ENR table's
      ``u_enr_db`` column (passed by the caller) is used. ``enr_correlated``: the same noise
      source (same table entry) serves calibration and measurement, so its error is one quantity.
    * ``cold_temperature_k`` [rectangular], K: the source's physical (cold) temperature; for
      the gain method the termination's temperature.
    * ``linearity_db`` [rectangular], dB: the analyzer's error on a measured power ratio (Y, or
      N_dut/N_floor); one independent draw per ratio.
    * ``absolute_amplitude_db`` [rectangular], dB: the analyzer's absolute density accuracy
      (level, ENBW, detector); it passes 1:1 into a gain-method NF and cancels in a Y-factor.
    * ``*_gamma`` |Gamma| in [0, 1) of the noise source (hot, cold), DUT input/output and
      analyzer input; each may be given as ``*_vswr`` instead, or read from Touchstone files
      (``dut_touchstone`` .s2p: S11/S22; ``noise_source_touchstone``/``analyzer_touchstone``
      .s1p). Mismatch terms are U-shaped [Harris & Warner 1981].
    * ``dut_gain_db`` [normal], dB: gain-method DUT gain; when None the point's ``u_gain_db``.
    * ``input_loss_db``, ``output_loss_db`` [normal], dB: uncertainty of de-embedded losses.
    * ``extra``: further terms (connector repeatability, ...), each with its sensitivity.
    * ``coverage_factor`` k of the expanded uncertainty U = k*u_c (GUM; default 2).
    * ``method``: ``gum`` or ``monte_carlo`` (then ``monte_carlo`` settings apply).
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    enr_db: TypeB | None = None
    enr_correlated: bool = True
    cold_temperature_k: TypeB | None = None
    linearity_db: TypeB | None = None
    absolute_amplitude_db: TypeB | None = None
    source_hot_gamma: float | None = Field(default=None, ge=0, lt=1)
    source_cold_gamma: float | None = Field(default=None, ge=0, lt=1)
    dut_input_gamma: float | None = Field(default=None, ge=0, lt=1)
    dut_output_gamma: float | None = Field(default=None, ge=0, lt=1)
    analyzer_input_gamma: float | None = Field(default=None, ge=0, lt=1)
    source_hot_vswr: float | None = Field(default=None, ge=1)
    source_cold_vswr: float | None = Field(default=None, ge=1)
    dut_input_vswr: float | None = Field(default=None, ge=1)
    dut_output_vswr: float | None = Field(default=None, ge=1)
    analyzer_input_vswr: float | None = Field(default=None, ge=1)
    dut_touchstone: str | None = None
    noise_source_touchstone: str | None = None
    analyzer_touchstone: str | None = None
    dut_gain_db: TypeB | None = None
    input_loss_db: TypeB | None = None
    output_loss_db: TypeB | None = None
    extra: list[ExtraTerm] = Field(default_factory=list)
    coverage_factor: float = Field(default=2.0, gt=0, le=10)
    method: Literal["gum", "monte_carlo"] = "gum"
    monte_carlo: MonteCarloSettings = Field(default_factory=MonteCarloSettings)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> UncertaintyInputs:
        """Build from a plan table; :class:`InputError` naming the first bad key path.

        The constructor raises pydantic's ValidationError instead (same locations), so that a
        plan can collect every problem at once.
        """
        if not isinstance(data, Mapping):
            raise InputError(
                "uncertainty",
                f"must be a table (got {type(data).__name__})",
                fix="write an [uncertainty] table",
            )
        try:
            return cls.model_validate(dict(data))
        except ValidationError as exc:
            raise input_error_from_validation(exc, "uncertainty") from None

    @model_validator(mode="before")
    @classmethod
    def _convert(cls, data: Any) -> Any:
        if not isinstance(data, Mapping):
            return data
        out = dict(data)
        for name in _TYPE_B_FIELDS:
            if name in out:
                out[name] = as_type_b(out[name])
        return out

    @model_validator(mode="after")
    def _vswr_to_gamma(self) -> UncertaintyInputs:
        for port in _GAMMA_FIELDS:
            vswr = getattr(self, f"{port}_vswr")
            if vswr is None:
                continue
            if getattr(self, f"{port}_gamma") is not None:
                raise ValueError(f"give either {port}_gamma or {port}_vswr, not both")
            # store |Gamma| only, so that a dump of the model validates again
            object.__setattr__(self, f"{port}_gamma", float(gamma_from_vswr(vswr)))
            object.__setattr__(self, f"{port}_vswr", None)
        return self

    @model_validator(mode="after")
    def _files_or_values(self) -> UncertaintyInputs:
        pairs = {
            "dut_touchstone": ("dut_input_gamma", "dut_output_gamma"),
            "noise_source_touchstone": ("source_hot_gamma", "source_cold_gamma"),
            "analyzer_touchstone": ("analyzer_input_gamma",),
        }
        for file_key, value_keys in pairs.items():
            clash = [k for k in value_keys if getattr(self, k) is not None]
            if getattr(self, file_key) is not None and clash:
                raise ValueError(
                    f"{file_key} and {', '.join(clash)} both give the same reflection: keep one"
                )
        return self

    def spec(self, name: str) -> tuple[float, Distribution] | None:
        """``(standard uncertainty, distribution)`` of a TypeB field, or None when not given."""
        value: TypeB | None = getattr(self, name)
        if value is None:
            return None
        default = _TYPE_B_FIELDS[name]
        return value.standard_uncertainty(default), value.shape(default)

    def reflections_at(self, freq_hz: float, *, base_dir: Path | None = None) -> Reflections:
        """|Gamma| of every port at ``freq_hz`` (values, or interpolated from the files)."""
        values = {
            "source_hot": self.source_hot_gamma,
            "source_cold": self.source_cold_gamma,
            "dut_input": self.dut_input_gamma,
            "dut_output": self.dut_output_gamma,
            "analyzer_input": self.analyzer_input_gamma,
        }
        if self.dut_touchstone:
            values["dut_input"] = _reflection_at(self.dut_touchstone, 1, freq_hz, base_dir)
            values["dut_output"] = _reflection_at(self.dut_touchstone, 2, freq_hz, base_dir)
        if self.noise_source_touchstone:
            gamma = _reflection_at(self.noise_source_touchstone, 1, freq_hz, base_dir)
            values["source_hot"] = values["source_cold"] = gamma
        if self.analyzer_touchstone:
            values["analyzer_input"] = _reflection_at(
                self.analyzer_touchstone, 1, freq_hz, base_dir
            )
        return Reflections(**values)
