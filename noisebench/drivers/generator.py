"""``ScpiGenerator``: a CW signal generator driven by the ``[generator]`` profile section.

Frequency and level are validated against the profile's ranges (and an optional level limit
that protects the DUT: :class:`~noisebench.errors.SafetyError`), sent, and read back; the
applied values are kept in ``frequency_hz`` / ``level_dbm``. The RF output is switched off
on close, and switched off before the frequency and level are restored after a reconnect.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

from noisebench.bench.instruments import Generator
from noisebench.errors import InputError, MeasurementError, SafetyError

from .profile import GeneratorProfile, InstrumentProfile
from .scpi_channel import SwitchedOutputInstrument
from .transport import Transport

logger = logging.getLogger(__name__)

__all__ = ["ScpiGenerator"]

_LEVEL_READBACK_TOL_DB = 0.05  # a generator's level resolution is usually 0.01 dB


class ScpiGenerator(SwitchedOutputInstrument, Generator):
    """A CW generator over a :class:`~noisebench.drivers.transport.Transport`.

    ``max_level_dbm`` (optional) refuses any higher level with SafetyError, e.g. to keep a
    DUT well below compression or the analyzer below its damage level.
    """

    def __init__(
        self,
        transport: Transport,
        profile: InstrumentProfile | str | Path = "generic",
        *,
        retries: int = 2,
        max_level_dbm: float | None = None,
    ) -> None:
        super().__init__()
        if max_level_dbm is not None and not math.isfinite(float(max_level_dbm)):
            raise InputError("max_level_dbm", "must be finite", value=max_level_dbm)
        self.max_level_dbm = None if max_level_dbm is None else float(max_level_dbm)
        self.frequency_hz: float | None = None
        self.level_dbm: float | None = None
        self.spec: GeneratorProfile
        self._connect_output(transport, profile, "generator", retries=retries)

    def __repr__(self) -> str:
        return f"<ScpiGenerator {self.transport.resource!r} profile={self.profile.name!r}>"

    def set_cw(self, freq_hz: float, level_dbm: float) -> None:
        """Set the CW frequency (Hz) and level (dBm); both are read back."""
        s = self.spec.settings
        freq_cmd = s.frequency_hz.command(freq_hz)
        level_cmd = s.level_dbm.command(level_dbm)
        level = float(level_dbm)
        if self.max_level_dbm is not None and level > self.max_level_dbm:
            raise SafetyError(
                f"generator level {level:.2f} dBm is above the limit "
                f"{self.max_level_dbm:.2f} dBm set for this bench",
                level_dbm=level,
                max_level_dbm=self.max_level_dbm,
            )
        with self.lock:
            self._channel.run("set CW", lambda: self._apply_cw(freq_cmd, level_cmd, level))

    def _apply_cw(self, freq_cmd: str, level_cmd: str, level: float) -> None:
        s = self.spec.settings
        self._channel.write(freq_cmd)
        self._channel.write(level_cmd)
        freq, applied = self._channel.get(s.frequency_hz), self._channel.get(s.level_dbm)
        if abs(applied - level) > _LEVEL_READBACK_TOL_DB:
            raise MeasurementError(
                f"generator reports {applied:.3f} dBm after {level_cmd!r}", instrument="generator"
            )
        self._channel.check_errors("set CW")
        self.frequency_hz, self.level_dbm = freq, applied

    def set_output(self, on: bool) -> None:
        """Switch the RF output on or off and verify the read-back."""
        if on and self.level_dbm is None:
            raise SafetyError(
                "generator output refused: no level set yet",
                fix="call set_cw(freq_hz, level_dbm) first",
            )
        self._channel.run("output", lambda: self._apply_output(bool(on)))

    def _apply_output(self, on: bool) -> None:
        setting = self.spec.settings.output
        self._channel.write(setting.command(on))
        if bool(self._channel.get(setting)) != on:
            raise MeasurementError(
                f"generator output did not switch {'on' if on else 'off'}", instrument="generator"
            )
        self._output = on

    def _restore(self) -> None:
        """After a reconnect: output off, frequency and level again, then the output state."""
        s = self.spec.settings
        wanted = self._output
        self._channel.write(s.output.command(False))
        if self.frequency_hz is not None and self.level_dbm is not None:
            self._channel.write(s.frequency_hz.command(self.frequency_hz))
            self._channel.write(s.level_dbm.command(self.level_dbm))
        if wanted:
            self._channel.write(s.output.command(True))

    def close(self) -> None:
        """RF output off, then release the session. Idempotent."""
        with self.lock:
            if self._closed:
                return
            self._closed = True
            if self._channel.write_safe_state(self.spec.settings.output, False):
                self._output = False
            self._channel.close()
