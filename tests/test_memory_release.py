"""Memory of long sweeps: a group's readings kept compactly (``averaging.ReadingTable``) combine
exactly as the per-point series did, and the sweep-level Y-factor schedule drops a group's
readings as soon as the group stops (its points or calibration entry made), so a sweep holds
only its active groups' readings. ``scripts/bench_memory.py`` measures the growth per point;
these tests check the behaviour it relies on, cheaply.

Behaviour tests only: the reference is the same sweep kept the old way; no outside value is
checked.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from _sequencer_helpers import ideal_sim, make_plan

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.bench.registry import simulated_session
from noisebench.running import sequencer_switched
from noisebench.running.sequencer import Sequencer
from noisebench.running.sequencer_core import _Readings
from noisebench.science.averaging import DensitySeries, PackedReading, ReadingTable
from noisebench.science.density import NoiseDensity


def _densities(rng, freqs, averages: int, settings) -> list[NoiseDensity]:
    out = []
    for f in freqs:
        value = float(rng.uniform(1e-20, 2e-20))
        optional = rng.random(4) < 0.5  # each optional field given or not
        out.append(
            NoiseDensity(
                freq_hz=f,
                density_w_per_hz=value,
                u_density_w_per_hz=0.0 if rng.random() < 0.1 else value * 0.05,
                independent_samples=float(rng.uniform(10, 100)) if optional[0] else None,
                band_hz=60e3 if optional[1] else None,
                bins_used=int(rng.integers(1, 9)) if optional[1] else None,
                excluded_freq_hz=[f + 1e3] if rng.random() < 0.2 else [],
                scatter_ratio=float(rng.uniform(0.8, 1.2)) if optional[2] else None,
                bias_correction_db=float(rng.normal(0, 0.01)),
                settings=settings.model_copy(update={"averages": averages}),
                acquisition_time_s=float(rng.uniform(0, 1)) if optional[3] else None,
            )
        )
    return out


def test_a_reading_table_combines_to_the_bit_as_the_per_point_series():
    # the table rebuilds each frequency's series from the same floats in the same order, so
    # the combined density (mean, u, scatter test, pooled ratio, settings) is identical
    rng = np.random.default_rng(5)
    settings = AcquisitionSettings(
        center_hz=1e9,
        span_hz=1e6,
        rbw_hz=3e4,
        vbw_hz=3e5,
        points=101,
        detector="rms",
        averaging_scale="power",
        averages=1,
    )
    freqs = [1.0e9, 1.1e9, 1.2e9]
    table = ReadingTable(len(freqs))
    series = [DensitySeries() for _ in freqs]
    for k in range(5):
        densities = _densities(rng, freqs, averages=2 + k, settings=settings)
        table.add(densities)
        for s, d in zip(series, densities, strict=True):
            s.add(d)
    assert len(table) == 5
    for i in range(len(freqs)):
        expected, got = series[i].combined(), table.series(i).combined()
        assert got == expected
        assert got.density.model_dump() == expected.density.model_dump()
        assert table.averages(i) == series[i].averages == sum(range(2, 7))
    with pytest.raises(ValueError):
        table.add(_densities(rng, freqs[:2], averages=1, settings=settings))


def test_a_packed_reading_adds_the_same_floats_as_its_densities():
    # a sweep-level pass packs each group's reading as it is read (the pass holds them all
    # until its error check); the table it fills must equal one filled from the densities
    rng = np.random.default_rng(6)
    settings = AcquisitionSettings(
        center_hz=1e9, span_hz=1e6, rbw_hz=3e4, vbw_hz=3e5, points=101,
        detector="rms", averaging_scale="power", averages=1,
    )  # fmt: skip
    freqs = [1.0e9, 1.1e9, 1.2e9, 1.3e9]
    direct, packed = ReadingTable(len(freqs)), ReadingTable(len(freqs))
    for k in range(4):
        densities = _densities(rng, freqs, averages=3 + k, settings=settings)
        reading = PackedReading(densities)
        assert len(reading) == len(freqs)
        assert reading.densities_w_per_hz() == [d.density_w_per_hz for d in densities]
        direct.add(densities)
        packed.add(reading)
    for slot in ReadingTable.__slots__:  # arrays by their bytes: NaN marks a field not given
        a, b = getattr(packed, slot), getattr(direct, slot)
        assert (a.tobytes() == b.tobytes()) if hasattr(a, "tobytes") else a == b, slot
    for i in range(len(freqs)):
        got, expected = packed.series(i).combined(), direct.series(i).combined()
        assert got.density.model_dump() == expected.density.model_dump()
    with pytest.raises(ValueError):
        packed.add(PackedReading(_densities(rng, freqs[:2], averages=1, settings=settings)))


def test_group_readings_without_readings_are_empty_and_release_forgets_them():
    readings = _Readings(("hot", "cold"), (1e9, 2e9))
    assert readings.averages("hot") == 0
    assert len(readings.get(1e9, "hot")) == 0
    d = [
        NoiseDensity(freq_hz=f, density_w_per_hz=1e-20, u_density_w_per_hz=1e-21)
        for f in (1e9, 2e9)
    ]
    readings.add("hot", d)
    readings.add("hot", d)
    assert readings.averages("hot") == 2  # no settings: one average a reading
    assert len(readings.get(2e9, "hot")) == 2
    assert len(readings.get(3e9, "hot")) == 0  # not a frequency of the group
    assert math.isclose(readings.get(2e9, "hot").combined().density.density_w_per_hz, 1e-20)
    readings.release()
    assert readings.averages("hot") == 0 and len(readings.get(2e9, "hot")) == 0


def test_the_switched_sweep_drops_each_group_s_readings_when_it_stops(tmp_path, monkeypatch):
    # every group is released as soon as it stops, before the next group's points are stored,
    # and no drift monitor keeps its readings past its block; at the end no group holds one
    runs: list[sequencer_switched._GroupRun] = []
    released_when_stored: list[bool] = []
    original_init = sequencer_switched._GroupRun.__init__
    original_store = sequencer_switched.SwitchedSweep._store_outcome

    def init(self, *args, **kwargs):
        original_init(self, *args, **kwargs)
        runs.append(self)

    def store(self, group, outcome, writer):
        finished = [r for r in runs if r.group.index == group.index][-1]
        released_when_stored.append(
            finished.readings.averages("hot") == 0
            and not finished.checks
            and not any(r.log for r in runs)  # a block's monitor drops its log once checked
        )
        original_store(self, group, outcome, writer)

    monkeypatch.setattr(sequencer_switched._GroupRun, "__init__", init)
    monkeypatch.setattr(sequencer_switched.SwitchedSweep, "_store_outcome", store)
    freqs = (1.0e9, 1.5e9, 2.0e9, 2.5e9)
    plan = make_plan("y_factor", freqs_hz=freqs, target=0.15, switching={"mode": "per_sweep"})
    sim = ideal_sim(4)
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "run")
    assert len(record.points) == len(freqs)
    assert all(p.notes["schedule"] == "per_sweep" for p in record.points)
    # calibration and measurement: one run per group each
    assert len(runs) == 2 * len(freqs)
    assert released_when_stored == [True] * len(freqs)
    for run in runs:
        assert run.readings.averages("hot") == 0 and run.readings.averages("cold") == 0
        assert not run.log and not run.drift_checks
        assert run.budget.used_s > 0  # the budget stays: the next phase's rate comes from it


def test_the_switched_sweep_holds_no_point_results_while_it_reads(tmp_path, monkeypatch):
    # a round's points are made for its decisions; the groups reading on drop theirs and the
    # stopping groups' are journalled, so no PointResult lives while the next round reads
    import gc

    from noisebench.bench.registry import Connection
    from noisebench.science.point import PointResult

    alive: list[int] = []
    original = sequencer_switched.SwitchedSweep._run_block

    def run_block(self, block, connection):
        if connection is Connection.DUT:
            alive.append(sum(isinstance(o, PointResult) for o in gc.get_objects()))
        original(self, block, connection)

    monkeypatch.setattr(sequencer_switched.SwitchedSweep, "_run_block", run_block)
    freqs = (1.0e9, 1.5e9, 2.0e9, 2.5e9, 3.0e9)
    plan = make_plan("y_factor", freqs_hz=freqs, target=0.1, switching={"mode": "per_sweep"})
    record = Sequencer(plan, simulated_session(ideal_sim(4), plan.bench)).run(tmp_path / "run")
    assert len(record.points) == len(freqs)
    assert len(alive) >= 2  # a pilot round and at least one more
    assert alive == [0] * len(alive)
