"""The SCPI command sets of the simulated instruments (analyzer, generator, DC supply).

Each :class:`ScpiInstrument` turns one received program message into response units, keeping
IEEE 488.2 status (error queue, ``*ESR``, ``*STB``, ``*OPC``) and the instrument's SCPI-side
state. Physics lives in the simulated bench (``noisebench.sims.bench``); this module only maps
SCPI onto it. The transport (sockets, faults, command log) is :mod:`noisebench.sims.scpi_server`.
The command set is documented in ``sims/SCPI.md``.

Conventions: values in SI base units (Hz, s, V, A) or dB/dBm as named; the analyzer's queries
return the settings the bench APPLIED (rounded), never the requested ones; a failing query
returns nothing and queues its error, like a real instrument.
"""

from __future__ import annotations

import logging
import threading
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from enum import Enum
from typing import Any, TypeVar

import numpy as np
from pydantic import ValidationError

from noisebench import __version__
from noisebench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
)
from noisebench.errors import InputError, NoisebenchError
from noisebench.filters import FilterKind
from noisebench.sims.scpi_parser import (
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

# *ESR bits (IEEE 488.2 §11.5.1)
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 1, 4, 8, 16, 32, 128
# *STB bits (IEEE 488.2 §11.2; SCPI-1999 puts the error/event queue summary on bit 2)
STB_EAV, STB_ESB, STB_MSS = 4, 32, 64
# STATus:OPERation bits (SCPI-1999 Vol. 2 §20.1.4)
OPER_MEASURING = 16


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


class InstrumentGone(Exception):
    """Raised inside a waiting command when the server stops or the instrument reboots."""


T = TypeVar("T")


def _short_form(pattern: str) -> str:
    return "".join(ch for ch in pattern if not ch.islower()).upper()


# ----------------------------------------------------------------------------- base instrument


class ScpiInstrument:
    """Common commands, status, error queue and parameter helpers for one simulated instrument.

    ``lock`` serialises access to the shared simulated bench (all instruments share it);
    ``faults`` is the server's :class:`~noisebench.sims.scpi_server.Faults` (read only here).
    """

    kind = "instrument"

    def __init__(self, bench: Any, lock: threading.RLock, faults: Any,
                 stop_event: threading.Event, idn: str) -> None:
        self.bench = bench
        self.lock = lock
        self.faults = faults
        self.stop_event = stop_event
        self.idn = idn
        self.status = StatusRegisters()
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
        path: tuple = ()
        for text in units:
            try:
                unit = parse_unit(text)
                resolved = self.tree.resolve(unit, path)
                if not unit.common:
                    path = resolved.path
                reply = self._run(resolved, unit.query, unit.params, text)
                if reply is not None:
                    responses.append(reply)
            except ScpiError as exc:
                self.status.push(exc)
                if exc.is_command_error:  # IEEE 488.2: the rest of the message is discarded
                    break
        return responses

    def _run(self, resolved: Resolved[Command], query: bool, params: tuple[str, ...],
             text: str) -> Response | None:
        command = resolved.handler
        handler = command.getter if query else command.setter
        header = text.split(maxsplit=1)[0] if text.split() else text
        if handler is None:
            form = "a query form" if query else "a set form"
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
    def add(self, pattern: str, setter: Callable[[Call], None] | None = None,
            getter: Callable[[Call], Response] | None = None, *, locked: bool = True,
            suffix_max: int = 1) -> None:
        self.tree.add(pattern, Command(setter, getter, locked), suffix_max=suffix_max)

    def add_numeric(self, pattern: str, *, unit: str | None, low: float, high: float,
                    default: float, get: Callable[[], float], put: Callable[[float], None],
                    integer: bool = False) -> None:
        """A numeric setting with range check and MIN/MAX/DEF (set and query forms)."""
        specials = {NumericSpecial.MINIMUM: low, NumericSpecial.MAXIMUM: high,
                    NumericSpecial.DEFAULT: default}

        def setter(call: Call) -> None:
            token = call.one()
            value = parse_integer(token) if integer else parse_numeric(token, unit)
            if isinstance(value, NumericSpecial):
                value = specials[value]
            if not low <= value <= high:
                raise ScpiError(-222, f"{call.header} {token}: allowed {format_number(low)} to "
                                      f"{format_number(high)}{' ' + unit if unit else ''}")
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

    def add_choice(self, pattern: str, choices: dict[str, T], *, get: Callable[[], T],
                   put: Callable[[T], None] | None) -> None:
        """Character-data setting; the query answers the short form of the current choice."""
        replies = {value: _short_form(name) for name, value in reversed(choices.items())}

        def setter(call: Call) -> None:
            put(match_choice(call.one(), choices))  # type: ignore[misc]

        def getter(call: Call) -> str:
            call.none()
            return replies[get()]

        self.add(pattern, setter if put else None, getter)

    def add_bool(self, pattern: str, *, get: Callable[[], bool],
                 put: Callable[[bool], None]) -> None:
        def setter(call: Call) -> None:
            put(parse_boolean(call.one()))

        def getter(call: Call) -> str:
            call.none()
            return format_bool(get())

        self.add(pattern, setter, getter)

    def add_query(self, pattern: str, fn: Callable[[], Response], *,
                  locked: bool = True) -> None:
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
        self.add_numeric("*ESE", unit=None, low=0, high=255, default=0, integer=True,
                         get=lambda: status.ese, put=lambda v: setattr(status, "ese", int(v)))
        self.add_numeric("*SRE", unit=None, low=0, high=255, default=0, integer=True,
                         get=lambda: status.sre,
                         put=lambda v: setattr(status, "sre", int(v) & ~STB_MSS))
        self.add_event("*OPC", self._opc)
        self.add_query("*OPC", self._opc_query, locked=False)
        self.add_event("*WAI", self.wait_complete, locked=False)
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


# ----------------------------------------------------------------------------- analyzer


class MarkerFunction(str, Enum):
    OFF = "off"
    BAND_POWER = "band_power"
    NOISE = "noise"


_MARKER_KIND = {MarkerFunction.BAND_POWER: MarkerKind.BAND_POWER,
                MarkerFunction.NOISE: MarkerKind.NOISE_DENSITY}


@dataclass
class MarkerState:
    x_hz: float | None = None  # None: the centre of the applied span
    function: MarkerFunction = MarkerFunction.OFF
    band_hz: float = 1e6


@dataclass
class TraceMemory:
    """The last completed acquisition: trace values as float32 (the instrument's trace memory)."""

    trace: Trace
    values: np.ndarray  # float32, dBm per point
    settings_version: int
    markers: dict[tuple, MarkerReading] = field(default_factory=dict)


class DataFormat(str, Enum):
    ASCII = "ASC"
    REAL32 = "REAL,32"
    REAL64 = "REAL,64"


N_MARKERS = 4
MAX_FREQ_HZ = 50e9

# *RST state of the analyzer's requested settings (deliberately not noise-friendly: a driver
# must set what it needs and read back what was applied).
RESET_REQUEST = AcquisitionRequest(
    center_hz=1e9, span_hz=10e6, rbw_hz=1e6, vbw_hz=None, detector=Detector.PEAK,
    averaging_scale=AveragingScale.LOG_POWER, averages=1, points=1001, ref_level_dbm=0.0,
    attenuation_db=10.0, preamp=False, mode=SweepMode.SWEPT, sweep_time_s=None)


class AnalyzerScpi(ScpiInstrument):
    """The simulated spectrum analyzer. INITiate runs an overlapped acquisition in a thread.

    ``time_scale`` real seconds are slept per simulated second of acquisition (default 0:
    acquisitions complete as fast as the simulation computes them).
    """

    kind = "analyzer"

    def __init__(self, bench: Any, lock: threading.RLock, faults: Any,
                 stop_event: threading.Event, idn: str, *, time_scale: float = 0.0) -> None:
        self.time_scale = float(time_scale)
        self._done = threading.Event()
        self._done.set()
        self._abort = threading.Event()
        self._generation = 0
        self._workers: list[threading.Thread] = []
        self.request = RESET_REQUEST
        self.applied: AcquisitionSettings | None = None
        self.settings_version = 0
        self.continuous = False
        self.data_format = DataFormat.ASCII
        self.swapped = False
        self.markers = {n: MarkerState() for n in range(1, N_MARKERS + 1)}
        self.noise_drive = False
        self._drive_forwarded = False
        self.memory: TraceMemory | None = None
        super().__init__(bench, lock, faults, stop_event, idn)
        with self.lock:
            self.reset()

    @property
    def analyzer(self) -> Any:
        return self.bench.analyzer

    # --- state
    def reset(self) -> None:
        self._abort_running()
        self.request = RESET_REQUEST
        self.applied = self.analyzer.configure(self.request)
        self.settings_version += 1
        self.continuous = False
        self.data_format = DataFormat.ASCII
        self.swapped = False
        self.markers = {n: MarkerState() for n in range(1, N_MARKERS + 1)}
        self.memory = None
        self._set_noise_drive(False)

    def _configure(self, **changes: Any) -> None:
        """Change requested fields, configure the bench, keep what it applied."""
        if self.operation_pending():
            raise ScpiError(-221, "acquisition in progress; ABORt or wait for *OPC? first")
        try:
            request = AcquisitionRequest.model_validate({**self.request.model_dump(), **changes})
        except ValidationError as exc:
            first = exc.errors()[0]
            name = ".".join(str(p) for p in first.get("loc", ()))
            raise ScpiError(-222, f"{name}: {first.get('msg')}") from exc
        try:
            applied = self.analyzer.configure(request)
        except NoisebenchError:
            self.analyzer.configure(self.request)  # leave the bench as it was
            raise
        self.request, self.applied = request, applied
        self.settings_version += 1

    def _settings(self) -> AcquisitionSettings:
        assert self.applied is not None
        return self.applied

    def _set_start(self, start_hz: float) -> None:
        stop = self._settings().stop_hz
        if start_hz > stop:
            raise ScpiError(-221, f"start {format_number(start_hz)} Hz above stop "
                                  f"{format_number(stop)} Hz")
        self._configure(center_hz=(start_hz + stop) / 2, span_hz=stop - start_hz)

    def _set_stop(self, stop_hz: float) -> None:
        start = self._settings().start_hz
        if stop_hz < start:
            raise ScpiError(-221, f"stop {format_number(stop_hz)} Hz below start "
                                  f"{format_number(start)} Hz")
        self._configure(center_hz=(start + stop_hz) / 2, span_hz=stop_hz - start)

    # --- commands
    def _add_commands(self) -> None:
        s = self._settings
        f = MAX_FREQ_HZ
        self.add_numeric("[SENSe:]FREQuency:CENTer", unit="HZ", low=1.0, high=f,
                         default=RESET_REQUEST.center_hz, get=lambda: s().center_hz,
                         put=lambda v: self._configure(center_hz=v))
        self.add_numeric("[SENSe:]FREQuency:SPAN", unit="HZ", low=0.0, high=f,
                         default=RESET_REQUEST.span_hz, get=lambda: s().span_hz,
                         put=lambda v: self._configure(span_hz=v))
        self.add_numeric("[SENSe:]FREQuency:STARt", unit="HZ", low=0.0, high=f,
                         default=RESET_REQUEST.start_hz, get=lambda: s().start_hz,
                         put=self._set_start)
        self.add_numeric("[SENSe:]FREQuency:STOP", unit="HZ", low=1.0, high=f,
                         default=RESET_REQUEST.stop_hz, get=lambda: s().stop_hz,
                         put=self._set_stop)
        self.add_numeric("[SENSe:]BANDwidth[:RESolution]", unit="HZ", low=1.0, high=50e6,
                         default=RESET_REQUEST.rbw_hz, get=lambda: s().rbw_hz,
                         put=lambda v: self._configure(rbw_hz=v))
        self.add_numeric("[SENSe:]BANDwidth:VIDeo", unit="HZ", low=1.0, high=100e6,
                         default=RESET_REQUEST.rbw_hz, get=self._vbw,
                         put=lambda v: self._configure(vbw_hz=v))
        self.add_bool("[SENSe:]BANDwidth:VIDeo:AUTO", get=lambda: self.request.vbw_hz is None,
                      put=lambda on: self._configure(vbw_hz=None) if on
                      else self._configure(vbw_hz=self._vbw()))
        self.add("[SENSe:]BANDwidth:SHAPe", self._set_shape, self._get_shape)
        self.add_query("[SENSe:]BANDwidth:POLes",
                       lambda: str(s().rbw_filter.poles or 0))
        self.add_choice("[SENSe:]SWEep:MODE", {"SWEPt": SweepMode.SWEPT, "FFT": SweepMode.FFT},
                        get=lambda: s().mode, put=lambda v: self._configure(mode=v))
        self.add_query("[SENSe:]SWEep:WINDow", lambda: f'"{s().rbw_filter.window or ""}"')
        self.add_numeric("[SENSe:]SWEep:POINts", unit=None, low=1, high=1_000_001,
                         default=RESET_REQUEST.points, integer=True, get=lambda: s().points,
                         put=lambda v: self._configure(points=int(v)))
        self.add_numeric("[SENSe:]SWEep:TIME", unit="S", low=1e-6, high=10_000.0, default=1e-3,
                         get=self._sweep_time, put=lambda v: self._configure(sweep_time_s=v))
        self.add_bool("[SENSe:]SWEep:TIME:AUTO", get=lambda: self.request.sweep_time_s is None,
                      put=lambda on: self._configure(sweep_time_s=None) if on
                      else self._configure(sweep_time_s=self._sweep_time()))
        self.add_choice("[SENSe:]DETector[:FUNCtion]",
                        {"SAMPle": Detector.SAMPLE, "RMS": Detector.RMS,
                         "AVERage": Detector.AVERAGE, "POSitive": Detector.PEAK,
                         "NEGative": Detector.NEGATIVE_PEAK},
                        get=lambda: s().detector, put=lambda v: self._configure(detector=v))
        self.add_query("[SENSe:]DETector:SAMPles",
                       lambda: format_number(s().detector_samples or 1.0))
        self.add_numeric("[SENSe:]AVERage:COUNt", unit=None, low=1, high=100_000, default=1,
                         integer=True, get=lambda: s().averages,
                         put=lambda v: self._configure(averages=int(v)))
        self.add_choice("[SENSe:]AVERage:TYPE",
                        {"POWer": AveragingScale.POWER, "LOG": AveragingScale.LOG_POWER,
                         "VOLTage": AveragingScale.VOLTAGE},
                        get=lambda: s().averaging_scale,
                        put=lambda v: self._configure(averaging_scale=v))
        self.add_numeric("DISPlay[:WINDow]:TRACe:Y[:SCALe]:RLEVel", unit="DBM", low=-170.0,
                         high=30.0, default=0.0, get=self._ref_level,
                         put=lambda v: self._configure(ref_level_dbm=v))
        self.add_numeric("INPut:ATTenuation", unit="DB", low=0.0, high=70.0, default=10.0,
                         get=lambda: s().attenuation_db or 0.0,
                         put=lambda v: self._configure(attenuation_db=v))
        self.add_bool("INPut:GAIN:STATe", get=lambda: bool(s().preamp),
                      put=lambda on: self._configure(preamp=on))
        self.add_bool("INITiate:CONTinuous", get=lambda: self.continuous,
                      put=self._set_continuous)
        self.add_event("INITiate[:IMMediate]", self._initiate)
        self.add_event("ABORt", self._abort_running)
        self.add_query("STATus:OPERation:CONDition",
                       lambda: str(OPER_MEASURING if self.operation_pending() else 0))
        self.add("FORMat[:DATA]", self._set_format, self._get_format)
        self.add_choice("FORMat:BORDer", {"NORMal": False, "SWAPped": True},
                        get=lambda: self.swapped, put=lambda v: setattr(self, "swapped", v))
        self.add("TRACe[:DATA]", None, self._trace_data)
        self._add_marker_commands()
        self.add_bool("OUTPut:NOISe[:STATe]", get=lambda: self.noise_drive,
                      put=self._set_noise_drive)
        self.add("SIMulate:PATH", self._set_path, self._get_path)

    def _vbw(self) -> float:
        settings = self._settings()
        return settings.vbw_hz if settings.vbw_hz is not None else settings.rbw_hz

    def _sweep_time(self) -> float:
        value = self._settings().sweep_time_s
        if value is None:
            value = float(self.analyzer.expected_acquisition_time_s()) / self._settings().averages
        return value

    def _ref_level(self) -> float:
        value = self._settings().ref_level_dbm
        return 0.0 if value is None else value

    _SHAPES = {"GAUSsian": FilterKind.GAUSSIAN, "SYNChronous": FilterKind.SYNCHRONOUS,
               "FFT": FilterKind.FFT}

    def _get_shape(self, call: Call) -> str:
        call.none()
        return _short_form(next(k for k, v in self._SHAPES.items()
                                if v is self._settings().rbw_filter.kind))

    def _set_shape(self, call: Call) -> None:
        wanted = match_choice(call.one(), self._SHAPES)
        if wanted is not self._settings().rbw_filter.kind:
            raise ScpiError(-221, f"this analyzer's RBW filter is "
                                  f"{self._settings().rbw_filter.kind.value} in the present "
                                  f"sweep mode; use SWEep:MODE to change it")

    def _set_format(self, call: Call) -> None:
        if not call.params:
            raise ScpiError(-109, "FORMat needs ASCii or REAL[,32|64]")
        if len(call.params) > 2:
            raise ScpiError(-108, "FORMat takes a type and a length")
        kind = match_choice(call.params[0], {"ASCii": "ASC", "REAL": "REAL"})
        if kind == "ASC":
            self.data_format = DataFormat.ASCII
            return
        length = parse_integer(call.params[1]) if len(call.params) == 2 else 32
        if length not in (32, 64):
            raise ScpiError(-224, "REAL length must be 32 or 64")
        self.data_format = DataFormat.REAL32 if length == 32 else DataFormat.REAL64

    def _get_format(self, call: Call) -> str:
        call.none()
        return self.data_format.value

    # --- acquisition
    def operation_pending(self) -> bool:
        return not self._done.is_set()

    def wait_complete(self) -> None:
        while not self._done.wait(0.05):
            if self.stop_event.is_set():
                raise InstrumentGone("server stopping")

    def _set_continuous(self, on: bool) -> None:
        if on:
            self._abort_running()
        self.continuous = on

    def _initiate(self) -> None:
        if self.continuous:
            raise ScpiError(-213, "continuous acquisition is on")
        if self.operation_pending():
            raise ScpiError(-213, "an acquisition is already running")
        self._generation += 1
        self._abort = threading.Event()
        self._done.clear()
        self._workers = [t for t in self._workers if t.is_alive()]
        worker = threading.Thread(target=self._acquire_worker,
                                  args=(self._generation, self._abort),
                                  name=f"sim-acquisition-{self._generation}", daemon=True)
        self._workers.append(worker)
        worker.start()

    def _acquire_worker(self, generation: int, abort: threading.Event) -> None:
        try:
            with self.lock:
                if generation != self._generation:
                    return
                memory = self._acquire_now()
            pause = self.time_scale * float(memory.trace.acquisition_time_s or 0.0)
            if pause > 0:
                abort.wait(pause)
            with self.lock:
                if generation == self._generation and not abort.is_set():
                    self.memory = memory
        except ScpiError as exc:
            self.status.push(exc)
        except NoisebenchError as exc:
            self.status.push(ScpiError(-200, f"acquisition failed: {exc.message}"))
        except Exception as exc:  # noqa: BLE001 - report, never kill the server
            logger.exception("acquisition failed")
            self.status.push(ScpiError(-200, f"acquisition failed: {type(exc).__name__}: {exc}"))
        finally:
            with self.lock:
                if generation == self._generation:
                    self._finish()

    def _finish(self) -> None:
        self._done.set()
        if self.status.opc_pending:
            self.status.set_opc()

    def _abort_running(self) -> None:
        if self.operation_pending():
            self._generation += 1
            self._abort.set()
            self._finish()

    def _acquire_now(self) -> TraceMemory:
        """One complete acquisition on the bench, plus the marker functions that are on."""
        trace = self.analyzer.acquire_trace()
        values = np.asarray(trace.values, dtype=np.float32)
        memory = TraceMemory(trace, values, self.settings_version)
        for marker in self.markers.values():
            if marker.function is not MarkerFunction.OFF:
                self._marker_reading(memory, marker)
        return memory

    def _current_memory(self) -> TraceMemory:
        """The trace to report: a fresh one in continuous mode, else the last acquisition."""
        if self.operation_pending():
            raise ScpiError(-230, "acquisition in progress; wait for *OPC? first")
        if self.continuous:
            self.memory = self._acquire_now()
        if self.memory is None:
            raise ScpiError(-230, "no acquisition since *RST; send INITiate first")
        return self.memory

    def shutdown(self) -> None:
        with self.lock:
            self._abort_running()
        for worker in self._workers:
            worker.join(timeout=10.0)

    def join_workers(self, timeout_s: float) -> None:
        for worker in list(self._workers):
            worker.join(timeout=timeout_s)

    # --- trace transfer
    def _trace_data(self, call: Call) -> Response:
        token = call.optional()
        if token is not None and token.strip().upper() not in ("TRACE1", "TRAC1"):
            raise ScpiError(-224, f"{token}; this analyzer has one trace, TRACE1")
        values = self._current_memory().values
        if self.data_format is DataFormat.ASCII:
            return ",".join(map(repr, values.astype(np.float64).tolist()))
        order = "<" if self.swapped else ">"
        size = 4 if self.data_format is DataFormat.REAL32 else 8
        return Block(values.astype(f"{order}f{size}").tobytes())

    # --- markers
    def _add_marker_commands(self) -> None:
        def marker(call: Call) -> MarkerState:
            return self.markers[call.suffixes[0]]

        def set_x(call: Call) -> None:
            value = parse_numeric(call.one(), "HZ")
            if isinstance(value, NumericSpecial):
                settings = self._settings()
                value = {NumericSpecial.MINIMUM: settings.start_hz,
                         NumericSpecial.MAXIMUM: settings.stop_hz,
                         NumericSpecial.DEFAULT: settings.center_hz}[value]
            if not 0.0 < value <= MAX_FREQ_HZ:
                raise ScpiError(-222, f"marker frequency must be in 0..{MAX_FREQ_HZ:g} Hz")
            marker(call).x_hz = float(value)

        def get_x(call: Call) -> str:
            call.none()
            x = marker(call).x_hz
            return format_number(self._settings().center_hz if x is None else x)

        functions = {"OFF": MarkerFunction.OFF, "BPOWer": MarkerFunction.BAND_POWER,
                     "NOISe": MarkerFunction.NOISE}
        replies = {v: _short_form(k) for k, v in functions.items()}

        def set_function(call: Call) -> None:
            marker(call).function = match_choice(call.one(), functions)

        def get_function(call: Call) -> str:
            call.none()
            return replies[marker(call).function]

        def set_band(call: Call) -> None:
            value = parse_numeric(call.one(), "HZ", allow_special=False)
            if not 1.0 <= value <= MAX_FREQ_HZ:  # type: ignore[operator]
                raise ScpiError(-222, "band must be 1 Hz or more")
            marker(call).band_hz = float(value)  # type: ignore[arg-type]

        def get_band(call: Call) -> str:
            call.none()
            return format_number(marker(call).band_hz)

        def get_y(call: Call) -> str:
            call.none()
            return format_number(self._marker_value(marker(call)))

        def get_corrected(call: Call) -> str:
            call.none()
            m = marker(call)
            if m.function is MarkerFunction.OFF:
                return "0"
            reading = self._marker_reading(self._current_memory(), m)
            return format_bool(reading.instrument_corrected)

        base = "CALCulate:MARKer<n>"
        self.add(f"{base}:X", set_x, get_x, suffix_max=N_MARKERS)
        self.add(f"{base}:FUNCtion", set_function, get_function, suffix_max=N_MARKERS)
        self.add(f"{base}:FUNCtion:BAND", set_band, get_band, suffix_max=N_MARKERS)
        self.add(f"{base}:FUNCtion:CORRected", None, get_corrected, suffix_max=N_MARKERS)
        self.add(f"{base}:Y", None, get_y, suffix_max=N_MARKERS)

    def _marker_x(self, marker: MarkerState) -> float:
        return self._settings().center_hz if marker.x_hz is None else marker.x_hz

    def _marker_reading(self, memory: TraceMemory, marker: MarkerState) -> MarkerReading:
        """The reading of a marker function for ``memory`` (computed once, then kept)."""
        kind = _MARKER_KIND[marker.function]
        band = marker.band_hz if kind is MarkerKind.BAND_POWER else None
        key = (self._marker_x(marker), kind, band)
        reading = memory.markers.get(key)
        if reading is None:
            reading = self.analyzer.read_marker(key[0], kind, band)
            memory.markers[key] = reading
        return reading

    def _marker_value(self, marker: MarkerState) -> float:
        memory = self._current_memory()
        if marker.function is MarkerFunction.OFF:
            freq = np.asarray(memory.trace.freq_hz)
            index = int(np.argmin(np.abs(freq - self._marker_x(marker))))
            return float(memory.values[index])
        return float(self._marker_reading(memory, marker).value_db)

    # --- noise-source drive and simulated path
    def _set_noise_drive(self, on: bool) -> None:
        self.noise_drive = bool(on)
        self._forward_noise_drive()

    def _forward_noise_drive(self) -> None:
        if self.faults.stuck_noise_source or self.noise_drive == self._drive_forwarded:
            return
        self.bench.noise_source.set_hot(self.noise_drive)
        self._drive_forwarded = self.noise_drive

    def fault_changed(self, name: str) -> None:
        if name == "stuck_noise_source":
            with self.lock:
                self._forward_noise_drive()

    _PATHS = {"DUT": "dut", "THRough": "through", "TERMination": "termination"}

    def _set_path(self, call: Call) -> None:
        value = match_choice(call.one(), self._PATHS)
        path_type = type(self.bench.path)
        self.bench.set_path(path_type(value))

    def _get_path(self, call: Call) -> str:
        call.none()
        current = getattr(self.bench.path, "value", self.bench.path)
        return next(_short_form(k) for k, v in self._PATHS.items() if v == current)


# ----------------------------------------------------------------------------- generator


class GeneratorScpi(ScpiInstrument):
    """The simulated CW signal generator."""

    kind = "generator"
    FREQ_RANGE_HZ = (9e3, 40e9)
    LEVEL_RANGE_DBM = (-140.0, 20.0)
    RESET_FREQ_HZ = 1e9
    RESET_LEVEL_DBM = -110.0

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.freq_hz = self.RESET_FREQ_HZ
        self.level_dbm = self.RESET_LEVEL_DBM
        self.output = False
        super().__init__(*args, **kwargs)
        with self.lock:
            self.reset()

    @property
    def generator(self) -> Any:
        return self.bench.generator

    def reset(self) -> None:
        self.freq_hz, self.level_dbm = self.RESET_FREQ_HZ, self.RESET_LEVEL_DBM
        self.generator.set_output(False)
        self.output = False
        self.generator.set_cw(self.freq_hz, self.level_dbm)

    def _set_freq(self, value: float) -> None:
        self.generator.set_cw(value, self.level_dbm)
        self.freq_hz = value

    def _set_level(self, value: float) -> None:
        self.generator.set_cw(self.freq_hz, value)
        self.level_dbm = value

    def _set_output(self, on: bool) -> None:
        self.generator.set_output(on)
        self.output = on

    def _add_commands(self) -> None:
        self.add_numeric("[SOURce:]FREQuency[:CW]", unit="HZ", low=self.FREQ_RANGE_HZ[0],
                         high=self.FREQ_RANGE_HZ[1], default=self.RESET_FREQ_HZ,
                         get=lambda: self.freq_hz, put=self._set_freq)
        self.add_numeric("[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]", unit="DBM",
                         low=self.LEVEL_RANGE_DBM[0], high=self.LEVEL_RANGE_DBM[1],
                         default=self.RESET_LEVEL_DBM, get=lambda: self.level_dbm,
                         put=self._set_level)
        self.add_bool("OUTPut[:STATe]", get=lambda: self.output, put=self._set_output)


# ----------------------------------------------------------------------------- DC supply


class SupplyScpi(ScpiInstrument):
    """The simulated DC supply that drives the noise source.

    With the ``stuck_noise_source`` fault on, the supply behaves as if its output lead to the
    noise source were open: settings are accepted and reported, ``MEASure:VOLTage?`` reads the
    programmed voltage, ``MEASure:CURRent?`` reads 0 A, and the source does not switch.
    """

    kind = "supply"
    VOLTAGE_RANGE_V = (0.0, 60.0)
    CURRENT_RANGE_A = (0.0, 5.0)
    RESET_CURRENT_A = 0.1

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.voltage_v = 0.0
        self.current_limit_a = self.RESET_CURRENT_A
        self.output = False
        self._forwarded: tuple[float, float, bool] | None = None
        super().__init__(*args, **kwargs)
        with self.lock:
            self.reset()

    @property
    def supply(self) -> Any:
        return self.bench.supply

    def reset(self) -> None:
        self.voltage_v, self.current_limit_a, self.output = 0.0, self.RESET_CURRENT_A, False
        self._forwarded = None
        self._forward()

    def _forward(self) -> None:
        """Apply the programmed state to the bench (unless the drive lead is 'open')."""
        if self.faults.stuck_noise_source:
            return
        state = (self.voltage_v, self.current_limit_a, self.output)
        if state == self._forwarded:
            return
        if not self.output:
            self.supply.set_output(False)
        self.supply.set_current_limit(self.current_limit_a)
        self.supply.set_voltage(self.voltage_v)
        if self.output:
            self.supply.set_output(True)
        self._forwarded = state

    def _put(self, name: str, value: Any) -> None:
        old = getattr(self, name)
        setattr(self, name, value)
        try:
            self._forward()
        except Exception:
            setattr(self, name, old)
            raise

    def fault_changed(self, name: str) -> None:
        if name == "stuck_noise_source":
            with self.lock:
                self._forward()

    def _measure_voltage(self) -> str:
        if self.faults.stuck_noise_source:
            return format_number(self.voltage_v if self.output else 0.0)
        return format_number(float(self.supply.measure_voltage()))

    def _measure_current(self) -> str:
        if self.faults.stuck_noise_source:
            return format_number(0.0)
        return format_number(float(self.supply.measure_current()))

    def _add_commands(self) -> None:
        self.add_numeric("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", unit="V",
                         low=self.VOLTAGE_RANGE_V[0], high=self.VOLTAGE_RANGE_V[1], default=0.0,
                         get=lambda: self.voltage_v, put=lambda v: self._put("voltage_v", v))
        self.add_numeric("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", unit="A",
                         low=self.CURRENT_RANGE_A[0], high=self.CURRENT_RANGE_A[1],
                         default=self.RESET_CURRENT_A, get=lambda: self.current_limit_a,
                         put=lambda v: self._put("current_limit_a", v))
        self.add_bool("OUTPut[:STATe]", get=lambda: self.output,
                      put=lambda on: self._put("output", on))
        self.add_query("MEASure[:SCALar]:VOLTage[:DC]", self._measure_voltage)
        self.add_query("MEASure[:SCALar]:CURRent[:DC]", self._measure_current)
