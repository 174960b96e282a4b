"""Uncertainty budgets for one noise-figure point: GUM law of propagation and Monte Carlo.

What it does
    A *measurement model* maps the measured densities and every influence quantity (ENR, cold
    temperature, linearity, mismatch, gain, loss, ...) to the DUT's noise figure in dB. Each
    influence quantity is an :class:`InputQuantity` written as a *deviation* from its best
    estimate (nominal 0, except where noted), with a standard uncertainty in its own unit and a
    probability distribution. :func:`propagate_gum` linearises the model (sensitivities by
    central differences, one vectorized model call) and combines with the law of propagation of
    uncertainty including correlations [JCGM 100:2008, §5]. :func:`propagate_monte_carlo`
    propagates the distributions themselves [JCGM 101:2008]: M draws per input (vectorized numpy,
    seeded), mean, standard deviation and the probabilistically symmetric coverage interval,
    optionally with the adaptive choice of M (§7.9) and the GUM validation (§8). Both live in
    :mod:`noisebench.science.propagation` and are re-exported here.

Measurement models (reference.md §4, §5, §9)
    Y-factor, with second-stage correction when a calibration is given (the same physics as
    :mod:`noisebench.science.methods.yfactor`)::

        ENR_m = ENR + dENR + M_in (dB)         ENR_c = ENR_cal + dENR' + M_cal (dB)
        Th = T0*ENR_m + Tc  (or T0*(ENR_m + 1) with enr_reference="absolute")
        Y12 = N_h/N_c * L12                    Y2 = N_h,cal/N_c,cal * L2
        Te = (Th - Y*Tc)/(Y - 1)               for (Y12, Th, Tc) and (Y2, Th,cal, Tc,cal)
        G1 = [(N_h - N_c)/(Th - Tc)] / [(N_h,cal - N_c,cal)/(Th,cal - Tc,cal)] * M_out
        Te1 = Te12 - Te2/G1

    ``dENR' = dENR`` (one quantity) when the same source serves calibration and measurement
    (reference.md §9); the cold temperature's error is shared by both (one thermometer).

    Gain method (reference §4, exact floor correction; as :mod:`noisebench.science.methods.gain`)::

        Te = (A*L*M_out*N_dut - A*N_floor + k*T_term) / (k*G*M_in) - Ts
        (no floor: Te = A*M_out*N_dut / (k*G*M_in) - Ts)

    G is the path gain (termination to analyzer). Where it was made from a gain that did not
    hold a loss (a DUT's own gain: both; a THROUGH-referenced gain: the output loss), that
    loss was subtracted from it, so the loss's error enters G as well: G = G_stated / L.

    Then losses inside the path are de-embedded (Friis, as the methods do),
    ``Te_DUT = (Te - (L_in - 1)*Tp_in)/L_in - (L_out - 1)*Tp_out/G_DUT``, and
    ``NF = 10*log10(1 + Te_DUT/T0)`` plus any user-defined extra terms (sensitivity in dB/unit).
    Densities carry relative jitter; L is the analyzer's linearity on a power ratio, A its
    absolute amplitude accuracy (gain method only: it cancels in a ratio).

Mismatch (common practice, first order)
    Each connection contributes a factor ``|1 + Gs*Gl|**2`` with unknown phase: U-shaped, limits
    ``20*log10(1 +/- |Gs||Gl|)`` [Harris & Warner 1981]. ``M_in`` (source / DUT input) and
    ``M_cal`` (source / analyzer input) act on the excess noise delivered by the source, ``M_out``
    (DUT output / analyzer input) on the gain seen by the second stage (Y-factor) or on the
    DUT's output noise (gain method); for the gain method ``M_in`` (termination / DUT input)
    acts on the gain. The source's reflection is the larger of its hot and cold values. The
    change of the DUT's own noise with source match needs its noise parameters (reference §9)
    and is outside this model; add it as an ``extra`` term if known.

Units: Hz, K, W/Hz inside; dB for ratios of the influence quantities; relative density jitter in
percent in the budget tables. The module does no I/O except reading an optional Touchstone file
of reflection coefficients (:func:`load_reflection_file`, through scikit-rf).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)

from noisebench.errors import InputError, MeasurementError, input_error_from_validation
from noisebench.science.physics import BOLTZMANN_J_PER_K, T0_K
from noisebench.science.point import Method, PointResult
from noisebench.science.propagation import (
    Distribution,
    GumResult,
    InputQuantity,
    Model,
    MonteCarloResult,
    MonteCarloSettings,
    TypeB,
    as_type_b,
    propagate_gum,
    propagate_monte_carlo,
    sample_input,
    sensitivity_coefficients,
    standard_uncertainty_from_expanded,
    standard_uncertainty_from_half_width,
)
from noisebench.user_files import MAX_TOUCHSTONE_BYTES, check_file_size

logger = logging.getLogger(__name__)

__all__ = [
    "Budget",
    "Contribution",
    "Distribution",
    "ExtraTerm",
    "GumResult",
    "InputQuantity",
    "MonteCarloResult",
    "MonteCarloSettings",
    "Reflections",
    "TypeB",
    "UncertaintyInputs",
    "budget_for_point",
    "budgets_for_points",
    "gain_method_budget",
    "gamma_from_vswr",
    "load_reflection_file",
    "mismatch_limits_db",
    "mismatch_power_ratio_std",
    "mismatch_standard_uncertainty_db",
    "propagate_gum",
    "propagate_monte_carlo",
    "sample_input",
    "sensitivity_coefficients",
    "standard_uncertainty_from_expanded",
    "standard_uncertainty_from_half_width",
    "vswr_from_gamma",
    "y_factor_budget",
]


def _finite_nonneg(field: str, value: float) -> None:
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not (math.isfinite(value) and value >= 0)
    ):
        raise InputError(
            field,
            f"must be a finite number >= 0 (got {value!r})",
            value=value,
            fix="give a standard uncertainty as a positive number",
        )


# =========================================================================== mismatch


def gamma_from_vswr(vswr: float | np.ndarray) -> float | np.ndarray:
    """Reflection magnitude ``|Gamma| = (VSWR - 1)/(VSWR + 1)`` (dimensionless)."""
    arr = np.asarray(vswr, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr < 1):
        raise InputError(
            "vswr",
            f"must be a finite number >= 1 (got {vswr!r})",
            value=vswr,
            fix="a VSWR is 1 for a perfect match and grows with the reflection",
        )
    out = (arr - 1.0) / (arr + 1.0)
    return float(out) if out.ndim == 0 else out


def vswr_from_gamma(gamma: float | np.ndarray) -> float | np.ndarray:
    """VSWR ``(1 + |Gamma|)/(1 - |Gamma|)`` from a reflection magnitude in [0, 1)."""
    arr = _gamma_array("gamma", gamma)
    out = (1.0 + arr) / (1.0 - arr)
    return float(out) if out.ndim == 0 else out


def _gamma_array(field: str, gamma: Any) -> np.ndarray:
    arr = np.asarray(gamma, dtype=float)
    if not np.all(np.isfinite(arr)) or np.any(arr < 0) or np.any(arr >= 1):
        raise InputError(
            field,
            f"must be a reflection magnitude in [0, 1) (got {gamma!r})",
            value=gamma,
            fix="give |Gamma| (not dB); convert a VSWR with gamma_from_vswr or use the *_vswr key",
        )
    return arr


def mismatch_limits_db(gamma_source: float, gamma_load: float) -> tuple[float, float]:
    """Mismatch limits ``(20log10(1 + |Gs||Gl|), 20log10(1 - |Gs||Gl|))``, dB.

    Reference: Harris & Warner 1981 (reference.md §9).
    """
    rho = float(_gamma_array("gamma_source", gamma_source) * _gamma_array("gamma_load", gamma_load))
    return 20.0 * math.log10(1.0 + rho), 20.0 * math.log10(1.0 - rho)


def mismatch_standard_uncertainty_db(gamma_source: float, gamma_load: float) -> float:
    """Standard uncertainty of the mismatch term in dB: U-shaped, ``a/sqrt(2)``.

    ``a`` is half the width of the limits of :func:`mismatch_limits_db`; to first order this is
    ``DB_PER_NEPER_POWER * sqrt(2) * |Gs||Gl|`` (reference.md §9).
    """
    upper, lower = mismatch_limits_db(gamma_source, gamma_load)
    return standard_uncertainty_from_half_width((upper - lower) / 2.0, Distribution.U_SHAPED)


def mismatch_power_ratio_std(gamma_source: float, gamma_load: float) -> float:
    """Standard deviation of the mismatch power ratio ``|1 + Gs*Gl|**2``: ``sqrt(2)|Gs||Gl|``.

    Exact for a uniformly distributed phase: the ratio is ``1 + rho**2 + 2*rho*cos(phi)``.
    """
    rho = float(_gamma_array("gamma_source", gamma_source) * _gamma_array("gamma_load", gamma_load))
    return math.sqrt(2.0) * rho


class Reflections(BaseModel):
    """Reflection magnitudes |Gamma| (dimensionless, [0, 1)) at one frequency; None = unknown."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)

    source_hot: float | None = Field(default=None, ge=0, lt=1)
    source_cold: float | None = Field(default=None, ge=0, lt=1)
    dut_input: float | None = Field(default=None, ge=0, lt=1)
    dut_output: float | None = Field(default=None, ge=0, lt=1)
    analyzer_input: float | None = Field(default=None, ge=0, lt=1)

    @property
    def source(self) -> float | None:
        """The noise source's reflection: the larger of hot and cold (conservative)."""
        known = [g for g in (self.source_hot, self.source_cold) if g is not None]
        return max(known) if known else None


