"""The run store: crash-safe journal, resume, typed reload, CSV and the plain-text summary."""

from __future__ import annotations

import csv
import json
import logging
import math
import os
import signal
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from noisebench.errors import InputError
from noisebench.results.store import (
    CSV_BUDGET_COLUMNS,
    CSV_COLUMNS,
    CSV_VERDICT_COLUMNS,
    JOURNAL_FILE,
    RESULTS_CSV_FILE,
    RESULTS_JSON_FILE,
    RUN_INFO_FILE,
    RunInfo,
    RunRecord,
    RunWriter,
    collect_versions,
    format_summary,
    load_run,
    new_run_id,
)
from noisebench.science.point import Method, PointFlag, PointResult

T0_K = 290.0
FREQS_HZ = [float(f) for f in np.linspace(1e9, 2e9, 6)]


def make_point(freq_hz: float, nf_db: float = 2.0, **extra) -> PointResult:
    """A Y-factor point whose Te follows Te = T0 (F - 1) (docs/references.md §2)."""
    te_k = T0_K * (10 ** (nf_db / 10) - 1)
    fields = dict(
        freq_hz=freq_hz,
        method=Method.Y_FACTOR,
        nf_db=nf_db,
        te_k=te_k,
        u_nf_db=0.0679,
        u_te_k=3.1,
        gain_db=20.0,
        u_gain_db=0.02,
        y_db=12.8428,
        floor_margin_db=18.5,
        floor_correction_db=-0.3889,
        enr_db=15.0,
        source_temperature_k=296.5,
        averages=64,
        instrument_time_s=0.125,
        densities_w_per_hz={
            "hot": 1.3e-17,
            "cold": 6.9e-19,
            "hot_cal": 1.9e-19,
            "cold_cal": 6.4e-20,
        },
    )
    fields.update(extra)
    return PointResult(**fields)


def make_info(**extra) -> RunInfo:
    fields = dict(
        run_id=new_run_id(),
        method=Method.Y_FACTOR,
        dut_id="LNA-7 <rev B>",
        operator="kim",
        station="bench 2",
        plan={"sweep": {"points": 6}},
        identities={"analyzer": "Example,SA-1,0001,1.0"},
        versions=collect_versions(),
        ambient_k=296.5,
        cold_temperature_k=296.5,
        applied_settings=[{"rbw_hz": 1e6, "detector": "rms"}],
    )
    fields.update(extra)
    return RunInfo(**fields)


def make_budget(freq_hz: float) -> dict:
    return {
        "freq_hz": freq_hz,
        "contributions": [
            {
                "name": "ENR",
                "u": 0.1,
                "unit": "dB",
                "sensitivity": 0.9937,
                "contribution_db": 0.0994,
            },
            {
                "name": "Tc",
                "u": 1.0,
                "unit": "K",
                "sensitivity": -0.0094,
                "contribution_db": -0.0094,
            },
        ],
        "u_combined_db": 0.1229,
        "k": 2.0,
        "U_expanded_db": 0.2458,
        "method": "gum",
    }


# ----------------------------------------------------------------------------- round trip


