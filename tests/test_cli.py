"""The command line: exit codes, one-line errors, demo, estimate, render, validate, info, and one
plan run through pyvisa-py against the SCPI simulator."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import pytest
from _backend_equivalence import assert_same_points

from noisebench.bench.registry import simulated_enr_table
from noisebench.frontends import cli
from noisebench.results.store import load_run
from noisebench.running.progress import NullProgress

SIM_PLAN = """\
method = "{method}"
[dut]
id = "CLI-TEST"
[bench]
analyzer = {{ resource = "sim://demo-lna?seed=2", compression_dbm = -3.0 }}
[acquisition]
attenuation_db = 0
target_u_nf_db = 0.15
[sweep]
freqs_hz = [1e9, 2e9, 3e9]
[expect]
dut_gain_db = 20.0
[output]
folder = "runs"
"""


def _write(path: Path, text: str) -> Path:
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def _run(argv, capsys):
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _error_lines(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.startswith("noisebench: error:")]


# --------------------------------------------------------------------------- errors


def test_bad_plan_gives_one_line_per_problem_and_exit_2(tmp_path, capsys):
    plan = _write(
        tmp_path / "bad.toml",
        """\
        method = "y_factor"
        [bench]
        analyzer = "sim://demo-lna"
        [acquisition]
        rbw_hz = -1
        detector = "peak"
        [sweep]
        freqs_hz = [1e9]
        """,
    )
    code, out, err = _run(["run", plan], capsys)
    assert code == cli.EXIT_INPUT
    lines = _error_lines(err)
    assert len(lines) == 2
    assert any("acquisition.rbw_hz: must be > 0.0 (got -1)" in line for line in lines)
    assert any("acquisition.detector:" in line for line in lines)
    assert "Traceback" not in err and out == ""


def test_missing_file_is_one_line(tmp_path, capsys):
    code, _, err = _run(["run", tmp_path / "nope.toml"], capsys)
    assert code == cli.EXIT_INPUT
    (line,) = err.strip().splitlines()
    assert line.startswith("noisebench: error: No such file or directory")


def test_usage_error_exit_2(capsys):
    code, _, err = _run(["frobnicate"], capsys)
    assert code == 2 and "invalid choice" in err


def test_keyboard_interrupt_exit_130(monkeypatch, capsys, tmp_path):
    def interrupted(args, out):
        raise KeyboardInterrupt

    monkeypatch.setattr(cli, "cmd_validate", interrupted)
    code, _, err = _run(["validate", tmp_path / "x.toml"], capsys)
    assert code == cli.EXIT_INTERRUPTED
    assert err.strip() == "noisebench: interrupted"


def test_unexpected_exception_is_still_one_line(monkeypatch, capsys, tmp_path):
    def broken(args, out):
        raise RuntimeError("boom\nsecond line")

    monkeypatch.setattr(cli, "cmd_validate", broken)
    code, _, err = _run(["validate", tmp_path / "x.toml"], capsys)
    assert code == cli.EXIT_FAILED
    (line,) = err.strip().splitlines()
    assert line.startswith("noisebench: error: unexpected RuntimeError: boom second line")


def test_safety_refusal_exit_3(tmp_path, capsys):
    plan = _write(
        tmp_path / "p.toml",
        SIM_PLAN.format(method="y_factor")
        + """
