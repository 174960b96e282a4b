"""The error queue read once per sequencer step (``[common] error_batch``), with the same
verification strength as one read per acquisition.

A step (one pass of a sweep-level hot/cold block) sends its acquisitions without the error
query, at most ``error_batch`` in a row, and reads the queue once at its end; the sequencer
accepts the step's readings only after that read came back clean. What is checked here:
the dialogue (the lines and where the read goes), an error found at the step's end naming the
refused command (held settings re-sent alone), a reconnect inside a step discarding the step
(its read was lost) and reading it again, no reading of a failed step reaching the results,
and identical results with batching on and off (same seed). The drop in commands per point is
shown by ``scripts/bench_scpi.py``, not here."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_drivers_compound import (
    AT_2G,
    OK,
    REQUEST,
    VALUES,
    block_then,
    read_line,
    warm_read,
)

from noisebench.bench.registry import open_bench, simulated_enr_table
from noisebench.drivers import ScpiAnalyzer, load_profile
from noisebench.drivers.profile import ProfileError
from noisebench.drivers.protocol import ieee_block, replay_dialogue
from noisebench.drivers.scpi_channel import split_reply_units
from noisebench.errors import InstrumentError, UnverifiedStep
from noisebench.running import sequencer_core
from noisebench.running.plan import parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench
from noisebench.sims.scpi_server import SimServer

GENERIC = load_profile("generic")
GENERIC_TEXT = Path(GENERIC.source).read_text(encoding="utf-8")


def profile_with(tmp_path: Path, batch: int) -> Path:
    """The generic profile with another ``error_batch``."""
    assert "\nerror_batch = 16\n" in GENERIC_TEXT
    path = tmp_path / f"batch_{batch}.toml"
    path.write_text(GENERIC_TEXT.replace("\nerror_batch = 16\n", f"\nerror_batch = {batch}\n"))
    return path


def batched(*held: str) -> tuple[str, bytes]:
    """One acquisition of a step (the generic profile's READ?), its error read left to the
    step: no error query, and the reply is the block alone."""
    return (read_line(*held, errors=False), ieee_block(VALUES))


def read_in_line(*held: str) -> tuple[str, bytes]:
    """The acquisition that carries the step's error read (the batch is full)."""
    return (read_line(*held), block_then(OK))


# --------------------------------------------------------------------------- the dialogue


def test_generic_profile_opts_in_within_the_simulators_error_queue_depth():
    from noisebench.sims.scpi_instruments import ERROR_QUEUE_SIZE

    assert GENERIC.common.error_batch == ERROR_QUEUE_SIZE == 16
    assert GENERIC.common.error_batch <= GENERIC.common.max_error_entries


def test_a_batch_larger_than_the_error_reads_allowed_is_refused(tmp_path):
    path = tmp_path / "too_many.toml"
    path.write_text(GENERIC_TEXT.replace("\nerror_batch = 16\n", "\nerror_batch = 33\n"))
    with pytest.raises(ProfileError, match="error_batch 33 exceeds max_error_entries 32"):
        load_profile(path)


def test_a_step_reads_the_error_queue_once_for_its_acquisitions():
    dialogue = warm_read() + [
        batched("FREQ:CENT 1000000000"),
        batched("FREQ:CENT 2000000000"),
        ("SYST:ERR?", OK),  # the step's end
    ]
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, GENERIC)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()  # warm: both centres verified, the analyzer at 2 GHz
        sa.begin_step()
        sa.configure(REQUEST)
        first = sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.end_step()
    assert np.array_equal(first.values, VALUES.astype(float))


def test_the_batch_is_bounded_by_error_batch(tmp_path):
    profile = load_profile(profile_with(tmp_path, 2))
    dialogue = warm_read() + [
        batched("FREQ:CENT 1000000000"),
        read_in_line("FREQ:CENT 2000000000"),  # the second of a batch of 2 reads the queue
        batched("FREQ:CENT 1000000000"),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, profile)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.begin_step()
        for request in (REQUEST, AT_2G, REQUEST):
            sa.configure(request)
            sa.acquire_trace()
        sa.end_step()


def test_a_clean_step_whose_last_acquisition_read_the_queue_needs_no_read_at_its_end(tmp_path):
    profile = load_profile(profile_with(tmp_path, 1))  # every acquisition reads the queue
    dialogue = warm_read() + [read_in_line("FREQ:CENT 1000000000")]
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, profile)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.begin_step()
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.end_step()  # nothing unread: no exchange