def test_round_trip_kill_resume_finish(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.save_calibration(
        {
            "measured_at": "2025-01-01T00:00:00Z",
            "points": [{"freq_hz": f, "te2_k": 4306.19} for f in FREQS_HZ],
        }
    )
    for f in FREQS_HZ[:3]:
        writer.add_point(make_point(f), budget=make_budget(f))
    writer.close()  # the process "dies": no finish, no results files
    assert not (folder / RESULTS_JSON_FILE).exists()

    partial = load_run(folder)
    assert partial.info.status == "interrupted"
    assert [p.freq_hz for p in partial.points] == FREQS_HZ[:3]
    assert partial.points[0] == make_point(FREQS_HZ[0])
    assert partial.info.calibration["points"][0]["te2_k"] == 4306.19
    assert len(partial.budgets) == 3

    resumed = RunWriter.resume(folder)
    assert resumed.done_freqs_hz == set(FREQS_HZ[:3])
    for f in FREQS_HZ:
        if f not in resumed.done_freqs_hz:
            resumed.add_point(make_point(f, nf_db=2.1), budget=make_budget(f))
    record = resumed.finish(verdict={"unit": "pass", "points": [], "limits": []})

    assert record.info.status == "complete"
    assert record.info.ended_at is not None and len(record.info.resumed_at) == 1
    assert [p.freq_hz for p in record.points] == FREQS_HZ  # nothing lost, nothing repeated
    assert [p.nf_db for p in record.points] == [2.0] * 3 + [2.1] * 3
    reloaded = load_run(folder)
    assert reloaded == record
    assert RunRecord.model_validate_json((folder / RESULTS_JSON_FILE).read_text()) == record
    assert json.loads((folder / RUN_INFO_FILE).read_text())["status"] == "complete"


def test_typed_reload_keeps_types(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    writer.add_point(make_point(1e9, flags=[PointFlag.LOW_GAIN, PointFlag.TIME_LIMIT]))
    record = writer.finish()
    point = load_run(tmp_path / "run").points[0]
    assert point.flags == [PointFlag.LOW_GAIN, PointFlag.TIME_LIMIT]
    assert point.method is Method.Y_FACTOR
    assert record.info.started_at.tzinfo is not None
    assert load_run(tmp_path / "run").info.started_at == record.info.started_at


def test_points_are_sorted_by_frequency_in_the_record(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    for f in reversed(FREQS_HZ):
        writer.add_point(make_point(f), budget=make_budget(f))
    record = writer.finish()
    assert [p.freq_hz for p in record.points] == FREQS_HZ
    assert [b["freq_hz"] for b in record.budgets] == FREQS_HZ


def test_numpy_values_in_notes_are_stored_as_plain_json(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    writer.add_point(
        make_point(
            1e9, notes={"trace_db": np.array([1.5, 2.5]), "n": np.int64(7), "x": np.float32(0.25)}
        )
    )
    notes = writer.finish().points[0].notes
    assert notes == {"trace_db": [1.5, 2.5], "n": 7, "x": 0.25}


class BudgetLike:
    """Stands in for an uncertainty budget object: the store uses its ``to_dict``."""

    def __init__(self, freq_hz: float) -> None:
        self.freq_hz = freq_hz

    def to_dict(self) -> dict:
        return make_budget(self.freq_hz)


def test_objects_with_to_dict_models_and_numpy_are_stored_as_json(tmp_path):
    from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector

    settings_used = AcquisitionSettings(
        center_hz=1e9,
        span_hz=0.0,
        rbw_hz=1e6,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=8,
        points=101,
    )
    info = make_info(applied_settings=[settings_used], plan={"points": np.arange(3)})
    assert info.applied_settings[0]["rbw_filter"]["kind"] == "gaussian"
    assert info.plan == {"points": [0, 1, 2]}
    writer = RunWriter.create(tmp_path / "run", info)
    writer.add_point(make_point(1e9), budget=BudgetLike(1e9))
    record = writer.finish(verdict=type("V", (), {"to_dict": lambda self: {"unit": "pass"}})())
    assert record.budgets == [make_budget(1e9)] and record.verdict == {"unit": "pass"}
    assert load_run(tmp_path / "run") == record
    assert AcquisitionSettings.model_validate(record.info.applied_settings[0]) == settings_used


def test_points_from_several_threads_all_reach_the_journal(tmp_path):
    import threading

    writer = RunWriter.create(tmp_path / "run", make_info())
    freqs = [1e6 * (i + 1) for i in range(120)]

    def work(part: list[float]) -> None:
        for f in part:
            writer.add_point(make_point(f, notes={"pad": "x" * 5000}))

    threads = [threading.Thread(target=work, args=(freqs[i::4],)) for i in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    writer.close()
    record = load_run(tmp_path / "run")
    assert [p.freq_hz for p in record.points] == freqs
    assert record.warnings == ["run did not finish (killed or crashed): rebuilt from the journal"]


# ----------------------------------------------------------------------------- crash safety


def test_torn_last_line_is_ignored_with_a_warning_and_repaired_on_resume(tmp_path, caplog):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    for f in FREQS_HZ[:2]:
        writer.add_point(make_point(f))
    writer.close()
    journal = folder / JOURNAL_FILE
    full_line = json.dumps(
        {"kind": "point", "point": make_point(FREQS_HZ[2]).model_dump(mode="json"), "budget": None}
    )
    with open(journal, "ab") as handle:  # a kill halfway through the third write
        handle.write(full_line[: len(full_line) // 2].encode())

    with caplog.at_level(logging.WARNING, logger="noisebench.results.store"):
        record = load_run(folder)
    assert [p.freq_hz for p in record.points] == FREQS_HZ[:2]
    assert any("incomplete last entry" in w for w in record.warnings)
    assert any("incomplete last entry" in r.getMessage() for r in caplog.records)

    resumed = RunWriter.resume(folder)
    assert resumed.done_freqs_hz == set(FREQS_HZ[:2])
    resumed.add_point(make_point(FREQS_HZ[2]))
    record = resumed.finish()
    assert [p.freq_hz for p in record.points] == FREQS_HZ[:3]
    assert record.warnings and "incomplete" in record.warnings[0]  # the history says so
    lines = journal.read_bytes().split(b"\n")
    assert lines[-1] == b"" and all(json.loads(line) for line in lines[:-1])


def test_complete_last_line_without_newline_is_kept_and_terminated(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.add_point(make_point(FREQS_HZ[0]))
    writer.close()
    journal = folder / JOURNAL_FILE
    journal.write_bytes(journal.read_bytes().rstrip(b"\n"))  # newline lost in the kill
    assert len(load_run(folder).points) == 1
    resumed = RunWriter.resume(folder)
    resumed.add_point(make_point(FREQS_HZ[1]))
    assert [p.freq_hz for p in resumed.finish().points] == FREQS_HZ[:2]


def _journal_bytes(n_points: int) -> tuple[bytes, bytes, list[int]]:
    """run.json and a journal of ``n_points``, with the byte offset where each line ends."""
    with tempfile.TemporaryDirectory() as tmp:
        writer = RunWriter.create(Path(tmp) / "run", make_info(run_id="fixed"))
        for f in FREQS_HZ[:n_points]:
            writer.add_point(make_point(f), budget=make_budget(f))
        writer.close()
        info = (Path(tmp) / "run" / RUN_INFO_FILE).read_bytes()
        data = (Path(tmp) / "run" / JOURNAL_FILE).read_bytes()
    ends = [i + 1 for i, byte in enumerate(data) if byte == ord("\n")]
    return info, data, ends


_INFO, _JOURNAL, _LINE_ENDS = _journal_bytes(4)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cut=st.integers(min_value=0, max_value=len(_JOURNAL)))
def test_a_kill_at_any_byte_loses_at_most_the_point_being_written(cut):
    expected = sum(1 for end in _LINE_ENDS if end <= cut)
    if cut in [end - 1 for end in _LINE_ENDS]:
        expected += 1  # only the newline is missing: the entry itself is complete
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "run"
        folder.mkdir()
        (folder / RUN_INFO_FILE).write_bytes(_INFO)
        (folder / JOURNAL_FILE).write_bytes(_JOURNAL[:cut])
        record = load_run(folder)  # never raises
        assert [p.freq_hz for p in record.points] == FREQS_HZ[:expected]
        writer = RunWriter.resume(folder)
        writer.add_point(make_point(FREQS_HZ[5]))
        writer.close()  # killed again: what is on disk must hold every point
        again = load_run(folder)
        assert [p.freq_hz for p in again.points] == [*FREQS_HZ[:expected], FREQS_HZ[5]]
        assert not [w for w in again.warnings if "unreadable" in w]


CHILD = textwrap.dedent("""
    import sys
    from pathlib import Path
    from noisebench.science.point import Method, PointResult
    from noisebench.results.store import RunInfo, RunWriter
    writer = RunWriter.create(Path(sys.argv[1]), RunInfo(run_id="child", method=Method.GAIN))
    i = 0
    while True:
        i += 1
        writer.add_point(PointResult(freq_hz=1e6 * i, method=Method.GAIN, nf_db=5.0,
                                     te_k=627.0, u_nf_db=0.1, u_te_k=15.0, gain_db=30.0,
                                     notes={"pad": "x" * 2000}))
""")


def test_a_real_sigkill_mid_run_leaves_a_loadable_resumable_run(tmp_path):
    folder = tmp_path / "run"
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(folder)])
    try:
        deadline = time.monotonic() + 60
        journal = folder / JOURNAL_FILE
        while time.monotonic() < deadline:  # wait until a few points are on disk
            if journal.exists() and journal.read_bytes().count(b"\n") >= 5:
                break
            assert child.poll() is None, "writer process died on its own"
            time.sleep(0.01)
        child.send_signal(signal.SIGKILL)  # at an arbitrary moment, possibly mid-write
    finally:
        child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL

    record = load_run(folder)
    assert record.info.status == "interrupted"
    freqs = [p.freq_hz for p in record.points]
    assert len(freqs) >= 5
    assert freqs == [1e6 * (i + 1) for i in range(len(freqs))]  # a gap-free prefix
    writer = RunWriter.resume(folder)  # the dead process's lock is gone
    assert writer.done_freqs_hz == set(freqs)
    final = writer.finish("interrupted")
    assert len(final.points) == len(freqs)


def test_duplicate_lines_in_the_journal_keep_the_first(tmp_path, caplog):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.add_point(make_point(FREQS_HZ[0], nf_db=2.0))
    writer.close()
    journal = folder / JOURNAL_FILE
    line = (
        json.dumps(
            {
                "kind": "point",
                "point": make_point(FREQS_HZ[0], nf_db=9.0).model_dump(mode="json"),
                "budget": None,
            }
        )
        + "\n"
    )
    with open(journal, "a") as handle:
        handle.write(line)
    with caplog.at_level(logging.WARNING, logger="noisebench.results.store"):
        record = load_run(folder)
    assert [p.nf_db for p in record.points] == [2.0]
    assert any("duplicate" in w for w in record.warnings)


def test_an_unreadable_middle_line_is_skipped_not_fatal(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.add_point(make_point(FREQS_HZ[0]))
    os.write(writer._fd, b"{not json}\n")  # corruption from outside the writer
    writer.add_point(make_point(FREQS_HZ[1]))
    writer.close()
    record = load_run(folder)
    assert [p.freq_hz for p in record.points] == FREQS_HZ[:2]
    assert any("line 2: damaged entry skipped (not valid JSON" in w for w in record.warnings)


# ----------------------------------------------------------------------------- refusals


def test_adding_a_frequency_twice_is_refused(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    writer.add_point(make_point(1e9))
    with pytest.raises(InputError) as err:
        writer.add_point(make_point(1e9, nf_db=3.0))
    assert err.value.field == "point.freq_hz" and "done_freqs_hz" in err.value.fix
    assert len(writer.finish().points) == 1


def test_non_finite_results_are_refused_with_the_field_named(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    with pytest.raises(InputError) as err:
        writer.add_point(make_point(1e9, nf_db=math.nan))
    assert err.value.field == "point.nf_db"
    with pytest.raises(InputError) as err:
        writer.add_point(make_point(1e9, densities_w_per_hz={"hot": math.inf}))
    assert err.value.field == "point.densities_w_per_hz.hot"
    assert writer.done_freqs_hz == set()


def test_budget_for_another_frequency_is_refused(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    with pytest.raises(InputError) as err:
        writer.add_point(make_point(1e9), budget=make_budget(2e9))
    assert err.value.field == "budget.freq_hz"


def test_create_refuses_a_folder_holding_a_run(tmp_path):
    RunWriter.create(tmp_path / "run", make_info()).finish()
    with pytest.raises(InputError) as err:
        RunWriter.create(tmp_path / "run", make_info())
    assert err.value.field == "folder" and "resume" in err.value.fix


def test_resume_refuses_a_complete_run(tmp_path):
    RunWriter.create(tmp_path / "run", make_info()).finish()
    with pytest.raises(InputError, match="already complete"):
        RunWriter.resume(tmp_path / "run")


def test_resume_of_a_finished_interrupted_run_drops_stale_results(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.add_point(make_point(FREQS_HZ[0]))
    writer.finish("interrupted")
    resumed = RunWriter.resume(folder)
    assert not (folder / RESULTS_JSON_FILE).exists()
    resumed.add_point(make_point(FREQS_HZ[1]))
    resumed.close()  # killed again: the journal, not the stale results, is the truth
    assert [p.freq_hz for p in load_run(folder).points] == FREQS_HZ[:2]


def test_a_live_run_cannot_be_opened_twice_and_loads_as_running(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.add_point(make_point(FREQS_HZ[0]))
    with pytest.raises(InputError, match="in use"):
        RunWriter.resume(folder)
    assert load_run(folder).info.status == "running"
    writer.finish()
    assert load_run(folder).info.status == "complete"


def test_load_run_errors_name_the_folder(tmp_path):
    with pytest.raises(InputError) as err:
        load_run(tmp_path / "missing")
    assert err.value.field == "folder"
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match="run.json"):
        load_run(tmp_path / "empty")
    (tmp_path / "empty" / RUN_INFO_FILE).write_text('{"run_id": 3}')
    with pytest.raises(InputError) as err:
        load_run(tmp_path / "empty")
    assert err.value.field == RUN_INFO_FILE


def test_finish_checks_status_and_closes(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    with pytest.raises(InputError) as err:
        writer.finish("running")
    assert err.value.field == "status"
    writer.finish("failed")
    with pytest.raises(InputError, match="closed"):
        writer.add_point(make_point(1e9))


def test_context_manager_marks_an_interrupted_run(tmp_path):
    folder = tmp_path / "run"
    with pytest.raises(KeyboardInterrupt), RunWriter.create(folder, make_info()) as writer:
        writer.add_point(make_point(FREQS_HZ[0]))
        raise KeyboardInterrupt
    record = load_run(folder)
    assert record.info.status == "interrupted" and len(record.points) == 1
    assert (folder / RESULTS_CSV_FILE).exists()


def test_update_info_persists_and_validates(tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, make_info())
    writer.update_info(identities={"analyzer": "Example,SA-2,7,2.0"}, notes={"lot": 4})
    assert json.loads((folder / RUN_INFO_FILE).read_text())["identities"] == {
        "analyzer": "Example,SA-2,7,2.0"
    }
    with pytest.raises(InputError) as err:
        writer.update_info(ambient_k=-3.0)
    assert err.value.field == "ambient_k"
    with pytest.raises(InputError):
        writer.update_info(status="complete")
    assert writer.finish().info.notes == {"lot": 4}


# ----------------------------------------------------------------------------- CSV


def _read_csv(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    with open(path, newline="") as handle:
        reader = csv.DictReader(handle)
        return list(reader.fieldnames or []), list(reader)


def test_csv_columns_and_values(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    odd = make_point(
        FREQS_HZ[1],
        nf_db=1.0 / 3.0,
        gain_db=None,
        y_db=None,
        flags=[PointFlag.NEAR_ANALYZER_FLOOR, PointFlag.SPURS_EXCLUDED],
    )
    writer.add_point(make_point(FREQS_HZ[0]))
    writer.add_point(odd)
    writer.finish()
    header, rows = _read_csv(tmp_path / "run" / RESULTS_CSV_FILE)
    assert header == list(CSV_COLUMNS)
    assert header[:13] == [
        "freq_hz",
        "nf_db",
        "u_nf_db",
        "te_k",
        "u_te_k",
        "gain_db",
        "u_gain_db",
        "y_db",
        "floor_margin_db",
        "enr_db",
        "averages",
        "instrument_time_s",
        "flags",
    ]
    assert float(rows[1]["nf_db"]) == 1.0 / 3.0  # repr round-trips bit-exact
    assert float(rows[1]["te_k"]) == odd.te_k
    assert rows[1]["gain_db"] == "" and rows[1]["y_db"] == ""
    assert rows[1]["flags"] == "near_analyzer_floor;spurs_excluded"
    assert rows[0]["flags"] == "" and rows[0]["averages"] == "64"
    assert float(rows[0]["freq_hz"]) == FREQS_HZ[0]


def test_csv_has_budget_and_verdict_columns_when_present(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    for f in FREQS_HZ[:2]:
        writer.add_point(make_point(f), budget=make_budget(f))
    verdict = {
        "unit": "indeterminate",
        "limits": [{"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": 2.2}],
        "points": [
            {"freq_hz": FREQS_HZ[0], "verdict": "pass", "limit": 2.25},
            {"freq_hz": FREQS_HZ[1], "verdict": "indeterminate", "limit": 2.2},
        ],
    }
    writer.finish(verdict=verdict)
    header, rows = _read_csv(tmp_path / "run" / RESULTS_CSV_FILE)
    assert header == [*CSV_COLUMNS, *CSV_BUDGET_COLUMNS, *CSV_VERDICT_COLUMNS]
    assert [r["verdict"] for r in rows] == ["pass", "indeterminate"]
    assert float(rows[0]["U_nf_db"]) == 0.2458 and float(rows[0]["coverage_k"]) == 2.0
    assert rows[0]["budget_method"] == "gum" and float(rows[0]["limit"]) == 2.25


# ----------------------------------------------------------------------------- summary


def test_format_summary_reports_range_verdict_and_warnings(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    for f, nf in zip(FREQS_HZ[:3], (2.3, 1.7, 2.9), strict=True):
        writer.add_point(make_point(f, nf_db=nf, flags=[PointFlag.LOW_GAIN] if nf > 2.5 else []))
    record = writer.finish(
        verdict={
            "unit": "fail",
            "points": [{"freq_hz": FREQS_HZ[2], "verdict": "fail", "limit": 2.5}],
        }
    )
    record.warnings.append("journal line 9: incomplete last entry")
    text = format_summary(record)
    assert "y-factor method, status complete" in text
    assert "LNA-7 <rev B>" in text
    assert "min 1.700 dB at 1.2 GHz" in text and "max 2.900 dB at 1.4 GHz" in text
    labelled = {line.split()[0]: line.split(None, 1)[1] for line in text.splitlines()[1:]}
    assert labelled["verdict"] == "FAIL" and labelled["flagged"] == "1 of 3 points"
    assert labelled["analyzer"] == "Example,SA-1,0001,1.0"
    starts = {line.index(line.split(None, 1)[1]) for line in text.splitlines()[1:]}
    assert len(starts) == 1  # one column for every value
    assert "incomplete last entry" in text
    assert "\x1b[" not in text  # plain text, no terminal escapes
    table = format_summary(record, table=True).splitlines()
    assert any(
        "1.4 GHz" in row and "2.900" in row and "fail" in row and "low_gain" in row for row in table
    )


def test_format_summary_of_an_empty_run(tmp_path):
    record = RunWriter.create(tmp_path / "run", make_info()).finish("failed")
    text = format_summary(record, table=True)
    assert "status failed" in text
    assert [line.split() for line in text.splitlines() if "points" in line] == [["points", "0"]]


def test_collect_versions_and_run_id():
    versions = collect_versions()
    assert versions["python"] == ".".join(map(str, sys.version_info[:3]))
    import numpy
    import pydantic

    assert versions["numpy"] == numpy.__version__ and versions["pydantic"] == pydantic.VERSION
    run_id = new_run_id()
    assert len(run_id) == len("20250101T120000Z-abcdef") and run_id[8] == "T"
    assert new_run_id() != run_id
