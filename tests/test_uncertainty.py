"""Uncertainty budgets: GUM propagation, Monte Carlo, type-B conversions, mismatch, points.

Reference values come from docs/references.md (§5 worked example, §7 jitter, §9 budget and
mismatch), the ``uncertainties`` package (linear propagation, independent implementation), the
methods' own propagation (noisebench.science.methods) and closed-form statistics. Statistical
tolerances
are derived from the sampling distributions (delta method: the sample standard deviation of M
draws of a distribution with kurtosis kappa has standard deviation sigma*sqrt((kappa-1)/(4M));
kappa = 3 normal, 9/5 rectangular, 3/2 arcsine).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.constants import k as BOLTZMANN  # scipy.constants

from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point, gain_method_point, y_factor_point
from noisebench.science.uncertainty import (
    Budget,
    Distribution,
    InputQuantity,
    MonteCarloSettings,
    Reflections,
    TypeB,
    UncertaintyInputs,
    budget_for_point,
    budgets_for_points,
    gain_method_budget,
    gamma_from_vswr,
    mismatch_limits_db,
    mismatch_power_ratio_std,
    mismatch_standard_uncertainty_db,
    propagate_gum,
    propagate_monte_carlo,
    sample_input,
    standard_uncertainty_from_expanded,
    standard_uncertainty_from_half_width,
    vswr_from_gamma,
    y_factor_budget,
)

T0 = 290.0
C_DB = 10.0 / math.log(10.0)  # dB per neper of power, docs/references.md intro
FREQ = 1e9


def _sd_of_sample_std(sigma: float, m: int, kurtosis: float) -> float:
    """Standard deviation of the sample std of m draws (delta method)."""
    return sigma * math.sqrt((kurtosis - 1.0) / (4.0 * m))


# --------------------------------------------------------------------------- §5 / §9 example


def _section5_densities(tc_k: float = T0) -> dict[str, float]:
    """The four densities (W/Hz) of the docs/references.md §5 worked example, from the formulas.

    ENR 15 dB, Th = T0*ENR + Tc, DUT G1 = 20 dB and NF1 = 2 dB, analyzer NF2 = 12 dB.
    """
    th = T0 * 10**1.5 + tc_k
    g1 = 10**2.0
    te1 = T0 * (10**0.2 - 1.0)  # docs/references.md §2
    te2 = T0 * (10**1.2 - 1.0)
    return {
        "hot_cal": BOLTZMANN * (th + te2),
        "cold_cal": BOLTZMANN * (tc_k + te2),
        "hot": BOLTZMANN * (g1 * (th + te1) + te2),
        "cold": BOLTZMANN * (g1 * (tc_k + te1) + te2),
    }


def _section9_budget(inputs: UncertaintyInputs, jitter: float = 0.01, **kw) -> Budget:
    d = _section5_densities()
    return y_factor_budget(
        freq_hz=FREQ,
        hot_w_per_hz=d["hot"],
        cold_w_per_hz=d["cold"],
        hot_cal_w_per_hz=d["hot_cal"],
        cold_cal_w_per_hz=d["cold_cal"],
        u_hot_w_per_hz=jitter * d["hot"],
        u_cold_w_per_hz=jitter * d["cold"],
        u_hot_cal_w_per_hz=jitter * d["hot_cal"],
        u_cold_cal_w_per_hz=jitter * d["cold_cal"],
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=inputs,
        **kw,
    )


SECTION9_INPUTS = dict(enr_db=0.10, cold_temperature_k=1.0, linearity_db=0.02)


def test_section9_worked_budget_line_by_line():
    budget = _section9_budget(UncertaintyInputs(**SECTION9_INPUTS))
    # docs/references.md §9 illustrative Y-factor budget (ENR fully correlated, same source)
    expected = {
        "ENR": 0.0994,
        "cold temperature": -0.0094,
        "N_hot,cal jitter": 0.0004,
        "N_cold,cal jitter": -0.0045,
        "N_hot jitter": -0.0458,
        "N_cold jitter": 0.0499,
        "linearity Y (calibration)": 0.0030,
        "linearity Y (measurement)": -0.0231,
    }
    got = {c.name: c.contribution_db for c in budget.contributions}
    assert set(got) == set(expected)
    for name, value in expected.items():
        assert got[name] == pytest.approx(value, abs=5e-5), name  # table is rounded to 1e-4
    assert budget.contribution("ENR").sensitivity == pytest.approx(0.9937, abs=5e-5)
    assert budget.nf_db == pytest.approx(2.0, abs=1e-9)  # docs/references.md §5: NF1 = 2.0000 dB
    assert budget.u_combined_db == pytest.approx(0.1229, abs=5e-5)  # docs/references.md §9
    assert budget.U_expanded_db == pytest.approx(0.2458, abs=1e-4)
    assert budget.k == 2.0 and budget.method == "gum"
    # JCGM 100:2008 §5.1.2 (uncorrelated): u_c is the root-sum-square of the lines
    assert budget.u_combined_db == pytest.approx(
        math.sqrt(sum(c.contribution_db**2 for c in budget.contributions)), rel=1e-12
    )


def test_section9_jitter_part_matches_section7():
    budget = _section9_budget(UncertaintyInputs())
    # docs/references.md §7: 4 readings at 1 % with second-stage correction -> 0.0679 dB
    assert budget.u_combined_db == pytest.approx(0.0679, abs=5e-5)
    assert any("ENR" in o for o in budget.omitted)


def test_section9_monte_carlo_against_reference_run():
    inputs = UncertaintyInputs(
        enr_db=0.10,
        cold_temperature_k={"u": 1.0, "distribution": "normal"},
        linearity_db={"u": 0.02, "distribution": "normal"},
        method="monte_carlo",
        monte_carlo={"trials": 100_000, "seed": 7},
    )
    budget = _section9_budget(inputs)
    mc = budget.monte_carlo
    assert mc is not None and mc.trials == 100_000
    # docs/references.md §9: M = 1e6 (normal inputs): mean 1.99994, std 0.12301, [1.7585, 2.2413]
    ref_m, ref_std = 1_000_000, 0.12301
    sd_std = math.hypot(
        _sd_of_sample_std(ref_std, mc.trials, 3.0), _sd_of_sample_std(ref_std, ref_m, 3.0)
    )
    assert abs(mc.std - ref_std) < 5 * sd_std
    assert abs(mc.mean - 1.99994) < 5 * ref_std * math.sqrt(1 / mc.trials + 1 / ref_m)
    # sd of a 2.5 % quantile: sqrt(p(1-p)/M)/pdf(q), normal approximation of the output
    pdf = math.exp(-0.5 * 1.96**2) / math.sqrt(2 * math.pi) / ref_std
    sd_q = math.sqrt(0.025 * 0.975) / pdf * math.sqrt(1 / mc.trials + 1 / ref_m)
    assert abs(mc.interval_low - 1.7585) < 5 * sd_q + 5e-5
    assert abs(mc.interval_high - 2.2413) < 5 * sd_q + 5e-5
    assert budget.u_combined_db == mc.std
    assert budget.U_expanded_db == pytest.approx((mc.interval_high - mc.interval_low) / 2)
    assert budget.gum_u_combined_db == pytest.approx(0.1229, abs=5e-5)


def test_enr_uncorrelated_gives_two_lines_whose_sensitivities_sum_to_the_shared_one():
    shared = _section9_budget(UncertaintyInputs(enr_db=0.1))
    split = _section9_budget(UncertaintyInputs(enr_db=0.1, enr_correlated=False))
    c_meas = split.contribution("ENR (measurement)").sensitivity
    c_cal = split.contribution("ENR (calibration)").sensitivity
    # linearity of the model: one shared deviation = the sum of the two partial derivatives
    assert c_meas + c_cal == pytest.approx(shared.contribution("ENR").sensitivity, rel=1e-7)
    # a higher ENR raises Te12 (F1 up) and, in calibration, Te2 (a larger correction: F1 down)
    assert c_cal < 0 < c_meas
    u_split = math.hypot(c_meas * 0.1, c_cal * 0.1)
    jitter = _section9_budget(UncertaintyInputs()).u_combined_db
    assert split.u_combined_db == pytest.approx(math.hypot(u_split, jitter), rel=1e-9)


# --------------------------------------------------------------------------- independent checks


def _uncertainties_nf(enr_db: float, u_enr: float, y_db: float, u_y: float):
    from uncertainties import ufloat, umath  # independent linear propagation

    enr, y = ufloat(enr_db, u_enr), ufloat(y_db, u_y)
    return 10 * umath.log10(10 ** (enr / 10) / (10 ** (y / 10) - 1))


def _ecosystem_budget(method: str | None = None, trials: int = 100_000) -> Budget:
    cold = 1e-20
    inputs = UncertaintyInputs(
        enr_db=0.1,
        linearity_db={"u": 0.02, "distribution": "normal"},
        monte_carlo={"trials": trials, "seed": 11},
    )
    return y_factor_budget(
        freq_hz=FREQ,
        hot_w_per_hz=cold * 10**1.2,
        cold_w_per_hz=cold,
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=inputs,
        method=method,
    )


def test_gum_agrees_with_uncertainties_package():
    budget = _ecosystem_budget()
    ref = _uncertainties_nf(15.0, 0.1, 12.0, 0.02)
    assert budget.nf_db == pytest.approx(ref.nominal_value, abs=1e-12)
    assert budget.u_combined_db == pytest.approx(ref.std_dev, rel=1e-8)  # uncertainties
    # the uncertainties package (linear propagation): 3.283048 +/- 0.102253 dB
    assert budget.nf_db == pytest.approx(3.283048, abs=5e-7)
    assert budget.u_combined_db == pytest.approx(0.102253, abs=5e-7)
    assert budget.model == "y_factor_uncorrected"


def test_monte_carlo_std_agrees_with_gum_within_its_sampling_uncertainty():
    budget = _ecosystem_budget("monte_carlo")
    mc = budget.monte_carlo
    u = budget.gum_u_combined_db
    assert abs(mc.std - u) < 5 * u / math.sqrt(2 * (mc.trials - 1))  # normal: s/sqrt(2(M-1))
    assert abs(mc.mean - budget.nf_db) < 5 * u / math.sqrt(mc.trials)
    assert mc.gum_validated is True  # JCGM 101:2008 §8, nearly linear model


def test_propagate_gum_on_linear_model_with_correlation():
    a, b = 2.0, -3.0
    qs = [
        InputQuantity(key="x", name="x", u=0.5, unit="V", step=1e-3),
        InputQuantity(key="y", name="y", u=0.2, unit="V", step=1e-3),
    ]

    def model(x, y):
        return a * x + b * y

    for r in (0.0, 1.0, -1.0, 0.3):
        res = propagate_gum(model, qs, correlation={("x", "y"): r})
        # JCGM 100:2008 eq. (13): u^2 = c1^2 u1^2 + c2^2 u2^2 + 2 c1 c2 u1 u2 r
        exact = math.sqrt((a * 0.5) ** 2 + (b * 0.2) ** 2 + 2 * a * b * 0.5 * 0.2 * r)
        assert res.u_combined == pytest.approx(exact, rel=1e-9)
    assert res.sensitivities == pytest.approx([a, b], rel=1e-9)
    with pytest.raises(InputError, match="correlation"):
        propagate_gum(model, qs, correlation={("x", "z"): 0.5})
    with pytest.raises(InputError, match="outside"):
        propagate_gum(model, qs, correlation={("x", "y"): 1.5})


def test_monte_carlo_with_correlated_normal_inputs():
    qs = [
        InputQuantity(key="x", name="x", u=1.0, unit="1", step=1e-3),
        InputQuantity(key="y", name="y", u=1.0, unit="1", step=1e-3),
    ]
    m = 100_000
    res = propagate_monte_carlo(
        lambda x, y: x + y,
        qs,
        correlation={("x", "y"): 1.0},
        settings=MonteCarloSettings(trials=m, seed=3),
    )
    # fully correlated: x + y = 2x, std 2
    assert abs(res.std - 2.0) < 5 * _sd_of_sample_std(2.0, m, 3.0)
    rect = [
        InputQuantity(
            key="x", name="x", u=1.0, unit="1", step=1e-3, distribution=Distribution.RECTANGULAR
        ),
        qs[1],
    ]
    with pytest.raises(InputError, match="normally distributed"):
        propagate_monte_carlo(lambda x, y: x + y, rect, correlation={("x", "y"): 0.5})


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.floats(-5, 5), st.floats(0, 3)), min_size=1, max_size=6))
def test_gum_is_exact_for_linear_models(terms):
    qs = [
        InputQuantity(key=f"x{i}", name=f"x{i}", u=u, unit="1", step=1e-3)
        for i, (_, u) in enumerate(terms)
    ]

    def model(**x):
        return sum(a * x[f"x{i}"] for i, (a, _) in enumerate(terms))

    res = propagate_gum(model, qs)
    exact = math.sqrt(sum((a * u) ** 2 for a, u in terms))
    assert res.u_combined == pytest.approx(exact, rel=1e-7, abs=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    enr_db=st.floats(5, 25),
    y_db=st.floats(0.5, 20),
    r_hot=st.floats(0, 0.05),
    r_cold=st.floats(0, 0.05),
)
def test_uncorrected_jitter_matches_closed_form(enr_db, y_db, r_hot, r_cold):
    y = 10 ** (y_db / 10)
    cold = 1e-20
    b = y_factor_budget(
        freq_hz=FREQ,
        hot_w_per_hz=cold * y,
        cold_w_per_hz=cold,
        enr_db=enr_db,
        cold_temperature_k=T0,
        u_hot_w_per_hz=r_hot * cold * y,
        u_cold_w_per_hz=r_cold * cold,
        inputs=UncertaintyInputs(),
    )
    # docs/references.md §7: sigma_F/F = Y/(Y-1) * sigma_Y/Y, Tc = T0
    expected = C_DB * y / (y - 1) * math.hypot(r_hot, r_cold)
    assert b.u_combined_db == pytest.approx(expected, rel=1e-6, abs=1e-12)
    assert b.nf_db == pytest.approx(enr_db - 10 * math.log10(y - 1), abs=1e-9)  # §5


# --------------------------------------------------------------------------- gain method


def _gain_example():
    """docs/references.md §4 worked example: G = 20 dB, NF = 2 dB, analyzer NF 12 dB, Ts = T0."""
    g = 100.0
    te1 = T0 * (10**0.2 - 1)
    t_sa = T0 * (10**1.2 - 1)
    return BOLTZMANN * (g * (T0 + te1) + t_sa), BOLTZMANN * (T0 + t_sa)


def test_gain_method_jitter_matches_section7():
    n_m, n_f = _gain_example()
    inputs = UncertaintyInputs()
    with_floor = gain_method_budget(
        freq_hz=FREQ,
        dut_w_per_hz=n_m,
        u_dut_w_per_hz=0.01 * n_m,
        floor_w_per_hz=n_f,
        u_floor_w_per_hz=0.01 * n_f,
        gain_db=20.0,
        inputs=inputs,
    )
    assert with_floor.nf_db == pytest.approx(
        2.0, abs=1e-9
    )  # docs/references.md §4 exact correction
    assert with_floor.u_combined_db == pytest.approx(0.0477, abs=5e-5)  # docs/references.md §7
    # gain method without floor: DUT-only density (docs/references.md §7: 0.0434 dB)
    n_dut = BOLTZMANN * 100.0 * (T0 + T0 * (10**0.2 - 1))
    alone = gain_method_budget(
        freq_hz=FREQ, dut_w_per_hz=n_dut, u_dut_w_per_hz=0.01 * n_dut, gain_db=20.0, inputs=inputs
    )
    assert alone.u_combined_db == pytest.approx(C_DB * 0.01, rel=1e-7)


def test_gain_and_absolute_level_pass_one_to_one():
    n_dut = BOLTZMANN * 100.0 * (T0 + 500.0)
    b = gain_method_budget(
        freq_hz=FREQ,
        dut_w_per_hz=n_dut,
        gain_db=20.0,
        u_gain_db=0.15,
        inputs=UncertaintyInputs(absolute_amplitude_db=0.3),
    )
    # docs/references.md §4: errors in G(dB) and absolute level pass into NF(dB) 1:1 (Ts = T0)
    assert b.contribution("DUT gain").sensitivity == pytest.approx(-1.0, abs=1e-7)
    assert b.contribution("absolute amplitude").sensitivity == pytest.approx(1.0, abs=1e-7)
    assert b.contribution("absolute amplitude").distribution is Distribution.RECTANGULAR
    assert b.u_combined_db == pytest.approx(math.hypot(0.15, 0.3), rel=1e-7)
    # the plan's value overrides the point's gain u
    b2 = gain_method_budget(
        freq_hz=FREQ,
        dut_w_per_hz=n_dut,
        gain_db=20.0,
        u_gain_db=0.15,
        inputs=UncertaintyInputs(dut_gain_db=0.05),
    )
    assert b2.contribution("DUT gain").u == 0.05


def test_gain_floor_correction_sensitivity_grows_near_the_floor():
    inputs = UncertaintyInputs()
    t_sa = T0 * (10**1.2 - 1)
    n_f = BOLTZMANN * (T0 + t_sa)
    out = []
    for margin_db in (3.0, 10.0):
        # DUT noise (above kT0 of the floor) `margin_db` above the analyzer's own noise
        n_m = n_f + BOLTZMANN * t_sa * 10 ** (margin_db / 10) - BOLTZMANN * T0
        b = gain_method_budget(
            freq_hz=FREQ,
            dut_w_per_hz=n_m,
            floor_w_per_hz=n_f,
            u_dut_w_per_hz=0.01 * n_m,
            u_floor_w_per_hz=0.01 * n_f,
            gain_db=30.0,
            inputs=inputs,
        )
        out.append(abs(b.contribution("N_floor (floor correction)").contribution_db))
    assert out[0] > 5 * out[1]


# --------------------------------------------------------------------------- against the methods


def _nd(value: float, rel: float = 0.01) -> NoiseDensity:
    return NoiseDensity(freq_hz=FREQ, density_w_per_hz=value, u_density_w_per_hz=rel * value)


@pytest.mark.parametrize("reference", ["t0", "absolute"])
def test_budget_for_y_point_reproduces_the_method(reference):
    d = _section5_densities(tc_k=300.0)
    cal = calibrate_point(
        _nd(d["hot_cal"], 0.008),
        _nd(d["cold_cal"], 0.012),
        15.0,
        cold_temperature_k=300.0,
        u_enr_db=0.1,
        enr_reference=reference,
    )
    point = y_factor_point(
        _nd(d["hot"], 0.01),
        _nd(d["cold"], 0.02),
        15.0,
        cold_temperature_k=300.0,
        calibration=cal,
        u_enr_db=0.1,
        enr_reference=reference,
        input_loss_db=0.3,
        output_loss_db=0.2,
    )
    budget = budget_for_point(point, UncertaintyInputs())
    # two independent implementations of the same model (noisebench.science.methods.yfactor)
    assert budget.nf_db == pytest.approx(point.nf_db, abs=1e-9)
    jitter = [c.contribution_db for c in budget.contributions if c.unit == "%"]
    assert math.sqrt(sum(j * j for j in jitter)) == pytest.approx(point.u_nf_db, rel=1e-6)
    methods = point.notes["u_nf_db_contributions"]
    assert budget.contribution("ENR").contribution_db == pytest.approx(methods["enr"], rel=1e-6)
    assert budget.contribution("N_cold jitter").contribution_db == pytest.approx(
        methods["cold"], rel=1e-6
    )


def test_budget_for_gain_point_reproduces_the_method():
    n_m, n_f = _gain_example()
    point = gain_method_point(
        _nd(n_m),
        20.0,
        floor=_nd(n_f, 0.02),
        u_gain_db=0.1,
        input_loss_db=0.5,
        output_loss_db=0.25,
        source_temperature_k=296.0,
    )
    budget = budget_for_point(point, UncertaintyInputs())
    assert budget.nf_db == pytest.approx(point.nf_db, abs=1e-9)  # noisebench.science.methods.gain
    methods = point.notes["u_nf_db_contributions"]
    assert budget.contribution("N_dut jitter").contribution_db == pytest.approx(
        methods["dut"], rel=1e-6
    )
    assert budget.contribution("N_floor (floor correction)").contribution_db == pytest.approx(
        methods["floor"], rel=1e-6
    )
    assert budget.contribution("DUT gain").contribution_db == pytest.approx(
        methods["gain"], rel=1e-6
    )
    assert any(o.startswith("input loss") for o in budget.omitted)


def test_budget_for_point_infers_jitter_when_the_point_lacks_density_u():
    d = _section5_densities()
    cal = calibrate_point(_nd(d["hot_cal"]), _nd(d["cold_cal"]), 15.0, cold_temperature_k=T0)
    point = y_factor_point(
        _nd(d["hot"]), _nd(d["cold"]), 15.0, cold_temperature_k=T0, calibration=cal
    )
    bare = point.model_copy(update={"notes": {}})
    budget = budget_for_point(bare, UncertaintyInputs(enr_db=0.1))
    jitter = [c for c in budget.contributions if c.unit == "%"]
    assert len(jitter) == 4
    assert all(c.u == pytest.approx(1.0, rel=1e-6) for c in jitter)  # the 1 % it was made with
    assert math.sqrt(sum(c.contribution_db**2 for c in jitter)) == pytest.approx(
        point.u_nf_db, rel=1e-9
    )


def test_budget_for_point_takes_calibration_densities_from_the_calibration():
    d = _section5_densities()
    cal = calibrate_point(_nd(d["hot_cal"]), _nd(d["cold_cal"]), 15.0, cold_temperature_k=T0)
    point = y_factor_point(
        _nd(d["hot"]), _nd(d["cold"]), 15.0, cold_temperature_k=T0, calibration=cal
    )
    dens = {k: v for k, v in point.densities_w_per_hz.items() if not k.endswith("_cal")}
    stripped = point.model_copy(update={"densities_w_per_hz": dens})
    assert budget_for_point(stripped, UncertaintyInputs()).model == "y_factor_uncorrected"
    again = budget_for_point(stripped, UncertaintyInputs(), calibration=cal)
    assert again.model == "y_factor" and again.nf_db == pytest.approx(2.0, abs=1e-9)
    both = budgets_for_points([stripped], UncertaintyInputs(), calibrations={FREQ: cal})
    assert both[0].u_combined_db == pytest.approx(again.u_combined_db, rel=1e-12)


# --------------------------------------------------------------------------- type B, mismatch


def test_type_b_conversions():
    # JCGM 100:2008 §4.3.7 (rectangular a/sqrt(3)) and §4.3.9 (U-shaped a/sqrt(2)); U/k
    assert standard_uncertainty_from_half_width(0.3, "rectangular") == pytest.approx(
        0.3 / math.sqrt(3)
    )
    assert standard_uncertainty_from_half_width(0.3, "u_shaped") == pytest.approx(
        0.3 / math.sqrt(2)
    )
    assert standard_uncertainty_from_expanded(0.2, 2.0) == pytest.approx(0.1)
    with pytest.raises(InputError, match="no half-width"):
        standard_uncertainty_from_half_width(0.3, "normal")
    with pytest.raises(InputError, match="unknown distribution"):
        standard_uncertainty_from_half_width(0.3, "triangle")
    with pytest.raises(InputError):
        standard_uncertainty_from_expanded(0.2, 0.0)
    assert TypeB(half_width=0.03).standard_uncertainty() == pytest.approx(0.03 / math.sqrt(3))
    assert TypeB(expanded=0.25, k=2.5).standard_uncertainty() == pytest.approx(0.1)
    inputs = UncertaintyInputs.from_dict(
        {
            "enr_db": {"expanded": 0.2, "k": 2},
            "linearity_db": {"half_width": 0.05},
            "cold_temperature_k": 2.0,
            "absolute_amplitude_db": {"half_width": 0.4, "distribution": "u_shaped"},
        }
    )
    assert inputs.spec("enr_db") == (pytest.approx(0.1), Distribution.NORMAL)
    assert inputs.spec("linearity_db") == (
        pytest.approx(0.05 / math.sqrt(3)),
        Distribution.RECTANGULAR,
    )
    assert inputs.spec("cold_temperature_k") == (2.0, Distribution.RECTANGULAR)
    assert inputs.spec("absolute_amplitude_db")[0] == pytest.approx(0.4 / math.sqrt(2))
    assert inputs.spec("input_loss_db") is None


def test_vswr_and_gamma():
    # docs/references.md §9: |Gamma| = (VSWR-1)/(VSWR+1): 1.2 -> 0.09091, 1.5 -> 0.2000, 2.0 ->
    # 0.3333
    for vswr, gamma in ((1.2, 0.09091), (1.5, 0.2000), (2.0, 0.3333)):
        assert gamma_from_vswr(vswr) == pytest.approx(gamma, abs=5e-5)
        assert vswr_from_gamma(gamma_from_vswr(vswr)) == pytest.approx(vswr, rel=1e-12)
    assert gamma_from_vswr(1.0) == 0.0
    with pytest.raises(InputError, match="vswr"):
        gamma_from_vswr(0.9)
    with pytest.raises(InputError, match="gamma"):
        vswr_from_gamma(1.0)
    inputs = UncertaintyInputs.from_dict({"dut_input_vswr": 1.5, "analyzer_input_vswr": 2.0})
    assert inputs.dut_input_gamma == pytest.approx(0.2)
    assert UncertaintyInputs.model_validate(inputs.model_dump()) == inputs  # dump round trip


def test_mismatch_limits_and_standard_uncertainty():
    # docs/references.md §9 (Harris & Warner 1981): limits 20log10(1 +/- |Gs||Gl|)
    up, down = mismatch_limits_db(0.1, 0.2)
    assert (up, down) == (pytest.approx(0.1720, abs=5e-5), pytest.approx(-0.1755, abs=5e-5))
    up, down = mismatch_limits_db(0.05, 0.1)
    assert (up, down) == (pytest.approx(0.0433, abs=5e-5), pytest.approx(-0.0435, abs=5e-5))
    # std in dB: 0.1228 and 0.0307 (docs/references.md §9 table), ~ c_dB*sqrt(2)*rho
    assert mismatch_standard_uncertainty_db(0.1, 0.2) == pytest.approx(0.1228, abs=1e-4)
    assert mismatch_standard_uncertainty_db(0.05, 0.1) == pytest.approx(0.0307, abs=1e-4)
    assert mismatch_power_ratio_std(0.1, 0.2) == pytest.approx(math.sqrt(2) * 0.02)
    with pytest.raises(InputError, match="gamma_load"):
        mismatch_limits_db(0.1, 1.2)


def test_mismatch_monte_carlo_draws():
    rho, m = 0.02, 200_000
    q = InputQuantity(
        key="mm",
        name="mm",
        u=mismatch_standard_uncertainty_db(0.1, 0.2),
        unit="dB",
        step=1e-4,
        distribution=Distribution.U_SHAPED,
        mismatch_rho=rho,
    )
    db = sample_input(q, np.random.default_rng(5), m)
    ratio = 10 ** (db / 10)  # |1 + rho e^{j phi}|^2 = 1 + rho^2 + 2 rho cos(phi): arcsine
    sigma = math.sqrt(2) * rho  # docs/references.md §9: std sqrt(2)|Gs||Gl| (MC check 0.02827)
    assert abs(np.std(ratio, ddof=1) - sigma) < 5 * _sd_of_sample_std(sigma, m, 1.5)
    up, down = mismatch_limits_db(0.1, 0.2)
    assert db.max() <= up + 1e-12 and db.min() >= down - 1e-12
    # mean of log|1 + rho e^{j phi}| over the phase is exactly 0 (mean-value property of a
    # harmonic function) [D]; the dB value has std ~ u
    assert abs(db.mean()) < 5 * q.u / math.sqrt(m)


@pytest.mark.parametrize(
    "dist, kurtosis",
    [(Distribution.NORMAL, 3.0), (Distribution.RECTANGULAR, 9 / 5), (Distribution.U_SHAPED, 3 / 2)],
)
def test_sampled_distributions_have_the_stated_standard_uncertainty(dist, kurtosis):
    m, u = 200_000, 0.7
    q = InputQuantity(key="x", name="x", u=u, unit="dB", step=1e-4, value=3.0, distribution=dist)
    x = sample_input(q, np.random.default_rng(9), m)
    assert abs(np.std(x, ddof=1) - u) < 5 * _sd_of_sample_std(u, m, kurtosis)
    assert abs(np.mean(x) - 3.0) < 5 * u / math.sqrt(m)
    if dist is Distribution.RECTANGULAR:
        assert np.all(np.abs(x - 3.0) <= u * math.sqrt(3))
    if dist is Distribution.U_SHAPED:
        assert np.all(np.abs(x - 3.0) <= u * math.sqrt(2) + 1e-12)


def test_mismatch_terms_in_a_budget():
    cold = 1e-20
    refl = Reflections(source_hot=0.1, source_cold=0.08, dut_input=0.2)
    b = y_factor_budget(
        freq_hz=FREQ,
        hot_w_per_hz=cold * 30,
        cold_w_per_hz=cold,
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=UncertaintyInputs(),
        reflections=refl,
    )
    line = b.contribution("mismatch source / DUT input")
    # uncorrected, Tc = T0: NF = ENR_dB - 10log10(Y-1), the delivered ENR enters 1:1
    assert line.sensitivity == pytest.approx(1.0, abs=1e-7)
    assert line.u == pytest.approx(mismatch_standard_uncertainty_db(0.1, 0.2))  # larger Gamma
    assert line.distribution is Distribution.U_SHAPED
    inputs = UncertaintyInputs(source_hot_gamma=0.1, dut_input_gamma=0.2)
    assert inputs.reflections_at(FREQ).source == 0.1


def test_reflections_from_the_inputs_enter_every_mismatch_term():
    inputs = UncertaintyInputs(
        **SECTION9_INPUTS,
        source_hot_vswr=1.2,
        dut_input_gamma=0.15,
        dut_output_gamma=0.2,
        analyzer_input_gamma=0.25,
    )
    budget = _section9_budget(inputs)
    g_src = gamma_from_vswr(1.2)
    expected = {
        "mismatch source / DUT input": (g_src, 0.15),
        "mismatch source / analyzer (calibration)": (g_src, 0.25),
        "mismatch DUT output / analyzer": (0.2, 0.25),
    }
    for name, (gs, gl) in expected.items():
        assert budget.contribution(name).u == pytest.approx(
            mismatch_standard_uncertainty_db(gs, gl)
        ), name
    assert not budget.omitted
    # the source/DUT term acts on the delivered ENR: same sensitivity as the ENR itself,
    # minus the calibration part (the ENR error is shared, the mismatch is not)
    c_in = budget.contribution("mismatch source / DUT input").sensitivity
    c_cal = budget.contribution("mismatch source / analyzer (calibration)").sensitivity
    assert c_in + c_cal == pytest.approx(budget.contribution("ENR").sensitivity, rel=1e-7)
    base = _section9_budget(UncertaintyInputs(**SECTION9_INPUTS))
    assert budget.u_combined_db > base.u_combined_db


def test_touchstone_reflections_interpolate_magnitude(tmp_path):
    import skrf

    f = np.array([1e9, 2e9, 3e9])
    mag11 = np.array([0.1, 0.3, 0.2])
    phase = np.array([0.0, np.pi, 0.0])  # a phase flip: Cartesian interpolation would dip
    s = np.zeros((3, 2, 2), dtype=complex)
    s[:, 0, 0] = mag11 * np.exp(1j * phase)
    s[:, 1, 1] = 0.05
    s[:, 1, 0] = 10.0
    net = skrf.Network(frequency=skrf.Frequency.from_f(f, unit="hz"), s=s, z0=50)
    net.write_touchstone(str(tmp_path / "dut"))
    inputs = UncertaintyInputs(dut_touchstone="dut.s2p", analyzer_input_gamma=0.1)
    refl = inputs.reflections_at(1.5e9, base_dir=tmp_path)
    assert refl.dut_input == pytest.approx(0.2, abs=1e-9)  # linear in |S11| between samples
    assert refl.dut_output == pytest.approx(0.05, abs=1e-9)
    with pytest.raises(InputError, match="outside the file's range"):
        inputs.reflections_at(5e9, base_dir=tmp_path)
    with pytest.raises(InputError, match="cannot read"):
        UncertaintyInputs(dut_touchstone="missing.s2p").reflections_at(1e9, base_dir=tmp_path)
    with pytest.raises(InputError, match="dut_touchstone"):
        UncertaintyInputs.from_dict({"dut_touchstone": "dut.s2p", "dut_input_gamma": 0.1})


# --------------------------------------------------------------------------- Monte Carlo


def test_monte_carlo_is_reproducible_and_seeded_per_point():
    inputs = UncertaintyInputs(enr_db=0.1, method="monte_carlo", monte_carlo={"trials": 20_000})
    a = _section9_budget(inputs)
    b = _section9_budget(inputs)
    assert a.monte_carlo == b.monte_carlo
    d = _section5_densities()
    other = y_factor_budget(
        freq_hz=2e9,
        hot_w_per_hz=d["hot"],
        cold_w_per_hz=d["cold"],
        hot_cal_w_per_hz=d["hot_cal"],
        cold_cal_w_per_hz=d["cold_cal"],
        u_hot_w_per_hz=0.01 * d["hot"],
        u_cold_w_per_hz=0.01 * d["cold"],
        u_hot_cal_w_per_hz=0.01 * d["hot_cal"],
        u_cold_cal_w_per_hz=0.01 * d["cold_cal"],
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=inputs,
    )
    assert other.monte_carlo.seed != a.monte_carlo.seed
    assert other.monte_carlo.std != a.monte_carlo.std


def test_adaptive_monte_carlo_converges_in_whole_batches():
    qs = [InputQuantity(key="x", name="x", u=0.1, unit="dB", step=1e-4)]
    s = MonteCarloSettings(trials=10_000, seed=4, adaptive=True, significant_digits=2)
    res = propagate_monte_carlo(lambda x: x, qs, settings=s)
    assert res.converged is True and res.adaptive
    assert res.trials % 10_000 == 0 and res.trials >= 20_000
    # JCGM 101:2008 §7.9: delta = 1/2 * 10^l with u = 10 * 10^-2 (two digits) -> 0.005
    assert res.numerical_tolerance == pytest.approx(0.005)
    assert abs(res.std - 0.1) < 5 * _sd_of_sample_std(0.1, res.trials, 3.0)
    capped = propagate_monte_carlo(
        lambda x: x,
        qs,
        settings=MonteCarloSettings(
            trials=2000, adaptive=True, significant_digits=4, max_trials=6000
        ),
    )
    assert capped.converged is False and capped.trials == 6000


def test_gum_validation_flags_a_nonlinear_model():
    qs = [InputQuantity(key="x", name="x", u=0.5, unit="1", step=1e-4)]
    s = MonteCarloSettings(trials=100_000, seed=1)
    linear = propagate_monte_carlo(
        lambda x: 3 * x, qs, settings=s, gum=propagate_gum(lambda x: 3 * x, qs)
    )
    assert linear.gum_validated is True
    skewed = propagate_monte_carlo(
        lambda x: np.exp(x), qs, settings=s, gum=propagate_gum(lambda x: np.exp(x), qs)
    )
    assert skewed.gum_validated is False  # lognormal interval is far from 1 +/- 1.96*0.5


def test_monte_carlo_refuses_trials_without_a_noise_figure():
    cold = 1e-20
    with pytest.raises(MeasurementError, match="Monte Carlo trials"):
        y_factor_budget(
            freq_hz=FREQ,
            hot_w_per_hz=cold * 1.05,
            cold_w_per_hz=cold,
            u_hot_w_per_hz=0.05 * cold,
            u_cold_w_per_hz=0.05 * cold,
            enr_db=15.0,
            cold_temperature_k=T0,
            inputs=UncertaintyInputs(),
            method="monte_carlo",
        )


# --------------------------------------------------------------------------- refusals and output


def test_bad_inputs_are_refused_naming_the_field():
    cold = 1e-20
    base = dict(
        freq_hz=FREQ,
        hot_w_per_hz=cold * 10,
        cold_w_per_hz=cold,
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=UncertaintyInputs(),
    )
    y_factor_budget(**base)
    for key, bad, field in (
        ("hot_w_per_hz", -1.0, "hot_w_per_hz"),
        ("cold_w_per_hz", float("nan"), "cold_w_per_hz"),
        ("u_hot_w_per_hz", -1e-22, "u_hot_w_per_hz"),
        ("cold_temperature_k", 0.0, "cold_temperature_k"),
        ("freq_hz", 0.0, "freq_hz"),
        ("input_loss_db", -0.5, "input_loss_db"),
        ("enr_reference", "hot", "enr_reference"),
    ):
        with pytest.raises(InputError) as info:
            y_factor_budget(**{**base, key: bad})
        assert info.value.field == field
    with pytest.raises(MeasurementError, match="hot density <= cold"):
        y_factor_budget(**{**base, "hot_w_per_hz": cold})
    with pytest.raises(InputError, match="both hot and cold"):
        y_factor_budget(**base, hot_cal_w_per_hz=cold * 3)
    with pytest.raises(InputError, match="output_loss_db"):
        y_factor_budget(**base, output_loss_db=0.5)
    with pytest.raises(MeasurementError, match="floor"):
        gain_method_budget(
            freq_hz=FREQ,
            dut_w_per_hz=1e-21,
            floor_w_per_hz=1e-19,
            gain_db=20.0,
            inputs=UncertaintyInputs(),
        )


@pytest.mark.parametrize(
    "data, field",
    [
        ({"coverage_factor": -1}, "uncertainty.coverage_factor"),
        ({"dut_input_gamma": 1.2}, "uncertainty.dut_input_gamma"),
        ({"dut_input_vswr": 0.5}, "uncertainty.dut_input_vswr"),
        ({"enr_db": {"u": 0.1, "half_width": 0.2}}, "uncertainty.enr_db"),
        ({"enr_db": {"expanded": 0.2}}, "uncertainty.enr_db"),
        (
            {"linearity_db": {"half_width": 0.1, "distribution": "normal"}},
            "uncertainty.linearity_db",
        ),
        ({"monte_carlo": {"trials": 10}}, "uncertainty.monte_carlo"),
        ({"method": "bayes"}, "uncertainty.method"),
        ({"extra": [{"name": "", "uncertainty": 0.1}]}, "uncertainty.extra[0].name"),
        ({"enr": 0.1}, "uncertainty.enr"),
    ],
)
def test_bad_uncertainty_sections_name_the_key(data, field):
    with pytest.raises(InputError) as info:
        UncertaintyInputs.from_dict(data)
    assert info.value.field == field


def test_extra_terms_and_input_loss():
    cold = 1e-20
    inputs = UncertaintyInputs.from_dict(
        {
            "input_loss_db": 0.02,
            "extra": [
                {"name": "connector repeatability", "uncertainty": {"half_width": 0.03}},
                {"name": "drift", "uncertainty": 0.5, "unit": "K", "sensitivity": 0.01},
            ],
        }
    )
    b = y_factor_budget(
        freq_hz=FREQ,
        hot_w_per_hz=cold * 10,
        cold_w_per_hz=cold,
        enr_db=15.0,
        cold_temperature_k=T0,
        inputs=inputs,
        input_loss_db=1.0,
    )
    rep = b.contribution("connector repeatability")
    assert rep.u == pytest.approx(0.03 / math.sqrt(3)) and rep.sensitivity == pytest.approx(1.0)
    assert b.contribution("drift").contribution_db == pytest.approx(0.005, rel=1e-6)
    # docs/references.md §3: at Tp = T0 the de-embedded NF falls 1:1 with the assumed loss
    assert b.contribution("input loss").sensitivity == pytest.approx(-1.0, abs=1e-6)


def test_budget_dict_has_the_stored_shape():
    inputs = UncertaintyInputs(
        **SECTION9_INPUTS, method="monte_carlo", monte_carlo={"trials": 5000}
    )
    data = _section9_budget(inputs).to_dict()
    json.dumps(data, allow_nan=False)  # the run store refuses NaN
    assert {"freq_hz", "contributions", "u_combined_db", "k", "U_expanded_db", "method"} <= set(
        data
    )
    assert data["method"] == "monte_carlo" and data["freq_hz"] == FREQ
    line = data["contributions"][0]
    assert {"name", "u", "unit", "sensitivity", "contribution_db"} <= set(line)
    assert data["monte_carlo"]["trials"] == 5000
    gum = _section9_budget(UncertaintyInputs(**SECTION9_INPUTS)).to_dict()
    assert gum["method"] == "gum" and gum["monte_carlo"] is None
    assert gum["U_expanded_db"] == pytest.approx(2 * gum["u_combined_db"])
