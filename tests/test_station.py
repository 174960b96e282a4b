"""Station mode: unit lines, simulated unit-to-unit variation, the unit loop, calibration
expiry, Ctrl-C, faults and the end summary (on the in-process simulated bench)."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from _production import FREQS_HZ, NF_LIMIT_DB, exact_sim, expected_nf_db, session_on, small_plan
from hypothesis import given
from hypothesis import strategies as st
from pydantic import ValidationError

from noisebench.errors import CommunicationError, InputError, MeasurementError
from noisebench.frontends.station import (
    SUMMARY_FILE,
    Station,
    StationSettings,
    StationSummary,
    UnitId,
    UnitResult,
    UnitVariation,
    apply_simulated_unit,
    parse_unit_line,
    units_from_file,
    units_from_lines,
    units_from_prompt,
)
from noisebench.results.store import load_run
from noisebench.running.calibration import CalibrationStore

# a wide spread so that a short lot holds clear passes and clear failures
SPREAD = UnitVariation(
    nf_sigma_db=0.2, nf_tilt_sigma_db=0.05, gain_sigma_db=0.4, weak_fraction=0.25, weak_nf_db=1.0
)


# =========================================================================== unit lines


@pytest.mark.parametrize(
    "line, unit",
    [
        ("ABC123", UnitId("ABC123")),
        ("ABC123\n", UnitId("ABC123")),
        ("ABC123\r\n", UnitId("ABC123")),
        ("  ABC-12.3_x  ", UnitId("ABC-12.3_x")),
        ("SN:ABC123;LOT:L24-07", UnitId("ABC123", lot="L24-07")),
        ("lot:L24-07; sn:ABC123 ;PN:LNA-2", UnitId("ABC123", lot="L24-07", part_number="LNA-2")),
    ],
)
def test_unit_lines_that_are_accepted(line, unit):
    assert parse_unit_line(line) == unit


def test_defaults_apply_only_when_the_line_names_nothing():
    assert parse_unit_line("A1", lot="L9", part_number="P1") == UnitId("A1", "L9", "P1")
    assert parse_unit_line("SN:A1;LOT:L2", lot="L9") == UnitId("A1", "L2", None)


@pytest.mark.parametrize("line", ["", "   ", "q", "Q", "q\n", "\n"])
def test_empty_line_and_q_end_the_input(line):
    assert parse_unit_line(line) is None


@pytest.mark.parametrize(
    "line, words",
    [
        ("AB\tC", "control character '\\t'"),
        ("\x1b[2JABC", "control character '\\x1b'"),
        ("ABC\x00", "control character '\\x00'"),
        ("SN:A1\x1dLOT:L1", "control character '\\x1d'"),  # group separator of some scanners
        ("ABC\u200b", "control character '\\u200b'"),  # zero-width space (format char)
        ("ABC\r\n\n", "control character '\\r'"),  # only ONE line ending is removed
        ("AB C", "not a valid serial"),
        ("-ABC", "not a valid serial"),
        ("ABCé", "not a valid serial"),
        ("A" * 65, "not a valid serial"),
        ("SN:ABC;LOT:", "not a valid lot"),
        ("SN:ABC;", "is not KEY:VALUE"),
        ("SN:ABC;XX:1", "unknown key 'XX'"),
        ("SN:ABC;SN:DEF", "appears twice"),
        ("LOT:L1", "has no SN field"),
        ("SN:AB/C", "not a valid serial"),
    ],
)
def test_unit_lines_that_are_refused_name_the_problem(line, words):
    with pytest.raises(InputError) as info:
        parse_unit_line(line)
    assert words in str(info.value)


_NAME_CHARS = st.sampled_from("ABCXYZabcz0189._-")


@given(
    serial=st.text(_NAME_CHARS, min_size=1, max_size=63),
    lot=st.text(_NAME_CHARS, min_size=1, max_size=63),
)
def test_any_valid_serial_and_lot_round_trip(serial, lot):
    serial, lot = "S" + serial, "L" + lot  # first character a letter
    assert parse_unit_line(f"SN:{serial};LOT:{lot}") == UnitId(serial, lot)
    assert parse_unit_line(serial) == UnitId(serial)


@given(
    head=st.text(_NAME_CHARS, max_size=10),
    tail=st.text(_NAME_CHARS, max_size=10),
    code=st.one_of(
        st.integers(0, 9),
        st.integers(11, 12),
        st.integers(14, 31),
        st.just(127),
        st.integers(0x80, 0x9F),
    ),
)
def test_any_control_character_inside_a_line_is_refused(head, tail, code):
    with pytest.raises(InputError, match="control character"):
        parse_unit_line("A" + head + chr(code) + tail)


def test_a_list_is_checked_whole_before_anything_is_measured(tmp_path):
    lines = ["# lot L24-07, tray 3", "A1", "", "SN:A2;LOT:L2", "bad serial", "SN:", "q", "A9"]
    with pytest.raises(InputError) as info:
        units_from_lines(lines, lot="L24-07")
    text = str(info.value)
    assert "line 5:" in text and "line 6:" in text and "line 2" not in text
    good = units_from_lines(lines[:4] + ["q", "A9"], lot="L24-07")
    assert good == [UnitId("A1", "L24-07"), UnitId("A2", "L2")]  # q ends the list
    path = tmp_path / "units.txt"
    path.write_text("A1\r\nSN:A2;PN:P7\r\n", encoding="utf-8")
    assert units_from_file(path) == [UnitId("A1"), UnitId("A2", part_number="P7")]


def test_prompt_asks_again_after_a_refused_line_and_stops_at_q():
    answers = iter(["SN:A1;LOT:L1", "A\t2", "A2", "q", "never read"])
    asked, refused = [], []

    def read_line(prompt: str) -> str:
        asked.append(prompt)
        return next(answers)

    units = list(units_from_prompt(read_line, on_refused=refused.append, lot="L0"))
    assert units == [UnitId("A1", "L1"), UnitId("A2", "L0")]
    assert len(asked) == 4 and len(refused) == 1 and "control character" in refused[0]


def test_prompt_ends_at_end_of_input():
    def read_line(prompt: str) -> str:
        raise EOFError

    assert list(units_from_prompt(read_line)) == []


def test_station_settings_refuse_bad_names():
    with pytest.raises(ValidationError, match="not a valid station id"):
        StationSettings(station_id="bench 3")
    with pytest.raises(ValidationError, match="control character"):
        StationSettings(station_id="bench-3", operator="ann\x1b")
    with pytest.raises(ValidationError, match="not a valid lot"):
        StationSettings(station_id="bench-3", lot="L 1")


# =========================================================================== simulated units


def test_unit_offsets_are_deterministic_and_differ_between_serials():
    a1, a2 = UnitVariation().offsets("U001"), UnitVariation().offsets("U001")
    assert a1 == a2
    assert UnitVariation().offsets("U002") != a1
    assert UnitVariation(seed=1).offsets("U001") != a1  # another population


def test_unit_offsets_do_not_depend_on_the_python_process():
    """SHA-256 seeding, not Python's randomised hash: another process, same offsets."""
    code = (
        "from noisebench.frontends.station import UnitVariation as V; "
        "o = V().offsets('U001'); print(repr((o.nf_offset_db, o.gain_offset_db, o.weak)))"
    )
    env = dict(os.environ, PYTHONHASHSEED="12345")  # inherit the rest (venv, PATH, locale)
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        env=env,
        timeout=60,
        check=True,
    ).stdout.strip()
    here = UnitVariation().offsets("U001")
    assert out == repr((here.nf_offset_db, here.gain_offset_db, here.weak))


