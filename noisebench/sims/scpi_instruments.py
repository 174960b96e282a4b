"""SCPI instruments on the simulated bench: the common base, the generator and the DC supply.

Each :class:`ScpiInstrument` turns one received program message into response units, keeping
IEEE 488.2 status (error queue, ``*ESR``, ``*STB``, ``*OPC``) and the instrument's SCPI-side
state, with helpers that declare a command once (numeric with range and MIN/MAX/DEF, boolean,
character data, query, event). Physics lives in the simulated bench
(``noisebench.sims.bench``); these classes only map SCPI onto it. The analyzer's command set is
:mod:`noisebench.sims.scpi_analyzer`; the transport (sockets, faults, command log) is
:mod:`noisebench.sims.scpi_server`; the command set is documented in ``noisebench/sims/SCPI.md``.

A failing query returns nothing and queues its error, like a real instrument.

Size: the common SCPI instrument base (IEEE 488.2 status, error queue) with the two small
instruments built on it (generator, supply).
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

from noisebench.errors import InputError, NoisebenchError

from .scpi_parser import (
    CommandTree,
    NumericSpecial,
    Resolved,
    ScpiError,
    format_bool,
    format_number,
    match_choice,
    parse_boolean,
    parse_integer,
    parse_numeric,
    parse_unit,
    split_units,
)

logger = logging.getLogger(__name__)

ERROR_QUEUE_SIZE = 16

# *ESR bits (IEEE 488.2 standard event status register, from memory)
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 1, 4, 8, 16, 32, 128
# *STB bits (IEEE 488.2 status byte; SCPI-1999 puts the error queue summary on bit 2;
# from memory)
STB_EAV, STB_ESB, STB_MSS = 4, 32, 64


# ----------------------------------------------------------------------------- building blocks


@dataclass(frozen=True)
class Block:
    """An IEEE 488.2 definite-length arbitrary block response (``#<n><len><bytes>``)."""

    payload: bytes

    def header(self) -> bytes:
        digits = str(len(self.payload))
        return f"#{len(digits)}{digits}".encode("ascii")

    def encode(self) -> bytes:
        return self.header() + self.payload


Response = str | Block


@dataclass
class Call:
    """One command as the handler sees it: raw parameter tokens and header suffixes."""

    header: str
    params: tuple[str, ...]
    suffixes: tuple[int, ...]
    query: bool

    def none(self) -> None:
        if self.params:
            raise ScpiError(-108, f"{self.header} takes no parameter")

    def one(self) -> str:
        if not self.params:
            raise ScpiError(-109, f"{self.header} needs a parameter")
        if len(self.params) > 1:
            raise ScpiError(-108, f"{self.header} takes one parameter")
        return self.params[0]

    def optional(self) -> str | None:
        if len(self.params) > 1:
            raise ScpiError(-108, f"{self.header} takes at most one parameter")
        return self.params[0] if self.params else None


@dataclass
class Command:
    """Set and/or query handler of one header. ``locked=False`` runs without the lock (waits)."""

    setter: Callable[[Call], None] | None = None
    getter: Callable[[Call], Response] | None = None
    locked: bool = True


class StatusRegisters:
    """Error queue (16 entries, -350 on overflow), ``*ESR``/``*ESE``/``*SRE``, ``*OPC`` state."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.errors: deque[str] = deque()
        self.esr = ESR_PON
        self.ese = 0
        self.sre = 0
        self.opc_pending = False

    def push(self, error: ScpiError) -> None:
        """Queue ``error`` and set its *ESR bit by error class."""
        with self._lock:
            self.esr |= _esr_bit(error.code)
            if len(self.errors) >= ERROR_QUEUE_SIZE:
                self.errors[-1] = ScpiError(-350).entry()
            else:
                self.errors.append(error.entry())
        logger.debug("error queued: %s", error.entry())

    def pop(self) -> str:
        with self._lock:
            return self.errors.popleft() if self.errors else ScpiError(0).entry()

    def pop_all(self) -> list[str]:
        with self._lock:
            out = list(self.errors) or [ScpiError(0).entry()]
            self.errors.clear()
            return out

    def count(self) -> int:
        with self._lock:
            return len(self.errors)

    def read_esr(self) -> int:
        with self._lock:
            value, self.esr = self.esr, 0
            return value

    def set_opc(self) -> None:
        with self._lock:
            self.esr |= ESR_OPC
            self.opc_pending = False

    def stb(self) -> int:
        with self._lock:
            value = STB_EAV if self.errors else 0
            if self.esr & self.ese:
                value |= STB_ESB
            if value & self.sre & ~STB_MSS:
                value |= STB_MSS
            return value

    def clear(self) -> None:
        """``*CLS``: empty the queue, clear *ESR and the *OPC wait."""
        with self._lock:
            self.errors.clear()
            self.esr = 0
            self.opc_pending = False

    def power_on(self) -> None:
        with self._lock:
            self.errors.clear()
            self.esr = ESR_PON
            self.ese = 0
            self.sre = 0
            self.opc_pending = False


def _esr_bit(code: int) -> int:
    if -199 <= code <= -100:
        return ESR_CME
    if -299 <= code <= -200:
        return ESR_EXE
    if -499 <= code <= -400:
        return ESR_QYE
    return ESR_DDE


class WallClock:
    """Lets real time that passes between commands also pass on the bench's simulated clock.

    ``catch_up()`` (before each command, under the bench lock) advances the simulated clock by
    the wall time since the last mark; ``skip()`` drops the wall time spent computing an
    acquisition, whose instrument time the simulated analyzer has already counted.
    """

    def __init__(self, clock: Any) -> None:
        self.clock = clock
        self._mark = time.monotonic()

    def catch_up(self) -> None:
        now = time.monotonic()
        elapsed, self._mark = now - self._mark, now
        if elapsed > 0:
            self.clock.advance(elapsed)

    def skip(self) -> None:
        self._mark = time.monotonic()


class InstrumentGone(Exception):
    """Raised inside a waiting command when the server stops or the instrument reboots."""


T = TypeVar("T")


def _with_lock(lock: threading.RLock, fn: Callable | None, locked: bool) -> Callable | None:
    """``fn`` wrapped to run under ``lock`` when ``locked`` (None stays None)."""
    if fn is None or not locked:
        return fn

    def run(call: Call) -> Any:
        with lock:
            return fn(call)

    return run


def short_form(pattern: str) -> str:
    return "".join(ch for ch in pattern if not ch.islower()).upper()


# ----------------------------------------------------------------------------- base instrument


class ScpiInstrument:
    """Common commands, status, error queue and parameter helpers for one simulated instrument.

    ``lock`` serialises access to the shared simulated bench (all instruments share it);
    ``faults`` is the server's :class:`~noisebench.sims.scpi_server.Faults` (read only here).
    """

    kind = "instrument"

    def __init__(
        self, bench: Any, lock: threading.RLock, faults: Any, stop_event: threading.Event, idn: str
    ) -> None:
        self.bench = bench
        self.lock = lock
        self.faults = faults
        self.stop_event = stop_event
        self.idn = idn
        self.status = StatusRegisters()
        self.wall: WallClock | None = None  # set by the server to count real time
        self.tree: CommandTree[Command] = CommandTree()
        self._add_common_commands()
        self._add_commands()

    # --- to override
    def _add_commands(self) -> None:
        """Add the instrument-specific commands to ``self.tree``."""

    def reset(self) -> None:
        """``*RST``: instrument settings back to their defaults (status untouched)."""

    def operation_pending(self) -> bool:
        """True while an overlapped operation (an acquisition) runs."""
        return False

    def wait_complete(self) -> None:
        """Block until no overlapped operation runs (raise InstrumentGone on shutdown)."""

    def shutdown(self) -> None:
        """Stop background work (server stop)."""

    def power_on(self) -> None:
        """Reboot: settings to defaults, status to power-on state."""
        with self.lock:
            self.reset()
            self.status.power_on()

    def fault_changed(self, name: str) -> None:
        """Called by the server when a fault switch changed."""

    # --- execution
    def execute(self, line: str) -> list[Response]:
        """Run one program message; return its response units (failed queries give none)."""
        responses: list[Response] = []
        try:
            units = split_units(line)
        except ScpiError as exc:
            self.status.push(exc)
            return responses
        if self.wall is not None:
            with self.lock:
                self.wall.catch_up()
        previous: Resolved[Command] | None = None
        for text in units:
            try:
                unit = parse_unit(text)
                resolved = self.tree.resolve(unit, previous)
                if not unit.common:
                    previous = resolved
                reply = self._run(resolved, unit.query, unit.params, text)
                if reply is not None:
                    responses.append(reply)
            except ScpiError as exc:
                self.status.push(exc)
                if exc.is_command_error:  # IEEE 488.2: the rest of the message is discarded
                    break
        return responses

    def _run(
        self, resolved: Resolved[Command], query: bool, params: tuple[str, ...], text: str
    ) -> Response | None:
        command = resolved.handler
        handler = command.getter if query else command.setter
        header = text.split(maxsplit=1)[0] if text.split() else text
        refused = getattr(self.faults, "refuse_header", None)
        if refused and not query and header.lstrip(":").upper() == refused.upper():
            raise ScpiError(-221, f"{header} refused (fault switch)")
        if handler is None:
            form = "query form" if query else "set form"
            raise ScpiError(-113, f"{header} has no {form}")
        call = Call(header, params, resolved.suffixes, query)
        try:
            if command.locked:
                with self.lock:
                    return handler(call)
            return handler(call)
        except (ScpiError, InstrumentGone):
            raise
        except InputError as exc:
            raise ScpiError(-222, exc.message) from exc
        except NoisebenchError as exc:
            raise ScpiError(-200, exc.message) from exc
        except Exception as exc:  # noqa: BLE001 - an instrument never crashes on a command
            logger.exception("%s: internal error on %r", self.kind, text)
            raise ScpiError(-200, f"internal {type(exc).__name__}: {exc}") from exc

    # --- helpers to declare commands
    def add(
        self,
        pattern: str,
        setter: Callable[[Call], None] | None = None,
        getter: Callable[[Call], Response] | None = None,
        *,
        locked: bool = True,
        suffix_max: int = 1,
    ) -> None:
        for entry in self.tree.entries:  # a set form and a query form declared apart
            if entry.pattern == pattern:
                command = entry.handler
                if (setter and command.setter) or (getter and command.getter):
                    raise ValueError(f"{pattern} declared twice")
                if command.locked != locked:  # keep each form's own locking
                    command.setter = _with_lock(self.lock, command.setter, command.locked)
                    command.getter = _with_lock(self.lock, command.getter, command.locked)
                    setter = _with_lock(self.lock, setter, locked)
                    getter = _with_lock(self.lock, getter, locked)
                    command.locked = False
                command.setter = command.setter or setter
                command.getter = command.getter or getter
                return
        self.tree.add(pattern, Command(setter, getter, locked), suffix_max=suffix_max)

    def add_numeric(
        self,
        pattern: str,
        *,
        unit: str | None,
        low: float,
        high: float,
        default: float,
        get: Callable[[], float],
        put: Callable[[float], None],
        integer: bool = False,
    ) -> None:
        """A numeric setting with range check and MIN/MAX/DEF (set and query forms)."""
        specials = {
            NumericSpecial.MINIMUM: low,
            NumericSpecial.MAXIMUM: high,
            NumericSpecial.DEFAULT: default,
        }

        def setter(call: Call) -> None:
            token = call.one()
            value = parse_integer(token) if integer else parse_numeric(token, unit)
            if isinstance(value, NumericSpecial):
                value = specials[value]
            if not low <= value <= high:
                raise ScpiError(
                    -222,
                    f"{call.header} {token}: allowed {format_number(low)} to "
                    f"{format_number(high)}{' ' + unit if unit else ''}",
                )
            put(int(value) if integer else float(value))

        def getter(call: Call) -> str:
            token = call.optional()
            if token is None:
                return format_number(get())
            special = parse_numeric(token, unit)
            if not isinstance(special, NumericSpecial):
                raise ScpiError(-108, f"{call.header}? accepts only MIN, MAX or DEF")
            return format_number(specials[special])

        self.add(pattern, setter, getter)

    def add_choice(
        self,
        pattern: str,
        choices: dict[str, T],
        *,
        get: Callable[[], T],
        put: Callable[[T], None] | None,
    ) -> None:
        """Character-data setting; the query answers the short form of the current choice."""
        replies = {value: short_form(name) for name, value in reversed(choices.items())}

        def setter(call: Call) -> None:
            put(match_choice(call.one(), choices))  # type: ignore[misc]

        def getter(call: Call) -> str:
            call.none()
            return replies[get()]

        self.add(pattern, setter if put else None, getter)

    def add_bool(
        self, pattern: str, *, get: Callable[[], bool], put: Callable[[bool], None]
    ) -> None:
        def setter(call: Call) -> None:
            put(parse_boolean(call.one()))

        def getter(call: Call) -> str:
            call.none()
            return format_bool(get())

        self.add(pattern, setter, getter)

    def add_query(self, pattern: str, fn: Callable[[], Response], *, locked: bool = True) -> None:
        def getter(call: Call) -> Response:
            call.none()
            return fn()

        self.add(pattern, None, getter, locked=locked)

    def add_event(self, pattern: str, fn: Callable[[], None], *, locked: bool = True) -> None:
        def setter(call: Call) -> None:
            call.none()
            fn()

        self.add(pattern, setter, None, locked=locked)

    # --- IEEE 488.2 common commands and SCPI-required SYSTem commands
    def _add_common_commands(self) -> None:
        status = self.status
        self.add_query("*IDN", lambda: self.idn)
        self.add_event("*RST", self._rst)
        self.add_event("*CLS", status.clear)
        self.add_query("*TST", lambda: "0")
        self.add_query("*ESR", lambda: str(status.read_esr()))
        self.add_query("*STB", lambda: str(status.stb()))
        self.add_numeric(
            "*ESE",
            unit=None,
            low=0,
            high=255,
            default=0,
            integer=True,
            get=lambda: status.ese,
            put=lambda v: setattr(status, "ese", int(v)),
        )
        self.add_numeric(
            "*SRE",
            unit=None,
            low=0,
            high=255,
            default=0,
            integer=True,
            get=lambda: status.sre,
            put=lambda v: setattr(status, "sre", int(v) & ~STB_MSS),
        )
        self.add_event("*OPC", self._opc)
        self.add_query("*OPC", self._opc_query, locked=False)
        # looked up at each call, as *OPC? does (a test swaps wait_complete on the instance)
        self.add_event("*WAI", lambda: self.wait_complete(), locked=False)
        self.add_query("SYSTem:ERRor[:NEXT]", status.pop)
        self.add_query("SYSTem:ERRor:ALL", lambda: ",".join(status.pop_all()))
        self.add_query("SYSTem:ERRor:COUNt", lambda: str(status.count()))
        self.add_query("SYSTem:VERSion", lambda: "1999.0")

    def _rst(self) -> None:
        self.reset()
        self.status.opc_pending = False

    def _opc(self) -> None:
        if self.operation_pending():
            self.status.opc_pending = True
        else:
            self.status.set_opc()

    def _opc_query(self) -> str:
        self.wait_complete()
        return "1"


# ----------------------------------------------------------------------------- generator


class GeneratorScpi(ScpiInstrument):
    """The simulated CW signal generator (limits from the bench's generator spec)."""

    kind = "generator"
    RESET_FREQ_HZ = 1e9
    RESET_LEVEL_DBM = -110.0

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        with self.lock:
            self.reset()

    @property
    def generator(self) -> Any:
        return self.bench.generator

    def _spec(self, name: str, fallback: float) -> float:
        return float(getattr(getattr(self.generator, "spec", None), name, fallback))

    def _ranges(self) -> tuple[tuple[float, float], tuple[float, float]]:
        freq = (self._spec("min_freq_hz", 9e3), self._spec("max_freq_hz", 40e9))
        level = (self._spec("min_level_dbm", -140.0), self._spec("max_level_dbm", 20.0))
        return freq, level

    def _reset_values(self) -> tuple[float, float]:
        (f_lo, f_hi), (l_lo, l_hi) = self._ranges()
        return (
            min(max(self.RESET_FREQ_HZ, f_lo), f_hi),
            min(max(self.RESET_LEVEL_DBM, l_lo), l_hi),
        )

    def reset(self) -> None:
        self.generator.set_output(False)
        self.generator.set_cw(*self._reset_values())

    def _add_commands(self) -> None:
        gen = self.generator
        (f_lo, f_hi), (l_lo, l_hi) = self._ranges()
        freq0, level0 = self._reset_values()
        self.add_numeric(
            "[SOURce:]FREQuency[:CW]",
            unit="HZ",
            low=f_lo,
            high=f_hi,
            default=freq0,
            get=lambda: gen.freq_hz,
            put=lambda v: gen.set_cw(v, gen.level_dbm),
        )
        self.add_numeric(
            "[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]",
            unit="DBM",
            low=l_lo,
            high=l_hi,
            default=level0,
            get=lambda: gen.level_dbm,
            put=lambda v: gen.set_cw(gen.freq_hz, v),
        )
        self.add_bool("OUTPut[:STATe]", get=lambda: gen.output_on, put=gen.set_output)


# ----------------------------------------------------------------------------- DC supply


class LoGeneratorScpi(GeneratorScpi):
    """The LO generator of a frequency-converting DUT: the same command set as the generator,
    on its own port, driving the bench's ``lo_generator``."""

    kind = "lo generator"

    @property
    def generator(self) -> Any:
        return self.bench.lo_generator


class SupplyScpi(ScpiInstrument):
    """The simulated DC supply that drives the noise source (the bench's supply model)."""

    kind = "supply"
    RESET_CURRENT_A = 0.1

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        with self.lock:
            self.reset()

    @property
    def supply(self) -> Any:
        return self.bench.supply

    def _limit(self, name: str, fallback: float) -> float:
        return float(getattr(getattr(self.supply, "spec", None), name, fallback))

    def reset(self) -> None:
        self.supply.set_output(False)
        self.supply.set_voltage(0.0)
        self.supply.set_current_limit(self.RESET_CURRENT_A)

    def _add_commands(self) -> None:
        supply = self.bench.supply
        self.add_numeric(
            "[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            unit="V",
            low=0.0,
            high=self._limit("max_voltage_v", 60.0),
            default=0.0,
            get=lambda: supply.voltage_setting_v,
            put=supply.set_voltage,
        )
        self.add_numeric(
            "[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]",
            unit="A",
            low=1e-3,
            high=self._limit("max_current_a", 5.0),
            default=self.RESET_CURRENT_A,
            get=lambda: supply.current_limit_a,
            put=supply.set_current_limit,
        )
        self.add_bool("OUTPut[:STATe]", get=lambda: supply.output_on, put=supply.set_output)
        self.add_query(
            "MEASure[:SCALar]:VOLTage[:DC]", lambda: format_number(float(supply.measure_voltage()))
        )
        self.add_query(
            "MEASure[:SCALar]:CURRent[:DC]", lambda: format_number(float(supply.measure_current()))
        )
