"""Scenario files: the invented bench a simulation runs on, validated by pydantic.

A scenario is a TOML file (``noisebench/sims/scenarios/<name>.toml``) describing the DUT, the noise
source,
the cables, the spectrum analyzer, the generator and any interference. Tables are given versus
frequency in Hz and interpolated linearly in dB versus linear frequency (common practice).
Temperatures are in kelvin, levels in dBm, reflection coefficients as magnitude and angle (deg).

:func:`load_scenario` accepts a scenario name or a path and deep-merges ``overrides`` (nested
dicts, or ``section__field=value`` keyword style) before validation, so tests can switch single
effects on and off (e.g. ``analyzer__amplitude_error_db=0``).
"""

from __future__ import annotations

import copy
from importlib import resources
from pathlib import Path as FsPath
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from noisebench.errors import InputError
from noisebench.user_files import MAX_SCENARIO_BYTES, read_user_text

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the tomli backport (a dependency there)
    import tomli as tomllib

SCENARIO_SUFFIX = ".toml"


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _check_table(name: str, freq_hz: list[float], **columns: list[float] | None) -> None:
    f = np.asarray(freq_hz, dtype=float)
    if f.size == 0:
        raise InputError(f"{name}.freq_hz", "is empty", fix="give at least one frequency")
    if not np.all(np.isfinite(f)) or np.any(f <= 0):
        raise InputError(f"{name}.freq_hz", "must be finite and > 0")
    if f.size > 1 and np.any(np.diff(f) <= 0):
        raise InputError(
            f"{name}.freq_hz",
            "must be strictly ascending",
            fix="sort the table and remove duplicate frequencies",
        )
    for col, values in columns.items():
        if values is None:
            continue
        v = np.asarray(values, dtype=float)
        if v.shape != f.shape:
            raise InputError(
                f"{name}.{col}",
                f"has {v.size} values but freq_hz has {f.size}",
                fix="give one value per frequency",
            )
        if not np.all(np.isfinite(v)):
            raise InputError(f"{name}.{col}", "must be finite")


class Reflection(_Model):
    """A reflection coefficient: magnitude (0..1) and angle in degrees."""

    magnitude: float = Field(default=0.0, ge=0.0, lt=1.0)
    angle_deg: float = 0.0

    @property
    def complex(self) -> complex:
        return complex(self.magnitude * np.exp(1j * np.deg2rad(self.angle_deg)))


class Tone(_Model):
    """A narrowband line: frequency (Hz) and level (dBm) at the plane it is defined at."""

    freq_hz: float = Field(gt=0)
    level_dbm: float


class Comb(_Model):
    """Equally spaced lines: ``count`` lines from ``start_hz`` every ``spacing_hz`` (dBm each)."""

    start_hz: float = Field(gt=0)
    spacing_hz: float = Field(gt=0)
    count: int = Field(ge=1, le=10_000)
    level_dbm: float


class ConversionSpec(_Model):
    """What makes the DUT a frequency converter (difference mixing, IF = |f_in - LO|).

    With it, the DUT's ``freq_hz``/``gain_db`` table is the conversion gain versus the INPUT
    frequency (a preselector's skirts included: the image response follows from it), and
    ``nf_db`` is the noise each response adds, referred to its own input frequency (a noisy
    front end ahead of an ideal mixer); SSB and DSB figures follow from both responses.
    """

    if_min_hz: float = Field(gt=0, description="lower edge of the IF passband")
    if_max_hz: float = Field(gt=0, description="upper edge of the IF passband")
    rejected_sideband: Literal["lower", "upper"] | None = Field(
        default=None,
        description="an image-reject mixer: inputs on this side of the LO are suppressed by "
        "sideband_rejection_db",
    )
    sideband_rejection_db: float = Field(default=0.0, ge=0.0)
    lo_nominal_dbm: float = Field(default=7.0, description="LO drive the tables hold for")
    lo_min_dbm: float = Field(
        default=3.0, description="below this LO drive the conversion gain drops dB for dB"
    )
    lo_leakage_dbm: float = Field(
        default=-40.0, description="LO line at the IF port at the nominal LO drive"
    )
    lo_harmonics_dbc: list[float] = Field(
        default_factory=list, description="LO harmonics 2, 3, ... at the IF port, dB re LO line"
    )
    external_lo_hz: float | None = Field(
        default=None, gt=0, description="a fixed LO inside the DUT (no LO generator needed)"
    )
    external_lo_dbm: float | None = None

    @model_validator(mode="after")
    def _check(self) -> ConversionSpec:
        if self.if_max_hz <= self.if_min_hz:
            raise InputError("dut.conversion.if_max_hz", "must be above if_min_hz")
        if self.lo_min_dbm > self.lo_nominal_dbm:
            raise InputError("dut.conversion.lo_min_dbm", "must be <= lo_nominal_dbm")
        return self


