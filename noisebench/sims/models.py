"""Physics models of the simulated bench's components (pure, vectorized, SI units).

Every function takes frequencies in Hz (floats or arrays) and returns arrays of the same shape.
Noise is carried as a *noise temperature* at a reference plane: the available (or, where a
mismatch is involved, delivered) noise power density there is ``k * T`` W/Hz.

Conventions (documented physics, not shortcuts):

* A two-port with available gain ``G`` and effective input noise temperature ``Te`` turns an input
  temperature ``T_in`` into ``(T_in + Te) * G`` at its output (Friis 1944; docs/references.md §2-3).
* A passive loss ``L`` (linear >= 1) at physical temperature ``Tp`` turns ``T_in`` into
  ``T_in / L + Tp * (1 - 1/L)``, i.e. ``Te = (L - 1) Tp`` (docs/references.md §3).
* Reflections at an interface between a port with reflection ``Ga`` (looking back) and a port
  with ``Gb`` (looking forward) scale the power that crosses it by ``1 / |1 - Ga Gb|^2`` relative
  to a matched interface; the gains and the ENR table are defined for matched (Z0) ports. Only the
  part of the noise *above ambient* is scaled, so a bench in thermal equilibrium still delivers
  exactly ``k T_ambient`` (first-order model; the DUT's noise parameters - its NF change with
  source reflection - are not modelled).
* Tables are interpolated linearly in dB versus linear frequency and held constant beyond their
  ends (common practice).
* Compression follows a smooth limiter on power (Rapp-style, smoothness 2) parameterised by the
  1 dB compression point.

Independence (a project rule): the simulator is the truth the measurement code is tested
against, so it shares NO formula with the code under test. Everything here - the constants, dB
conversions, NF <-> Te, the Friis and passive-loss forms, the hot temperature of the source - is
written out again from first principles and never imported from :mod:`noisebench.science`
(``tests/test_sim_independence.py`` parses every module of ``noisebench/sims/`` and fails on such
an import). An error in ``science/physics.py`` therefore shows up as a disagreement with the
simulator instead of cancelling; ``physics.py`` is checked on its own against published values
and scikit-rf (``tests/test_physics.py``, ``tests/test_reference_cascade.py``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from noisebench.errors import InputError
from noisebench.units import format_frequency

# Boltzmann constant, J/K: exact since the 2019 redefinition of the SI (CODATA 2018).
BOLTZMANN_J_PER_K = 1.380649e-23
# Reference temperature of noise figure and ENR, K (IRE 1959 / IEEE Std 100 standard temperature).
T0_K = 290.0
RAPP_SMOOTHNESS = 2.0


def db_to_lin(db: np.ndarray | float) -> np.ndarray:
    """Power ratio from dB: ``10^(dB/10)``."""
    return np.power(10.0, np.asarray(db, dtype=float) / 10.0)


def lin_to_db(lin: np.ndarray | float) -> np.ndarray:
    """dB from a positive power ratio: ``10 log10(ratio)``."""
    return 10.0 * np.log10(np.asarray(lin, dtype=float))


def te_from_nf_db(nf_db: np.ndarray | float, t0_k: float = T0_K) -> np.ndarray:
    """Effective input noise temperature (K) of a noise figure (dB): ``Te = T0 (F - 1)``."""
    return t0_k * (db_to_lin(nf_db) - 1.0)


def nf_db_from_te(te_k: np.ndarray | float, t0_k: float = T0_K) -> np.ndarray:
    """Noise figure (dB) of an effective input noise temperature (K): ``F = 1 + Te / T0``."""
    return lin_to_db(1.0 + np.asarray(te_k, dtype=float) / t0_k)


def dbm_to_w(dbm: np.ndarray | float) -> np.ndarray:
    """Watts from dBm."""
    return 1e-3 * db_to_lin(dbm)


def w_to_dbm(w: np.ndarray | float) -> np.ndarray:
    """dBm from watts."""
    return lin_to_db(np.asarray(w, dtype=float) / 1e-3)


def interp_table_db(
    freq_hz: np.ndarray | float,
    table_freq_hz: list[float] | np.ndarray,
    table_db: list[float] | np.ndarray,
) -> np.ndarray:
    """Table value (dB) at ``freq_hz``: linear in dB vs linear frequency, held beyond the ends."""
    return np.interp(
        np.asarray(freq_hz, dtype=float),
        np.asarray(table_freq_hz, dtype=float),
        np.asarray(table_db, dtype=float),
    )


def passive_output_temperature_k(
    t_in_k: np.ndarray, loss_lin: np.ndarray, physical_temperature_k: float | np.ndarray
) -> np.ndarray:
    """Output noise temperature of a matched loss ``L >= 1`` at ``Tp``: ``T/L + Tp(1 - 1/L)``."""
    loss = np.asarray(loss_lin, dtype=float)
    return np.asarray(t_in_k) / loss + np.asarray(physical_temperature_k) * (1.0 - 1.0 / loss)


def mismatch_factor(gamma_a: np.ndarray | complex, gamma_b: np.ndarray | complex) -> np.ndarray:
    """Power transfer relative to a matched interface: ``1 / |1 - Ga Gb|^2`` (dimensionless)."""
    return 1.0 / np.abs(1.0 - np.asarray(gamma_a) * np.asarray(gamma_b)) ** 2


def mismatched_temperature_k(
    t_k: np.ndarray, ambient_k: float, factor: np.ndarray | float
) -> np.ndarray:
    """Temperature delivered across a mismatched interface: the excess over ambient is scaled."""
    return ambient_k + (np.asarray(t_k) - ambient_k) * np.asarray(factor)


def rapp_saturation_w(p1db_w: float, smoothness: float = RAPP_SMOOTHNESS) -> float:
    """Saturation power (W) of the limiter whose output 1 dB compression point is ``p1db_w``."""
    s = smoothness
    return p1db_w * 10.0**0.1 / (10.0 ** (0.1 * s) - 1.0) ** (1.0 / s)


def compression_gain_factor(
    linear_output_w: np.ndarray | float, p1db_w: float | None, smoothness: float = RAPP_SMOOTHNESS
) -> np.ndarray:
    """Gain factor (<= 1) of a limiter whose uncompressed output would be ``linear_output_w``.

    ``p1db_w`` is the output power at 1 dB compression; ``None`` means no compression.
    """
    p = np.asarray(linear_output_w, dtype=float)
    if p1db_w is None:
        return np.ones_like(p)
    psat = rapp_saturation_w(p1db_w, smoothness)
    return (1.0 + (p / psat) ** smoothness) ** (-1.0 / smoothness)


# ---------------------------------------------------------------- components -----------------


@dataclass(frozen=True)
class CableModel:
    """A matched cable / attenuator: loss table (dB) vs frequency, physical temperature, delay."""

    freq_hz: np.ndarray
    loss_db: np.ndarray
    temperature_k: float
    delay_s: float = 0.0
    sqrt_f_scaling: bool = False

    def loss_lin(self, freq_hz: np.ndarray | float) -> np.ndarray:
        """Linear loss (>= 1) at ``freq_hz``."""
        f = np.asarray(freq_hz, dtype=float)
        if self.sqrt_f_scaling and self.freq_hz.size == 1:
            loss_db = self.loss_db[0] * np.sqrt(np.maximum(f, 0.0) / self.freq_hz[0])
        else:
            loss_db = interp_table_db(f, self.freq_hz, self.loss_db)
        return db_to_lin(loss_db)

    def output_temperature_k(self, t_in_k: np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
        """Noise temperature after the cable (Friis for a passive loss)."""
        return passive_output_temperature_k(t_in_k, self.loss_lin(freq_hz), self.temperature_k)

    def seen_reflection(self, gamma: complex | np.ndarray, freq_hz: np.ndarray) -> np.ndarray:
        """A reflection seen through the cable: attenuated twice and rotated by the round trip."""
        f = np.asarray(freq_hz, dtype=float)
        return np.asarray(gamma) / self.loss_lin(f) * np.exp(-4j * math.pi * f * self.delay_s)


@dataclass(frozen=True)
class DutModel:
    """The DUT: gain (dB) and NF (dB) tables with an optional sinusoidal gain ripple."""

    freq_hz: np.ndarray
    gain_table_db: np.ndarray
    nf_table_db: np.ndarray | None
    passive_temperature_k: float | None = None
    ripple_db: float = 0.0
    ripple_period_hz: float = 1e9
    ripple_phase_rad: float = 0.0
    output_p1db_w: float | None = None
    input_gamma: complex = 0j
    output_gamma: complex = 0j
    spurs: tuple[tuple[float, float], ...] = ()  # (freq_hz, power_w) at the DUT output
    t0_k: float = T0_K

    @property
    def band_hz(self) -> tuple[float, float]:
        return float(self.freq_hz[0]), float(self.freq_hz[-1])

    def gain_db(self, freq_hz: np.ndarray | float) -> np.ndarray:
        """Available gain in dB (table plus ripple)."""
        f = np.asarray(freq_hz, dtype=float)
        ripple = self.ripple_db * np.sin(
            2 * math.pi * f / self.ripple_period_hz + self.ripple_phase_rad
        )
        return interp_table_db(f, self.freq_hz, self.gain_table_db) + ripple

    def gain_lin(self, freq_hz: np.ndarray | float) -> np.ndarray:
        return db_to_lin(self.gain_db(freq_hz))

    def te_k(self, freq_hz: np.ndarray | float) -> np.ndarray:
        """Effective input noise temperature, K."""
        if self.passive_temperature_k is not None:
            loss = 1.0 / self.gain_lin(freq_hz)  # a matched loss L at Tp: Te = (L - 1) Tp
            return (loss - 1.0) * self.passive_temperature_k
        assert self.nf_table_db is not None  # an active DUT has its NF table
        nf = interp_table_db(freq_hz, self.freq_hz, self.nf_table_db)
        return te_from_nf_db(nf, self.t0_k)

    def nf_db(self, freq_hz: np.ndarray | float) -> np.ndarray:
        """Noise figure in dB (referred to T0)."""
        return nf_db_from_te(self.te_k(freq_hz), self.t0_k)


@dataclass(frozen=True)
class NoiseSourceModel:
    """A diode noise source: true ENR table, physical temperature, reflections, drive window.

    Hot temperature follows the common assumption that the excess noise does not depend on the
    source's physical temperature: ``Th = T0 * ENR + Tc`` (docs/references.md §5).
    """

    freq_hz: np.ndarray
    enr_db: np.ndarray
    physical_temperature_k: float
    cold_gamma: complex = 0j
    hot_gamma: complex = 0j
    nominal_drive_v: float = 28.0
    enr_drive_coefficient_db_per_v: float = 0.0
    t0_k: float = T0_K

    def true_enr_db(self, freq_hz: np.ndarray | float, drive_v: float | None = None) -> np.ndarray:
        """The source's real ENR (dB) at ``freq_hz`` for a drive voltage (None: nominal)."""
        shift = 0.0
        if drive_v is not None:
            shift = self.enr_drive_coefficient_db_per_v * (drive_v - self.nominal_drive_v)
        return interp_table_db(freq_hz, self.freq_hz, self.enr_db) + shift

    def hot_temperature_k(
        self, freq_hz: np.ndarray | float, drive_v: float | None = None
    ) -> np.ndarray:
        """Hot noise temperature ``T0 * ENR + Tc``, K."""
        enr_lin = db_to_lin(self.true_enr_db(freq_hz, drive_v))
        return self.t0_k * enr_lin + self.physical_temperature_k

    def temperature_k(
        self, freq_hz: np.ndarray | float, hot_fraction: float, drive_v: float | None = None
    ) -> np.ndarray:
        """Noise temperature at ``hot_fraction`` of the way from cold (0) to hot (1)."""
        tc = self.physical_temperature_k
        return tc + hot_fraction * (self.hot_temperature_k(freq_hz, drive_v) - tc)

    def gamma(self, hot_fraction: float) -> complex:
        """Output reflection, moving with the hot/cold state."""
        return self.cold_gamma + hot_fraction * (self.hot_gamma - self.cold_gamma)


