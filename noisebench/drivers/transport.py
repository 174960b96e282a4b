"""The transport seam: one message-based session to one instrument.

:class:`Transport` is what every SCPI driver talks to: ``write``, ``query``, ``query_binary``
(an IEEE 488.2 definite-length block decoded to numbers), scoped timeouts in seconds,
``recover`` after an error and ``close``. :class:`VisaSession` implements it over pyvisa
(pyvisa-py by default: TCPIP SOCKET, VXI-11 INSTR, HiSLIP, USBTMC, serial);
:class:`noisebench.drivers.protocol.FakeTransport` implements it in memory for tests.

What VisaSession does about pyvisa-py's known behaviour on sockets (see DEVELOPERS.md):

- terminations are always set explicitly (socket resources default to none, so a read would
  end only at the timeout);
- binary blocks are read as header, then exactly the announced payload with the termination
  character switched off, then the message terminator: with the termination character on,
  pyvisa-py returns at every 0x0A byte inside the payload, which makes pyvisa's own block
  codec several times slower (``binary_reader="pyvisa"`` selects that codec anyway);
- pyvisa-py does not notice a peer that closed the connection (a read waits for the full
  timeout). Before each exchange the socket is peeked without blocking, so a dropped
  connection is reported at once as :class:`ConnectionLost`;
- ``recover`` on a socket always reconnects: replies still in flight from a timed-out query go
  to the old connection instead of being mistaken for the next answer. Other interfaces get a
  device clear (and a reconnect if that fails). pyvisa-py's ``clear()`` on a socket at
  end-of-file never returns, so it is never used on sockets;
- ``pyvisa.errors.VisaIOError`` and ``OSError`` become :class:`~noisebench.errors.InstrumentTimeout`
  or :class:`~noisebench.errors.CommunicationError`, keeping the VISA code.

Size: one seam with its back ends (VISA, raw socket, the fast block reader) and the IEEE 488.2
block decoding they share; each back end is short, and keeping them beside the abstract class
keeps the recovery and timeout rules in one place.
"""

from __future__ import annotations

import contextlib
import logging
import math
import select
import socket
import sys
import threading
import time
from abc import ABC, abstractmethod
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any, NoReturn

import numpy as np

from noisebench.errors import CommunicationError, InputError, InstrumentTimeout

logger = logging.getLogger(__name__)

__all__ = [
    "BlockError",
    "ConnectionLost",
    "Transport",
    "VisaSession",
    "decode_block_values",
    "parse_ascii_values",
    "seconds_to_ms",
    "split_definite_block",
]

_TERMINATIONS = ("\n", "\r\n", "\r")
_DTYPES = {"f": 4, "d": 8}

#: a long reply (``*OPC?``) is awaited in slices this long, checking for a closed peer between
WATCH_SLICE_S = 0.5


_DONT_WAIT = getattr(socket, "MSG_DONTWAIT", 0)  # POSIX; elsewhere every receive waits first
#: the first read of a binary reply takes up to this many bytes at once (a 1 001-point trace)
_START_READ_BYTES = 4096


class ConnectionLost(CommunicationError):
    """The connection to the instrument is gone (peer closed, broken pipe, refused)."""


class BlockError(CommunicationError):
    """A binary block was malformed, shorter or longer than its header announced."""


# ----------------------------------------------------------------------------- helpers


def seconds_to_ms(seconds: float) -> int:
    """The one place where a timeout in seconds becomes pyvisa's integer milliseconds."""
    try:
        value = float(seconds)
    except (TypeError, ValueError):
        raise InputError(
            "timeout_s", f"must be a number of seconds (got {seconds!r})", value=seconds
        ) from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(
            "timeout_s",
            f"must be a finite number of seconds > 0 (got {seconds!r})",
            value=seconds,
            fix="e.g. 5.0",
        )
    return max(1, int(math.ceil(value * 1000.0)))


def _header_length(raw: bytes, command: str) -> tuple[int, int]:
    """(offset of the payload, payload length) of a definite-length block ``#N<len>``."""
    if len(raw) < 2 or raw[:1] != b"#" or not raw[1:2].isdigit():
        raise BlockError(
            f"reply to {command!r} is not a binary block (starts {raw[:12]!r})", command=command
        )
    ndigits = int(raw[1:2])
    if ndigits == 0:
        raise BlockError(
            f"reply to {command!r} is an indefinite-length block (#0); "
            "noisebench reads definite-length blocks",
            command=command,
        )
    digits = raw[2 : 2 + ndigits]
    if len(digits) != ndigits or not digits.isdigit():
        raise BlockError(
            f"malformed block header {raw[: 2 + ndigits]!r} in reply to {command!r}",
            command=command,
        )
    return 2 + ndigits, int(digits)


