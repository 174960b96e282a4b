"""Noise-source control behind :class:`noisebench.bench.instruments.NoiseSource`.

Four ways to switch a noise source between hot (drive on) and cold (drive off):

- :class:`AnalyzerDriveNoiseSource` - the analyzer's own noise-source drive output;
- :class:`SupplyNoiseSource` - a SCPI DC supply (:class:`ScpiSupply`): voltage and current
  limit are set and read back BEFORE the output is enabled, a voltage above the configured
  maximum is refused with :class:`~noisebench.errors.SafetyError`, and the delivered voltage
  (and current) is verified with MEASure when the profile has it;
- :class:`CallableNoiseSource` - a function of your own (relay, GPIO, lab automation);
- :class:`OperatorNoiseSource` - asks the operator (the input function is injectable).

All wait ``settle_time_s`` after a switch that changes the state (or when the state is not
known: the first command after opening, or after a failed one; commanding the state the source
is already in, as a safe state does, waits nothing) and switch the drive off on ``close``.
:func:`check_source_switching` measures Y from two traces to catch a source that does not
switch (open drive lead, wrong voltage, stuck relay) before a whole sweep is wasted.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.bench.capabilities import NoiseDriveOutput
from noisebench.bench.instruments import Analyzer, Instrument, NoiseSource
from noisebench.errors import (
    CommunicationError,
    InputError,
    MeasurementError,
    NoisebenchError,
    SafetyError,
)

from .profile import InstrumentProfile, SupplyProfile
from .scpi_channel import SwitchedOutputInstrument
from .transport import Transport

logger = logging.getLogger(__name__)

__all__ = [
    "AnalyzerDriveNoiseSource",
    "CallableNoiseSource",
    "OperatorNoiseSource",
    "ScpiSupply",
    "SupplyNoiseSource",
    "check_source_switching",
]


def _seconds(field: str, value: float) -> float:
    try:
        seconds = float(value)
    except (TypeError, ValueError):
        raise InputError(field, f"must be a number of seconds (got {value!r})") from None
    if not math.isfinite(seconds) or seconds < 0:
        raise InputError(field, f"must be finite and >= 0 s (got {value!r})", value=value)
    return seconds


class _SwitchedSource(NoiseSource):
    """State, settle time after every switch and drive-off on close, for every source kind."""

    def __init__(
        self,
        settle_time_s: float,
        *,
        sleep: Callable[[float], None] = time.sleep,
        cold_temperature_k: float | None = None,
    ) -> None:
        super().__init__()
        self._settle_s = _seconds("settle_time_s", settle_time_s)
        if cold_temperature_k is not None and not (
            math.isfinite(cold_temperature_k) and cold_temperature_k > 0
        ):
            raise InputError(
                "cold_temperature_k", "must be finite and > 0 K", value=cold_temperature_k
            )
        self._cold_k = cold_temperature_k
        self._sleep = sleep
        self._hot = False
        self._known = False  # whether _hot is the state last commanded successfully
        self._closed = False

    def _switch(self, hot: bool) -> None:
        raise NotImplementedError

    def _release(self) -> None:
        """Release connections after the drive went off (default: nothing)."""

    def set_hot(self, hot: bool) -> None:
        """Drive on (hot) or off (cold), then wait ``settle_time_s`` when the state changed or
        was not known (the drive is commanded either way)."""
        if not isinstance(hot, (bool, np.bool_)):
            raise InputError("hot", f"must be True or False (got {hot!r})", value=hot)
        with self.lock:
            if self._closed:
                raise InputError("noise_source", "is closed", fix="open it again")
            hot = bool(hot)
            changed = not self._known or hot != self._hot
            self._known = False  # until the switch succeeded
            self._switch(hot)
            self._hot = hot
            self._known = True
            if not changed:
                return
            logger.info(
                "noise source %s; settling %.3g s", "hot" if hot else "cold", self._settle_s
            )
            if self._settle_s > 0:
                self._sleep(self._settle_s)

    @property
    def is_hot(self) -> bool:
        return self._hot

    @property
    def settle_time_s(self) -> float:
        return self._settle_s

    @property
    def cold_temperature_k(self) -> float | None:
        return self._cold_k

    def close(self) -> None:
        """Drive off (safe state), then release. Idempotent."""
        with self.lock:
            if self._closed:
                return
            self._closed = True
            try:
                self._switch(False)
                self._hot = False
            except NoisebenchError as exc:
                logger.error("noise source: could not switch the drive off on close: %s", exc)
            finally:
                self._release()


# ----------------------------------------------------------------------------- analyzer drive


class AnalyzerDriveNoiseSource(_SwitchedSource):
    """The noise source on the analyzer's drive output (an analyzer that declares
    :class:`~noisebench.bench.capabilities.NoiseDriveOutput` and has it, e.g.
    :class:`~noisebench.drivers.analyzer.ScpiAnalyzer` with a profile naming the commands).
    Closing the source switches the drive off but leaves the analyzer open."""

    def __init__(
        self,
        analyzer: Analyzer,
        settle_time_s: float,
        *,
        sleep: Callable[[float], None] = time.sleep,
        cold_temperature_k: float | None = None,
    ) -> None:
        if not (isinstance(analyzer, NoiseDriveOutput) and analyzer.has_noise_drive):
            raise InputError(
                "analyzer",
                f"{type(analyzer).__name__} has no noise-source drive output",
                fix="use a DC supply, a relay callable or the operator",
            )
        super().__init__(settle_time_s, sleep=sleep, cold_temperature_k=cold_temperature_k)
        self.analyzer = analyzer
        self._drive: NoiseDriveOutput = analyzer

    @property
    def identity(self) -> str:
        return f"noise drive of {self.analyzer.identity}"

    def _switch(self, hot: bool) -> None:
        self._drive.set_noise_drive(hot)


# ----------------------------------------------------------------------------- DC supply


class ScpiSupply(SwitchedOutputInstrument, Instrument):
    """A DC supply over SCPI (``[supply]`` profile section): voltage, current limit, output,
    MEASure. Its output is switched off on close."""

    def __init__(
        self,
        transport: Transport,
        profile: InstrumentProfile | str | Path = "generic",
        *,
        retries: int = 2,
    ) -> None:
        super().__init__()
        self.voltage_v: float | None = None
        self.current_limit_a: float | None = None
        self.spec: SupplyProfile
        self._connect_output(transport, profile, "supply", retries=retries)

    def __repr__(self) -> str:
        return f"<ScpiSupply {self.transport.resource!r} profile={self.profile.name!r}>"

    def program(self, voltage_v: float, current_limit_a: float) -> tuple[float, float]:
        """Set voltage (V) and current limit (A); return the read-back values."""
        s = self.spec.settings
        commands = [s.current_limit_a.command(current_limit_a), s.voltage_v.command(voltage_v)]
        return self._channel.run("program", lambda: self._program(commands))

    def _program(self, commands: list[str]) -> tuple[float, float]:
        s = self.spec.settings
        for command in commands:
            self._channel.write(command)
        self.voltage_v = self._channel.get(s.voltage_v)
        self.current_limit_a = self._channel.get(s.current_limit_a)
        self._channel.check_errors("program")
        return self.voltage_v, self.current_limit_a

    def set_output(self, on: bool) -> None:
        """Switch the output and verify the read-back."""
        setting = self.spec.settings.output
        self._channel.run("output", lambda: self._apply_output(setting, bool(on)))

    def _apply_output(self, setting: Any, on: bool) -> None:
        self._channel.write(setting.command(on))
        if bool(self._channel.get(setting)) != on:
            raise MeasurementError(
                f"supply output did not switch {'on' if on else 'off'}", instrument="supply"
            )
        self._output = on

    def measure_voltage(self) -> float:
        return self._measure(self.spec.measure_voltage, "voltage")

    def measure_current(self) -> float:
        return self._measure(self.spec.measure_current, "current")

    def _measure(self, query: str | None, what: str) -> float:
        if query is None:
            raise InputError(
                f"supply.measure_{what}", f"profile {self.profile.name} cannot measure the {what}"
            )
        reply = self._channel.run(f"measure {what}", lambda: self._channel.query(query))
        try:
            value = float(reply)
        except ValueError:
            raise CommunicationError(
                f"reply {reply!r} to {query!r} is not a number", command=query
            ) from None
        if not math.isfinite(value) or abs(value) >= 9.9e37:
            raise CommunicationError(f"reply {reply!r} to {query!r} is not finite", command=query)
        return value

    def _restore(self) -> None:
        """After a reconnect: output off, limit and voltage again, then the output state."""
        s = self.spec.settings
        wanted = self._output
        self._channel.write(s.output.command(False))
        self._output = False
        if self.voltage_v is not None and self.current_limit_a is not None:
            self._channel.write(s.current_limit_a.command(self.current_limit_a))
            self._channel.write(s.voltage_v.command(self.voltage_v))
        if wanted:
            self._channel.write(s.output.command(True))
            self._output = True

    def close(self) -> None:
        """Output off, then release the session. Idempotent."""
        with self.lock:
            if self._closed:
                return
            self._closed = True
            if self._channel.write_safe_state(self.spec.settings.output, False):
                self._output = False
            self._channel.close()


class SupplyNoiseSource(_SwitchedSource):
    """A noise source driven from a :class:`ScpiSupply`.

    ``drive_v`` (V) defaults to the ENR table's ``nominal_drive_v`` metadata; it must not
    exceed ``max_drive_v`` (SafetyError). The supply is programmed (current limit, then
    voltage) and read back with its output OFF; every switch to hot re-sends both before the
    output goes on. With MEASure in the profile, the delivered voltage must lie within the
    profile's ``voltage_tolerance_v`` of ``drive_v``, and the current must stay below the
    limit and (when ``min_current_a`` is given) above ``min_current_a`` - an open drive lead
    draws nothing. A failed check switches the output off and raises MeasurementError.
    """

    def __init__(
        self,
        supply: ScpiSupply,
        *,
        drive_v: float | None = None,
        current_limit_a: float,
        max_drive_v: float,
        settle_time_s: float,
        enr_table: Any = None,
        min_current_a: float | None = None,
        sleep: Callable[[float], None] = time.sleep,
        cold_temperature_k: float | None = None,
    ) -> None:
        super().__init__(settle_time_s, sleep=sleep, cold_temperature_k=cold_temperature_k)
        self.supply = supply
        self.drive_v = _drive_voltage(drive_v, enr_table, max_drive_v)
        self.max_drive_v = float(max_drive_v)
        self.current_limit_a = _positive("current_limit_a", current_limit_a)
        self.min_current_a = (
            None if min_current_a is None else _positive("min_current_a", min_current_a)
        )
        if self.min_current_a is not None and self.min_current_a >= self.current_limit_a:
            raise InputError("min_current_a", "must be below current_limit_a", value=min_current_a)
        supply.set_output(False)
        self._program()

    @property
    def identity(self) -> str:
        return f"noise source on {self.supply.identity} at {self.drive_v:g} V"

    def _program(self) -> None:
        volts, amps = self.supply.program(self.drive_v, self.current_limit_a)
        tolerance = self.supply.spec.voltage_tolerance_v
        if volts > self.max_drive_v or abs(volts - self.drive_v) > tolerance:
            self.supply.set_output(False)
            raise SafetyError(
                f"supply reports {volts:g} V after programming {self.drive_v:g} V "
                f"(limit {self.max_drive_v:g} V): output kept off",
                instrument="supply",
            )
        if amps > self.current_limit_a * 1.001 + 1e-6:
            self.supply.set_output(False)
            raise SafetyError(
                f"supply reports a {amps:g} A current limit after programming "
                f"{self.current_limit_a:g} A: output kept off",
                instrument="supply",
            )

    def _switch(self, hot: bool) -> None:
        if not hot:
            self.supply.set_output(False)
            return
        self._program()
        self.supply.set_output(True)
        try:
            self._verify_drive()
        except NoisebenchError:
            self.supply.set_output(False)
            raise

    def _verify_drive(self) -> None:
        if self.supply.spec.measure_voltage is not None:
            volts = self.supply.measure_voltage()
            tolerance = self.supply.spec.voltage_tolerance_v
            if abs(volts - self.drive_v) > tolerance:
                raise MeasurementError(
                    f"noise-source drive measures {volts:.3f} V, expected {self.drive_v:.3f} V "
                    f"+/- {tolerance:g} V (current limit reached or wrong wiring?)",
                    instrument="supply",
                )
        if self.supply.spec.measure_current is not None:
            amps = self.supply.measure_current()
            if amps >= 0.98 * self.current_limit_a:
                raise MeasurementError(
                    f"noise-source drive current {amps:.4g} A is at the "
                    f"{self.current_limit_a:g} A limit (short circuit?)",
                    instrument="supply",
                )
            if self.min_current_a is not None and amps < self.min_current_a:
                raise MeasurementError(
                    f"noise-source drive current {amps:.4g} A is below "
                    f"{self.min_current_a:g} A: the drive lead is open or "
                    "the source is not connected",
                    instrument="supply",
                )

    def _release(self) -> None:
        self.supply.close()


def _positive(field: str, value: float) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputError(field, f"must be a number (got {value!r})") from None
    if not math.isfinite(number) or number <= 0:
        raise InputError(field, f"must be finite and > 0 (got {value!r})", value=value)
    return number


def _drive_voltage(drive_v: float | None, enr_table: Any, max_drive_v: float) -> float:
    limit = _positive("max_drive_v", max_drive_v)
    if drive_v is None:
        meta = getattr(enr_table, "metadata", None)
        drive_v = getattr(meta, "nominal_drive_v", None)
        if drive_v is None:
            raise InputError(
                "drive_v",
                "no drive voltage given and the ENR table has no nominal_drive_v",
                fix="pass drive_v, or add '# nominal_drive_v: 28' to the ENR table",
            )
    volts = _positive("drive_v", drive_v)
    if volts > limit:
        raise SafetyError(
            f"noise-source drive {volts:g} V is above the configured maximum {limit:g} V: refused",
            drive_v=volts,
            max_drive_v=limit,
        )
    return volts


# ----------------------------------------------------------------------------- callable / operator


class CallableNoiseSource(_SwitchedSource):
    """A noise source switched by ``fn(hot: bool)`` (relay, GPIO, lab automation)."""

    def __init__(
        self,
        fn: Callable[[bool], Any],
        settle_time_s: float,
        *,
        identity: str = "noise source on a user switch",
        sleep: Callable[[float], None] = time.sleep,
        cold_temperature_k: float | None = None,
    ) -> None:
        if not callable(fn):
            raise InputError("fn", "must be callable as fn(hot: bool)")
        super().__init__(settle_time_s, sleep=sleep, cold_temperature_k=cold_temperature_k)
        self.fn = fn
        self._identity = str(identity)

    @property
    def identity(self) -> str:
        return self._identity

    def _switch(self, hot: bool) -> None:
        try:
            self.fn(hot)
        except NoisebenchError:
            raise
        except Exception as exc:  # noqa: BLE001 - a user callback may raise anything
            raise CommunicationError(
                f"noise-source switch callback failed: {type(exc).__name__}: {exc}"
            ) from exc


class OperatorNoiseSource(_SwitchedSource):
    """Asks the operator to switch the drive. ``prompt(text) -> str`` defaults to ``input``;
    an answer of ``q``/``quit``/``abort`` (or end of input) stops with MeasurementError."""

    def __init__(
        self,
        prompt: Callable[[str], str] = input,
        settle_time_s: float = 2.0,
        *,
        sleep: Callable[[float], None] = time.sleep,
        cold_temperature_k: float | None = None,
    ) -> None:
        if not callable(prompt):
            raise InputError("prompt", "must be callable as prompt(text) -> str")
        super().__init__(settle_time_s, sleep=sleep, cold_temperature_k=cold_temperature_k)
        self.prompt = prompt

    @property
    def identity(self) -> str:
        return "noise source switched by the operator"

    def _switch(self, hot: bool) -> None:
        state = "ON (hot)" if hot else "OFF (cold)"
        try:
            answer = self.prompt(
                f"Switch the noise-source drive {state}, then press Enter (q to stop): "
            )
        except EOFError:
            raise MeasurementError(
                "no operator input available to switch the noise source",
                fix="run interactively, or drive the source from a supply or relay",
            ) from None
        if str(answer).strip().lower() in ("q", "quit", "abort"):
            raise MeasurementError("the operator stopped at the noise-source prompt")


# ----------------------------------------------------------------------------- sanity check


def check_source_switching(
    analyzer: Analyzer, source: NoiseSource, *, min_y_db: float = 0.1, sigmas: float = 5.0
) -> float:
    """Measure Y (dB) from one hot and one cold trace, leave the source cold, and raise
    MeasurementError when hot and cold cannot be told apart: Y below ``min_y_db`` or within
    ``sigmas`` standard uncertainties of 0 dB.

    Needs a configured analyzer (``configure`` first). Each trace is reduced to a noise
    density over its whole span by :func:`noisebench.science.estimator.estimate_density`, whose
    standard uncertainty follows from the applied settings (radiometer statistics), so the
    threshold adapts to how much the traces were averaged."""
    from noisebench.science.estimator import estimate_density

    for name, value in (("min_y_db", min_y_db), ("sigmas", sigmas)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
            raise InputError(name, "must be finite and > 0", value=value)
    try:
        source.set_hot(True)
        hot = estimate_density(analyzer.acquire_trace())
    finally:
        source.set_hot(False)
    cold = estimate_density(analyzer.acquire_trace())
    y_db = 10.0 * math.log10(hot.density_w_per_hz / cold.density_w_per_hz)
    u_y_db = 10.0 / math.log(10.0) * math.hypot(hot.relative_u, cold.relative_u)
    if y_db < max(min_y_db, sigmas * u_y_db):
        raise MeasurementError(
            f"the noise source does not switch: hot and cold read the same (Y = {y_db:.3f} "
            f"+/- {u_y_db:.3f} dB; needs {max(min_y_db, sigmas * u_y_db):.3f} dB)",
            fix="check the drive voltage, the drive lead and the source connection; with a "
            "small Y, average more",
            y_db=round(y_db, 4),
        )
    return y_db
