"""The SCPI simulator server over real loopback sockets (noisebench/sims/scpi_server.py and
friends)."""

from __future__ import annotations

import io
import math
import socket
import threading
import time

import numpy as np
import pytest

from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import INSTRUMENTS, SimServer
from noisebench.sims.serve import main as serve_main

# Generous: only a broken server waits this long. Tests about timeouts hold the reply
# (``faults.hold_replies``) and use their own short timeout, so they never race a busy machine.
TIMEOUT_S = 60.0


class Client:
    """A bare SCPI-over-TCP client: newline-terminated lines, exact-length reads."""

    def __init__(
        self, server: SimServer, which: str = "analyzer", timeout_s: float = TIMEOUT_S
    ) -> None:
        self.sock = socket.create_connection(("127.0.0.1", server.ports[which]), timeout=timeout_s)
        self.buffer = bytearray()

    def write(self, line: str, end: bytes = b"\n") -> None:
        self.sock.sendall(line.encode("ascii") + end)

    def _fill(self) -> None:
        data = self.sock.recv(65536)
        if not data:
            raise EOFError("server closed the connection")
        self.buffer += data

    def read_exact(self, n: int) -> bytes:
        while len(self.buffer) < n:
            self._fill()
        out = bytes(self.buffer[:n])
        del self.buffer[:n]
        return out

    def read_line(self) -> str:
        while b"\n" not in self.buffer:
            self._fill()
        end = self.buffer.index(b"\n")
        line = bytes(self.buffer[:end])
        del self.buffer[: end + 1]
        return line.decode("ascii")

    def query(self, line: str) -> str:
        self.write(line)
        return self.read_line()

    def read_block(self) -> bytes:
        """An IEEE 488.2 definite-length block and its terminator."""
        assert self.read_exact(1) == b"#"
        digits = int(self.read_exact(1))
        length = int(self.read_exact(digits))
        payload = self.read_exact(length)
        assert self.read_exact(1) == b"\n"
        return payload

    def sync(self) -> None:
        """Wait until every command sent so far has been executed."""
        assert self.query("*OPC?") == "1"

    def errors(self) -> list[str]:
        """Drain the error queue (oldest first), without the final ``0,"No error"``."""
        out = []
        while True:
            entry = self.query("SYST:ERR?")
            if entry.startswith("0,"):
                return out
            out.append(entry)

    def codes(self) -> list[int]:
        return [int(entry.split(",", 1)[0]) for entry in self.errors()]

    def sees_eof(self) -> bool:
        """True when the server closed the connection (after any pending data)."""
        try:
            while True:
                self._fill()
        except EOFError:
            return True
        except TimeoutError:
            return False

    def close(self) -> None:
        self.sock.close()


@pytest.fixture
def connect():
    """``connect(server, which="analyzer", timeout_s=...)``: a Client closed after the test."""
    opened: list[Client] = []

    def factory(server: SimServer, which: str = "analyzer", timeout_s: float = TIMEOUT_S) -> Client:
        opened.append(Client(server, which, timeout_s))
        return opened[-1]

    yield factory
    for c in opened:
        c.close()


@pytest.fixture
def client(sim_server, connect):
    return connect(sim_server)


def _acquire(client: Client, points: int = 101, averages: int = 1) -> None:
    assert client.query(f"SWE:POIN {points};:AVER:COUN {averages};:INIT;*OPC?") == "1"


def _sim_threads() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name.startswith("sim-")]


# ----------------------------------------------------------------------------- basics


def test_identity_of_each_instrument(sim_server, connect):
    bench = sim_server.bench
    expected = {
        "analyzer": bench.analyzer.identity,
        "generator": bench.generator.identity,
        "supply": bench.supply.identity,
        "lo": bench.lo_generator.identity,
    }
    for name in INSTRUMENTS:
        c = connect(sim_server, name)
        assert c.query("*IDN?") == expected[name]
        assert c.query("SYST:VERS?") == "1999.0"
        assert c.query("*TST?") == "0"
        c.close()
    assert sim_server.resource("analyzer") == (
        f"TCPIP0::127.0.0.1::{sim_server.ports['analyzer']}::SOCKET"
    )
    assert len(set(sim_server.ports.values())) == 4


def test_crlf_and_blank_lines_are_accepted(client):
    client.write("", end=b"\r\n")
    assert client.query("*IDN?\r") == client.query("*IDN?")


