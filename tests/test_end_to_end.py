"""End-to-end proofs on the simulated bench.

1. A whole plan run through pyvisa-py sockets against the SCPI simulator gives the in-process
   back end's result: within statistics on independent noise, to float32 trace-transfer
   precision on the same noise (same seed), and both agree with the simulator's truth - for
   the Y-factor method (noise source on the SCPI DC supply) and the gain method (DUT gain
   measured with the SCPI generator).
2. ``noisebench run`` killed with SIGKILL mid-run and continued with ``--resume`` loses
   nothing and repeats nothing; Ctrl-C (SIGINT) leaves the noise source off and exits 130.

Statistical checks: each test allows a family-wise false alarm of ``FAMILY_FALSE_ALARM``,
split over its comparisons (Bonferroni), each a two-sided normal test of a difference
against the stated standard uncertainties.
"""

from __future__ import annotations

import csv
import json
import math
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from _backend_equivalence import assert_same_points
from _sequencer_helpers import IDEAL_OVERRIDES
from scipy.stats import norm

from noisebench.bench.registry import simulated_enr_table, simulated_session
from noisebench.frontends import cli
from noisebench.results.store import (
    JOURNAL_FILE,
    RESULTS_CSV_FILE,
    RESULTS_JSON_FILE,
    RUN_INFO_FILE,
    load_run,
)
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import run_plan
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer

FAMILY_FALSE_ALARM = 1e-4
FREQS_HZ = (1e9, 2e9, 3e9, 4e9)
RBW_HZ = 1e6
TARGET_U_NF_DB = 0.1
BENCH_TEMPERATURE_K = 296.0
"""Ambient, cables and the cold noise source all at one temperature, so the plan's single
``source_temperature_k`` describes the bench exactly (the demo scenario's source runs 0.5 K
warmer than its ambient, an error the plan cannot state)."""
INPUT_LOSS_DB = 0.3  # the flat cable losses of IDEAL_OVERRIDES, declared in the plan
OUTPUT_LOSS_DB = 0.5
SEED_IN_PROCESS = 21
SEED_SCPI = 22
SUPPLY_DRIVE_V = 28.0  # demo-lna's nominal drive: the ENR table holds for it
CHILD_TIMEOUT_S = 120.0


def z_limit(comparisons: int, family_false_alarm: float = FAMILY_FALSE_ALARM) -> float:
    """Two-sided normal limit for ``comparisons`` tests sharing ``family_false_alarm``."""
    # reference: Bonferroni inequality; normal quantile from scipy.stats
    return float(norm.isf(family_false_alarm / (2 * comparisons)))


def ideal_bench(seed: int) -> SimulatedBench:
    """demo-lna without systematic errors (``ideal=True``), with the sequencer tests' flat
    gain and losses, every temperature equal: only the noise differs between seeds."""
    return SimulatedBench.from_scenario(
        "demo-lna",
        seed=seed,
        ideal=True,
        **IDEAL_OVERRIDES,
        ambient_k=BENCH_TEMPERATURE_K,
        noise_source__physical_temperature_k=BENCH_TEMPERATURE_K,
    )


@pytest.fixture
def ideal_server():
    server = SimServer(ideal_bench(SEED_SCPI)).start()
    try:
        yield server
    finally:
        server.stop()


# --------------------------------------------------------------------------- plans


def plan_data(
    method: str,
    bench: dict[str, Any],
    enr_csv: Path,
    *,
    freqs_hz=FREQS_HZ,
    target: float = TARGET_U_NF_DB,
) -> dict[str, Any]:
    """The plan of both back ends; only ``bench`` differs between them."""
    data: dict[str, Any] = {
        "method": method,
        "dut": {"id": "E2E-LNA"},
        "bench": bench,
        "acquisition": {
            "rbw_hz": RBW_HZ,
            "attenuation_db": 0,
            "target_u_nf_db": target,
            "time_limit_s": 20,
        },
        "sweep": {"freqs_hz": list(freqs_hz)},
        "corrections": {
            "input_loss": INPUT_LOSS_DB,
            "output_loss": OUTPUT_LOSS_DB if method == "gain" else 0.0,
            "source_temperature_k": BENCH_TEMPERATURE_K,
        },
        "expect": {"dut_gain_db": 20.0},
        "output": {"plots": False, "report": False},
    }
    if method == "y_factor":
        data["enr"] = {"table": str(enr_csv)}
    else:
        data["gain"] = {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 14.0}
    return data


