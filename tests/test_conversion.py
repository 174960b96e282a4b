"""Frequency-converting DUTs: frequency plan, SSB/DSB definitions and both methods.

Reference cases: the IF densities are built here from the definition of a two-response
converter (available IF noise = k [G_s T_s + G_i T_i] + N_a, IRE Standards on Methods of
Measuring Noise in Linear Twoports, Proc. IRE 48 (1960); IEEE Std 161 definitions of noise
factor for multiple-response transducers; see docs/references.md) and the expected SSB and DSB
noise figures come straight from that definition:

    F_SSB = [T0 (G_s + G_i) + N_a/k] / (T0 G_s),
    F_DSB = [T0 (G_s + G_i) + N_a/k] / (T0 (G_s + G_i)).

Nothing below uses the code under test to build its inputs or its expected values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants

from noisebench.errors import InputError, MeasurementError
from noisebench.science import conversion as cv
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point, y_factor_point, y_factor_sweep
from noisebench.science.methods.converter import (
    converter_gain_method_point,
    converter_gain_method_sweep,
    converter_y_factor_point,
    converter_y_factor_sweep,
)

K = scipy.constants.k  # exact SI value (scipy.constants)
T0 = 290.0


def db(x: float) -> float:
    return 10.0 * math.log10(x)


def lin(x_db: float) -> float:
    return 10.0 ** (x_db / 10.0)


# --------------------------------------------------------------------------- reference case

# A downconverter: RF 5.8 GHz, LO 5.1 GHz (RF above LO), IF 700 MHz, image 4.4 GHz.
RF, LO, IF = 5.8e9, 5.1e9, 0.7e9
IMAGE = 2 * LO - RF
GS = lin(9.5)  # signal-band conversion gain
IRR_DB = 7.0  # image rejection: image response 7 dB below the signal response
GI = GS * lin(-IRR_DB)
TE_SSB = 620.0  # added noise referred to the signal band, K (N_a = k G_s Te_SSB)
T2 = 2600.0  # analyzer (second stage) at the IF, K
G2 = 3.7e3  # analyzer's arbitrary scale (readings need not be absolute for Y-factor)
ENR_RF, ENR_IMAGE, ENR_IF = 14.8, 15.3, 15.9  # dB, all different
TC = 303.5  # cold source temperature, K (not T0)
TC_CAL = 299.0  # cold temperature during the IF calibration, K


def f_ssb_definition(gs, gi, na_over_k):
    """IRE/IEEE single-sideband definition: only the signal-band termination in the denominator."""
    return (T0 * (gs + gi) + na_over_k) / (T0 * gs)


def f_dsb_definition(gs, gi, na_over_k):
    """IRE/IEEE double-sideband definition: both bands' terminations in the denominator."""
    return (T0 * (gs + gi) + na_over_k) / (T0 * (gs + gi))


def if_reading(t_signal, t_image, gs=GS, gi=GI, te=TE_SSB, t2=T2, scale=G2):
    """IF density at the analyzer: scale * k * (G_s T_s + G_i T_i + G_s Te + T2)."""
    return scale * K * (gs * t_signal + gi * t_image + gs * te + t2)


def density(n: float, freq_hz: float = IF, rel_u: float = 0.002) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=n, u_density_w_per_hz=rel_u * n)


def hot_k(enr_db: float, tc: float) -> float:
    """Hot temperature of a T0-referenced ENR: the excess T0*ENR over the physical Tc."""
    return T0 * lin(enr_db) + tc


def _y_inputs(gs=GS, gi=GI, te=TE_SSB, enr_image=ENR_IMAGE):
    hot = if_reading(hot_k(ENR_RF, TC), hot_k(enr_image, TC), gs, gi, te)
    cold = if_reading(TC, TC, gs, gi, te)
    hot_cal = G2 * K * (hot_k(ENR_IF, TC_CAL) + T2)
    cold_cal = G2 * K * (TC_CAL + T2)
    return hot, cold, hot_cal, cold_cal


def _cal(hot_cal, cold_cal):
    return calibrate_point(
        density(hot_cal), density(cold_cal), ENR_IF, cold_temperature_k=TC_CAL, u_enr_db=0.1
    )


# --------------------------------------------------------------------------- frequency plan