class DutSpec(_Model):
    """The device under test: available gain and noise figure versus frequency."""

    name: str = "DUT"
    freq_hz: list[float]
    gain_db: list[float]
    nf_db: list[float] | None = None
    passive_temperature_k: float | None = Field(
        default=None,
        gt=0,
        description="passive DUT (attenuator, filter): NF follows from gain and this "
        "physical temperature; leave nf_db out",
    )
    gain_ripple_db: float = Field(default=0.0, ge=0.0, description="peak ripple on the gain")
    gain_ripple_period_hz: float = Field(default=1e9, gt=0)
    gain_ripple_phase_deg: float = 0.0
    output_p1db_dbm: float | None = Field(default=None, description="output 1 dB compression")
    input_reflection: Reflection = Reflection()
    output_reflection: Reflection = Reflection()
    spurs: list[Tone] = Field(
        default_factory=list, description="lines at the DUT output (oscillation, spurs)"
    )
    conversion: ConversionSpec | None = Field(
        default=None, description="a frequency-converting DUT (mixer, downconverter)"
    )
    powered: bool = Field(
        default=True,
        description="false: the DUT is switched off (or its supply is not connected); it then "
        "acts as a passive network at ambient with unpowered_gain_db",
    )
    unpowered_gain_db: float = Field(
        default=-40.0,
        le=0.0,
        description="forward gain of the switched-off DUT (common practice: an unpowered "
        "amplifier isolates about 20-50 dB)",
    )

    @model_validator(mode="after")
    def _check(self) -> DutSpec:
        _check_table("dut", self.freq_hz, gain_db=self.gain_db, nf_db=self.nf_db)
        if (self.nf_db is None) == (self.passive_temperature_k is None):
            raise InputError(
                "dut.nf_db",
                "give either nf_db (active DUT) or "
                "passive_temperature_k (passive DUT), not both or neither",
            )
        if self.nf_db is not None and min(self.nf_db) < 0:
            raise InputError("dut.nf_db", "must be >= 0 dB (noise factor >= 1)")
        if self.passive_temperature_k is not None and max(self.gain_db) > 0:
            raise InputError("dut.gain_db", "a passive DUT cannot have gain > 0 dB")
        return self


class CableSpec(_Model):
    """A cable or fixed attenuator: loss versus frequency at a physical temperature."""

    freq_hz: list[float] = Field(default_factory=lambda: [1e9])
    loss_db: list[float] = Field(default_factory=lambda: [0.0])
    sqrt_f_scaling: bool = Field(
        default=False,
        description="with a single table entry: loss scales as sqrt(f / freq_hz[0]) (skin effect)",
    )
    temperature_k: float | None = Field(default=None, gt=0, description="None: ambient")
    delay_s: float = Field(default=0.0, ge=0.0, description="one-way electrical delay")

    @model_validator(mode="after")
    def _check(self) -> CableSpec:
        _check_table("cable", self.freq_hz, loss_db=self.loss_db)
        if min(self.loss_db) < 0:
            raise InputError("cable.loss_db", "must be >= 0 dB (a cable has no gain)")
        return self


