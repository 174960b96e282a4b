"""A calibration entry keeps its densities as their JSON dicts (``DumpedDensities``) and hands
the same dicts to the run store: what is read back equals what was measured, and the stored
form is exactly ``model_dump(mode="json")``.

Behaviour tests of the calibration store: no outside reference is involved."""

from __future__ import annotations

import json

import numpy as np

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.running.calibration import (
    CalibrationEntry,
    CalibrationKind,
    CalibrationStore,
    DumpedDensities,
)
from noisebench.science.density import NoiseDensity


def _densities(settings: AcquisitionSettings, scale: float) -> list[NoiseDensity]:
    return [
        NoiseDensity(
            freq_hz=f,
            density_w_per_hz=scale * (1 + i / 7),
            u_density_w_per_hz=scale / 50,
            independent_samples=120.5 + i,
            band_hz=6e4,
            bins_used=8,
            excluded_freq_hz=[f + 1e3] if i == 1 else [],
            scatter_ratio=1.02,
            bias_correction_db=-0.01,
            settings=settings,
            acquisition_time_s=0.25,
        )
        for i, f in enumerate((1e9, 1.0001e9, 1.0002e9))
    ]


def _entry() -> tuple[CalibrationEntry, dict[str, list[NoiseDensity]]]:
    settings = AcquisitionSettings(
        center_hz=1.0001e9,
        span_hz=4e5,
        rbw_hz=3e4,
        points=61,
        detector="rms",
        averaging_scale="power",
        averages=16,
    )
    densities = {"hot": _densities(settings, 3e-19), "cold": _densities(settings, 5e-20)}
    entry = CalibrationEntry(
        kind=CalibrationKind.SYSTEM,
        settings=settings,
        freqs_hz=[1e9, 1.0001e9, 1.0002e9],
        densities=densities,
        cold_temperature_k=296.0,
    )
    return entry, densities


def test_entry_reads_back_the_densities_it_was_given():
    entry, densities = _entry()
    for name, given in densities.items():
        kept = entry.densities[name]
        assert isinstance(kept, DumpedDensities)
        assert list(kept) == given and kept == given and kept[1:] == given[1:]
        assert kept.dumped == [d.model_dump(mode="json") for d in given]
        assert entry.reading(name, 1.0001e9) == given[1]
    assert entry.model_dump()["densities"]["hot"] == [d.model_dump() for d in densities["hot"]]


def test_store_dict_is_the_entries_json_and_shares_their_dicts():
    entry, densities = _entry()
    store = CalibrationStore([entry])
    data = store.to_dict()
    stored = data["entries"][0]
    expected = json.loads(entry.model_dump_json())  # pydantic's own JSON of the entry
    assert json.loads(json.dumps(data)) == {"entries": [expected]}
    assert stored["densities"]["hot"] is entry.densities["hot"].dumped  # held once
    settings = {id(d["settings"]) for ds in stored["densities"].values() for d in ds}
    assert len(settings) == 1  # one settings dict for the entry's six densities
    again = CalibrationStore.from_dict(json.loads(json.dumps(data)))
    assert again.entries[0] == entry
    assert again.entries[0].reading("cold", 1.0002e9) == densities["cold"][2]


def test_store_dict_shares_plain_frequencies_and_summary_but_dumps_the_rest():
    entry, _ = _entry()
    entry.summary = [{"freq_hz": 1e9, "y_db": 4.12, "averages": 80, "flags": ["x"]}]
    stored = CalibrationStore([entry]).to_dict()["entries"][0]
    assert stored["freqs_hz"] is entry.freqs_hz and stored["summary"] is entry.summary
    assert stored == json.loads(entry.model_dump_json())  # the same JSON as before
    odd, _ = _entry()
    odd.summary = [{"freq_hz": 1e9, "y_db": np.float64(4.12), "kind": CalibrationKind.SYSTEM}]
    dumped = CalibrationStore([odd]).to_dict()["entries"][0]["summary"]
    assert dumped is not odd.summary  # not plain JSON: dumped as pydantic does
    assert dumped == [{"freq_hz": 1e9, "y_db": 4.12, "kind": "system"}]
    assert type(dumped[0]["y_db"]) is float and type(dumped[0]["kind"]) is str
