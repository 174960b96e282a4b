"""The VISA session wrapper: block codecs, and real pyvisa-py sockets against a scripted peer."""

from __future__ import annotations

import socket
import threading
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from pyvisa import constants

from noisebench.drivers.protocol import ieee_block
from noisebench.drivers.transport import (
    BlockError,
    ConnectionLost,
    VisaSession,
    decode_block_values,
    parse_ascii_values,
    seconds_to_ms,
    split_definite_block,
)
from noisebench.errors import CommunicationError, InputError, InstrumentTimeout

CLOSE = object()  # handler reply: close the connection instead of answering


class ScriptedPeer:
    """A TCP peer on loopback that answers each received line with ``handler(line)``:
    bytes (sent as is), None (no answer) or CLOSE (drop the connection)."""

    def __init__(self, handler) -> None:
        self.handler = handler
        self.lines: list[str] = []
        self.connections = 0
        self._listener = socket.create_server(("127.0.0.1", 0))
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._socks: list[socket.socket] = []
        self.port = self._listener.getsockname()[1]
        # short timeout: only how often the peer looks at its stop flag, not an exchange
        self._listener.settimeout(0.05)
        thread = threading.Thread(target=self._accept, daemon=True)
        thread.start()
        self._threads.append(thread)

    @property
    def resource(self) -> str:
        return f"TCPIP0::127.0.0.1::{self.port}::SOCKET"

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._listener.accept()
            except OSError:
                continue
            self.connections += 1
            self._socks.append(conn)
            thread = threading.Thread(target=self._serve, args=(conn,), daemon=True)
            thread.start()
            self._threads.append(thread)

    def _serve(self, conn: socket.socket) -> None:
        buffer = b""
        try:
            # short timeout: the peer's stop-flag poll, as above
            conn.settimeout(0.05)
        except OSError:
            return
        while not self._stop.is_set():
            try:
                data = conn.recv(65536)
            except TimeoutError:
                continue
            except OSError:
                return
            if not data:
                return
            buffer += data
            while b"\n" in buffer:
                line, buffer = buffer.split(b"\n", 1)
                self.lines.append(line.decode())
                reply = self.handler(line.decode())
                if reply is CLOSE:
                    conn.shutdown(socket.SHUT_RDWR)
                    conn.close()
                    return
                if reply is not None:
                    conn.sendall(reply)

    def stop(self) -> None:
        self._stop.set()
        for sock in self._socks:
            try:
                sock.close()
            except OSError:
                pass
        self._listener.close()
        for thread in self._threads:
            thread.join(timeout=2.0)


# a payload full of 0x0A bytes: 0x0A0A0A0A as float32 is ~6.6e-33
NEWLINE_VALUES = np.frombuffer(b"\x0a\x0a\x0a\x0a" * 500 + b"\x3f\x80\x00\x00", dtype=">f4")