class NoiseSourceSpec(_Model):
    """A diode noise source with its true ENR and the calibration table the operator holds."""

    serial: str = "SIM-NS-0001"
    freq_hz: list[float]
    enr_db: list[float]
    u_enr_db: list[float] | None = None
    calibration_error_db: list[float] | None = Field(
        default=None,
        description="operator's table minus truth per frequency; None: drawn from the seed "
        "as u_enr_db * N(0,1) clipped to +/-2",
    )
    calibration_error_scale: float = Field(
        default=1.0, ge=0.0, description="multiplies the drawn calibration error (0: exact)"
    )
    physical_temperature_k: float = Field(default=296.5, gt=0)
    settle_time_s: float = Field(default=0.05, ge=0.0, description="the operator's wait")
    transition_time_s: float = Field(
        default=0.02, ge=0.0, description="physical hot/cold transition (linear ramp)"
    )
    cold_reflection: Reflection = Reflection()
    hot_reflection: Reflection = Reflection()
    nominal_drive_v: float = Field(default=28.0, gt=0)
    drive_window_v: tuple[float, float] = (26.0, 30.0)
    max_drive_v: float = Field(
        default=32.0, gt=0, description="above this the simulated diode is damaged"
    )
    drive_load_ohm: float = Field(default=2800.0, gt=0)
    enr_drive_coefficient_db_per_v: float = 0.01
    output_drift_db_per_s: float = Field(
        default=0.0,
        description="the excess noise output drifts linearly in dB with simulated time "
        "(0: stable); a symmetric hot/cold schedule cancels it to first order",
    )
    output_drift_db_per_s2: float = Field(
        default=0.0,
        description="curvature of the output drift, dB/s^2 (t^2 term: a warming diode; no "
        "hot/cold schedule cancels it, the sequencer detects and flags it)",
    )
    stuck: bool = Field(
        default=False,
        description="the diode never switches (a dead source: a burnt diode or an open lead "
        "inside it; the supply still sees its load): every drive change is accepted and "
        "ignored, so hot and cold read the same noise",
    )

    @model_validator(mode="after")
    def _check(self) -> NoiseSourceSpec:
        _check_table(
            "noise_source",
            self.freq_hz,
            enr_db=self.enr_db,
            u_enr_db=self.u_enr_db,
            calibration_error_db=self.calibration_error_db,
        )
        lo, hi = self.drive_window_v
        if not lo < self.nominal_drive_v < hi <= self.max_drive_v:
            raise InputError(
                "noise_source.drive_window_v",
                "need window low < nominal_drive_v < window high <= max_drive_v",
            )
        if self.u_enr_db is not None and min(self.u_enr_db) < 0:
            raise InputError("noise_source.u_enr_db", "must be >= 0")
        return self