def test_unit_offsets_follow_their_distributions():
    """2000 serials: mean and std of the offsets and the weak share, within 5 sigma of their
    sampling distributions (normal mean: sigma/sqrt(n); sample std: sigma/sqrt(2(n-1));
    binomial share: sqrt(p(1-p)/n))."""
    n = 2000
    v = UnitVariation(nf_sigma_db=0.1, gain_sigma_db=0.4, weak_fraction=0.15)
    offsets = [v.offsets(f"LOT7-{i:05d}") for i in range(n)]
    nf = np.array([o.nf_offset_db for o in offsets])
    gain = np.array([o.gain_offset_db for o in offsets])
    weak = np.array([o.weak for o in offsets])
    for values, sigma in ((nf, 0.1), (gain, 0.4)):
        assert abs(values.mean()) < 5 * sigma / math.sqrt(n)
        assert abs(values.std(ddof=1) - sigma) < 5 * sigma / math.sqrt(2 * (n - 1))
    p = 0.15
    assert abs(weak.mean() - p) < 5 * math.sqrt(p * (1 - p) / n)
    assert all(o.weak_nf_db == (v.weak_nf_db if o.weak else 0.0) for o in offsets)


def test_a_simulated_unit_changes_only_the_dut_and_is_not_cumulative():
    sim = exact_sim()
    base = sim.scenario
    f = np.array([0.7e9, 1.0e9, 2.2e9, 4.0e9])
    before = sim.truth(f)
    offsets = SPREAD.offsets("U-7")
    for _ in range(2):  # applying twice gives the same unit (relative to the base)
        apply_simulated_unit(sim, base, offsets)
    after = sim.truth(f)
    band = (base.dut.freq_hz[0], base.dut.freq_hz[-1])
    # tables are interpolated linearly in dB versus frequency, so a change that is linear
    # in frequency between table points is exact everywhere in the band
    np.testing.assert_allclose(
        after["nf_db"] - before["nf_db"], offsets.nf_change_db(f, band), atol=1e-9
    )
    np.testing.assert_allclose(
        after["gain_db"] - before["gain_db"], offsets.gain_offset_db, atol=1e-9
    )
    for key in ("enr_table_db", "input_loss_db", "analyzer_nf_db", "cold_k"):
        np.testing.assert_array_equal(after[key], before[key])