def test_fixed_lo_plan_upper_and_lower_sideband():
    plan = cv.plan_fixed_lo([5.6e9, 5.8e9, 6.0e9], 5.1e9)
    np.testing.assert_allclose(plan.if_hz, [0.5e9, 0.7e9, 0.9e9])
    np.testing.assert_allclose(plan.image_hz, [4.6e9, 4.4e9, 4.2e9])
    assert plan.sideband == (cv.Sideband.UPPER,) * 3
    low = cv.plan_fixed_lo([4.0e9, 4.5e9], 5.1e9)
    np.testing.assert_allclose(low.if_hz, [1.1e9, 0.6e9])
    np.testing.assert_allclose(low.image_hz, [6.2e9, 5.7e9])
    assert low.sideband == (cv.Sideband.LOWER,) * 2


def test_fixed_lo_plan_refuses_rf_on_both_sides_of_the_lo():
    with pytest.raises(InputError, match="both sides of the LO"):
        cv.plan_fixed_lo([4.9e9, 5.3e9], 5.1e9)
    with pytest.raises(InputError, match="IF = 0"):
        cv.plan_fixed_lo([5.1e9], 5.1e9)


def test_fixed_if_plan_moves_the_lo_with_the_rf():
    up = cv.plan_fixed_if([2.0e9, 2.5e9], 0.3e9, "upper")
    np.testing.assert_allclose(up.lo_hz, [1.7e9, 2.2e9])
    np.testing.assert_allclose(up.image_hz, [1.4e9, 1.9e9])  # RF - 2 IF
    np.testing.assert_allclose(up.if_hz, [0.3e9, 0.3e9])
    down = cv.plan_fixed_if([2.0e9], 0.3e9, "lower")
    np.testing.assert_allclose(down.lo_hz, [2.3e9])
    np.testing.assert_allclose(down.image_hz, [2.6e9])  # RF + 2 IF
    with pytest.raises(InputError, match="not above the IF"):
        cv.plan_fixed_if([0.2e9], 0.3e9, "upper")
    with pytest.raises(InputError, match="LO is below the IF"):
        cv.plan_fixed_if([0.5e9], 0.3e9, "upper")  # LO 0.2 GHz: image at -0.1 GHz
    with pytest.raises(InputError, match="sideband"):
        cv.plan_fixed_if([2e9], 0.3e9, "usb")


def test_triples_are_checked_for_if_equal_to_rf_minus_lo():
    plan = cv.plan_triples([5.8e9, 4.0e9], [5.1e9, 5.1e9], [0.7e9, 1.1e9])
    assert plan.sideband == (cv.Sideband.UPPER, cv.Sideband.LOWER)
    np.testing.assert_allclose(plan.image_hz, [4.4e9, 6.2e9])
    with pytest.raises(InputError, match=r"triples\[1\].*not \|RF - LO\|"):
        cv.plan_triples([5.8e9, 4.0e9], [5.1e9, 5.1e9], [0.7e9, 1.0e9])
    with pytest.raises(InputError, match="one \\(RF, LO, IF\\) per point"):
        cv.plan_triples([5.8e9], [5.1e9, 5.2e9], [0.7e9])


def test_lo_leakage_harmonics():
    np.testing.assert_allclose(cv.lo_leakage_frequencies_hz(1e9, 3), [1e9, 2e9, 3e9])
    assert cv.lo_leakage_frequencies_hz([1e9, 2e9], 2).shape == (2, 2)


# --------------------------------------------------------------------------- definitions


def test_equal_responses_give_the_3_db_special_case():
    # reference: F_SSB = 2 F_DSB for equal responses (IEEE Std 161 definitions; the "3 dB"
    # relation of textbooks, e.g. Pozar, Microwave Engineering, mixer noise - from memory)
    assert cv.image_correction_db(1.0) == pytest.approx(10 * math.log10(2), abs=1e-12)
    te = 450.0
    assert db(cv.ssb_factor(te, 1.0)) - db(cv.dsb_factor(te, 1.0)) == pytest.approx(
        10 * math.log10(2), abs=1e-12
    )
    # and it is a special case: with 7 dB of image rejection the gap is 10 log10(1 + 10^-0.7)
    assert db(cv.ssb_factor(te, lin(-7))) - db(cv.dsb_factor(te, lin(-7))) == pytest.approx(
        0.7901, abs=1e-4
    )


