"""The plan checked against the analyzer's profile before any instrument is touched: one line
per problem naming the setting and the profile; and a full run on the second dialect."""

from __future__ import annotations

import io
from pathlib import Path

from _sequencer_helpers import IDEAL_OVERRIDES
from scipy.stats import norm

from noisebench.bench.registry import simulated_enr_table
from noisebench.frontends.cli import main
from noisebench.results.store import load_run
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer

BENCH_TEMPERATURE_K = 296.0
# nothing listens here: validate must not connect (a connection attempt would fail the test)
RESOURCE = "TCPIP0::127.0.0.1::9::SOCKET"


def write_plan(folder: Path, acquisition: str, resource: str = RESOURCE, extra: str = "") -> Path:
    enr = folder / "enr.csv"
    enr.write_text("freq_hz,enr_db\n1e8,15.0\n1e10,15.0\n", encoding="utf-8")
    plan = folder / "plan.toml"
    plan.write_text(
        f"""\
method = "y_factor"
[dut]
id = "CHECK"
[bench]
analyzer = {{ resource = "{resource}", profile = "sim_compact" }}
noise_source = {{ drive = "analyzer" }}
[acquisition]
{acquisition}
[sweep]
freqs_hz = [1.0e9, 1.5e9]
[enr]
table = "enr.csv"
[output]
plots = false
report = false
{extra}""",
        encoding="utf-8",
    )
    return plan


def run_cli(argv: list[str], capsys) -> tuple[int, str, str]:
    out = io.StringIO()
    code = main(argv, out=out)
    return code, out.getvalue(), capsys.readouterr().err


def test_validate_refuses_a_detector_the_profile_lacks(tmp_path, capsys):
    plan = write_plan(tmp_path, 'rbw_hz = 1e6\ndetector = "average"')
    code, _, err = run_cli(["validate", str(plan)], capsys)
    assert code == 2
    lines = [line for line in err.splitlines() if "detector" in line]
    assert len(lines) == 1
    assert "'average' is not available in profile sim_compact" in lines[0]
    assert "rms, sample" in lines[0]


def test_validate_refuses_an_attenuation_the_profile_cannot_set(tmp_path, capsys):
    plan = write_plan(tmp_path, "rbw_hz = 1e6\nattenuation_db = 0")
    code, _, err = run_cli(["validate", str(plan)], capsys)
    assert code == 2
    assert err.count("attenuation_db") >= 1
    line = next(line for line in err.splitlines() if "attenuation_db" in line)
    assert "profile sim_compact cannot set attenuation_db" in line


def test_run_refuses_before_connecting(tmp_path, capsys):
    """The same check at the start of run: exit 2 (bad input), not 4 (no instrument)."""
    plan = write_plan(tmp_path, "rbw_hz = 1e6\nattenuation_db = 0")
    code, _, err = run_cli(["run", str(plan), "--out", str(tmp_path / "run")], capsys)
    assert code == 2
    assert "cannot set attenuation_db" in err
    assert not (tmp_path / "run").exists()


def test_validate_warns_once_about_rounding_and_split_averages(tmp_path, capsys):
    plan = write_plan(tmp_path, "rbw_hz = 2e5\nmax_averages = 30000\ntrace_points = 40001")
    code, out, err = run_cli(["validate", str(plan)], capsys)
    assert code == 0, err
    assert out.startswith("ok:")
    warnings = [line for line in err.splitlines() if "warning" in line]
    assert len(warnings) == 3, warnings
    assert any("200000 Hz will be applied as 300000 Hz" in w and "1-3-10" in w for w in warnings)
    assert any("40001" in w and "20001" in w for w in warnings)
    assert any("30000 is above profile sim_compact's 10000" in w for w in warnings)


def test_points_outside_the_profile_range_are_refused(tmp_path, capsys):
    plan = write_plan(tmp_path, "rbw_hz = 1e6")
    text = plan.read_text().replace("[1.0e9, 1.5e9]", "[1.0e9, 6.0e10]")
    plan.write_text(text)
    code, _, err = run_cli(["validate", str(plan)], capsys)
    assert code == 2
    assert "outside profile sim_compact's range" in err


