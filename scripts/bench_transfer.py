"""Trace transfer over loopback: fast block read vs pyvisa's block codec vs ASCII vs a bare socket.

A local TCP peer answers ``BIN?`` with a pre-built IEEE 488.2 block of N float32 values (every
value's bytes are chosen at random, so 0x0A bytes occur inside the payload as they do in real
traces) and ``ASC?`` with the same values as comma-separated text. The client side is timed:

- ``fast``   noisebench's VisaSession, header then exactly the payload, termchar off;
- ``pyvisa`` VisaSession with ``binary_reader="pyvisa"`` (pyvisa's query_binary_values);
- ``ascii``  VisaSession query + float parsing of the text;
- ``socket`` a bare socket receiving the same block bytes into one preallocated buffer (the
  floor: no VISA, no header parsing, no decoding).

Prints the median of several runs per size and the ratios, all measured in this one run.
The peer runs in a child process, as an instrument would.
Usage: ``python scripts/bench_transfer.py [--repeats 31]``
"""

from __future__ import annotations

import argparse
import multiprocessing
import socket
import statistics
import threading
import time

import numpy as np

from noisebench.drivers.protocol import ieee_block
from noisebench.drivers.transport import VisaSession, parse_ascii_values

SIZES = (1_001, 10_001, 100_001)
TARGET_RATIO = 1.5  # fast block read over a bare socket read, 100 001 points


class Peer:
    """Serves BIN? / ASC? / *IDN? replies for one payload size at a time."""

    def __init__(self) -> None:
        self.replies: dict[bytes, bytes] = {b"*IDN?": b"bench,peer,0,1\n"}
        self._listener = socket.create_server(("127.0.0.1", 0))
        self.port = self._listener.getsockname()[1]
        self._stop = threading.Event()
        threading.Thread(target=self._accept, daemon=True).start()

    def load(self, values: np.ndarray) -> None:
        self.replies[b"BIN?"] = ieee_block(values)
        self.replies[b"ASC?"] = (",".join(repr(float(v)) for v in values) + "\n").encode()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._listener.accept()
            except OSError:
                return
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        buffer = b""
        with conn:
            while True:
                data = conn.recv(65536)
                if not data:
                    return
                buffer += data
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    conn.sendall(self.replies.get(line.strip(), b"\n"))

    def close(self) -> None:
        self._stop.set()
        self._listener.close()


def _median_s(fn, repeats: int) -> float:
    fn()  # warm up
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _bare_socket(port: int, nbytes: int):
    sock = socket.create_connection(("127.0.0.1", port))
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

    buffer = memoryview(bytearray(nbytes))  # received in place: no allocation per chunk

    def run() -> None:
        sock.sendall(b"BIN?\n")
        got = 0
        while got < nbytes:
            got += sock.recv_into(buffer[got:])

    return sock, run


class PeerProcess:
    """The peer in a child process, like an instrument: the client's timings then hold no
    wake-up of a server thread competing for this interpreter's lock."""

    def __init__(self) -> None:
        ctx = multiprocessing.get_context("spawn")
        self._commands = ctx.Queue()
        self._port = ctx.Queue()
        self._proc = ctx.Process(target=_serve_peer, args=(self._commands, self._port))
        self._proc.start()
        self.port = int(self._port.get(timeout=60))
        self.replies: dict[bytes, bytes] = {}

    def load(self, values: np.ndarray) -> None:
        self.replies[b"BIN?"] = ieee_block(values)
        self._commands.put(values.tobytes())
        self._port.get(timeout=60)  # loaded

    def close(self) -> None:
        self._commands.put(None)
        self._proc.join(timeout=10)
        if self._proc.is_alive():
            self._proc.terminate()


def _serve_peer(commands, port) -> None:
    peer = Peer()
    port.put(peer.port)
    while (raw := commands.get()) is not None:
        peer.load(np.frombuffer(raw, dtype=">f4"))
        port.put("ok")
    peer.close()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=31)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(2024)
    peer = PeerProcess()
    resource = f"TCPIP0::127.0.0.1::{peer.port}::SOCKET"
    fast = VisaSession(resource, timeout_s=10.0, binary_reader="fast")
    codec = VisaSession(resource, timeout_s=10.0, binary_reader="pyvisa")
    ratios: dict[int, float] = {}
    print(
        f"{'points':>8} {'bytes':>8} {'socket ms':>10} {'fast ms':>8} {'pyvisa ms':>10} "
        f"{'ascii ms':>9} {'fast/socket':>12} {'pyvisa/fast':>12} {'ascii/fast':>11}"
    )
    try:
        for n in SIZES:
            values = rng.integers(0, 2**32, n, dtype=np.uint32).view(">f4")
            values = np.where(np.isfinite(values), values, np.float32(1.0)).astype(">f4")
            peer.load(values)
            block = peer.replies[b"BIN?"]
            assert np.array_equal(fast.query_binary("BIN?"), values.astype(float))
            assert np.array_equal(codec.query_binary("BIN?"), values.astype(float))
            sock, bare = _bare_socket(peer.port, len(block))
            try:
                t_sock = _median_s(bare, args.repeats)
            finally:
                sock.close()
            t_fast = _median_s(lambda: fast.query_binary("BIN?"), args.repeats)
            t_codec = _median_s(lambda: codec.query_binary("BIN?"), args.repeats)
            t_ascii = _median_s(lambda: parse_ascii_values(fast.query("ASC?")), args.repeats)
            ratios[n] = t_fast / t_sock
            print(
                f"{n:>8} {len(block):>8} {t_sock * 1e3:>10.3f} {t_fast * 1e3:>8.3f} "
                f"{t_codec * 1e3:>10.3f} {t_ascii * 1e3:>9.3f} {t_fast / t_sock:>12.2f} "
                f"{t_codec / t_fast:>12.2f} {t_ascii / t_fast:>11.2f}"
            )
        worst = ratios[SIZES[-1]]
        print(
            f"fast read of a {SIZES[-1]:,}-point float32 trace: {worst:.2f}x a bare socket "
            f"read (target <= {TARGET_RATIO}: {'met' if worst <= TARGET_RATIO else 'NOT met'})"
        )
    finally:
        fast.close()
        codec.close()
        peer.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