[safety]
dut_max_gain_db = 60.0
dut_bandwidth_hz = 20e9
""",
    )
    code, _, err = _run(["-q", "run", plan], capsys)
    assert code == cli.EXIT_SAFETY
    (line,) = _error_lines(err)
    assert "below its compression" in line


def test_console_script_never_shows_a_traceback(tmp_path):
    plan = _write(tmp_path / "bad.toml", 'method = "gain"\n')
    proc = subprocess.run(
        [sys.executable, "-m", "noisebench.frontends.cli", "validate", str(plan)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == cli.EXIT_INPUT
    assert "Traceback" not in proc.stderr
    assert "bad.toml: bench: is required" in proc.stderr


def test_help_lists_commands_and_cautions(capsys):
    code, out, _ = _run(["--help"], capsys)
    assert code == 0
    for command in ("run", "demo", "estimate", "serve", "render", "validate", "info"):
        assert command in out
    assert "Safety cautions" in out and "compression" in out


# --------------------------------------------------------------------------- commands


def test_validate_plan_and_enr_table(tmp_path, capsys):
    plan = _write(tmp_path / "p.toml", SIM_PLAN.format(method="y_factor"))
    code, out, _ = _run(["validate", plan], capsys)
    assert code == 0 and out.startswith("ok: y-factor plan p.toml, 3 points")
    good = _write(tmp_path / "enr.csv", "freq_hz,enr_db\n1e9,15.1\n2e9,15.0\n")
    code, out, _ = _run(["validate", good], capsys)
    assert code == 0 and "2 values, 1 GHz to 2 GHz" in out  # engineering units, no 1e+09
    bad = _write(tmp_path / "bad.csv", "freq_hz,enr_db\n2e9,15.1\n1e9,15.0\n")
    code, _, err = _run(["validate", bad], capsys)
    assert code == cli.EXIT_INPUT
    assert "bad.csv:" in err and "not sorted ascending" in err


def test_estimate_without_instruments(tmp_path, capsys):
    plan = _write(
        tmp_path / "p.toml",
        SIM_PLAN.format(method="gain")
        + '[gain]\nsource = "constant"\nvalue_db = 23.0\n',  # below the path gain
    )
    code, out, _ = _run(["estimate", plan], capsys)
    assert code == 0
    assert "no instrument touched" in out
    assert "3 points: measurement" in out
    real = Path(__file__).parents[1] / "examples" / "gain_real_bench.toml"
    code, out, _ = _run(["estimate", real], capsys)
    assert code == 0 and "13 points" in out


def test_estimate_on_instruments_needs_priors(tmp_path, capsys):
    (tmp_path / "enr.csv").write_text("freq_hz,enr_db\n1e8,15\n1e10,15\n", encoding="utf-8")
    plan = _write(
        tmp_path / "p.toml",
        """\
        method = "y_factor"
        [bench]
        analyzer = "TCPIP0::127.0.0.1::5025::SOCKET"
        [enr]
        table = "enr.csv"
        [sweep]
        freqs_hz = [1e9]
        """,
    )
    code, _, err = _run(["estimate", plan], capsys)
    assert code == cli.EXIT_INPUT
    assert "expect.dut_nf_db: is needed to forecast" in err


class _CtrlCAfterFirstPoint(NullProgress):
    """A progress display whose operator presses Ctrl-C once the first point is shown."""

    def point_done(self, point):
        raise KeyboardInterrupt


def test_run_writes_results_and_resume_continues(tmp_path, capsys, monkeypatch):
    from noisebench.running import progress

    plan = _write(tmp_path / "p.toml", SIM_PLAN.format(method="y_factor"))
    folder = tmp_path / "run1"
    monkeypatch.setattr(progress, "make_progress", _CtrlCAfterFirstPoint)
    code, out, err = _run(["-q", "run", plan, "--out", folder], capsys)
    assert code == cli.EXIT_INTERRUPTED
    assert f"--resume {folder}" in err
    assert len(load_run(folder).points) == 1
    monkeypatch.undo()
    code, out, _ = _run(["-q", "run", plan, "--resume", folder], capsys)
    assert code == 0, out
    record = load_run(folder)
    assert record.info.status == "complete" and len(record.points) == 3
    for name in ("results.json", "results.csv", "report.html"):
        assert (folder / name).is_file()
    assert list((folder / "plots").glob("*.png"))


def test_render_rewrites_report(tmp_path, capsys):
    plan = _write(
        tmp_path / "p.toml",
        SIM_PLAN.format(method="gain")
        + '[gain]\nsource = "constant"\nvalue_db = 23.0\n',  # below the path gain
    )
    folder = tmp_path / "run"
    assert _run(["-q", "run", plan, "--out", folder], capsys)[0] == 0
    (folder / "report.html").unlink()
    pngs = sorted((folder / "plots").glob("*.png"))
    assert pngs
    code, out, _ = _run(["render", folder, "--no-plots"], capsys)
    assert code == 0 and (folder / "report.html").is_file()
    assert "wrote" in out and f"embedded {len(pngs)} existing figures" in out
    assert f"({len(pngs)} with a narrow rendering for phones)" in out
    text = (folder / "report.html").read_text(encoding="utf-8")
    # what exists is embedded: each figure and its narrow rendering (plots/narrow/)
    assert text.count("data:image/png;base64,") == 2 * len(pngs)
    assert text.count("<source media=") == len(pngs)
    # a figure older than the run's data is stale: left out rather than shown
    import os

    stale = folder / "plots" / "gain.png"
    os.utime(stale, (1.0, 1.0))
    code, out, _ = _run(["render", folder, "--no-plots"], capsys)
    text = (folder / "report.html").read_text(encoding="utf-8")
    # its narrow rendering goes with it, though that file is fresh
    assert code == 0 and text.count("data:image/png;base64,") == 2 * (len(pngs) - 1)
    # a stale narrow rendering alone is left out: the wide figure is then shown everywhere
    os.utime(folder / "plots" / "narrow" / "noise_figure.png", (1.0, 1.0))
    code, out, _ = _run(["render", folder, "--no-plots"], capsys)
    text = (folder / "report.html").read_text(encoding="utf-8")
    assert code == 0 and text.count("<img ") == len(pngs) - 1
    assert text.count("<source media=") == len(pngs) - 2
    code, _, err = _run(["render", tmp_path / "empty"], capsys)
    assert code == cli.EXIT_INPUT and "is not a folder" in err


def test_demo_end_to_end(tmp_path, capsys):
    out_dir = tmp_path / "demo"
    code, out, _ = _run(["-q", "demo", "--out", out_dir, "--points", "4"], capsys)
    assert code == 0
    for method in ("y_factor", "gain"):
        record = load_run(out_dir / method)
        assert record.info.status == "complete"
        assert len(record.points) == 4
        assert record.budgets and record.verdict is not None
        assert (out_dir / method / "report.html").is_file()
        assert (out_dir / f"demo_{method}.toml").is_file()
    assert out.count("vs truth") == 2
    assert (out_dir / "enr.csv").is_file() and (out_dir / "input_cable.csv").is_file()
    first = {m: (out_dir / m / "results.json").read_bytes() for m in ("y_factor", "gain")}
    # again in the same folder: new run folders beside the first ones, which stay untouched;
    # without -q it shows the same progress as `run` (log lines when stderr is no terminal):
    # calibration as its own phase before the points, both methods
    code, out, err = _run(["demo", "--out", out_dir, "--points", "4"], capsys)
    assert code == 0
    lines = err.splitlines()
    for label in ("y_factor DEMO-LNA-0001", "gain DEMO-LNA-0001"):
        start = lines.index(f"{label}: 4 points to measure")
        run = lines[start:]
        assert run[1].startswith("calibration: 4 to do, ~"), run[:3]
        cal_done = next(i for i, x in enumerate(run) if x.startswith("calibration 4/4"))
        first_point = next(i for i, x in enumerate(run) if x.startswith("point 1/4 500 MHz"))
        assert cal_done < first_point and "left" in run[first_point]
        assert any(x.startswith("measurement: 4 to do") for x in run[cal_done:first_point])
    for method in ("y_factor", "gain"):
        assert load_run(out_dir / f"{method}-2").info.status == "complete"
        assert (out_dir / method / "results.json").read_bytes() == first[method]
        assert f"{out_dir / f'{method}-2'}" in out
    (out_dir / "file").write_text("x")
    code, _, err = _run(["-q", "demo", "--out", out_dir / "file"], capsys)
    assert code == cli.EXIT_INPUT and "is a file" in err


def test_demo_default_is_at_least_51_points():
    parser = cli.build_parser()
    assert parser.parse_args(["demo"]).points >= 51


def test_info_never_fails(capsys):
    code, out, _ = _run(["info", "--no-scan"], capsys)
    assert code == 0
    assert "pyvisa" in out and "VISA back ends" in out and "demo-lna" in out


def test_info_prints_the_plausibility_ranges_with_their_sources_when_asked(capsys):
    from noisebench.science.ranges import RANGES

    code, out, _ = _run(["info", "--no-scan"], capsys)
    assert code == 0 and "noisebench info --ranges" in out and "physical_temperature_k" not in out
    code, out, _ = _run(["info", "--no-scan", "--ranges"], capsys)
    assert code == 0
    section = out[out.index("plausibility ranges:") :]
    for key in RANGES:  # every range the plan checks use, once each
        assert section.count(f"  {key}: plausible ") == 1, key
    # the values of science/ranges.py as a reader sees them (frequencies in engineering units,
    # a fixed value once), each with its source and, where one exists, the on-purpose way out
    assert "physical_temperature_k: plausible 200..500 K; usual 273..330 K" in section
    assert "frequency_hz: plausible 9 kHz to 1.1 THz; usual 1 MHz to 110 GHz" in section
    assert "reference_temperature_k: plausible 200..400 K; usual 290 K" in section
    assert "source: the IRE/IEEE definition of noise figure fixes T0 = 290 K" in section
    flat = " ".join(section.split())
    assert "on purpose: for a cryogenic cold load say cryogenic = true in [corrections] " in flat
    assert "(then refused only below 1 K)" in flat
    assert flat.count("source: ") == len(RANGES) and flat.count("on purpose: ") == 1
    assert max(len(line) for line in section.splitlines()) <= 100


def test_info_scans_the_network_only_when_asked(capsys, monkeypatch):
    from noisebench.frontends import info

    scans = []
    monkeypatch.setattr(info, "visa_resources", lambda *a, **k: scans.append(1) or ["X::1"])
    code, out, _ = _run(["info"], capsys)
    assert code == 0 and scans == [] and "not scanned" in out and "--scan" in out
    code, out, _ = _run(["info", "--scan"], capsys)
    assert code == 0 and scans == [1] and "X::1" in out


PYVISA_PY_NOTES = (
    "TCPIP:instr resource discovery is limited to the default interface.",
    "TCPIP::hislip resource discovery requires the zeroconf package to be installed",
)


@pytest.mark.parametrize("verbose", [False, True])
def test_info_keeps_pyvisa_py_warnings_out_unless_verbose(capsys, monkeypatch, verbose):
    """pyvisa-py warns while it loads and while it lists resources (its discovery notes, an
    unclosed broadcast socket): without -v none of it reaches stdout, stderr or the warnings
    machinery; with -v the notes are logged for diagnosis. A fake manager stands in for the
    network scan (tests talk to loopback only)."""
    import logging
    import warnings

    import pyvisa
    from pyvisa import highlevel

    def noisy_backends():
        warnings.warn(PYVISA_PY_NOTES[1], UserWarning, stacklevel=1)
        return ["ivi", "py"]

    class NoisyManager:
        def __init__(self, library):
            warnings.warn("unclosed <socket.socket fd=3>", ResourceWarning, stacklevel=1)

        def list_resources(self):
            warnings.warn(PYVISA_PY_NOTES[0], UserWarning, stacklevel=1)
            return ("TCPIP0::127.0.0.1::5025::SOCKET",)

        def close(self):
            pass

    monkeypatch.setattr(highlevel, "list_backends", noisy_backends)
    monkeypatch.setattr(pyvisa, "ResourceManager", NoisyManager)
    monkeypatch.setattr(logging.getLogger("noisebench"), "handlers", [])  # a fresh CLI handler
    argv = (["-v"] if verbose else []) + ["info", "--scan"]
    with warnings.catch_warnings(record=True) as escaped:
        warnings.simplefilter("always")
        code, out, err = _run(argv, capsys)
    assert code == 0 and "TCPIP0::127.0.0.1::5025::SOCKET" in out
    assert escaped == []  # nothing left for Python to print at exit or pytest to collect
    for note in (*PYVISA_PY_NOTES, "unclosed"):
        assert note not in out
        assert (note in err) is verbose, (note, err)


def test_serve_passes_its_options_to_the_simulator(capsys):
    code, out, _ = _run(["serve", "--help"], capsys)
    assert code == 0
    assert "--scenario" in out
    assert out.startswith("usage: noisebench serve")  # the command the user typed


def test_serve_logs_each_line_once_under_the_cli(capsys):
    import logging

    from noisebench.frontends.cli import _configure_logging
    from noisebench.sims import serve

    _configure_logging(cli.build_parser().parse_args(["info"]))
    assert serve._logging_configured()  # so serve adds no second handler
    before = len(logging.getLogger().handlers)
    stop = threading.Event()
    stop.set()
    assert serve.main(["--port", "0", "--duration", "0"], stop_event=stop) == 0
    assert len(logging.getLogger().handlers) == before


@pytest.mark.parametrize("command", ["run", "station", "probe"])
def test_commands_that_drive_hardware_show_the_safety_cautions(capsys, command):
    from noisebench.running.safety import CAUTIONS

    code, out, _ = _run([command, "--help"], capsys)
    flat = " ".join(out.split())
    assert code == 0 and all(" ".join(line.split()) in flat for line in CAUTIONS)


# --------------------------------------------------------------------------- SCPI simulator


@pytest.mark.parametrize("drive", ["analyzer", "supply"])
def test_plan_runs_against_the_scpi_simulator_through_pyvisa(sim_server, tmp_path, capsys, drive):
    simulated_enr_table(sim_server.bench).to_csv(tmp_path / "enr.csv")
    source = (
        'drive = "analyzer"'
        if drive == "analyzer"
        else f'drive = "supply", resource = "{sim_server.resource("supply")}", drive_v = 28.0'
    )
    plan_text = """\
        method = "y_factor"
        [dut]
        id = "SCPI-TEST"
        [bench]
        {bench}
        [acquisition]
        attenuation_db = 0
        target_u_nf_db = 0.2
        time_limit_s = 10
        [sweep]
        freqs_hz = [1.5e9, 2.5e9]
        [enr]
        table = "enr.csv"
        [corrections]
        source_temperature_k = 296.5
        [expect]
        dut_gain_db = 20.0
        [output]
        folder = "runs"
        plots = false
        """
    scpi_bench = (
        f"noise_source = {{ {source}, settle_time_s = 0.02 }}\n        "
        # the port from the command line, as the example plans take it
        'analyzer = { resource = "TCPIP0::127.0.0.1::${NB_TEST_SCPI_PORT}::SOCKET", '
        'profile = "generic", compression_dbm = -3.0 }'
    )
    plan = _write(tmp_path / "scpi.toml", plan_text.format(bench=scpi_bench))
    folder = tmp_path / "run"
    port = sim_server.ports["analyzer"]
    define = f"NB_TEST_SCPI_PORT={port}"
    code, out, err = _run(["-q", "run", plan, "--out", folder, "--define", define], capsys)
    assert code == 0, err
    record = load_run(folder)
    assert record.info.status == "complete"
    assert record.info.identities["analyzer"].startswith("noisebench,simulated analyzer")
    commands = [line for who, line in sim_server.command_log if who == "analyzer"]
    assert any(line.upper().startswith("SIM") for line in commands)  # the paths were moved
    assert not sim_server.bench.noise_source.is_hot
    json.loads((folder / "results.json").read_text(encoding="utf-8"))

    # The same plan on the in-process simulator with the server's scenario and seed draws the
    # same noise: the SCPI path must give the same numbers, up to the float32 rounding of the
    # traces it transfers (tests/_backend_equivalence.py). Agreement with the simulator's
    # truth within the stated uncertainty is tests/test_end_to_end.py's job (ideal benches).
    local_bench = 'analyzer = { resource = "sim://demo-lna?seed=1", compression_dbm = -3.0 }'
    local_plan = _write(tmp_path / "local.toml", plan_text.format(bench=local_bench))
    code, _, err = _run(["-q", "run", local_plan, "--out", tmp_path / "local"], capsys)
    assert code == 0, err
    assert_same_points(load_run(tmp_path / "local"), record, rbw_hz=1e6)  # plan default RBW