def in_process_bench_section(method: str) -> dict[str, Any]:
    section: dict[str, Any] = {"analyzer": {"resource": "sim://demo-lna", "compression_dbm": -3.0}}
    if method == "gain":
        section["generator"] = {"resource": "sim", "max_level_dbm": -10.0}
        section["noise_source"] = {"drive": "none"}
    return section


def scpi_bench_section(method: str, server: SimServer) -> dict[str, Any]:
    section: dict[str, Any] = {
        "analyzer": {
            "resource": server.resource("analyzer"),
            "profile": "generic",
            "compression_dbm": -3.0,
        }
    }
    if method == "gain":
        section["generator"] = {"resource": server.resource("generator"), "max_level_dbm": -10.0}
        section["noise_source"] = {"drive": "none"}
    else:
        section["noise_source"] = {
            "drive": "supply",
            "resource": server.resource("supply"),
            "drive_v": SUPPLY_DRIVE_V,
            "settle_time_s": 0.02,
        }
    return section


# --------------------------------------------------------------------------- 1. SCPI vs in process


@dataclass
class BackEndRuns:
    method: str
    in_process: Any  # RunRecord, seed SEED_IN_PROCESS
    in_process_same_noise: Any  # RunRecord, seed SEED_SCPI
    scpi: Any  # RunRecord through pyvisa-py, server seed SEED_SCPI
    truth: dict[str, Any]
    commands: list[tuple[str, str]]
    source_hot_after: bool
    supply_on_after: bool
    generator_on_after: bool
    scpi_s: float


def _u_stated(point) -> float:
    """The point's stated standard uncertainty: the density jitter, plus the measured gain's
    own uncertainty for the gain method (both back ends measure it)."""
    return float(point.notes.get("u_nf_db_with_gain", point.u_nf_db))


@pytest.fixture(scope="module", params=["y_factor", "gain"])
def runs(request, tmp_path_factory) -> BackEndRuns:
    method = request.param
    folder = tmp_path_factory.mktemp(f"e2e_{method}")
    enr_csv = folder / "enr.csv"
    # no calibration error: the same table for every seed
    simulated_enr_table(ideal_bench(0)).to_csv(enr_csv)
    local = parse_plan(plan_data(method, in_process_bench_section(method), enr_csv))
    records = []
    for seed in (SEED_IN_PROCESS, SEED_SCPI):
        record, _ = run_plan(
            local,
            folder=folder / f"in_process_{seed}",
            outputs=False,
            session=simulated_session(ideal_bench(seed), local.bench),
        )
        records.append(record)
    with SimServer(ideal_bench(SEED_SCPI)) as server:
        remote = parse_plan(plan_data(method, scpi_bench_section(method, server), enr_csv))
        started = time.perf_counter()
        scpi, _ = run_plan(remote, folder=folder / "scpi", outputs=False)  # opens pyvisa-py
        scpi_s = time.perf_counter() - started
        sim = server.bench
        return BackEndRuns(
            method,
            records[0],
            records[1],
            scpi,
            sim.truth(list(FREQS_HZ)),
            list(server.command_log),
            sim.noise_source.is_hot,
            sim.supply.output_on,
            sim.generator.output_on,
            scpi_s,
        )