class AnalyzerSpec(_Model):
    """The spectrum analyzer: own noise, front end, level error, timing and limits."""

    identity: str = "noisebench,simulated analyzer,SIM-SA-0001,0.1"
    freq_hz: list[float]
    nf_db: list[float] = Field(description="NF at 0 dB attenuation, preamp off")
    preamp_nf_db: float = 9.0
    preamp_gain_db: float = 20.0
    amplitude_error_db: float = Field(default=0.0, description="displayed minus true level")
    gain_drift_db_per_s: float = Field(
        default=0.0,
        description="receiver gain drift, dB per second of simulated time (linear: a "
        "schedule symmetric in time cancels it)",
    )
    gain_drift_db_per_s2: float = Field(
        default=0.0,
        description="curvature of the receiver gain drift, dB/s^2 (t^2 term: no hot/cold "
        "schedule of two readings each cancels it; the sequencer detects and flags it)",
    )
    gain_step_db: float = Field(
        default=0.0,
        description="a step of the receiver gain at gain_step_at_s (a relay, a connector "
        "touched, a thermal jump): no schedule cancels it; the sequencer detects and flags it",
    )
    gain_step_at_s: float = Field(default=0.0, ge=0, description="simulated time of the step")
    internal_temperature_k: float | None = Field(default=None, gt=0, description="None: ambient")
    min_freq_hz: float = Field(default=9e3, gt=0)
    max_freq_hz: float = Field(default=7.5e9, gt=0)
    max_input_power_dbm: float = 30.0
    mixer_p1db_dbm: float = Field(default=-3.0, description="at the mixer, after attenuation")
    if_headroom_db: float = Field(default=6.0, description="IF overload this far above ref level")
    input_reflection: Reflection = Reflection()
    filter_kind: str = "gaussian"
    filter_poles: int | None = None
    fft_window: str = "hann"
    fft_segment_span_hz: float = Field(default=10e6, gt=0)
    sweep_time_factor: float = Field(default=2.5, gt=0, description="k in ST = k*span/RBW^2")
    min_sweep_time_s: float = Field(default=1e-3, gt=0)
    sweep_overhead_s: float = Field(default=1e-3, ge=0, description="retrace per sweep")
    retune_settle_rbw_periods: float = Field(default=5.0, ge=0)
    max_points: int = Field(default=100_001, ge=1)
    max_averages: int = Field(default=100_000, ge=1)
    min_rbw_hz: float = Field(default=1.0, gt=0)
    max_rbw_hz: float = Field(default=10e6, gt=0)
    default_attenuation_db: float = Field(default=10.0, ge=0)
    max_attenuation_db: float = Field(default=70.0, ge=0)
    attenuation_step_db: float = Field(default=2.0, gt=0)

    @model_validator(mode="after")
    def _check(self) -> AnalyzerSpec:
        _check_table("analyzer", self.freq_hz, nf_db=self.nf_db)
        if min(self.nf_db) < 0:
            raise InputError("analyzer.nf_db", "must be >= 0 dB")
        if self.filter_kind not in ("gaussian", "synchronous"):
            raise InputError(
                "analyzer.filter_kind",
                f"unknown {self.filter_kind!r}",
                fix="use 'gaussian' or 'synchronous' (with filter_poles)",
            )
        if self.filter_kind == "synchronous" and not self.filter_poles:
            raise InputError(
                "analyzer.filter_poles",
                "a synchronous filter needs its poles",
                fix="set filter_poles, e.g. 4",
            )
        return self


class GeneratorSpec(_Model):
    """A CW generator with a broadband noise floor relative to its carrier."""

    identity: str = "noisebench,simulated generator,SIM-SG-0001,0.1"
    min_freq_hz: float = Field(default=9e3, gt=0)
    max_freq_hz: float = Field(default=7.5e9, gt=0)
    min_level_dbm: float = -130.0
    max_level_dbm: float = 20.0
    noise_floor_dbc_per_hz: float = -150.0
    level_error_db: float = 0.0
    level_slope_db_per_ghz: float = Field(
        default=0.0,
        ge=-10,
        le=10,
        description="flatness: the level error grows by this much per GHz above 1 GHz",
    )


class SupplySpec(_Model):
    """The DC supply that can drive the noise source."""

    identity: str = "noisebench,simulated supply,SIM-PS-0001,0.1"
    max_voltage_v: float = Field(default=60.0, gt=0)
    max_current_a: float = Field(default=1.0, gt=0)


class InterferenceSpec(_Model):
    """Lines picked up at the analyzer input, present whatever the path."""

    tones: list[Tone] = Field(default_factory=list)
    combs: list[Comb] = Field(default_factory=list)
    mains_hz: float = Field(default=50.0, gt=0)
    mains_sideband_dbc: float | None = Field(
        default=None, description="mains-related sidebands (+/-1, 2 x mains_hz) on every line"
    )