def split_definite_block(raw: bytes, command: str = "?") -> bytes:
    """Payload of a complete IEEE 488.2 definite-length block (message terminator optional)."""
    start, length = _header_length(raw, command)
    payload = raw[start : start + length]
    rest = raw[start + length :]
    if len(payload) < length:
        raise BlockError(
            f"binary block from {command!r} has {len(payload)} of the {length} "
            "bytes its header announced",
            command=command,
        )
    if rest not in (b"", b"\n", b"\r\n"):
        raise BlockError(
            f"binary block from {command!r} is longer than its header announced "
            f"({len(rest)} extra bytes)",
            command=command,
        )
    return payload


def decode_block_values(
    payload: bytes, datatype: str = "f", big_endian: bool = True, command: str = "?"
) -> np.ndarray:
    """Decode a block payload of float32 (``"f"``) or float64 (``"d"``) numbers to float64."""
    if datatype not in _DTYPES:
        raise InputError("datatype", f"{datatype!r} is not supported", fix="use 'f' or 'd'")
    size = _DTYPES[datatype]
    if len(payload) % size:
        raise BlockError(
            f"binary block from {command!r} has {len(payload)} bytes, not a multiple of {size}",
            command=command,
        )
    dtype = np.dtype((">" if big_endian else "<") + f"f{size}")
    with np.errstate(invalid="ignore", over="ignore"):  # garbage is judged by the caller
        return np.frombuffer(payload, dtype=dtype).astype(np.float64)


def parse_ascii_values(text: str, command: str = "?") -> np.ndarray:
    """Comma-separated numbers (an ASCII trace) to float64."""
    try:
        return np.array([float(item) for item in text.strip().split(",")], dtype=np.float64)
    except ValueError:
        raise CommunicationError(
            f"reply to {command!r} is not a comma-separated list of numbers (starts {text[:40]!r})",
            command=command,
        ) from None


# ----------------------------------------------------------------------------- the seam