def load_reflection_file(path: str | Path, port: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """``(freq_hz, |S_pp|)`` from a Touchstone file (scikit-rf); port 1 -> S11, 2 -> S22."""
    path = Path(path).expanduser()
    try:
        stat = path.stat()
    except OSError as exc:
        raise InputError(
            "touchstone",
            f"cannot read {str(path)!r}: {exc.strerror}",
            value=str(path),
            fix="check the path (relative to the plan)",
        ) from None
    check_file_size(path, MAX_TOUCHSTONE_BYTES, field="touchstone", what="Touchstone file")
    freq, mag = _load_reflection_cached(str(path.resolve()), stat.st_mtime_ns, port)
    return freq.copy(), mag.copy()


@lru_cache(maxsize=32)
def _load_reflection_cached(path: str, mtime_ns: int, port: int) -> tuple[np.ndarray, np.ndarray]:
    try:
        import skrf
    except ImportError:  # pragma: no cover - scikit-rf is installed in the dev environment
        raise InputError(
            "touchstone",
            "reading Touchstone files needs scikit-rf",
            fix="pip install scikit-rf, or give |Gamma| values instead",
        ) from None
    logger.debug("reading reflections from %s (port %d)", path, port)
    try:
        net = skrf.Network(path)
    except Exception as exc:  # scikit-rf raises assorted types for bad files
        raise InputError(
            "touchstone",
            f"{path}: not a readable Touchstone file ({exc})",
            value=path,
            fix="export the file as .s1p/.s2p",
        ) from None
    if port < 1 or port > net.nports:
        raise InputError(
            "touchstone",
            f"{path} has {net.nports} port(s), no port {port}",
            value=path,
            fix="use an .s2p for the DUT, an .s1p for one-ports",
        )
    # magnitude vs frequency is interpolated directly (never the Cartesian S values)
    return np.asarray(net.f, dtype=float), np.abs(net.s[:, port - 1, port - 1]).astype(float)


def _reflection_at(path: str | Path, port: int, freq_hz: float, base_dir: Path | None) -> float:
    full = Path(path).expanduser()
    if not full.is_absolute() and base_dir is not None:
        full = base_dir / full
    freq, mag = load_reflection_file(full, port)
    if freq_hz < freq[0] or freq_hz > freq[-1]:
        raise InputError(
            "touchstone",
            f"{full}: {freq_hz:.6g} Hz is outside the file's range {freq[0]:.6g}-{freq[-1]:.6g} Hz",
            value=freq_hz,
            fix="use a file that covers the sweep, or give |Gamma| directly",
        )
    value = float(np.interp(freq_hz, freq, mag))
    return float(_gamma_array(f"{full} |S{port}{port}|", value))


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


# =========================================================================== budget models


class Contribution(BaseModel):
    """One line of a budget: ``contribution_db = sensitivity * u`` (signed)."""

    model_config = ConfigDict(frozen=True)

    name: str
    u: float  # standard uncertainty, in `unit`
    unit: str
    sensitivity: float  # dB per `unit`
    contribution_db: float
    distribution: Distribution

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "u": self.u,
            "unit": self.unit,
            "sensitivity": self.sensitivity,
            "contribution_db": self.contribution_db,
            "distribution": self.distribution.value,
        }