# settings whose applied value equals the request: (set command, query, expected reply)
EXACT_ROUND_TRIPS = [
    ("FREQ:CENT 2.5 GHZ", "FREQ:CENT?", "2500000000"),
    ("FREQ:SPAN 20 MHZ", "FREQ:SPAN?", "20000000"),
    ("BAND 300 kHz", "BAND?", "300000"),
    ("BAND:VID 10 kHz", "BAND:VID?", "10000"),
    ("BAND:VID:AUTO OFF", "BAND:VID:AUTO?", "0"),
    ("SWE:MODE FFT", "SWE:MODE?", "FFT"),
    ("SWE:POIN 501", "SWE:POIN?", "501"),
    ("DET SAMP", "DET?", "SAMP"),
    ("DET:FUNC AVERage", "DET?", "AVER"),
    ("DET POS", "DET?", "POS"),
    ("DET NEG", "DET?", "NEG"),
    ("DET RMS", "DET?", "RMS"),
    ("AVER:COUN 16", "AVER:COUN?", "16"),
    ("AVER:TYPE LOG", "AVER:TYPE?", "LOG"),
    ("AVER:TYPE VOLT", "AVER:TYPE?", "VOLT"),
    ("AVER:TYPE POW", "AVER:TYPE?", "POW"),
    ("DISP:TRAC:Y:RLEV -20", "DISP:TRAC:Y:RLEV?", "-20"),
    ("INP:ATT 20 DB", "INP:ATT?", "20"),
    ("INP:GAIN:STAT ON", "INP:GAIN:STAT?", "1"),
    ("INIT:CONT ON", "INIT:CONT?", "1"),
    ("FORM REAL,32", "FORM?", "REAL,32"),
    ("FORM REAL,64", "FORM?", "REAL,64"),
    ("FORM:DATA ASCii", "FORM?", "ASC"),
    ("FORM:BORD SWAP", "FORM:BORD?", "SWAP"),
    ("CALC:MARK:X 1.001 GHZ", "CALC:MARK:X?", "1001000000"),
    ("CALC:MARK2:QUAN INT", "CALC:MARK2:QUAN?", "INT"),
    ("CALC:MARK3:QUAN DENSity", "CALC:MARK3:QUAN?", "DENS"),
    ("CALC:MARK:QUAN:WIDT 2 MHZ", "CALC:MARK:QUAN:WIDT?", "2000000"),
    ("CALC:MARK:QUAN:WIDT 2 MHZ", "CALC:MARK:QUAN:WIDT:AUTO?", "0"),
    ("OUTP:NOIS ON", "OUTP:NOIS?", "1"),
    ("SIM:PATH THR", "SIM:PATH?", "THR"),
    ("SIM:PATH TERMination", "SIM:PATH?", "TERM"),
    ("*ESE 36", "*ESE?", "36"),
    ("*SRE 16", "*SRE?", "16"),
]


@pytest.mark.parametrize("command, query, reply", EXACT_ROUND_TRIPS)
def test_analyzer_round_trip(client, command, query, reply):
    client.write(command)
    assert client.query(query) == reply
    assert client.errors() == []


@pytest.mark.parametrize(
    "which, command, query, reply",
    [
        ("generator", "FREQ 2 GHZ", "FREQ?", "2000000000"),
        ("generator", "SOUR:FREQ:CW 1.5e9", "SOUR:FREQ?", "1500000000"),
        ("generator", "POW -40", "POW?", "-40"),
        ("generator", "SOUR:POW:LEV:IMM:AMPL -12.5 DBM", "POW?", "-12.5"),
        ("generator", "OUTP ON", "OUTP:STAT?", "1"),
        ("supply", "VOLT 28", "VOLT?", "28"),
        ("supply", "SOUR:VOLT:LEV:IMM:AMPL 27.5 V", "VOLT?", "27.5"),
        ("supply", "CURR 50 MA", "CURR?", "0.05"),
        ("supply", "OUTP ON", "OUTP?", "1"),
    ],
)
def test_generator_and_supply_round_trip(sim_server, which, command, query, reply, connect):
    c = connect(sim_server, which)
    c.write(command)
    assert c.query(query) == reply
    assert c.errors() == []
    c.close()


def test_queries_return_applied_values(client, sim_server):
    client.write("BAND 130 kHz;:INP:ATT 13;:FREQ:CENT 1e9;SPAN 0")
    client.sync()
    applied = sim_server.bench.analyzer.settings
    rbw = float(client.query("BAND?"))
    assert rbw == applied.rbw_hz != 130e3
    mantissa = rbw / 10 ** math.floor(math.log10(rbw))
    assert mantissa in (1.0, 2.0, 3.0, 5.0)
    attenuation = float(client.query("INP:ATT?"))
    assert attenuation == applied.attenuation_db and attenuation % 2 == 0
    assert float(client.query("SWE:TIME?")) == applied.sweep_time_s
    assert float(client.query("DET:SAMP?")) == applied.detector_samples
    assert float(client.query("SWE:ACQ:TIME?")) == pytest.approx(
        sim_server.bench.analyzer.expected_acquisition_time_s()
    )
    assert client.errors() == []


def test_start_stop_keep_the_other_edge(client):
    client.write("FREQ:CENT 2e9;SPAN 10e6;STAR 1.99e9")
    assert (
        client.query("FREQ:STAR?;STOP?;CENT?;SPAN?") == "1990000000;2005000000;1997500000;15000000"
    )
    client.write("FREQ:STOP 2.01e9")
    assert client.query("FREQ:CENT?;SPAN?") == "2000000000;20000000"


def test_filter_shape_poles_and_window(client):
    assert client.query("BAND:SHAP?;POL?") == "GAUS;0"
    client.write("BAND:SHAP SYNC;POL 5")
    assert client.query("BAND:SHAP?;POL?") == "SYNC;5"
    client.write("BAND:SHAP GAUSsian")
    assert client.query("BAND:SHAP?") == "GAUS"
    client.write("SWE:MODE FFT;WIND flattop")
    assert client.query("SWE:WIND?") == '"flattop"'
    assert client.query(":BAND:SHAP?") == "FFT"
    assert client.errors() == []


