"""Bench safety: the operator cautions and the power checks made before anything is switched on.

Two checks guard the analyzer input (docs/references.md §11):

* before the noise source goes hot, the expected **total** noise power into the analyzer
  (broadband noise of the source, amplified by the DUT over its whole bandwidth) must stay
  below the analyzer's rated maximum input and well below its compression point;
* before the generator output goes on, the expected tone power at the analyzer (and at the DUT
  input) likewise.

Compression back-off: for a smooth (third-order) gain compression the error at ``d`` dB below
the 1 dB compression point is about ``1 dB * 10**(-d/10)``: 0.1 dB at 10 dB back-off, 0.01 dB at
20 dB [common practice, from a third-order model]. A run is refused below
``compression_backoff_db`` (default 10 dB) and the point is flagged ``compression_risk`` below
``caution_backoff_db`` (default 20 dB).

All powers in dBm at the edges, W inside; bandwidths in Hz; temperatures in K.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from noisebench.errors import InputError, SafetyError, require_positive
from noisebench.science.physics import (
    T0_K,
    ratio_from_db,
    te_k_from_nf_db,
    thermal_density_w_per_hz,
    w_to_dbm,
)

#: Used when neither the driver nor the plan states the rated maximum input: a conservative
#: value for general-purpose analyzers [common practice]. Put the real rating in the plan.
DEFAULT_MAX_INPUT_DBM = 20.0
#: Used when the plan does not state the input compression at 0 dB attenuation (the first
#: mixer commonly compresses between about -10 and +5 dBm) [common practice, conservative].
DEFAULT_COMPRESSION_DBM = -10.0
#: Assumed preamplifier gain when the preamp is on: it lowers the compression point by as much
#: [common practice].
PREAMP_GAIN_DB = 20.0

CAUTIONS: tuple[str, ...] = (
    "Analyzer input: never exceed the analyzer's rated maximum RF or DC input; the damage "
    "level is lowest with 0 dB attenuation and the preamplifier on.",
    "Total broadband noise power, not the power in the RBW, drives the analyzer into "
    "compression: an amplifier after a hot noise source can deliver surprisingly much.",
    "DC on RF lines: use a DC block where amplifier ports may carry bias; keep its loss in "
    "the calibration path or in the corrections.",
    "Noise-source drive: only from its rated switched supply (commonly +28 V), never into an "
    "RF port; set the supply's current limit before enabling its output; allow warm-up and "
    "settling.",
    "ESD: wrist strap and grounded bench; discharge cables before connecting; GaAs, GaN and "
    "SiGe LNAs are sensitive. Sequence FET bias (gate first on, drain first off).",
    "DUT: power it from a current-limited supply; check it for oscillation with a wide span "
    "first; keep interference out (in-band spurs read as noise).",
    "Connectors: torque and clean them; terminate the analyzer input when idle.",
    "These cautions do not replace the instrument manuals, local codes and licensed "
    "practice: where they differ, those win.",
)
"""The one list of bench-safety cautions: README, ``--help`` of every command that drives
hardware, real-hardware runs, the pytest plugin and the report all show exactly these."""


def cautions_text(*, prefix: str = "  - ", width: int = 92) -> str:
    """The cautions as a short bulleted text block, wrapped to ``width`` columns."""
    import textwrap

    return "\n".join(
        textwrap.fill(
            line,
            width,
            initial_indent=prefix,
            subsequent_indent=" " * len(prefix),
            break_on_hyphens=False,  # "current-limited" stays one word
        )
        for line in CAUTIONS
    )


# --------------------------------------------------------------------------- pure estimates


def hot_source_temperature_k(enr_db: float, cold_temperature_k: float, t0_k: float = T0_K) -> float:
    """Hot noise temperature of a source with ``enr_db`` at ``cold_temperature_k``, K.

    Common assumption: the ENR is referred to T0 and the excess noise does not depend on the
    source's physical temperature, so ``Th = T0 * ENR + Tc`` (docs/references.md §5; the Y-factor
    method's own :func:`~noisebench.science.methods.yfactor.hot_temperature_k`).
    """
    from noisebench.science.methods.yfactor import hot_temperature_k

    return float(hot_temperature_k(ratio_from_db(enr_db), cold_temperature_k, t0_k))


def total_noise_power_dbm(
    source_temperature_k: float, gain_db: float, bandwidth_hz: float, *, dut_te_k: float = 0.0
) -> float:
    """Total available noise power at the DUT output, dBm: ``k (Ts + Te) G B``."""
    require_positive("bandwidth_hz", bandwidth_hz)
    require_positive("source_temperature_k", source_temperature_k)
    if dut_te_k < 0:
        raise InputError("dut_te_k", f"must be >= 0 (got {dut_te_k!r})")
    gain_lin = float(ratio_from_db(gain_db))
    density = thermal_density_w_per_hz(source_temperature_k + dut_te_k) * gain_lin
    return float(w_to_dbm(float(density) * bandwidth_hz))


def hot_power_from_cold_density_dbm(
    cold_density_w_per_hz: float,
    enr_db: float,
    bandwidth_hz: float,
    *,
    cold_temperature_k: float,
    t0_k: float = T0_K,
) -> float:
    """Upper bound of the total hot power from a measured cold output density, dBm.

    Hot over cold output power is ``(Th + Te)/(Tc + Te) <= Th/Tc`` for any DUT noise
    temperature Te >= 0, and a measured cold density includes the analyzer's own noise, so
    ``N_cold * B * Th / Tc`` never underestimates the hot power.
    """
    require_positive("cold_density_w_per_hz", cold_density_w_per_hz)
    require_positive("bandwidth_hz", bandwidth_hz)
    th = hot_source_temperature_k(enr_db, cold_temperature_k, t0_k)
    return float(w_to_dbm(cold_density_w_per_hz * bandwidth_hz * th / cold_temperature_k))


# --------------------------------------------------------------------------- limits and checks


@dataclass(frozen=True)
class InputLimits:
    """What the analyzer input tolerates, dBm. Compression is at 0 dB attenuation, no preamp."""

    max_input_dbm: float = DEFAULT_MAX_INPUT_DBM
    compression_dbm: float = DEFAULT_COMPRESSION_DBM
    compression_backoff_db: float = 10.0
    caution_backoff_db: float = 20.0

    def compression_at(self, attenuation_db: float | None, preamp: bool | None) -> float:
        """Input compression power for the applied attenuation and preamp state, dBm."""
        level = self.compression_dbm + float(attenuation_db or 0.0)
        if preamp:
            level -= PREAMP_GAIN_DB
        return level


@dataclass(frozen=True)
class PowerCheck:
    """Outcome of a power check that passed: ``caution`` asks to flag ``compression_risk``."""

    power_dbm: float
    compression_dbm: float
    backoff_db: float
    caution: bool


def check_input_power(
    power_dbm: float,
    limits: InputLimits,
    *,
    what: str,
    attenuation_db: float | None = None,
    preamp: bool | None = None,
    freq_hz: float | None = None,
) -> PowerCheck:
    """Refuse (SafetyError) a power the analyzer input should not see; else report margins."""
    if not math.isfinite(power_dbm):
        raise InputError("power_dbm", f"expected power for {what} is not finite")
    if power_dbm > limits.max_input_dbm:
        raise SafetyError(
            f"{what}: expected {power_dbm:.1f} dBm into the analyzer exceeds its rated "
            f"maximum input {limits.max_input_dbm:.1f} dBm; add an attenuator or a filter",
            freq_hz=freq_hz,
        )
    compression = limits.compression_at(attenuation_db, preamp)
    backoff = compression - power_dbm
    if backoff < limits.compression_backoff_db:
        raise SafetyError(
            f"{what}: expected {power_dbm:.1f} dBm total into the analyzer is only "
            f"{backoff:.1f} dB below its compression ({compression:.1f} dBm with "
            f"{float(attenuation_db or 0):g} dB attenuation); need "
            f"{limits.compression_backoff_db:g} dB: raise the input attenuation, turn the "
            "preamp off, or band-limit the DUT output",
            freq_hz=freq_hz,
        )
    return PowerCheck(power_dbm, compression, backoff, backoff < limits.caution_backoff_db)


def check_generator_level(
    level_dbm: float,
    *,
    max_level_dbm: float,
    dut_gain_db: float,
    limits: InputLimits,
    dut_max_input_dbm: float | None = None,
    attenuation_db: float | None = None,
    preamp: bool | None = None,
    freq_hz: float | None = None,
) -> PowerCheck:
    """Check a generator level before its output goes on (DUT input and analyzer input)."""
    if level_dbm > max_level_dbm:
        raise SafetyError(
            f"generator level {level_dbm:.1f} dBm exceeds the plan's "
            f"max_level_dbm {max_level_dbm:.1f} dBm",
            freq_hz=freq_hz,
        )
    if dut_max_input_dbm is not None and level_dbm > dut_max_input_dbm:
        raise SafetyError(
            f"generator level {level_dbm:.1f} dBm exceeds the DUT's maximum "
            f"input {dut_max_input_dbm:.1f} dBm",
            freq_hz=freq_hz,
        )
    return check_input_power(
        level_dbm + dut_gain_db,
        limits,
        what="generator tone",
        attenuation_db=attenuation_db,
        preamp=preamp,
        freq_hz=freq_hz,
    )


# --------------------------------------------------------------------------- bookkeeping

GAIN_PEAKING_MARGIN_DB = 3.0
"""Added to the power bound from a measured cold density: the DUT's gain elsewhere in its band
may exceed the gain at the frequencies measured so far."""


class PowerGuard:
    """What is known about the total power into the analyzer, checked before each hot switch.

    The hot power is bounded by the declared maximum DUT gain (``declared_gain_db``) and/or by
    the highest cold density read with the DUT in (:func:`hot_power_from_cold_density_dbm`
    plus :data:`GAIN_PEAKING_MARGIN_DB`); the larger bound is used. On the THROUGH path the
    source feeds the analyzer directly (0 dB gain). ``bandwidth_hz`` is the band over which
    the source's noise (and the DUT's gain) reaches the analyzer. ``dut_lines_dbm``: lines the
    DUT itself puts on its output whatever the source does (a converter's LO leakage and its
    harmonics, total power), added on the DUT path.
    """

    def __init__(
        self,
        limits: InputLimits,
        *,
        bandwidth_hz: float,
        declared_gain_db: float | None,
        enr_db: float,
        cold_temperature_k: float,
        t0_k: float = T0_K,
        declared_nf_db: float | None = None,
        dut_lines_dbm: float | None = None,
    ) -> None:
        require_positive("bandwidth_hz", bandwidth_hz)
        self.dut_lines_dbm = dut_lines_dbm
        self.limits = limits
        self.bandwidth_hz = bandwidth_hz
        self.declared_gain_db = declared_gain_db
        self.declared_nf_db = declared_nf_db
        self.enr_db = enr_db
        self.cold_temperature_k = cold_temperature_k
        self.t0_k = t0_k
        self.max_cold_density_w_per_hz: float | None = None
        self._expected: tuple[tuple, float] | None = None  # (inputs, bound) of the last call

    def observe_cold(self, densities_w_per_hz: list[float]) -> None:
        """Remember the highest cold density (W/Hz) read with the DUT in."""
        peak = max(densities_w_per_hz)
        if self.max_cold_density_w_per_hz is None or peak > self.max_cold_density_w_per_hz:
            self.max_cold_density_w_per_hz = peak

    @property
    def needs_cold_look(self) -> bool:
        """True until a bound of the DUT's output power exists (declared or measured).

        A declared gain alone is no upper bound: the DUT adds its own noise ``k Te G B``
        (10 log10(1 + Te/Th) more: 1.1 dB for NF 10 dB behind ENR 15 dB, 4.5 dB behind ENR 6 dB),
        so without a declared NF (``expect.dut_nf_db``) the DUT is read cold first."""
        declared = self.declared_gain_db is not None and self.declared_nf_db is not None
        return not declared and self.max_cold_density_w_per_hz is None

    def expected_hot_power_dbm(self, through: bool) -> float:
        """Upper bound of the total power into the analyzer with the source hot, dBm (the
        last bound is kept with its inputs: a sweep-level block checks every group before
        one switch, all with the same bound)."""
        inputs = (
            through,
            self.enr_db,
            self.cold_temperature_k,
            self.t0_k,
            self.bandwidth_hz,
            self.declared_gain_db,
            self.declared_nf_db,
            self.max_cold_density_w_per_hz,
            self.dut_lines_dbm,
        )
        if self._expected is not None and self._expected[0] == inputs:
            return self._expected[1]
        bound = self._expected_hot_power_dbm(through)
        self._expected = (inputs, bound)
        return bound

    def _expected_hot_power_dbm(self, through: bool) -> float:
        th = hot_source_temperature_k(self.enr_db, self.cold_temperature_k, self.t0_k)
        if through:
            return total_noise_power_dbm(th, 0.0, self.bandwidth_hz)
        estimates = []
        if self.declared_gain_db is not None:
            te = (
                0.0
                if self.declared_nf_db is None
                else float(te_k_from_nf_db(self.declared_nf_db, self.t0_k))
            )
            estimates.append(
                total_noise_power_dbm(th, self.declared_gain_db, self.bandwidth_hz, dut_te_k=te)
            )
        if self.max_cold_density_w_per_hz is not None:
            estimates.append(
                hot_power_from_cold_density_dbm(
                    self.max_cold_density_w_per_hz,
                    self.enr_db,
                    self.bandwidth_hz,
                    cold_temperature_k=self.cold_temperature_k,
                    t0_k=self.t0_k,
                )
                + GAIN_PEAKING_MARGIN_DB
            )
        if not estimates:
            raise InputError(
                "dut output power",
                "is unknown before the first hot switch",
                fix="read the DUT cold first, or declare safety.dut_max_gain_db",
            )
        if self.dut_lines_dbm is None:
            return max(estimates)
        return 10.0 * math.log10(
            10.0 ** (max(estimates) / 10.0) + 10.0 ** (self.dut_lines_dbm / 10.0)
        )

    def before_hot(
        self,
        *,
        through: bool,
        attenuation_db: float | None,
        preamp: bool | None,
        freq_hz: float | None = None,
    ) -> PowerCheck:
        """Check (or refuse with SafetyError) before the noise source goes hot."""
        path = "through" if through else "DUT"
        return check_input_power(
            self.expected_hot_power_dbm(through),
            self.limits,
            what=f"noise source hot ({path} path)",
            attenuation_db=attenuation_db,
            preamp=preamp,
            freq_hz=freq_hz,
        )
