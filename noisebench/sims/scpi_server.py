"""A TCP SCPI server that exposes a simulated bench, with switchable faults for tests.

Each simulated instrument listens on its own port (raw socket, ``\\n``-terminated messages;
``\\r\\n`` accepted): the analyzer, the generator and the DC supply that drives the noise
source. Each client connection gets a thread; all instruments share one lock around the
simulated bench, so several clients can talk at once. Replies end with ``\\n``; several
queries on one line give one reply line with ``;`` between the response units (IEEE 488.2).

>>> from noisebench.sims.bench import SimulatedBench
>>> with SimServer(SimulatedBench.from_scenario("demo-lna", seed=1)) as server:  # doctest: +SKIP
...     server.resource("analyzer")
'TCPIP0::127.0.0.1::40123::SOCKET'

:class:`Faults` switches make the transport misbehave the way real instruments and networks
do (late replies, dropped connections, broken binary blocks, a noise source that never
switches, a reboot). Block faults are one-shot; see ``noisebench/sims/SCPI.md``.
"""

from __future__ import annotations

import ipaddress
import logging
import selectors
import socket
import struct
import threading
from typing import Any

from noisebench import __version__
from noisebench.errors import InputError

from .scpi_analyzer import AnalyzerScpi
from .scpi_compact import CompactAnalyzerScpi
from .scpi_instruments import (
    Block,
    GeneratorScpi,
    InstrumentGone,
    LoGeneratorScpi,
    Response,
    ScpiInstrument,
    SupplyScpi,
    WallClock,
)
from .scpi_parser import ScpiError

logger = logging.getLogger(__name__)

__all__ = ["INSTRUMENTS", "Faults", "SimServer"]

#: Analyzer command sets: the generic one (SCPI.md) and a second dialect (scpi_compact.py).
ANALYZER_DIALECTS = {"generic": AnalyzerScpi, "compact": CompactAnalyzerScpi}

#: Instrument names, in port order (analyzer on PORT, generator on PORT+1, supply on PORT+2,
#: the LO generator of a frequency-converting DUT on PORT+3).
INSTRUMENTS = ("analyzer", "generator", "supply", "lo")

MAX_LINE_BYTES = 1 << 20
_RECV_BYTES = 65536