def test_vbw_and_sweep_time_auto(client):
    client.write("BAND 100 kHz;VID 1 kHz")
    client.write("BAND:VID:AUTO ON")
    assert client.query("BAND:VID:AUTO?;:BAND:VID?") == "1;100000"
    client.write("SWE:TIME 2")
    assert client.query("SWE:TIME?;TIME:AUTO?") == "2;0"
    client.write("SWE:TIME:AUTO ON")
    assert client.query("SWE:TIME:AUTO?") == "1"
    assert float(client.query("SWE:TIME?")) < 2


def test_min_max_def(client, sim_server):
    spec = sim_server.bench.analyzer.spec
    assert float(client.query("FREQ:CENT? MAX")) == spec.max_freq_hz
    assert float(client.query("FREQ:CENT? MIN")) == spec.min_freq_hz
    assert float(client.query("BAND? MAX")) == spec.max_rbw_hz
    client.write("SWE:POIN MAX")
    assert int(client.query("SWE:POIN?")) == spec.max_points
    client.write("SWE:POIN DEF")
    assert client.query("SWE:POIN?") == "1001"
    assert client.errors() == []


def test_short_and_long_forms_are_the_same_command(client):
    client.write("SENSe:FREQuency:CENTer 3.25 GHZ")
    assert client.query("freq:cent?") == "3250000000"
    client.write("sens:band:res 1e5")
    assert client.query("SENSE:BANDWIDTH:RESOLUTION?") == "100000"
    client.write(":DISPLAY:WINDOW:TRACE:Y:SCALE:RLEVEL -10")
    assert client.query("DISP:TRAC:Y:RLEV?") == "-10"
    assert client.errors() == []


def test_compound_lines_and_relative_paths(client):
    reply = client.query("FREQ:CENT 2e9;SPAN 1e6;:BAND 1e5;:FREQ:CENT?;SPAN?;:BAND?;*OPC?")
    assert reply == "2000000000;1000000;100000;1"
    client.write("FREQ:CENT 1e9;BAND 1e6;:SWE:POIN 11")  # BAND is not under FREQ
    assert client.codes() == [-113]
    assert client.query("FREQ:CENT?;:BAND?;:SWE:POIN?") == "1000000000;100000;1001"


def test_execution_error_does_not_stop_the_line(client):
    assert client.query("FREQ:CENT 1e12;:FREQ:CENT 2e9;:FREQ:CENT?") == "2000000000"
    assert client.codes() == [-222]


def test_rst_restores_power_on_settings(client):
    client.write("FREQ:CENT 2e9;:DET SAMP;:FORM REAL,32;:CALC:MARK:QUAN DENS;:OUTP:NOIS ON")
    assert (
        client.query("*RST;:FREQ:CENT?;:DET?;:FORM?;:CALC:MARK:QUAN?;:OUTP:NOIS?")
        == "1000000000;RMS;ASC;OFF;0"
    )
    assert client.errors() == []


def test_supply_measures_what_the_bench_delivers(sim_server, connect):
    s = connect(sim_server, "supply")
    s.write("VOLT 28;CURR 0.05;OUTP ON")
    supply = sim_server.bench.supply
    s.sync()
    assert float(s.query("MEAS:VOLT?")) == supply.measure_voltage() == 28.0
    assert float(s.query("MEAS:CURR?")) == supply.measure_current() > 0
    s.write("CURR 0.005")  # below what the source draws: constant current, voltage collapses
    s.sync()
    assert float(s.query("MEAS:SCAL:VOLT:DC?")) == supply.measure_voltage() < 28.0
    s.close()


@pytest.mark.parametrize(
    "which, command, code",
    [
        ("generator", "FREQ 1e12", -222),
        ("generator", "POW 99", -222),
        ("generator", "OUTP MAYBE", -104),
        ("supply", "VOLT 1e3", -222),
        ("supply", "CURR -1", -222),
        ("supply", "MEAS:VOLT 3", -113),  # query only
    ],
)
def test_generator_and_supply_errors(sim_server, which, command, code, connect):
    c = connect(sim_server, which)
    c.write(command)
    assert c.codes() == [code]
    c.close()


def test_real_waits_pass_on_the_bench_clock(client, sim_server):
    clock = sim_server.bench.clock
    client.sync()
    before = clock.now_s
    time.sleep(0.1)  # an operator's (or driver's) settle wait
    client.sync()
    assert clock.now_s - before >= 0.1


def test_without_wall_clock_only_instrument_time_passes(connect):
    bench = SimulatedBench.from_scenario("demo-lna", seed=1)
    with SimServer(bench, wall_clock=False) as server:
        c = connect(server)
        c.sync()
        before = bench.clock.now_s
        time.sleep(0.05)
        c.sync()
        assert bench.clock.now_s == before
        _acquire(c, points=11)
        assert bench.clock.now_s - before == pytest.approx(
            bench.analyzer.last_trace.acquisition_time_s, rel=1e-9
        )
        c.close()


def test_overlong_line_is_too_much_data(client):
    client.write("X" * (1 << 20) + "Y" * 100, end=b"")  # no terminator yet
    client.write("")  # end of the overlong line
    assert client.query("*IDN?").startswith("noisebench,")
    assert client.codes() == [-223]