@dataclass(frozen=True)
class AnalyzerFrontEnd:
    """The analyzer's own noise and linearity, referred to its input connector.

    ``nf_db`` is the noise figure at 0 dB input attenuation with the preamp off. The attenuator
    (at ``internal_temperature_k``) and the optional preamp sit in front of the mixer; their
    contributions cascade by Friis, so attenuation raises the floor about dB for dB and the
    preamp lowers it.
    """

    freq_hz: np.ndarray
    nf_table_db: np.ndarray
    preamp_nf_db: float
    preamp_gain_db: float
    internal_temperature_k: float
    mixer_p1db_w: float
    input_gamma: complex = 0j
    t0_k: float = T0_K

    def te_k(self, freq_hz: np.ndarray | float, attenuation_db: float, preamp: bool) -> np.ndarray:
        """Effective input noise temperature of the whole analyzer at these settings, K."""
        te_mixer = te_from_nf_db(
            interp_table_db(freq_hz, self.freq_hz, self.nf_table_db), self.t0_k
        )
        loss = float(db_to_lin(attenuation_db))
        te_att = (loss - 1.0) * self.internal_temperature_k  # the attenuator: a loss at Tp
        if preamp:
            te_pre = float(te_from_nf_db(self.preamp_nf_db, self.t0_k))
            return te_att + loss * (te_pre + te_mixer / float(db_to_lin(self.preamp_gain_db)))
        return te_att + loss * te_mixer

    def nf_db(self, freq_hz: np.ndarray | float, attenuation_db: float, preamp: bool) -> np.ndarray:
        """Noise figure of the analyzer at these settings, dB."""
        return nf_db_from_te(self.te_k(freq_hz, attenuation_db, preamp), self.t0_k)

    def mixer_gain_factor(self, input_power_w: float, attenuation_db: float, preamp: bool) -> float:
        """Gain factor (<= 1) from mixer compression for a total input power, W."""
        lin = input_power_w / float(db_to_lin(attenuation_db))
        if preamp:
            lin *= float(db_to_lin(self.preamp_gain_db))
        return float(compression_gain_factor(lin, self.mixer_p1db_w))


