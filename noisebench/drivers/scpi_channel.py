"""What every SCPI instrument driver shares: identity, settings I/O, error queue, recovery.

A :class:`ScpiChannel` wraps one :class:`~noisebench.drivers.transport.Transport` and the
``[common]`` table of a profile. Drivers (analyzer, generator, DC supply) own one and run
every operation through :meth:`ScpiChannel.run`, which gives the retry policy:

1. an :class:`~noisebench.errors.InstrumentError` (the instrument said no) is never retried;
2. a :class:`~noisebench.errors.CommunicationError` (timeout, dropped connection, bad block)
   triggers recovery - ``Transport.recover()`` (a reconnect on sockets), an ``*IDN?``
   liveness probe that must return the same identity, and a read of the error queue (an
   entry there explains the failure and is raised as ``InstrumentError`` naming the
   command) - then, after a reconnect, the profile's ``init`` commands and the driver's
   ``restore`` callback (re-apply and verify its settings), and the operation is retried, at
   most ``retries`` times;
3. a recovery that fails (nothing answers: the instrument reboots, a cable is out) is tried
   again with exponential backoff - ``first_backoff_s`` doubling up to ``max_backoff_s`` - for
   the profile's ``retry_window_s`` (a reboot takes tens of seconds); "reconnected" is logged
   only after the instrument answered the liveness probe;
4. when the window is used up the original error is raised (the run ends with exit 4 and is
   resumable) and recovery is tried again at the start of the next operation.

Waiting uses :data:`TIMING` (``sleep`` and ``monotonic``), which tests replace with a fake clock.
"""

from __future__ import annotations

import logging
import re
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, TypeVar

from noisebench.errors import (
    CommunicationError,
    InputError,
    InstrumentError,
    NoisebenchError,
)

from .profile import CommonProfile, ReplyError, load_profile
from .transport import Transport

logger = logging.getLogger(__name__)

__all__ = ["TIMING", "RecoveryTiming", "ScpiChannel", "compound_line", "parse_error_entry"]

T = TypeVar("T")


class OtherInstrument(CommunicationError):
    """The address answers, but with another identity: never retried."""


@dataclass
class RecoveryTiming:
    """The clock recovery waits on; tests swap in a fake one (no real waiting, no races)."""

    sleep: Callable[[float], None] = time.sleep
    monotonic: Callable[[], float] = time.monotonic


TIMING = RecoveryTiming()
_ERROR_ENTRY = re.compile(r'^\s*([+-]?\d+)\s*(?:,\s*"?(.*?)"?)?\s*$', re.DOTALL)


def parse_error_entry(reply: str) -> tuple[int, str]:
    """``-222,"Data out of range"`` -> ``(-222, "Data out of range")``."""
    match = _ERROR_ENTRY.match(reply)
    if not match:
        raise ReplyError(f"error-queue reply {reply!r} is not '<code>,\"<text>\"'")
    return int(match.group(1)), (match.group(2) or "").strip()


def compound_line(commands: Sequence[str]) -> str:
    """One program message of several units (SCPI-1999: ``;`` between units; a unit after
    ``;`` is relative to the previous header's path unless it starts at the root ``:`` or
    is a common command ``*``), e.g. ``FREQ:CENT 1E9;:INIT:IMM;*OPC?``."""
    units = [c.strip() for c in commands]
    return ";".join([units[0], *(u if u.startswith((":", "*")) else ":" + u for u in units[1:])])


def split_reply_units(reply: str) -> list[str]:
    """The response message units of one reply line (``;`` outside double quotes)."""
    units: list[str] = []
    current: list[str] = []
    quoted = False
    for char in reply:
        if char == '"':
            quoted = not quoted
        elif char == ";" and not quoted:
            units.append("".join(current).strip())
            current = []
            continue
        current.append(char)
    units.append("".join(current).strip())
    return units