# ----------------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    "command, code",
    [
        ("FOO:BAR 1", -113),
        ("FREQ:CENTR 1e9", -113),
        ("INIT?", -113),  # no query form
        ("CALC:MARK9:X 1e9", -114),
        ("FREQ:CENT 1e12", -222),  # above the scenario analyzer's range
        ("AVER:COUN 0", -222),
        ("*ESE 256", -222),
        ("FREQ:CENT abc", -104),
        ("FREQ:CENT 1 V", -131),
        ("SWE:POIN 1 HZ", -138),
        ("FREQ:CENT", -109),
        ("FREQ:CENT 1,2", -108),
        ("DET PEAKY", -224),
        ("FORM REAL,16", -224),
        ("TRAC? TRACE2", -224),
        ("TRAC? TRACE1", -230),  # no acquisition yet
        ("FREQ:CENT 1e9;SPAN 1e6;STAR 2e9", -221),  # start above stop
        ("BAND:POL 4", -221),  # poles need the synchronous shape
        ("FREQ:CENT 1e9\u00b5", -101),
    ],
)
def test_error_numbers(sim_server, command, code, connect):
    c = connect(sim_server)
    c.sock.sendall(command.encode("utf-8") + b"\n")
    assert c.codes() == [code]
    c.close()


def test_failed_query_returns_nothing(client):
    client.write("FREQ:CENT? junk")  # failed query: no reply at all
    client.write("TRAC?")  # no trace yet: no reply
    assert client.query("*IDN?").startswith("noisebench,")  # the next reply is the IDN
    assert client.codes() == [-104, -230]


def test_esr_bits_follow_error_classes(client):
    assert int(client.query("*ESR?")) == 128  # power on
    assert int(client.query("*ESR?")) == 0  # read clears
    client.write("FOO")
    assert int(client.query("*ESR?")) == 32  # command error
    client.write("FREQ:CENT 1e12")
    assert int(client.query("*ESR?")) == 16  # execution error
    client.write("TRAC?")
    assert int(client.query("*ESR?")) == 16  # -230 is an execution error too


def test_status_byte(client):
    client.write("*CLS")
    assert client.query("*STB?") == "0"
    client.write("FOO")
    assert int(client.query("*STB?")) == 4  # error queue not empty
    client.write("*ESE 32")
    assert int(client.query("*STB?")) == 4 + 32  # ESR & ESE (command error)
    client.write("*SRE 32")
    assert int(client.query("*STB?")) == 4 + 32 + 64  # service request summary
    client.write("*CLS")
    assert client.query("*STB?") == "0"
    assert client.query("SYST:ERR:COUN?") == "0"


def test_error_queue_order_overflow_and_all(client):
    for _ in range(20):
        client.write("FOO")
    client.write("FREQ:CENT 1e12")
    assert client.query("SYST:ERR:COUN?") == "16"  # 16 entries at most
    entries = client.query("SYST:ERR:ALL?")
    codes = [int(c) for c in entries.split(",")[0::2]]
    assert codes == [-113] * 15 + [-350]  # the last entry replaced by queue overflow
    assert client.query("SYST:ERR?") == '0,"No error"'


def test_error_text_names_the_problem(client):
    client.write("FOO:BAR 1")
    assert client.query("SYST:ERR?") == '-113,"Undefined header;FOO:BAR"'


# ----------------------------------------------------------------------------- traces


def test_binary_blocks_are_byte_exact_with_ascii(client):
    _acquire(client, points=101, averages=2)
    ascii_values = np.array([float(v) for v in client.query("TRAC? TRACE1").split(",")])
    assert ascii_values.size == 101
    client.write("FORM REAL,32;:TRAC?")
    assert client.read_exact(5) == b"#3404"  # IEEE 488.2 header: 3 digits, 101*4 bytes
    big = np.frombuffer(client.read_exact(404), dtype=">f4")
    assert client.read_exact(1) == b"\n"
    client.write("FORM:BORD SWAP;:TRAC?")
    little = np.frombuffer(client.read_block(), dtype="<f4")
    client.write("FORM REAL,64;BORD NORM;:TRAC?")
    double = np.frombuffer(client.read_block(), dtype=">f8")
    np.testing.assert_array_equal(big.astype(np.float64), ascii_values)
    np.testing.assert_array_equal(little, big)
    np.testing.assert_array_equal(double, ascii_values)
    assert big.tobytes() == ascii_values.astype(">f4").tobytes()


def test_trace_matches_the_bench_trace(client, sim_server):
    _acquire(client, points=51)
    values = np.array([float(v) for v in client.query("TRAC?").split(",")])
    trace = sim_server.bench.analyzer.last_trace
    np.testing.assert_array_equal(values, trace.values.astype(np.float32).astype(np.float64))


def test_normal_marker_reads_the_nearest_trace_point(client):
    client.write("FREQ:CENT 1e9;SPAN 1e6;:SWE:POIN 11")
    _acquire(client, points=11)
    values = [float(v) for v in client.query("TRAC?").split(",")]
    client.write("CALC:MARK:X 1.0002e9")  # nearest point: 1.0002 GHz (index 7)
    assert float(client.query("CALC:MARK:Y?")) == values[7]
    assert client.query("CALC:MARK:QUAN:CORR?") == "0"


