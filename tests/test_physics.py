"""noisebench.science.physics: thermal noise, conversions, Friis, losses, SSB/DSB, Planck factor.

Reference values are recomputed from the named formula or library; the rounded figures of
docs/references.md are checked to the digits it prints.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.constants
from hypothesis import given
from hypothesis import strategies as st

from noisebench.errors import InputError
from noisebench.science import physics as ph

K = scipy.constants.k


# --------------------------------------------------------------------------- §1 thermal noise


def test_boltzmann_is_the_exact_si_value():
    # scipy.constants; SI Brochure 9th ed. (2019): k = 1.380649e-23 J/K exactly (from memory)
    assert ph.BOLTZMANN_J_PER_K == scipy.constants.k == 1.380649e-23
    assert ph.T0_K == 290.0  # IRE/IEEE Std 161 reference temperature (docs/references.md §1)


def test_kt0_in_dbm_per_hz():
    kt0 = ph.kt_w_per_hz(290.0)
    assert kt0 == pytest.approx(scipy.constants.k * 290.0, rel=1e-15)  # scipy.constants
    # docs/references.md §1: kT0 = 4.003882e-21 W/Hz = -173.9752 dBm/Hz
    assert kt0 == pytest.approx(4.003882e-21, rel=2e-7)
    assert ph.w_per_hz_to_dbm_per_hz(kt0) == pytest.approx(-173.9752, abs=5e-5)
    # docs/references.md §1: kT at 300 K = -173.8280 dBm/Hz
    assert ph.w_per_hz_to_dbm_per_hz(ph.kt_w_per_hz(300.0)) == pytest.approx(-173.8280, abs=5e-5)


def test_kt0b_over_bandwidths():
    bandwidths = np.array([1.0, 10.0, 1e3, 1e4, 1e6])
    got = ph.w_to_dbm(np.asarray(ph.kt_w_per_hz(290.0)) * bandwidths)
    expected = 10 * np.log10(scipy.constants.k * 290 * bandwidths / 1e-3)  # scipy.constants
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12)
    # docs/references.md §1 table
    np.testing.assert_allclose(
        got, [-173.9752, -163.9752, -143.9752, -133.9752, -113.9752], atol=5e-5
    )


def test_kt_refuses_negative_temperature():
    with pytest.raises(InputError, match="temperature_k"):
        ph.kt_w_per_hz(-1.0)


# --------------------------------------------------------------------------- §2 NF <-> Te

NF_TABLE_DB = np.array([0.5, 1.0, 2.0, 3.0, 6.0, 10.0])


def test_nf_te_table():
    te = ph.nf_db_to_te_k(NF_TABLE_DB)
    # Te = T0 (F - 1), F = 10^(NF/10) (IRE/IEEE Std 161; docs/references.md §2)
    np.testing.assert_allclose(te, 290.0 * (10 ** (NF_TABLE_DB / 10) - 1), rtol=1e-14)
    # docs/references.md §2 table, 3 decimals
    np.testing.assert_allclose(te, [35.385, 75.088, 169.619, 288.626, 864.511, 2610.000], atol=5e-4)
    np.testing.assert_allclose(
        ph.nf_db_to_factor(NF_TABLE_DB),
        [1.122018, 1.258925, 1.584893, 1.995262, 3.981072, 10.0],
        atol=5e-7,
    )
    np.testing.assert_allclose(ph.te_k_to_nf_db(te), NF_TABLE_DB, atol=1e-12)


def test_t0_is_a_parameter():
    assert ph.factor_to_te_k(2.0, t0_k=300.0) == pytest.approx(300.0)
    assert ph.te_k_to_factor(150.0, t0_k=300.0) == pytest.approx(1.5)
    assert ph.nf_db_to_te_k(10 * math.log10(2.0), t0_k=296.0) == pytest.approx(296.0)


def test_negative_noise_temperature_policy():
    with pytest.raises(InputError, match="factor"):
        ph.factor_to_nf_db(0.95)
    assert ph.factor_to_nf_db(0.95, allow_negative=True) == pytest.approx(10 * math.log10(0.95))
    with pytest.raises(InputError, match="te_k"):
        ph.te_k_to_nf_db(-5.0)
    assert ph.te_k_to_nf_db(-5.0, allow_negative=True) == pytest.approx(
        10 * math.log10(1 - 5 / 290)
    )
    with pytest.raises(InputError, match="nf_db"):
        ph.nf_db_to_te_k(-0.1)
    # a noise factor <= 0 has no dB value, whatever the policy
    with pytest.raises(InputError, match="te_k"):
        ph.te_k_to_nf_db(-290.0, allow_negative=True)
    with pytest.raises(InputError, match="factor"):
        ph.factor_to_nf_db(0.0, allow_negative=True)


@pytest.mark.parametrize(
    "func, arg",
    [
        (ph.linear_to_db, 0.0),
        (ph.linear_to_db, -1.0),
        (ph.w_to_dbm, 0.0),
        (ph.w_per_hz_to_dbm_per_hz, -1e-20),
        (ph.linear_to_db, float("nan")),
        (ph.db_to_linear, float("inf")),
        (ph.dbm_to_w, float("nan")),
    ],
)
def test_conversions_refuse_bad_values(func, arg):
    with pytest.raises(InputError) as info:
        func(arg)
    assert info.value.fix  # every refusal says what to do


def test_refusal_names_the_first_bad_element():
    with pytest.raises(InputError, match=r"lin: must be > 0 .*got -2\.0"):
        ph.linear_to_db(np.array([1.0, -2.0, 3.0]))


def test_scalars_in_floats_out_arrays_keep_their_shape():
    assert isinstance(ph.db_to_linear(3.0), float)
    assert isinstance(ph.nf_db_to_te_k(2), float)
    grid = np.full((3, 4), 2.0)
    assert ph.nf_db_to_te_k(grid).shape == (3, 4)
    assert ph.kt_w_per_hz([290.0, 300.0]).shape == (2,)


# --------------------------------------------------------------------------- §3 Friis

F1, G1, F2 = 10**0.1, 10**1.5, 10**0.8  # docs/references.md §3: NF1 1 dB, G1 15 dB, NF2 8 dB
F3, G2 = 10**1.5, 10**2.0  # third stage NF 15 dB after G2 20 dB


def test_friis_two_stage_example():
    f = ph.friis_noise_factor([F1, F2], [G1])
    assert f == pytest.approx(F1 + (F2 - 1) / G1, rel=1e-15)  # Friis 1944, docs/references.md §3
    assert f == pytest.approx(1.426829, abs=5e-7)  # docs/references.md §3
    assert ph.factor_to_nf_db(f) == pytest.approx(1.5437, abs=5e-5)
    te = ph.friis_te_k(ph.factor_to_te_k(np.array([F1, F2])), [G1])
    assert te == pytest.approx(123.780, abs=5e-4)  # docs/references.md §3
    assert te == pytest.approx(ph.factor_to_te_k(f), rel=1e-13)  # the two forms agree


def test_friis_three_stage_example():
    f = ph.friis_noise_factor([F1, F2, F3], [G1, G2])
    assert f == pytest.approx(F1 + (F2 - 1) / G1 + (F3 - 1) / (G1 * G2), rel=1e-15)
    assert f == pytest.approx(1.436513, abs=5e-7)  # docs/references.md §3
    assert ph.factor_to_nf_db(f) == pytest.approx(1.5731, abs=5e-5)
    te = ph.friis_te_k(ph.factor_to_te_k(np.array([F1, F2, F3])), [G1, G2, 1e3])
    assert te == pytest.approx(126.589, abs=5e-4)  # docs/references.md §3 (last gain is ignored)


def test_friis_stage_by_frequency_arrays():
    factors = np.array([[1.2, 1.3, 1.4], [6.0, 7.0, 8.0]])  # stage x frequency
    gains = np.array([[10.0, 20.0, 40.0]])
    got = ph.friis_noise_factor(factors, gains)
    np.testing.assert_allclose(got, factors[0] + (factors[1] - 1) / gains[0], rtol=1e-15)
    # per-stage scalars mixed with per-frequency arrays broadcast on the frequency axis
    mixed = ph.friis_noise_factor([1.2, np.array([6.0, 7.0, 8.0])], [np.array([10.0, 20, 40])])
    np.testing.assert_allclose(mixed, 1.2 + np.array([5.0, 6.0, 7.0]) / [10, 20, 40])
    assert ph.friis_noise_factor([1.2], []) == 1.2


def test_friis_refuses_inconsistent_stages():
    with pytest.raises(InputError, match="gains"):
        ph.friis_noise_factor([1.2, 2.0, 3.0], [10.0])
    with pytest.raises(InputError, match="gains"):
        ph.friis_noise_factor([1.2, 2.0], [0.0])
    with pytest.raises(InputError, match="factors"):
        ph.friis_noise_factor([0.5, 2.0], [10.0])
    with pytest.raises(InputError, match="te_k"):
        ph.friis_te_k([-1.0, 2.0], [10.0])


def _skrf_amplifier(freq, gain_db: float, nf_db: float):
    import skrf as rf

    s = np.zeros((len(freq), 2, 2), dtype=complex)
    s[:, 1, 0] = 10 ** (gain_db / 20)  # matched, unilateral
    net = rf.Network(frequency=freq, s=s, z0=50)
    net.set_noise_a(freq, nfmin_db=nf_db, gamma_opt=0, rn=10.0)  # Fmin at a matched source
    return net


def test_friis_agrees_with_scikit_rf_noisy_cascade():
    import skrf

    freq = skrf.Frequency(1, 3, 3, unit="GHz")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = _skrf_amplifier(freq, 20.0, 1.5)
        b = _skrf_amplifier(freq, 10.0, 8.0)
        c = _skrf_amplifier(freq, 15.0, 18.0)
        f_skrf_2 = (a**b).nf(50.0)  # scikit-rf returns the LINEAR noise factor
        f_skrf_3 = (a**b**c).nf(50.0)
    ours_2 = ph.friis_noise_factor([10**0.15, 10**0.8], [100.0])
    ours_3 = ph.friis_noise_factor([10**0.15, 10**0.8, 10**1.8], [100.0, 10.0])
    # scikit-rf noisy two-port cascade (Hillbrand & Russer 1976; docs/references.md §15):
    # 1.66025318 dB for the 2-stage case, computed with scikit-rf 2.2
    np.testing.assert_allclose(10 * np.log10(f_skrf_2), ph.factor_to_nf_db(ours_2), atol=1e-12)
    assert ph.factor_to_nf_db(ours_2) == pytest.approx(1.66025318, abs=5e-9)
    np.testing.assert_allclose(f_skrf_3, ours_3, rtol=1e-12)


# --------------------------------------------------------------------------- §3 passive loss


def test_passive_loss_noise():
    loss = 10**0.3  # 3 dB
    # textbook (Pozar, noise chapter, from memory; docs/references.md §3): F = 1 + (L-1) Tp/T0
    assert ph.passive_loss_factor(loss) == pytest.approx(loss, rel=1e-15)  # F = L at T0
    assert ph.passive_loss_factor(loss, 300.0) == pytest.approx(1 + (loss - 1) * 300 / 290)
    assert ph.passive_loss_te_k(loss, 77.0) == pytest.approx((loss - 1) * 77.0)
    with pytest.raises(InputError, match="loss_lin"):
        ph.passive_loss_factor(0.5)


def test_input_loss_deembedding_example():
    loss = 10**0.05  # 0.5 dB cable
    f_meas = 10**0.25  # measured 2.5 dB
    # docs/references.md §3: F_DUT = 1 + (F_meas - F_L)/L gives 2.0000 dB at 290 K, 1.9897 dB at
    # 300 K
    assert ph.factor_to_nf_db(ph.deembed_input_loss(f_meas, loss)) == pytest.approx(2.0, abs=5e-5)
    assert ph.factor_to_nf_db(ph.deembed_input_loss(f_meas, loss, 300.0)) == pytest.approx(
        1.9897, abs=5e-5
    )
    te = ph.deembed_input_loss_te_k(ph.factor_to_te_k(f_meas), loss, 300.0)
    assert te == pytest.approx(ph.factor_to_te_k(ph.deembed_input_loss(f_meas, loss, 300.0)))


def test_deembedding_inverts_the_cascade():
    f_dut, g_dut, loss, tp = 1.8, 200.0, 10**0.07, 305.0
    f_loss = ph.passive_loss_factor(loss, tp)
    # Friis: [loss, DUT] and [DUT, loss]
    f_in = ph.friis_noise_factor([f_loss, f_dut], [1 / loss])
    f_out = ph.friis_noise_factor([f_dut, f_loss], [g_dut])
    assert ph.deembed_input_loss(f_in, loss, tp) == pytest.approx(f_dut, rel=1e-14)
    assert ph.deembed_output_loss(f_out, g_dut, loss, tp) == pytest.approx(f_dut, rel=1e-14)
    te_out = ph.friis_te_k([ph.factor_to_te_k(f_dut), ph.passive_loss_te_k(loss, tp)], [g_dut])
    assert ph.deembed_output_loss_te_k(te_out, g_dut, loss, tp) == pytest.approx(
        ph.factor_to_te_k(f_dut), rel=1e-13
    )
    assert ph.deembed_gain(g_dut / loss / 10**0.1, loss, 10**0.1) == pytest.approx(g_dut)


# --------------------------------------------------------------------------- §10 SSB / DSB


def test_ssb_dsb_equal_sidebands():
    # docs/references.md §10: F_SSB = F_DSB (1 + Gi/Gs); equal sidebands +10 log10 2 = +3.0103 dB
    f_dsb = ph.nf_db_to_factor(6.0)
    nf_ssb = ph.factor_to_nf_db(ph.ssb_from_dsb_factor(f_dsb))
    assert nf_ssb - 6.0 == pytest.approx(10 * math.log10(2), rel=1e-12)
    assert nf_ssb == pytest.approx(9.0103, abs=5e-5)
    assert ph.ssb_from_dsb_te_k(864.511) == pytest.approx(1729.022, abs=1e-9)
    assert ph.dsb_from_ssb_factor(ph.ssb_from_dsb_factor(f_dsb)) == pytest.approx(f_dsb)
    # perfect image rejection: no change; unequal sidebands scale by (1 + Gi/Gs)
    assert ph.ssb_from_dsb_factor(f_dsb, 0.0) == pytest.approx(f_dsb)
    assert ph.ssb_from_dsb_factor(f_dsb, 0.5) == pytest.approx(1.5 * f_dsb)
    with pytest.raises(InputError, match="image_to_signal_gain_ratio"):
        ph.ssb_from_dsb_factor(f_dsb, -0.1)


# --------------------------------------------------------------------------- §1 Planck factor


def test_planck_correction_values():
    def expected_db(f, t):  # docs/references.md §1: x/(e^x - 1), x = h f / (k T); scipy.constants
        x = scipy.constants.h * f / (scipy.constants.k * t)
        return 10 * np.log10(x / np.expm1(x))

    freqs = np.array([10e9, 50e9, 110e9])
    got = 10 * np.log10(ph.planck_correction(freqs, 290.0))
    np.testing.assert_allclose(got, expected_db(freqs, 290.0), rtol=1e-12)
    np.testing.assert_allclose(got, [-0.0036, -0.0180, -0.0396], atol=5e-5)  # docs/references.md §1
    cold = 10 * np.log10(ph.planck_correction(np.array([10e9, 110e9]), 77.0))
    np.testing.assert_allclose(cold, [-0.0135, -0.150], atol=5e-4)  # docs/references.md §1
    assert ph.planck_correction(0.0, 290.0) == 1.0


# --------------------------------------------------------------------------- round trips

finite_db = st.floats(min_value=-200, max_value=200, allow_nan=False)
nf_db = st.floats(min_value=0.0, max_value=40.0, allow_nan=False)
temps = st.floats(min_value=1.0, max_value=1e5, allow_nan=False)


@given(finite_db)
def test_round_trip_db_linear(db):
    assert ph.linear_to_db(ph.db_to_linear(db)) == pytest.approx(db, abs=1e-11)


@given(st.floats(min_value=-250, max_value=60, allow_nan=False))
def test_round_trip_dbm(dbm):
    assert ph.w_to_dbm(ph.dbm_to_w(dbm)) == pytest.approx(dbm, abs=1e-11)
    assert ph.w_per_hz_to_dbm_per_hz(ph.dbm_per_hz_to_w_per_hz(dbm)) == pytest.approx(
        dbm, abs=1e-11
    )
    assert ph.dbm_to_w(dbm) == pytest.approx(ph.dbm_per_hz_to_w_per_hz(dbm), rel=1e-15)


@given(nf_db, st.floats(min_value=200.0, max_value=400.0))
def test_round_trip_noise_figure_forms(nf, t0):
    f = ph.nf_db_to_factor(nf)
    te = ph.nf_db_to_te_k(nf, t0)
    assert ph.factor_to_nf_db(f) == pytest.approx(nf, abs=1e-11)
    assert ph.te_k_to_nf_db(te, t0) == pytest.approx(nf, abs=1e-10)
    assert ph.te_k_to_factor(ph.factor_to_te_k(f, t0), t0) == pytest.approx(f, rel=1e-12)
    assert te == pytest.approx(ph.factor_to_te_k(f, t0), rel=1e-12, abs=1e-9)


@given(st.floats(min_value=1.0, max_value=1e4), st.floats(min_value=0.0, max_value=10.0))
def test_round_trip_ssb_dsb(f, ratio):
    assert ph.dsb_from_ssb_factor(ph.ssb_from_dsb_factor(f, ratio), ratio) == pytest.approx(f)
    assert ph.dsb_from_ssb_te_k(ph.ssb_from_dsb_te_k(f, ratio), ratio) == pytest.approx(f)


@given(st.lists(st.tuples(nf_db, st.floats(min_value=-10, max_value=40)), min_size=1, max_size=6))
def test_friis_factor_and_temperature_forms_agree(stages):
    factors = [10 ** (nf / 10) for nf, _ in stages]
    gains = [10 ** (g / 10) for _, g in stages]
    f = ph.friis_noise_factor(factors, gains)
    te = ph.friis_te_k([290 * (x - 1) for x in factors], gains)
    assert te == pytest.approx(290 * (f - 1), rel=1e-9, abs=1e-9)


@given(
    st.floats(min_value=1.0, max_value=10.0),
    st.floats(min_value=0.0, max_value=6.0),
    temps,
    st.floats(min_value=-10, max_value=50),
)
def test_loss_deembedding_round_trip(f_dut, loss_db, tp, g_db):
    loss, g = 10 ** (loss_db / 10), 10 ** (g_db / 10)
    f_in = ph.friis_noise_factor([ph.passive_loss_factor(loss, tp), f_dut], [1 / loss])
    assert ph.deembed_input_loss(f_in, loss, tp) == pytest.approx(f_dut, rel=1e-9)
    f_out = ph.friis_noise_factor([f_dut, ph.passive_loss_factor(loss, tp)], [g])
    assert ph.deembed_output_loss(f_out, g, loss, tp) == pytest.approx(f_dut, rel=1e-9)
