"""Full uncertainty budgets of converter points, checked against independent propagation.

The budget (noisebench.science.uncertainty_converter) differentiates the converter method's own
model numerically. The checks here write the measurement model out again from the
multiple-response definitions (docs/references.md §17: IF noise k G_s (T_s + r T_i + Te_SSB),
T0-referenced ENR, matched losses T/L + Tp (1 - 1/L), Friis at the IF) and propagate with the
`uncertainties` package (automatic first derivatives, law of propagation of uncertainty of
JCGM 100:2008 §5.1.2 for independent inputs), and compare the Monte Carlo of JCGM 101:2008
(fixed seed) with the GUM value.
"""

from __future__ import annotations

import math

import pytest
import scipy.constants
from uncertainties import ufloat, umath

from noisebench.errors import InputError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import calibrate_point
from noisebench.science.methods.converter import (
    converter_gain_method_point,
    converter_y_factor_point,
)
from noisebench.science.uncertainty import budget_for_point
from noisebench.science.uncertainty_inputs import UncertaintyInputs

K = scipy.constants.k  # exact SI value (scipy.constants)
T0 = 290.0
RF, LO = 5.8e9, 5.1e9
IF = RF - LO
GS, IRR_DB, TE_SSB = 10 ** (9.5 / 10), 7.0, 620.0
T2, SCALE = 2600.0, 3.7e3
ENR_RF, ENR_IMAGE, ENR_IF = 14.8, 15.3, 15.9
TC, TC_CAL = 303.5, 299.0
L_RF_DB, L_IMAGE_DB, L_IF_DB, TP = 0.5, 0.4, 0.3, 296.0
U = dict(enr_rf=0.10, enr_image=0.12, enr_if=0.11, rej=0.5, tc=0.4, loss_in=0.03, loss_out=0.02)
REL_U = 0.002  # relative u of each density


def _lin(x_db):
    return 10 ** (x_db / 10)


def _through(t, loss_db):
    loss = 10 ** (loss_db / 10)
    return t / loss + TP * (1 - 1 / loss)


def _readings():
    """IF densities of the reference converter behind the losses (built from the definition)."""
    gi = GS * _lin(-IRR_DB)
    lout = _lin(L_IF_DB)

    def at_analyzer(t_s, t_i):
        t_out = GS * (_through(t_s, L_RF_DB) + TE_SSB) + gi * _through(t_i, L_IMAGE_DB)
        return SCALE * K * (t_out / lout + TP * (1 - 1 / lout) + T2)

    hot = at_analyzer(T0 * _lin(ENR_RF) + TC, T0 * _lin(ENR_IMAGE) + TC)
    cold = at_analyzer(TC, TC)
    return hot, cold, SCALE * K * (T0 * _lin(ENR_IF) + TC_CAL + T2), SCALE * K * (TC_CAL + T2)


def _density(n):
    return NoiseDensity(freq_hz=IF, density_w_per_hz=n, u_density_w_per_hz=REL_U * n)


def _y_point(nf_type="ssb"):
    hot, cold, hc, cc = _readings()
    cal = calibrate_point(
        _density(hc), _density(cc), ENR_IF, cold_temperature_k=TC_CAL, u_enr_db=U["enr_if"]
    )
    return converter_y_factor_point(
        _density(hot),
        _density(cold),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=ENR_RF,
        enr_image_db=ENR_IMAGE,
        cold_temperature_k=TC,
        image_rejection_db=IRR_DB,
        nf_type=nf_type,
        calibration=cal,
        u_enr_rf_db=U["enr_rf"],
        u_enr_image_db=U["enr_image"],
        u_image_rejection_db=U["rej"],
        input_loss_db=L_RF_DB,
        input_loss_image_db=L_IMAGE_DB,
        input_loss_temperature_k=TP,
        output_loss_db=L_IF_DB,
        output_loss_temperature_k=TP,
    )


INPUTS = UncertaintyInputs(
    cold_temperature_k=U["tc"], input_loss_db=U["loss_in"], output_loss_db=U["loss_out"]
)