def test_marker_functions_use_the_last_trace(client, sim_server):
    from noisebench.bench.acquisition import MarkerKind
    from noisebench.sims.analyzer import marker_from_trace

    client.write("FREQ:CENT 1e9;SPAN 20e6;:BAND 1e6;:DET RMS;:CALC:MARK:QUAN DENS")
    _acquire(client, points=201, averages=2)
    trace = sim_server.bench.analyzer.last_trace
    density = float(client.query("CALC:MARK:Y?"))
    expected = marker_from_trace(trace, 1e9, MarkerKind.NOISE_DENSITY)
    assert density == pytest.approx(expected.value_db, abs=1e-4)  # float32 trace memory
    assert client.query("CALC:MARK:QUAN:CORR?") == "1"  # RMS detector: corrected density
    assert float(client.query("CALC:MARK:QUAN:WIDT?")) == expected.band_hz
    client.write("CALC:MARK:QUAN INT;QUAN:WIDT 5e6")
    band_power = float(client.query("CALC:MARK:Y?"))
    expected = marker_from_trace(trace, 1e9, MarkerKind.BAND_POWER, 5e6)
    assert band_power == pytest.approx(expected.value_db, abs=1e-4)
    # no new acquisition for a marker read: the trace is still the one acquired above (an
    # identity check; the clock also follows wall time, which a loaded machine stretches)
    assert trace is not None and sim_server.bench.analyzer.last_trace is trace
    assert client.errors() == []


def test_continuous_mode_acquires_on_every_query(client):
    client.write("SWE:POIN 21;:INIT:CONT ON")
    first, second = client.query("TRAC?"), client.query("TRAC?")
    assert first != second  # two fresh acquisitions
    client.write("INIT")
    assert client.codes() == [-213]  # init ignored in continuous mode


def test_opc_sets_esr_bit_after_acquisition(client):
    client.write("*CLS;SWE:POIN 51;:INIT;*OPC")
    deadline = time.monotonic() + TIMEOUT_S  # generous: the machine may be busy
    while time.monotonic() < deadline:  # poll as a driver does for long acquisitions
        if int(client.query("*ESR?")) & 1:
            break
        time.sleep(0.01)
    else:
        pytest.fail("operation complete bit never set")
    assert len(client.query("TRAC?").split(",")) == 51


def test_wai_orders_the_next_command(client):
    client.write("SWE:POIN 31;:INIT;*WAI")
    assert len(client.query("TRAC?").split(",")) == 31


def test_read_starts_waits_and_answers_a_fresh_trace_and_fetch_repeats_it(client, sim_server):
    # SCPI-1999 measurement instructions (Vol. 1 ch. 3, from memory): READ? = ABORt;
    # INITiate; FETCh?; FETCh? answers the last measurement without starting one
    client.write("SWE:POIN 51;:AVER:COUN 2;:FORM REAL,32;:READ?")
    first = np.frombuffer(client.read_block(), dtype=">f4")
    bench_trace = sim_server.bench.analyzer.last_trace
    np.testing.assert_array_equal(first, bench_trace.values.astype(np.float32))
    client.write("READ?")
    second = np.frombuffer(client.read_block(), dtype=">f4")
    assert second.size == 51 and not np.array_equal(second, first)  # a new acquisition
    assert sim_server.bench.analyzer.last_trace is not bench_trace
    client.write("FETC?")
    np.testing.assert_array_equal(np.frombuffer(client.read_block(), dtype=">f4"), second)
    client.write("TRAC? TRACE1")  # the same last trace
    np.testing.assert_array_equal(np.frombuffer(client.read_block(), dtype=">f4"), second)
    client.write("FORM ASC")
    assert len(client.query("READ?").split(",")) == 51  # the trace format applies
    assert client.errors() == []


def test_read_never_answers_a_stale_trace(client, sim_server, monkeypatch):
    from noisebench.errors import MeasurementError

    client.write("SWE:POIN 21;:READ?")
    client.read_line()
    client.write("INIT:CONT ON")
    assert client.query("READ?;*OPC?") == "1"  # no reply unit from the failed READ?
    assert client.codes() == [-213]  # as INITiate in continuous mode
    client.write("INIT:CONT OFF")

    def broken():
        raise MeasurementError("simulated acquisition failure")

    monkeypatch.setattr(sim_server.bench.analyzer, "acquire_trace", broken)
    assert client.query("READ?;*OPC?") == "1"  # the previous trace is not answered
    assert client.codes() == [-200, -230]  # the acquisition's error, then READ?'s


@pytest.fixture
def slow_server():
    """A server whose acquisitions take a long real time (ended by ABORt or stop)."""
    server = SimServer(
        SimulatedBench.from_scenario("demo-lna", seed=2), acquisition_time_scale=1e4
    ).start()
    yield server
    server.stop()


def test_overlapped_acquisition_abort_and_busy_errors(slow_server, connect):
    c = connect(slow_server)
    _ = c.query("SWE:POIN 11;*OPC?")
    c.write("INIT")
    # the worker computes the trace, then sleeps time_scale x acquisition time (long)
    assert c.query("STAT:OPER:COND?") == "16"
    c.write("INIT")  # already running
    c.write("FREQ:CENT 2e9")  # settings conflict while acquiring
    c.write("TRAC?")  # nothing to read yet
    assert c.codes() == [-213, -221, -230]
    c.write("ABOR")
    assert c.query("*OPC?;STAT:OPER:COND?") == "1;0"
    c.write("TRAC?")  # aborted: still no trace
    assert c.codes() == [-230]
    c.close()