def test_zero_image_response_makes_ssb_equal_dsb():
    # reference: with G_i = 0 the two IRE/IEEE definitions have the same denominator
    for te in (10.0, 290.0, 3000.0):
        assert cv.ssb_factor(te, 0.0) == cv.dsb_factor(te, 0.0) == pytest.approx(1 + te / T0)
    assert cv.image_correction_db(0.0) == 0.0
    assert cv.image_ratio_from_rejection_db(math.inf) == 0.0


def test_ssb_and_dsb_factors_follow_the_definitions():
    for gs, gi, te in ((10.0, 10.0, 500.0), (31.6, 2.0, 80.0), (2.0, 0.0, 1500.0)):
        na = gs * te  # N_a / k
        assert cv.ssb_factor(te, gi / gs) == pytest.approx(f_ssb_definition(gs, gi, na), 1e-13)
        assert cv.dsb_factor(te, gi / gs) == pytest.approx(f_dsb_definition(gs, gi, na), 1e-13)
        assert cv.te_dsb_from_ssb_k(te, gi / gs) * (gs + gi) == pytest.approx(na, 1e-13)


def test_forward_density_matches_the_definition():
    n = cv.converter_output_density_w_per_hz(GS, GI, 400.0, 350.0, TE_SSB)
    assert n == pytest.approx(K * (GS * 400.0 + GI * 350.0 + GS * TE_SSB), rel=1e-14)


def test_band_temperature_through_a_loss():
    # reference: available noise temperature behind a matched attenuator at Tp,
    # T_out = T_in / L + Tp (1 - 1/L) (Friis 1944; common textbook form)
    assert cv.band_temperature_k(10_000.0, 2.0, 300.0) == pytest.approx(5150.0)
    assert cv.band_temperature_k(300.0, 5.0, 300.0) == pytest.approx(300.0)


# --------------------------------------------------------------------------- Y-factor


def test_y_factor_reference_case_ssb_and_dsb_to_1e_6_db():
    # reference: IRE 1960 / IEEE Std 161 multiple-response definitions (module docstring)
    hot, cold, hot_cal, cold_cal = _y_inputs()
    expected_ssb = db(f_ssb_definition(GS, GI, GS * TE_SSB))
    expected_dsb = db(f_dsb_definition(GS, GI, GS * TE_SSB))
    for nf_type, expected in (("ssb", expected_ssb), ("dsb", expected_dsb)):
        p = converter_y_factor_point(
            density(hot),
            density(cold),
            rf_hz=RF,
            lo_hz=LO,
            enr_rf_db=ENR_RF,
            enr_image_db=ENR_IMAGE,
            cold_temperature_k=TC,
            image_rejection_db=IRR_DB,
            nf_type=nf_type,
            calibration=_cal(hot_cal, cold_cal),
        )
        assert p.nf_db == pytest.approx(expected, abs=1e-6)
        assert p.conversion.nf_ssb_db == pytest.approx(expected_ssb, abs=1e-6)
        assert p.conversion.nf_dsb_db == pytest.approx(expected_dsb, abs=1e-6)
        assert p.gain_db == pytest.approx(db(GS), abs=1e-6)
        assert p.conversion.te_ssb_k == pytest.approx(TE_SSB, rel=1e-9)
        assert p.freq_hz == RF
        assert (p.conversion.if_hz, p.conversion.image_hz, p.conversion.sideband) == (
            IF,
            IMAGE,
            "upper",
        )
        assert p.conversion.image_correction_db == pytest.approx(expected_ssb - expected_dsb)
    sweep = converter_y_factor_sweep(
        [hot],
        [cold],
        ENR_RF,
        ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        hot_cal_w_per_hz=[hot_cal],
        cold_cal_w_per_hz=[cold_cal],
        cal_if_enr_db=ENR_IF,
        cal_cold_temperature_k=TC_CAL,
    )
    assert sweep.nf_ssb_db[0] == pytest.approx(expected_ssb, abs=1e-6)
    assert sweep.nf_dsb_db[0] == pytest.approx(expected_dsb, abs=1e-6)
    assert sweep.gain_db[0] == pytest.approx(db(GS), abs=1e-6)