@dataclass
class SpectrumAtInput:
    """What the analyzer input sees at given frequencies, as a function of the source state.

    ``base_k + hot_fraction * excess_k`` is the delivered noise temperature (K) per frequency;
    ``tones`` are (freq_hz, power_w) lines at the analyzer input; ``total_power_w`` gives the
    total input power for a hot fraction (for compression).
    """

    freq_hz: np.ndarray
    base_k: np.ndarray
    excess_k: np.ndarray
    tones: list[tuple[float, float]] = field(default_factory=list)
    total_base_w: float = 0.0
    total_excess_w: float = 0.0

    def temperature_k(self, hot_fraction: np.ndarray | float) -> np.ndarray:
        return self.base_k + np.asarray(hot_fraction, dtype=float) * self.excess_k

    def density_w_per_hz(self, hot_fraction: np.ndarray | float) -> np.ndarray:
        return BOLTZMANN_J_PER_K * self.temperature_k(hot_fraction)

    def total_power_w(self, hot_fraction: float) -> float:
        tones_w = sum(p for _, p in self.tones)
        return self.total_base_w + hot_fraction * self.total_excess_w + tones_w


def check_freq(field_name: str, freq_hz: np.ndarray | float) -> np.ndarray:
    """Frequencies as a float array; refuse non-finite or non-positive values."""
    f = np.asarray(freq_hz, dtype=float)
    if f.size == 0:
        raise InputError(field_name, "is empty", fix="pass at least one frequency")
    if not np.all(np.isfinite(f)) or np.any(f <= 0):
        raise InputError(field_name, "must be finite and > 0 Hz", value=freq_hz)
    return f