def test_an_error_found_at_the_step_end_names_the_refused_setting():
    conflict = '-221,"Settings conflict"'
    dialogue = warm_read() + [
        batched("FREQ:CENT 1000000000"),
        batched("FREQ:CENT 2000000000"),
        ("SYST:ERR?", conflict),  # the step's read: something in it failed
        ("SYST:ERR?", OK),
        # the culprit search: each held setting alone, with an error read after it
        ("FREQ:CENT 1000000000", None),
        ("SYST:ERR?", OK),
        ("FREQ:CENT 2000000000", None),
        ("SYST:ERR?", conflict),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, GENERIC)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.begin_step()
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        with pytest.raises(InstrumentError) as info:
            sa.end_step()
        assert sa._sent == {}  # the state is unknown: the next configure sends everything
    assert info.value.code == -221 and info.value.command == "FREQ:CENT 2000000000"
    assert info.value.context["in_step"] == "2 acquisitions covered by one error-queue read"
    assert info.value.context["in_compound"] == "READ?"


# --------------------------------------------------------------------------- the sequencer


def _plan(server: SimServer, folder: Path, profile: str | Path):
    enr = folder / "enr.csv"
    simulated_enr_table(SimulatedBench.from_scenario("demo-lna", seed=1)).to_csv(enr)
    return parse_plan(
        {
            "method": "y_factor",
            "dut": {"id": "STEP-BATCH"},
            "bench": {
                "analyzer": {
                    "resource": server.resource("analyzer"),
                    "profile": str(profile),
                    "compression_dbm": -3.0,
                },
                "noise_source": {
                    "drive": "supply",
                    "resource": server.resource("supply"),
                    "drive_v": 28.0,
                    "settle_time_s": 0.02,
                },
            },
            # 4 points 100 MHz apart: 4 groups, so a pass is 4-5 acquisitions (the monitor 2)
            "acquisition": {"rbw_hz": 1e6, "attenuation_db": 0, "target_u_nf_db": 0.3},
            "sweep": {"freqs_hz": [1.0e9, 1.1e9, 1.2e9, 1.3e9]},
            "enr": {"table": str(enr)},
            "corrections": {"source_temperature_k": 296.5},
            "expect": {"dut_gain_db": 20.0},
            "output": {"plots": False, "report": False},
        }
    )


def _run(profile: str | Path, folder: Path):
    folder.mkdir()
    with SimServer(SimulatedBench.from_scenario("demo-lna", seed=3)) as server:
        plan = _plan(server, folder, profile)
        session = open_bench(plan.bench)
        try:
            record = Sequencer(plan, session).run(folder / "run")
        finally:
            session.close()
        lines = [line for which, line in server.command_log if which == "analyzer"]
    return record, sum(line.count("SYST:ERR?") for line in lines), lines


def test_a_clean_sweep_gives_identical_results_with_batching_on_and_off(tmp_path):
    """The generic profile (error_batch 16 and the single read query READ?) against a copy
    that reads the queue in every acquisition's line and starts, waits and fetches with
    INIT:IMM;*WAI;:TRAC? (read = false): the same acquisitions in the same order from the
    same seed, so the same numbers, with fewer error reads and two units per acquisition."""
    plain = tmp_path / "plain.toml"
    text = Path(profile_with(tmp_path, 1)).read_text(encoding="utf-8")
    assert '\nread = "READ?"\n' in text
    plain.write_text(text.replace('\nread = "READ?"\n', "\nread = false\n"))
    on, reads_on, lines = _run("generic", tmp_path / "on")
    off, reads_off, plain_lines = _run(plain, tmp_path / "off")
    assert on.info.notes.get("skipped_points") is None and len(on.points) == 4
    assert [p.nf_db for p in on.points] == [p.nf_db for p in off.points]
    assert [p.gain_db for p in on.points] == [p.gain_db for p in off.points]
    assert [p.u_nf_db for p in on.points] == [p.u_nf_db for p in off.points]
    assert reads_on < reads_off / 2  # one read per pass instead of one per acquisition
    # SCPI-1999 READ? = ABORt; INITiate; FETCh? (from memory): one query per acquisition
    acquisitions = [line for line in lines if "READ?" in line]
    assert len(acquisitions) == sum(line.count("INIT:IMM") for line in plain_lines) > 8
    assert acquisitions[0] == "READ?"  # the first after connecting goes alone
    assert not any(unit in line for line in lines for unit in ("INIT:IMM", "*WAI", "TRAC?"))
    for line in acquisitions[1:]:  # held settings (centre, count), READ?, maybe the error read
        units = [u.strip(":").split()[0] for u in split_reply_units(line)]
        assert units.count("READ?") == 1
        assert set(units) <= {"FREQ:CENT", "AVER:COUN", "READ?", "SYST:ERR?"}


