"""Damaged run folders: every file is read through one reader that names the file, the line and
the damage; render shows what is intact and says what it skipped; the journal is never changed
by reading it.

Behaviour tests of our run-folder reader: no outside reference is involved."""

from __future__ import annotations

import json

import pytest
from _sequencer_helpers import ideal_session, make_plan

from noisebench.frontends import cli
from noisebench.results.run_files import RunFileError
from noisebench.results.store import load_run
from noisebench.running.sequencer import Sequencer

FREQS = [1e9, 2e9, 3e9]


@pytest.fixture
def finished(tmp_path):
    plan = make_plan("y_factor", freqs_hz=FREQS, target=0.3)
    plan = plan.model_copy(update={"output": plan.output.model_copy(update={"plots": False})})
    Sequencer(plan, ideal_session(plan)).run(tmp_path / "run")
    return tmp_path / "run"


def _damage(path, line: int, junk: bytes = b"\xff\xfe") -> int:
    """Put non-UTF-8 bytes at the start of ``line`` (1-based); returns their byte offset."""
    data = path.read_bytes()
    lines = data.split(b"\n")
    offset = sum(len(x) + 1 for x in lines[: line - 1])
    path.write_bytes(data[:offset] + junk + data[offset:])
    return offset


def _render(capsys, folder) -> tuple[int, str, str]:
    code = cli.main(["render", "--no-plots", str(folder)])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_damaged_results_json_is_named_and_the_run_rebuilt_from_the_journal(finished, capsys):
    journal = (finished / "points.jsonl").read_bytes()
    offset = _damage(finished / "results.json", 3)
    code, out, err = _render(capsys, finished)
    assert code == 0
    text = out + err
    assert f"results.json line 3: is damaged: byte {offset} is not UTF-8 text" in text
    assert "read from the journal points.jsonl instead" in text
    assert "UnicodeDecodeError" not in text and "codec" not in text
    record = load_run(finished)
    assert [p.freq_hz for p in record.points] == FREQS
    assert (finished / "points.jsonl").read_bytes() == journal  # reading never writes


def test_damaged_run_json_is_replaced_by_intact_results_json(finished, capsys):
    (finished / "run.json").write_text('{"run_id": "x",\n  "method": ', encoding="utf-8")
    code, out, err = _render(capsys, finished)
    assert code == 0
    assert "run.json line 2: is damaged: not valid JSON" in out + err
    assert "run description was taken from results.json" in out + err
    assert len(load_run(finished).points) == len(FREQS)


def test_damaged_run_json_without_results_is_one_clear_error(finished, capsys):
    (finished / "results.json").unlink()
    offset = _damage(finished / "run.json", 5)
    code, _, err = _render(capsys, finished)
    assert code == cli.EXIT_INPUT
    (line,) = err.strip().splitlines()
    assert line.startswith(f"noisebench: error: run.json line 5: is damaged: byte {offset}")
    assert "restore run.json from a backup; the journal points.jsonl was not touched" in line
    with pytest.raises(RunFileError) as info:
        load_run(finished)
    assert info.value.line == 5 and info.value.path.name == "run.json"


def test_a_damaged_journal_line_is_skipped_by_number_and_kept_on_disc(finished, capsys):
    (finished / "results.json").unlink()  # force the rebuild from the journal
    lines = (finished / "points.jsonl").read_bytes().split(b"\n")
    point_line = next(i for i, x in enumerate(lines) if b'"kind":"point"' in x) + 1
    _damage(finished / "points.jsonl", point_line, junk=b"\xc3(")
    damaged = (finished / "points.jsonl").read_bytes()
    code, out, err = _render(capsys, finished)
    assert code == 0
    assert f"points.jsonl line {point_line}: damaged entry skipped (not UTF-8 text" in out + err
    assert len(load_run(finished).points) == len(FREQS) - 1  # the other points are shown
    assert (finished / "points.jsonl").read_bytes() == damaged
    html = (finished / "report.html").read_text(encoding="utf-8")
    assert f"line {point_line}: damaged entry skipped" in html  # the report says what it skipped


def test_a_lone_surrogate_escape_in_the_journal_does_not_stop_a_resume(finished):
    from noisebench.results.store import RunWriter

    info = json.loads((finished / "run.json").read_text(encoding="utf-8"))
    info["status"] = "interrupted"
    (finished / "run.json").write_text(json.dumps(info), encoding="utf-8")
    with open(finished / "points.jsonl", "ab") as handle:
        handle.write(b'{"kind":"calibration","calibration":{"note":"\\ud800"}}\n')
    writer = RunWriter.resume(finished)  # before: the rewrite of run.json failed on the text
    writer.close()
    assert any("lone surrogate" in w for w in load_run(finished).warnings)