def test_other_clients_are_served_while_one_waits(slow_server, connect):
    waiting, other = connect(slow_server), connect(slow_server)
    waiting.write("SWE:POIN 11;:INIT;*OPC?")  # blocks until the acquisition ends
    assert other.query("*IDN?").startswith("noisebench,")
    # the two connections are served by separate threads: wait (generously) until the server
    # has taken the first client's INIT, instead of racing it
    deadline = time.monotonic() + TIMEOUT_S
    while other.query("STAT:OPER:COND?") != "16":
        assert time.monotonic() < deadline, "the first client's INIT was never taken"
        time.sleep(0.01)
    # short timeout: the reply waits for a 1e4x-slowed acquisition, so it cannot come early
    waiting.sock.settimeout(0.05)
    with pytest.raises(TimeoutError):  # still waiting for *OPC?
        waiting.read_line()
    other.write("ABOR")
    waiting.sock.settimeout(TIMEOUT_S)
    assert waiting.read_line() == "1"
    waiting.close()
    other.close()


# ----------------------------------------------------------------------------- clients, log


def test_several_clients_at_once(sim_server, connect):
    failures: list[str] = []

    def worker(which: str, index: int) -> None:
        c = connect(sim_server, which)
        try:
            for i in range(25):
                if which == "analyzer":
                    reply = c.query(f"CALC:MARK{index}:X {1e9 + i};:CALC:MARK{index}:X?")
                    expected = str(int(1e9 + i))
                else:
                    reply = c.query("*IDN?")
                    expected = getattr(sim_server.bench, which).identity
                if reply != expected:
                    failures.append(f"{which}{index}: {reply!r} != {expected!r}")
        except Exception as exc:  # noqa: BLE001 - reported below
            failures.append(f"{which}{index}: {exc!r}")
        finally:
            c.close()

    threads = [threading.Thread(target=worker, args=("analyzer", n)) for n in (1, 2, 3, 4)]
    threads += [threading.Thread(target=worker, args=(w, 1)) for w in ("generator", "supply")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=30)
    assert failures == []
    assert connect(sim_server).errors() == []


def test_command_log_records_each_line(sim_server, connect):
    a, g = connect(sim_server), connect(sim_server, "generator")
    a.query("FREQ:CENT 2e9;:FREQ:CENT?")
    g.query("FREQ?")
    a.query("*IDN?")
    assert sim_server.command_log == [
        ("analyzer", "FREQ:CENT 2e9;:FREQ:CENT?"),
        ("generator", "FREQ?"),
        ("analyzer", "*IDN?"),
    ]
    a.close()
    g.close()


def test_clean_shutdown_frees_ports_and_threads(slow_server, connect):
    a, g = connect(slow_server), connect(slow_server, "generator")
    a.write("SWE:POIN 11;:INIT;*OPC?")  # left waiting for a long acquisition
    g.query("*IDN?")
    assert slow_server.connection_count() == 2
    ports = dict(slow_server.ports)
    slow_server.stop()
    assert _sim_threads() == []
    assert a.sees_eof() and g.sees_eof()
    for port in ports.values():
        with pytest.raises(ConnectionRefusedError):
            socket.create_connection(("127.0.0.1", port), timeout=1.0)
        probe = socket.socket()  # the port is free for a restarted server
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        probe.bind(("127.0.0.1", port))
        probe.listen(1)
        probe.close()
    slow_server.stop()  # idempotent


def test_fixed_ports_are_consecutive():
    # A free base port found by the OS may have a busy neighbour (other processes on the
    # machine); try a few bases before calling it a failure.
    bench = SimulatedBench.from_scenario("demo-lna", seed=1)
    server = None
    for _ in range(20):
        probe = socket.socket()
        probe.bind(("127.0.0.1", 0))
        base = probe.getsockname()[1]
        probe.close()
        try:
            server = SimServer(bench, port=base).start()
            break
        except OSError:
            continue
    assert server is not None, "no four consecutive free ports found in 20 tries"
    try:
        assert server.ports == {
            "analyzer": base,
            "generator": base + 1,
            "supply": base + 2,
            "lo": base + 3,
        }
    finally:
        server.stop()


# ----------------------------------------------------------------------------- pyvisa


def test_through_pyvisa_socket_resource(sim_server):
    import pyvisa

    rm = pyvisa.ResourceManager("@py")
    inst = rm.open_resource(
        sim_server.resource("analyzer"),
        read_termination="\n",
        write_termination="\n",
        timeout=int(TIMEOUT_S * 1000),
    )
    try:
        assert inst.query("*IDN?") == sim_server.bench.analyzer.identity
        inst.write("FREQ:CENT 1.5 GHZ;SPAN 5 MHZ;:SWE:POIN 1001;:AVER:COUN 2")
        assert inst.query("*OPC?;:FREQ:CENT?") == "1;1500000000"
        assert inst.query("INIT;*OPC?") == "1"
        inst.write("FORM REAL,32;BORD NORM")
        binary = inst.query_binary_values(
            "TRAC? TRACE1", datatype="f", is_big_endian=True, container=np.array
        )
        inst.write("FORM ASC")
        ascii_values = inst.query_ascii_values("TRAC? TRACE1", container=np.array)
        assert binary.size == 1001
        np.testing.assert_array_equal(binary.astype(np.float64), ascii_values)
        # a reply later than the timeout: VISA timeout; the late reply arrives afterwards
        sim_server.faults.hold_replies = True
        inst.timeout = 100
        with pytest.raises(pyvisa.errors.VisaIOError) as info:
            inst.query("*IDN?")
        assert info.value.error_code == pyvisa.constants.StatusCode.error_timeout
        sim_server.faults.clear()
        inst.timeout = int(TIMEOUT_S * 1000)
        assert inst.read() == sim_server.bench.analyzer.identity  # the stale reply
        assert inst.query("SYST:ERR?") == '0,"No error"'
    finally:
        inst.close()
        rm.close()


