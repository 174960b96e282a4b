"""The host-CPU shortcuts of a calibrated sweep (issue 17) change no number: the same seeded
run with each shortcut replaced by the computation it stands for gives the same files, byte
for byte. The shortcuts: the sequencer's kept predicted requests (``SequencerCore._request``),
the estimator's tuple key of its kept statistics (``estimator._settings_key``) and the
journal's piecewise C-encoded calibration line (``store._line_pieces``)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from _sequencer_helpers import ideal_sim, make_plan

import noisebench.results.store as store
import noisebench.science.estimator as estimator
from noisebench.bench.registry import simulated_session
from noisebench.running.groups import plan_groups
from noisebench.running.sequencer import Sequencer
from noisebench.running.sequencer_core import SequencerCore

FREQS_HZ = (1e9, 1.5e9, 2e9, 2.5e9, 3e9)


def _run(folder: Path) -> tuple[bytes, list[dict], list[dict]]:
    """A calibrated switched Y-factor sweep on the seeded ideal bench: (results.csv, the
    points, the calibration entries without their wall-clock stamps)."""
    plan = make_plan(
        "y_factor",
        freqs_hz=FREQS_HZ,
        target=0.15,
        acquisition={"rbw_hz": 1e6, "span_hz": 10e6},
        switching={"mode": "per_sweep"},
    )
    sequencer = Sequencer(plan, simulated_session(ideal_sim(5), plan.bench))
    record = sequencer.run(folder)
    assert sequencer.calibrations_measured == len(FREQS_HZ)  # the calibration path ran
    entries = [_unstamped(e) for e in record.info.calibration["entries"]]  # type: ignore[index]
    points = [_unstamped(p.model_dump(mode="json")) for p in record.points]
    assert record.info.applied_settings  # the settings each frequency was measured with
    entries.append({"applied_settings": record.info.applied_settings})
    return (folder / "results.csv").read_bytes(), points, entries


def _unstamped(value):
    """``value`` without what differs between any two runs: the wall-clock time a
    calibration was measured and the id of the simulator's clock (a new one per bench)."""
    if isinstance(value, dict):
        return {
            k: (v[1:] if k == "measured_at_clock" and v else _unstamped(v))
            for k, v in value.items()
            if k not in ("measured_at", "calibration_measured_at")
        }
    if isinstance(value, list):
        return [_unstamped(v) for v in value]
    return value


def _reference_key(s):
    # the key the estimator used before: the settings model with the centre replaced
    return s.model_copy(update={"center_hz": 1.0})


def _reference_pieces(value):
    # the pure-Python encoder's pieces, as the journal wrote them before
    return json.JSONEncoder(allow_nan=False, separators=(",", ":")).iterencode(value)


def _reference_record_settings(self, settings, group, writer):
    # the applied settings as recorded before: a dump per point, compared with every entry
    if settings is None:
        return
    dump = settings.model_dump(mode="json", exclude={"center_hz", "averages"})
    for entry in self._applied:
        if entry["settings"] == dump:
            entry["freqs_hz"].extend(group.freqs_hz)
            return
    self._applied.append({"settings": dump, "freqs_hz": list(group.freqs_hz)})
    writer.update_info(applied_settings=self._applied)


def test_calibrated_sweep_is_the_same_with_the_shortcuts_replaced(tmp_path, monkeypatch):
    fast = _run(tmp_path / "fast")
    with monkeypatch.context() as m:
        m.setattr(SequencerCore, "_request", SequencerCore._new_request)
        m.setattr(estimator, "_settings_key", _reference_key)
        m.setattr(estimator, "_STATISTICS_CACHE", {})  # nothing kept under the other keys
        m.setattr(store, "_line_pieces", _reference_pieces)
        m.setattr(Sequencer, "_record_settings", _reference_record_settings)
        reference = _run(tmp_path / "reference")
    assert fast[0].count(b"\n") == len(FREQS_HZ) + 1  # header and the points
    assert fast[0] == reference[0]  # results.csv byte for byte
    assert fast[1] == reference[1]  # every field of every point
    assert fast[2] == reference[2]  # every calibration number


def _dumps(value) -> str:
    return json.dumps(value, allow_nan=False, separators=(",", ":"))


def test_journal_line_pieces_are_json_dumps_text():
    # a long sweep's calibration shape: long lists of dicts holding short and long lists,
    # nested dicts, non-ASCII keys and text, empty containers, every scalar type
    entry = {"freq_hz": 1e9, "densities": {"hot": [1.5e-20] * 40, "cold": [2e-21]}, "ok": True}
    cases = [
        {"kind": "calibration", "calibration": {"entries": [entry] * 50}},
        {"kind": "calibration", "calibration": {"entries": []}},
        {"a": [[1] * 40] * 40, "b": {"c": [{"x": None}] * 40, "ü": "µ"}, "n": -3},
        [[], {}, [0.1] * 33],
        {"short": [1, 2.5, "x", False]},
    ]
    for value in cases:
        assert "".join(store._line_pieces(value)) == _dumps(value)


def test_journal_line_pieces_stay_small_for_a_long_calibration():
    # the line is never built whole: no piece holds more than one entry of the long list
    entries = [{"freq_hz": 1e9 + i, "te_k": 123.456 + i, "ok": True} for i in range(5000)]
    value = {"kind": "calibration", "calibration": {"entries": entries}}
    pieces = list(store._line_pieces(value))
    assert "".join(pieces) == _dumps(value)
    assert max(len(p) for p in pieces) == max(len(_dumps(e)) for e in entries)


def test_kept_request_is_the_same_object_and_equals_a_fresh_one(tmp_path):
    plan = make_plan("y_factor", freqs_hz=(1e9, 2e9), target=0.2)
    sequencer = Sequencer(plan, simulated_session(ideal_sim(5), plan.bench))
    groups = plan_groups(plan.points())
    first = sequencer._request(groups[0], 4)
    assert sequencer._request(groups[0], 4) is first  # kept: no new validation
    assert first == sequencer._new_request(groups[0], 4)  # the same values as afresh
    other = sequencer._request(groups[1], 4)
    assert other.center_hz != first.center_hz  # another group: its own request
    assert sequencer._request(groups[0], 8).averages == 8  # another count: its own


def test_estimator_sum_is_numpy_sum_bit_for_bit():
    # the estimator's undispatched sum of a kernel: np.sum's own pairwise add.reduce
    rng = np.random.default_rng(17)
    for n in (1, 2, 7, 8, 9, 15, 16, 17, 60, 129, 1000):
        x = rng.random(n) * 10.0 ** rng.integers(-20, 3)
        assert estimator._sum(x) == float(np.sum(x))
        assert estimator._sum(x) == float(np.sum(x.tolist()))  # and of a list
