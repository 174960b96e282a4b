"""SCPI command set of the simulated spectrum analyzer (see ``noisebench/sims/SCPI.md``).

The SCPI layer keeps the analyzer's *requested* settings: each setter changes one field of an
:class:`~noisebench.bench.acquisition.AcquisitionRequest`, configures the bench analyzer and keeps
the
:class:`~noisebench.bench.acquisition.AcquisitionSettings` it applied; every query answers the
APPLIED value (RBW rounded to 1-2-3-5, attenuation to its steps, ...).

``INITiate`` starts one complete averaged acquisition in a worker thread (an overlapped
command in IEEE 488.2 terms): ``*OPC?``/``*WAI`` wait for it, ``*OPC`` sets the OPC bit of
``*ESR`` when it ends, ``ABORt`` cancels it, and ``STATus:OPERation:CONDition?`` shows bit 4
(measuring) while it runs. ``READ?`` (SCPI-1999: ABORt; INITiate; FETCh?) starts one, waits
for it and answers its trace in one query; ``FETCh?`` answers the last trace. The acquisition
runs on the simulated clock; ``time_scale`` real
seconds are also slept per simulated second (default 0). The completed trace is kept as
float32 (the trace memory): ASCII, ``REAL,32`` and ``REAL,64`` transfers all carry exactly
these values.

Size: the simulated analyzer's whole SCPI command set; the commands share the request-editing
helpers, and SCPI.md lists them in the same order.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from enum import Enum
from typing import Any

import numpy as np
from pydantic import ValidationError

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    FilterKind,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
)
from noisebench.errors import NoisebenchError
from noisebench.units import format_frequency

from .analyzer import REF_LEVEL_RANGE_DBM, marker_from_trace
from .scpi_instruments import (
    Block,
    Call,
    InstrumentGone,
    Response,
    ScpiInstrument,
    short_form,
)
from .scpi_parser import (
    NumericSpecial,
    ScpiError,
    format_bool,
    format_number,
    match_choice,
    parse_boolean,
    parse_integer,
    parse_numeric,
    parse_string,
)

logger = logging.getLogger(__name__)

N_MARKERS = 4
MAX_FREQ_HZ = 50e9
MAX_POLES = 10
OPER_MEASURING = 16  # STATus:OPERation bit 4, MEASuring (SCPI-1999, from memory)

#: Power-on request when the bench analyzer has no ``default_request()`` of its own.
FALLBACK_RESET_REQUEST = AcquisitionRequest(
    center_hz=1e9,
    span_hz=10e6,
    rbw_hz=1e6,
    detector=Detector.RMS,
    averaging_scale=AveragingScale.POWER,
    averages=1,
    points=1001,
    ref_level_dbm=0.0,
    attenuation_db=10.0,
    preamp=False,
)


class MarkerFunction(str, Enum):
    OFF = "off"
    BAND_POWER = "band_power"
    NOISE = "noise"


_MARKER_KIND = {
    MarkerFunction.BAND_POWER: MarkerKind.BAND_POWER,
    MarkerFunction.NOISE: MarkerKind.NOISE_DENSITY,
}
_MARKER_FUNCTIONS = {
    "OFF": MarkerFunction.OFF,
    "INTegral": MarkerFunction.BAND_POWER,
    "DENSity": MarkerFunction.NOISE,
}


@dataclass
class MarkerState:
    """One marker: frequency (None: the span centre), function, band (None: automatic)."""

    x_hz: float | None = None
    function: MarkerFunction = MarkerFunction.OFF
    band_hz: float | None = None


@dataclass
class TraceMemory:
    """The last completed acquisition; ``values`` are float32 dBm (the instrument's memory)."""

    trace: Trace
    values: np.ndarray


class DataFormat(str, Enum):
    ASCII = "ASC"
    REAL32 = "REAL,32"
    REAL64 = "REAL,64"


_SHAPES = {
    "GAUSsian": FilterKind.GAUSSIAN,
    "SYNChronous": FilterKind.SYNCHRONOUS,
    "FFT": FilterKind.FFT,
}
_PATHS = {"DUT": "dut", "THRough": "through", "TERMination": "termination"}


class AnalyzerScpi(ScpiInstrument):
    """The simulated spectrum analyzer behind SCPI."""

    kind = "analyzer"

    def __init__(
        self,
        bench: Any,
        lock: threading.RLock,
        faults: Any,
        stop_event: threading.Event,
        idn: str,
        *,
        time_scale: float = 0.0,
    ) -> None:
        self.time_scale = float(time_scale)
        self._done = threading.Event()
        self._done.set()
        self._abort = threading.Event()
        self._generation = 0
        self._workers: list[threading.Thread] = []
        self.request = FALLBACK_RESET_REQUEST
        self.applied: AcquisitionSettings | None = None
        self.continuous = False
        self.data_format = DataFormat.ASCII
        self.swapped = False
        self.markers = {n: MarkerState() for n in range(1, N_MARKERS + 1)}
        self.noise_drive = False
        self.memory: TraceMemory | None = None
        super().__init__(bench, lock, faults, stop_event, idn)
        with self.lock:
            self.reset()

    @property
    def analyzer(self) -> Any:
        return self.bench.analyzer

    # ------------------------------------------------------------------ state
    def reset(self) -> None:
        """*RST: abort, bench analyzer to power-on (filter shape, noise drive), SCPI state."""
        self._abort_running()
        if self.noise_drive:
            self._set_noise_drive(False)
        if hasattr(self.analyzer, "reset"):
            self.analyzer.reset()
        default = getattr(self.analyzer, "default_request", None)
        self.request = default() if callable(default) else FALLBACK_RESET_REQUEST
        self.applied = self.analyzer.configure(self.request)
        self.continuous = False
        self.data_format = DataFormat.ASCII
        self.swapped = False
        self.markers = {n: MarkerState() for n in range(1, N_MARKERS + 1)}
        self.memory = None
        self.noise_drive = False

    def _require_idle(self) -> None:
        if self.operation_pending():
            raise ScpiError(-221, "acquisition in progress; ABORt or wait for *OPC? first")

    def _configure(self, **changes: Any) -> None:
        """Change requested fields, configure the bench, keep what it applied."""
        self._require_idle()
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

    def _reapply(self) -> None:
        """Re-read the applied settings after a bench-side change (filter shape, window)."""
        self.applied = self.analyzer.configure(self.request)

    def _settings(self) -> AcquisitionSettings:
        assert self.applied is not None
        return self.applied

    def _set_start(self, start_hz: float) -> None:
        stop = self._settings().stop_hz
        if start_hz >= stop:
            raise ScpiError(
                -221, f"start {format_number(start_hz)} Hz not below stop {format_number(stop)} Hz"
            )
        self._configure(center_hz=(start_hz + stop) / 2, span_hz=stop - start_hz)

    def _set_stop(self, stop_hz: float) -> None:
        start = self._settings().start_hz
        if stop_hz <= start:
            raise ScpiError(
                -221, f"stop {format_number(stop_hz)} Hz not above start {format_number(start)} Hz"
            )
        self._configure(center_hz=(start + stop_hz) / 2, span_hz=stop_hz - start)

    # ------------------------------------------------------------------ command table
    def _add_commands(self) -> None:
        self._add_frequency_commands()
        self._add_bandwidth_commands()
        self._add_sweep_commands()
        self._add_level_commands()
        self._add_acquisition_commands()
        self._add_marker_commands()
        self.add_bool(
            "OUTPut:NOISe[:STATe]", get=lambda: self.noise_drive, put=self._set_noise_drive
        )
        self.add("SIMulate:PATH", self._set_path, self._get_path)

    def _default(self, name: str) -> float:
        return float(getattr(FALLBACK_RESET_REQUEST, name))

    def _spec(self, name: str, fallback: float) -> float:
        """A limit from the bench analyzer's spec (scenario), else ``fallback``."""
        return float(getattr(getattr(self.analyzer, "spec", None), name, fallback))

    def _add_frequency_commands(self) -> None:
        s = self._settings
        f_lo, f_hi = self._spec("min_freq_hz", 1.0), self._spec("max_freq_hz", MAX_FREQ_HZ)
        self.add_numeric(
            "[SENSe:]FREQuency:CENTer",
            unit="HZ",
            low=f_lo,
            high=f_hi,
            default=self._default("center_hz"),
            get=lambda: s().center_hz,
            put=lambda v: self._configure(center_hz=v),
        )
        self.add_numeric(
            "[SENSe:]FREQuency:SPAN",
            unit="HZ",
            low=0.0,
            high=f_hi - f_lo,
            default=self._default("span_hz"),
            get=lambda: s().span_hz,
            put=lambda v: self._configure(span_hz=v),
        )
        self.add_numeric(
            "[SENSe:]FREQuency:STARt",
            unit="HZ",
            low=f_lo,
            high=f_hi,
            default=FALLBACK_RESET_REQUEST.start_hz,
            get=lambda: s().start_hz,
            put=self._set_start,
        )
        self.add_numeric(
            "[SENSe:]FREQuency:STOP",
            unit="HZ",
            low=f_lo,
            high=f_hi,
            default=FALLBACK_RESET_REQUEST.stop_hz,
            get=lambda: s().stop_hz,
            put=self._set_stop,
        )

    def _add_bandwidth_commands(self) -> None:
        s = self._settings
        rbw_lo, rbw_hi = self._spec("min_rbw_hz", 1.0), self._spec("max_rbw_hz", 10e6)
        self.add_numeric(
            "[SENSe:]BANDwidth[:RESolution]",
            unit="HZ",
            low=rbw_lo,
            high=rbw_hi,
            default=self._default("rbw_hz"),
            get=lambda: s().rbw_hz,
            put=lambda v: self._configure(rbw_hz=v),
        )
        self.add_numeric(
            "[SENSe:]BANDwidth:VIDeo",
            unit="HZ",
            low=1.0,
            high=10.0 * rbw_hi,
            default=self._default("rbw_hz"),
            get=self._vbw,
            put=lambda v: self._configure(vbw_hz=v),
        )
        self.add_bool(
            "[SENSe:]BANDwidth:VIDeo:AUTO",
            get=lambda: self.request.vbw_hz is None,
            put=lambda on: self._configure(vbw_hz=None if on else self._vbw()),
        )
        self.add("[SENSe:]BANDwidth:SHAPe", self._set_shape, self._get_shape)
        self.add_numeric(
            "[SENSe:]BANDwidth:POLes",
            unit=None,
            low=1,
            high=MAX_POLES,
            default=4,
            integer=True,
            get=lambda: s().rbw_filter.poles or 0,
            put=self._set_poles,
        )

    def _add_sweep_commands(self) -> None:
        s = self._settings
        self.add_choice(
            "[SENSe:]SWEep:MODE",
            {"SWEPt": SweepMode.SWEPT, "FFT": SweepMode.FFT},
            get=lambda: s().mode,
            put=lambda v: self._configure(mode=v),
        )
        self.add("[SENSe:]SWEep:WINDow", self._set_window, self._get_window)
        self.add_numeric(
            "[SENSe:]SWEep:POINts",
            unit=None,
            low=1,
            high=self._spec("max_points", 1_000_001),
            default=self._default("points"),
            integer=True,
            get=lambda: s().points,
            put=lambda v: self._configure(points=int(v)),
        )
        self.add_numeric(
            "[SENSe:]SWEep:TIME",
            unit="S",
            low=1e-6,
            high=10_000.0,
            default=1e-3,
            get=lambda: s().sweep_time_s or 0.0,
            put=lambda v: self._configure(sweep_time_s=v),
        )
        self.add_bool(
            "[SENSe:]SWEep:TIME:AUTO",
            get=lambda: self.request.sweep_time_s is None,
            put=lambda on: self._configure(sweep_time_s=None if on else s().sweep_time_s),
        )
        self.add_query(
            "[SENSe:]SWEep:ACQuisition:TIME",
            lambda: format_number(float(self.analyzer.expected_acquisition_time_s())),
        )
        self.add_choice(
            "[SENSe:]DETector[:FUNCtion]",
            {
                "SAMPle": Detector.SAMPLE,
                "RMS": Detector.RMS,
                "AVERage": Detector.AVERAGE,
                "POSitive": Detector.PEAK,
                "NEGative": Detector.NEGATIVE_PEAK,
            },
            get=lambda: s().detector,
            put=lambda v: self._configure(detector=v),
        )
        self.add_query(
            "[SENSe:]DETector:SAMPles", lambda: format_number(s().detector_samples or 1.0)
        )
        self.add_numeric(
            "[SENSe:]AVERage:COUNt",
            unit=None,
            low=1,
            high=self._spec("max_averages", 100_000),
            default=1,
            integer=True,
            get=lambda: s().averages,
            put=lambda v: self._configure(averages=int(v)),
        )
        self.add_choice(
            "[SENSe:]AVERage:TYPE",
            {
                "POWer": AveragingScale.POWER,
                "LOG": AveragingScale.LOG_POWER,
                "VOLTage": AveragingScale.VOLTAGE,
            },
            get=lambda: s().averaging_scale,
            put=lambda v: self._configure(averaging_scale=v),
        )

    def _add_level_commands(self) -> None:
        s = self._settings
        self.add_numeric(
            "DISPlay[:WINDow]:TRACe:Y[:SCALe]:RLEVel",
            unit="DBM",
            low=REF_LEVEL_RANGE_DBM[0],
            high=REF_LEVEL_RANGE_DBM[1],
            default=0.0,
            get=lambda: s().ref_level_dbm or 0.0,
            put=lambda v: self._configure(ref_level_dbm=v),
        )
        self.add_numeric(
            "INPut:ATTenuation",
            unit="DB",
            low=0.0,
            high=self._spec("max_attenuation_db", 70.0),
            default=self._spec("default_attenuation_db", 10.0),
            get=lambda: s().attenuation_db or 0.0,
            put=lambda v: self._configure(attenuation_db=v),
        )
        self.add_bool(
            "INPut:GAIN:STATe",
            get=lambda: bool(s().preamp),
            put=lambda on: self._configure(preamp=on),
        )

    def _add_acquisition_commands(self) -> None:
        self.add_bool("INITiate:CONTinuous", get=lambda: self.continuous, put=self._set_continuous)
        self.add_event("INITiate[:IMMediate]", self._initiate)
        self.add_event("ABORt", self._abort_running)
        self.add_query(
            "STATus:OPERation:CONDition",
            lambda: str(OPER_MEASURING if self.operation_pending() else 0),
        )
        self.add("FORMat[:DATA]", self._set_format, self._get_format)
        self.add_choice(
            "FORMat:BORDer",
            {"NORMal": False, "SWAPped": True},
            get=lambda: self.swapped,
            put=lambda v: setattr(self, "swapped", v),
        )
        self.add("TRACe[:DATA]", None, self._trace_data)
        # SCPI-1999 measurement instructions (Vol. 1 ch. 3): FETCh? = the last measurement,
        # READ? = ABORt; INITiate; FETCh? in one query (it waits, so it runs unlocked)
        self.add("FETCh", None, self._fetch)
        self.add("READ", None, self._read, locked=False)

    # ------------------------------------------------------------------ bandwidth details
    def _vbw(self) -> float:
        settings = self._settings()
        return settings.vbw_hz if settings.vbw_hz is not None else settings.rbw_hz

    def _get_shape(self, call: Call) -> str:
        call.none()
        kind = self._settings().rbw_filter.kind
        return next(short_form(k) for k, v in _SHAPES.items() if v is kind)

    def _set_shape(self, call: Call) -> None:
        wanted = match_choice(call.one(), _SHAPES)
        if wanted is FilterKind.FFT:
            raise ScpiError(-221, "FFT filtering comes with SWEep:MODE FFT")
        self._require_idle()
        self._bench_filter_shape(wanted, None)

    def _set_poles(self, poles: float) -> None:
        if self._settings().rbw_filter.kind is not FilterKind.SYNCHRONOUS:
            raise ScpiError(
                -221, "poles apply to the SYNChronous shape; set BANDwidth:SHAPe SYNChronous first"
            )
        self._require_idle()
        self._bench_filter_shape(FilterKind.SYNCHRONOUS, int(poles))

    def _bench_filter_shape(self, kind: FilterKind, poles: int | None) -> None:
        setter = getattr(self.analyzer, "set_filter_shape", None)
        if setter is None:
            if kind is not self._settings().rbw_filter.kind:
                raise ScpiError(
                    -221,
                    f"this analyzer's RBW filter is fixed "
                    f"({self._settings().rbw_filter.kind.value})",
                )
            return
        setter(kind, poles)
        self._reapply()

    def _get_window(self, call: Call) -> str:
        call.none()
        window = self._settings().rbw_filter.window or getattr(self.analyzer, "fft_window", "")
        return f'"{window}"'

    def _set_window(self, call: Call) -> None:
        token = call.one()
        name = parse_string(token) if token[:1] in "'\"" else token.strip().lower()
        setter = getattr(self.analyzer, "set_fft_window", None)
        if setter is None:
            raise ScpiError(-221, "this analyzer's FFT window is fixed")
        self._require_idle()
        try:
            setter(name)
        except NoisebenchError as exc:
            raise ScpiError(-224, exc.message) from exc
        self._reapply()

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

    # ------------------------------------------------------------------ acquisition
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
        worker = threading.Thread(
            target=self._acquire_worker,
            args=(self._generation, self._abort),
            name=f"sim-acquisition-{self._generation}",
            daemon=True,
        )
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
        if self.wall is not None:
            self.wall.catch_up()
        trace = self.analyzer.acquire_trace()
        if self.wall is not None:  # the computing time is not instrument time
            self.wall.skip()
        return TraceMemory(trace, np.asarray(trace.values, dtype=np.float32))

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
        for worker in list(self._workers):
            worker.join(timeout=10.0)

    # ------------------------------------------------------------------ trace transfer
    def _trace_data(self, call: Call) -> Response:
        token = call.optional()
        if token is not None and token.strip().upper() not in ("TRACE1", "TRAC1"):
            raise ScpiError(-224, f"{token}; this analyzer has one trace, TRACE1")
        return self._formatted(self._current_memory().values)

    def _fetch(self, call: Call) -> Response:
        """``FETCh?``: the last acquisition's trace, as ``TRACe? TRACE1`` gives it."""
        call.none()
        return self._formatted(self._current_memory().values)

    def _read(self, call: Call) -> Response:
        """``READ?`` (SCPI-1999: ABORt; INITiate; FETCh?): abort a running acquisition,
        start one, wait for it and answer its trace; an acquisition that fails or is
        aborted meanwhile leaves an error in the queue and gives -230 (no reply unit),
        never the previous trace."""
        call.none()
        with self.lock:
            self._abort_running()
            before = self.memory
            self._initiate()
        self.wait_complete()
        with self.lock:
            if self.memory is before or self.memory is None:
                raise ScpiError(-230, "READ? acquisition did not complete; no new data")
            return self._formatted(self.memory.values)

    def _formatted(self, values: np.ndarray) -> Response:
        if self.data_format is DataFormat.ASCII:
            return ",".join(map(repr, values.astype(np.float64).tolist()))
        order = "<" if self.swapped else ">"
        size = 4 if self.data_format is DataFormat.REAL32 else 8
        return Block(values.astype(f"{order}f{size}").tobytes())

    # ------------------------------------------------------------------ markers
    def _add_marker_commands(self) -> None:
        base = "CALCulate:MARKer<n>"
        n = N_MARKERS
        self.add(f"{base}:X", self._set_marker_x, self._get_marker_x, suffix_max=n)
        self.add(
            f"{base}:QUANtity", self._set_marker_function, self._get_marker_function, suffix_max=n
        )
        self.add(
            f"{base}:QUANtity:WIDTh", self._set_marker_band, self._get_marker_band, suffix_max=n
        )
        self.add(
            f"{base}:QUANtity:WIDTh:AUTO",
            self._set_marker_band_auto,
            self._get_marker_band_auto,
            suffix_max=n,
        )
        self.add(f"{base}:QUANtity:CORRected", None, self._get_marker_corrected, suffix_max=n)
        self.add(f"{base}:Y", None, self._get_marker_y, suffix_max=n)

    def _marker(self, call: Call) -> MarkerState:
        return self.markers[call.suffixes[0]]

    def _set_marker_x(self, call: Call) -> None:
        value = parse_numeric(call.one(), "HZ")
        if isinstance(value, NumericSpecial):
            s = self._settings()
            value = {
                NumericSpecial.MINIMUM: s.start_hz,
                NumericSpecial.MAXIMUM: s.stop_hz,
                NumericSpecial.DEFAULT: s.center_hz,
            }[value]
        if not 0.0 < value <= MAX_FREQ_HZ:
            raise ScpiError(-222, f"marker frequency must be in 0..{format_frequency(MAX_FREQ_HZ)}")
        self._marker(call).x_hz = float(value)

    def _marker_x(self, marker: MarkerState) -> float:
        return self._settings().center_hz if marker.x_hz is None else marker.x_hz

    def _get_marker_x(self, call: Call) -> str:
        call.none()
        return format_number(self._marker_x(self._marker(call)))

    def _set_marker_function(self, call: Call) -> None:
        self._marker(call).function = match_choice(call.one(), _MARKER_FUNCTIONS)

    def _get_marker_function(self, call: Call) -> str:
        call.none()
        function = self._marker(call).function
        return next(short_form(k) for k, v in _MARKER_FUNCTIONS.items() if v is function)

    def _set_marker_band(self, call: Call) -> None:
        value = parse_numeric(call.one(), "HZ", allow_special=False)
        assert isinstance(value, float)
        if not 1.0 <= value <= MAX_FREQ_HZ:
            raise ScpiError(-222, "band must be 1 Hz or more")
        self._marker(call).band_hz = value

    def _get_marker_band(self, call: Call) -> str:
        call.none()
        marker = self._marker(call)
        if marker.band_hz is not None:
            return format_number(marker.band_hz)
        if marker.function is MarkerFunction.OFF:
            raise ScpiError(-221, "the automatic width is defined for INTegral and DENSity")
        reading = self._marker_reading(marker)
        return format_number(float(reading.band_hz or 0.0))

    def _set_marker_band_auto(self, call: Call) -> None:
        marker = self._marker(call)
        if parse_boolean(call.one()):
            marker.band_hz = None
        elif marker.band_hz is None:
            marker.band_hz = float(
                self._get_marker_band(Call(call.header, (), call.suffixes, True))
            )

    def _get_marker_band_auto(self, call: Call) -> str:
        call.none()
        return format_bool(self._marker(call).band_hz is None)

    def _marker_reading(self, marker: MarkerState) -> MarkerReading:
        """Marker function evaluated on the last acquisition (no new acquisition)."""
        memory = self._current_memory()
        kind = _MARKER_KIND[marker.function]
        return marker_from_trace(memory.trace, self._marker_x(marker), kind, marker.band_hz)

    def _get_marker_y(self, call: Call) -> str:
        call.none()
        marker = self._marker(call)
        if marker.function is MarkerFunction.OFF:  # normal marker: trace value at X, dBm
            memory = self._current_memory()
            freq = np.asarray(memory.trace.freq_hz)
            index = int(np.argmin(np.abs(freq - self._marker_x(marker))))
            return format_number(float(memory.values[index]))
        return format_number(float(self._marker_reading(marker).value_db))

    def _get_marker_corrected(self, call: Call) -> str:
        call.none()
        marker = self._marker(call)
        if marker.function is MarkerFunction.OFF:
            return "0"
        return format_bool(self._marker_reading(marker).instrument_corrected)

    # ------------------------------------------------------------------ drive and path
    def _set_noise_drive(self, on: bool) -> None:
        setter = getattr(self.analyzer, "set_noise_drive", None)
        if setter is not None:
            setter(bool(on))
        else:
            self.bench.noise_source.set_hot(bool(on))
        self.noise_drive = bool(on)

    def fault_changed(self, name: str) -> None:
        if name != "stuck_noise_source":
            return
        with self.lock:
            source = self.bench.noise_source
            source.stuck = bool(self.faults.stuck_noise_source)
            if not source.stuck:  # fault gone: the source follows its drives again
                self._set_noise_drive(self.noise_drive)

    def _set_path(self, call: Call) -> None:
        value = match_choice(call.one(), _PATHS)
        self._require_idle()
        self.bench.set_path(type(self.bench.path)(value))

    def _get_path(self, call: Call) -> str:
        call.none()
        current = getattr(self.bench.path, "value", self.bench.path)
        return next(short_form(k) for k, v in _PATHS.items() if v == current)