def test_scpi_run_really_went_through_pyvisa_sockets(runs):
    info = runs.scpi.info
    assert info.status == "complete"
    assert info.notes["bench_kind"] == "scpi"
    assert info.identities["analyzer"].startswith("noisebench,simulated analyzer")
    assert info.notes["resources"]["analyzer"].startswith("TCPIP0::127.0.0.1::")
    by = {who for who, _ in runs.commands}
    analyzer = [line.upper() for who, line in runs.commands if who == "analyzer"]
    # traces came over the socket (the generic profile fetches with READ? or TRAC?)
    assert any(line.startswith(("TRAC?", "READ?")) for line in analyzer)
    assert any(line.startswith("SIM:PATH") for line in analyzer)  # the simulator moved paths
    if runs.method == "y_factor":
        assert "supply" in by and "generator" not in by
        assert ("supply", "OUTP ON") in runs.commands
    else:
        assert "generator" in by and "supply" not in by
        assert ("generator", "OUTP ON") in runs.commands
        assert info.notes["gain_measurement"]["points"]  # the DUT gain was measured
    # the run ended in the safe state, read back on the simulated instruments themselves
    assert not runs.source_hot_after and not runs.supply_on_after
    assert not runs.generator_on_after


def test_scpi_matches_in_process_within_statistics(runs):
    """Independent noise (seeds 21 and 22), equal systematics (none): only statistics differ.
    For the gain method the stated u also holds the measured gain's linearity term, the same
    on both sides, which makes this test slightly conservative (about 2 % in sigma)."""
    z = z_limit(len(FREQS_HZ))  # 4.21 for 4 points
    scores = []
    for local, remote in zip(runs.in_process.points, runs.scpi.points, strict=True):
        assert local.freq_hz == remote.freq_hz
        sigma = math.hypot(_u_stated(local), _u_stated(remote))
        scores.append((remote.nf_db - local.nf_db) / sigma)
        assert abs(scores[-1]) <= z, (local.freq_hz, local.nf_db, remote.nf_db, sigma)
        assert remote.u_nf_db <= TARGET_U_NF_DB and local.u_nf_db <= TARGET_U_NF_DB


def test_same_noise_gives_the_same_result_over_scpi(runs):
    """Same seed: the SCPI path reproduces the in-process numbers; the only difference
    allowed is float32 rounding of the transferred traces (tests/_backend_equivalence.py)."""
    assert_same_points(runs.in_process_same_noise, runs.scpi, RBW_HZ)
    if runs.method == "gain":
        # measured gain: band-power marker replies are shortest round-trip reprs of doubles
        # (noisebench/sims/scpi_parser.format_number), so both back ends hold the same numbers
        for local, remote in zip(runs.in_process_same_noise.points, runs.scpi.points, strict=True):
            assert remote.gain_db == local.gain_db


def test_both_back_ends_agree_with_the_simulator_truth(runs):
    """NF and DUT gain of both runs against the models' values, each within the stated
    uncertainty (gain method: the measured gain's; Y-factor: the gain from the readings)."""
    records = (runs.in_process, runs.scpi)
    z = z_limit(len(records) * 2 * len(FREQS_HZ))  # 4.52 for 16 comparisons
    for record in records:
        for point, nf_db, gain_db in zip(
            record.points, runs.truth["nf_db"], runs.truth["gain_db"], strict=True
        ):
            assert abs(point.nf_db - nf_db) <= z * _u_stated(point), (point.freq_hz, nf_db)
            assert abs(point.gain_db - gain_db) <= z * point.u_gain_db, (point.freq_hz, gain_db)


# --------------------------------------------------------------------------- 2. kill and resume


SIGINT_LAUNCHER = (
    "import runpy, signal; signal.signal(signal.SIGINT, signal.default_int_handler); "
    "runpy.run_module('noisebench.frontends.cli', run_name='__main__', alter_sys=True)"
)
"""``python -m noisebench.frontends.cli`` with Python's own Ctrl-C handler installed first: a child
started from a non-interactive shell may inherit SIGINT as ignored, and Python then installs
no KeyboardInterrupt handler (Python docs, signal module)."""