class Scenario(_Model):
    """A complete invented bench."""

    name: str
    description: str = ""
    ambient_k: float = Field(default=296.0, gt=0)
    dut: DutSpec
    noise_source: NoiseSourceSpec
    analyzer: AnalyzerSpec
    input_cable: CableSpec = CableSpec()
    output_cable: CableSpec = CableSpec()
    generator: GeneratorSpec = GeneratorSpec()
    lo_generator: GeneratorSpec = GeneratorSpec(
        identity="noisebench,simulated LO generator,SIM-SG-0002,0.1", max_freq_hz=20e9
    )
    supply: SupplySpec = SupplySpec()
    interference: InterferenceSpec = InterferenceSpec()


def scenario_dir() -> FsPath:
    """Folder of the packaged scenarios."""
    return FsPath(str(resources.files("noisebench.sims") / "scenarios"))


def available_scenarios() -> list[str]:
    """Names of the packaged scenarios."""
    return sorted(p.stem for p in scenario_dir().glob(f"*{SCENARIO_SUFFIX}"))


def _resolve(name_or_path: str | FsPath) -> FsPath:
    path = FsPath(name_or_path)
    if path.suffix == SCENARIO_SUFFIX and path.exists():
        return path
    candidate = scenario_dir() / f"{name_or_path}{SCENARIO_SUFFIX}"
    if candidate.exists():
        return candidate
    raise InputError(
        "scenario",
        f"no scenario {str(name_or_path)!r}",
        fix=f"use one of {available_scenarios()} or a path to a .toml file",
    )


def deep_merge(base: dict[str, Any], extra: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(base)
    for key, value in extra.items():
        if isinstance(value, BaseModel):
            value = value.model_dump()
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = deep_merge(out[key], value)
        else:
            out[key] = value
    return out


def nest_overrides(overrides: dict[str, Any]) -> dict[str, Any]:
    """Turn ``{"analyzer__amplitude_error_db": 0}`` into ``{"analyzer": {...}}``."""
    nested: dict[str, Any] = {}
    for key, value in overrides.items():
        parts = key.split("__")
        node = nested
        for part in parts[:-1]:
            node = node.setdefault(part, {})
        if isinstance(value, dict) and isinstance(node.get(parts[-1]), dict):
            node[parts[-1]] = deep_merge(node[parts[-1]], value)
        else:
            node[parts[-1]] = value
    return nested


def scenario_from_dict(data: dict[str, Any], *, source: str = "scenario") -> Scenario:
    """Validate a scenario dict; pydantic errors become one :class:`InputError` per first issue."""
    try:
        return Scenario.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"]) or "scenario"
        problems = "; ".join(
            f"{'.'.join(str(p) for p in e['loc'])}: {e['msg']}" for e in exc.errors()
        )
        raise InputError(
            where, f"invalid {source}: {problems}", fix="correct the scenario file or the override"
        ) from None


def load_scenario(name_or_path: str | FsPath, **overrides: Any) -> Scenario:
    """Load a packaged scenario by name (or a TOML path) and apply ``overrides``."""
    path = _resolve(name_or_path)
    data = _scenario_data(path, seen=())
    data = deep_merge(data, nest_overrides(overrides))
    return scenario_from_dict(data, source=path.name)


def _scenario_data(path: FsPath, seen: tuple[str, ...]) -> dict[str, Any]:
    """The TOML of a scenario; ``based_on = "other"`` starts from another scenario's data and
    changes only what this file states (e.g. the demo LNA switched off)."""
    try:
        text = read_user_text(path, MAX_SCENARIO_BYTES, field="scenario", what="scenario")
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError("scenario", f"{path.name}: {exc}", fix="fix the TOML syntax") from None
    base = data.pop("based_on", None)
    if base is None:
        return data
    if not isinstance(base, str) or base in seen or len(seen) > 8:
        raise InputError(
            "scenario",
            f"{path.name}: based_on = {base!r} is not a scenario name or forms a cycle",
            fix="name a packaged scenario or a .toml path that does not lead back here",
        )
    beside = path.parent / base
    base_path = beside if beside.suffix == SCENARIO_SUFFIX and beside.exists() else _resolve(base)
    return deep_merge(_scenario_data(base_path, (*seen, path.stem)), data)