def _independent_nf(nf_type):
    """The converter Y-factor model written out with `uncertainties` (JCGM 100:2008 §5.1.2)."""
    hot, cold, hc, cc = _readings()
    h, c = ufloat(hot, REL_U * hot), ufloat(cold, REL_U * cold)
    hcal, ccal = ufloat(hc, REL_U * hc), ufloat(cc, REL_U * cc)
    enr_rf, enr_img = ufloat(ENR_RF, U["enr_rf"]), ufloat(ENR_IMAGE, U["enr_image"])
    enr_if, rej = ufloat(ENR_IF, U["enr_if"]), ufloat(IRR_DB, U["rej"])
    tc = ufloat(TC, U["tc"])  # one source: its temperature error is common to the calibration
    tc_cal = tc + (TC_CAL - TC)
    d_in, d_out = ufloat(0.0, U["loss_in"]), ufloat(0.0, U["loss_out"])  # one cable at RF/image
    r = 10 ** (-rej / 10)

    def through(t, loss_db):
        loss = 10 ** (loss_db / 10)
        return t / loss + TP * (1 - 1 / loss)

    hot_in = through(T0 * 10 ** (enr_rf / 10) + tc, L_RF_DB + d_in) + r * through(
        T0 * 10 ** (enr_img / 10) + tc, L_IMAGE_DB + d_in
    )
    cold_in = through(tc, L_RF_DB + d_in) + r * through(tc, L_IMAGE_DB + d_in)
    y = h / c
    te12 = (hot_in - y * cold_in) / (y - 1)
    th_if = T0 * 10 ** (enr_if / 10) + tc_cal
    y2 = hcal / ccal
    te2 = (th_if - y2 * tc_cal) / (y2 - 1)
    g_path = ((h - c) / (hot_in - cold_in)) / ((hcal - ccal) / (th_if - tc_cal))
    lout = 10 ** ((L_IF_DB + d_out) / 10)
    te = te12 - te2 / g_path - (lout - 1) * TP / (g_path * lout)
    f_ssb = 1 + r + te / T0
    f = f_ssb if nf_type == "ssb" else f_ssb / (1 + r)
    return 10 * umath.log10(f)


@pytest.mark.parametrize("nf_type", ["ssb", "dsb"])
def test_converter_y_budget_matches_independent_first_order_propagation(nf_type):
    point = _y_point(nf_type)
    budget = budget_for_point(point, INPUTS)
    expected = _independent_nf(nf_type)
    # reference: JCGM 100:2008 §5.1.2 via the `uncertainties` package (analytic derivatives);
    # the budget's central differences agree to their truncation error
    assert budget.nf_db == pytest.approx(expected.nominal_value, abs=1e-9)
    assert budget.nf_db == pytest.approx(point.nf_db, abs=1e-12)
    assert budget.u_combined_db == pytest.approx(expected.std_dev, rel=1e-7)
    names = {c.name for c in budget.contributions}
    for term in (
        "ENR at the RF",
        "ENR at the image",
        "ENR at the IF (calibration)",
        "image rejection",
        "input loss (RF and image)",
        "output loss (IF)",
    ):
        assert term in names
    assert budget.model == "converter_y_factor"
    assert budget.u_combined_db > point.u_nf_db + 0.05  # more than the statistical part


def test_converter_y_budget_monte_carlo_agrees_with_the_gum():
    point = _y_point("ssb")
    gum = budget_for_point(point, INPUTS)
    mc = budget_for_point(point, INPUTS, method="monte_carlo")
    assert mc.monte_carlo is not None
    trials = mc.monte_carlo.trials
    # JCGM 101:2008 with a fixed seed: the MC standard deviation of a nearly linear model lies
    # within the sampling error of a standard deviation, u/sqrt(2M), of the GUM value (5 sigma
    # plus 1 % for the model's curvature over +/- 2u)
    tol = 5 * gum.u_combined_db / math.sqrt(2 * trials) + 0.01 * gum.u_combined_db
    assert mc.u_combined_db == pytest.approx(gum.u_combined_db, abs=tol)
    assert mc.gum_u_combined_db == pytest.approx(gum.u_combined_db, rel=1e-12)


def test_converter_gain_method_budget_matches_independent_propagation():
    gi = GS * _lin(-IRR_DB)
    g_db, u_g = 9.5, 0.15
    t_term = TC
    floor = K * (t_term + T2)
    dut = K * (GS * (TC + TE_SSB) + gi * TC + T2)
    point = converter_gain_method_point(
        _density(dut),
        g_db,
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=IRR_DB,
        floor=_density(floor),
        u_gain_db=u_g,
        u_image_rejection_db=U["rej"],
        source_temperature_k=TC,
    )
    assert point.conversion is not None
    assert point.conversion.te_ssb_k == pytest.approx(TE_SSB, rel=1e-9)
    budget = budget_for_point(point, UncertaintyInputs(cold_temperature_k=U["tc"]))
    # independent: eq. (6) with `uncertainties` (JCGM 100:2008 §5.1.2)
    n = ufloat(dut, REL_U * dut)
    nf_ = ufloat(floor, REL_U * floor)
    g = 10 ** (ufloat(g_db, u_g) / 10)
    r = 10 ** (-ufloat(IRR_DB, U["rej"]) / 10)
    tc = ufloat(TC, U["tc"])  # source and floor termination: the same load
    te = (n - nf_ + K * tc) / (K * g) - (tc + r * tc)
    expected = 10 * umath.log10(1 + r + te / T0)
    assert budget.nf_db == pytest.approx(expected.nominal_value, abs=1e-9)
    assert budget.u_combined_db == pytest.approx(expected.std_dev, rel=1e-7)
    assert budget.model == "converter_gain"


def test_converter_point_without_stored_densities_is_refused_with_the_field():
    point = _y_point("ssb").model_copy(update={"densities_w_per_hz": {}})
    with pytest.raises(InputError, match="point"):
        budget_for_point(point, INPUTS)