class Faults:
    """Fault switches of one server; all off by default, settable at any time.

    - ``reply_delay_s``: wait this long before every reply.
    - ``hold_replies``: keep every reply back until it is switched off again (tests of
      timeouts use it so that a reply can never arrive early, however loaded the machine).
    - ``drop_after_commands``: the next N received lines are processed, then the connection
      that received the N-th is closed (0: the next line is not processed, its connection is
      closed). Fires once, then resets to ``None``.
    - ``drop_mid_block``: the next binary block stops halfway and the connection closes.
    - ``truncate_block``: the next binary block is shorter than its header says (half the
      payload, then the terminator); the connection stays open.
    - ``corrupt_block``: the next binary block has a malformed header (``#X...``).
    - ``stuck_noise_source``: noise-source drive commands are accepted and reported, but the
      source never switches (a dead diode: the supply still measures its normal load current,
      only Y = 1 gives it away). Clearing it lets the source follow its drives again.

    - ``refuse_header``: every set command whose header is this one (short form as sent, e.g.
      ``FREQ:CENT``) is refused with -221 "Settings conflict" and not applied, the rest of
      its line runs (an execution error, IEEE 488.2); ``None`` (default): off.

    - ``offline``: the instruments are unreachable (switched off, rebooting, cable out): open
      connections are dropped and new ones are reset as soon as they are accepted. Combine
      with :meth:`reboot` for an instrument that comes back with power-on settings.

    Block switches are one-shot: they fire on the next binary block and turn themselves off.
    """

    _SWITCHES = (
        "reply_delay_s",
        "hold_replies",
        "drop_after_commands",
        "drop_mid_block",
        "truncate_block",
        "corrupt_block",
        "stuck_noise_source",
        "refuse_header",
        "offline",
    )

    def __init__(self) -> None:
        self._server: SimServer | None = None
        self._lock = threading.Lock()
        self.reply_delay_s: float = 0.0
        self.hold_replies = False
        self.drop_after_commands: int | None = None
        self.drop_mid_block = False
        self.truncate_block = False
        self.corrupt_block = False
        self.stuck_noise_source = False
        self.refuse_header: str | None = None
        self.offline = False

    def __setattr__(self, name: str, value: Any) -> None:
        if name == "reply_delay_s" and (value is None or float(value) < 0):
            raise ValueError("reply_delay_s must be >= 0")
        if name == "drop_after_commands" and value is not None and int(value) < 0:
            raise ValueError("drop_after_commands must be None or >= 0")
        changed = name in self._SWITCHES and getattr(self, name, None) != value
        object.__setattr__(self, name, value)
        server = self.__dict__.get("_server")
        if changed and server is not None:
            server._fault_changed(name)

    def push_error(self, code: int, text: str, instrument: str | None = None) -> None:
        """Put ``code,"text"`` in the error queue of ``instrument`` (None: every instrument)."""
        self._require_server().push_error(code, text, instrument)

    def reboot(self) -> None:
        """Instrument reboot: the bench and every instrument back to power-on defaults,
        error queues emptied (``*ESR`` shows power-on), all client connections dropped."""
        self._require_server().reboot()

    def clear(self) -> None:
        """Every switch off."""
        self.reply_delay_s = 0.0
        self.hold_replies = False
        self.drop_after_commands = None
        self.drop_mid_block = False
        self.truncate_block = False
        self.corrupt_block = False
        self.stuck_noise_source = False
        self.refuse_header = None
        self.offline = False

    def _take_drop(self) -> tuple[bool, bool]:
        """(close before processing, close after processing) for one received line."""
        with self._lock:
            count = self.drop_after_commands
            if count is None:
                return False, False
            if count <= 0:
                object.__setattr__(self, "drop_after_commands", None)
                return True, False
            count -= 1
            object.__setattr__(self, "drop_after_commands", None if count == 0 else count)
            return False, count == 0

    def _take_block_faults(self) -> tuple[bool, bool, bool]:
        """(drop, truncate, corrupt) for the next binary block; one-shot."""
        with self._lock:
            taken = (self.drop_mid_block, self.truncate_block, self.corrupt_block)
            for name in ("drop_mid_block", "truncate_block", "corrupt_block"):
                object.__setattr__(self, name, False)
            return taken

    def _require_server(self) -> SimServer:
        if self._server is None:
            raise RuntimeError("these Faults are not attached to a SimServer")
        return self._server

    def __repr__(self) -> str:
        on = {
            n: getattr(self, n)
            for n in self._SWITCHES
            if getattr(self, n) not in (0.0, None, False)
        }
        return f"Faults({on})"


class _Client:
    """One client connection to one instrument."""

    def __init__(self, sock: socket.socket, address: Any, instrument: str) -> None:
        self.sock = sock
        self.address = address
        self.instrument = instrument
        self.closed = threading.Event()
        self.thread: threading.Thread | None = None

    def close(self) -> None:
        if self.closed.is_set():
            return
        self.closed.set()
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        self.sock.close()


def is_loopback(host: str) -> bool:
    """True if ``host`` is a loopback address (127.0.0.0/8, ::1) or ``localhost``."""
    if host.strip().lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip().strip("[]")).is_loopback
    except ValueError:
        return False  # a host name or a wildcard ("", "0.0.0.0" is not loopback either)


