"""Y-factor method: Y, Te, cold temperature, second-stage correction, losses, uncertainty, flags.

Worked examples from docs/references.md §5, §7 and §9, recomputed from their formulas.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants

from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector
from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import (
    CalibrationPoint,
    SystemCalibration,
    calibrate_point,
    hot_temperature_k,
    noise_factor_from_y,
    te_from_y_k,
    y_factor,
    y_factor_nf_db,
    y_factor_point,
    y_factor_sweep,
)
from noisebench.science.physics import friis_te_k, passive_loss_te_k
from noisebench.science.point import Method, PointFlag

K = scipy.constants.k
T0 = 290.0
C_DB = 10 / math.log(10)

# docs/references.md §5 worked example: ENR 15 dB, Tc = T0, DUT 20 dB / 2 dB, analyzer NF 12 dB
ENR = 10**1.5
TH = T0 * ENR + T0
G1 = 100.0
TE1 = T0 * (10**0.2 - 1)
TE2 = T0 * (10**1.2 - 1)
NH_CAL, NC_CAL = K * (TH + TE2), K * (T0 + TE2)
NH, NC = K * ((TH + TE1) * G1 + TE2), K * ((T0 + TE1) * G1 + TE2)


def density(n: float, rel_u: float = 0.01, freq_hz: float = 1e9, **kw) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=n, u_density_w_per_hz=rel_u * n, **kw)


def calibration(rel_u: float = 0.01, **kw) -> CalibrationPoint:
    return calibrate_point(
        density(NH_CAL, rel_u), density(NC_CAL, rel_u), 15.0, cold_temperature_k=T0, **kw
    )


def dbm_in_1mhz(w_per_hz: float) -> float:
    return 10 * math.log10(w_per_hz * 1e6 / 1e-3)


# --------------------------------------------------------------------------- pure functions


def test_pure_y_factor_functions():
    assert TH == pytest.approx(9460.605, abs=5e-4)  # docs/references.md §5
    assert y_factor(4.0, 2.0) == 2.0
    assert te_from_y_k(2.0, 1000.0, 300.0) == pytest.approx((1000 - 2 * 300) / 1.0)
    # ENR referred to T0 (docs/references.md §5): Th = T0 ENR + Tc, or Th = T0 (ENR + 1)
    assert hot_temperature_k(ENR, 300.0) == pytest.approx(T0 * ENR + 300.0)
    assert hot_temperature_k(ENR, 300.0, enr_reference="absolute") == pytest.approx(T0 * (ENR + 1))
    np.testing.assert_allclose(
        hot_temperature_k(ENR, np.array([280.0, 300.0]), enr_reference="absolute"), T0 * (ENR + 1)
    )
    with pytest.raises(MeasurementError, match="Y <= 1"):
        te_from_y_k(np.array([2.0, 1.0]), 1000.0, 300.0)
    with pytest.raises(InputError, match="enr_reference"):
        hot_temperature_k(ENR, 300.0, enr_reference="hot")
    with pytest.raises(InputError, match="hot"):
        y_factor(-1.0, 2.0)


def test_general_noise_factor_formula():
    y, tc = 12.0, 310.0
    # docs/references.md §5 general form, ENR defined at the actual Th: F = [ENR - Y(Tc/T0-1)]/(Y-1)
    assert noise_factor_from_y(y, ENR, tc, enr_reference="absolute") == pytest.approx(
        (ENR - y * (tc / T0 - 1)) / (y - 1), rel=1e-14
    )
    # docs/references.md §5 common assumption: F = ENR/(Y-1) - (Tc - T0)/T0
    assert noise_factor_from_y(y, ENR, tc) == pytest.approx(
        ENR / (y - 1) - (tc - T0) / T0, rel=1e-14
    )
    # Tc = T0: NF = ENR_dB - 10 log10(Y - 1)
    assert 10 * math.log10(noise_factor_from_y(y, ENR, T0)) == pytest.approx(
        15.0 - 10 * math.log10(y - 1), abs=1e-12
    )


# --------------------------------------------------------------------------- §5 worked example


def test_worked_example_readings():
    got = [dbm_in_1mhz(x) for x in (NH_CAL, NC_CAL, NH, NC)]
    np.testing.assert_allclose(got, [-97.2108, -101.9752, -78.7434, -91.5862], atol=5e-5)


def test_calibration_gives_the_system_noise():
    cal = calibration()
    assert 10 ** (cal.y_db / 10) == pytest.approx(2.995262, abs=5e-7)  # docs/references.md §5: Y2
    assert cal.noise_factor == pytest.approx(15.84893, abs=5e-6)  # F2
    assert cal.nf_db == pytest.approx(12.0, abs=1e-12) and cal.te_k == pytest.approx(TE2)
    assert cal.freq_hz == 1e9 and cal.cold_temperature_k == T0 and cal.enr_db == 15.0
    assert cal.flags == []


def test_second_stage_correction_gives_the_dut_alone():
    r = y_factor_point(
        density(NH), density(NC), 15.0, cold_temperature_k=T0, calibration=calibration()
    )
    assert r.method is Method.Y_FACTOR
    assert 10 ** (r.y_db / 10) == pytest.approx(19.243392, abs=5e-7)  # docs/references.md §5: Y12
    assert r.notes["nf_uncorrected_db"] == pytest.approx(2.3889, abs=5e-5)  # F12 = 1.733383
    assert 10 ** (r.notes["nf_uncorrected_db"] / 10) == pytest.approx(1.733383, abs=5e-7)
    assert r.gain_db == pytest.approx(20.0, abs=1e-12)  # G1 = 100.0000
    assert r.nf_db == pytest.approx(2.0, abs=1e-12)  # F1 = F12 - (F2 - 1)/G1 = 2.0000 dB
    assert r.te_k == pytest.approx(169.619, abs=5e-4)
    assert r.enr_db == 15.0 and r.source_temperature_k == T0
    assert set(r.densities_w_per_hz) == {"hot", "cold", "hot_cal", "cold_cal"}
    assert r.notes["system_nf_db"] == pytest.approx(12.0)
    assert r.flags == []


def test_dut_alone_without_second_stage():
    r = y_factor_point(
        density(K * (TH + TE1)), density(K * (T0 + TE1)), 15.0, cold_temperature_k=T0
    )
    assert 10 ** (r.y_db / 10) == pytest.approx(20.95262, abs=5e-6)  # docs/references.md §5
    assert r.nf_db == pytest.approx(15 - 10 * math.log10(10 ** (r.y_db / 10) - 1), abs=1e-12)
    assert r.nf_db == pytest.approx(2.0, abs=1e-12)
    assert r.gain_db is None and r.floor_margin_db is None


def test_cold_source_not_at_t0():
    tc = 300.0
    th = T0 * ENR + tc  # common assumption (docs/references.md §5)
    hot, cold = K * (th + TE1), K * (tc + TE1)
    y = hot / cold
    assert y == pytest.approx(20.527755, abs=5e-6)  # docs/references.md §5
    naive = 15.0 - 10 * math.log10(y - 1)  # ENR/(Y-1), as if Tc were T0
    assert naive == pytest.approx(2.0935, abs=5e-5)  # docs/references.md §5
    r = y_factor_point(density(hot), density(cold), 15.0, cold_temperature_k=tc)
    assert r.nf_db == pytest.approx(2.0, abs=1e-12)


def test_cold_temperature_may_differ_between_calibration_and_measurement():
    tc_cal, tc = 294.0, 301.5
    th_cal, th = T0 * ENR + tc_cal, T0 * ENR + tc
    cal = calibrate_point(
        density(K * (th_cal + TE2)), density(K * (tc_cal + TE2)), 15.0, cold_temperature_k=tc_cal
    )
    assert cal.te_k == pytest.approx(TE2, rel=1e-12)
    r = y_factor_point(
        density(K * ((th + TE1) * G1 + TE2)),
        density(K * ((tc + TE1) * G1 + TE2)),
        15.0,
        cold_temperature_k=tc,
        calibration=cal,
    )
    assert r.te_k == pytest.approx(TE1, rel=1e-10) and r.gain_db == pytest.approx(20.0)


@pytest.mark.parametrize("reference", ["t0", "absolute"])
def test_enr_reference_conventions_are_each_self_consistent(reference):
    tc = 305.0
    th = float(hot_temperature_k(ENR, tc, enr_reference=reference))
    cal = calibrate_point(
        density(K * (th + TE2)),
        density(K * (tc + TE2)),
        15.0,
        cold_temperature_k=tc,
        enr_reference=reference,
    )
    r = y_factor_point(
        density(K * ((th + TE1) * G1 + TE2)),
        density(K * ((tc + TE1) * G1 + TE2)),
        15.0,
        cold_temperature_k=tc,
        calibration=cal,
        enr_reference=reference,
    )
    assert r.te_k == pytest.approx(TE1, rel=1e-10)


def test_losses_are_deembedded():
    # source -> input cable 0.6 dB at 299 K -> DUT -> cable 1.1 dB at 301 K (outside the
    # calibration path) -> analyzer; Friis for the physical path
    l_in, l_out, tp_in, tp_out, tc = 10**0.06, 10**0.11, 299.0, 301.0, 296.0
    th = T0 * ENR + tc
    te_path = friis_te_k(
        [passive_loss_te_k(l_in, tp_in), TE1, passive_loss_te_k(l_out, tp_out)],
        [1 / l_in, G1, 1 / l_out],
    )
    g_path = G1 / (l_in * l_out)
    cal = calibrate_point(
        density(K * (th + TE2)), density(K * (tc + TE2)), 15.0, cold_temperature_k=tc
    )
    r = y_factor_point(
        density(K * ((th + te_path) * g_path + TE2)),
        density(K * ((tc + te_path) * g_path + TE2)),
        15.0,
        cold_temperature_k=tc,
        calibration=cal,
        input_loss_db=0.6,
        input_loss_temperature_k=tp_in,
        output_loss_db=1.1,
        output_loss_temperature_k=tp_out,
    )
    assert r.te_k == pytest.approx(TE1, rel=1e-10)
    assert r.gain_db == pytest.approx(20.0, abs=1e-11)


def test_output_loss_needs_a_calibration():
    with pytest.raises(InputError, match="output_loss_db"):
        y_factor_point(density(NH), density(NC), 15.0, cold_temperature_k=T0, output_loss_db=1.0)


# --------------------------------------------------------------------------- uncertainty


def test_statistical_uncertainty_dut_alone():
    r = y_factor_point(
        density(K * (TH + TE1)), density(K * (T0 + TE1)), 15.0, cold_temperature_k=T0
    )
    y = 10 ** (r.y_db / 10)
    # docs/references.md §7: sigma_F/F = Y/(Y-1) sigma_Y/Y, sigma_Y/Y = sqrt(2) x 1 %
    assert r.u_nf_db == pytest.approx(C_DB * y / (y - 1) * math.sqrt(2) * 0.01, rel=1e-6)
    assert r.u_nf_db == pytest.approx(0.0645, abs=5e-5)


def test_uncertainty_of_the_full_example_and_its_budget_terms():
    r = y_factor_point(
        density(NH),
        density(NC),
        15.0,
        cold_temperature_k=T0,
        calibration=calibration(u_enr_db=0.1),
        u_enr_db=0.1,
    )
    c = r.notes["u_nf_db_contributions"]
    # docs/references.md §9 budget (1 % jitter each; ENR 0.10 dB, same source in cal and meas)
    assert c["hot_cal"] == pytest.approx(+0.0004, abs=5e-5)
    assert c["cold_cal"] == pytest.approx(-0.0045, abs=5e-5)
    assert c["hot"] == pytest.approx(-0.0458, abs=5e-5)
    assert c["cold"] == pytest.approx(+0.0499, abs=5e-5)
    assert c["enr"] == pytest.approx(+0.0994, abs=5e-5)
    assert c["enr"] / 0.1 == pytest.approx(0.9937, abs=5e-5)  # dNF/dENR (docs/references.md §9)
    assert r.notes["enr_correlated"] is True and "enr_cal" not in c
    # docs/references.md §7: the four readings alone give 0.0679 dB; ENR stays out of u_nf_db
    assert r.u_nf_db == pytest.approx(0.0679, abs=5e-5)
    assert r.u_nf_db == pytest.approx(
        math.sqrt(sum(c[k] ** 2 for k in ("hot", "cold", "hot_cal", "cold_cal"))), rel=1e-12
    )
    assert r.notes["u_nf_db_with_enr"] == pytest.approx(math.hypot(r.u_nf_db, c["enr"]))
    assert r.u_gain_db > 0 and r.u_te_k * C_DB / (T0 + r.te_k) == pytest.approx(r.u_nf_db)


def test_uncorrelated_enr_splits_into_two_terms_that_add_to_the_correlated_one():
    shared = y_factor_point(
        density(NH),
        density(NC),
        15.0,
        cold_temperature_k=T0,
        calibration=calibration(u_enr_db=0.1),
        u_enr_db=0.1,
    )
    # the same source value used under another ENR (e.g. a second source at calibration):
    cal = calibrate_point(
        density(K * (T0 * 10**1.5001 + T0 + TE2)),
        density(NC_CAL),
        15.001,
        cold_temperature_k=T0,
        u_enr_db=0.1,
    )
    split = y_factor_point(
        density(NH), density(NC), 15.0, cold_temperature_k=T0, calibration=cal, u_enr_db=0.1
    )
    c = split.notes["u_nf_db_contributions"]
    assert split.notes["enr_correlated"] is False
    # linearity: the correlated sensitivity is the sum of the two separate ones
    assert c["enr"] + c["enr_cal"] == pytest.approx(
        shared.notes["u_nf_db_contributions"]["enr"], rel=1e-3
    )
    assert abs(c["enr"]) > abs(shared.notes["u_nf_db_contributions"]["enr"])


def test_linear_propagation_agrees_with_the_uncertainties_package():
    from uncertainties import ufloat, umath

    # uncertainties package check: NF = 10 log10(ENR/(Y-1)), ENR 15.0 +/- 0.1 dB, Y 12.0 +/- 0.02 dB
    enr_db, y_db = ufloat(15.0, 0.1), ufloat(12.0, 0.02)
    nf = 10 * umath.log10(10 ** (enr_db / 10) / (10 ** (y_db / 10) - 1))
    assert nf.n == pytest.approx(3.283048, abs=5e-7) and nf.s == pytest.approx(0.102253, abs=5e-7)
    # same measurement as densities: cold exact, hot carries the Y uncertainty
    cold = K * 1000.0
    hot = cold * 10**1.2
    r = y_factor_point(
        density(hot, rel_u=0.02 / C_DB),
        density(cold, rel_u=0.0),
        15.0,
        cold_temperature_k=T0,
        u_enr_db=0.1,
    )
    assert r.nf_db == pytest.approx(nf.n, abs=1e-12)  # uncertainties 3.2.x, linear propagation
    assert r.notes["u_nf_db_with_enr"] == pytest.approx(nf.s, rel=1e-6)


def test_linear_propagation_matches_monte_carlo():
    rng = np.random.default_rng(7)
    m = 40_000
    draw = [x * (1 + 0.01 * rng.standard_normal(m)) for x in (NH, NC, NH_CAL, NC_CAL)]
    nf = y_factor_nf_db(
        draw[0],
        draw[1],
        15.0,
        cold_temperature_k=T0,
        hot_cal_w_per_hz=draw[2],
        cold_cal_w_per_hz=draw[3],
    )
    s = float(np.std(nf, ddof=1))
    u = y_factor_point(
        density(NH), density(NC), 15.0, cold_temperature_k=T0, calibration=calibration()
    ).u_nf_db
    # sampling std of a sample std: s / sqrt(2 (M - 1)); allow 5 of them
    assert abs(s - u) < 5 * u / math.sqrt(2 * (m - 1))


# --------------------------------------------------------------------------- flags and refusals


def test_hot_not_above_cold_is_refused_naming_the_frequency():
    with pytest.raises(
        MeasurementError,
        match=r"measurement at 2\.5 GHz: no usable Y-factor, hot reading is "
        r"not above the cold one",
    ):
        y_factor_point(
            density(NC, freq_hz=2.5e9), density(NC, freq_hz=2.5e9), 15.0, cold_temperature_k=T0
        )
    with pytest.raises(MeasurementError, match=r"calibration at 1 GHz"):
        calibrate_point(density(NC_CAL), density(NH_CAL), 15.0, cold_temperature_k=T0)


def test_negative_system_temperature_is_refused():
    with pytest.raises(MeasurementError, match="system noise temperature"):
        # hot reading larger than a noiseless system could give with this ENR
        calibrate_point(density(K * (TH + 0.0) * 1.2), density(K * T0), 15.0, cold_temperature_k=T0)


def test_y_too_small_and_enr_extrapolated_flags():
    te_noisy = T0 * (10**2.2 - 1)  # NF 22 dB with ENR 15 dB: Y about 0.8 dB
    r = y_factor_point(
        density(K * (TH + te_noisy)),
        density(K * (T0 + te_noisy)),
        15.0,
        cold_temperature_k=T0,
        enr_extrapolated=True,
    )
    assert r.y_db < 1.0
    assert PointFlag.Y_TOO_SMALL in r.flags and PointFlag.ENR_EXTRAPOLATED in r.flags
    assert r.nf_db == pytest.approx(22.0, abs=1e-10)
    cal = calibration(enr_extrapolated=True)
    assert PointFlag.ENR_EXTRAPOLATED in cal.flags
    r2 = y_factor_point(density(NH), density(NC), 15.0, cold_temperature_k=T0, calibration=cal)
    assert PointFlag.ENR_EXTRAPOLATED in r2.flags


def test_low_gain_near_floor_and_negative_te_flags():
    g = 10**0.5  # 5 dB DUT gain
    r = y_factor_point(
        density(K * ((TH + TE1) * g + TE2)),
        density(K * ((T0 + TE1) * g + TE2)),
        15.0,
        cold_temperature_k=T0,
        calibration=calibration(),
    )
    assert r.nf_db == pytest.approx(2.0, abs=1e-10)
    assert PointFlag.LOW_GAIN in r.flags and PointFlag.NEAR_ANALYZER_FLOOR in r.flags
    # with Tc = T0 the correction is 10 log10(1 + 10^(-margin/10)) (as the gain method's §4)
    assert r.floor_margin_db == pytest.approx(10 * math.log10((T0 + TE1) * g / TE2), rel=1e-10)
    assert r.floor_correction_db == pytest.approx(
        10 * math.log10(1 + 10 ** (-r.floor_margin_db / 10)), rel=1e-9
    )
    neg = y_factor_point(
        density(K * ((TH - 4.0) * G1 + TE2)),
        density(K * ((T0 - 4.0) * G1 + TE2)),
        15.0,
        cold_temperature_k=T0,
        calibration=calibration(),
    )
    assert neg.te_k == pytest.approx(-4.0, rel=1e-8) and PointFlag.NEGATIVE_TE in neg.flags


def test_density_flags_include_the_calibration_densities():
    cal = calibrate_point(
        density(NH_CAL, excluded_freq_hz=[1.00002e9]), density(NC_CAL), 15.0, cold_temperature_k=T0
    )
    assert PointFlag.SPURS_EXCLUDED in cal.flags
    r = y_factor_point(
        density(NH), density(NC, scatter_ratio=3.0), 15.0, cold_temperature_k=T0, calibration=cal
    )
    assert PointFlag.SPURS_EXCLUDED in r.flags and PointFlag.EXCESS_SCATTER in r.flags


@pytest.mark.parametrize(
    "kwargs, field",
    [
        ({"cold_temperature_k": -2.0}, "cold_temperature_k"),
        ({"cold_temperature_k": float("nan")}, "cold_temperature_k"),
        ({"enr_db": float("nan")}, "enr_db"),
        ({"u_enr_db": -0.1}, "u_enr_db"),
        ({"input_loss_db": -1.0}, "input_loss_db"),
        ({"enr_reference": "hot"}, "enr_reference"),
        ({"calibration": "cal.json"}, "calibration"),
    ],
)
def test_bad_inputs_name_the_field(kwargs, field):
    args = {"enr_db": 15.0, "cold_temperature_k": T0} | kwargs
    enr_db = args.pop("enr_db")
    with pytest.raises(InputError) as info:
        y_factor_point(density(NH), density(NC), enr_db, **args)
    assert info.value.field == field


def test_calibration_with_another_enr_convention_is_refused():
    cal = calibrate_point(
        density(NH_CAL), density(NC_CAL), 15.0, cold_temperature_k=T0, enr_reference="absolute"
    )
    with pytest.raises(InputError, match="enr_reference"):
        y_factor_point(density(NH), density(NC), 15.0, cold_temperature_k=T0, calibration=cal)


def test_densities_must_share_the_frequency():
    with pytest.raises(InputError, match="cold.freq_hz"):
        y_factor_point(density(NH), density(NC, freq_hz=2e9), 15.0, cold_temperature_k=T0)
    with pytest.raises(InputError, match="hot_cal.freq_hz"):
        y_factor_point(
            density(NH, freq_hz=2e9),
            density(NC, freq_hz=2e9),
            15.0,
            cold_temperature_k=T0,
            calibration=calibration(),
        )


# --------------------------------------------------------------------------- arrays and models


def test_sweep_matches_the_point_function():
    freqs = np.linspace(1e9, 5e9, 5)
    te1 = np.array([40.0, 100.0, 170.0, 500.0, 1500.0])
    g1 = 10 ** (np.array([12.0, 18.0, 20.0, 25.0, 30.0]) / 10)
    te2 = np.array([2000.0, 3000.0, 4306.0, 6000.0, 9000.0])
    enr_db = np.array([15.5, 15.3, 15.0, 14.7, 14.4])
    tc = 297.0
    th = T0 * 10 ** (enr_db / 10) + tc
    hot, cold = K * ((th + te1) * g1 + te2), K * ((tc + te1) * g1 + te2)
    hot_cal, cold_cal = K * (th + te2), K * (tc + te2)
    sweep = y_factor_sweep(
        hot,
        cold,
        enr_db,
        cold_temperature_k=tc,
        hot_cal_w_per_hz=hot_cal,
        cold_cal_w_per_hz=cold_cal,
        freq_hz=freqs,
    )
    np.testing.assert_allclose(sweep.te_k, te1, rtol=1e-10)
    np.testing.assert_allclose(sweep.gain_db, 10 * np.log10(g1), atol=1e-10)
    for i in (0, 4):
        cal = calibrate_point(
            density(hot_cal[i], freq_hz=freqs[i]),
            density(cold_cal[i], freq_hz=freqs[i]),
            enr_db[i],
            cold_temperature_k=tc,
        )
        p = y_factor_point(
            density(hot[i], freq_hz=freqs[i]),
            density(cold[i], freq_hz=freqs[i]),
            enr_db[i],
            cold_temperature_k=tc,
            calibration=cal,
        )
        assert p.nf_db == pytest.approx(sweep.nf_db[i], abs=1e-12)
        assert p.y_db == pytest.approx(sweep.y_db[i], abs=1e-12)
        assert p.notes["nf_uncorrected_db"] == pytest.approx(sweep.nf_uncorrected_db[i])
    nf_only = y_factor_nf_db(hot, cold, enr_db, cold_temperature_k=tc)
    assert nf_only.shape == (5,) and np.all(nf_only > sweep.nf_db)  # uncorrected reads high
    bad_cold = cold.copy()
    bad_cold[3] = hot[3]
    with pytest.raises(MeasurementError, match=r"4 GHz"):
        y_factor_sweep(hot, bad_cold, enr_db, cold_temperature_k=tc, freq_hz=freqs)
    with pytest.raises(InputError, match="cold_cal_w_per_hz"):
        y_factor_sweep(hot, cold, enr_db, cold_temperature_k=tc, hot_cal_w_per_hz=hot_cal)


def _settings(**kw) -> AcquisitionSettings:
    base = dict(
        center_hz=1e9,
        span_hz=2e6,
        rbw_hz=1e6,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=10,
        points=101,
    )
    return AcquisitionSettings(**(base | kw))


def test_system_calibration_lookup_and_settings_match():
    pts = [
        calibrate_point(
            density(NH_CAL, freq_hz=f, settings=_settings(center_hz=f)),
            density(NC_CAL, freq_hz=f),
            15.0,
            cold_temperature_k=T0,
        )
        for f in (1e9, 2e9, 3e9)
    ]
    system = SystemCalibration(points=pts)
    assert system.point_at(2e9 * (1 + 1e-9)) is pts[1]
    with pytest.raises(InputError, match=r"2\.5 GHz has no calibration point"):
        system.point_at(2.5e9)
    assert system.covers([1e9, 3e9]) and not system.covers([1e9, 4e9])
    # centre, span, points and averages may change; RBW or attenuation may not
    assert system.settings_match(_settings(center_hz=5e9, averages=100, points=11))
    assert not system.settings_match(_settings(rbw_hz=3e6))
    assert not system.settings_match(_settings(attenuation_db=10.0))
    back = SystemCalibration.model_validate_json(system.model_dump_json())
    assert back == system and back.points[0].settings == pts[0].settings