# =========================================================================== the loop


def _settings(tmp_path: Path, **extra) -> StationSettings:
    values = {
        "station_id": "bench-3",
        "operator": "ann",
        "folder": tmp_path / "station",
        "unit_variation": SPREAD,
    }
    values.update(extra)
    return StationSettings(**values)


def _truth_of(serials: list[str]) -> dict[str, np.ndarray]:
    """The NF each unit should read (on a separate simulator: truth only, no measurement)."""
    sim = exact_sim()
    base = sim.scenario
    out = {}
    for serial in serials:
        apply_simulated_unit(sim, base, SPREAD.offsets(serial))
        out[serial] = expected_nf_db(sim, FREQS_HZ)
    return out


def _pick_units(limit_db: float) -> tuple[list[str], list[str]]:
    """Serials whose expected NF is clearly below / above the limit at both frequencies."""
    truth = _truth_of([f"U{i:03d}" for i in range(60)])
    below = [s for s, nf in truth.items() if np.all(nf < limit_db - 0.5)][:2]
    above = [s for s, nf in truth.items() if np.all(nf > limit_db + 0.5)][:2]
    assert len(below) == 2 and len(above) == 2, "the spread gives no clear units"
    return below, above


@pytest.fixture(scope="module")
def lot_run(tmp_path_factory):
    """One station run over a lot of six units (two clear passes, two clear failures, two
    more), with a re-test of the first unit, on the exact simulated bench."""
    tmp_path = tmp_path_factory.mktemp("lot")
    sim = exact_sim()
    below, above = _pick_units(NF_LIMIT_DB)
    serials = [below[0], above[0], "U100", below[1], above[1], "U101"]
    plan = small_plan(tmp_path)
    said: list[str] = []
    station = Station(plan, _settings(tmp_path), session=session_on(sim, plan), say=said.append)
    lines = [f"SN:{s};LOT:L24-07" for s in serials] + [below[0]]  # re-test, lot from default
    with station:
        summary = station.run(units_from_lines(lines, lot="L24-07"))
    return {
        "summary": summary,
        "said": said,
        "truths": _truth_of(serials),
        "below": below,
        "above": above,
        "serials": serials,
        "folder": tmp_path / "station",
        "sim": sim,
    }