def test_y_factor_reference_case_with_losses_at_rf_image_and_if():
    # reference: definition (module docstring) + attenuator noise T/L + Tp(1 - 1/L) at each band
    l_rf, l_img, l_out = lin(0.7), lin(1.3), lin(0.4)
    tp_in, tp_out = 296.0, 301.0

    def through(t, loss, tp):
        return t / loss + tp * (1 - 1 / loss)

    def reading(t_src_s, t_src_i):
        dut_out = K * (GS * through(t_src_s, l_rf, tp_in) + GI * through(t_src_i, l_img, tp_in))
        dut_out += K * GS * TE_SSB
        at_analyzer = dut_out / l_out + K * tp_out * (1 - 1 / l_out)
        return G2 * (at_analyzer + K * T2)

    hot = reading(hot_k(ENR_RF, TC), hot_k(ENR_IMAGE, TC))
    cold = reading(TC, TC)
    hot_cal = G2 * K * (hot_k(ENR_IF, TC_CAL) + T2)
    cold_cal = G2 * K * (TC_CAL + T2)
    p = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        calibration=_cal(hot_cal, cold_cal),
        input_loss_db=0.7,
        input_loss_image_db=1.3,
        input_loss_temperature_k=tp_in,
        output_loss_db=0.4,
        output_loss_temperature_k=tp_out,
    )
    assert p.conversion.nf_ssb_db == pytest.approx(
        db(f_ssb_definition(GS, GI, GS * TE_SSB)), abs=1e-6
    )
    assert p.conversion.nf_dsb_db == pytest.approx(
        db(f_dsb_definition(GS, GI, GS * TE_SSB)), abs=1e-6
    )
    assert p.gain_db == pytest.approx(db(GS), abs=1e-6)


def test_y_factor_without_calibration_keeps_the_second_stage():
    hot, cold, _, _ = _y_inputs()
    p = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
    )
    # the analyzer's T2 is then counted as the converter's, referred through G_s
    assert p.conversion.te_ssb_k == pytest.approx(TE_SSB + T2 / GS, rel=1e-9)
    assert p.gain_db is None


def test_broadband_source_with_equal_enr_gives_the_amplifier_y_factor_as_dsb():
    # A broadband source with the same ENR in both bands: the amplifier Y-factor formula
    # (noisebench.science.methods.y_factor_sweep) reads the DSB noise figure and the DSB gain.
    hot, cold, hot_cal, cold_cal = _y_inputs(enr_image=ENR_RF)
    amp = y_factor_sweep(
        [hot],
        [cold],
        ENR_RF,
        cold_temperature_k=TC,
        hot_cal_w_per_hz=[hot_cal],
        cold_cal_w_per_hz=[cold_cal],
        cal_enr_db=ENR_IF,
        cal_cold_temperature_k=TC_CAL,
    )
    conv = converter_y_factor_sweep(
        [hot],
        [cold],
        ENR_RF,
        ENR_RF,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        hot_cal_w_per_hz=[hot_cal],
        cold_cal_w_per_hz=[cold_cal],
        cal_if_enr_db=ENR_IF,
        cal_cold_temperature_k=TC_CAL,
    )
    assert conv.nf_dsb_db[0] == pytest.approx(amp.nf_db[0], abs=1e-9)
    assert amp.gain_db[0] == pytest.approx(db(GS + GI), abs=1e-9)  # DSB gain
    assert conv.nf_dsb_db[0] == pytest.approx(db(f_dsb_definition(GS, GI, GS * TE_SSB)), abs=1e-6)


def test_zero_image_response_equals_the_amplifier_method_with_if_calibration():
    hot, cold, hot_cal, cold_cal = _y_inputs(gi=0.0)
    cal = _cal(hot_cal, cold_cal)
    amp = y_factor_point(
        density(hot),
        density(cold),
        ENR_RF,
        cold_temperature_k=TC,
        calibration=cal.model_copy(update={"freq_hz": IF}),
        u_enr_db=0.1,
    )
    conv = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=None,
        cold_temperature_k=TC,
        image_rejection_db=None,
        calibration=cal,
        u_enr_rf_db=0.1,
    )
    assert conv.conversion.nf_ssb_db == conv.conversion.nf_dsb_db
    assert conv.nf_db == pytest.approx(amp.nf_db, abs=1e-9)
    assert conv.nf_db == pytest.approx(db(1 + TE_SSB / T0), abs=1e-6)
    # the statistical uncertainty and the ENR terms agree with the amplifier method's
    assert conv.u_nf_db == pytest.approx(amp.u_nf_db, rel=1e-5)
    assert conv.notes["u_nf_db_with_enr"] == pytest.approx(amp.notes["u_nf_db_with_enr"], rel=1e-5)
    assert conv.conversion.enr_image_db is None