def _instrument(line: str):
    if line == "*IDN?":
        return b"test,peer,0,1\n"
    if line == "TRAC?":
        return ieee_block(NEWLINE_VALUES)
    if line == "SHORT?":
        block = ieee_block(NEWLINE_VALUES)
        return block[: len(block) // 2] + b"\n"
    if line == "LONG?":
        return ieee_block(NEWLINE_VALUES)[:-1] + b"\x00\x00\n"
    if line == "BAD?":
        return b"#X123456\n"
    if line == "TRAC?;:SYST:ERR?":  # a compound line: the block, ';', the error entry
        return ieee_block(NEWLINE_VALUES)[:-1] + b';-221,"Settings conflict"\n'
    if line == "FAIL?;:SYST:ERR?":  # the failed query sent no reply unit: only the entry
        return b'-230,"Data corrupt or stale"\n'
    if line == "SILENT?":
        return None
    if line == "BYE":
        return CLOSE
    return None


@pytest.fixture
def peer():
    server = ScriptedPeer(_instrument)
    yield server
    server.stop()


# Generous for normal exchanges (a loaded machine may be slow); tests about a timeout shorten
# it with ``session.timeout(...)`` around a query that the peer never answers.
SESSION_TIMEOUT_S = 30.0
SHORT_TIMEOUT_S = 0.3


@pytest.fixture
def session(peer):
    s = VisaSession(peer.resource, timeout_s=SESSION_TIMEOUT_S)
    yield s
    s.close()


# ----------------------------------------------------------------------------- codecs


def test_timeout_conversion_is_in_one_place_and_rounds_up():
    assert seconds_to_ms(0.5) == 500
    assert seconds_to_ms(2.0001) == 2001
    assert seconds_to_ms(1e-5) == 1
    for bad in (0, -1.0, float("nan"), float("inf"), "fast"):
        with pytest.raises(InputError):
            seconds_to_ms(bad)


def test_definite_block_round_trip_and_header_checks():
    values = np.array([1.0, -2.5, 3.25e-7], dtype=">f4")
    raw = ieee_block(values)
    assert raw.startswith(b"#212") and raw.endswith(b"\n")
    payload = split_definite_block(raw)
    assert np.array_equal(decode_block_values(payload), values.astype(float))
    little = ieee_block(values, big_endian=False)
    assert np.array_equal(
        decode_block_values(split_definite_block(little), big_endian=False), values.astype(float)
    )
    with pytest.raises(BlockError, match="6 of the 12"):
        split_definite_block(raw[:10])
    with pytest.raises(BlockError, match="longer"):
        split_definite_block(raw[:-1] + b"xx\n")
    with pytest.raises(BlockError, match="not a binary block"):
        split_definite_block(b"1.0,2.0\n")
    with pytest.raises(BlockError, match="indefinite"):
        split_definite_block(b"#0abcd\n")
    with pytest.raises(BlockError, match="malformed"):
        split_definite_block(b"#3x1\n")
    with pytest.raises(BlockError, match="multiple of 4"):
        decode_block_values(b"\x00" * 6)


@settings(max_examples=100, deadline=None)
@given(
    arrays(
        np.dtype(">f4"),
        st.integers(0, 300),
        elements=st.floats(width=32, allow_nan=False, allow_infinity=False),
    ),
    st.booleans(),
    st.sampled_from(["f", "d"]),
)
def test_any_block_decodes_bit_identically(values, big_endian, datatype):
    raw = ieee_block(values, datatype=datatype, big_endian=big_endian)
    decoded = decode_block_values(split_definite_block(raw), datatype, big_endian)
    assert np.array_equal(decoded, values.astype(np.float64))


def test_ascii_values_parse_and_garbage_is_refused():
    assert np.array_equal(parse_ascii_values("1.5,-2,3e-3\n"), [1.5, -2.0, 3e-3])
    with pytest.raises(CommunicationError, match="comma-separated"):
        parse_ascii_values("1.5,abc")


# ----------------------------------------------------------------------------- sockets


def test_terminations_are_explicit_and_nagle_is_off(session):
    # pyvisa-py documentation: socket resources default to no read termination
    assert session._res.read_termination == "\n"
    assert session._res.write_termination == "\n"
    assert session.query("*IDN?") == "test,peer,0,1"
    assert session._socket().getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0


def test_fast_block_read_is_bit_identical_to_pyvisa_codec_with_newline_bytes(peer):
    fast = VisaSession(peer.resource, timeout_s=1.0, binary_reader="fast")
    codec = VisaSession(peer.resource, timeout_s=1.0, binary_reader="pyvisa")
    try:
        a = fast.query_binary("TRAC?")
        b = codec.query_binary("TRAC?")
    finally:
        fast.close()
        codec.close()
    assert a.size == NEWLINE_VALUES.size == b.size
    assert np.array_equal(a, NEWLINE_VALUES.astype(float))
    assert np.array_equal(a, b)


def test_fast_reads_reuse_a_buffer_only_when_no_values_still_use_it(session):
    # the values are a view of the received bytes (no copy): a later read must never write
    # into a block whose values are still held, and reuses the buffer once they are gone
    first = session.query_binary("TRAC?")
    kept = first.copy()
    second = session.query_binary("TRAC?")
    assert not np.shares_memory(first, second)
    assert np.array_equal(first, kept) and np.array_equal(second, kept)
    address = second.__array_interface__["data"][0]  # a number: keeps no reference
    del first, second
    third = session.query_binary("TRAC?")
    assert third.__array_interface__["data"][0] == address  # the free buffer, taken again
    assert np.array_equal(third, NEWLINE_VALUES.astype(float))
    assert third.dtype == np.dtype(">f4")  # the instrument's own numbers, unconverted


def test_scoped_timeout_is_applied_in_ms_and_restored(session):
    assert session._res.timeout == 30_000
    with session.timeout(1.25):
        assert session._res.timeout == 1250
        assert session.timeout_s == 1.25
    assert session._res.timeout == 30_000 and session.timeout_s == SESSION_TIMEOUT_S


def test_no_reply_is_instrument_timeout_with_visa_code_then_recoverable(session, peer):
    with pytest.raises(InstrumentTimeout) as info, session.timeout(SHORT_TIMEOUT_S):
        session.query("SILENT?")  # the peer never answers it: the timeout is certain
    assert info.value.visa_code == constants.StatusCode.error_timeout
    assert info.value.context["command"] == "SILENT?"
    assert session.stale
    with pytest.raises(CommunicationError, match="out of step"):
        session.query("*IDN?")  # a late reply could be taken for this one: refused
    assert session.recover() is True  # sockets reconnect: late replies go to the old one
    assert session.query("*IDN?") == "test,peer,0,1"
    assert peer.connections == 2


def _wait_until_queued(session: VisaSession, count: int) -> None:
    """Poll (generous deadline) until ``count`` reply bytes wait in the session's socket."""
    sock = session._socket()
    assert sock is not None
    deadline = time.monotonic() + SESSION_TIMEOUT_S
    while time.monotonic() < deadline:
        try:
            if len(sock.recv(count, socket.MSG_PEEK | socket.MSG_DONTWAIT)) >= count:
                return
        except BlockingIOError:
            pass
        threading.Event().wait(0.01)
    raise AssertionError(f"{count} reply bytes did not arrive within {SESSION_TIMEOUT_S} s")


def test_truncated_block_is_a_block_error_and_session_recovers(session):
    """Half the block's payload arrives and the rest never does, so only the deadline can end
    the read. The half block is written for first and waits in the socket before the short
    limit starts (the query for it is a silent one), so the read cannot run out of time on the
    header instead: the timeout is certain, not raced, and the test waits 0.3 s, not 30 s."""
    session.write("SHORT?")
    block = ieee_block(NEWLINE_VALUES)
    _wait_until_queued(session, len(block) // 2 + 1)  # the half block and its terminator
    with pytest.raises(BlockError, match="incomplete"):
        # short timeout: the peer has sent all it ever sends for this block
        session.query_binary("SILENT?", timeout_s=SHORT_TIMEOUT_S)
    session.recover()
    assert np.array_equal(session.query_binary("TRAC?"), NEWLINE_VALUES.astype(float))


def test_block_then_text_reads_both_reply_units_of_a_compound_line(session):
    assert session.reads_block_then_text
    values, text = session.query_block_then_text("TRAC?;:SYST:ERR?", timeout_s=5.0)
    assert values is not None and np.array_equal(values, NEWLINE_VALUES.astype(float))
    assert text == '-221,"Settings conflict"'
    values, text = session.query_block_then_text("FAIL?;:SYST:ERR?")
    assert values is None and text == '-230,"Data corrupt or stale"'
    assert session.query("*IDN?") == "test,peer,0,1"  # nothing left over in the stream
    assert session.timeout_s == SESSION_TIMEOUT_S  # the block's limit changed no VISA timeout


def test_block_longer_than_header_and_malformed_header_are_block_errors(session):
    with pytest.raises(BlockError, match="longer than its header"):
        session.query_binary("LONG?")
    session.recover()
    with pytest.raises(BlockError, match="not a binary block"):
        session.query_binary("BAD?")


def test_peer_closing_is_reported_as_connection_lost_not_a_timeout(session):
    session.write("BYE")
    deadline = time.monotonic() + SESSION_TIMEOUT_S  # let the peer's close arrive
    while not session.peer_closed() and time.monotonic() < deadline:
        threading.Event().wait(0.01)
    with pytest.raises(ConnectionLost) as info:
        session.query("*IDN?")
    assert not isinstance(info.value, InstrumentTimeout)
    session.recover()
    assert session.query("*IDN?") == "test,peer,0,1"


def test_port_without_listener_fails_with_a_communication_error():
    free = socket.create_server(("127.0.0.1", 0))
    port = free.getsockname()[1]
    free.close()
    try:
        # generous timeout: nothing listens, so the failure comes from the refused connection
        session = VisaSession(f"TCPIP0::127.0.0.1::{port}::SOCKET", timeout_s=SESSION_TIMEOUT_S)
    except CommunicationError:
        return  # some systems refuse at open
    try:
        with pytest.raises(CommunicationError):
            session.query("*IDN?")
    finally:
        session.close()


def test_bad_arguments_are_input_errors():
    with pytest.raises(InputError):
        VisaSession("", timeout_s=1.0)
    with pytest.raises(InputError):
        VisaSession("TCPIP0::127.0.0.1::1::SOCKET", read_termination="\x00")
    with pytest.raises(InputError):
        VisaSession("TCPIP0::127.0.0.1::1::SOCKET", binary_reader="quick")
    with pytest.raises(CommunicationError, match="cannot open"):
        # the address is refused before any exchange, whatever the timeout
        VisaSession("NOT::A::RESOURCE", timeout_s=SESSION_TIMEOUT_S)


def test_repr_does_no_io_and_close_is_idempotent(peer):
    # this test does no exchange at all, so the timeout never runs
    session = VisaSession(peer.resource, timeout_s=SESSION_TIMEOUT_S)
    peer.stop()
    assert repr(session) == f"<VisaSession {peer.resource!r} open>"
    session.close()
    session.close()
    assert repr(session).endswith("closed>")
    with pytest.raises(ConnectionLost):
        session.query("*IDN?")