def test_each_unit_gets_its_run_folder_verdict_and_report(lot_run):
    summary: StationSummary = lot_run["summary"]
    assert [u.serial for u in summary.units] == lot_run["serials"] + [lot_run["below"][0]]
    folders = {u.folder for u in summary.units}
    assert len(folders) == len(summary.units)  # a re-test gets a new folder
    for unit in summary.units:
        folder = Path(unit.folder)
        record = load_run(folder)
        assert (folder / "report.html").is_file() and (folder / "results.csv").is_file()
        assert record.info.dut_id == unit.serial and record.info.station == "bench-3"
        assert record.info.operator == "ann" and record.info.status == "complete"
        assert record.info.notes["lot"] == "L24-07"
        assert record.info.notes["station"]["simulated_unit"]["serial"] == unit.serial
        assert record.verdict["unit"] == unit.verdict
        assert len(record.budgets) == len(FREQS_HZ)
        assert unit.run_id == record.info.run_id and unit.duration_s > 0


def test_verdicts_agree_with_the_simulated_truth(lot_run):
    """Where the truth is further from the limit than U + 5 u, the verdict is certain."""
    summary, truths = lot_run["summary"], lot_run["truths"]
    certain = 0
    for unit in summary.units:
        record = load_run(Path(unit.folder))
        for point, budget, nf_true in zip(
            record.points, record.budgets, truths[unit.serial], strict=True
        ):
            band = budget["U_expanded_db"] + 5 * point.u_nf_db
            verdict = record.verdict_at(point.freq_hz)["verdict"]
            if nf_true < NF_LIMIT_DB - band:
                assert verdict == "pass", (unit.serial, point.freq_hz)
                certain += 1
            elif nf_true > NF_LIMIT_DB + band:
                assert verdict == "fail", (unit.serial, point.freq_hz)
                certain += 1
    assert certain >= 8  # the four clear units, two points each
    outcome = {u.serial: u.outcome for u in summary.latest()}
    assert [outcome[s] for s in lot_run["below"]] == ["pass", "pass"]
    assert [outcome[s] for s in lot_run["above"]] == ["fail", "fail"]


def test_failing_units_name_their_failing_points(lot_run):
    failed = [u for u in lot_run["summary"].units if u.verdict == "fail"]
    assert failed
    for unit in failed:
        assert unit.failing and all(p["verdict"] in ("fail", "indeterminate") for p in unit.failing)
        line = unit.line()
        assert "FAIL" in line and "nf_db" in line and f"vs max {NF_LIMIT_DB}" in line


def test_summary_counts_latest_attempt_and_yield(lot_run):
    summary: StationSummary = lot_run["summary"]
    latest = summary.latest()
    assert len(latest) == 6 and summary.retests == 1
    counts = summary.counts()
    assert sum(counts.values()) == 6 and counts["error"] == 0
    assert counts["pass"] >= 2 and counts["fail"] >= 2
    judged = counts["pass"] + counts["fail"] + counts["indeterminate"]
    assert summary.yield_fraction == pytest.approx(counts["pass"] / judged)
    durations = [u.duration_s for u in summary.units]
    assert summary.mean_time_per_unit_s == pytest.approx(sum(durations) / len(durations))
    text = summary.format()
    assert f"yield {100 * counts['pass'] / judged:.1f} %" in text
    assert "calibrations 1 (1 first calibration)" in text
    assert "stopped: end of input" in text
    assert lot_run["said"][-1] == text  # the operator sees the summary last
    stored = StationSummary.model_validate_json(
        (lot_run["folder"] / SUMMARY_FILE).read_text(encoding="utf-8")
    )
    assert stored.counts() == counts and stored.ended_at is not None


def test_calibration_is_measured_once_and_reused(lot_run):
    units = lot_run["summary"].units
    assert units[0].calibrated_groups == len(FREQS_HZ)
    assert units[0].calibration_reason == "first calibration"
    assert all(u.calibrated_groups == 0 and u.calibration_reason is None for u in units[1:])