class ScpiChannel:
    """Identity, error queue and retry/recovery around one transport (see module doc)."""

    def __init__(
        self,
        transport: Transport,
        common: CommonProfile,
        *,
        kind: str,
        lock: threading.RLock,
        retries: int = 2,
        restore: Callable[[], None] | None = None,
        init: Sequence[str] = (),
    ) -> None:
        if not isinstance(retries, int) or isinstance(retries, bool) or not 0 <= retries <= 10:
            raise InputError(
                "retries", f"must be an integer 0..10 (got {retries!r})", value=retries
            )
        self.transport = transport
        self.common = common
        self.kind = kind
        self.lock = lock
        self.retries = retries
        self.restore = restore
        self.init = tuple(init)
        self.identity = ""
        self.base_timeout_s = transport.timeout_s
        self.recovery_log: list[str] = []  # one line per recovery, for logs and tests
        self.needs_recovery = False
        self._unchecked: list[str] = []  # commands sent since the error queue was last read
        self._deferred: dict[str, str] = {}  # setting -> command held for the next compound
        self._in_compound: list[str] = []  # settings sent in compound lines since the last read
        # acquisitions sent without an error read since the last one (error_batch); a
        # reconnect before their read marks the step lost (the queue may have been emptied)
        self.unchecked_acquisitions = 0
        self.step_lost = False

    # -- connection --------------------------------------------------------------------

    def connect(self) -> str:
        """``*IDN?`` (liveness and identity), then ``*CLS``. Returns the identity."""
        with self.lock:
            reply = self.transport.query(self.common.identify)
            if not reply:
                raise CommunicationError(
                    f"empty reply to {self.common.identify!r}", resource=self.transport.resource
                )
            self.identity = reply
            if self.common.clear_status:
                self.transport.write(self.common.clear_status)
            logger.info("%s %s: %s", self.kind, self.transport.resource, reply)
            self.run_init()
            return reply

    def run_init(self) -> None:
        """The profile's ``init`` commands (after connecting and after a reconnect), each
        followed by an error-queue check that names it."""
        for command in self.init:
            self.transport.write(command)
            self._unchecked.append(command)
            self.check_errors(command)

    def close(self) -> None:
        self.transport.close()

    def write_safe_state(self, setting: Any, value: Any) -> bool:
        """Best effort for a safe state (drive off, output off): bring a broken stream back
        without restoring any settings, send the setting and read it back (which also makes
        sure the instrument processed it before the connection closes). Never raises; True
        when the instrument confirms the value."""
        with self.lock:
            command = setting.command(value)
            self._deferred = {}  # settings for an acquisition that will not come
            try:
                if self.needs_recovery or getattr(self.transport, "stale", False):
                    self.transport.recover()
                self.transport.write(command)
                if setting.get_cmd is None:
                    self.transport.query(self.common.operation_complete)
                    return True
                if self.get(setting) == value:
                    return True
                logger.error("%s: %r not confirmed by the read-back", self.kind, command)
            except NoisebenchError as exc:
                logger.error(
                    "%s: could not send %r for the safe state: %s", self.kind, command, exc
                )
            return False

    # -- plain I/O ---------------------------------------------------------------------

    # -- compound lines ------------------------------------------------------------------

    @property
    def compound(self) -> bool:
        """True when the profile lets settings ride in compound lines (``compound = true``
        with ``error_check = "step"``)."""
        return bool(self.common.compound) and self.common.error_check == "step"

    def defer(self, named: Sequence[tuple[str, str]]) -> None:
        """Hold ``(setting, command)`` pairs for the next compound line
        (:meth:`take_deferred`); a later command for the same setting replaces the held one,
        and any other I/O sends them first (:meth:`flush`). Only for settings the instrument
        already accepted alone since the connection was made, so a compound line never meets
        a command error that would make the instrument discard the rest of it."""
        for name, command in named:
            self._deferred[name] = command  # keeps its first place: the profile's order

    def take_deferred(self) -> list[str]:
        """The held settings' commands, now the caller's to send (:meth:`sent_compound`)."""
        taken, self._deferred = list(self._deferred.values()), {}
        return taken

    def sent_compound(self, line: str, settings: Sequence[str]) -> None:
        """Record a compound line sent by the caller and the settings it carried, so the
        next error-queue read can name the failing one."""
        self._unchecked.append(line)
        self._in_compound.extend(settings)

    def flush(self) -> None:
        """Send held settings as one line and read the error queue (the step they belong to
        ends here when no acquisition follows)."""
        if not self._deferred:
            return
        settings = self.take_deferred()
        line = compound_line(settings)
        self.transport.write(line)
        self.sent_compound(line, settings)
        self.check_errors(line)

    def send_and_read_back(self, commands: Sequence[str], settings: Sequence[Any]) -> list[Any]:
        """``commands``, each setting's read-back query and the error query in one compound
        line (one exchange); returns the settings' parsed values. An error in the line is
        raised naming the failing command (:meth:`check_errors`)."""
        self.flush()
        units = [*commands, *(s.query() for s in settings), self.common.error_query]
        line = compound_line(units)
        self.sent_compound(line, commands)
        parts = split_reply_units(self.transport.query(line))
        answers, entry = parts[:-1], parts[-1] if parts else ""
        self.check_errors("configure", first_reply=entry)
        if len(answers) != len(settings):
            raise ReplyError(f"{len(answers)} replies to the {len(settings)} queries of {line!r}")
        return [s.parse(a) for s, a in zip(settings, answers, strict=True)]

    def write(self, command: str, *, check: bool = True) -> None:
        """Send ``command``; with ``error_check = "each"`` read the error queue right after
        (``check=False`` for overlapped commands such as starting an acquisition)."""
        self.flush()
        self.transport.write(command)
        self._unchecked.append(command)
        if check and self.common.error_check == "each":
            self.check_errors(command)

    def query(self, command: str) -> str:
        self.flush()
        return self.transport.query(command)

    def set(self, setting: Any, value: Any) -> None:
        """Validate, format and send one setting (InputError before any I/O if invalid)."""
        self.write(setting.command(value))

    def get(self, setting: Any, context: dict[str, Any] | None = None) -> Any:
        """Read one setting back (or its profile ``fixed`` value) and parse it; ``context``
        gives other settings' values for a ``fixed = { by = ... }``."""
        if setting.get_cmd is None:
            if getattr(setting, "fixed", None) is None:
                setting.query()  # raises InputError naming the setting
            return setting.parse("", context)
        self.flush()
        return setting.parse(self.transport.query(setting.query()), context)

    # -- error queue -------------------------------------------------------------------

    def read_error_queue(self) -> list[tuple[int, str]]:
        """Read the SCPI error queue until it reports no error; return the entries."""
        entries: list[tuple[int, str]] = []
        for _ in range(self.common.max_error_entries):
            code, text = parse_error_entry(self.transport.query(self.common.error_query))
            if code == 0:
                return entries
            entries.append((code, text))
        raise InstrumentError(
            entries[-1][0],
            entries[-1][1],
            command=self.common.error_query,
            instrument=self.kind,
            note=f"error queue not empty after {self.common.max_error_entries} reads",
        )

    def check_errors(self, after: str, first_reply: str | None = None) -> None:
        """Drain the error queue; raise the first entry as InstrumentError naming ``after``.
        ``first_reply``: the reply to an error query that rode in a compound line (the
        queue is read on only when it holds an error)."""
        sent, self._unchecked = self._unchecked, []
        carried, self._in_compound = self._in_compound, []
        batched, self.unchecked_acquisitions = self.unchecked_acquisitions, 0
        if first_reply is None:
            entries = self.read_error_queue()
        else:
            code, text = parse_error_entry(first_reply)
            entries = [(code, text), *self.read_error_queue()] if code else []
        if not entries:
            return
        code, text = entries[0]
        more = "; ".join(f"{c},{t!r}" for c, t in entries[1:]) or None
        distinct = list(dict.fromkeys(sent))  # a batched step repeats its lines
        recent = ", ".join(distinct[-6:]) if sent and sent != [after] else None
        extra: dict[str, Any] = {}
        if batched > 1:
            # one read covered several acquisitions of a step (error_batch): say how many
            extra["in_step"] = f"{batched} acquisitions covered by one error-queue read"
        culprit = self._culprit(list(dict.fromkeys(carried))) if carried else None
        if culprit is not None:
            extra.update(in_compound=after, found_by="re-sending each setting alone")
            after = culprit
        logger.error("%s: instrument error %d %r after %r", self.kind, code, text, after)
        raise InstrumentError(
            code,
            text,
            command=after,
            instrument=self.kind,
            identity=self.identity or None,
            more_errors=more,
            commands_since_last_check=recent,
            **extra,
        )

    def _culprit(self, settings: Sequence[str]) -> str | None:
        """After an error in a step that carried ``settings`` in compound lines: send each
        setting alone and read the queue after it; the first one the instrument refuses
        again is the failing command (None: none does, e.g. the acquisition failed). The
        instrument's state is unknown after an error anyway; the driver re-sends its
        settings at the next configure."""
        for command in settings:
            self.transport.write(command)
            if self.read_error_queue():
                return command
        return None

    # -- retry and recovery ------------------------------------------------------------

    def run(self, what: str, operation: Callable[[], T]) -> T:
        """Run ``operation`` under the instrument lock with the retry policy (module doc)."""
        with self.lock:
            if self.needs_recovery:
                self._recover(None, what)
            attempt = 0
            while True:
                try:
                    return operation()
                except InstrumentError as exc:
                    raise exc.add_context(instrument=self.kind, operation=what) from None
                except CommunicationError as exc:
                    exc.add_context(instrument=self.kind, operation=what)
                    self.needs_recovery = True
                    if attempt >= self.retries:
                        raise
                    attempt += 1
                    logger.warning(
                        "%s: %s failed (%s); recovering for up to %g s, then retry %d of %d",
                        self.kind,
                        what,
                        exc,
                        self.common.retry_window_s,
                        attempt,
                        self.retries,
                    )
                    try:
                        self._recover_with_backoff(exc, what)
                    except InstrumentError:
                        raise
                    except CommunicationError as failure:
                        raise exc.add_context(recovery_failed=failure.message) from failure

    def _recover_with_backoff(self, cause: CommunicationError, what: str) -> None:
        """:meth:`_recover` until it works or ``retry_window_s`` is used up (module doc)."""
        started = TIMING.monotonic()
        delay = self.common.first_backoff_s
        tries = 0
        while True:
            tries += 1
            try:
                self._recover(cause, what)
                return
            except (InstrumentError, OtherInstrument):
                raise  # waiting does not help: the instrument said no, or is another one
            except CommunicationError as failure:
                waited = TIMING.monotonic() - started
                left = self.common.retry_window_s - waited
                if left <= 0:
                    logger.error(
                        "%s: no answer after %d recovery attempt(s) over %.1f s: %s",
                        self.kind,
                        tries,
                        waited,
                        failure,
                    )
                    self.recovery_log.append(
                        f"{what}: gave up after {tries} attempt(s) over {waited:.1f} s"
                    )
                    raise
                pause = min(delay, left)
                logger.warning(
                    "%s: not answering (%s); attempt %d failed, next in %.1f s "
                    "(%.0f s of the %g s retry window left)",
                    self.kind,
                    failure.message,
                    tries,
                    pause,
                    left,
                    self.common.retry_window_s,
                )
                TIMING.sleep(pause)
                delay = min(2.0 * delay, self.common.max_backoff_s)

    def _recover(self, cause: CommunicationError | None, what: str) -> None:
        started = time.monotonic()
        self._unchecked = []
        self._deferred, self._in_compound = {}, []  # the restore callback re-sends settings
        reconnected = self.transport.recover()
        if reconnected and self.unchecked_acquisitions:
            self.step_lost = True  # a rebooted instrument has emptied its error queue
        self.unchecked_acquisitions = 0  # (without a reconnect the read below covers them)
        with self.transport.timeout(min(self.transport.timeout_s, self.base_timeout_s)):
            self._probe()
            entries = self.read_error_queue()
        note = (  # only now, after the instrument answered, is it "reconnected"
            f"{what}: {'reconnected' if reconnected else 'cleared'} (the instrument answered "
            f"{self.common.identify}) after {cause.message if cause else 'an earlier failure'}"
        )
        self.recovery_log.append(note)
        logger.warning("%s: %s (%.3f s)", self.kind, note, time.monotonic() - started)
        if entries:
            self.needs_recovery = reconnected  # settings still to restore at the next call
            code, text = entries[0]
            command = cause.context.get("command") if cause else None
            error = InstrumentError(
                code,
                text,
                command=command or what,
                instrument=self.kind,
                identity=self.identity or None,
            )
            if cause is not None:
                raise error from cause
            raise error
        if reconnected:
            self.run_init()
        if reconnected and self.restore is not None:
            self.restore()
        self.needs_recovery = False

    def _probe(self) -> None:
        reply = self.transport.query(self.common.identify)
        if self.identity and reply != self.identity:
            raise OtherInstrument(
                f"liveness probe {self.common.identify!r} answered {reply!r}, expected "
                f"{self.identity!r}",
                resource=self.transport.resource,
            )


class SwitchedOutputInstrument:
    """Shared set-up of a SCPI instrument with one switched output (generator, DC supply).

    Put it before the instrument's ABC in the bases; the class provides ``lock`` (from
    :class:`noisebench.bench.instruments.Instrument`) and ``_restore`` (what to send after a
    reconnect)."""

    lock: Any

    if TYPE_CHECKING:  # provided by each instrument class

        def _restore(self) -> None: ...

    def _connect_output(
        self, transport: Transport, profile: Any, section: str, *, retries: int
    ) -> None:
        """Load the profile section, connect, and read the output state back."""
        self.profile = load_profile(profile)
        self.spec = self.profile.section(section)
        self.transport = transport
        self._output = False
        self._closed = False
        self._channel = ScpiChannel(
            transport,
            self.profile.common,
            kind=section,
            lock=self.lock,
            retries=retries,
            restore=self._restore,
            init=self.spec.init,
        )
        self._channel.connect()
        self._output = bool(self._channel.get(self.spec.settings.output))

    @property
    def identity(self) -> str:
        return self._channel.identity

    @property
    def output_on(self) -> bool:
        return self._output

    @property
    def recovery_log(self) -> list[str]:
        return self._channel.recovery_log