def write_scpi_plan(folder: Path, server: SimServer, freqs_hz, target: float) -> Path:
    """A Y-factor plan (TOML, as a user writes it) on the SCPI simulator's instruments,
    measured group by group: after any group is journalled the next one goes hot again, so a
    run can always be stopped with the source hot after its first points (a sweep-level
    schedule may journal every group at the end of its last block, cold, and then never go
    hot again)."""
    enr_csv = folder / "enr.csv"
    simulated_enr_table(server.bench).to_csv(enr_csv)
    plan = folder / "plan.toml"
    plan.write_text(
        f"""\
method = "y_factor"
[dut]
id = "E2E-KILL"
[bench]
analyzer = {{ resource = "{server.resource("analyzer")}", compression_dbm = -3.0 }}
noise_source = {{ drive = "supply", resource = "{server.resource("supply")}", \
drive_v = {SUPPLY_DRIVE_V}, settle_time_s = 0.02 }}
[acquisition]
rbw_hz = {RBW_HZ}
attenuation_db = 0
target_u_nf_db = {target}
[sweep]
freqs_hz = {list(freqs_hz)}
[enr]
table = "enr.csv"
[corrections]
input_loss = {INPUT_LOSS_DB}
source_temperature_k = {BENCH_TEMPERATURE_K}
[expect]
dut_gain_db = 20.0
[switching]
mode = "per_group"
[output]
plots = false
report = false
""",
        encoding="utf-8",
    )
    return plan


def journal_points(raw: bytes) -> list[dict[str, Any]]:
    """Point entries of the complete lines of a journal (a torn last line is ignored)."""
    lines = raw.split(b"\n")[:-1]
    return [entry["point"] for entry in map(json.loads, lines) if entry["kind"] == "point"]


def moved_to_through(log: list[tuple[str, str]]) -> bool:
    """True if the analyzer was told to take the THROUGH path (SCPI short or long form)."""
    for who, line in log:
        header, _, value = line.upper().partition(" ")
        if who == "analyzer" and header == "SIM:PATH" and value.strip().startswith("THR"):
            return True
    return False


def read_journal(folder: Path) -> bytes:
    try:
        return (folder / JOURNAL_FILE).read_bytes()
    except FileNotFoundError:
        return b""


def start_run(argv: list[str], folder: Path, *, launcher: list[str]) -> subprocess.Popen:
    """``noisebench ARGV`` as a child process, output to files (a full pipe would block it)."""
    with open(folder / "child.out", "wb") as out, open(folder / "child.err", "wb") as err:
        return subprocess.Popen(
            [sys.executable, *launcher, *argv], stdout=out, stderr=err, cwd=folder
        )


def hold_while_source_hot(
    proc: subprocess.Popen, run: Path, server: SimServer, min_points: int
) -> None:
    """Return once ``proc`` has journalled ``min_points`` and is stopped with the noise source
    hot: every reply held back (``hold_replies``), so its next query cannot complete and
    it cannot switch the source cold (the ``OUTP OFF`` write comes after replies it is still
    waiting for). The source is checked again after the hold began, so it was hot while
    held; if it went cold just before, the hold is lifted until the next hot phase."""
    deadline = time.monotonic() + CHILD_TIMEOUT_S
    while time.monotonic() < deadline:
        assert proc.poll() is None, "the run ended before it could be stopped: lengthen it"
        if (
            len(journal_points(read_journal(run))) >= min_points
            and server.bench.noise_source.is_hot
        ):
            server.faults.hold_replies = True
            time.sleep(0.05)
            if server.bench.noise_source.is_hot:
                return
            server.faults.hold_replies = False  # it switched cold just before: next hot phase
        time.sleep(0.002)
    raise AssertionError("the run never reached a hot phase after its first points")


@pytest.fixture
def child_processes():
    started: list[subprocess.Popen] = []
    yield started
    for proc in started:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)