def test_bench_is_left_safe_and_nominal_after_the_station(lot_run):
    sim = lot_run["sim"]
    assert not sim.noise_source.is_hot and not sim.generator.output_on
    f = np.array(FREQS_HZ)
    nominal = exact_sim().truth(f)
    np.testing.assert_array_equal(sim.truth(f)["nf_db"], nominal["nf_db"])
    np.testing.assert_array_equal(sim.truth(f)["gain_db"], nominal["gain_db"])


# =========================================================================== calibration expiry


def test_expired_and_changed_calibrations_are_measured_again(tmp_path):
    sim = exact_sim(seed=2)
    plan = small_plan(tmp_path, limits=False, uncertainty=False)
    store = CalibrationStore()
    session = session_on(sim, plan)
    expiring = _settings(tmp_path, calibration_max_age_s=1e-6, store=False)
    with Station(plan, expiring, session=session, calibrations=store) as station:
        summary = station.run([UnitId("E1"), UnitId("E2"), UnitId("E3")])
    assert [u.calibration_reason for u in summary.units] == [
        "first calibration",
        "expired",
        "expired",
    ]
    assert summary.calibrations == 3 and len(store.entries) == 3 * len(FREQS_HZ)
    # a new plan with another RBW: the stored (still young) calibration does not apply
    wider = small_plan(tmp_path, limits=False, uncertainty=False, rbw_hz=2e6)
    with Station(
        wider, _settings(tmp_path, store=False), session=session, calibrations=store
    ) as station:
        summary = station.run([UnitId("E4"), UnitId("E5")])
    assert [u.calibration_reason for u in summary.units] == ["settings changed", None]
    assert [u.outcome for u in summary.units] == ["not_judged", "not_judged"]


# =========================================================================== interruptions, faults


class _RaiseOnPoint:
    """``on_point`` hook that raises ``exc`` at the ``nth`` point (counting from 1)."""

    def __init__(self, nth: int, exc: BaseException) -> None:
        self.nth, self.exc, self.count = nth, exc, 0

    def __call__(self, point) -> None:
        self.count += 1
        if self.count == self.nth:
            raise self.exc


def test_ctrl_c_during_a_unit_keeps_finished_units_and_leaves_the_bench_safe(tmp_path):
    sim = exact_sim(seed=3)
    plan = small_plan(tmp_path)
    hook = _RaiseOnPoint(len(FREQS_HZ) + 1, KeyboardInterrupt())  # first point of unit 2
    station = Station(plan, _settings(tmp_path), session=session_on(sim, plan), on_point=hook)
    with station:
        summary = station.run([UnitId("K1", "L1"), UnitId("K2", "L1"), UnitId("K3", "L1")])
        db = station.db
        assert [u.serial for u in summary.units] == ["K1", "K2"]
        assert summary.units[0].status == "complete" and summary.units[0].outcome != "error"
        assert summary.units[1].status == "interrupted" and summary.units[1].outcome == "error"
        assert summary.stopped_by == "interrupted (Ctrl-C)"
        assert len(load_run(Path(summary.units[1].folder)).points) == 1  # its point is kept
        assert db.count("runs") == 2  # the interrupted run is stored too (traceability)
        assert [y.units for y in db.yield_by_lot()] == [1]  # only the complete run counts
    assert not sim.noise_source.is_hot and not sim.generator.output_on
    stored = json.loads((tmp_path / "station" / SUMMARY_FILE).read_text(encoding="utf-8"))
    assert stored["stopped_by"] == "interrupted (Ctrl-C)" and len(stored["units"]) == 2


def test_ctrl_c_at_the_prompt_ends_the_station_cleanly(tmp_path):
    sim = exact_sim(seed=4)
    plan = small_plan(tmp_path, limits=False)
    answers = iter(["P1"])

    def read_line(prompt: str) -> str:
        try:
            return next(answers)
        except StopIteration:
            raise KeyboardInterrupt from None

    with Station(plan, _settings(tmp_path, store=False), session=session_on(sim, plan)) as st:
        summary = st.run(units_from_prompt(read_line))
    assert [u.serial for u in summary.units] == ["P1"]
    assert summary.stopped_by == "interrupted (Ctrl-C)"
    assert not sim.noise_source.is_hot