class Budget(BaseModel):
    """The uncertainty budget of the noise figure at one frequency.

    ``nf_db`` is the model's value at the best estimates (equal to the point's NF);
    ``u_combined_db`` the combined standard uncertainty and ``U_expanded_db = k*u_c`` (GUM), or
    for ``method="monte_carlo"`` the Monte Carlo standard deviation and the half-width of its
    probabilistically symmetric coverage interval, with ``k`` the implied ratio. The GUM value
    is always kept in ``gum_u_combined_db``. ``omitted`` names the terms left out for lack of
    data (e.g. unknown reflections).
    """

    model_config = ConfigDict(frozen=True, populate_by_name=True)

    freq_hz: float
    model: Literal["y_factor", "y_factor_uncorrected", "gain"]
    nf_db: float
    contributions: list[Contribution]
    u_combined_db: float
    k: float
    U_expanded_db: float
    method: Literal["gum", "monte_carlo"]
    gum_u_combined_db: float
    monte_carlo: MonteCarloResult | None = None
    omitted: list[str] = Field(default_factory=list)

    @property
    def interval_db(self) -> tuple[float, float]:
        """Coverage interval in dB: the MC interval, or ``nf +/- U`` for the GUM."""
        if self.monte_carlo is not None:
            return self.monte_carlo.interval_low, self.monte_carlo.interval_high
        return self.nf_db - self.U_expanded_db, self.nf_db + self.U_expanded_db

    def contribution(self, name: str) -> Contribution:
        """The line called ``name``; KeyError names the lines there are."""
        for line in self.contributions:
            if line.name == name:
                return line
        raise KeyError(f"{name!r} not in budget (has: {[c.name for c in self.contributions]})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict in the shape stored in ``RunRecord.budgets``."""
        mc = None
        if self.monte_carlo is not None:
            m = self.monte_carlo
            mc = {
                "trials": m.trials,
                "seed": m.seed,
                "coverage": m.coverage,
                "mean_db": m.mean,
                "std_db": m.std,
                "interval_db": [m.interval_low, m.interval_high],
                "adaptive": m.adaptive,
                "converged": m.converged,
                "numerical_tolerance_db": m.numerical_tolerance,
                "gum_validated": m.gum_validated,
            }
        return {
            "freq_hz": self.freq_hz,
            "model": self.model,
            "nf_db": self.nf_db,
            "contributions": [c.to_dict() for c in self.contributions],
            "u_combined_db": self.u_combined_db,
            "k": self.k,
            "U_expanded_db": self.U_expanded_db,
            "method": self.method,
            "gum_u_combined_db": self.gum_u_combined_db,
            "monte_carlo": mc,
            "omitted": list(self.omitted),
        }


def _budget(
    freq_hz: float,
    model_name: str,
    model: Model,
    quantities: list[InputQuantity],
    inputs: UncertaintyInputs,
    method: str | None,
    omitted: list[str],
) -> Budget:
    gum = propagate_gum(model, quantities)
    lines = [
        Contribution(
            name=q.name,
            u=q.u,
            unit=q.unit,
            sensitivity=c,
            contribution_db=cu,
            distribution=q.distribution,
        )
        for q, c, cu in zip(quantities, gum.sensitivities, gum.contributions, strict=True)
    ]
    chosen = method or inputs.method
    if chosen not in ("gum", "monte_carlo"):
        raise InputError("method", f"must be 'gum' or 'monte_carlo' (got {chosen!r})")
    k = inputs.coverage_factor
    if chosen == "gum":
        return Budget(
            freq_hz=freq_hz,
            model=model_name,
            nf_db=gum.value,
            contributions=lines,
            u_combined_db=gum.u_combined,
            k=k,
            U_expanded_db=k * gum.u_combined,
            method="gum",
            gum_u_combined_db=gum.u_combined,
            omitted=omitted,
        )
    settings = inputs.monte_carlo.model_copy(
        update={"seed": _point_seed(inputs.monte_carlo.seed, freq_hz)}
    )
    mc = propagate_monte_carlo(model, quantities, settings=settings, gum=gum)
    k_mc = mc.half_width / mc.std if mc.std > 0 else k
    return Budget(
        freq_hz=freq_hz,
        model=model_name,
        nf_db=gum.value,
        contributions=lines,
        u_combined_db=mc.std,
        k=k_mc,
        U_expanded_db=mc.half_width,
        method="monte_carlo",
        gum_u_combined_db=gum.u_combined,
        monte_carlo=mc,
        omitted=omitted,
    )


def _point_seed(seed: int, freq_hz: float) -> int:
    """A per-point seed: the plan's seed mixed with the frequency (reproducible, order-free)."""
    mixed = np.random.SeedSequence([seed, int(round(freq_hz)) & 0xFFFFFFFFFFFF])
    return int(mixed.generate_state(1, dtype=np.uint64)[0] >> 1)


# =========================================================================== quantities

_STEP_DB = 1e-4
_STEP_PERCENT = 1e-4
_STEP_K = 1e-3


def _positive_density(field: str, value: Any) -> float:
    """A density in W/Hz: finite and > 0, or InputError naming ``field``."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not (math.isfinite(value) and value > 0)
    ):
        raise InputError(
            field,
            f"must be a finite density > 0 W/Hz (got {value!r})",
            value=value,
            fix="pass the estimator's density_w_per_hz",
        )
    return float(value)


def _percent(name: str, value: Any, u: Any) -> float:
    """The relative standard uncertainty ``100*u/value`` (%) of a density and its u (W/Hz)."""
    value = _positive_density(f"{name}_w_per_hz", value)
    if isinstance(u, bool) or not isinstance(u, (int, float)) or not (math.isfinite(u) and u >= 0):
        raise InputError(
            f"u_{name}_w_per_hz",
            f"must be a finite standard uncertainty >= 0 W/Hz (got {u!r})",
            value=u,
            fix="pass the estimator's u_density_w_per_hz",
        )
    return 100.0 * float(u) / value


def _jitter(key: str, name: str, u_percent: float) -> InputQuantity:
    return InputQuantity(key=key, name=name, u=u_percent, unit="%", step=_STEP_PERCENT)


def _type_b_quantity(
    inputs: UncertaintyInputs,
    field: str,
    key: str,
    name: str,
    unit: str,
    step: float,
    omitted: list[str],
    *,
    override: float | None = None,
) -> InputQuantity | None:
    spec = inputs.spec(field)
    if spec is None and override is not None:
        spec = (override, _TYPE_B_FIELDS[field])
    if spec is None:
        omitted.append(f"{name} (no {field} given)")
        return None
    u, dist = spec
    return InputQuantity(key=key, name=name, u=u, unit=unit, step=step, distribution=dist)


def _mismatch_quantity(
    key: str, name: str, gamma_s: float | None, gamma_l: float | None, omitted: list[str]
) -> InputQuantity | None:
    if gamma_s is None or gamma_l is None:
        omitted.append(f"{name} (reflection not given)")
        return None
    return InputQuantity(
        key=key,
        name=name,
        u=mismatch_standard_uncertainty_db(gamma_s, gamma_l),
        unit="dB",
        step=_STEP_DB,
        distribution=Distribution.U_SHAPED,
        mismatch_rho=gamma_s * gamma_l,
    )


def _extra_quantities(inputs: UncertaintyInputs) -> list[tuple[InputQuantity, float]]:
    out = []
    for i, term in enumerate(inputs.extra):
        dist = term.uncertainty.shape(Distribution.NORMAL)
        q = InputQuantity(
            key=f"extra_{i}",
            name=term.name,
            u=term.uncertainty.standard_uncertainty(Distribution.NORMAL),
            unit=term.unit,
            step=_STEP_DB,
            distribution=dist,
        )
        out.append((q, term.sensitivity))
    return out


def _temperature_value(field: str, value: float) -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        raise InputError(
            field,
            f"must be an absolute temperature > 0 K (got {value!r})",
            value=value,
            fix="give kelvin (K = degC + 273.15)",
        )
    return float(value)


def _finite(field: str, value: float) -> float:
    if not (isinstance(value, (int, float)) and math.isfinite(value)):
        raise InputError(field, f"must be a finite number (got {value!r})", value=value)
    return float(value)


def _lin(db: Any) -> Any:
    return 10.0 ** (np.asarray(db) / 10.0)


def _deembed_te(te_path_k: Any, path_gain_lin: Any, losses: _Losses, x: Mapping[str, Any]) -> Any:
    """Te of the DUT inside [input loss, DUT, output loss] (Friis; as the methods do)."""
    l_in = _lin(losses.input_db + x.get("d_loss_in_db", 0.0))
    l_out = _lin(losses.output_db + x.get("d_loss_out_db", 0.0))
    te_after_input = (te_path_k - (l_in - 1.0) * losses.input_tp_k) / l_in
    dut_gain = path_gain_lin * l_in * l_out
    return te_after_input - (l_out - 1.0) * losses.output_tp_k / dut_gain


def _nf_db(
    te_k: Any, t0_k: float, x: Mapping[str, Any], extras: list[tuple[InputQuantity, float]]
) -> Any:
    """NF in dB from Te (NaN where F <= 0) plus the extra terms."""
    factor = 1.0 + te_k / t0_k
    nf = 10.0 * np.log10(np.where(factor > 0, factor, np.nan))
    for q, sensitivity in extras:
        nf = nf + sensitivity * x.get(q.key, 0.0)
    return nf


@dataclass(frozen=True)
class _Losses:
    input_db: float = 0.0
    input_tp_k: float = T0_K
    output_db: float = 0.0
    output_tp_k: float = T0_K


def _losses(
    input_db: float,
    input_tp_k: float | None,
    output_db: float,
    output_tp_k: float | None,
    default_tp_k: float,
) -> _Losses:
    for field, value in (("input_loss_db", input_db), ("output_loss_db", output_db)):
        if _finite(field, value) < 0:
            raise InputError(
                field, f"must be >= 0 dB (got {value!r})", fix="a loss is a positive number of dB"
            )
    tp_in = (
        default_tp_k
        if input_tp_k is None
        else _temperature_value("input_loss_temperature_k", input_tp_k)
    )
    tp_out = (
        default_tp_k
        if output_tp_k is None
        else _temperature_value("output_loss_temperature_k", output_tp_k)
    )
    return _Losses(float(input_db), tp_in, float(output_db), tp_out)


def _loss_quantities(
    inputs: UncertaintyInputs, losses: _Losses, omitted: list[str]
) -> list[InputQuantity | None]:
    out: list[InputQuantity | None] = []
    if losses.input_db != 0.0:
        out.append(
            _type_b_quantity(
                inputs, "input_loss_db", "d_loss_in_db", "input loss", "dB", _STEP_DB, omitted
            )
        )
    if losses.output_db != 0.0:
        out.append(
            _type_b_quantity(
                inputs, "output_loss_db", "d_loss_out_db", "output loss", "dB", _STEP_DB, omitted
            )
        )
    return out


# =========================================================================== Y-factor


EnrReference = Literal["t0", "absolute"]


def _hot_temperature(enr_db: Any, tc_k: Any, t0_k: float, enr_reference: str) -> Any:
    """Th from ENR: ``T0*ENR + Tc`` ("t0", common practice) or ``T0*(ENR + 1)`` ("absolute")."""
    enr = _lin(enr_db)
    if enr_reference == "t0":
        return t0_k * enr + tc_k
    return t0_k * (enr + 1.0) + 0.0 * tc_k


def _te_from_y(y: Any, th_k: Any, tc_k: Any) -> Any:
    """Te = (Th - Y*Tc)/(Y - 1) (reference §5); NaN where Y <= 1."""
    return (th_k - y * tc_k) / np.where(y > 1.0, y - 1.0, np.nan)


@dataclass(frozen=True)
class _YData:
    """Nominal values of one Y-factor point (densities W/Hz, ENR dB, temperatures K)."""

    hot: float
    cold: float
    enr_db: float
    tc_k: float
    hot_cal: float | None = None
    cold_cal: float | None = None
    cal_enr_db: float | None = None
    cal_tc_k: float | None = None

    @property
    def corrected(self) -> bool:
        return self.hot_cal is not None


def _y_model(
    d: _YData,
    reference: str,
    losses: _Losses,
    t0_k: float,
    extras: list[tuple[InputQuantity, float]],
) -> Model:
    """The Y-factor measurement model (deviation form; see the module docstring)."""

    def model(**x: Any) -> np.ndarray:
        d_tc = x.get("d_tc_k", 0.0)
        tc = d.tc_k + d_tc
        n_hot = d.hot * (1.0 + x.get("j_hot", 0.0) / 100.0)
        n_cold = d.cold * (1.0 + x.get("j_cold", 0.0) / 100.0)
        enr_m = (
            d.enr_db
            + x.get("d_enr_db", 0.0)
            + x.get("d_enr_meas_db", 0.0)
            + x.get("d_mm_in_db", 0.0)
        )
        th = _hot_temperature(enr_m, tc, t0_k, reference)
        y12 = n_hot / n_cold * _lin(x.get("d_lin_meas_db", 0.0))
        te12 = _te_from_y(y12, th, tc)
        if not d.corrected:
            return _nf_db(_deembed_te(te12, 1.0, losses, x), t0_k, x, extras)
        assert d.hot_cal is not None and d.cold_cal is not None
        tc_cal = (d.cal_tc_k if d.cal_tc_k is not None else d.tc_k) + d_tc
        enr_c = (
            (d.cal_enr_db if d.cal_enr_db is not None else d.enr_db)
            + x.get("d_enr_db", 0.0)
            + x.get("d_enr_cal_db", 0.0)
            + x.get("d_mm_cal_db", 0.0)
        )
        th_cal = _hot_temperature(enr_c, tc_cal, t0_k, reference)
        n_hot_cal = d.hot_cal * (1.0 + x.get("j_hot_cal", 0.0) / 100.0)
        n_cold_cal = d.cold_cal * (1.0 + x.get("j_cold_cal", 0.0) / 100.0)
        y2 = n_hot_cal / n_cold_cal * _lin(x.get("d_lin_cal_db", 0.0))
        te2 = _te_from_y(y2, th_cal, tc_cal)
        g1 = (
            ((n_hot - n_cold) / (th - tc))
            / ((n_hot_cal - n_cold_cal) / (th_cal - tc_cal))
            * _lin(x.get("d_mm_out_db", 0.0))
        )
        g1 = np.where(g1 > 0, g1, np.nan)
        return _nf_db(_deembed_te(te12 - te2 / g1, g1, losses, x), t0_k, x, extras)

    return model


def y_factor_budget(
    *,
    freq_hz: float,
    hot_w_per_hz: float,
    cold_w_per_hz: float,
    enr_db: float,
    cold_temperature_k: float,
    inputs: UncertaintyInputs,
    u_hot_w_per_hz: float = 0.0,
    u_cold_w_per_hz: float = 0.0,
    hot_cal_w_per_hz: float | None = None,
    cold_cal_w_per_hz: float | None = None,
    u_hot_cal_w_per_hz: float = 0.0,
    u_cold_cal_w_per_hz: float = 0.0,
    cal_enr_db: float | None = None,
    cal_cold_temperature_k: float | None = None,
    u_enr_db: float | None = None,
    enr_correlated: bool | None = None,
    enr_reference: EnrReference = "t0",
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    t0_k: float = T0_K,
    reflections: Reflections | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
) -> Budget:
    """Budget of a Y-factor NF (densities W/Hz, ENR dB, temperatures K) [reference.md §5, §9].

    Same physics as :func:`noisebench.science.methods.y_factor_point`. With ``hot_cal``/``cold_cal``
    the model includes the second-stage correction ``Te1 = Te12 - Te2/G1`` (the calibration's
    ENR and cold temperature default to the measurement's); without them it is the system NF.
    ``u_enr_db`` is the ENR table's standard uncertainty, used when ``inputs.enr_db`` is None.
    Loss temperatures default to the cold temperature. ``reflections`` default to
    ``inputs.reflections_at(freq_hz)`` (relative Touchstone paths resolve against the cwd).
    """
    freq_hz = _positive_freq(freq_hz)
    t0_k = _temperature_value("t0_k", t0_k)
    if enr_reference not in ("t0", "absolute"):
        raise InputError("enr_reference", f"must be 't0' or 'absolute' (got {enr_reference!r})")
    data = _y_data(
        freq_hz,
        hot_w_per_hz,
        cold_w_per_hz,
        enr_db,
        cold_temperature_k,
        hot_cal_w_per_hz,
        cold_cal_w_per_hz,
        cal_enr_db,
        cal_cold_temperature_k,
    )
    losses = _losses(
        input_loss_db,
        input_loss_temperature_k,
        output_loss_db,
        output_loss_temperature_k,
        data.tc_k,
    )
    if losses.output_db != 0.0 and not data.corrected:
        raise InputError(
            "output_loss_db",
            "needs the DUT gain, which only a calibration gives",
            fix="pass the calibration densities, or leave the loss in the path",
        )
    refl = reflections if reflections is not None else inputs.reflections_at(freq_hz)
    omitted: list[str] = []
    correlated = inputs.enr_correlated if enr_correlated is None else bool(enr_correlated)
    qs: list[InputQuantity | None] = _enr_quantities(
        inputs, u_enr_db, data.corrected and not correlated, omitted
    )
    qs.append(
        _type_b_quantity(
            inputs, "cold_temperature_k", "d_tc_k", "cold temperature", "K", _STEP_K, omitted
        )
    )
    qs += [
        _jitter("j_hot", "N_hot jitter", _percent("hot", hot_w_per_hz, u_hot_w_per_hz)),
        _jitter("j_cold", "N_cold jitter", _percent("cold", cold_w_per_hz, u_cold_w_per_hz)),
    ]
    if data.corrected:
        qs += [
            _jitter(
                "j_hot_cal",
                "N_hot,cal jitter",
                _percent("hot_cal", hot_cal_w_per_hz, u_hot_cal_w_per_hz),
            ),
            _jitter(
                "j_cold_cal",
                "N_cold,cal jitter",
                _percent("cold_cal", cold_cal_w_per_hz, u_cold_cal_w_per_hz),
            ),
        ]
    qs.append(
        _type_b_quantity(
            inputs,
            "linearity_db",
            "d_lin_meas_db",
            "linearity Y (measurement)",
            "dB",
            _STEP_DB,
            omitted,
        )
    )
    if data.corrected:
        qs.append(
            _type_b_quantity(
                inputs,
                "linearity_db",
                "d_lin_cal_db",
                "linearity Y (calibration)",
                "dB",
                _STEP_DB,
                [],
            )
        )
    qs.append(
        _mismatch_quantity(
            "d_mm_in_db", "mismatch source / DUT input", refl.source, refl.dut_input, omitted
        )
    )
    if data.corrected:
        qs.append(
            _mismatch_quantity(
                "d_mm_cal_db",
                "mismatch source / analyzer (calibration)",
                refl.source,
                refl.analyzer_input,
                omitted,
            )
        )
        qs.append(
            _mismatch_quantity(
                "d_mm_out_db",
                "mismatch DUT output / analyzer",
                refl.dut_output,
                refl.analyzer_input,
                omitted,
            )
        )
    qs += _loss_quantities(inputs, losses, omitted)
    extras = _extra_quantities(inputs)
    quantities = [q for q in qs if q is not None] + [q for q, _ in extras]
    model = _y_model(data, enr_reference, losses, t0_k, extras)
    name = "y_factor" if data.corrected else "y_factor_uncorrected"
    try:
        return _budget(freq_hz, name, model, quantities, inputs, method, omitted)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="y_factor") from None


def _y_data(
    freq_hz: float,
    hot: float,
    cold: float,
    enr_db: float,
    tc_k: float,
    hot_cal: float | None,
    cold_cal: float | None,
    cal_enr_db: float | None,
    cal_tc_k: float | None,
) -> _YData:
    hot = _positive_density("hot_w_per_hz", hot)
    cold = _positive_density("cold_w_per_hz", cold)
    _hot_above_cold(freq_hz, hot, cold, "")
    if (hot_cal is None) != (cold_cal is None):
        raise InputError(
            "hot_cal_w_per_hz" if hot_cal is None else "cold_cal_w_per_hz",
            "the calibration needs both hot and cold densities",
            fix="pass both, or neither for an uncorrected budget",
        )
    if hot_cal is not None and cold_cal is not None:
        hot_cal = _positive_density("hot_cal_w_per_hz", hot_cal)
        cold_cal = _positive_density("cold_cal_w_per_hz", cold_cal)
        _hot_above_cold(freq_hz, hot_cal, cold_cal, " (calibration)")
    return _YData(
        hot=hot,
        cold=cold,
        enr_db=_finite("enr_db", enr_db),
        tc_k=_temperature_value("cold_temperature_k", tc_k),
        hot_cal=hot_cal,
        cold_cal=cold_cal,
        cal_enr_db=None if cal_enr_db is None else _finite("cal_enr_db", cal_enr_db),
        cal_tc_k=None
        if cal_tc_k is None
        else _temperature_value("cal_cold_temperature_k", cal_tc_k),
    )


def _enr_quantities(
    inputs: UncertaintyInputs, u_enr_db: float | None, separate: bool, omitted: list[str]
) -> list[InputQuantity | None]:
    spec = inputs.spec("enr_db")
    if spec is None and u_enr_db is not None:
        _finite_nonneg("u_enr_db", u_enr_db)
        spec = (float(u_enr_db), Distribution.NORMAL)
    if spec is None:
        omitted.append("ENR (no enr_db given and no table u_enr_db)")
        return []
    u, dist = spec
    if not separate:
        return [
            InputQuantity(
                key="d_enr_db", name="ENR", u=u, unit="dB", step=_STEP_DB, distribution=dist
            )
        ]
    return [
        InputQuantity(
            key="d_enr_meas_db",
            name="ENR (measurement)",
            u=u,
            unit="dB",
            step=_STEP_DB,
            distribution=dist,
        ),
        InputQuantity(
            key="d_enr_cal_db",
            name="ENR (calibration)",
            u=u,
            unit="dB",
            step=_STEP_DB,
            distribution=dist,
        ),
    ]


def _hot_above_cold(freq_hz: float, hot: float, cold: float, what: str) -> None:
    if hot <= cold:
        raise MeasurementError(
            f"hot density <= cold density{what} at {freq_hz:.6g} Hz: "
            "no Y-factor; check that the noise source switches",
            freq_hz=freq_hz,
        )


def _positive_freq(freq_hz: float) -> float:
    if not (isinstance(freq_hz, (int, float)) and math.isfinite(freq_hz) and freq_hz > 0):
        raise InputError(
            "freq_hz", f"must be a finite frequency > 0 Hz (got {freq_hz!r})", value=freq_hz
        )
    return float(freq_hz)


# =========================================================================== gain method


@dataclass(frozen=True)
class _GainData:
    """Nominal values of one gain-method point (W/Hz, linear path gain, K)."""

    dut: float
    gain_lin: float
    ts_k: float
    floor: float | None = None
    floor_tk: float | None = None
    gain_includes_input_loss: bool = True  # False: the stated gain did not hold that loss
    gain_includes_output_loss: bool = True


def _gain_model(
    d: _GainData, losses: _Losses, t0_k: float, extras: list[tuple[InputQuantity, float]]
) -> Model:
    """The gain-method measurement model (deviation form; see the module docstring)."""
    k_b = BOLTZMANN_J_PER_K

    def model(**x: Any) -> np.ndarray:
        scale = _lin(x.get("d_abs_db", 0.0))
        n_dut = (
            d.dut
            * (1.0 + x.get("j_dut", 0.0) / 100.0)
            * scale
            * _lin(x.get("d_lin_db", 0.0) + x.get("d_mm_out_db", 0.0))
        )
        # path gain; a loss the stated gain did not hold was subtracted from it, so an error
        # in that loss moves the path gain too (dB for dB)
        gain = d.gain_lin * _lin(
            x.get("d_gain_db", 0.0)
            + x.get("d_mm_in_db", 0.0)
            - (0.0 if d.gain_includes_input_loss else x.get("d_loss_in_db", 0.0))
            - (0.0 if d.gain_includes_output_loss else x.get("d_loss_out_db", 0.0))
        )
        d_t = x.get("d_ts_k", 0.0)
        ts = d.ts_k + d_t
        if d.floor is not None:
            t_term = (d.floor_tk if d.floor_tk is not None else d.ts_k) + d_t
            n_floor = d.floor * (1.0 + x.get("j_floor", 0.0) / 100.0) * scale
            n_src = n_dut - n_floor + k_b * t_term
            te = np.where(n_src > 0, n_src, np.nan) / (k_b * gain) - ts
        else:
            te = n_dut / (k_b * gain) - ts
        return _nf_db(_deembed_te(te, gain, losses, x), t0_k, x, extras)

    return model


def gain_method_budget(
    *,
    freq_hz: float,
    dut_w_per_hz: float,
    gain_db: float,
    inputs: UncertaintyInputs,
    u_dut_w_per_hz: float = 0.0,
    floor_w_per_hz: float | None = None,
    u_floor_w_per_hz: float = 0.0,
    floor_temperature_k: float | None = None,
    u_gain_db: float | None = None,
    source_temperature_k: float = T0_K,
    input_loss_db: float = 0.0,
    input_loss_temperature_k: float | None = None,
    output_loss_db: float = 0.0,
    output_loss_temperature_k: float | None = None,
    t0_k: float = T0_K,
    reflections: Reflections | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
    gain_includes_input_loss: bool = True,
    gain_includes_output_loss: bool = True,
) -> Budget:
    """Budget of a gain-method NF (densities W/Hz, path gain dB, temperatures K) [reference §4].

    Same physics as :func:`noisebench.science.methods.gain_method_point`: ``gain_db`` is the
    measured
    path gain (termination to analyzer), losses inside it are de-embedded; with
    ``floor_w_per_hz`` the exact floor correction ``Te = (N_dut - N_floor + k*T_term)/(k*G) -
    Ts`` is used. ``u_gain_db`` (the gain's own standard uncertainty) applies when
    ``inputs.dut_gain_db`` is None. Loss and floor temperatures default to the source's.
    ``gain_includes_*_loss=False``: the gain the path gain was made from did not hold that
    loss (a DUT's own gain, or a THROUGH-referenced one), so the loss's error also moves the
    path gain (the point's notes say which).
    ``reflections`` default to ``inputs.reflections_at(freq_hz)``.
    """
    freq_hz = _positive_freq(freq_hz)
    t0_k = _temperature_value("t0_k", t0_k)
    ts_k = _temperature_value("source_temperature_k", source_temperature_k)
    data = _GainData(
        dut=_positive_density("dut_w_per_hz", dut_w_per_hz),
        gain_lin=float(_lin(_finite("gain_db", gain_db))),
        ts_k=ts_k,
        floor=None
        if floor_w_per_hz is None
        else _positive_density("floor_w_per_hz", floor_w_per_hz),
        floor_tk=None
        if floor_temperature_k is None
        else _temperature_value("floor_temperature_k", floor_temperature_k),
        gain_includes_input_loss=bool(gain_includes_input_loss),
        gain_includes_output_loss=bool(gain_includes_output_loss),
    )
    if (
        data.floor is not None
        and (data.dut - data.floor + BOLTZMANN_J_PER_K * (data.floor_tk or ts_k)) <= 0
    ):
        raise MeasurementError(
            f"DUT density at {freq_hz:.6g} Hz is not above the floor minus "
            "the termination's kT: no DUT noise left",
            freq_hz=freq_hz,
        )
    if u_gain_db is not None:
        _finite_nonneg("u_gain_db", u_gain_db)
    losses = _losses(
        input_loss_db, input_loss_temperature_k, output_loss_db, output_loss_temperature_k, ts_k
    )
    refl = reflections if reflections is not None else inputs.reflections_at(freq_hz)
    omitted: list[str] = []
    termination = refl.source_cold if refl.source_cold is not None else refl.source
    qs: list[InputQuantity | None] = [
        _jitter("j_dut", "N_dut jitter", _percent("dut", dut_w_per_hz, u_dut_w_per_hz))
    ]
    if data.floor is not None:
        qs.append(
            _jitter(
                "j_floor",
                "N_floor (floor correction)",
                _percent("floor", floor_w_per_hz, u_floor_w_per_hz),
            )
        )
    qs += [
        _type_b_quantity(
            inputs,
            "dut_gain_db",
            "d_gain_db",
            "DUT gain",
            "dB",
            _STEP_DB,
            omitted,
            override=u_gain_db,
        ),
        _type_b_quantity(
            inputs,
            "absolute_amplitude_db",
            "d_abs_db",
            "absolute amplitude",
            "dB",
            _STEP_DB,
            omitted,
        ),
        _type_b_quantity(
            inputs, "cold_temperature_k", "d_ts_k", "termination temperature", "K", _STEP_K, omitted
        ),
    ]
    if data.floor is not None:
        qs.append(
            _type_b_quantity(
                inputs,
                "linearity_db",
                "d_lin_db",
                "linearity N_dut/N_floor",
                "dB",
                _STEP_DB,
                omitted,
            )
        )
    qs += [
        _mismatch_quantity(
            "d_mm_in_db", "mismatch termination / DUT input", termination, refl.dut_input, omitted
        ),
        _mismatch_quantity(
            "d_mm_out_db",
            "mismatch DUT output / analyzer",
            refl.dut_output,
            refl.analyzer_input,
            omitted,
        ),
    ]
    qs += _loss_quantities(inputs, losses, omitted)
    extras = _extra_quantities(inputs)
    quantities = [q for q in qs if q is not None] + [q for q, _ in extras]
    model = _gain_model(data, losses, t0_k, extras)
    try:
        return _budget(freq_hz, "gain", model, quantities, inputs, method, omitted)
    except MeasurementError as exc:
        raise exc.add_context(freq_hz=freq_hz, method="gain") from None


# =========================================================================== from a point


def budget_for_point(
    point: PointResult,
    inputs: UncertaintyInputs,
    *,
    calibration: Any = None,
    u_enr_db: float | None = None,
    t0_k: float | None = None,
    base_dir: Path | None = None,
    method: Literal["gum", "monte_carlo"] | None = None,
) -> Budget:
    """The budget of a finished :class:`PointResult`, from what the methods stored in it.

    Uses ``point.densities_w_per_hz`` (``dut``/``floor`` or ``hot``/``cold``/``hot_cal``/
    ``cold_cal``), ``point.enr_db``, ``point.source_temperature_k`` and the notes the methods
    record (path gain, losses and their temperatures, ENR reference and u, calibration ENR and
    cold temperature, T0). The densities' standard uncertainties come from
    ``point.notes["u_densities_w_per_hz"]``; without them one common relative jitter is inferred
    that reproduces ``point.u_nf_db``. ``calibration`` (a ``CalibrationPoint`` or its dict)
    supplies the calibration when the point does not hold ``hot_cal``/``cold_cal``.
    ``u_enr_db`` overrides the ENR table's u stored in the notes; ``base_dir`` resolves
    relative Touchstone paths.
    """
    if not isinstance(point, PointResult):
        raise InputError(
            "point",
            f"must be a PointResult (got {type(point).__name__})",
            fix="pass the methods' result",
        )
    notes = point.notes or {}
    t0 = float(t0_k if t0_k is not None else notes.get("t0_k") or T0_K)
    refl = inputs.reflections_at(point.freq_hz, base_dir=base_dir)
    dens = dict(point.densities_w_per_hz)
    u_dens = dict(notes.get("u_densities_w_per_hz") or {})
    if point.method is Method.GAIN:
        return _gain_point_budget(point, inputs, dens, u_dens, t0, refl, method)
    return _y_point_budget(point, inputs, dens, u_dens, calibration, u_enr_db, t0, refl, method)


def _losses_from_notes(notes: Mapping[str, Any]) -> dict[str, Any]:
    return {
        "input_loss_db": float(notes.get("input_loss_db") or 0.0),
        "input_loss_temperature_k": notes.get("input_loss_temperature_k"),
        "output_loss_db": float(notes.get("output_loss_db") or 0.0),
        "output_loss_temperature_k": notes.get("output_loss_temperature_k"),
    }


def _need(point: PointResult, dens: Mapping[str, float], keys: Sequence[str]) -> None:
    missing = [k for k in keys if k not in dens]
    if missing:
        raise InputError(
            "densities_w_per_hz",
            f"point at {point.freq_hz:.6g} Hz lacks {', '.join(missing)}",
            fix="use a point produced by the methods",
        )


def _gain_point_budget(
    point: PointResult,
    inputs: UncertaintyInputs,
    dens: dict[str, float],
    u_dens: dict[str, float],
    t0_k: float,
    refl: Reflections,
    method: str | None,
) -> Budget:
    _need(point, dens, ("dut",))
    notes = point.notes or {}
    gain_db = notes.get("path_gain_db", point.gain_db)
    if gain_db is None:
        raise InputError(
            "gain_db",
            f"gain-method point at {point.freq_hz:.6g} Hz has no gain",
            fix="the gain method needs the DUT gain",
        )
    keys = ("dut", "floor") if "floor" in dens else ("dut",)

    def make(u: Mapping[str, float], how: str | None) -> Budget:
        return gain_method_budget(
            freq_hz=point.freq_hz,
            dut_w_per_hz=dens["dut"],
            u_dut_w_per_hz=u["dut"],
            floor_w_per_hz=dens.get("floor"),
            u_floor_w_per_hz=u.get("floor", 0.0),
            floor_temperature_k=notes.get("floor_temperature_k"),
            gain_db=float(gain_db),
            u_gain_db=point.u_gain_db,
            inputs=inputs,
            source_temperature_k=point.source_temperature_k or t0_k,
            t0_k=t0_k,
            reflections=refl,
            method=how,
            gain_includes_input_loss=bool(notes.get("gain_includes_input_loss", True)),
            gain_includes_output_loss=bool(notes.get("gain_includes_output_loss", True)),
            **_losses_from_notes(notes),
        )

    return make(_density_u(point, dens, u_dens, keys, make), method)


def _y_point_budget(
    point: PointResult,
    inputs: UncertaintyInputs,
    dens: dict[str, float],
    u_dens: dict[str, float],
    calibration: Any,
    u_enr_db: float | None,
    t0_k: float,
    refl: Reflections,
    method: str | None,
) -> Budget:
    notes = point.notes or {}
    cal = {
        "cal_enr_db": notes.get("cal_enr_db"),
        "cal_cold_temperature_k": notes.get("cal_cold_temperature_k"),
    }
    if calibration is not None and "hot_cal" not in dens:
        cal_dens, cal_u, cal = _calibration_data(calibration)
        dens.update(cal_dens)
        u_dens.update(cal_u)
    _need(point, dens, ("hot", "cold"))
    if point.enr_db is None:
        raise InputError(
            "enr_db",
            f"Y-factor point at {point.freq_hz:.6g} Hz has no ENR",
            fix="use a point produced by the Y-factor method",
        )
    corrected = "hot_cal" in dens and "cold_cal" in dens
    keys = ("hot", "cold", "hot_cal", "cold_cal") if corrected else ("hot", "cold")
    u_enr = u_enr_db if u_enr_db is not None else notes.get("u_enr_db")
    correlated = inputs.enr_correlated and bool(notes.get("enr_correlated", True))

    def make(u: Mapping[str, float], how: str | None) -> Budget:
        return y_factor_budget(
            freq_hz=point.freq_hz,
            hot_w_per_hz=dens["hot"],
            cold_w_per_hz=dens["cold"],
            u_hot_w_per_hz=u["hot"],
            u_cold_w_per_hz=u["cold"],
            hot_cal_w_per_hz=dens.get("hot_cal") if corrected else None,
            cold_cal_w_per_hz=dens.get("cold_cal") if corrected else None,
            u_hot_cal_w_per_hz=u.get("hot_cal", 0.0),
            u_cold_cal_w_per_hz=u.get("cold_cal", 0.0),
            enr_db=float(point.enr_db),
            u_enr_db=u_enr,
            enr_correlated=correlated,
            cold_temperature_k=point.source_temperature_k or t0_k,
            inputs=inputs,
            enr_reference=notes.get("enr_reference", "t0"),
            t0_k=t0_k,
            reflections=refl,
            method=how,
            **cal,
            **_losses_from_notes(notes),
        )

    return make(_density_u(point, dens, u_dens, keys, make), method)


def _calibration_data(
    calibration: Any,
) -> tuple[dict[str, float], dict[str, float], dict[str, Any]]:
    """(densities, their u, ENR/Tc) of a CalibrationPoint or its dict dump."""
    data = calibration.model_dump() if isinstance(calibration, BaseModel) else calibration
    hot = data.get("hot") if isinstance(data, Mapping) else None
    cold = data.get("cold") if isinstance(data, Mapping) else None
    if not (isinstance(hot, Mapping) and isinstance(cold, Mapping)):
        raise InputError(
            "calibration",
            "has no hot/cold calibration densities",
            fix="pass the CalibrationPoint of this frequency",
        )
    dens = {"hot_cal": float(hot["density_w_per_hz"]), "cold_cal": float(cold["density_w_per_hz"])}
    u = {
        "hot_cal": float(hot.get("u_density_w_per_hz", 0.0)),
        "cold_cal": float(cold.get("u_density_w_per_hz", 0.0)),
    }
    return (
        dens,
        u,
        {
            "cal_enr_db": data.get("enr_db"),
            "cal_cold_temperature_k": data.get("cold_temperature_k"),
        },
    )


def _density_u(
    point: PointResult,
    dens: Mapping[str, float],
    u_dens: Mapping[str, Any],
    keys: Sequence[str],
    make: Callable[[Mapping[str, float], str | None], Budget],
) -> dict[str, float]:
    """The densities' standard uncertainties (W/Hz): stored, or inferred from ``u_nf_db``.

    Inferred: one relative jitter s on every density, chosen so that the densities' terms of
    the budget alone give ``point.u_nf_db`` (the terms scale linearly with s).
    """
    if all(isinstance(u_dens.get(k), (int, float)) for k in keys):
        return {k: float(u_dens[k]) for k in keys}
    at_1pct = {k: 0.01 * dens[k] for k in keys}
    probe = make(at_1pct, "gum")
    u_probe = math.sqrt(sum(c.contribution_db**2 for c in probe.contributions if c.unit == "%"))
    scale = point.u_nf_db / u_probe if u_probe > 0 else 0.0
    logger.debug(
        "point %.6g Hz: no density u stored; inferred %.4g %% jitter from u_nf_db",
        point.freq_hz,
        scale,
    )
    return {k: v * scale for k, v in at_1pct.items()}


def budgets_for_points(
    points: Sequence[PointResult],
    inputs: UncertaintyInputs,
    *,
    calibrations: Mapping[float, Any] | None = None,
    base_dir: Path | None = None,
) -> list[Budget]:
    """:func:`budget_for_point` for every point (``calibrations`` keyed by frequency, Hz)."""
    cals = calibrations or {}
    return [
        budget_for_point(p, inputs, calibration=cals.get(p.freq_hz), base_dir=base_dir)
        for p in points
    ]
