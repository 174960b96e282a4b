"""Resume: an interrupted or failed run continues without losing or repeating points."""

from __future__ import annotations

import json

import pytest
from _sequencer_helpers import ideal_session, make_plan

from noisebench.bench.registry import Connection
from noisebench.errors import CommunicationError, InputError
from noisebench.results.store import JOURNAL_FILE, load_run
from noisebench.running.sequencer import Sequencer

FREQS = [1e9, 2e9, 3e9, 4e9]


def _interrupted_run(tmp_path, plan, after: int):
    done = []

    def stop(point):
        done.append(point)
        if len(done) == after:
            raise KeyboardInterrupt

    record = Sequencer(plan, ideal_session(plan), on_point=stop).run(tmp_path / "run")
    assert record.info.status == "interrupted"
    return record


def _journal_points(folder):
    lines = (folder / JOURNAL_FILE).read_text(encoding="utf-8").splitlines()
    return [
        json.loads(line)["point"]["freq_hz"]
        for line in lines
        if json.loads(line)["kind"] == "point"
    ]


def test_resume_completes_without_repeating_finished_points(tmp_path):
    plan = make_plan("y_factor", freqs_hz=FREQS)
    first = _interrupted_run(tmp_path, plan, after=2)
    before = {p.freq_hz: p for p in first.points}

    session = ideal_session(plan, seed=7)  # a new process: a fresh bench
    measured = []
    record = Sequencer(plan, session, on_point=lambda p: measured.append(p.freq_hz)).run(
        tmp_path / "run", resume=True
    )
    assert record.info.status == "complete"
    assert [p.freq_hz for p in record.points] == FREQS
    assert measured == [3e9, 4e9]  # only the missing points were measured
    for freq, point in before.items():  # finished points kept exactly
        assert record.points[FREQS.index(freq)].nf_db == point.nf_db
    assert sorted(_journal_points(tmp_path / "run")) == FREQS  # each point once
    assert len(record.info.resumed_at) == 1
    # same instruments, calibration still valid: no THROUGH move in the resumed run
    assert Connection.THROUGH not in session.moves


def test_resume_after_an_instrument_fault(tmp_path, monkeypatch):
    plan = make_plan("gain", freqs_hz=FREQS)
    session = ideal_session(plan)
    analyzer = session.bench.analyzer
    real = analyzer.acquire_trace

    def flaky():
        if analyzer.settings.center_hz > 2.5e9 and session.connection is Connection.DUT:
            raise CommunicationError("timeout", visa_code=-1073807339)
        return real()

    monkeypatch.setattr(analyzer, "acquire_trace", flaky)
    with pytest.raises(CommunicationError):
        Sequencer(plan, session).run(tmp_path / "run")
    assert load_run(tmp_path / "run").info.status == "failed"

    record = Sequencer(plan, ideal_session(plan)).run(tmp_path / "run", resume=True)
    assert record.info.status == "complete"
    assert [p.freq_hz for p in record.points] == FREQS


def test_resume_refuses_a_different_plan(tmp_path):
    plan = make_plan("y_factor", freqs_hz=FREQS)
    _interrupted_run(tmp_path, plan, after=1)
    other = make_plan("y_factor", freqs_hz=FREQS, target=0.05)
    with pytest.raises(InputError) as info:
        Sequencer(other, ideal_session(other)).run(tmp_path / "run", resume=True)
    assert info.value.field == "acquisition"
    assert "differs from the plan of the interrupted run" in str(info.value)
    # the refused attempt left the run resumable with the right plan
    record = Sequencer(plan, ideal_session(plan)).run(tmp_path / "run", resume=True)
    assert len(record.points) == len(FREQS)


def test_resume_refuses_a_complete_run(tmp_path):
    plan = make_plan("gain", freqs_hz=[2e9])
    Sequencer(plan, ideal_session(plan)).run(tmp_path / "run")
    with pytest.raises(InputError, match="already complete"):
        Sequencer(plan, ideal_session(plan)).run(tmp_path / "run", resume=True)


def test_resume_with_other_instruments_calibrates_again(tmp_path):
    plan = make_plan("y_factor", freqs_hz=FREQS)
    _interrupted_run(tmp_path, plan, after=2)
    session = ideal_session(plan, analyzer__identity="noisebench,simulated analyzer,OTHER,0.1")
    seq = Sequencer(plan, session)
    record = seq.run(tmp_path / "run", resume=True)
    assert record.info.status == "complete"
    assert seq.calibrations_measured == 2  # the two remaining points' groups
    assert Connection.THROUGH in session.moves