class SimServer:
    """SCPI-over-TCP front end of a simulated bench (analyzer, generator, DC supply, LO).

    ``port=0`` picks free ports; ``port=P`` uses P, P+1, P+2, P+3. ``acquisition_time_scale`` is
    the real seconds slept per simulated second of acquisition (0: as fast as computed).
    ``wall_clock=True``: real time that passes between commands also passes on the bench's
    simulated clock, so a client that waits for the noise source to settle sees it settle
    (the time the simulation spends computing an acquisition does not count twice).
    ``command_log`` keeps the last ``command_log_limit`` lines (about) when ``log_commands``.
    """

    def __init__(
        self,
        bench: Any,
        host: str = "127.0.0.1",
        port: int = 0,
        log_commands: bool = True,
        *,
        acquisition_time_scale: float = 0.0,
        wall_clock: bool = True,
        command_log_limit: int = 100_000,
        dialect: str = "generic",
        allow_remote: bool = False,
    ) -> None:
        if acquisition_time_scale < 0:
            raise ValueError("acquisition_time_scale must be >= 0")
        if dialect not in ANALYZER_DIALECTS:
            raise ValueError(f"dialect must be one of {sorted(ANALYZER_DIALECTS)}")
        self.dialect = dialect
        if not is_loopback(host) and not allow_remote:
            raise InputError(
                "host",
                f"{host!r} is not a loopback address; the simulator has no authentication",
                fix="listen on 127.0.0.1, or pass allow_remote=True (--allow-remote) on purpose",
            )
        self.bench = bench
        self.host = host
        self.port = int(port)
        self.log_commands = log_commands
        self.command_log: list[tuple[str, str]] = []
        self.command_log_limit = int(command_log_limit)
        self.faults = Faults()
        self.ports: dict[str, int] = {}
        self._bench_lock = threading.RLock()
        self._stop = threading.Event()
        self._log_lock = threading.Lock()
        self._clients_lock = threading.Lock()
        self._clients: set[_Client] = set()
        self._client_threads: list[threading.Thread] = []
        self._listeners: dict[str, socket.socket] = {}
        self._acceptor: threading.Thread | None = None
        self._wake_r: socket.socket | None = None
        self._wake_w: socket.socket | None = None
        common = (bench, self._bench_lock, self.faults, self._stop)
        self.instruments: dict[str, ScpiInstrument] = {
            "analyzer": ANALYZER_DIALECTS[dialect](
                *common, _identity(bench, "analyzer"), time_scale=acquisition_time_scale
            ),
            "generator": GeneratorScpi(*common, _identity(bench, "generator")),
            "supply": SupplyScpi(*common, _identity(bench, "supply")),
            "lo": LoGeneratorScpi(*common, _identity(bench, "lo_generator")),
        }
        if wall_clock and hasattr(getattr(bench, "clock", None), "advance"):
            wall = WallClock(bench.clock)
            for instrument in self.instruments.values():
                instrument.wall = wall
        self.faults._server = self

    # --- lifecycle
    def start(self) -> SimServer:
        """Open the listeners and start serving in background threads; returns ``self``."""
        if self._acceptor is not None:
            raise RuntimeError("server already started")
        # FFT mode needs scipy.signal's windows; importing it lazily inside the first FFT
        # configure took 1-3 s on a loaded machine, longer than a client's timeout.
        import scipy.signal  # noqa: F401

        try:
            for offset, name in enumerate(INSTRUMENTS):
                port = 0 if self.port == 0 else self.port + offset
                self._listeners[name] = self._listen(port)
                self.ports[name] = self._listeners[name].getsockname()[1]
        except OSError:
            self._close_listeners()
            raise
        self._wake_r, self._wake_w = socket.socketpair()
        self._acceptor = threading.Thread(
            target=self._accept_loop, name="sim-scpi-accept", daemon=True
        )
        self._acceptor.start()
        logger.info("simulated bench serving on %s", self.ports)
        return self

    def _listen(self, port: int) -> socket.socket:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind((self.host, port))
            sock.listen(8)
        except OSError:
            sock.close()
            raise
        return sock

    def stop(self) -> None:
        """Close every connection and listener and join all threads. Idempotent."""
        if self._stop.is_set():
            return
        self._stop.set()
        if self._wake_w is not None:
            self._wake_w.send(b"x")
        if self._acceptor is not None:
            self._acceptor.join(timeout=10.0)
        self._close_listeners()
        for client in self._take_clients():
            client.close()
        with self._clients_lock:
            threads = list(self._client_threads)
        for thread in threads:  # also those of connections dropped earlier
            if thread is not threading.current_thread():
                thread.join(timeout=10.0)
        for instrument in self.instruments.values():
            instrument.shutdown()
        for sock in (self._wake_r, self._wake_w):
            if sock is not None:
                sock.close()
        logger.info("simulated bench stopped")

    def __enter__(self) -> SimServer:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()

    def _close_listeners(self) -> None:
        for sock in self._listeners.values():
            sock.close()
        self._listeners.clear()

    def _take_clients(self) -> list[_Client]:
        with self._clients_lock:
            clients = list(self._clients)
            self._clients.clear()
        return clients

    # --- public helpers
    def resource(self, which: str = "analyzer") -> str:
        """VISA resource string of one instrument: ``TCPIP0::<host>::<port>::SOCKET``."""
        if which not in self.ports:
            raise KeyError(
                f"unknown instrument {which!r}; one of {sorted(self.ports)} "
                f"(is the server started?)"
            )
        return f"TCPIP0::{self.host}::{self.ports[which]}::SOCKET"

    def connection_count(self, which: str | None = None) -> int:
        """Open client connections (to ``which`` instrument, or all)."""
        with self._clients_lock:
            return sum(1 for c in self._clients if which is None or c.instrument == which)

    def push_error(self, code: int, text: str, instrument: str | None = None) -> None:
        names = INSTRUMENTS if instrument is None else (instrument,)
        for name in names:
            self.instruments[name].status.push(_pushed_error(code, text))

    def reboot(self) -> None:
        """Bench and instruments back to power-on defaults; all connections dropped."""
        logger.info("simulated reboot")
        for client in self._take_clients():
            client.close()
        with self._bench_lock:
            self.bench.reset()
            for instrument in self.instruments.values():
                instrument.power_on()

    def _fault_changed(self, name: str) -> None:
        if name == "offline" and self.faults.offline:
            for client in self._take_clients():
                client.close()
        for instrument in self.instruments.values():
            instrument.fault_changed(name)

    # --- accepting
    def _accept_loop(self) -> None:
        selector = selectors.DefaultSelector()
        assert self._wake_r is not None
        selector.register(self._wake_r, selectors.EVENT_READ, None)
        for name, sock in self._listeners.items():
            selector.register(sock, selectors.EVENT_READ, name)
        try:
            while not self._stop.is_set():
                for key, _ in selector.select():
                    if key.data is None:
                        return
                    self._accept(key.fileobj, key.data)  # type: ignore[arg-type]
        finally:
            selector.close()

    def _accept(self, listener: socket.socket, name: str) -> None:
        try:
            sock, address = listener.accept()
        except OSError:
            return
        if self.faults.offline:  # unreachable: reset the connection at once
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            sock.close()
            return
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        client = _Client(sock, address, name)
        client.thread = threading.Thread(
            target=self._serve, args=(client,), name=f"sim-scpi-{name}-{address[1]}", daemon=True
        )
        with self._clients_lock:
            if self._stop.is_set():
                sock.close()
                return
            self._clients.add(client)
            self._client_threads = [t for t in self._client_threads if t.is_alive()]
            self._client_threads.append(client.thread)
        logger.debug("%s: connection from %s", name, address)
        client.thread.start()

    # --- serving one client
    def _serve(self, client: _Client) -> None:
        buffer = bytearray()
        overlong = False  # the current line passed MAX_LINE_BYTES: drop it up to its end
        try:
            while not client.closed.is_set():
                data = client.sock.recv(_RECV_BYTES)
                if not data:
                    break
                _quick_ack(client.sock)
                buffer += data
                while not client.closed.is_set():
                    end = buffer.find(b"\n")
                    if end < 0:
                        break
                    line = bytes(buffer[:end]).rstrip(b"\r")
                    del buffer[: end + 1]
                    if overlong or len(line) > MAX_LINE_BYTES:
                        overlong = False
                        self.instruments[client.instrument].status.push(
                            ScpiError(-223, f"line longer than {MAX_LINE_BYTES} bytes")
                        )
                        continue
                    self._handle_line(client, line)
                if len(buffer) > MAX_LINE_BYTES:
                    buffer.clear()
                    overlong = True
        except (OSError, InstrumentGone):
            pass
        except Exception:  # noqa: BLE001 - a server bug must not pass silently
            logger.exception("%s: connection from %s failed", client.instrument, client.address)
        finally:
            client.close()
            with self._clients_lock:
                self._clients.discard(client)
            logger.debug("%s: connection from %s closed", client.instrument, client.address)

    def _handle_line(self, client: _Client, raw: bytes) -> None:
        if not raw.strip():
            return
        text = raw.decode("ascii", errors="replace")
        logger.debug("%s <- %s", client.instrument, text)
        self._log(client.instrument, text)
        drop_before, drop_after = self.faults._take_drop()
        if drop_before:
            client.close()
            return
        instrument = self.instruments[client.instrument]
        if "\ufffd" in text:
            instrument.status.push(ScpiError(-101, "only ASCII is accepted"))
            responses: list[Response] = []
        else:
            responses = instrument.execute(text)
        if responses and not client.closed.is_set():
            self._reply(client, responses)
        if drop_after:
            client.close()

    def _log(self, instrument: str, text: str) -> None:
        if not self.log_commands:
            return
        with self._log_lock:
            self.command_log.append((instrument, text))
            if len(self.command_log) > self.command_log_limit:
                del self.command_log[: len(self.command_log) // 2]

    def _reply(self, client: _Client, responses: list[Response]) -> None:
        delay = float(self.faults.reply_delay_s)
        if delay > 0 and (client.closed.wait(delay) or self._stop.is_set()):
            return
        while self.faults.hold_replies:  # held until the test lets it go
            if client.closed.wait(0.01) or self._stop.is_set():
                return
        chunks: list[bytes] = []
        for index, response in enumerate(responses):
            if index:
                chunks.append(b";")
            if isinstance(response, Block):
                if self._send_block(client, b"".join(chunks), response):
                    return  # connection dropped mid-block
                chunks = []
            else:
                chunks.append(response.encode("ascii"))
        client.sock.sendall(b"".join(chunks) + b"\n")

    def _send_block(self, client: _Client, prefix: bytes, block: Block) -> bool:
        """Send ``prefix`` then ``block`` (with any pending block fault); True if dropped."""
        drop, truncate, corrupt = self.faults._take_block_faults()
        header = block.header()
        payload = block.payload
        if corrupt:
            header = b"#X" + header[2:]
        if truncate:
            payload = payload[: len(payload) // 2]
        if drop:
            client.sock.sendall(prefix + header + payload[: len(payload) // 2])
            client.close()
            return True
        client.sock.sendall(prefix + header + payload)
        return False


def _quick_ack(sock: socket.socket) -> None:
    """Acknowledge received data at once (Linux), so that a client whose small writes wait
    for an ACK (Nagle's algorithm) is not held up by delayed ACKs of a silent command."""
    if _TCP_QUICKACK is not None:
        try:
            sock.setsockopt(socket.IPPROTO_TCP, _TCP_QUICKACK, 1)
        except OSError:
            pass


_TCP_QUICKACK = getattr(socket, "TCP_QUICKACK", None)


def _identity(bench: Any, name: str) -> str:
    """``*IDN?`` reply: the bench instrument's identity, else one of our own."""
    identity = getattr(getattr(bench, name, None), "identity", None)
    if isinstance(identity, str) and identity:
        return identity
    return f"noisebench,simulated {name},SIM{int(getattr(bench, 'seed', 0) or 0):05d},{__version__}"


def _pushed_error(code: int, text: str) -> ScpiError:
    error = ScpiError(int(code), text)
    if text:
        error.text, error.detail = text, None
    return error
