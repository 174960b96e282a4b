"""Recovery that really retries: backoff on a fake clock (no real waiting, no races), an
instrument back after 5 s lets the run go on with its settings re-applied and verified, one
gone for longer than the retry window ends the run with exit 4 and --resume finishes it."""

from __future__ import annotations

import io
import logging
from pathlib import Path

import pytest

from noisebench.bench.acquisition import AcquisitionRequest
from noisebench.bench.registry import simulated_enr_table
from noisebench.drivers import open_analyzer, scpi_channel
from noisebench.errors import CommunicationError
from noisebench.frontends import cli
from noisebench.results.store import load_run
from noisebench.running.plan import load_plan
from noisebench.running.sequencer import run_plan
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer


class FakeClock:
    """Recovery's clock: ``sleep`` advances it; an instrument outage ends at ``back_at``."""

    def __init__(self, server: SimServer, back_at: float | None) -> None:
        self.now = 0.0
        self.slept: list[float] = []
        self.server = server
        self.back_at = back_at

    def monotonic(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.slept.append(seconds)
        self.now += seconds
        if self.back_at is not None and self.now >= self.back_at and self.server.faults.offline:
            self.server.reboot()  # back with power-on settings, like after a real reboot
            self.server.faults.offline = False


@pytest.fixture
def server():
    bench = SimulatedBench.from_scenario("demo-lna", seed=4)
    with SimServer(bench) as srv:
        yield srv


def fake_clock(monkeypatch, server: SimServer, back_at: float | None) -> FakeClock:
    clock = FakeClock(server, back_at)
    monkeypatch.setattr(
        scpi_channel, "TIMING", scpi_channel.RecoveryTiming(clock.sleep, clock.monotonic)
    )
    return clock


REQUEST = AcquisitionRequest(center_hz=1.2e9, span_hz=4e6, rbw_hz=1e6, averages=8, points=101)


def test_instrument_back_after_5_s_continues_with_settings_reapplied(server, monkeypatch, caplog):
    clock = fake_clock(monkeypatch, server, back_at=5.0)
    sa = open_analyzer(server.resource("analyzer"), "generic")
    try:
        applied = sa.configure(REQUEST)
        server.faults.offline = True  # the connection drops between acquisitions
        with caplog.at_level(logging.INFO):
            trace = sa.acquire_trace()
        assert trace.values.size == 101
        # backoff 0.5, 1, 2, 4 s: the fourth wait passes the 5 s outage
        assert clock.slept == [0.5, 1.0, 2.0, 4.0]
        assert len(sa.recovery_log) == 1
        assert "reconnected (the instrument answered *IDN?)" in sa.recovery_log[0]
        # the reboot lost the settings: detected, re-applied, verified
        assert sa.settings_changes and "center_hz" in sa.settings_changes[0]
        assert sa.verify_settings() == {}
        assert sa.settings == applied
        said = [r.getMessage() for r in caplog.records if "reconnected" in r.getMessage()]
        assert len(said) == 1  # never while nothing answered
        attempts = [r.getMessage() for r in caplog.records if "next in" in r.getMessage()]
        assert len(attempts) == 4
    finally:
        sa.close()


def test_outage_longer_than_the_window_raises_after_the_window(server, monkeypatch):
    clock = fake_clock(monkeypatch, server, back_at=None)
    sa = open_analyzer(server.resource("analyzer"), "generic")
    try:
        sa.configure(REQUEST)
        server.faults.offline = True
        with pytest.raises(CommunicationError) as info:
            sa.acquire_trace()
        window = sa.profile.common.retry_window_s
        assert clock.now == pytest.approx(window)  # waited exactly the window, no more
        assert max(clock.slept) == sa.profile.common.max_backoff_s
        assert "recovery_failed" in info.value.context
        assert "gave up after" in sa.recovery_log[-1]
    finally:
        server.faults.offline = False
        sa.close()


def write_plan(folder: Path, server: SimServer) -> Path:
    """A three-point Y-factor plan measured group by group: after the first point is
    journalled the run still has two groups to read, so an outage started then always meets
    instrument I/O (a sweep-level schedule may journal all three at once and end cold without
    another exchange, and the outage would then test nothing)."""
    simulated_enr_table(server.bench).to_csv(folder / "enr.csv")
    plan = folder / "plan.toml"
    plan.write_text(
        f"""\
method = "y_factor"
[dut]
id = "RECOVER"
[bench]
analyzer = {{ resource = "{server.resource("analyzer")}" }}
noise_source = {{ drive = "supply", resource = "{server.resource("supply")}", \
drive_v = 28.0, settle_time_s = 0.02 }}
[acquisition]
rbw_hz = 1e6
target_u_nf_db = 0.15
[sweep]
freqs_hz = [1.0e9, 1.5e9, 2.0e9]
[enr]
table = "enr.csv"
[corrections]
source_temperature_k = 296.0
[switching]
mode = "per_group"
[output]
plots = false
report = false
""",
        encoding="utf-8",
    )
    return plan


def test_run_survives_a_5_s_outage(server, monkeypatch, tmp_path):
    clock = fake_clock(monkeypatch, server, back_at=5.0)
    plan = load_plan(write_plan(tmp_path, server))

    journalled = []

    def drop_after_first_point(point):
        journalled.append(point.freq_hz)
        if len(journalled) == 1:
            server.faults.offline = True

    record, folder = run_plan(plan, folder=tmp_path / "run", on_point=drop_after_first_point)
    assert clock.now >= 5.0  # the outage was met and waited out
    assert record.info.status == "complete"
    assert [p.freq_hz for p in record.points] == [1.0e9, 1.5e9, 2.0e9]
    assert not (folder / ".lock").exists()


def test_longer_outage_exits_4_and_resume_finishes(server, monkeypatch, tmp_path, capsys):
    clock = fake_clock(monkeypatch, server, back_at=None)
    plan_path = write_plan(tmp_path, server)

    journalled = []

    def drop_after_first_point(point):
        journalled.append(point.freq_hz)
        if len(journalled) == 1:
            server.faults.offline = True

    folder = tmp_path / "run"
    with pytest.raises(CommunicationError) as info:
        run_plan(load_plan(plan_path), folder=folder, on_point=drop_after_first_point)
    assert cli._exit_code(info.value) == cli.EXIT_INSTRUMENT == 4
    assert clock.now >= 60.0  # the whole default retry window was tried
    assert not (folder / ".lock").exists()
    kept = load_run(folder)
    # what was journalled before the outage stopped the run is kept, in order
    assert kept.points and [p.freq_hz for p in kept.points] == journalled[: len(kept.points)]

    server.reboot()
    server.faults.offline = False
    out = io.StringIO()
    code = cli.main(["run", str(plan_path), "--resume", str(folder)], out=out)
    assert code == 0, capsys.readouterr().err
    record = load_run(folder)
    assert [p.freq_hz for p in record.points] == [1.0e9, 1.5e9, 2.0e9]
    assert record.points[0].nf_db == kept.points[0].nf_db  # the first point was not redone


def _without_read_query():
    """The generic profile without its READ? (start, *WAI and trace query in one line)."""
    from noisebench.drivers import load_profile
    from noisebench.drivers.profile import parse_profile

    text = open(load_profile("generic").source, encoding="utf-8").read()
    assert '\nread = "READ?"\n' in text
    return parse_profile(text.replace('\nread = "READ?"\n', "\nread = false\n"), "no_read")


@pytest.mark.parametrize("single_query", [True, False], ids=["READ?", "INIT;*WAI;TRAC?"])
def test_a_connection_dropped_during_a_one_line_acquisition_fails_at_once(server, single_query):
    """A later acquisition is one line (READ? and the error query, or without READ? start,
    *WAI, trace query, error query): the drop while READ? or *WAI waits for the acquisition
    makes the block read fail at once (the socket reads end of file) instead of waiting out
    the acquisition's deadline. The drop is made by the server exactly when the wait runs
    (no timer, no race)."""
    import time

    from noisebench.drivers.transport import ConnectionLost
    from noisebench.sims.scpi_instruments import InstrumentGone

    sim = server.instruments["analyzer"]
    waits: list[str] = []

    def drop_while_waiting():
        waits.append("dropped")
        server.faults.offline = True  # closes the client's socket
        raise InstrumentGone("dropped during *WAI")

    profile = "generic" if single_query else _without_read_query()
    sa = open_analyzer(server.resource("analyzer"), profile, retries=0)
    try:
        sa.configure(REQUEST)
        sa.acquire_trace()  # the first after connecting goes unit by unit (a short one)
        sa.configure(REQUEST.model_copy(update={"rbw_hz": 1e3, "averages": 2}))
        limit = sa.acquisition_timeout_s()
        assert limit >= 10.0  # 2 sweeps of 10 s
        sim.wait_complete = drop_while_waiting
        started = time.monotonic()
        with pytest.raises(ConnectionLost, match="connection lost"):
            sa.acquire_trace()
        elapsed = time.monotonic() - started
        assert waits == ["dropped"]  # the one line reached *WAI
        assert elapsed < limit / 4, (elapsed, limit)
    finally:
        del sim.wait_complete
        server.faults.offline = False
        sa.close()


def test_a_connection_dropped_during_opc_fails_over_at_once(server):
    """The instrument drops the connection while *OPC? waits for a long acquisition: the
    driver sees the closed socket between wait slices and fails at once instead of waiting
    out the acquisition timeout. The drop is made by the server exactly when *OPC? is being
    processed (no timer, no race)."""
    import time

    from noisebench.drivers.transport import ConnectionLost
    from noisebench.sims.scpi_instruments import InstrumentGone

    sim = server.instruments["analyzer"]

    def drop_while_waiting():
        server.faults.offline = True  # closes the client's socket
        raise InstrumentGone("dropped during *OPC?")

    # without READ? (the generic profile's first acquisition would send READ? alone)
    sa = open_analyzer(server.resource("analyzer"), _without_read_query(), retries=0)
    try:
        sa.configure(REQUEST.model_copy(update={"rbw_hz": 1e3, "averages": 2}))
        limit = sa.acquisition_timeout_s()
        assert limit >= 10.0  # 2 sweeps of 10 s: the old code waited all of it
        sim.wait_complete = drop_while_waiting
        started = time.monotonic()
        with pytest.raises(ConnectionLost, match="closed the connection"):
            sa.acquire_trace()
        elapsed = time.monotonic() - started
        assert elapsed < limit / 4, (elapsed, limit)
    finally:
        del sim.wait_complete
        server.faults.offline = False
        sa.close()
