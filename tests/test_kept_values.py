"""Values kept to save host CPU behave as if computed afresh: a caller's changes never reach
the next caller, and a replaced table is never answered from the old one."""

from __future__ import annotations

import numpy as np

from noisebench.bench.acquisition import AcquisitionSettings
from noisebench.running.corrections import Corrections
from noisebench.science.enr import EnrTable


def _settings(points: int = 11) -> AcquisitionSettings:
    return AcquisitionSettings(
        center_hz=1e9,
        span_hz=10e6,
        rbw_hz=1e6,
        points=points,
        detector="rms",
        averaging_scale="power",
        averages=1,
    )


def test_frequency_axis_is_a_fresh_array_each_time() -> None:
    s = _settings()
    first = s.frequencies_hz()
    expected = np.linspace(1e9 - 5e6, 1e9 + 5e6, 11)
    assert np.array_equal(first, expected)  # the same numbers as np.linspace, bit for bit
    first[:] = 0.0  # a caller may change its copy ...
    second = s.frequencies_hz()
    assert np.array_equal(second, expected)  # ... the next caller never sees it
    assert second.flags.writeable


def _corrections(table: EnrTable) -> Corrections:
    return Corrections(
        t0_k=290.0,
        source_temperature_k=296.0,
        input_loss_temperature_k=None,
        output_loss_temperature_k=None,
        input_loss=lambda f: 0.0,
        output_loss=lambda f: 0.0,
        enr_table=table,
    )


def test_enr_at_answers_from_the_current_table() -> None:
    corr = _corrections(EnrTable(freq_hz=[1e9, 3e9], enr_db=[15.0, 13.0]))
    assert corr.enr_at(2e9) == (14.0, None, False)  # linear in dB between the rows
    assert corr.enr_at(2e9) == (14.0, None, False)  # asked again: the same answer
    corr.enr_table = EnrTable(freq_hz=[1e9, 3e9], enr_db=[5.0, 7.0], u_enr_db=[0.1, 0.3])
    enr, u, extrapolated = corr.enr_at(2e9)
    assert (enr, extrapolated) == (6.0, False)
    assert u is not None and abs(u - 0.2) < 1e-12