# ----------------------------------------------------------------------------- faults


def test_fault_reply_delay_delays_replies(sim_server, connect):
    c = connect(sim_server)
    sim_server.faults.reply_delay_s = 0.2
    start = time.monotonic()
    assert c.query("*IDN?").startswith("noisebench,")
    assert time.monotonic() - start >= 0.2  # a lower bound only: load can only lengthen it
    c.close()


def test_fault_held_reply_times_out_a_client(sim_server, connect):
    c = connect(sim_server)
    assert c.query("*IDN?").startswith("noisebench,")
    sim_server.faults.hold_replies = True  # the reply cannot come before the timeout
    # short timeout: the reply is held, so it cannot come early
    c.sock.settimeout(0.1)
    with pytest.raises(TimeoutError):
        c.query("*IDN?")
    sim_server.faults.hold_replies = False
    c.sock.settimeout(TIMEOUT_S)
    assert c.read_line().startswith("noisebench,")  # late, but it comes
    assert c.query("FREQ:CENT?") == "1000000000"
    c.close()


def test_fault_drop_after_commands(sim_server, connect):
    c = connect(sim_server)
    sim_server.faults.drop_after_commands = 2
    assert c.query("*IDN?").startswith("noisebench,")
    assert c.query("FREQ:CENT?") == "1000000000"  # 2nd line: processed, then dropped
    assert c.sees_eof()
    assert sim_server.faults.drop_after_commands is None  # one-shot
    c2 = connect(sim_server)
    sim_server.faults.drop_after_commands = 0
    c2.write("SWE:POIN 123")  # dropped unprocessed
    assert c2.sees_eof()
    c3 = connect(sim_server)
    assert c3.query("SWE:POIN?") == "1001"
    c.close()
    c2.close()
    c3.close()


def _block_request(client: Client, points: int = 101) -> None:
    _acquire(client, points=points)
    client.write("FORM REAL,32")


def test_fault_drop_mid_block(sim_server, connect):
    c = connect(sim_server)
    _block_request(c)
    sim_server.faults.drop_mid_block = True
    c.write("TRAC?")
    assert c.read_exact(5) == b"#3404"
    c.read_exact(202)  # half the payload ...
    assert c.sees_eof() and len(c.buffer) == 0  # ... then the connection closes
    assert sim_server.faults.drop_mid_block is False  # one-shot
    c2 = connect(sim_server)
    _block_request(c2)
    c2.write("TRAC?")
    assert len(c2.read_block()) == 404
    c.close()
    c2.close()


def test_fault_truncated_block(sim_server, connect):
    c = connect(sim_server)
    _block_request(c)
    sim_server.faults.truncate_block = True
    c.write("TRAC?;*IDN?")
    assert c.read_exact(5) == b"#3404"  # header says 404 bytes ...
    c.read_exact(202)  # ... 202 come ...
    assert c.read_exact(1) == b";"  # ... then the rest of the reply; connection alive
    assert c.read_line().startswith("noisebench,")
    c.write("TRAC?")
    assert len(c.read_block()) == 404  # one-shot
    c.close()


def test_fault_corrupt_block_header(sim_server, connect):
    c = connect(sim_server)
    _block_request(c)
    sim_server.faults.corrupt_block = True
    c.write("TRAC?")
    assert c.read_exact(5) == b"#X404"  # malformed: no digit count after '#'
    assert len(c.read_exact(405)) == 405  # payload and terminator still sent
    c.write("TRAC?")
    assert len(c.read_block()) == 404  # one-shot
    c.close()


def test_fault_push_error(sim_server, connect):
    sim_server.faults.push_error(-314, "Save/recall memory lost")
    for name in INSTRUMENTS:
        c = connect(sim_server, name)
        assert int(c.query("*ESR?")) & 8  # device-dependent error bit
        assert c.query("SYST:ERR?") == '-314,"Save/recall memory lost"'
        assert c.query("SYST:ERR?") == '0,"No error"'
        c.close()
    sim_server.faults.push_error(-200, "Execution error;lamp", instrument="supply")
    assert connect(sim_server, "supply").codes() == [-200]
    assert connect(sim_server, "analyzer").codes() == []


def test_fault_reboot_resets_settings_and_drops_connections(sim_server, connect):
    a, g, s = (connect(sim_server, n) for n in INSTRUMENTS[:3])
    a.write("FREQ:CENT 2e9;:FORM REAL,32;:SIM:PATH THR;:FOO")
    _acquire(a, points=11)
    g.write("OUTP ON")
    s.write("VOLT 28;OUTP ON")
    assert a.query("*OPC?") == g.query("*OPC?") == s.query("*OPC?") == "1"
    sim_server.faults.reboot()
    assert a.sees_eof() and g.sees_eof() and s.sees_eof()
    a, g, s = (connect(sim_server, n) for n in INSTRUMENTS[:3])
    # settings back to power-on; the cables (simulated path) stay where the operator put them
    assert a.query("FREQ:CENT?;:FORM?;:SIM:PATH?") == "1000000000;ASC;THR"
    assert a.query("*ESR?") == "128"  # power-on bit, and nothing else
    assert a.codes() == []  # the queue was emptied
    a.write("TRAC?")
    assert a.codes() == [-230]  # trace memory cleared
    assert g.query("OUTP?") == "0"
    assert s.query("OUTP?;VOLT?") == "0;0"
    for c in (a, g, s):
        c.close()


