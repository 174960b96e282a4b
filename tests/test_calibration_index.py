"""The calibration store's frequency index answers exactly what a newest-first scan of every
entry answers, also after the public ``entries`` list is changed directly (a resumed run
prepends its stored calibrations).

Behaviour test only: the reference is the store's own documented rule (newest valid entry),
computed by a plain scan here; no outside value is checked."""

from __future__ import annotations

import math
import random

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.running.calibration import FREQ_REL_TOL, CalibrationEntry, CalibrationKind
from noisebench.running.calibration import CalibrationStore as Store
from noisebench.science.density import NoiseDensity


def _settings(rbw_hz: float) -> AcquisitionSettings:
    return AcquisitionSettings(
        center_hz=1e9,
        span_hz=0.0,
        rbw_hz=rbw_hz,
        points=1,
        detector="rms",
        averaging_scale="power",
        averages=1,
    )


def _entry(kind: CalibrationKind, freqs: list[float], rbw_hz: float, clock_s: float):
    names = ("floor",) if kind is CalibrationKind.FLOOR else ("hot", "cold")
    d = [NoiseDensity(freq_hz=f, density_w_per_hz=1e-20, u_density_w_per_hz=1e-22) for f in freqs]
    return CalibrationEntry(
        kind=kind,
        settings=_settings(rbw_hz),
        freqs_hz=freqs,
        densities={n: d for n in names},
        measured_at_clock=("bench", clock_s),
    )


def _scan(store: Store, kind, settings, freqs, max_age_s, clock):
    for entry in reversed(store.entries):
        if entry.valid_for(kind, settings, freqs, max_age_s=max_age_s, clock=clock):
            return entry
    return None


def test_index_finds_what_a_scan_finds_over_random_stores():
    rng = random.Random(7)
    grid = [1e9 + 25e6 * i for i in range(40)]
    for _ in range(30):
        store = Store()
        for k in range(rng.randint(1, 60)):
            start = rng.randrange(len(grid) - 3)
            freqs = grid[start : start + rng.randint(1, 3)]
            kind = rng.choice(list(CalibrationKind))
            store.add(_entry(kind, freqs, rng.choice((1e6, 3e6)), float(k)))
        if rng.random() < 0.5:  # the list changed behind the store's back
            store.entries[:0] = [_entry(CalibrationKind.SYSTEM, grid[:2], 1e6, -1.0)]
        for _ in range(40):
            start = rng.randrange(len(grid) - 2)
            # a frequency a hair off the grid (within the match tolerance) must still match
            freqs = [f * (1 + 0.5 * FREQ_REL_TOL) for f in grid[start : start + 2]]
            kind = rng.choice(list(CalibrationKind))
            settings = _settings(rng.choice((1e6, 3e6)))
            age = rng.choice((math.inf, 20.0))
            clock = ("bench", 60.0)
            want = _scan(store, kind, settings, freqs, age, clock)
            assert store.find(kind, settings, freqs, max_age_s=age, clock=clock) is want
            old = _scan(store, kind, settings, freqs, math.inf, clock)
            assert store.expired(kind, settings, freqs, clock=clock) is old


def test_index_sees_entries_replaced_in_place():
    store = Store([_entry(CalibrationKind.FLOOR, [1e9], 1e6, 0.0)])
    settings = _settings(1e6)
    assert store.find(CalibrationKind.FLOOR, settings, [1e9], max_age_s=math.inf) is not None
    store.entries[0] = _entry(CalibrationKind.FLOOR, [2e9], 1e6, 0.0)  # same length
    assert store.find(CalibrationKind.FLOOR, settings, [1e9], max_age_s=math.inf) is None
    found = store.find(CalibrationKind.FLOOR, settings, [2e9], max_age_s=math.inf)
    assert found is store.entries[0]