@dataclass(frozen=True)
class ConverterModel:
    """A difference-frequency converter built around a :class:`DutModel` whose tables hold per
    INPUT frequency: conversion gain (dB) and the noise each response adds (its NF).

    An input at ``f_in`` reaches the IF ``|f_in - LO|`` with gain ``G(f_in)``: the table value
    inside the table's range (zero outside: the preselector), lowered by
    ``sideband_rejection_db`` on the rejected side of the LO and dB for dB when the LO drive is
    below ``lo_min_dbm``; zero when the IF falls outside the IF passband. The IF port delivers

        T_out(f_IF) = sum over the two inputs f_b = LO +/- f_IF of G(f_b) (T_in(f_b) + Te(f_b))

    inside the IF passband with the LO on, and the ambient temperature otherwise (a matched
    output). The LO and its harmonics leak to the IF port as lines.
    """

    dut: DutModel
    if_min_hz: float
    if_max_hz: float
    rejected_sideband: str | None = None
    sideband_rejection_db: float = 0.0
    lo_nominal_dbm: float = 7.0
    lo_min_dbm: float = 3.0
    lo_leakage_dbm: float = -40.0
    lo_harmonics_dbc: tuple[float, ...] = ()
    external_lo_hz: float | None = None
    external_lo_dbm: float | None = None

    def in_if_band(self, f_out_hz: np.ndarray) -> np.ndarray:
        f = np.asarray(f_out_hz, dtype=float)
        return (f >= self.if_min_hz) & (f <= self.if_max_hz)

    def response_gain_lin(
        self, f_in_hz: np.ndarray | float, lo_hz: float, lo_dbm: float | None
    ) -> np.ndarray:
        """Linear conversion gain from input ``f_in_hz`` to the IF; 0 when the LO is off."""
        f = np.asarray(f_in_hz, dtype=float)
        if lo_dbm is None:
            return np.zeros_like(f)
        lo_t, hi_t = self.dut.band_hz
        inside = (f >= lo_t * (1 - 1e-12)) & (f <= hi_t * (1 + 1e-12)) & (f > 0)
        gain_db = self.dut.gain_db(f) - max(0.0, self.lo_min_dbm - lo_dbm)
        if self.rejected_sideband is not None and self.sideband_rejection_db > 0:
            rejected = f > lo_hz if self.rejected_sideband == "upper" else f < lo_hz
            gain_db = gain_db - np.where(rejected, self.sideband_rejection_db, 0.0)
        ok = inside & self.in_if_band(np.abs(f - lo_hz))
        return np.where(ok, db_to_lin(gain_db), 0.0)

    def output_temperature_k(
        self,
        f_out_hz: np.ndarray,
        lo_hz: float,
        lo_dbm: float | None,
        input_temperature_k,  # callable: f_in (array) -> delivered temperature at the input, K
        ambient_k: float,
    ) -> np.ndarray:
        """Noise temperature at the IF port over ``f_out_hz`` (see the class docstring)."""
        f = np.asarray(f_out_hz, dtype=float)
        if lo_dbm is None:
            return np.full(f.shape, ambient_k)
        total = np.zeros(f.shape)
        for f_in in (lo_hz + f, lo_hz - f):
            valid = f_in > 0
            f_safe = np.where(valid, f_in, lo_hz)
            g = np.where(valid, self.response_gain_lin(f_safe, lo_hz, lo_dbm), 0.0)
            if np.any(g > 0):
                total = total + g * (input_temperature_k(f_safe) + self.dut.te_k(f_safe))
        return np.where(self.in_if_band(f), total, ambient_k)

    def leakage_lines(self, lo_hz: float, lo_dbm: float | None) -> list[tuple[float, float]]:
        """LO leakage and its harmonics at the IF port, (freq_hz, power_w)."""
        if lo_dbm is None:
            return []
        fundamental = self.lo_leakage_dbm + (lo_dbm - self.lo_nominal_dbm)
        lines = [(lo_hz, float(dbm_to_w(fundamental)))]
        for n, dbc in enumerate(self.lo_harmonics_dbc, start=2):
            lines.append((n * lo_hz, float(dbm_to_w(fundamental + dbc))))
        return lines

    def ssb_dsb_truth(
        self, rf_hz: float, lo_hz: float, lo_dbm: float, t0_k: float = T0_K
    ) -> dict[str, float]:
        """SSB and DSB noise figure straight from the multiple-response definition.

        Total IF noise with both inputs at T0, over the part the signal input (SSB) or both
        inputs (DSB) produce: ``N = G_s (T0 + Te_s) + G_i (T0 + Te_i)``; ``F_SSB = N/(T0 G_s)``,
        ``F_DSB = N/(T0 (G_s + G_i))`` (IRE/IEEE multiple-response definitions).
        """
        image = 2.0 * lo_hz - rf_hz
        gs = float(self.response_gain_lin(rf_hz, lo_hz, lo_dbm))
        gi = float(self.response_gain_lin(image, lo_hz, lo_dbm)) if image > 0 else 0.0
        if gs <= 0:
            raise ValueError(
                f"no conversion from {format_frequency(rf_hz)} with the LO at "
                f"{format_frequency(lo_hz)}"
            )
        te_s = float(self.dut.te_k(rf_hz))
        te_i = float(self.dut.te_k(image)) if gi > 0 else 0.0
        n = gs * (t0_k + te_s) + gi * (t0_k + te_i)
        f_ssb, f_dsb = n / (t0_k * gs), n / (t0_k * (gs + gi))
        return {
            "gain_signal_db": float(lin_to_db(gs)),
            "gain_image_db": float(lin_to_db(gi)) if gi > 0 else float("-inf"),
            "image_rejection_db": float(lin_to_db(gs / gi)) if gi > 0 else float("inf"),
            "nf_ssb_db": float(lin_to_db(f_ssb)),
            "nf_dsb_db": float(lin_to_db(f_dsb)),
            "te_ssb_k": float(t0_k * (f_ssb - 1.0) - t0_k * gi / gs),
            "image_hz": image,
        }