def test_equal_responses_measure_3_db_apart():
    hot, cold, hot_cal, cold_cal = _y_inputs(gi=GS)
    p = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=0.0,
        calibration=_cal(hot_cal, cold_cal),
    )
    assert p.conversion.nf_ssb_db - p.conversion.nf_dsb_db == pytest.approx(3.0103, abs=1e-4)
    assert p.conversion.nf_dsb_db == pytest.approx(db(1 + TE_SSB / 2 / T0), abs=1e-6)


def test_image_enr_is_required_when_the_converter_responds_at_the_image():
    hot, cold, _, _ = _y_inputs()
    with pytest.raises(InputError, match="enr_image_db"):
        converter_y_factor_point(
            density(hot),
            density(cold),
            rf_hz=RF,
            lo_hz=LO,
            enr_rf_db=ENR_RF,
            enr_image_db=None,
            cold_temperature_k=TC,
            image_rejection_db=IRR_DB,
        )


def test_densities_must_be_read_at_the_if():
    hot, cold, _, _ = _y_inputs()
    with pytest.raises(InputError, match=r"rf_hz.*\|RF - LO\|"):
        converter_y_factor_point(
            density(hot, freq_hz=RF),
            density(cold, freq_hz=RF),
            rf_hz=RF,
            lo_hz=LO,
            enr_rf_db=ENR_RF,
            enr_image_db=ENR_IMAGE,
            cold_temperature_k=TC,
            image_rejection_db=IRR_DB,
        )


def test_hot_not_above_cold_is_refused_at_the_rf():
    with pytest.raises(MeasurementError, match="5.8e\\+09|hot reading"):
        converter_y_factor_point(
            density(1e-15),
            density(1e-15),
            rf_hz=RF,
            lo_hz=LO,
            enr_rf_db=ENR_RF,
            enr_image_db=ENR_IMAGE,
            cold_temperature_k=TC,
            image_rejection_db=IRR_DB,
        )


def test_image_rejection_uncertainty_is_reported_as_a_contribution():
    hot, cold, hot_cal, cold_cal = _y_inputs()
    kw = dict(
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        calibration=_cal(hot_cal, cold_cal),
        u_image_rejection_db=0.5,
    )
    p = converter_y_factor_point(density(hot), density(cold), **kw)
    c = p.notes["u_nf_db_contributions"]["image_rejection"]
    # dNF_SSB/dIRR by finite differences of the whole method, times u(IRR)
    step = 1e-4
    up = converter_y_factor_point(
        density(hot), density(cold), **(kw | {"image_rejection_db": IRR_DB + step})
    )
    dn = converter_y_factor_point(
        density(hot), density(cold), **(kw | {"image_rejection_db": IRR_DB - step})
    )
    assert c == pytest.approx((up.nf_db - dn.nf_db) / (2 * step) * 0.5, rel=1e-4)
    assert abs(c) > 0.01  # a real term: the SSB result leans on the stated image response