class Transport(ABC):
    """One message-based session to one instrument. Timeouts are in seconds."""

    resource: str = "?"

    @property
    @abstractmethod
    def timeout_s(self) -> float:
        """The timeout in force, seconds."""

    @abstractmethod
    def _set_timeout_s(self, seconds: float) -> None:
        """Change the timeout (seconds)."""

    @contextmanager
    def timeout(self, seconds: float) -> Iterator[None]:
        """Scoped timeout: ``with session.timeout(12.0): ...`` restores the previous one."""
        seconds_to_ms(seconds)  # validates
        previous = self.timeout_s
        self._set_timeout_s(seconds)
        try:
            yield
        finally:
            try:
                self._set_timeout_s(previous)
            except CommunicationError:  # the session died meanwhile; reopening restores it
                logger.debug("%s: could not restore the timeout", self.resource)

    @abstractmethod
    def write(self, command: str) -> None:
        """Send one command line."""

    @abstractmethod
    def query(self, command: str) -> str:
        """Send a query and return its reply without the termination."""

    @abstractmethod
    def query_binary(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> np.ndarray:
        """Send a query answered by a definite-length binary block; return the numbers (a
        float array; its dtype may be the block's own, e.g. big-endian float32, where a reader
        returns the received bytes without a copy). ``timeout_s`` (default: the session's)
        bounds the whole block."""

    @property
    def reads_block_then_text(self) -> bool:
        """True when :meth:`query_block_then_text` is available."""
        return False

    def query_block_then_text(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> tuple[np.ndarray | None, str]:
        """``command`` is a compound line whose first unit answers with a definite-length
        block and whose second with text (``TRAC?;:SYST:ERR?``): the block's numbers and the
        text after the ``;``. When the first unit sent no block (it failed, and a failed
        query has no reply unit) the numbers are None and the text is the whole reply."""
        raise NotImplementedError(f"{type(self).__name__} cannot read a block then text")

    def query_watched(self, command: str, limit_s: float) -> str:
        """A query whose reply may take up to ``limit_s`` (``*OPC?`` after a long acquisition).
        Back ends that can see the peer close the connection fail over at once instead of
        waiting out the limit; this default simply waits."""
        with self.timeout(limit_s):
            return self.query(command)

    @abstractmethod
    def recover(self) -> bool:
        """Bring the stream back to a clean state after an error; True if it reconnected
        (the instrument's settings may then have been lost and must be verified)."""

    @abstractmethod
    def close(self) -> None:
        """Release the session. Idempotent."""

    @property
    @abstractmethod
    def is_open(self) -> bool:
        """True while the session is usable."""

    def __repr__(self) -> str:
        state = "open" if self.is_open else "closed"
        return f"<{type(self).__name__} {self.resource!r} {state}>"


# ----------------------------------------------------------------------------- pyvisa


def _resource_manager(visa_library: str):
    import pyvisa

    try:
        return pyvisa.ResourceManager(visa_library)
    except (OSError, ValueError, pyvisa.errors.Error) as exc:
        raise CommunicationError(
            f"cannot load the VISA library {visa_library!r}: {exc}",
            visa_library=visa_library,
        ).add_context(
            fix="install pyvisa-py (pip install pyvisa-py) for '@py', or give the "
            "path of a VISA library"
        ) from exc


class VisaSession(Transport):
    """A pyvisa session with explicit terminations, scoped timeouts and a fast block read.

    ``resource`` is a VISA resource string (``TCPIP0::host::5025::SOCKET``,
    ``TCPIP::host::INSTR``, ``TCPIP::host::hislip0::INSTR``, ``USB0::...::INSTR``,
    ``ASRL/dev/ttyUSB0::INSTR``). ``visa_library`` is given to ``pyvisa.ResourceManager``
    (``"@py"``: pyvisa-py). ``binary_reader`` is ``"fast"`` or ``"pyvisa"``.
    """

    def __init__(
        self,
        resource: str,
        *,
        visa_library: str = "@py",
        timeout_s: float = 5.0,
        read_termination: str = "\n",
        write_termination: str = "\n",
        binary_reader: str = "fast",
        open_timeout_s: float = 5.0,
        baud_rate: int | None = None,
        resource_manager=None,
    ) -> None:
        if not isinstance(resource, str) or not resource.strip() or "\n" in resource:
            raise InputError(
                "resource",
                f"not a VISA resource string: {resource!r}",
                value=resource,
                fix="e.g. 'TCPIP0::192.168.1.20::5025::SOCKET'",
            )
        for name, term in (
            ("read_termination", read_termination),
            ("write_termination", write_termination),
        ):
            if term not in _TERMINATIONS:
                raise InputError(
                    name, f"must be one of {_TERMINATIONS!r} (got {term!r})", value=term
                )
        if binary_reader not in ("fast", "pyvisa"):
            raise InputError(
                "binary_reader",
                f"must be 'fast' or 'pyvisa' (got {binary_reader!r})",
                value=binary_reader,
            )
        seconds_to_ms(timeout_s)
        self.resource = resource.strip()
        self.visa_library = visa_library
        self.read_termination = read_termination
        self.write_termination = write_termination
        self.binary_reader = binary_reader
        self.open_timeout_s = float(open_timeout_s)
        self.baud_rate = baud_rate
        self.reconnects = 0
        self._timeout_s = float(timeout_s)
        self._read_limit_s = self._timeout_s  # the limit of the block read in progress
        self._spare_block: np.ndarray | None = None  # see _block_buffer
        self._lock = threading.RLock()
        self._rm = (
            resource_manager if resource_manager is not None else _resource_manager(visa_library)
        )
        # the open pyvisa resource (pyvisa is imported lazily and ships no types we rely on)
        self._res: Any = None
        self._kept_session: tuple[Any, Any] | None = None  # see _visa_session
        self._is_socket = False
        self._stale = False
        self._open()

    # -- lifecycle ---------------------------------------------------------------------

    def _open(self) -> None:
        import pyvisa

        try:
            res = self._rm.open_resource(
                self.resource, open_timeout=seconds_to_ms(self.open_timeout_s)
            )
            res.read_termination = self.read_termination
            res.write_termination = self.write_termination
            res.timeout = seconds_to_ms(self._timeout_s)
            if (
                self.baud_rate is not None
                and res.interface_type == pyvisa.constants.InterfaceType.asrl
            ):
                res.baud_rate = int(self.baud_rate)
        except (pyvisa.errors.Error, OSError, ValueError, AttributeError) as exc:
            code = getattr(exc, "error_code", None)
            raise CommunicationError(
                f"cannot open {self.resource!r}: {_open_failure_words(exc, self.open_timeout_s)}",
                visa_code=code,
                resource=self.resource,
            ).add_context(
                fix="check the address, that the instrument is on and reachable, and for "
                "USB/serial that pyusb/pyserial are installed"
            ) from exc
        except Exception as exc:  # noqa: BLE001 - pyvisa-py raises bare Exception on connect
            raise CommunicationError(
                f"cannot open {self.resource!r}: {exc}", resource=self.resource
            ) from exc
        self._res = res
        self._is_socket = getattr(res, "resource_class", "") == "SOCKET"
        if self._is_socket:
            self._require_connected()
            self._no_delay()
        if self.binary_reader == "fast" and not self._termchar_switchable():
            logger.info(
                "%s: the termination character cannot be switched off; binary blocks "
                "go through pyvisa's codec",
                self.resource,
            )
            self.binary_reader = "pyvisa"
        logger.info("opened %s (%s)", self.resource, self.visa_library)

    def _require_connected(self) -> None:
        """pyvisa-py returns a SOCKET resource whose connect failed (refused, unreachable)
        without an error; ask the socket itself, so the failure is named at open, not as a
        'closed connection' at the first command."""
        sock = self._socket()
        if sock is None:
            return
        error = 0
        try:
            sock.getpeername()
            return
        except OSError:
            try:
                error = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
                if error == 0:  # still connecting: wait for the outcome
                    select.select([], [sock], [], self.open_timeout_s)
                    error = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
                    if error == 0:
                        sock.getpeername()
                        return
            except OSError as exc:
                error = exc.errno or 0
        self.close()
        raise CommunicationError(
            f"cannot connect to {self.resource!r}: {_socket_error_words(error)}",
            resource=self.resource,
        )

    def _termchar_switchable(self) -> bool:
        """The fast block read needs VI_ATTR_TERMCHAR_EN writable (some back ends refuse)."""
        from pyvisa import constants

        try:
            value = self._res.get_visa_attribute(constants.VI_ATTR_TERMCHAR_EN)
            self._res.set_visa_attribute(constants.VI_ATTR_TERMCHAR_EN, value)
            return True
        except Exception as exc:  # noqa: BLE001 - any refusal means: use pyvisa's codec
            logger.debug("%s: VI_ATTR_TERMCHAR_EN not writable: %s", self.resource, exc)
            return False

    def _no_delay(self) -> None:
        """Send small commands at once. With Nagle's algorithm on, a command followed by a
        query waits for the instrument's delayed ACK (measured ~45 ms per command on
        loopback). pyvisa-py 0.8 cannot set VI_ATTR_TCPIP_NODELAY, so the socket is set."""
        from pyvisa import constants

        try:
            self._res.set_visa_attribute(constants.VI_ATTR_TCPIP_NODELAY, constants.VI_TRUE)
            return
        except Exception as exc:  # noqa: BLE001 - pyvisa-py raises its own UnknownAttribute
            logger.debug("%s: VI_ATTR_TCPIP_NODELAY refused (%s)", self.resource, exc)
        sock = self._socket()
        if sock is not None:
            try:
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            except OSError as exc:
                logger.debug("%s: TCP_NODELAY not set: %s", self.resource, exc)

    def _close_resource(self) -> None:
        res, self._res = self._res, None
        if res is None:
            return
        try:
            res.close()
        except Exception as exc:  # noqa: BLE001 - closing a dead session is best effort
            logger.debug("%s: close failed: %s", self.resource, exc)

    def reconnect(self) -> None:
        """Close and reopen the session (terminations and timeout re-applied)."""
        with self._lock:
            self._close_resource()
            self._open()
            self._stale = False
            self.reconnects += 1
            # not "reconnected": opening a socket session succeeds even when nothing listens;
            # the driver says so once the instrument answers
            logger.info("%s: session reopened (%d so far)", self.resource, self.reconnects)

    def recover(self) -> bool:
        with self._lock:
            if self._res is None or self._is_socket:
                self.reconnect()
                return True
            try:
                with self._io("device clear"):
                    self._res.clear()
                self._stale = False
                return False
            except CommunicationError:
                self.reconnect()
                return True

    @property
    def stale(self) -> bool:
        """True after a failed exchange, until :meth:`recover` or :meth:`reconnect`."""
        return self._stale

    def close(self) -> None:
        """Close the resource. The resource manager stays open: pyvisa shares one per VISA
        library, and closing it would close every other session of the process."""
        with self._lock:
            self._close_resource()

    @property
    def is_open(self) -> bool:
        return self._res is not None

    # -- timeouts ----------------------------------------------------------------------

    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    def _set_timeout_s(self, seconds: float) -> None:
        ms = seconds_to_ms(seconds)
        with self._lock:
            self._timeout_s = float(seconds)
            if self._res is not None:
                with self._io("set timeout"):
                    self._res.timeout = ms

    # -- I/O ---------------------------------------------------------------------------

    @contextmanager
    def _io(self, command: str) -> Iterator[None]:
        """Translate pyvisa and OS errors into noisebench's, with the command and VISA code."""
        import pyvisa
        from pyvisa import constants

        if self._res is None:
            raise ConnectionLost(
                f"session to {self.resource!r} is closed", command=command, resource=self.resource
            )
        try:
            yield
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise InstrumentTimeout(
                    f"no reply to {command!r} within {self._timeout_s:g} s",
                    visa_code=exc.error_code,
                    command=command,
                    resource=self.resource,
                ) from exc
            cls = (
                ConnectionLost
                if exc.error_code
                in (
                    constants.StatusCode.error_connection_lost,
                    constants.StatusCode.error_invalid_object,
                )
                else CommunicationError
            )
            raise cls(
                f"VISA error during {command!r}: {exc.abbreviation}",
                visa_code=exc.error_code,
                command=command,
                resource=self.resource,
            ) from exc
        except OSError as exc:
            raise ConnectionLost(
                f"connection lost during {command!r}: {exc}",
                command=command,
                resource=self.resource,
            ) from exc
        except UnicodeDecodeError as exc:
            raise CommunicationError(
                f"reply to {command!r} is not text", command=command, resource=self.resource
            ) from exc

    def _socket(self) -> socket.socket | None:
        """pyvisa-py's socket behind a SOCKET resource (None for other back ends)."""
        session = self._visa_session()
        sock = getattr(session, "interface", None)
        return sock if isinstance(sock, socket.socket) else None

    def _visa_session(self) -> Any:
        """pyvisa-py's session object behind a SOCKET resource (None for other back ends),
        looked up once per opened resource: every exchange asks for it (the closed-peer
        check, the direct block reader), and a new resource (reconnect) is looked up anew."""
        res = self._res
        if not self._is_socket or res is None:
            return None
        kept = self._kept_session
        if kept is not None and kept[0] is res:
            return kept[1]
        import pyvisa

        try:
            session = res.visalib.sessions[res.session]
        except (AttributeError, KeyError, TypeError, pyvisa.errors.Error):
            return None
        self._kept_session = (res, session)
        return session

    def peer_closed(self) -> bool:
        """True when the instrument closed a socket connection (checked without blocking)."""
        sock = self._socket()
        if sock is None:
            return False
        try:
            readable, _, _ = select.select([sock], [], [], 0)
            if not readable:
                return False
            return sock.recv(1, socket.MSG_PEEK) == b""
        except (OSError, ValueError):
            return True

    @contextmanager
    def _exchange(self, command: str) -> Iterator[None]:
        """One exchange under the lock. A session whose last exchange failed midway is out of
        step (a late reply may still arrive), so it refuses I/O until :meth:`recover`."""
        with self._lock:
            if self._res is None or self.peer_closed():
                self._stale = True
                raise ConnectionLost(
                    f"the instrument closed the connection (before {command!r})",
                    command=command,
                    resource=self.resource,
                )
            if self._stale:
                raise CommunicationError(
                    f"session out of step after an earlier error (before "
                    f"{command!r}); recover() first",
                    command=command,
                    resource=self.resource,
                )
            try:
                yield
            except BaseException:
                self._stale = True
                raise

    def write(self, command: str) -> None:
        with self._exchange(command):
            logger.debug("%s << %s", self.resource, command)
            with self._io(command):
                self._res.write(command)

    def query(self, command: str) -> str:
        with self._exchange(command):
            logger.debug("%s << %s", self.resource, command)
            with self._io(command):
                reply = self._res.query(command)
            logger.debug("%s >> %s", self.resource, reply[:200])
            return reply.strip()

    def query_watched(self, command: str, limit_s: float) -> str:
        """Wait for the reply in slices of at most :data:`WATCH_SLICE_S` (``select`` on the
        socket, no VISA timeout changes), checking between slices whether the instrument
        closed the socket: a dropped connection then fails at once (ConnectionLost) instead
        of after the whole limit. Once the reply starts arriving it is read with the
        session's timeout."""
        sock = self._socket()
        if sock is None:
            return super().query_watched(command, limit_s)
        deadline = time.monotonic() + limit_s
        with self._exchange(command):
            logger.debug("%s << %s (watched, %.3g s)", self.resource, command, limit_s)
            with self._io(command):
                self._res.write(command)
            while not self._reply_pending(sock):
                left = deadline - time.monotonic()
                if left <= 0:
                    raise InstrumentTimeout(
                        f"no reply to {command!r} within {limit_s:g} s",
                        command=command,
                        resource=self.resource,
                    )
                try:
                    ready = select.select([sock], [], [], min(WATCH_SLICE_S, left))[0]
                except (OSError, ValueError):
                    ready = [sock]  # let the peer check below decide
                if ready and self.peer_closed():
                    raise ConnectionLost(
                        f"the instrument closed the connection while {command!r} waited",
                        command=command,
                        resource=self.resource,
                    )
            with self._io(command):
                reply = self._res.read()
            return reply.strip()

    def _reply_pending(self, sock: socket.socket) -> bool:
        """True when reply bytes are buffered by pyvisa-py or waiting on the socket."""
        session = self._res.visalib.sessions.get(self._res.session)
        if getattr(session, "_pending_buffer", None):
            return True
        try:
            return bool(select.select([sock], [], [], 0)[0]) and not self.peer_closed()
        except (OSError, ValueError):
            return False

    def query_binary(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> np.ndarray:
        if datatype not in _DTYPES:
            raise InputError("datatype", f"{datatype!r} is not supported", fix="use 'f' or 'd'")
        direct = self._direct_socket() if self.binary_reader != "pyvisa" else None
        if direct is not None:  # the deadline is ours: no VISA timeout to change
            with self._exchange(command):
                logger.debug("%s << %s (binary)", self.resource, command)
                with self._io(command):
                    direct[0].sendall((command + self.write_termination).encode("ascii"))
                dtype = np.dtype((">" if big_endian else "<") + f"f{_DTYPES[datatype]}")
                limit = self._timeout_s if timeout_s is None else timeout_s
                values, _ = self._read_block_direct(command, *direct, dtype, limit)
                assert values is not None  # without then_text a missing block raises
                return values
        scope = self.timeout(timeout_s) if timeout_s is not None else contextlib.nullcontext()
        with scope, self._exchange(command):
            logger.debug("%s << %s (binary)", self.resource, command)
            if self.binary_reader == "pyvisa":
                return self._query_binary_pyvisa(command, datatype, big_endian)
            with self._io(command):
                self._res.write(command)
            payload = self._read_block(command)
            return decode_block_values(payload, datatype, big_endian, command)

    @property
    def reads_block_then_text(self) -> bool:
        """The direct socket reader can (pyvisa's block reader cannot)."""
        return self.binary_reader != "pyvisa" and self._direct_socket() is not None

    def query_block_then_text(
        self,
        command: str,
        *,
        datatype: str = "f",
        big_endian: bool = True,
        timeout_s: float | None = None,
    ) -> tuple[np.ndarray | None, str]:
        if datatype not in _DTYPES:
            raise InputError("datatype", f"{datatype!r} is not supported", fix="use 'f' or 'd'")
        direct = self._direct_socket() if self.binary_reader != "pyvisa" else None
        if direct is None:
            return super().query_block_then_text(command)
        with self._exchange(command):
            logger.debug("%s << %s (binary, then text)", self.resource, command)
            with self._io(command):
                direct[0].sendall((command + self.write_termination).encode("ascii"))
            dtype = np.dtype((">" if big_endian else "<") + f"f{_DTYPES[datatype]}")
            limit = self._timeout_s if timeout_s is None else timeout_s
            return self._read_block_direct(command, *direct, dtype, limit, then_text=True)

    def _query_binary_pyvisa(self, command: str, datatype: str, big_endian: bool) -> np.ndarray:
        with self._io(command):
            try:
                values = self._res.query_binary_values(
                    command,
                    datatype=datatype,
                    is_big_endian=big_endian,
                    container=np.array,
                    expect_termination=True,
                )
            except (ValueError, TypeError) as exc:  # pyvisa's header/length checks
                raise BlockError(
                    f"bad binary block from {command!r}: {exc}",
                    command=command,
                    resource=self.resource,
                ) from exc
        return np.asarray(values, dtype=np.float64)

    # -- definite-length block, read by length ------------------------------------------

    @contextmanager
    def _raw_reads(self) -> Iterator[None]:
        """Switch the termination character (and serial END-on-termchar) off, then back on."""
        from pyvisa import constants

        res = self._res
        changed: list[tuple[int, object]] = []
        try:
            for attr, off in (
                (constants.VI_ATTR_TERMCHAR_EN, constants.VI_FALSE),
                (constants.VI_ATTR_ASRL_END_IN, constants.VI_ASRL_END_NONE),
            ):
                if (
                    attr == constants.VI_ATTR_ASRL_END_IN
                    and res.interface_type != constants.InterfaceType.asrl
                ):
                    continue
                changed.append((attr, res.get_visa_attribute(attr)))
                res.set_visa_attribute(attr, off)
            yield
        finally:
            for attr, value in reversed(changed):
                try:
                    res.set_visa_attribute(attr, value)
                except Exception as exc:  # noqa: BLE001 - a dead session is reopened anyway
                    logger.debug(
                        "%s: could not restore attribute %#x: %s", self.resource, attr, exc
                    )

    # -- definite-length block straight from the socket ------------------------------------

    def _direct_socket(self) -> tuple[socket.socket, bytearray] | None:
        """pyvisa-py's socket and its buffer of bytes already received, for reading a block
        without pyvisa-py's 4 kB receive loop and its copies; None for any other back end."""
        session = self._visa_session()
        sock = getattr(session, "interface", None)
        if not isinstance(sock, socket.socket):
            return None
        pending = getattr(session, "_pending_buffer", None)  # pyvisa-py replaces it: read anew
        return (sock, pending) if isinstance(pending, bytearray) else None

    def _read_block_direct(
        self,
        command: str,
        sock: socket.socket,
        pending: bytearray,
        dtype: np.dtype,
        limit_s: float | None = None,
        *,
        then_text: bool = False,
    ) -> tuple[np.ndarray | None, str]:
        """Header, then payload and terminator received into one buffer; the values are that
        buffer seen as ``dtype`` (the instrument's own numbers, no copy, no conversion: a
        computation converts them where it needs float64, as :class:`Trace` does once); the
        same checks and errors as :meth:`_read_block` and :func:`decode_block_values`.
        ``limit_s`` (default the session timeout) bounds the whole block. ``then_text``: a
        ``;`` and a text reply unit follow the block (see :meth:`query_block_then_text`);
        returns (values, text)."""
        limit = self._timeout_s if limit_s is None else limit_s
        self._read_limit_s = limit  # for the timeout message
        deadline = time.monotonic() + limit
        if not pending:  # the reply's start: one wait, then what is queued in one call
            self._recv_start(sock, pending, deadline, command)
        head = bytearray(2)
        self._recv_into(sock, pending, memoryview(head), deadline, command, "header")
        if then_text and head[:1] != b"#":  # no block: the text is the whole reply
            line = head + (
                b"" if b"\n" in head else self._recv_line(sock, pending, deadline, command)
            )
            return None, line.decode("ascii", "replace").strip()
        if head[:1] != b"#" or not head[1:2].isdigit():
            raise BlockError(
                f"reply to {command!r} is not a binary block (starts {bytes(head)!r})",
                command=command,
                resource=self.resource,
            )
        digits = bytearray(int(head[1:2]))
        self._recv_into(sock, pending, memoryview(digits), deadline, command, "header")
        _, length = _header_length(bytes(head + digits), command)
        if length % dtype.itemsize:
            raise BlockError(
                f"binary block from {command!r} has {length} bytes, not a multiple of "
                f"{dtype.itemsize}",
                command=command,
                resource=self.resource,
            )
        buffer = self._block_buffer(length + 1)  # payload and the terminator
        view = buffer.data  # a writable memoryview of the buffer
        values = np.frombuffer(buffer, dtype=dtype, count=length // dtype.itemsize)
        self._recv_into(sock, pending, view, deadline, command, "payload", length)
        if then_text and buffer[length] == 0x3B:  # ';' then the text unit
            text = self._recv_line(sock, pending, deadline, command)
            return values, text.decode("ascii", "replace").strip()
        if buffer[length] == 0x0D:  # CR LF
            self._recv_into(sock, pending, view[length:], deadline, command, "terminator")
        if buffer[length] != 0x0A:
            raise BlockError(
                f"binary block from {command!r} is longer than its header "
                f"announced (next byte {bytes(buffer[length : length + 1])!r})",
                command=command,
                resource=self.resource,
            )
        if then_text:
            raise BlockError(
                f"no second reply unit after the binary block from {command!r}",
                command=command,
                resource=self.resource,
            )
        return values, ""

    def _block_buffer(self, size: int) -> np.ndarray:
        """A buffer of ``size`` bytes for a block: the last block's when no array refers to it
        any more (a trace's values are converted to float64 when the Trace is made, which lets
        go of them), so a sweep of traces reuses memory whose pages are already mapped; else a
        new one (np.empty: the socket overwrites it, no zeroing). Never shared with an array
        still in use: the reference count says whether one is (CPython)."""
        spare = self._spare_block
        # references: the attribute, the local name, getrefcount's argument
        if spare is not None and spare.size >= size and sys.getrefcount(spare) <= 3:
            return spare[:size]
        spare = np.empty(size, dtype=np.uint8)
        self._spare_block = spare
        return spare

    def _recv_line(
        self, sock: socket.socket, pending: bytearray, deadline: float, command: str
    ) -> bytes:
        """Bytes up to and including the message terminator (a short text reply)."""
        line = bytearray()
        one = bytearray(1)
        while True:
            cut = pending.find(b"\n")
            if cut >= 0:
                line += pending[: cut + 1]
                del pending[: cut + 1]
                return bytes(line)
            line += pending
            pending.clear()
            self._recv_into(sock, pending, memoryview(one), deadline, command, "terminator")
            line += one
            if one == b"\n":
                return bytes(line)
            if _DONT_WAIT:  # take the rest already queued in one call
                try:
                    pending += sock.recv(4096, _DONT_WAIT)
                except OSError:  # nothing queued (or a broken socket: the next read says)
                    pass

    def _recv_start(
        self, sock: socket.socket, pending: bytearray, deadline: float, command: str
    ) -> None:
        """Wait for the start of a reply and append what has arrived (up to
        :data:`_START_READ_BYTES`) to ``pending``: a short trace, its terminator and the text
        after it come in one call instead of one per part (header, length digits, payload,
        text). Longer payloads go on straight into their buffer (:meth:`_recv_into`)."""
        remaining = deadline - time.monotonic()
        ready = remaining > 0 and select.select([sock], [], [], remaining)[0]
        if not ready:
            self._raise_short_read(command, "header", 0, None, closed=False)
        got = sock.recv(_START_READ_BYTES)
        if not got:
            self._raise_short_read(command, "header", 0, None, closed=True)
        pending += got

    def _recv_into(
        self,
        sock: socket.socket,
        pending: bytearray,
        out: memoryview,
        deadline: float,
        command: str,
        part: str,
        payload_bytes: int | None = None,
    ) -> None:
        """Fill ``out`` from pyvisa-py's pending bytes, then from the socket, by ``deadline``.
        Data already queued is taken without a ``select`` call."""
        filled = min(len(pending), len(out))
        if filled:
            out[:filled] = pending[:filled]
            del pending[:filled]
        while filled < len(out):
            try:
                got = sock.recv_into(out[filled:], 0, _DONT_WAIT) if _DONT_WAIT else None
            except BlockingIOError:
                got = None
            if got is None:  # nothing queued: wait for more
                remaining = deadline - time.monotonic()
                ready = remaining > 0 and select.select([sock], [], [], remaining)[0]
                got = sock.recv_into(out[filled:]) if ready else None
                if got is None:
                    self._raise_short_read(command, part, filled, payload_bytes, closed=False)
            if got == 0:
                self._raise_short_read(command, part, filled, payload_bytes, closed=True)
            filled += got

    def _raise_short_read(
        self, command: str, part: str, filled: int, payload_bytes: int | None, *, closed: bool
    ) -> NoReturn:
        if part == "payload" and payload_bytes is not None and filled < payload_bytes:
            message = (
                f"binary block from {command!r} incomplete: the header announced "
                f"{payload_bytes} bytes, the data stopped after {filled} (truncated block or "
                f"dropped connection)"
            )
        elif part in ("payload", "terminator"):
            message = f"no message terminator after the binary block from {command!r}"
        elif closed:
            raise ConnectionLost(
                f"connection lost during {command!r}", command=command, resource=self.resource
            )
        else:
            raise InstrumentTimeout(
                f"no reply to {command!r} within {self._read_limit_s:g} s",
                command=command,
                resource=self.resource,
            )
        raise BlockError(message, command=command, resource=self.resource)

    def _read_exact(self, count: int) -> bytes:
        return bytes(self._res.read_bytes(count, chunk_size=max(count, 1)))

    def _read_block(self, command: str) -> bytes:
        with self._io(command), self._raw_reads():
            head = self._read_exact(2)
            if head[:1] != b"#" or not head[1:2].isdigit():
                raise BlockError(
                    f"reply to {command!r} is not a binary block (starts {head!r})",
                    command=command,
                    resource=self.resource,
                )
            ndigits = int(head[1:2])
            digits = self._read_exact(ndigits) if ndigits else b""
            _, length = _header_length(head + digits, command)
        payload = self._read_payload(command, length)
        self._read_terminator(command)
        return payload

    def _read_payload(self, command: str, length: int) -> bytes:
        try:
            with self._io(command), self._raw_reads():
                return self._read_exact(length) if length else b""
        except InstrumentTimeout as exc:
            raise BlockError(
                f"binary block from {command!r} incomplete: the header announced {length} "
                f"bytes, the data stopped (truncated block or dropped connection)",
                visa_code=exc.visa_code,
                command=command,
                resource=self.resource,
            ) from exc

    def _read_terminator(self, command: str) -> None:
        try:
            with self._io(command), self._raw_reads():
                end = self._read_exact(1)
                if end == b"\r":
                    end = self._read_exact(1)
        except InstrumentTimeout as exc:
            raise BlockError(
                f"no message terminator after the binary block from {command!r}",
                visa_code=exc.visa_code,
                command=command,
                resource=self.resource,
            ) from exc
        if end != b"\n":
            raise BlockError(
                f"binary block from {command!r} is longer than its header "
                f"announced (next byte {end!r})",
                command=command,
                resource=self.resource,
            )


def _socket_error_words(errno_code: int) -> str:
    """What a failed TCP connect means on a bench, in words, with what to check."""
    import errno
    import os

    if errno_code == errno.ECONNREFUSED:
        return (
            "connection refused: the host answered but nothing listens on that port; check the "
            "port number (5025 is the usual SCPI socket port), that the instrument's SCPI "
            "socket server is enabled and that no other program holds its only connection"
        )
    if errno_code in (errno.EHOSTUNREACH, errno.ENETUNREACH, errno.ETIMEDOUT, 0):
        return (
            "the host does not answer (unreachable or timed out); check the IP address, the "
            "network cable and subnet, that the instrument is on, and firewalls"
        )
    return f"{os.strerror(errno_code)}; check the address and that the instrument is on"


def _open_failure_words(exc: BaseException, open_timeout_s: float) -> str:
    """A VISA open failure in words; the numeric VISA code stays in the error's context."""
    from pyvisa import constants

    code = getattr(exc, "error_code", None)
    if code == constants.StatusCode.error_timeout:
        return (
            f"no connection within {open_timeout_s:g} s: the host is unreachable or does not "
            "answer on that port; check the IP address, the network cable and subnet, that the "
            "instrument is on, and firewalls"
        )
    if code == constants.StatusCode.error_resource_not_found:
        return "no such resource: check the address string and that the instrument is connected"
    if code == constants.StatusCode.error_resource_busy:
        return "the resource is busy: another program holds the instrument; close it first"
    abbreviation = getattr(exc, "description", None)
    return str(abbreviation or exc)
