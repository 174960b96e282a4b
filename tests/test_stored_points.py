"""A finished run's record reads its points and budgets from the journal on demand
(``noisebench.results.stored``): the same items, order and files as the lists it replaces.

Behaviour tests of the run store: no outside reference is involved."""

from __future__ import annotations

import copy
import json
import shutil

import pytest
from test_results import FREQS_HZ, make_budget, make_info, make_point

from noisebench.results.exports import model_json_pieces, record_json_pieces, results_csv_text
from noisebench.results.journal import _read_journal
from noisebench.results.records import RunRecord, StoredSequence
from noisebench.results.store import JOURNAL_FILE, RunWriter, load_run
from noisebench.results.stored import JournalIndex

# a resumed run, in journal order: out of frequency order, with a duplicate and a gap
ORDER_HZ = [FREQS_HZ[3], FREQS_HZ[0], FREQS_HZ[5], FREQS_HZ[1], FREQS_HZ[4]]


def _finished(folder, *, budgets=True, damage=False):
    writer = RunWriter.create(folder, make_info())
    writer.save_calibration({"entries": [{"freqs_hz": [1e9], "note": "x" * 70_000}]})
    for i, f in enumerate(ORDER_HZ[:3]):
        writer.add_point(make_point(f, nf_db=2.0 + i), make_budget(f) if budgets else None)
    if damage:  # a damaged middle line and a duplicate: left out with warnings
        with open(folder / JOURNAL_FILE, "ab") as handle:
            handle.write(b'{"kind":"point","point":{"freq_hz":\n')
            entry = {
                "kind": "point",
                "point": make_point(ORDER_HZ[0], nf_db=9.0).model_dump(mode="json"),
                "budget": None,
            }
            handle.write(json.dumps(entry).encode() + b"\n")
    for i, f in enumerate(ORDER_HZ[3:]):
        writer.add_point(make_point(f, nf_db=5.0 + i), make_budget(f) if i or budgets else None)
    return writer


@pytest.mark.parametrize("damage", [False, True])
def test_finish_returns_the_journal_points_sorted_as_the_loaded_lists(tmp_path, damage):
    record = _finished(tmp_path / "run", damage=damage).finish()
    assert isinstance(record.points, StoredSequence)
    assert isinstance(record.budgets, StoredSequence)
    loaded = load_run(tmp_path / "run")  # results.json: plain lists
    assert isinstance(loaded.points, list)
    assert [p.freq_hz for p in record.points] == sorted(ORDER_HZ)
    assert [p.nf_db for p in record.points] == [3.0, 5.0, 2.0, 6.0, 4.0]
    assert list(record.points) == loaded.points and record.points == loaded.points
    assert list(record.budgets) == loaded.budgets
    assert [b["freq_hz"] for b in record.budgets] == sorted(ORDER_HZ)
    assert len(record.points) == 5 and record.points[-1] == loaded.points[4]
    assert record.points[1:3] == loaded.points[1:3]
    with pytest.raises(IndexError):
        record.points[5]
    # with damage: the torn line and the later duplicate (NF 9 dB) are left out, as on load


def test_stored_record_writes_the_same_files_as_a_list_record(tmp_path):
    record = _finished(tmp_path / "run").finish()
    listed = RunRecord.model_validate(
        {**dict(record), "points": list(record.points), "budgets": list(record.budgets)}
    )
    assert isinstance(listed.points, list)
    text = "".join(record_json_pieces(record))
    assert text == "".join(record_json_pieces(listed))
    assert text == listed.model_dump_json(indent=2)  # pydantic's own dump of the lists
    assert record.model_dump_json(indent=2) == text  # the stored record dumps as lists
    assert record.model_dump()["points"] == listed.model_dump()["points"]
    assert results_csv_text(record) == results_csv_text(listed)
    assert (tmp_path / "run" / "results.json").read_text(encoding="utf-8") == text


def test_csv_joins_stored_budgets_to_their_points(tmp_path):
    # the first point of the second half has no budget: its budget cells stay empty
    record = _finished(tmp_path / "run", budgets=False).finish()
    assert [b["freq_hz"] for b in record.budgets] == [FREQS_HZ[4]]
    lines = results_csv_text(record).splitlines()
    header = lines[0].split(",")
    rows = [dict(zip(header, line.split(","), strict=True)) for line in lines[1:]]
    assert [r["freq_hz"] for r in rows] == [repr(f) for f in sorted(ORDER_HZ)]
    assert [r["U_nf_db"] for r in rows] == ["", "", "", "0.2458", ""]  # at FREQS_HZ[4]
    listed = RunRecord.model_validate(
        {**dict(record), "points": list(record.points), "budgets": list(record.budgets)}
    )
    assert results_csv_text(record) == results_csv_text(listed)


def test_stored_record_survives_its_folder_and_copies(tmp_path):
    record = _finished(tmp_path / "run").finish()
    expected = load_run(tmp_path / "run").points
    shutil.rmtree(tmp_path / "run")  # the journal stays open for reading (POSIX)
    assert list(record.points) == expected
    assert copy.deepcopy(record).points == expected
    assert record.model_copy(update={"warnings": ["x"]}).points is record.points


def test_an_empty_run_has_empty_stored_sequences(tmp_path):
    writer = RunWriter.create(tmp_path / "run", make_info())
    record = writer.finish()
    assert len(record.points) == 0 and not record.budgets
    assert list(record.points) == [] and record.points == []
    text = (tmp_path / "run" / "results.json").read_text(encoding="utf-8")
    assert json.loads(text)["points"] == [] and json.loads(text)["budgets"] == []


def test_skipping_a_long_calibration_line_keeps_every_point_and_offset(tmp_path):
    # the helper's calibration line is longer than one skip chunk (64 kB)
    writer = _finished(tmp_path / "run", damage=True)
    writer.close()
    path = tmp_path / "run" / JOURNAL_FILE
    with open(path, "ab") as handle:  # a torn last line
        handle.write(b'{"kind":"point","po')
    whole = _read_journal(path)
    skipped = _read_journal(path, calibrations=False)
    indexed = _read_journal(path, calibrations=False, index=JournalIndex())
    assert len(whole.calibrations) == 1 and not skipped.calibrations
    assert skipped.points == whole.points and len(whole.points) == 5
    assert skipped.warnings == whole.warnings and len(whole.warnings) == 3
    assert skipped.valid_bytes == whole.valid_bytes == path.stat().st_size - 19
    assert indexed.index is not None and not indexed.points
    data = path.read_bytes()
    lines = [
        data[o : o + n] for o, n in zip(indexed.index.offsets, indexed.index.lengths, strict=True)
    ]
    assert [json.loads(line)["point"]["nf_db"] for line in lines] == [2.0, 3.0, 4.0, 5.0, 6.0]


def test_pieces_of_a_long_calibration_are_pydantics_indented_json():
    # lists longer and shorter than the piecewise threshold, nested, with non-ASCII text
    density = {"freq_hz": 1e9, "u": 1.5e-22, "excluded": [], "settings": {"rbw_hz": 3e4}}
    entries = [
        {"freqs_hz": [1e9 + i] * (i % 50), "densities": {"floor": [density] * (i % 45)}}
        for i in range(40)
    ]
    info = make_info(calibration={"entries": entries, "note": "µ"}, notes={"long": [{}] * 40})
    assert "".join(model_json_pieces(info)) == info.model_dump_json(indent=2)