def test_conversion_gain_states_its_enr_terms_at_rf_image_and_if():
    # Symptom: on the demo bench the conversion gain scattered wider than u_gain_db said
    # (2u coverage 90.7 % over 24 seeds) because ENR(RF) and ENR(IF), two table points, were
    # left out. Derived from eq. (5) (T0-referenced ENR, lossless): G_s is proportional to
    # ENR_IF / (ENR_s + r ENR_i), so dG_dB/dENR_IF_dB = +1, dG_dB/dENR_RF_dB = -ENR_s/(ENR_s +
    # r ENR_i), dG_dB/dENR_image_dB = -r ENR_i/(ENR_s + r ENR_i) and dG_dB/dIRR_dB = +r ENR_i/(...)
    hot, cold, hot_cal, cold_cal = _y_inputs()
    u_rf, u_img, u_rej = 0.11, 0.13, 0.4
    p = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        calibration=_cal(hot_cal, cold_cal),  # u(ENR_IF) = 0.1 dB
        u_enr_rf_db=u_rf,
        u_enr_image_db=u_img,
        u_image_rejection_db=u_rej,
    )
    r = lin(-IRR_DB)
    share_rf = lin(ENR_RF) / (lin(ENR_RF) + r * lin(ENR_IMAGE))
    c = p.notes["u_gain_db_contributions"]
    assert c["enr_cal"] == pytest.approx(+1.0 * 0.1, rel=1e-6)
    assert c["enr"] == pytest.approx(-share_rf * u_rf, rel=1e-6)
    assert c["enr_image"] == pytest.approx(-(1 - share_rf) * u_img, rel=1e-6)
    assert c["image_rejection"] == pytest.approx((1 - share_rf) * u_rej, rel=1e-6)
    stat = math.hypot(c["hot"], c["cold"], c["hot_cal"], c["cold_cal"])
    assert p.u_gain_db == pytest.approx(stat, rel=1e-9)  # u_gain_db stays statistical
    total = math.sqrt(sum(v**2 for v in c.values()))
    assert p.notes["u_gain_db_with_enr"] == pytest.approx(total, rel=1e-12)
    assert p.notes["u_gain_db_with_enr"] > p.u_gain_db + 0.05


# --------------------------------------------------------------------------- gain method


def test_gain_method_reference_case_ssb_and_dsb_to_1e_6_db():
    # reference: IRE 1960 / IEEE Std 161 definitions; absolute IF readings with the RF port
    # terminated at Ts != T0 and the analyzer floor read with a load at T_term
    ts, t_term = 302.0, 297.0
    n_sa = K * 1900.0  # analyzer's own noise, W/Hz
    n_dut = K * (GS * ts + GI * ts + GS * TE_SSB) + n_sa
    n_floor = K * t_term + n_sa
    for nf_type in ("ssb", "dsb"):
        p = converter_gain_method_point(
            density(n_dut),
            db(GS),
            rf_hz=RF,
            lo_hz=LO,
            image_rejection_db=IRR_DB,
            nf_type=nf_type,
            floor=density(n_floor),
            source_temperature_k=ts,
            floor_temperature_k=t_term,
        )
        ref = (f_ssb_definition if nf_type == "ssb" else f_dsb_definition)(GS, GI, GS * TE_SSB)
        assert p.nf_db == pytest.approx(db(ref), abs=1e-6)
        assert p.conversion.nf_ssb_db == pytest.approx(
            db(f_ssb_definition(GS, GI, GS * TE_SSB)), abs=1e-6
        )
        assert p.conversion.nf_dsb_db == pytest.approx(
            db(f_dsb_definition(GS, GI, GS * TE_SSB)), abs=1e-6
        )
    sweep = converter_gain_method_sweep(
        [n_dut],
        db(GS),
        image_rejection_db=IRR_DB,
        n_floor_w_per_hz=[n_floor],
        source_temperature_k=ts,
        floor_temperature_k=t_term,
    )
    assert sweep.nf_ssb_db[0] == pytest.approx(db(f_ssb_definition(GS, GI, GS * TE_SSB)), abs=1e-6)


def test_gain_method_reference_case_with_losses():
    ts = 300.0
    l_rf, l_img, l_out = lin(0.5), lin(0.9), lin(0.6)
    n_sa = K * 2100.0

    def through(t, loss):
        return t / loss + ts * (1 - 1 / loss)

    out = K * (GS * through(ts, l_rf) + GI * through(ts, l_img) + GS * TE_SSB)
    n_dut = out / l_out + K * ts * (1 - 1 / l_out) + n_sa
    n_floor = K * ts + n_sa
    p = converter_gain_method_point(
        density(n_dut),
        db(GS),
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=IRR_DB,
        floor=density(n_floor),
        source_temperature_k=ts,
        input_loss_db=0.5,
        input_loss_image_db=0.9,
        output_loss_db=0.6,
    )
    assert p.nf_db == pytest.approx(db(f_ssb_definition(GS, GI, GS * TE_SSB)), abs=1e-6)
    # the same gain stated through both cables gives the same NF
    q = converter_gain_method_point(
        density(n_dut),
        db(GS) - 0.5 - 0.6,
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=IRR_DB,
        floor=density(n_floor),
        source_temperature_k=ts,
        input_loss_db=0.5,
        input_loss_image_db=0.9,
        output_loss_db=0.6,
        gain_includes_input_loss=True,
        gain_includes_output_loss=True,
    )
    assert q.nf_db == pytest.approx(p.nf_db, abs=1e-9)