def test_a_unit_the_physics_refuses_is_an_error_and_the_lot_goes_on(tmp_path):
    sim = exact_sim(seed=5)
    plan = small_plan(tmp_path)
    hook = _RaiseOnPoint(1, MeasurementError("Y too close to 1 (dead unit)"))
    station = Station(plan, _settings(tmp_path), session=session_on(sim, plan), on_point=hook)
    with station:
        summary = station.run([UnitId("D1"), UnitId("D2")])
        assert station.db.count("runs") == 2
    first, second = summary.units
    assert first.status == "failed" and first.outcome == "error"
    assert "dead unit" in first.error and "error: Y too close" in first.line()
    assert second.status == "complete" and second.outcome in ("pass", "fail", "indeterminate")
    counts = summary.counts()
    assert counts["error"] == 1 and summary.judged == 1
    assert summary.stopped_by == "end of input"


def test_a_bench_fault_stops_the_station(tmp_path):
    sim = exact_sim(seed=6)
    plan = small_plan(tmp_path)
    hook = _RaiseOnPoint(len(FREQS_HZ) + 1, CommunicationError("analyzer stopped answering"))
    station = Station(
        plan, _settings(tmp_path, store=False), session=session_on(sim, plan), on_point=hook
    )
    with station:
        summary = station.run([UnitId("F1"), UnitId("F2"), UnitId("F3")])
    assert [u.serial for u in summary.units] == ["F1", "F2"]
    assert summary.stopped_by.startswith("error: analyzer stopped answering")
    assert summary.units[1].outcome == "error" and not sim.noise_source.is_hot


def test_a_database_failure_keeps_the_run_and_says_so(tmp_path):
    sim = exact_sim(seed=7)
    plan = small_plan(tmp_path, limits=False)
    with Station(plan, _settings(tmp_path), session=session_on(sim, plan)) as station:
        station.db.store_run = _refuse_store  # the database goes away mid-lot
        summary = station.run([UnitId("B1")])
    unit = summary.units[0]
    assert unit.database_id is None and "server closed" in unit.store_error
    assert load_run(Path(unit.folder)).info.status == "complete"
    assert summary.not_stored() == ["B1"] and "NOT STORED: B1" in summary.format()


def _refuse_store(record, **kwargs):
    from noisebench.results.database import DatabaseError

    raise DatabaseError("server closed the connection")


def test_unit_result_outcomes():
    base = {"serial": "X", "started_at": "2026-01-01T00:00:00Z", "duration_s": 1.0, "points": 2}
    assert UnitResult(status="complete", verdict="pass", **base).outcome == "pass"
    assert UnitResult(status="complete", **base).outcome == "not_judged"
    assert UnitResult(status="interrupted", verdict="fail", **base).outcome == "error"
    assert UnitResult(status="complete", verdict="pass", error="x", **base).outcome == "error"
    assert UnitResult(status="complete", **{**base, "points": 0}).outcome == "error"


def test_a_dead_unit_is_measured_as_nothing_verified(tmp_path):
    """A unit without gain: the sequencer skips every point; the unit is indeterminate (as in
    the database), never a pass, and the operator sees why."""
    from noisebench.sims.bench import SimulatedBench

    sim = SimulatedBench.from_scenario("demo-lna", seed=8, dut__gain_db=[-60.0] * 14)
    plan = small_plan(tmp_path)
    settings = _settings(tmp_path, unit_variation=None)
    with Station(plan, settings, session=session_on(sim, plan)) as station:
        summary = station.run([UnitId("Z1", "LZ")])
        (row,) = station.db.yield_by_lot("LZ")
    (unit,) = summary.units
    assert unit.status == "complete" and unit.points == 0
    assert [p["freq_hz"] for p in unit.skipped_points] == list(FREQS_HZ)
    assert unit.verdict == "indeterminate" and unit.outcome == "indeterminate"
    assert (row.units, row.indeterminate, row.passed) == (1, 1, 0)
    line = unit.line()
    assert "INDETERMINATE" in line and line.count("not measured: ") == len(FREQS_HZ)
    notes = load_run(Path(unit.folder)).verdict["notes"]
    assert "incomplete run: 2 of 2 planned point(s) not measured" in " ".join(notes)
