"""Property: the gain method and the Y-factor method agree on the same DUT.

Synthetic available noise densities are built from the physics both methods rest on (Friis,
docs/references.md §3-§5): a DUT of noise temperature Te and gain G between the source and an
analyzer
of noise temperature T_SA, a noise source whose excess noise T0*ENR adds to its physical (cold)
temperature Tc, and an ambient termination at Tc for the gain method. Both methods must return
the DUT's own NF (and the Y-factor its gain), whatever the mix of parameters.
"""

from __future__ import annotations

import math

import pytest
import scipy.constants
from hypothesis import given, settings
from hypothesis import strategies as st

from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point, gain_method_point, y_factor_point

K = scipy.constants.k
T0 = 290.0


def _density(n: float) -> NoiseDensity:
    # 0.05 %: a long average, so that even the weakest corner (ENR 5 dB into a 25 dB-NF
    # analyzer, Y - 1 = 0.01) is a significant Y (14 u; 4 u is the refusal threshold)
    return NoiseDensity(freq_hz=2.4e9, density_w_per_hz=n, u_density_w_per_hz=0.0005 * n)


@settings(max_examples=300, deadline=None)
@given(
    nf_db=st.floats(0.3, 15.0),
    gain_db=st.floats(5.0, 40.0),
    enr_db=st.floats(5.0, 25.0),
    analyzer_nf_db=st.floats(5.0, 25.0),
    tc_k=st.floats(280.0, 310.0),
    input_loss_db=st.sampled_from([0.0, 0.4]),
    output_loss_db=st.sampled_from([0.0, 1.2]),
)
def test_gain_method_and_y_factor_agree(
    nf_db, gain_db, enr_db, analyzer_nf_db, tc_k, input_loss_db, output_loss_db
):
    te_dut = T0 * (10 ** (nf_db / 10) - 1)
    g_dut = 10 ** (gain_db / 10)
    t_sa = T0 * (10 ** (analyzer_nf_db / 10) - 1)
    l_in, l_out = 10 ** (input_loss_db / 10), 10 ** (output_loss_db / 10)
    # path [input loss, DUT, output loss] at ambient Tc (Friis in noise temperatures)
    te_path = (l_in - 1) * tc_k + l_in * (te_dut + (l_out - 1) * tc_k / g_dut)
    g_path = g_dut / (l_in * l_out)
    th_k = T0 * 10 ** (enr_db / 10) + tc_k  # ENR referred to T0 (docs/references.md §5)

    def at_analyzer(source_k: float, through_dut: bool = True) -> float:
        if through_dut:
            return K * ((source_k + te_path) * g_path + t_sa)
        return K * (source_k + t_sa)

    losses = dict(input_loss_db=input_loss_db, output_loss_db=output_loss_db)
    gain = gain_method_point(
        _density(at_analyzer(tc_k)),
        10 * math.log10(g_path),
        floor=_density(at_analyzer(tc_k, through_dut=False)),
        source_temperature_k=tc_k,
        **losses,
    )
    cal = calibrate_point(
        _density(at_analyzer(th_k, False)),
        _density(at_analyzer(tc_k, False)),
        enr_db,
        cold_temperature_k=tc_k,
    )
    yf = y_factor_point(
        _density(at_analyzer(th_k)),
        _density(at_analyzer(tc_k)),
        enr_db,
        cold_temperature_k=tc_k,
        calibration=cal,
        **losses,
    )

    assert gain.nf_db == pytest.approx(nf_db, abs=1e-8)
    assert yf.nf_db == pytest.approx(nf_db, abs=1e-8)
    assert yf.nf_db == pytest.approx(gain.nf_db, abs=1e-8)
    assert yf.te_k == pytest.approx(gain.te_k, rel=1e-8, abs=1e-7)
    assert yf.gain_db == pytest.approx(gain_db, abs=1e-9)
    assert gain.gain_db == pytest.approx(gain_db, abs=1e-9)
    assert cal.te_k == pytest.approx(t_sa, rel=1e-9)
    # both measure the same DUT noise against the same analyzer noise (Friis, §4 and §5)
    assert yf.floor_margin_db == pytest.approx(gain.floor_margin_db, abs=1e-8)
    for r in (gain, yf):
        assert math.isfinite(r.u_nf_db) and r.u_nf_db > 0 and r.u_te_k > 0
