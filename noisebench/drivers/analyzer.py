"""``ScpiAnalyzer``: a spectrum analyzer driven by the SCPI strings of a profile.

``configure`` sends every requested setting in the profile's ``apply_order``, then READS BACK
every setting (instruments round RBW, points, averages; the physics must use the applied
values) and returns them as :class:`~noisebench.bench.acquisition.AcquisitionSettings`, with the
filter shape (poles / FFT window), sweep time and detector samples the instrument reports.
``acquire_trace`` starts one complete averaged acquisition, waits for it with a timeout sized
from the expected acquisition time (``*OPC?``, ``*WAI`` in one line with the trace query on a
compound profile, or status polling for long acquisitions), transfers the trace (binary
block, or ASCII) and checks the error queue. Every operation runs
under the instrument lock with the retry/recovery policy of
:class:`~noisebench.drivers.scpi_channel.ScpiChannel`; after a reconnect the settings are read
back, compared with the last applied ones (a difference means the instrument lost them, e.g.
after a reboot: recorded in ``settings_changes``) and re-applied.

Size: one driver, the SCPI analyzer: configure with read-back, traces, markers, noise drive and
recovery all go through the same profile look-ups and settings cache, which a split would have
to share.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable
from datetime import datetime, timezone
from enum import Enum
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
from pydantic import ValidationError

from noisebench.bench.acquisition import (
    AcquisitionRequest,
    AcquisitionSettings,
    AveragingScale,
    Detector,
    MarkerKind,
    MarkerReading,
    SweepMode,
    Trace,
    TraceUnit,
)
from noisebench.bench.capabilities import NoiseDriveOutput, PathSwitch
from noisebench.bench.instruments import Analyzer
from noisebench.errors import (
    CommunicationError,
    InputError,
    InstrumentError,
    InstrumentTimeout,
    MeasurementError,
    NoisebenchError,
    UnverifiedStep,
)
from noisebench.science.filters import FilterKind, RbwFilter
from noisebench.science.plausibility import check_trace_values
from noisebench.units import format_frequency, format_frequency_range

from .profile import (
    AnalyzerProfile,
    InstrumentProfile,
    ReplyError,
    load_profile,
)
from .scpi_channel import ScpiChannel, compound_line
from .transport import BlockError, Transport, parse_ascii_values

logger = logging.getLogger(__name__)
T = TypeVar("T")

SIMULATOR_MAKER = "noisebench"
"""Manufacturer field of the simulated instruments' ``*IDN?`` reply."""

__all__ = ["ScpiAnalyzer", "settings_differences"]

_ESR_ERROR_BITS = 4 | 8 | 16 | 32  # query, device-dependent, execution, command error
_TRACE_FORMATS = ("binary", "ascii")


def settings_differences(
    before: AcquisitionSettings, after: AcquisitionSettings, *, rel_tol: float = 1e-9
) -> dict[str, tuple[Any, Any]]:
    """Fields whose values differ between two applied settings: ``{name: (before, after)}``."""
    out: dict[str, tuple[Any, Any]] = {}
    a, b = before.model_dump(), after.model_dump()
    for name, old in a.items():
        new = b.get(name)
        if isinstance(old, float) and isinstance(new, float):
            if not math.isclose(old, new, rel_tol=rel_tol, abs_tol=1e-12):
                out[name] = (old, new)
        elif old != new:
            out[name] = (old, new)
    return out


PARTIAL_READBACK = frozenset({"center_hz", "averages"})
"""Settings whose change moves no other setting: after sending only these, only these are
read back (retuning between point groups, a new average count), and only once per value:
what the instrument applied for a command is kept (``_verified``) until the next full
read-back, error or reconnect, so a sweep revisiting its groups reads each centre back once."""

_READ_WITH = {"center_hz": ("center_hz", "span_hz"), "averages": ("averages",)}
"""The applied fields a partial read-back of each setting reports."""