def test_a_y_factor_run_on_the_second_dialect_needs_no_workaround(tmp_path, capsys):
    """No abort, big-endian only, RBW 1-3-10, switch marker, averaging off at power-on, 10 000
    averages at most, MHz frequencies: the profile alone adapts the run, and NF agrees with
    the simulator's truth within the stated uncertainty (Bonferroni limit over the points)."""
    bench = SimulatedBench.from_scenario(
        "demo-lna",
        seed=5,
        ideal=True,
        **IDEAL_OVERRIDES,
        ambient_k=BENCH_TEMPERATURE_K,
        noise_source__physical_temperature_k=BENCH_TEMPERATURE_K,
    )
    with SimServer(bench, dialect="compact") as server:
        plan = write_plan(
            tmp_path,
            "rbw_hz = 1e6\ntarget_u_nf_db = 0.1\ntime_limit_s = 20",
            resource=server.resource("analyzer"),
            extra=f"[corrections]\ninput_loss = 0.3\nsource_temperature_k = "
            f"{BENCH_TEMPERATURE_K}\n[expect]\ndut_gain_db = 20.0\n",
        )
        simulated_enr_table(bench).to_csv(tmp_path / "enr.csv")
        code, out, err = run_cli(["run", str(plan), "--out", str(tmp_path / "run")], capsys)
        sent = [line for who, line in server.command_log if who == "analyzer"]
        truth = bench.truth([1.0e9, 1.5e9])
    assert code == 0, err
    assert "TRAC:MEAN ON" in sent and "TUN:CENT 1000" in sent
    assert not any(line.startswith(("ABOR", "FORM")) for line in sent)
    assert not (tmp_path / "run" / ".lock").exists()
    record = load_run(tmp_path / "run")
    z = float(norm.isf(0.01 / (2 * 2)))
    for point, nf_db in zip(record.points, truth["nf_db"], strict=True):
        u = float(point.notes.get("u_nf_db_with_gain", point.u_nf_db))
        assert abs(point.nf_db - nf_db) <= z * u, (point.freq_hz, point.nf_db, nf_db, u)


def test_a_gain_method_run_on_the_second_dialect_needs_no_workaround(tmp_path, capsys):
    """The gain method measures the DUT gain with tones read as band power: the compact
    dialect has no band-power marker, so the driver integrates a trace over the band."""
    bench = SimulatedBench.from_scenario(
        "demo-lna",
        seed=6,
        ideal=True,
        **IDEAL_OVERRIDES,
        ambient_k=BENCH_TEMPERATURE_K,
        noise_source__physical_temperature_k=BENCH_TEMPERATURE_K,
    )
    with SimServer(bench, dialect="compact") as server:
        plan = tmp_path / "gain.toml"
        plan.write_text(
            f"""\
method = "gain"
[dut]
id = "GAIN-COMPACT"
[bench]
analyzer = {{ resource = "{server.resource("analyzer")}", profile = "sim_compact" }}
generator = {{ resource = "{server.resource("generator")}", profile = "sim_compact", \
max_level_dbm = -10.0 }}
noise_source = {{ drive = "none" }}
[acquisition]
rbw_hz = 1e6
target_u_nf_db = 0.1
time_limit_s = 20
[sweep]
freqs_hz = [1.0e9, 1.5e9]
[gain]
source = "measure"
max_gain_db = 30.0
dut_p1db_out_dbm = 14.0
[corrections]
input_loss = 0.3
output_loss = 0.5
source_temperature_k = {BENCH_TEMPERATURE_K}
[expect]
dut_gain_db = 20.0
[output]
plots = false
report = false
""",
            encoding="utf-8",
        )
        code, _, err = run_cli(["run", str(plan), "--out", str(tmp_path / "run")], capsys)
        truth = bench.truth([1.0e9, 1.5e9])
    assert code == 0, err
    record = load_run(tmp_path / "run")
    z = float(norm.isf(0.01 / (2 * 4)))
    for point, nf_db, gain_db in zip(record.points, truth["nf_db"], truth["gain_db"], strict=True):
        u = float(point.notes.get("u_nf_db_with_gain", point.u_nf_db))
        assert abs(point.nf_db - nf_db) <= z * u, (point.freq_hz, point.nf_db, nf_db, u)
        assert abs(point.gain_db - gain_db) <= z * point.u_gain_db, (point.gain_db, gain_db)