def test_sigkill_mid_run_then_resume_loses_nothing(tmp_path, ideal_server, child_processes):
    server = ideal_server
    freqs = [1e9, 1.5e9, 2e9, 2.5e9, 3e9, 3.5e9]
    plan = write_scpi_plan(tmp_path, server, freqs, target=0.12)
    run = tmp_path / "run"
    proc = start_run(
        ["-q", "run", str(plan), "--out", str(run)],
        tmp_path,
        launcher=["-m", "noisebench.frontends.cli"],
    )
    child_processes.append(proc)
    hold_while_source_hot(proc, run, server, min_points=2)
    proc.send_signal(signal.SIGKILL)
    assert proc.wait(timeout=10) == -signal.SIGKILL

    before_raw = read_journal(run)
    before = journal_points(before_raw)
    assert 2 <= len(before) < len(freqs)
    assert json.loads((run / RUN_INFO_FILE).read_text())["status"] == "running"  # never ended
    assert load_run(run).info.status == "interrupted"  # its lock died with it: not live
    assert server.bench.noise_source.is_hot  # as on a real bench, SIGKILL left the source on

    server.faults.hold_replies = False
    first_resumed_command = len(server.command_log)
    resumed = subprocess.run(
        [
            sys.executable,
            "-m",
            "noisebench.frontends.cli",
            "-q",
            "run",
            str(plan),
            "--resume",
            str(run),
        ],
        capture_output=True,
        text=True,
        timeout=CHILD_TIMEOUT_S,
        cwd=tmp_path,
    )
    assert resumed.returncode == cli.EXIT_OK, resumed.stderr

    after_raw = read_journal(run)
    complete_lines = before_raw[: before_raw.rfind(b"\n") + 1]
    assert after_raw.startswith(complete_lines)  # finished points kept byte for byte
    assert sorted(p["freq_hz"] for p in journal_points(after_raw)) == freqs  # each once
    results = json.loads((run / RESULTS_JSON_FILE).read_text(encoding="utf-8"))
    assert results["info"]["status"] == "complete"
    assert len(results["info"]["resumed_at"]) == 1
    assert [p["freq_hz"] for p in results["points"]] == freqs
    with open(run / RESULTS_CSV_FILE, newline="", encoding="utf-8") as table:
        assert [float(row["freq_hz"]) for row in csv.DictReader(table)] == freqs
    final = {p["freq_hz"]: p for p in results["points"]}
    for point in before:  # every field, every float bit for bit
        assert final[point["freq_hz"]] == point
    assert load_run(run).info.status == "complete"

    killed_log = server.command_log[:first_resumed_command]
    resumed_log = server.command_log[first_resumed_command:]
    assert moved_to_through(killed_log) and not moved_to_through(resumed_log)  # cal reused
    assert not server.bench.noise_source.is_hot and not server.bench.supply.output_on
    # the source left hot by the killed run did not spoil the resumed points: the supply
    # driver switches its output off when it opens (u: density jitter only, ENR exact here)
    truth = server.bench.truth(freqs)
    z = z_limit(len(freqs))
    for point, nf_db in zip(results["points"], truth["nf_db"], strict=True):
        assert abs(point["nf_db"] - nf_db) <= z * point["u_nf_db"], point["freq_hz"]


def test_ctrl_c_mid_run_leaves_the_source_off_and_exits_130(
    tmp_path, ideal_server, child_processes
):
    server = ideal_server
    plan = write_scpi_plan(tmp_path, server, FREQS_HZ, target=TARGET_U_NF_DB)
    run = tmp_path / "run"
    proc = start_run(
        ["run", str(plan), "--out", str(run)], tmp_path, launcher=["-c", SIGINT_LAUNCHER]
    )
    child_processes.append(proc)
    hold_while_source_hot(proc, run, server, min_points=1)
    proc.send_signal(signal.SIGINT)  # arrives while the child waits for a held reply
    server.faults.hold_replies = False
    assert proc.wait(timeout=CHILD_TIMEOUT_S) == cli.EXIT_INTERRUPTED

    stderr = (tmp_path / "child.err").read_text(encoding="utf-8")
    assert f"--resume {run}" in stderr and "Traceback" not in stderr
    assert not server.bench.noise_source.is_hot  # the safe state, after a torn exchange
    assert not server.bench.supply.output_on
    record = load_run(run)
    assert record.info.status == "interrupted"
    assert 1 <= len(record.points) < len(FREQS_HZ)