class ScpiAnalyzer(Analyzer, NoiseDriveOutput, PathSwitch):
    """A spectrum analyzer over a :class:`~noisebench.drivers.transport.Transport`.

    ``profile`` is an :class:`InstrumentProfile`, a packaged profile name or a ``.toml`` path.
    ``retries`` bounds the recoveries per operation. Construction talks to the instrument
    (``*IDN?``, ``*CLS``); use :func:`noisebench.drivers.open_analyzer` to open by address.
    """

    def __init__(
        self,
        transport: Transport,
        profile: InstrumentProfile | str | Path = "generic",
        *,
        retries: int = 2,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        super().__init__()
        self.profile = load_profile(profile)
        self.spec: AnalyzerProfile = self.profile.section("analyzer")
        self.transport = transport
        self.settings_changes: list[dict[str, tuple[Any, Any]]] = []
        self.trace_transfer: str = self.spec.trace.transfer
        self._sleep = sleep
        self._settings: AcquisitionSettings | None = None
        self._request: AcquisitionRequest | None = None
        self._format_sent: str | None = None
        self._sent: dict[str, str] = {}  # setting name -> last command applied (the cache)
        # (setting name, command) -> the applied fields read back after it (PARTIAL_READBACK)
        self._verified: dict[tuple[str, str], dict[str, Any]] = {}
        self._deferred_names: set[str] = set()  # settings held for the next compound line
        self._started = False  # an acquisition start was accepted alone since connecting
        self._read_started = False  # the profile's read query was accepted alone since then
        self._fetched_by = self.spec.trace.query  # what the last acquisition fetched with
        self._step_open = False  # in a sequencer step whose error read may wait (error_batch)
        self._named: dict[tuple, list[tuple[str, str]]] = {}  # request -> its commands
        self._predicted: dict[tuple, AcquisitionRequest] = {}  # request -> as applied
        self._noise_drive: bool | None = None
        self._sim_path: str | None = None
        self._block_failures = 0
        self._closed = False
        self._channel = ScpiChannel(
            transport,
            self.profile.common,
            kind="analyzer",
            lock=self.lock,
            retries=retries,
            restore=self._restore,
            init=self.spec.init,
        )
        self._channel.connect()

    # -- identity and state -------------------------------------------------------------

    @property
    def identity(self) -> str:
        return self._channel.identity

    @property
    def settings(self) -> AcquisitionSettings | None:
        return self._settings

    @property
    def max_input_power_dbm(self) -> float | None:
        return self.spec.max_input_power_dbm

    @property
    def recovery_log(self) -> list[str]:
        """One line per recovery from a communication fault."""
        return self._channel.recovery_log

    @property
    def max_averages_per_trace(self) -> int | None:
        """The profile's ``averages.max`` (None when it declares none)."""
        return self.spec.settings.averages.max

    def predict(self, request: AcquisitionRequest) -> AcquisitionRequest:
        """``request`` with RBW, VBW, points, averages, attenuation, reference level and sweep
        time as the profile's quantisation rules say the instrument applies them."""
        key = _request_key(request)
        predicted = self._predicted.get(key)
        if predicted is None:
            predicted = predict_request(self.spec, request)
            _remember(self._predicted, key, predicted)
        return predicted

    def __repr__(self) -> str:
        return (
            f"<ScpiAnalyzer {self.transport.resource!r} profile={self.profile.name!r}"
            f"{' closed' if self._closed else ''}>"
        )

    # -- configure ----------------------------------------------------------------------

    def configure(self, request: AcquisitionRequest) -> AcquisitionSettings:
        """Send ``request``, read every setting back, return what the instrument applied."""
        if not isinstance(request, AcquisitionRequest):
            raise InputError(
                "request", f"must be an AcquisitionRequest (got {type(request).__name__})"
            )
        named = self._named_commands_for(request)  # validates everything before any I/O
        with self.lock:
            if request == self._request and self._settings is not None and self._sent:
                return self._settings  # nothing changed: no I/O at all
            previous, self._settings = self._settings, None

            def attempt() -> AcquisitionSettings:
                # computed per attempt: a reconnect in between clears the cache (the
                # instrument may have rebooted), and then everything is sent and read back
                changed = [(n, c) for n, c in named if self._sent.get(n) != c]
                known = self._known_settings(previous if self._sent else None, changed)
                if known is not None and self._channel.compound:
                    # applied values known: the commands ride with the acquisition start
                    self._channel.defer(changed)
                    self._deferred_names.update(n for n, _ in changed)
                    return known
                return self._apply(
                    [c for _, c in changed],
                    request,
                    previous if self._sent else None,
                    changed,
                )

            try:
                settings = self._run("configure", attempt)
            except BaseException:
                self._forget_state()  # state unknown: the next configure sends everything
                raise
            self._sent.update(named)
            self._request, self._settings = request, settings
            return settings

    def _run(self, what: str, operation: Callable[[], T]) -> T:
        """:meth:`ScpiChannel.run`; an instrument error (a held setting refused, or the
        operation itself) leaves the instrument's state unknown: forget the caches."""
        try:
            return self._channel.run(what, operation)
        except InstrumentError:
            self._forget_state()
            raise

    def _forget_state(self) -> None:
        """After a failure the instrument's state is unknown: the next configure sends every
        setting and reads every one back, and the next acquisition sends its parts alone."""
        self._started = False
        self._read_started = False
        self._sent.clear()
        self._verified.clear()
        self._deferred_names.clear()
        self._channel.take_deferred()

    def _known_settings(
        self, previous: AcquisitionSettings | None, changed: list[tuple[str, str]]
    ) -> AcquisitionSettings | None:
        """The applied settings after ``changed``, when every changed command is one whose
        read-back is already known (``_verified``); None: it must be sent and read back."""
        if previous is None:
            return None
        update: dict[str, Any] = {}
        for name, command in changed:
            known = self._verified.get((name, command))
            if known is None:
                return None
            update.update(known)
        return previous.model_copy(update=update) if update else previous

    def _read_changed(
        self,
        previous: AcquisitionSettings | None,
        changed: list[tuple[str, str]],
        commands_pending: list[str],
    ) -> tuple[AcquisitionSettings, dict[tuple[str, str], dict[str, Any]]] | None:
        """Send ``commands_pending`` and read back only what was sent, when that cannot move
        any other setting: a new centre (retuning between point groups) or a new average
        count, each once per value (``_verified``); with compound lines the commands, the
        queries and the error query go in one line. Returns the settings and the new
        read-backs to keep once the error queue is clear; None: nothing sent, read all."""
        s = self.spec.settings
        names = {n for n, _ in changed}
        if previous is None or not names or not names <= PARTIAL_READBACK:
            return None
        if "center_hz" in names and not _readable(s.center_hz):
            return None
        unknown = [(n, c) for n, c in changed if (n, c) not in self._verified]
        asked = [
            (name, field, setting) for name, _ in unknown for field, setting in self._asks(name)
        ]
        if self._channel.compound and commands_pending:
            # the commands, their read-back queries and the error query in one line; the
            # headers were all accepted alone by the full configure since connecting
            replies = self._channel.send_and_read_back(
                commands_pending, [setting for _, _, setting in asked]
            )
        else:
            for command in commands_pending:
                self._channel.write(command)
            replies = [self._channel.get(setting) for _, _, setting in asked]
        read: dict[str, dict[str, Any]] = {}
        for (name, field, _), value in zip(asked, replies, strict=True):
            read.setdefault(name, {})[field] = value
        update: dict[str, Any] = {}
        fresh: dict[tuple[str, str], dict[str, Any]] = {}
        for name, command in changed:
            known = self._verified.get((name, command))
            if known is None:
                got = read[name]
                if name == "averages" and got.pop("averaging_on", True) is False:
                    got["averages"] = 1  # the count is kept, but the instrument does not average
                known = fresh[(name, command)] = got
            update.update(known)
        return previous.model_copy(update=update), fresh

    def _asks(self, name: str) -> list[tuple[str, Any]]:
        """(field, setting) read back after a partial change of ``name``."""
        s = self.spec.settings
        asks: list[tuple[str, Any]]
        if name == "center_hz":
            asks = [("center_hz", s.center_hz)]
            if _readable(s.span_hz):  # an analyzer may narrow the span at its band edge
                asks.append(("span_hz", s.span_hz))
            return asks
        asks = [("averages", s.averages)]
        if _readable(s.averaging_on):
            asks.append(("averaging_on", s.averaging_on))
        return asks

    def _seed_verified(self, named: list[tuple[str, str]], settings: AcquisitionSettings) -> None:
        """After a full read-back: what each partial setting's command applied, so that
        returning to it later needs no read-back."""
        self._verified.clear()
        for name, command in named:
            if name in _READ_WITH:
                self._verified[(name, command)] = {
                    field: getattr(settings, field) for field in _READ_WITH[name]
                }

    def _requested_values(self, request: AcquisitionRequest) -> dict[str, Any]:
        s = self.spec.settings
        values: dict[str, Any] = {
            "continuous": False,
            "averaging_on": True,  # an analyzer left with averaging off must not stay so
            "mode": request.mode,
            "rbw_hz": request.rbw_hz,
            "points": request.points,
            "detector": request.detector,
            "averaging_scale": request.averaging_scale,
            "averages": request.averages,
            "ref_level_dbm": request.ref_level_dbm,
            "attenuation_db": request.attenuation_db,
            "preamp": request.preamp,
        }
        if (
            s.center_hz is not None
            and s.center_hz.writable
            and s.span_hz is not None
            and s.span_hz.writable
        ):
            values.update(center_hz=request.center_hz, span_hz=request.span_hz)
        else:
            values.update(start_hz=request.start_hz, stop_hz=request.stop_hz)
        values.update(self._auto_or_value("vbw", request.vbw_hz))
        values.update(self._auto_or_value("sweep_time", request.sweep_time_s))
        return values

    def _auto_or_value(self, stem: str, value: float | None) -> dict[str, Any]:
        auto = getattr(self.spec.settings, f"{stem}_auto")
        if value is None:
            return {f"{stem}_auto": True} if auto is not None and auto.writable else {}
        return {f"{stem}_hz" if stem == "vbw" else f"{stem}_s": value}

    def _commands_for(self, request: AcquisitionRequest) -> list[str]:
        """Validate ``request`` against the profile and format its commands (no I/O)."""
        return [command for _, command in self._named_commands_for(request)]

    def _named_commands_for(self, request: AcquisitionRequest) -> list[tuple[str, str]]:
        """(setting name, command) for ``request``, in the profile's order (no I/O); kept per
        request, as a sweep asks for the same few requests over and over."""
        key = _request_key(request)
        named = self._named.get(key)
        if named is None:
            named = self._format_commands(request)
            _remember(self._named, key, named)
        return list(named)

    def _format_commands(self, request: AcquisitionRequest) -> list[tuple[str, str]]:
        values = self._requested_values(request)
        commands: list[tuple[str, str]] = []
        for name in self.spec.apply_order:
            value = values.get(name)
            if value is None:
                continue
            setting = getattr(self.spec.settings, name)
            if setting is None or not setting.writable:
                if self._can_skip(name, value, setting):
                    continue
                raise InputError(
                    f"request.{name}",
                    f"profile {self.profile.name} cannot set {name} (requested {_plain(value)!r})",
                    fix=f"leave {name} unset or add a 'set' template for it",
                )
            commands.append((name, setting.command(value)))
        missing = [
            n
            for n in values
            if n not in self.spec.apply_order
            and values[n] is not None
            and getattr(self.spec.settings, n) is not None
        ]
        if missing:
            raise InputError(
                "analyzer.apply_order",
                f"does not list {missing}",
                fix=f"add {missing} to apply_order in {self.profile.source}",
            )
        return commands

    def _can_skip(self, name: str, value: Any, setting: Any) -> bool:
        """Requests the profile may ignore: those that ask for what it has anyway."""
        if name in ("continuous", "averaging_on"):
            return True
        if name == "mode":
            return value is SweepMode.SWEPT
        if name == "sweep_time_s":
            logger.warning(
                "profile %s cannot set the sweep time; using the instrument's", self.profile.name
            )
            return True
        if setting is not None and setting.readable:  # a fixed value that matches
            return _plain(value) == _plain(setting.parse(""))
        return False

    def _apply(
        self,
        commands: list[str],
        request: AcquisitionRequest,
        previous: AcquisitionSettings | None = None,
        changed: list[tuple[str, str]] | None = None,
    ) -> AcquisitionSettings:
        """Send ``commands``, read back (only the ``changed`` settings where that is safe,
        see :meth:`_read_changed`), check the error queue once."""
        partial = self._read_changed(previous, changed or [], commands)
        if partial is None:
            for command in commands:
                self._channel.write(command)
        settings = partial[0] if partial is not None else self._read_settings()
        if partial is None or not self._channel.compound or not commands:
            self._channel.check_errors("configure")  # (a compound line read it already)
        if partial is not None:
            self._verified.update(partial[1])
        else:
            self._seed_verified(self._named_commands_for(request), settings)
        _log_adjustments(request, settings)
        return settings

    # -- read back ----------------------------------------------------------------------

    def read_settings(self) -> AcquisitionSettings:
        """Query every setting the profile can report; return them as applied settings."""
        return self._run("read settings", self._read_settings)

    def _read_settings(self) -> AcquisitionSettings:
        with self.lock:
            s = self.spec.settings
            get = self._channel.get
            if (
                s.center_hz is not None
                and s.span_hz is not None
                and s.center_hz.readable
                and s.span_hz.readable
            ):
                center, span = get(s.center_hz), get(s.span_hz)
            else:
                start, stop = get(s.start_hz), get(s.stop_hz)
                center, span = (start + stop) / 2.0, stop - start
            mode = SweepMode(get(s.mode)) if _readable(s.mode) else SweepMode.SWEPT
            values: dict[str, Any] = dict(
                center_hz=center,
                span_hz=span,
                rbw_hz=get(s.rbw_hz),
                rbw_filter=self._read_filter(mode),
                mode=mode,
                vbw_hz=get(s.vbw_hz) if _readable(s.vbw_hz) else None,
                detector=Detector(get(s.detector)),
                averaging_scale=AveragingScale(get(s.averaging_scale)),
                averages=get(s.averages),
                points=get(s.points),
                ref_level_dbm=get(s.ref_level_dbm) if _readable(s.ref_level_dbm) else None,
                attenuation_db=get(s.attenuation_db) if _readable(s.attenuation_db) else None,
                preamp=get(s.preamp) if _readable(s.preamp) else None,
                sweep_time_s=get(s.sweep_time_s) if _readable(s.sweep_time_s) else None,
            )
            context = {"detector": values["detector"].value, "mode": mode.value}
            values["detector_samples"] = (
                get(s.detector_samples, context) if _readable(s.detector_samples) else None
            )
            if _readable(s.averaging_on) and not get(s.averaging_on):
                values["averages"] = 1  # the count is kept, but the instrument does not average
            try:
                return AcquisitionSettings(**values)
            except (ValidationError, InputError) as exc:
                raise ReplyError(
                    f"the analyzer reports settings noisebench cannot use: {exc}",
                    profile=self.profile.name,
                ) from None

    def _read_filter(self, mode: SweepMode) -> RbwFilter:
        s = self.spec.settings
        get = self._channel.get
        if mode is SweepMode.FFT:
            return RbwFilter(kind=FilterKind.FFT, window=str(get(s.fft_window)).lower())
        shape = get(s.rbw_shape)
        if shape == "synchronous":
            return RbwFilter(kind=FilterKind.SYNCHRONOUS, poles=get(s.rbw_poles))
        return RbwFilter(kind=FilterKind.GAUSSIAN)

    def verify_settings(self) -> dict[str, tuple[Any, Any]]:
        """Read the settings back and return how they differ from the last applied ones."""
        applied = self._require_settings()
        return self._run(
            "verify settings", lambda: settings_differences(applied, self._read_settings())
        )

    def _restore(self) -> None:
        """After a reconnect: detect lost settings, re-apply them and the output states."""
        self._format_sent = None
        self._sent.clear()  # the instrument may have lost them: re-apply everything
        self._verified.clear()
        self._started = False
        self._read_started = False
        held, self._deferred_names = self._deferred_names, set()
        if self._request is not None and self._settings is not None:
            found = settings_differences(self._settings, self._read_settings())
            for name in held:  # sent in a compound line, or not yet: not a lost setting
                for field in _READ_WITH.get(name, (name,)):
                    found.pop(field, None)
            if found:
                self.settings_changes.append(found)
                logger.warning(
                    "analyzer settings changed while disconnected (instrument "
                    "reboot?): %s; re-applying",
                    _describe(found),
                )
            applied = self._apply(self._commands_for(self._request), self._request)
            still = settings_differences(self._settings, applied)
            if still:
                raise MeasurementError(
                    f"re-applied settings differ from those applied before: {_describe(still)}",
                    instrument="analyzer",
                )
        if self._noise_drive is not None and self.spec.noise_drive is not None:
            self._channel.set(self.spec.noise_drive, self._noise_drive)
        if self._sim_path is not None and self.spec.sim_path is not None:
            self._channel.set(self.spec.sim_path, self._sim_path)

    # -- acquisition --------------------------------------------------------------------

    def expected_acquisition_time_s(self) -> float:
        """Instrument time of one averaged acquisition with the applied settings, seconds.

        Uses the sweep time the instrument reports; without one, ``k*span/(RBW*min(RBW,
        VBW))`` with the profile's ``sweep_time_factor`` k (common practice, k ~ 2.5), or
        10/RBW for zero span and FFT mode (a rough settling allowance)."""
        s = self._require_settings()
        acq = self.spec.acquisition
        sweep = s.sweep_time_s
        if sweep is None:
            if s.span_hz > 0 and s.mode is SweepMode.SWEPT:
                sweep = (
                    acq.sweep_time_factor
                    * s.span_hz
                    / (s.rbw_hz * min(s.rbw_hz, s.vbw_hz or s.rbw_hz))
                )
            else:
                sweep = 10.0 / s.rbw_hz
        return s.averages * (sweep + acq.sweep_overhead_s)

    def acquisition_timeout_s(self) -> float:
        """Timeout for one acquisition: expected time x factor + allowance, seconds."""
        acq = self.spec.acquisition
        return max(
            self._channel.base_timeout_s,
            self.expected_acquisition_time_s() * acq.timeout_factor + acq.timeout_extra_s,
        )

    def acquire_trace(self) -> Trace:
        """One complete averaged acquisition with the applied settings, then the trace."""
        self._require_settings()
        return self._run("acquire trace", self._acquire_trace_once)

    def _acquire_trace_once(self) -> Trace:
        settings = self._require_settings()
        # the trace query and the step's error read in one line once both headers were
        # accepted alone (the first acquisition after connecting sends them apart)
        compound = self._channel.compound and self.transport.reads_block_then_text
        combined = compound and self._started
        usable = self._one_line(settings)
        one_line = compound and usable
        single = self.spec.acquisition.read if usable else None
        if single is not None and not (compound and self._read_started):
            # the profile's read query (start, wait and trace in one) goes alone, its error
            # read apart: once after connecting before it rides in compound lines, and
            # always without compound lines (error_check = "each")
            elapsed, values = self._acquire_in_one_line(settings, alone=True)
        elif one_line and (single is not None or combined):
            # in a step (error_batch): the queue is read in every error_batch-th line and at
            # the step's end; the sequencer accepts the traces only after that read
            read = not self._step_open or (
                self._channel.unchecked_acquisitions + 1 >= self.profile.common.error_batch
            )
            elapsed, values = self._acquire_in_one_line(settings, read_errors=read)
        else:
            self._fetched_by = self.spec.trace.query
            elapsed = self._run_acquisition()
            values = self._fetch_trace(settings, with_errors=combined)
            if not combined:
                self._channel.check_errors(self.spec.trace.query)
        self._deferred_names.clear()  # the settings that rode along were accepted
        freq_hz = settings.frequencies_hz()
        self._check_plausible(values, settings, freq_hz)
        # every field is checked already (values: count and finiteness; frequencies from
        # validated settings): no second validation per trace
        return Trace.model_construct(
            freq_hz=freq_hz,
            values=values,
            unit=self.spec.trace.unit,
            settings=settings,
            instrument=self.identity,
            acquisition_time_s=max(elapsed, self.expected_acquisition_time_s()),
            timestamp=datetime.now(timezone.utc),
            excluded=None,
        )

    def _one_line(self, settings: AcquisitionSettings) -> bool:
        """Whether this acquisition goes as one line (see :meth:`_acquire_in_one_line`): the
        profile names a wait command, the trace goes as a binary block, and the acquisition
        is short enough to wait for without status polling."""
        acq = self.spec.acquisition
        return (
            (self.profile.common.wait is not None or acq.read is not None)
            and self.trace_transfer == "binary"
            and self._block_failures < 2
            and not (acq.poll_start and self.expected_acquisition_time_s() > acq.poll_above_s)
        )

    def _acquire_in_one_line(
        self, settings: AcquisitionSettings, *, read_errors: bool = True, alone: bool = False
    ) -> tuple[float, np.ndarray]:
        """Held settings, the start, the wait (IEEE 488.2 ``*WAI``: the next unit runs once
        the acquisition completed), the trace query and the step's error query in one
        program message: one exchange per acquisition. With ``[analyzer.acquisition] read``
        (SCPI-1999 ``READ?`` = ABORt; INITiate; FETCh?) that query replaces the start, the
        wait and the trace query. The reply is the block, ``;`` and the error entry; its
        deadline covers the acquisition and the transfer. Returns the wall time and the
        values. ``read_errors=False`` (inside a step, ``error_batch``): no error query; the
        reply is the block alone and the step's read covers it (a trace or read query that
        fails sends no reply: the block read times out, and recovery reads the queue and
        names it). ``alone``: the read query by itself (held settings sent before it), its
        error read apart, the first time after connecting."""
        tr = self.spec.trace
        single = self.spec.acquisition.read
        wait = self.profile.common.wait
        assert single is not None or wait is not None  # _one_line checked it
        limit = self.acquisition_timeout_s()
        size = settings.points * (4 if tr.datatype == "f" else 8)
        limit += self._channel.base_timeout_s + size / tr.transfer_rate_bytes_per_s
        self._select_format("binary")
        if alone:
            assert single is not None
            self._channel.flush()  # held settings alone, with their error read
            read_errors = False
        held = self._channel.take_deferred()
        if single is not None:
            fetch, units = single, [*held, single]
        else:
            assert wait is not None
            fetch, units = tr.query, [*held, self.spec.acquisition.start, wait, tr.query]
        self._fetched_by = fetch
        line = compound_line([*units, self.profile.common.error_query] if read_errors else units)
        self._channel.sent_compound(line, held)
        started = time.monotonic()
        try:
            if read_errors:
                got, reply = self.transport.query_block_then_text(
                    line, datatype=tr.datatype, big_endian=tr.big_endian, timeout_s=limit
                )
            else:
                got, reply = (
                    self.transport.query_binary(
                        line, datatype=tr.datatype, big_endian=tr.big_endian, timeout_s=limit
                    ),
                    "",
                )
        except InstrumentTimeout as exc:
            exc.add_context(timeout_s=round(limit, 3))
            self._abort_quietly()
            raise
        except BlockError:
            self._block_failures += 1
            raise
        elapsed = time.monotonic() - started
        if self._step_open and not alone:
            self._channel.unchecked_acquisitions += 1
        if read_errors:
            self._channel.check_errors(fetch, first_reply=reply)
        elif alone:
            self._channel.check_errors(fetch)
            self._read_started = True
        if got is None:
            self._block_failures += 1
            raise BlockError(
                f"reply to {line!r} holds no binary block (only {reply!r})", command=fetch
            )
        self._block_failures = 0
        self._last_transfer = "binary"
        return elapsed, _checked_values(got, settings.points, fetch)

    # -- steps (error_batch) ---------------------------------------------------------------

    def begin_step(self) -> None:
        """A sequencer step starts: with ``[common] error_batch`` > 1 its one-line
        acquisitions leave out the error query, at most ``error_batch`` in a row, and
        :meth:`end_step` reads the queue once for them (see :class:`Analyzer`)."""
        with self.lock:
            self._step_open = self.profile.common.error_batch > 1 and self._channel.compound
            self._channel.step_lost = False

    def end_step(self, *, check: bool = True) -> None:
        """The step ends: read the error queue when acquisitions of it went without a read
        (an error names the failing command: held settings are re-sent alone); a reconnect
        in the middle of the step lost that read: :class:`UnverifiedStep`, and the
        sequencer reads the step again. ``check=False``: the step is abandoned, its traces
        discarded; the next read covers what it sent."""
        with self.lock:
            self._step_open = False
            if not check:
                return
            if self._channel.unchecked_acquisitions:  # named errors come first
                self._run(
                    "check the step's errors",
                    lambda: self._channel.check_errors(self._fetched_by),
                )
            if self._channel.step_lost:
                self._channel.step_lost = False
                raise UnverifiedStep(
                    "the connection was remade before the error queue was read for this "
                    "step's acquisitions (a rebooted instrument empties it): the step's "
                    "traces are discarded and it is read again",
                    instrument="analyzer",
                )

    def _run_acquisition(self) -> float:
        """Start one acquisition and wait for it; returns the wall time it took, seconds."""
        acq = self.spec.acquisition
        limit = self.acquisition_timeout_s()
        started = time.monotonic()
        try:
            if acq.poll_start and self.expected_acquisition_time_s() > acq.poll_above_s:
                self._wait_by_polling(limit, acq.poll_start)
            elif self._channel.compound and self._started:
                # held settings, the start and the completion query in one line: one
                # exchange; the step's error read after the transfer covers all of it
                held = self._channel.take_deferred()
                line = compound_line([*held, acq.start, self.profile.common.operation_complete])
                self._channel.sent_compound(line, held)
                reply = self.transport.query_watched(line, limit)
                if reply.strip().split(";")[-1].strip().lstrip("+") != "1":
                    raise ReplyError(f"reply {reply!r} to {line!r} does not end in 1")
            else:
                self._channel.write(acq.start, check=False)
                wait = self.profile.common.wait
                if self._channel.compound and wait is not None:
                    # accepted alone once before it rides in one-line acquisitions
                    self._channel.write(wait, check=False)
                reply = self.transport.query_watched(self.profile.common.operation_complete, limit)
                self._started = True
                if reply.strip().lstrip("+") != "1":
                    raise ReplyError(
                        f"reply {reply!r} to {self.profile.common.operation_complete!r} is not 1"
                    )
        except InstrumentTimeout as exc:
            exc.add_context(timeout_s=round(limit, 3))
            self._abort_quietly()
            raise
        if self.profile.common.error_check == "each":
            self._channel.check_errors(acq.start)
        # "step": the one read after the trace transfer covers the start (the acquisition and
        # its transfer are one step; an error names the commands since the last read)
        return time.monotonic() - started

    def _wait_by_polling(self, limit_s: float, poll_start: str) -> None:
        acq = self.spec.acquisition
        self._channel.query(acq.poll_query)  # reading the event register clears it
        self._channel.write(poll_start, check=False)
        deadline = time.monotonic() + limit_s
        while True:
            status = int(float(self._channel.query(acq.poll_query)))
            if status & _ESR_ERROR_BITS:
                self._channel.check_errors(poll_start)
            if status & acq.poll_mask:
                return
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise InstrumentTimeout(
                    f"acquisition not complete after {limit_s:.3g} s "
                    f"(status polling with {acq.poll_query!r})",
                    command=poll_start,
                )
            self._sleep(min(acq.poll_interval_s, remaining))

    def _abort_quietly(self) -> None:
        if self.spec.acquisition.abort is None:
            return
        try:
            self.transport.write(self.spec.acquisition.abort)
        except NoisebenchError as exc:
            logger.debug("abort after a timeout failed: %s", exc)

    def abort(self) -> None:
        """Stop a running acquisition (profile ``abort`` command)."""
        command = self.spec.acquisition.abort
        if command is None:
            raise InputError("abort", f"profile {self.profile.name} has no abort command")
        self._run("abort", lambda: self._channel.write(command))

    # -- trace transfer -----------------------------------------------------------------

    def _fetch_trace(
        self, settings: AcquisitionSettings, *, with_errors: bool = False
    ) -> np.ndarray:
        """The trace; ``with_errors``: a binary trace query and the error query go in one
        line and the step's error check happens here (an ASCII trace reads them apart)."""
        tr = self.spec.trace
        use = self.trace_transfer
        if use == "binary" and self._block_failures >= 2 and tr.ascii_format is not None:
            logger.warning("two binary transfers failed in a row; this trace goes as ASCII")
            use = "ascii"
        size = settings.points * (4 if tr.datatype == "f" else 8) * (1 if use == "binary" else 4)
        timeout = self._channel.base_timeout_s + size / tr.transfer_rate_bytes_per_s
        self._select_format(use)
        try:
            if use == "binary" and with_errors:
                line = compound_line([tr.query, self.profile.common.error_query])
                self._channel.sent_compound(line, [])
                got, reply = self.transport.query_block_then_text(
                    line, datatype=tr.datatype, big_endian=tr.big_endian, timeout_s=timeout
                )
                self._channel.check_errors(tr.query, first_reply=reply)
                if got is None:
                    raise BlockError(
                        f"reply to {line!r} holds no binary block (only {reply!r})",
                        command=tr.query,
                    )
                values = got
            elif use == "binary":
                values = self.transport.query_binary(
                    tr.query, datatype=tr.datatype, big_endian=tr.big_endian, timeout_s=timeout
                )
            else:
                with self.transport.timeout(timeout):
                    values = parse_ascii_values(self._channel.query(tr.query), tr.query)
        except BlockError:
            self._block_failures += 1
            raise
        self._block_failures = 0
        self._last_transfer = use
        if with_errors and use != "binary":  # the ASCII fallback read the trace alone
            self._channel.check_errors(tr.query)
        return _checked_values(values, settings.points, tr.query)

    def _check_plausible(
        self,
        values: np.ndarray,
        settings: AcquisitionSettings,
        freq_hz: np.ndarray | None = None,
    ) -> None:
        """SCPI not-a-number codes and levels no analyzer displays, named with what to check
        in this profile (the byte order for binary transfers)."""
        tr = self.spec.trace
        if getattr(self, "_last_transfer", "binary") == "binary":
            order = "big" if tr.big_endian else "little"
            fix = (
                f"the values look mis-decoded: profile {self.profile.name!r} sends "
                f"{tr.byte_order!r} and decodes {order}-endian {tr.datatype!r} numbers; the "
                "byte-order command and big_endian must describe the same order (or use the "
                "ASCII transfer)"
            )
        else:
            fix = "check the trace format and unit commands of the profile"
        check_trace_values(
            values,
            logarithmic=tr.unit in (TraceUnit.DBM, TraceUnit.DBM_PER_HZ),
            freq_hz=settings.frequencies_hz() if freq_hz is None else freq_hz,
            decode_fix=fix,
        )

    def _select_format(self, use: str) -> None:
        if self._format_sent == use:
            return
        tr = self.spec.trace
        commands = [tr.binary_format, tr.byte_order] if use == "binary" else [tr.ascii_format]
        self._format_sent = None
        for command in commands:
            if command is not None:
                self._channel.write(command)
        self._format_sent = use

    def set_trace_transfer(self, transfer: str) -> None:
        """Choose ``"binary"`` (IEEE 488.2 block) or ``"ascii"`` trace transfer."""
        if transfer not in _TRACE_FORMATS:
            raise InputError(
                "trace_transfer",
                f"must be one of {_TRACE_FORMATS} (got {transfer!r})",
                value=transfer,
            )
        tr = self.spec.trace
        if (tr.binary_format if transfer == "binary" else tr.ascii_format) is None:
            raise InputError(
                "trace_transfer", f"profile {self.profile.name} has no {transfer} format command"
            )
        self.trace_transfer = transfer

    # -- markers ------------------------------------------------------------------------

    def read_marker(
        self, freq_hz: float, kind: MarkerKind, band_hz: float | None = None
    ) -> MarkerReading:
        """Acquire, then read a band-power (dBm over ``band_hz``, default 5 RBW) or
        noise-density (dBm/Hz) marker at ``freq_hz``."""
        settings = self._require_settings()
        marker = self.spec.marker
        kind = MarkerKind(kind)
        if kind is MarkerKind.BAND_POWER and (marker is None or "band_power" not in marker.kinds):
            return self._band_power_from_trace(freq_hz, band_hz)
        if marker is None:
            raise InputError(
                "marker",
                f"profile {self.profile.name} has no marker commands",
                fix="add an [analyzer.marker] section",
            )
        _check_marker_frequency(freq_hz, settings)
        if kind.value not in marker.kinds:
            raise InputError(
                "marker.kind",
                f"profile {self.profile.name} has no {kind.value} marker (it offers "
                f"{', '.join(marker.kinds)})",
                fix="use the trace method (no marker) or another marker kind",
            )
        if kind is MarkerKind.BAND_POWER and band_hz is None:
            band_hz = 5.0 * settings.rbw_hz
        if marker.function is not None:
            commands = [marker.function.command(kind.value)]
        else:
            assert marker.noise is not None  # the profile declares 'function' or 'noise'
            commands = [marker.noise.command(True)]
        commands.append(marker.frequency.command(freq_hz))
        if band_hz is not None:
            if marker.band is None:
                raise InputError(
                    "band_hz",
                    f"profile {self.profile.name} cannot set a marker band",
                    fix="leave band_hz unset",
                )
            commands.append(marker.band.command(band_hz))
        return self._run(
            "read marker", lambda: self._marker_once(commands, float(freq_hz), kind, band_hz)
        )

    def _band_power_from_trace(self, freq_hz: float, band_hz: float | None) -> MarkerReading:
        """A band-power reading for an instrument without that marker: one trace, integrated
        over exactly the band (``sum(w P) / ENBW``, the markers' own definition,
        :func:`noisebench.science.estimator.band_weights_hz`)."""
        from noisebench.science.estimator import band_weights_hz

        settings = self._require_settings()
        _check_marker_frequency(freq_hz, settings)
        if settings.span_hz <= 0 or settings.points < 2:
            raise InputError(
                "marker",
                f"profile {self.profile.name} has no band-power marker and a zero-span trace "
                "cannot be integrated over a band",
                fix="use a span of several RBW",
            )
        band = 5.0 * settings.rbw_hz if band_hz is None else float(band_hz)
        trace = self.acquire_trace()
        weights = band_weights_hz(trace.freq_hz, float(freq_hz), band)
        if weights.sum() < band * (1 - 1e-9):
            raise InputError(
                "band_hz",
                f"{format_frequency(band)} around {format_frequency(float(freq_hz))} is not "
                "inside the trace",
                fix="narrow the band or widen the span",
            )
        power_w = 10.0 ** (np.asarray(trace.values, dtype=float) / 10.0) * 1e-3
        value_w = float(np.sum(weights * power_w)) / settings.enbw_hz
        unbiased = (
            settings.detector is Detector.RMS or settings.averaging_scale is AveragingScale.POWER
        )
        return MarkerReading(
            freq_hz=float(freq_hz),
            kind=MarkerKind.BAND_POWER,
            value_db=10.0 * math.log10(value_w / 1e-3),
            band_hz=band,
            settings=settings,
            acquisition_time_s=trace.acquisition_time_s,
            instrument=self.identity,
            instrument_corrected=unbiased,
        )

    def _marker_once(
        self, commands: list[str], freq_hz: float, kind: MarkerKind, band_hz: float | None
    ) -> MarkerReading:
        marker = self.spec.marker
        assert marker is not None  # read_marker refused a profile without markers
        settings = self._require_settings()
        for command in commands:
            self._channel.write(command)
        elapsed = self._run_acquisition()
        reply = self._channel.query(marker.value)
        value = _parse_finite(reply, marker.value)
        freq = self._channel.get(marker.frequency) if marker.frequency.readable else freq_hz
        corrected = bool(self._channel.get(marker.corrected, {"function": kind.value}))
        self._channel.check_errors(marker.value)
        return MarkerReading(
            freq_hz=freq,
            kind=kind,
            value_db=value,
            band_hz=band_hz,
            settings=settings,
            acquisition_time_s=max(elapsed, self.expected_acquisition_time_s()),
            instrument=self.identity,
            instrument_corrected=corrected,
        )

    # -- noise-source drive and simulator path -------------------------------------------

    @property
    def has_noise_drive(self) -> bool:
        """True when the profile defines the analyzer's noise-source drive output."""
        return self.spec.noise_drive is not None

    def set_noise_drive(self, on: bool) -> None:
        """Switch the analyzer's noise-source drive output and verify the read-back."""
        setting = self.spec.noise_drive
        if setting is None:
            raise InputError(
                "noise_drive",
                f"profile {self.profile.name} has no noise-source drive commands",
                fix="drive the source from a DC supply or a relay instead",
            )
        command = setting.command(bool(on))
        self._run("noise drive", lambda: self._set_verified(setting, command, bool(on)))
        self._noise_drive = bool(on)

    def read_noise_drive(self) -> bool:
        """The drive state the instrument reports."""
        setting = self.spec.noise_drive
        if setting is None:
            raise InputError(
                "noise_drive", f"profile {self.profile.name} has no noise-source drive commands"
            )
        return bool(self._run("noise drive", lambda: self._channel.get(setting)))

    @property
    def has_path_switch(self) -> bool:
        """True for the SCPI simulator: its profile has the path command AND it says it is one.

        Both are required so a profile copied from the generic one never sends simulator-only
        commands to real hardware."""
        if self.spec.sim_path is None:
            return False
        maker = str(self.identity).split(",", 1)[0].strip().lower()
        return maker == SIMULATOR_MAKER

    def set_path(self, path: str) -> None:
        """The :class:`~noisebench.bench.capabilities.PathSwitch` form of :meth:`set_sim_path`."""
        self.set_sim_path(path)

    def set_sim_path(self, path: str | Enum) -> None:
        """Simulator only: what the analyzer input sees (``dut``/``through``/``termination``)."""
        setting = self.spec.sim_path
        if setting is None:
            raise InputError(
                "sim_path",
                f"profile {self.profile.name} defines no simulator "
                "path command (real instruments have none)",
                fix="connect the DUT by hand, or use the simulator's profile",
            )
        value = path.value if isinstance(path, Enum) else str(path).lower()
        command = setting.command(value)
        self._run("set path", lambda: self._set_verified(setting, command, value))
        self._sim_path = value

    def _set_verified(self, setting: Any, command: str, wanted: Any) -> None:
        self._channel.write(command)
        if setting.get_cmd is not None:
            got = self._channel.get(setting)
            if got != wanted:
                raise MeasurementError(
                    f"{setting.name}: the instrument reports {got!r} after {command!r}",
                    instrument="analyzer",
                )

    # -- lifecycle ----------------------------------------------------------------------

    def close(self) -> None:
        """Noise drive off (when the profile has it), then release the session. Idempotent."""
        with self.lock:
            if self._closed:
                return
            self._closed = True
            if self.spec.noise_drive is not None:
                self._channel.write_safe_state(self.spec.noise_drive, False)
            self._channel.close()

    def _require_settings(self) -> AcquisitionSettings:
        if self._settings is None:
            raise InputError(
                "analyzer.settings", "the analyzer is not configured", fix="call configure() first"
            )
        return self._settings


# ----------------------------------------------------------------------------- helpers


_PREDICTED = (
    "rbw_hz",
    "vbw_hz",
    "points",
    "averages",
    "attenuation_db",
    "ref_level_dbm",
    "sweep_time_s",
)


def predict_request(spec: AnalyzerProfile, request: AcquisitionRequest) -> AcquisitionRequest:
    """``request`` as an analyzer with profile section ``spec`` applies it (no I/O)."""
    changes: dict[str, Any] = {}
    for name in _PREDICTED:
        value = getattr(request, name)
        setting = getattr(spec.settings, name)
        if value is None or setting is None or not setting.writable:
            continue
        applied = setting.applied(value)
        if applied != value:
            changes[name] = applied
    return request.model_copy(update=changes) if changes else request


_MEMO_SIZE = 4096


def _request_key(request: AcquisitionRequest) -> tuple:
    """A request's field values, a dictionary key (the model itself is not hashable)."""
    return tuple(request.__dict__.values())


def _remember(memo: dict, key: tuple, value: Any) -> None:
    if len(memo) >= _MEMO_SIZE:  # a sweep uses a few hundred; never grow without bound
        memo.clear()
    memo[key] = value


def _readable(setting: Any) -> bool:
    return setting is not None and setting.readable


def _plain(value: Any) -> Any:
    return value.value if isinstance(value, Enum) else value


def _parse_finite(reply: str, command: str) -> float:
    try:
        value = float(reply.strip().strip('"'))
    except ValueError:
        raise ReplyError(
            f"reply {reply!r} to {command!r} is not a number", command=command
        ) from None
    if not math.isfinite(value) or abs(value) >= 9.9e37:
        raise ReplyError(
            f"reply {reply!r} to {command!r} is not a finite number (SCPI NaN/infinity)",
            command=command,
        )
    return value


def _checked_values(values: np.ndarray, points: int, command: str) -> np.ndarray:
    if values.size != points:
        raise BlockError(
            f"trace from {command!r} has {values.size} values, the analyzer "
            f"reports {points} points",
            command=command,
        )
    if not np.all(np.isfinite(values)):
        bad = int(np.count_nonzero(~np.isfinite(values)))
        raise CommunicationError(
            f"trace from {command!r} holds {bad} non-finite value(s) of {values.size}: a "
            "transfer error, or mis-decoded data if it repeats (check the byte-order command "
            "and big_endian in the profile)",
            command=command,
        )
    return values


def _check_marker_frequency(freq_hz: float, s: AcquisitionSettings) -> None:
    try:
        freq = float(freq_hz)
    except (TypeError, ValueError):
        raise InputError("marker.freq_hz", f"must be a number (got {freq_hz!r})") from None
    if not math.isfinite(freq) or freq <= 0:
        raise InputError("marker.freq_hz", f"must be finite and > 0 (got {freq_hz!r})")
    if s.span_hz > 0:
        spacing = s.span_hz / max(s.points - 1, 1)
        if not s.start_hz - spacing / 2 <= freq <= s.stop_hz + spacing / 2:
            raise InputError(
                "marker.freq_hz",
                f"{format_frequency(freq)} is outside the trace "
                f"{format_frequency_range(s.start_hz, s.stop_hz)}",
                fix="move the marker inside the span or retune the analyzer",
            )


def _describe(diffs: dict[str, tuple[Any, Any]]) -> str:
    return ", ".join(
        f"{k}: {a!r} -> {b!r}" for k, a, b in ((k, v[0], v[1]) for k, v in diffs.items())
    )


def _log_adjustments(request: AcquisitionRequest, settings: AcquisitionSettings) -> None:
    for name in ("rbw_hz", "points", "averages", "span_hz", "attenuation_db"):
        wanted, got = getattr(request, name), getattr(settings, name)
        if wanted is not None and got != wanted:
            logger.info("analyzer applied %s = %r (requested %r)", name, got, wanted)
    for name in ("detector", "averaging_scale", "mode"):
        if getattr(request, name) != getattr(settings, name):
            logger.warning(
                "analyzer applied %s = %s (requested %s)",
                name,
                getattr(settings, name).value,
                getattr(request, name).value,
            )
