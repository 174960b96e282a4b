"""The live profile probe against both simulated dialects: all ok with the right profile, and
each wrong trait reported with the profile line to change."""

from __future__ import annotations

import io

import pytest

from noisebench.drivers.probe import format_probe, probe_analyzer
from noisebench.drivers.profile import load_profile, parse_profile
from noisebench.frontends.cli import main
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer


@pytest.fixture(scope="module", params=["generic", "compact"])
def server(request):
    bench = SimulatedBench.from_scenario("demo-lna", seed=2)
    with SimServer(bench, dialect=request.param) as srv:
        yield srv


def profile_for(server: SimServer) -> str:
    return "generic" if server.dialect == "generic" else "sim_compact"


def test_probe_with_the_right_profile_is_all_ok(server):
    results = probe_analyzer(server.resource("analyzer"), profile_for(server))
    failed = [r for r in results if r.status == "FAIL"]
    assert failed == [], format_probe(results)
    checks = {r.check: r for r in results}
    assert {"identity", "rbw_hz", "detector", "trace format", "trace scatter", "timing"} <= set(
        checks
    )
    assert "big-endian" in checks["trace format"].detail
    # the generic profile's single read query (SCPI-1999 READ?) was tried; compact has none
    assert ("read query" in checks) == (server.dialect == "generic")
    # nothing but the analyzer was touched, and its noise drive was never switched
    assert server.bench.noise_source.is_hot is False
    assert not any(line == "OUTP:NOIS ON" for _, line in server.command_log)
    if server.dialect == "compact":
        assert "300000 Hz (sent 200000)" in checks["rbw_hz"].detail
        assert "OFF at connect" in checks["averaging on/off"].detail
        assert checks["abort"].status == "note" and "abort = false" in checks["abort"].detail
        assert "offers noise_density" in checks["marker"].detail
        assert checks["averages max"].detail.startswith("10000 per trace (10001 refused)")
        assert "big-endian" in checks["trace format"].detail


def test_probe_names_the_profile_lines_to_change():
    """First drafts of a profile for the compact dialect with the mistakes users make: Hz
    where the instrument takes MHz, no RBW rounding rule; then the wrong byte order."""
    text = open(load_profile("sim_compact").source, encoding="utf-8").read()
    units = text.replace(
        'set = "TUN:SPAN {value:.12g}"\nget = "TUN:SPAN?"\nunit = "MHz"',
        'set = "TUN:SPAN {value:.12g}"\nget = "TUN:SPAN?"\nunit = "Hz"',
    ).replace('sequence = "1-3-10"\n', "")
    order = text.replace("big_endian = true", "big_endian = false")
    bench = SimulatedBench.from_scenario("demo-lna", seed=2)
    with SimServer(bench, dialect="compact") as srv:
        first = probe_analyzer(srv.resource("analyzer"), parse_profile(units, "draft.toml"))
        second = probe_analyzer(srv.resource("analyzer"), parse_profile(order, "draft2.toml"))
    table = format_probe(first)
    by = {r.check: r for r in first}
    assert by["span_hz"].status == "FAIL", table
    assert by["span_hz"].fix == '[analyzer.settings.span_hz] unit = "MHz"', table
    assert by["rbw_hz"].status == "FAIL" and "sequence" in by["rbw_hz"].fix, table
    assert "to change in the profile:" in table
    table = format_probe(second)
    by = {r.check: r for r in second}
    assert by["trace format"].status == "FAIL", table
    assert by["trace format"].fix == "[analyzer.trace] big_endian = true", table


def test_probe_command_line(capsys):
    bench = SimulatedBench.from_scenario("demo-lna", seed=2)
    with SimServer(bench, dialect="compact") as srv:
        out = io.StringIO()
        code = main(["probe", srv.resource("analyzer"), "--profile", "sim_compact"], out=out)
    err = capsys.readouterr().err
    assert code == 0, out.getvalue() + err
    assert "no noise source or generator is switched on" in err
    assert out.getvalue().rstrip().endswith("all ok")


def test_probe_without_an_instrument_exits_4(capsys):
    out = io.StringIO()
    code = main(
        ["probe", "TCPIP0::127.0.0.1::9::SOCKET", "--profile", "sim_compact", "--timeout", "2"],
        out=out,
    )
    assert code == 4
    assert "connect" in out.getvalue() and "FAIL" in out.getvalue()