def test_both_methods_agree_on_one_converter():
    # one DUT, read both ways (Y-factor with an IF calibration, gain method with absolute levels)
    hot, cold, hot_cal, cold_cal = _y_inputs()
    y = converter_y_factor_point(
        density(hot),
        density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        calibration=_cal(hot_cal, cold_cal),
    )
    n_dut = K * (GS * TC + GI * TC + GS * TE_SSB) + K * T2
    g = converter_gain_method_point(
        density(n_dut),
        db(GS),
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=IRR_DB,
        floor=density(K * (TC + T2)),
        source_temperature_k=TC,
    )
    assert g.nf_db == pytest.approx(y.nf_db, abs=1e-9)
    assert g.conversion.nf_dsb_db == pytest.approx(y.conversion.nf_dsb_db, abs=1e-9)


def test_gain_method_statistical_uncertainty_matches_first_order_propagation():
    # reference: JCGM 100:2008 eq. (10) with the analytic sensitivity of eq. 6
    ts = T0
    n_dut = K * (GS * ts + GI * ts + GS * TE_SSB)
    p = converter_gain_method_point(
        density(n_dut, rel_u=0.01),
        db(GS),
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=IRR_DB,
        source_temperature_k=ts,
    )
    # NF_SSB = 10 log10(N/(k G_s T0)): dNF/dN * u = 4.3429 * u/N
    assert p.u_nf_db == pytest.approx(10 / math.log(10) * 0.01, rel=1e-6)


def test_lower_sideband_point_reports_its_plan():
    hot, cold, hot_cal, cold_cal = _y_inputs()
    p = converter_y_factor_point(
        density(hot, freq_hz=0.7e9),
        density(cold, freq_hz=0.7e9),
        rf_hz=4.4e9,
        lo_hz=5.1e9,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        calibration=_cal(hot_cal, cold_cal),
    )
    assert p.conversion.sideband == "lower"
    assert p.conversion.image_hz == pytest.approx(5.8e9)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"nf_type": "both"}, "nf_type"),
        ({"image_rejection_db": float("nan")}, "image_rejection_db"),
        ({"input_loss_image_db": -1.0}, "input_loss_image_db"),
        ({"cold_temperature_k": 0.0}, "cold_temperature_k"),
    ],
)
def test_bad_inputs_name_the_field(kwargs, field):
    hot, cold, _, _ = _y_inputs()
    base = dict(
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
    )
    with pytest.raises(InputError) as info:
        converter_y_factor_point(density(hot), density(cold), **(base | kwargs))
    assert field in str(info.value)


# --------------------------------------------------------------------------- one formula set


def _inline_formulas(path) -> list[str]:
    """``10 ** x``, ``log10(...)`` and ``k * ...`` written out in a module, as 'line: text'."""
    import ast
    from pathlib import Path

    source = Path(path).read_text(encoding="utf-8")
    found = []
    for node in ast.walk(ast.parse(source)):
        bad = (
            isinstance(node, ast.BinOp)
            and isinstance(node.op, ast.Pow)
            and isinstance(node.left, ast.Constant)
            and node.left.value == 10
        ) or (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Attribute | ast.Name)
            and getattr(node.func, "attr", getattr(node.func, "id", "")) == "log10"
        )
        bad = bad or (
            isinstance(node, ast.BinOp)
            and isinstance(node.op, ast.Mult)
            and "BOLTZMANN_J_PER_K" in (ast.unparse(node.left), ast.unparse(node.right))
        )
        if bad:
            found.append(f"{node.lineno}: {ast.unparse(node)}")
    return found


@pytest.mark.parametrize("module", ["science/conversion.py", "science/methods/converter.py"])
def test_converter_physics_comes_from_the_shared_kernels(module):
    # DEVELOPERS.md: one set of pure physics kernels (science/physics.py) serves every method;
    # a private copy of 10**(x/10), 10 log10 or k*T in the converter code could drift from it
    from pathlib import Path

    import noisebench

    path = Path(noisebench.__file__).parent / module
    assert _inline_formulas(path) == []
