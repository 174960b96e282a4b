"""The simulated CW signal generator.

The tone enters the bench at the source plane (the simulated bench switches the generator in
place of the noise source while its output is on), travels the selected path and appears at the
analyzer at the path's gain. Its broadband noise floor (``noise_floor_dbc_per_hz``) adds to the
source-plane noise: ``P_carrier * 10^(dBc/10)`` W/Hz.
"""

from __future__ import annotations

import logging

from noisebench.bench.instruments import Generator
from noisebench.errors import InputError
from noisebench.sims.scenario import GeneratorSpec
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)


class SimGenerator(Generator):
    """CW generator: frequency (Hz), level (dBm), output on/off."""

    def __init__(self, spec: GeneratorSpec) -> None:
        super().__init__()
        self.spec = spec
        self._freq_hz = 1e9
        self._level_dbm = -30.0
        self._on = False

    @property
    def identity(self) -> str:
        return self.spec.identity

    def set_cw(self, freq_hz: float, level_dbm: float) -> None:
        """Set the CW frequency (Hz) and level (dBm); out-of-range values raise InputError."""
        sp = self.spec
        if not sp.min_freq_hz <= float(freq_hz) <= sp.max_freq_hz:
            raise InputError(
                "generator.freq_hz",
                f"{format_frequency(freq_hz, 12)} is outside "
                f"{format_frequency_range(sp.min_freq_hz, sp.max_freq_hz)}",
                value=freq_hz,
            )
        if not sp.min_level_dbm <= float(level_dbm) <= sp.max_level_dbm:
            raise InputError(
                "generator.level_dbm",
                f"{level_dbm!r} dBm is outside {sp.min_level_dbm}..{sp.max_level_dbm} dBm",
                value=level_dbm,
            )
        with self.lock:
            self._freq_hz = float(freq_hz)
            self._level_dbm = float(level_dbm)

    @property
    def freq_hz(self) -> float:
        return self._freq_hz

    @property
    def level_dbm(self) -> float:
        return self._level_dbm

    def set_output(self, on: bool) -> None:
        with self.lock:
            self._on = bool(on)

    @property
    def output_on(self) -> bool:
        return self._on

    @property
    def true_level_dbm(self) -> float:
        """The level really delivered (set level plus the generator's level error and its
        flatness, ``level_slope_db_per_ghz`` per GHz from 1 GHz), dBm."""
        slope = self.spec.level_slope_db_per_ghz * (self._freq_hz / 1e9 - 1.0)
        return self._level_dbm + self.spec.level_error_db + slope

    def close(self) -> None:
        """Output off (safe state). Idempotent."""
        self.set_output(False)