def test_a_setting_refused_mid_step_is_named_and_no_reading_of_that_step_is_accepted(
    tmp_path, monkeypatch
):
    """The second pass of the calibration's first block (hot, backward): its centres were all
    read back in the first pass, so they ride, held, in the batched acquisition lines. After
    its first acquisition the simulator refuses every new centre (-221): the next lines read
    a trace at the old centre, which only the step's error read can expose."""
    steps: list[str] = []
    accepted: list[int] = []  # the step number each accepted reading was taken in
    original_add = sequencer_core._Readings.add

    def add(self, name, densities):
        accepted.append(len(steps))
        original_add(self, name, densities)

    monkeypatch.setattr(sequencer_core._Readings, "add", add)
    folder = tmp_path / "run"
    with SimServer(SimulatedBench.from_scenario("demo-lna", seed=3)) as server:
        plan = _plan(server, tmp_path, "generic")
        session = open_bench(plan.bench)
        analyzer = session.bench.analyzer
        begin, acquire = analyzer.begin_step, analyzer.acquire_trace
        taken_in_step: list[int] = []

        def begin_step():
            steps.append("step")
            taken_in_step.clear()
            begin()

        def acquire_trace():
            trace = acquire()
            taken_in_step.append(1)
            if len(steps) == 2 and len(taken_in_step) == 1:
                server.faults.refuse_header = "FREQ:CENT"
            return trace

        analyzer.begin_step, analyzer.acquire_trace = begin_step, acquire_trace
        try:
            with pytest.raises(InstrumentError) as info:
                Sequencer(plan, session).run(folder)
        finally:
            session.close()
        server.faults.refuse_header = None
        assert len(steps) == 2 and len(taken_in_step) >= 3  # went on past the refusal
        in_failed_run = list(accepted)
        # as today an instrument error ends the run (exit 4) and resume continues it
        session = open_bench(plan.bench)
        try:
            resumed = Sequencer(plan, session).run(folder, resume=True)
        finally:
            session.close()
    error = info.value
    assert error.code == -221 and error.command.startswith("FREQ:CENT ")
    assert error.context["found_by"] == "re-sending each setting alone"
    assert "acquisitions covered by one error-queue read" in error.context["in_step"]
    # the first pass's readings were accepted, none of the failed pass's
    assert 1 in in_failed_run and 2 not in in_failed_run
    assert resumed.info.status == "complete" and len(resumed.points) == 4


class _LosingAnalyzer:
    """Stands in for the analyzer: its first step's check was lost to a reconnect."""

    def __init__(self) -> None:
        self.steps = 0

    def begin_step(self) -> None:
        self.steps += 1

    def end_step(self, *, check: bool = True) -> None:
        if check and self.steps == 1:
            raise UnverifiedStep("lost", instrument="analyzer")


def test_a_step_whose_check_was_lost_to_a_reconnect_is_read_again():
    core = sequencer_core.SequencerCore.__new__(sequencer_core.SequencerCore)
    analyzer = _LosingAnalyzer()
    core.session = type("S", (), {"bench": type("B", (), {"analyzer": analyzer})()})()
    accepted: list[int] = []
    reads: list[int] = []

    def read():
        reads.append(analyzer.steps)
        return [lambda: accepted.append(analyzer.steps)]

    core._checked_step(read)
    assert reads == [1, 2] and accepted == [2]  # the first step's reading never accepted


def test_a_reconnect_inside_a_step_loses_its_check_and_says_so(sim_server):
    from noisebench.drivers import open_analyzer

    sa = open_analyzer(sim_server.resource("analyzer"), timeout_s=10.0)
    try:
        for request in (REQUEST, AT_2G):  # both centres read back, the start accepted alone
            sa.configure(request)
            sa.acquire_trace()
        sa.begin_step()
        sa.configure(REQUEST)
        sa.acquire_trace()  # sent without an error read
        sim_server.faults.drop_after_commands = 0  # the next line is lost with the connection
        sa.configure(AT_2G)
        trace = sa.acquire_trace()  # reconnected, settings restored, acquisition retried
        assert trace.settings.center_hz == 2e9 and sa.recovery_log
        with pytest.raises(UnverifiedStep, match="read again"):
            sa.end_step()
        sa.begin_step()  # the next step starts afresh
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.end_step()
    finally:
        sa.close()