def _mean_power_w(client: Client) -> tuple[float, float]:
    """Mean linear power of a fresh trace and the standard error of that mean, W."""
    assert client.query("INIT;*OPC?") == "1"
    power = 10 ** (np.array([float(v) for v in client.query("TRAC?").split(",")]) / 10) / 1e3
    return float(power.mean()), float(power.std(ddof=1) / math.sqrt(power.size))


def _y_factor(client: Client, source: Client | None, settle_s: float) -> tuple[float, float]:
    """(Y, standard uncertainty of Y) from hot and cold traces, switching the drive."""
    results = []
    for hot in (True, False):
        if source is None:
            client.write(f"OUTP:NOIS {'ON' if hot else 'OFF'}")
        else:
            source.write(f"OUTP {'ON' if hot else 'OFF'}")
            assert source.query("*OPC?") == "1"
        time.sleep(settle_s)  # the operator's settle wait (the bench clock counts real time)
        results.append(_mean_power_w(client))
    (hot_w, u_hot), (cold_w, u_cold) = results
    y = hot_w / cold_w
    return y, y * math.hypot(u_hot / hot_w, u_cold / cold_w)


def test_fault_stuck_noise_source_gives_y_of_one(sim_server, connect):
    settle_s = sim_server.bench.noise_source.settle_time_s
    c = connect(sim_server)
    # points 2 RBW apart are practically uncorrelated (Gaussian RBW), so the standard error of
    # the trace mean follows from the trace's own scatter
    c.write(
        "SIM:PATH THR;:FREQ:CENT 1e9;SPAN 40e6;:BAND 100e3;:SWE:POIN 201;"
        ":DET RMS;:AVER:TYPE POW;COUN 2;:INP:ATT 0"
    )
    y, u_y = _y_factor(c, None, settle_s)
    assert y > 1 + 10 * u_y  # working source: hot clearly above cold
    sim_server.faults.stuck_noise_source = True
    y_stuck, u_stuck = _y_factor(c, None, settle_s)
    assert abs(y_stuck - 1) < 5 * u_stuck  # 5 sigma of the sampling distribution
    assert c.query("OUTP:NOIS?") == "0"  # commands still accepted and reported
    # through the DC supply too: the drive is accepted and measured, the source stays put
    supply = connect(sim_server, "supply")
    supply.write("VOLT 28;CURR 0.05")
    y_supply, u_supply = _y_factor(c, supply, settle_s)
    assert abs(y_supply - 1) < 5 * u_supply
    supply.write("OUTP ON")
    assert float(supply.query("MEAS:VOLT?")) == 28.0
    # fault cleared: the source follows its drives again
    supply.write("OUTP OFF")
    sim_server.faults.clear()
    y_again, u_again = _y_factor(c, supply, settle_s)
    assert y_again > 1 + 10 * u_again
    c.close()
    supply.close()


def test_faults_clear_turns_everything_off(sim_server):
    f = sim_server.faults
    f.reply_delay_s, f.drop_after_commands, f.drop_mid_block = 1.0, 3, True
    f.truncate_block = f.corrupt_block = f.stuck_noise_source = f.hold_replies = True
    f.clear()
    assert (
        f.reply_delay_s,
        f.hold_replies,
        f.drop_after_commands,
        f.drop_mid_block,
        f.truncate_block,
        f.corrupt_block,
        f.stuck_noise_source,
    ) == (0.0, False, None, False, False, False, False)
    assert sim_server.bench.noise_source.stuck is False
    with pytest.raises(ValueError):
        f.reply_delay_s = -1


# ----------------------------------------------------------------------------- console entry


def test_console_entry_prints_resources_and_stops():
    out = io.StringIO()
    stop = threading.Event()
    stop.set()  # return as soon as the resources are printed
    assert (
        serve_main(
            ["--scenario", "demo-lna", "--seed", "3", "--port", "0"], out=out, stop_event=stop
        )
        == 0
    )
    text = out.getvalue()
    for name in INSTRUMENTS:
        assert f"  {name}" in text
    assert text.count("TCPIP0::127.0.0.1::") == 4
    assert "stopped." in text
    assert _sim_threads() == []


def test_console_entry_bad_scenario_exits_2(capsys):
    assert serve_main(["--scenario", "no-such-scenario", "--port", "0", "--duration", "0"]) == 2
    assert "no-such-scenario" in capsys.readouterr().err


def test_console_entry_busy_port_exits_1(capsys):
    busy = socket.socket()
    busy.bind(("127.0.0.1", 0))
    busy.listen(1)
    try:
        port = busy.getsockname()[1]
        assert serve_main(["--port", str(port), "--duration", "0"]) == 1
        assert "cannot listen" in capsys.readouterr().err
    finally:
        busy.close()
