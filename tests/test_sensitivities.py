"""Analytic sensitivities of the point functions (docs/references.md §20), checked three ways.

1. Every ``physics.*_partials`` kernel against central differences of its own kernel, over
   hypothesis-generated arguments; the tolerance is the central difference's own error bound
   (relative 1e-6 on the derivative, plus the rounding floor 8 eps |f| / step).
2. Every point function's signed NF contributions, u_nf_db, u_te_k and u_gain_db against the
   numerical propagation the point functions used before (``tests/_numeric_propagation.py``),
   applied to the PUBLIC array forms (``y_factor_sweep``, ``converter_*_sweep``,
   ``gain_method_te_k`` + the checked loss de-embedding), which share no derivative code with
   the point functions: agreement to 1e-6 relative over hypothesis-generated benches.
3. The same contributions against the ``uncertainties`` package (3.2.x; automatic first
   derivatives, the law of propagation of JCGM 100:2008 §5.1.2) on the measurement models
   written out again here from their definitions (docs/references.md §4, §5, §17).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants
from _numeric_propagation import contributions, numeric_sensitivities
from hypothesis import given, settings
from hypothesis import strategies as st
from uncertainties import ufloat, umath

from noisebench.errors import InputError, MeasurementError, YNotSignificantError
from noisebench.science import physics as ph
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import (
    calibrate_point,
    gain_method_point,
    gain_method_te_k,
    y_factor_point,
    y_factor_sweep,
)
from noisebench.science.methods.converter import (
    converter_gain_method_point,
    converter_gain_method_sweep,
    converter_y_factor_point,
    converter_y_factor_sweep,
)
from noisebench.science.point import Method, PointResult

K = scipy.constants.k  # exact SI value (scipy.constants)
T0 = 290.0
EPS = float(np.finfo(float).eps)
AGREE = 1e-6  # relative agreement asked of the analytic propagation (issue 17)
RF, LO = 5.8e9, 5.1e9  # converter plan: IF 0.7 GHz, image 4.4 GHz
DB_SCALES = dict.fromkeys(
    ["g_path_db", "g_db", "rej", "enr", "enr_cal", "enr_rf", "enr_img", "enr_if"], 1.0
)
"""Inputs in dB: the numerical step is at least 1e-6 dB (see numeric_sensitivities)."""

# an input drawn with u = 0 is a constant to the uncertainties package, which warns about it
pytestmark = pytest.mark.filterwarnings("ignore:Using UFloat objects with std_dev==0")


def _f(lo: float, hi: float) -> st.SearchStrategy[float]:
    return st.floats(lo, hi, allow_nan=False, allow_infinity=False, allow_subnormal=False)


def _lin(x_db: float) -> float:
    return 10 ** (x_db / 10)


def _density(n: float, rel_u: float, freq_hz: float = 1e9) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=n, u_density_w_per_hz=rel_u * n)


def _assert_agree(analytic: dict[str, float], reference: dict[str, float], rel: float = AGREE):
    """Signed contributions agree to ``rel`` of the combined uncertainty they make up (an input
    whose contribution is negligible need not match to more digits than it adds to u)."""
    assert set(analytic) == set(reference)
    scale = math.sqrt(sum(v * v for v in reference.values()))
    for name, ref in reference.items():
        assert abs(analytic[name] - ref) <= rel * scale + 1e-300, (name, analytic, reference)


# --------------------------------------------------------------------------- 1. kernels

_KERNELS = {
    "ratio_from_db": (
        ph.ratio_from_db,
        lambda db: (ph.ratio_from_db_slope(db),),
        [(-30, 40)],
    ),
    "db_from_ratio": (ph.db_from_ratio, lambda x: (ph.db_from_ratio_slope(x),), [(1e-3, 1e4)]),
    "nf_db_from_te_k": (
        ph.nf_db_from_te_k,
        lambda te: (ph.nf_db_from_te_k_slope(te),),
        [(-200, 1e5)],
    ),
    "source_hot_temperature_k t0": (
        lambda e, tc: ph.source_hot_temperature_k(e, tc, T0, "t0"),
        lambda e, tc: ph.source_hot_temperature_partials(e, tc, T0, "t0"),
        [(1, 1e3), (4, 400)],
    ),
    "source_hot_temperature_k absolute": (
        lambda e, tc: ph.source_hot_temperature_k(e, tc, T0, "absolute"),
        lambda e, tc: ph.source_hot_temperature_partials(e, tc, T0, "absolute"),
        [(1, 1e3), (4, 400)],
    ),
    "te_k_from_y": (
        ph.te_k_from_y,
        ph.te_k_from_y_partials,
        [(1.05, 100), (300, 3e4), (4, 400)],
    ),
    "gain_from_hot_cold": (
        ph.gain_from_hot_cold,
        ph.gain_from_hot_cold_partials,
        [(2, 10), (0.5, 1.5), (5e3, 2e4), (4, 400)] * 2,
    ),
    "second_stage_corrected_te_k": (
        ph.second_stage_corrected_te_k,
        ph.second_stage_corrected_te_k_partials,
        [(0, 1e4), (0, 1e4), (1, 1e4)],
    ),
    "floor_corrected_density_w_per_hz": (
        ph.floor_corrected_density_w_per_hz,
        ph.floor_corrected_density_partials,
        [(1e-21, 1e-18), (1e-21, 1e-18), (4, 400)],
    ),
    "te_k_from_output_density": (
        ph.te_k_from_output_density,
        ph.te_k_from_output_density_partials,
        [(1e-21, 1e-17), (1, 1e4), (4, 400)],
    ),
    "deembed_path_te_k": (
        lambda *a: ph.deembed_path_te_k(*a)[0],
        ph.deembed_path_te_k_partials,
        [(0, 1e4), (0.1, 1e4), (1, 10), (4, 400), (1, 10), (4, 400)],
    ),
    "loss_output_temperature_k": (
        ph.loss_output_temperature_k,
        ph.loss_output_temperature_partials,
        [(0, 1e4), (1, 10), (4, 400)],
    ),
    "two_response_temperature_k": (
        ph.two_response_temperature_k,
        ph.two_response_temperature_partials,
        [(0, 1e4), (0, 1e4), (0, 2)],
    ),
    "ssb_factor_from_te_k": (
        lambda te, r: ph.ssb_factor_from_te_k(te, r, T0),
        lambda te, r: ph.ssb_factor_from_te_k_partials(te, r, T0),
        [(0, 1e4), (0, 2)],
    ),
    "dsb_from_ssb": (ph.dsb_from_ssb, ph.dsb_from_ssb_partials, [(0.1, 1e4), (0, 2)]),
}


@pytest.mark.parametrize("name", sorted(_KERNELS))
@settings(max_examples=60)
@given(data=st.data())
def test_every_partials_kernel_matches_central_differences_of_its_kernel(name, data):
    kernel, partials, ranges = _KERNELS[name]
    args = [data.draw(_f(lo, hi)) for lo, hi in ranges]
    analytic = [float(p) for p in partials(*args)]
    assert len(analytic) == len(args)
    for i, x in enumerate(args):
        # relative step; for a range that holds 0, not below 1e-9 of the range: near x = 0 the
        # function's own intermediate values (the 1 in 1 + Te/T0) set the rounding, not x
        lo, hi = ranges[i]
        step = 1e-6 * max(abs(x), 1e-3 * hi if lo <= 0 else 0.0)
        up, down = list(args), list(args)
        up[i], down[i] = x + step, x - step
        f_up, f_down = float(kernel(*up)), float(kernel(*down))
        numeric = (f_up - f_down) / (2 * step)
        # central difference: truncation ~ step^2 (~1e-12 relative here), rounding 8 eps |f|/step
        rounding = 8 * EPS * max(abs(f_up), abs(f_down)) / step
        assert abs(analytic[i] - numeric) <= AGREE * abs(numeric) + rounding, (name, i, args)


def test_partials_kernels_take_arrays_like_their_kernels():
    te = np.array([100.0, 200.0, 300.0])
    d_te, d_g, d_lin, d_tp, d_lout, d_tpo = ph.deembed_path_te_k_partials(
        te, 100.0, 1.5, 290.0, 1.2, 290.0
    )
    assert np.shape(d_lin) == (3,)  # the one partial that depends on Te_path
    np.testing.assert_allclose(d_te, 1 / 1.5)  # Te_DUT = Te_path / L_in - ... (§20)
    np.testing.assert_allclose(d_lin, -(te + 290.0) / 1.5**2 + 0.2 * 290.0 / (100 * 1.5**2 * 1.2))
    th_partials = ph.source_hot_temperature_partials(np.array([10.0, 20.0]), 296.0, T0, "t0")
    np.testing.assert_array_equal(th_partials[0], [T0, T0])
    np.testing.assert_array_equal(th_partials[1], [1.0, 1.0])


# --------------------------------------------------------------------------- benches


@st.composite
def gain_benches(draw):
    return {
        "ts": draw(_f(250, 350)),
        "t_term": draw(_f(250, 350)),
        "te": draw(_f(20, 3000)),
        "g_db": draw(_f(10, 40)),
        "nf_sa_db": draw(_f(5, 25)),
        "lin_db": draw(_f(0, 3)),
        "lout_db": draw(_f(0, 3)),
        "tp_in": draw(_f(250, 350)),
        "tp_out": draw(_f(250, 350)),
        "rel_u": draw(_f(1e-4, 0.05)),
        "u_gain": draw(_f(0, 0.3)),
        "floor": draw(st.booleans()),
        "includes": draw(st.booleans()),
    }


def _through(t, loss_db, tp):
    """Matched loss at physical temperature tp: T/L + Tp (1 - 1/L) (docs/references.md §3)."""
    loss = _lin(loss_db)
    return t / loss + tp * (1 - 1 / loss)


def _gain_readings(b):
    te_sa = T0 * (_lin(b["nf_sa_db"]) - 1)
    t_dut_in = _through(b["ts"], b["lin_db"], b["tp_in"])
    t_out = _through(_lin(b["g_db"]) * (t_dut_in + b["te"]), b["lout_db"], b["tp_out"])
    return K * (t_out + te_sa), K * (b["t_term"] + te_sa)


def _gain_point(b):
    n_m, n_f = _gain_readings(b)
    gain_db = b["g_db"] - (b["lin_db"] + b["lout_db"] if b["includes"] else 0.0)
    return gain_method_point(
        _density(n_m, b["rel_u"]),
        gain_db,
        floor=_density(n_f, b["rel_u"]) if b["floor"] else None,
        u_gain_db=b["u_gain"],
        source_temperature_k=b["ts"],
        floor_temperature_k=b["t_term"],
        input_loss_db=b["lin_db"],
        input_loss_temperature_k=b["tp_in"],
        output_loss_db=b["lout_db"],
        output_loss_temperature_k=b["tp_out"],
        gain_includes_losses=b["includes"],
    )


@st.composite
def y_benches(draw):
    calibrated = draw(st.booleans())
    enr_db = draw(_f(5, 25))
    return {
        "ref": draw(st.sampled_from(["t0", "absolute"])),
        "tc": draw(_f(250, 350)),
        "tc_cal": draw(_f(250, 350)),
        "enr_db": enr_db,
        "enr_cal_db": enr_db if draw(st.booleans()) else enr_db + draw(_f(-1, 1)),
        "te": draw(_f(20, 3000)),
        "g_db": draw(_f(10, 40)),
        "nf2_db": draw(_f(5, 25)),
        "lin_db": draw(_f(0, 3)),
        "lout_db": draw(_f(0, 3)) if calibrated else 0.0,
        "tp_in": draw(_f(250, 350)),
        "tp_out": draw(_f(250, 350)),
        "rel_u": draw(_f(1e-4, 0.05)),
        "u_enr": draw(_f(0, 0.3)),
        "u_enr_cal": draw(_f(0, 0.3)),
        "calibrated": calibrated,
    }


def _th(enr_db, tc, ref):
    """Hot temperature from the ENR (docs/references.md §5)."""
    return T0 * _lin(enr_db) + tc if ref == "t0" else T0 * (_lin(enr_db) + 1)


def _y_readings(b):
    te2 = T0 * (_lin(b["nf2_db"]) - 1)

    def at_analyzer(t_source):
        t_dut_in = _through(t_source, b["lin_db"], b["tp_in"])
        return K * (
            _through(_lin(b["g_db"]) * (t_dut_in + b["te"]), b["lout_db"], b["tp_out"]) + te2
        )

    th_cal = _th(b["enr_cal_db"], b["tc_cal"], b["ref"])
    return (
        at_analyzer(_th(b["enr_db"], b["tc"], b["ref"])),
        at_analyzer(b["tc"]),
        K * (th_cal + te2),
        K * (b["tc_cal"] + te2),
    )


def _y_point(b):
    h, c, hc, cc = _y_readings(b)
    cal = None
    if b["calibrated"]:
        cal = calibrate_point(
            _density(hc, b["rel_u"]),
            _density(cc, b["rel_u"]),
            b["enr_cal_db"],
            cold_temperature_k=b["tc_cal"],
            u_enr_db=b["u_enr_cal"],
            enr_reference=b["ref"],
            require_significant_y=False,
        )
    return y_factor_point(
        _density(h, b["rel_u"]),
        _density(c, b["rel_u"]),
        b["enr_db"],
        cold_temperature_k=b["tc"],
        calibration=cal,
        u_enr_db=b["u_enr"],
        enr_reference=b["ref"],
        input_loss_db=b["lin_db"],
        input_loss_temperature_k=b["tp_in"],
        output_loss_db=b["lout_db"],
        output_loss_temperature_k=b["tp_out"],
        # the math over the whole range: the planner (forecast, averaging loops) evaluates it
        # on pairs the measurement would refuse as not significant (Y within 4 u(Y) of 1)
        require_significant_y=False,
    )


@st.composite
def converter_benches(draw):
    calibrated = draw(st.booleans())
    image = draw(st.booleans())
    return {
        "gs_db": draw(_f(0, 25)),
        "irr_db": draw(_f(0, 30)) if image else None,
        "te_ssb": draw(_f(100, 3000)),
        "t2": draw(_f(300, 5000)),
        "enr_rf": draw(_f(10, 20)),
        "enr_img": draw(_f(10, 20)),
        "enr_if": draw(_f(10, 20)),
        "tc": draw(_f(250, 350)),
        "tc_cal": draw(_f(250, 350)),
        "ts": draw(_f(250, 350)),
        "t_term": draw(_f(250, 350)),
        "l_rf": draw(_f(0, 2)),
        "l_img": draw(_f(0, 2)),
        "l_if": draw(_f(0, 2)) if calibrated else 0.0,
        "tp": draw(_f(250, 350)),
        "rel_u": draw(_f(1e-4, 0.03)),
        "u_enr_rf": draw(_f(0, 0.3)),
        "u_enr_img": draw(_f(0, 0.3)),
        "u_enr_if": draw(_f(0, 0.3)),
        "u_rej": draw(_f(0, 1)),
        "u_gain": draw(_f(0, 0.3)),
        "nf_type": draw(st.sampled_from(["ssb", "dsb"])),
        "calibrated": calibrated,
        "floor": draw(st.booleans()),
    }


def _r(b):
    return 0.0 if b["irr_db"] is None else _lin(-b["irr_db"])


def _converter_if_density(b, t_s, t_i):
    """IF density k G_s (T_s' + r T_i' + Te_SSB) behind the losses (docs/references.md §17)."""
    gs = _lin(b["gs_db"])
    t_in = _through(t_s, b["l_rf"], b["tp"]) + _r(b) * _through(t_i, b["l_img"], b["tp"])
    return K * (_through(gs * (t_in + b["te_ssb"]), b["l_if"], b["tp"]) + b["t2"])


def _converter_losses(b):
    return {
        "input_loss_db": b["l_rf"],
        "input_loss_image_db": b["l_img"],
        "input_loss_temperature_k": b["tp"],
        "output_loss_db": b["l_if"],
        "output_loss_temperature_k": b["tp"],
    }


def _converter_y_point(b):
    th_s, th_i = T0 * _lin(b["enr_rf"]) + b["tc"], T0 * _lin(b["enr_img"]) + b["tc"]
    hot = _converter_if_density(b, th_s, th_i)
    cold = _converter_if_density(b, b["tc"], b["tc"])
    cal = None
    if b["calibrated"]:
        cal = calibrate_point(
            _density(K * (T0 * _lin(b["enr_if"]) + b["tc_cal"] + b["t2"]), b["rel_u"], 0.7e9),
            _density(K * (b["tc_cal"] + b["t2"]), b["rel_u"], 0.7e9),
            b["enr_if"],
            cold_temperature_k=b["tc_cal"],
            u_enr_db=b["u_enr_if"],
        )
    return converter_y_factor_point(
        _density(hot, b["rel_u"], 0.7e9),
        _density(cold, b["rel_u"], 0.7e9),
        rf_hz=RF,
        lo_hz=LO,
        enr_rf_db=b["enr_rf"],
        enr_image_db=b["enr_img"],
        cold_temperature_k=b["tc"],
        image_rejection_db=b["irr_db"],
        nf_type=b["nf_type"],
        calibration=cal,
        u_enr_rf_db=b["u_enr_rf"],
        u_enr_image_db=b["u_enr_img"],
        u_image_rejection_db=b["u_rej"],
        **_converter_losses(b),
    )


def _converter_gain_point(b):
    n = _converter_if_density(b, b["ts"], b["ts"])
    return converter_gain_method_point(
        _density(n, b["rel_u"], 0.7e9),
        b["gs_db"],
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=b["irr_db"],
        nf_type=b["nf_type"],
        floor=_density(K * (b["t_term"] + b["t2"]), b["rel_u"], 0.7e9) if b["floor"] else None,
        u_gain_db=b["u_gain"],
        u_image_rejection_db=b["u_rej"],
        source_temperature_k=b["ts"],
        floor_temperature_k=b["t_term"],
        **_converter_losses(b),
    )


def _nf_db(te_k):
    return 10 * math.log10(1 + te_k / T0)


# --------------------------------------------------------------------------- 2. numerical


@settings(max_examples=120)
@given(b=gain_benches())
def test_gain_method_point_matches_numerical_propagation_of_the_public_forms(b):
    p = _gain_point(b)
    n_m, n_f = _gain_readings(b)
    lin, lout = _lin(b["lin_db"]), _lin(b["lout_db"])

    def model(n_meas, n_floor, g_path_db):
        g = _lin(g_path_db)
        te_path = gain_method_te_k(
            n_meas,
            g,
            n_floor_w_per_hz=n_floor if b["floor"] else None,
            source_temperature_k=b["ts"],
            floor_temperature_k=b["t_term"],
        )
        # [L_in, DUT, L_out]: the checked public de-embedding, input side then output side
        te_behind_input = ph.deembed_input_loss_te_k(te_path, lin, b["tp_in"])
        te = ph.deembed_output_loss_te_k(te_behind_input, g * lin * lout, lout, b["tp_out"])
        return {"nf": _nf_db(te), "te": te}

    values = {"n_meas": n_m, "n_floor": n_f, "g_path_db": b["g_db"] - b["lin_db"] - b["lout_db"]}
    names = ["n_meas"] + (["n_floor"] if b["floor"] else []) + ["g_path_db"]
    u = {"n_meas": b["rel_u"] * n_m, "n_floor": b["rel_u"] * n_f, "g_path_db": b["u_gain"]}
    sens = numeric_sensitivities(model, values, {k: u[k] for k in names}, DB_SCALES)
    label = {"n_meas": "dut", "n_floor": "floor", "g_path_db": "gain"}
    ref = {label[k]: v for k, v in contributions(sens["nf"], {k: u[k] for k in names}).items()}
    _assert_agree(p.notes["u_nf_db_contributions"], ref)
    stat = [k for k in names if k != "g_path_db"]
    u_te = math.hypot(*contributions(sens["te"], {k: u[k] for k in stat}).values())
    assert p.u_te_k == pytest.approx(u_te, rel=AGREE)
    assert p.u_nf_db == pytest.approx(math.hypot(*(ref[label[k]] for k in stat)), rel=AGREE)


def _y_model(b, shared):
    def model(h, c, hc, cc, enr, enr_cal):
        cal = {}
        if b["calibrated"]:
            cal = {
                "hot_cal_w_per_hz": hc,
                "cold_cal_w_per_hz": cc,
                "cal_enr_db": enr if shared else enr_cal,
                "cal_cold_temperature_k": b["tc_cal"],
            }
        sweep = y_factor_sweep(
            h,
            c,
            enr,
            cold_temperature_k=b["tc"],
            enr_reference=b["ref"],
            input_loss_db=b["lin_db"],
            input_loss_temperature_k=b["tp_in"],
            output_loss_db=b["lout_db"],
            output_loss_temperature_k=b["tp_out"],
            **cal,
        )
        out = {"nf": float(sweep.nf_db)}
        if sweep.gain_db is not None:
            out["gain"] = float(sweep.gain_db)
        return out

    return model


@settings(max_examples=120)
@given(b=y_benches())
def test_y_factor_point_matches_numerical_propagation_of_the_sweep_form(b):
    p = _y_point(b)
    h, c, hc, cc = _y_readings(b)
    shared = not b["calibrated"] or b["enr_cal_db"] == b["enr_db"]
    values = {"h": h, "c": c, "hc": hc, "cc": cc, "enr": b["enr_db"], "enr_cal": b["enr_cal_db"]}
    stat = ["h", "c"] + (["hc", "cc"] if b["calibrated"] else [])
    names = stat + ["enr"] + ([] if shared else ["enr_cal"])
    u = {k: b["rel_u"] * values[k] for k in stat} | {"enr": b["u_enr"], "enr_cal": b["u_enr_cal"]}
    sens = numeric_sensitivities(_y_model(b, shared), values, {k: u[k] for k in names}, DB_SCALES)
    label = dict(h="hot", c="cold", hc="hot_cal", cc="cold_cal", enr="enr", enr_cal="enr_cal")
    ref = {label[k]: v for k, v in contributions(sens["nf"], {k: u[k] for k in names}).items()}
    _assert_agree(p.notes["u_nf_db_contributions"], ref)
    assert p.u_nf_db == pytest.approx(math.hypot(*(ref[label[k]] for k in stat)), rel=AGREE)
    if b["calibrated"]:
        u_gain = math.hypot(*contributions(sens["gain"], {k: u[k] for k in stat}).values())
        assert p.u_gain_db == pytest.approx(u_gain, rel=AGREE)


@settings(max_examples=60)
@given(b=y_benches())
def test_calibrate_point_matches_numerical_propagation_of_the_sweep_form(b):
    _, _, hc, cc = _y_readings(b)
    cal = calibrate_point(
        _density(hc, b["rel_u"]),
        _density(cc, b["rel_u"]),
        b["enr_cal_db"],
        cold_temperature_k=b["tc_cal"],
        enr_reference=b["ref"],
        require_significant_y=False,
    )

    def model(h, c):
        te = y_factor_sweep(
            h, c, b["enr_cal_db"], cold_temperature_k=b["tc_cal"], enr_reference=b["ref"]
        ).te_k
        return {"te": float(te)}

    u_in = {"h": b["rel_u"] * hc, "c": b["rel_u"] * cc}
    sens = numeric_sensitivities(model, {"h": hc, "c": cc}, u_in)["te"]
    u = math.hypot(*contributions(sens, u_in).values())
    assert cal.u_te_k == pytest.approx(u, rel=AGREE)


_CONVERTER_LABELS = {
    "h": "hot",
    "c": "cold",
    "hc": "hot_cal",
    "cc": "cold_cal",
    "enr_rf": "enr",
    "enr_img": "enr_image",
    "enr_if": "enr_cal",
    "rej": "image_rejection",
    "n_meas": "dut",
    "n_floor": "floor",
    "g_db": "gain",
}


@settings(max_examples=120)
@given(b=converter_benches())
def test_converter_y_factor_point_matches_numerical_propagation_of_the_sweep_form(b):
    p = _converter_y_point(b)
    dens = {
        k: p.densities_w_per_hz[v]
        for k, v in _CONVERTER_LABELS.items()
        if v in p.densities_w_per_hz
    }
    image = b["irr_db"] is not None

    def model(h, c, hc, cc, enr_rf, enr_img, enr_if, rej):
        cal = {}
        if b["calibrated"]:
            cal = {
                "hot_cal_w_per_hz": hc,
                "cold_cal_w_per_hz": cc,
                "cal_if_enr_db": enr_if,
                "cal_cold_temperature_k": b["tc_cal"],
            }
        sweep = converter_y_factor_sweep(
            h,
            c,
            enr_rf,
            enr_img,
            cold_temperature_k=b["tc"],
            image_rejection_db=rej if image else None,
            **_converter_losses(b),
            **cal,
        )
        out = {"nf": float(sweep.nf_ssb_db if b["nf_type"] == "ssb" else sweep.nf_dsb_db)}
        if sweep.gain_db is not None:
            out["gain"] = float(sweep.gain_db)
        return out

    values = dens | {
        "hc": dens.get("hc", 1.0),
        "cc": dens.get("cc", 1.0),
        "enr_rf": b["enr_rf"],
        "enr_img": b["enr_img"],
        "enr_if": b["enr_if"],
        "rej": b["irr_db"] if image else 0.0,
    }
    stat = ["h", "c"] + (["hc", "cc"] if b["calibrated"] else [])
    names = (
        stat
        + ["enr_rf"]
        + (["enr_img", "rej"] if image else [])
        + (["enr_if"] if b["calibrated"] else [])
    )
    u = {k: b["rel_u"] * values[k] for k in stat} | {
        "enr_rf": b["u_enr_rf"],
        "enr_img": b["u_enr_img"],
        "rej": b["u_rej"],
        "enr_if": b["u_enr_if"],
    }
    sens = numeric_sensitivities(model, values, {k: u[k] for k in names}, DB_SCALES)
    ref = {
        _CONVERTER_LABELS[k]: v
        for k, v in contributions(sens["nf"], {k: u[k] for k in names}).items()
    }
    _assert_agree(p.notes["u_nf_db_contributions"], ref)
    assert p.u_nf_db == pytest.approx(
        math.hypot(*(ref[_CONVERTER_LABELS[k]] for k in stat)), rel=AGREE
    )
    if b["calibrated"]:
        g_ref = {
            _CONVERTER_LABELS[k]: v
            for k, v in contributions(sens["gain"], {k: u[k] for k in names}).items()
        }
        _assert_agree(p.notes["u_gain_db_contributions"], g_ref)


@settings(max_examples=120)
@given(b=converter_benches())
def test_converter_gain_method_point_matches_numerical_propagation_of_the_sweep_form(b):
    p = _converter_gain_point(b)
    image = b["irr_db"] is not None

    def model(n_meas, n_floor, g_db, rej):
        sweep = converter_gain_method_sweep(
            n_meas,
            g_db,
            image_rejection_db=rej if image else None,
            n_floor_w_per_hz=n_floor if b["floor"] else None,
            source_temperature_k=b["ts"],
            floor_temperature_k=b["t_term"],
            **_converter_losses(b),
        )
        return {"nf": float(sweep.nf_ssb_db if b["nf_type"] == "ssb" else sweep.nf_dsb_db)}

    n_m = p.densities_w_per_hz["dut"]
    n_f = K * (b["t_term"] + b["t2"])
    values = {"n_meas": n_m, "n_floor": n_f, "g_db": b["gs_db"], "rej": b["irr_db"] or 0.0}
    stat = ["n_meas"] + (["n_floor"] if b["floor"] else [])
    names = stat + ["g_db"] + (["rej"] if image else [])
    u = {"n_meas": b["rel_u"] * n_m, "n_floor": b["rel_u"] * n_f}
    u |= {"g_db": b["u_gain"], "rej": b["u_rej"]}
    sens = numeric_sensitivities(model, values, {k: u[k] for k in names}, DB_SCALES)
    ref = {
        _CONVERTER_LABELS[k]: v
        for k, v in contributions(sens["nf"], {k: u[k] for k in names}).items()
    }
    _assert_agree(p.notes["u_nf_db_contributions"], ref)


# --------------------------------------------------------------------------- 3. uncertainties


def _ulin(x_db):
    return 10 ** (x_db / 10)


def _unf(te):
    return 10 * umath.log10(1 + te / T0)


def _signed(result, inputs: dict[str, object]) -> dict[str, float]:
    """Signed contributions dNF/dx * u(x) from the uncertainties package's derivatives."""
    return {name: result.derivatives[var] * var.std_dev for name, var in inputs.items()}


@settings(max_examples=60)
@given(b=gain_benches())
def test_gain_method_contributions_match_the_uncertainties_package(b):
    p = _gain_point(b)
    n_m_val, n_f_val = _gain_readings(b)
    n_m = ufloat(n_m_val, b["rel_u"] * n_m_val)
    n_f = ufloat(n_f_val, b["rel_u"] * n_f_val)
    g_path_db = ufloat(b["g_db"] - b["lin_db"] - b["lout_db"], b["u_gain"])
    lin, lout = _lin(b["lin_db"]), _lin(b["lout_db"])
    g_path = _ulin(g_path_db)
    # docs/references.md §4: N_DUT = N_m - N_f + k T_term, Te = N_DUT/(k G) - Ts; then §3
    n_dut = n_m - n_f + K * b["t_term"] if b["floor"] else n_m
    te_path = n_dut / (K * g_path) - b["ts"]
    te = (te_path - (lin - 1) * b["tp_in"]) / lin - (lout - 1) * b["tp_out"] / (g_path * lin * lout)
    nf = _unf(te)
    assert p.nf_db == pytest.approx(nf.nominal_value, abs=1e-9)
    inputs = {"dut": n_m, "gain": g_path_db} | ({"floor": n_f} if b["floor"] else {})
    _assert_agree(p.notes["u_nf_db_contributions"], _signed(nf, inputs))


@settings(max_examples=60)
@given(b=y_benches())
def test_y_factor_contributions_match_the_uncertainties_package(b):
    p = _y_point(b)
    vals = _y_readings(b)
    h, c, hc, cc = (ufloat(v, b["rel_u"] * v) for v in vals)
    shared = not b["calibrated"] or b["enr_cal_db"] == b["enr_db"]
    enr = ufloat(b["enr_db"], b["u_enr"])
    enr_cal = enr if shared else ufloat(b["enr_cal_db"], b["u_enr_cal"])
    lin, lout = _lin(b["lin_db"]), _lin(b["lout_db"])

    def th(e, tc):  # docs/references.md §5
        return T0 * _ulin(e) + tc if b["ref"] == "t0" else T0 * (_ulin(e) + 1)

    y = h / c
    th_m = th(enr, b["tc"])
    te12 = (th_m - y * b["tc"]) / (y - 1)
    inputs = {"hot": h, "cold": c, "enr": enr}
    if b["calibrated"]:
        y2 = hc / cc
        th_c = th(enr_cal, b["tc_cal"])
        te2 = (th_c - y2 * b["tc_cal"]) / (y2 - 1)
        g1 = ((h - c) / (th_m - b["tc"])) / ((hc - cc) / (th_c - b["tc_cal"]))
        te1 = te12 - te2 / g1  # Friis
        inputs |= {"hot_cal": hc, "cold_cal": cc} | ({} if shared else {"enr_cal": enr_cal})
    else:
        te1, g1 = te12, 1.0
    te = (te1 - (lin - 1) * b["tp_in"]) / lin - (lout - 1) * b["tp_out"] / (g1 * lin * lout)
    nf = _unf(te)
    assert p.nf_db == pytest.approx(nf.nominal_value, abs=1e-9)
    _assert_agree(p.notes["u_nf_db_contributions"], _signed(nf, inputs))
    if b["calibrated"]:
        gain_db = 10 * umath.log10(g1 * lin * lout)
        stat = {k: v for k, v in inputs.items() if k in ("hot", "cold", "hot_cal", "cold_cal")}
        u_gain = math.hypot(*_signed(gain_db, stat).values())
        assert p.u_gain_db == pytest.approx(u_gain, rel=AGREE)


@settings(max_examples=60)
@given(b=converter_benches())
def test_converter_y_factor_contributions_match_the_uncertainties_package(b):
    p = _converter_y_point(b)
    hd, cd = p.densities_w_per_hz["hot"], p.densities_w_per_hz["cold"]
    h, c = ufloat(hd, b["rel_u"] * hd), ufloat(cd, b["rel_u"] * cd)
    enr_rf = ufloat(b["enr_rf"], b["u_enr_rf"])
    inputs = {"hot": h, "cold": c, "enr": enr_rf}
    r = 0.0
    if b["irr_db"] is not None:
        enr_img = ufloat(b["enr_img"], b["u_enr_img"])
        irr = ufloat(b["irr_db"], b["u_rej"])
        r = _ulin(-irr)
        inputs |= {"enr_image": enr_img, "image_rejection": irr}
    else:
        enr_img = b["enr_img"]

    def through(t, loss_db):  # §3
        loss = _lin(loss_db)
        return t / loss + b["tp"] * (1 - 1 / loss)

    # docs/references.md §17: Te_SSB = [T_hot,in - Y T_cold,in]/(Y - 1), both bands referred
    t_hot = through(T0 * _ulin(enr_rf) + b["tc"], b["l_rf"]) + r * through(
        T0 * _ulin(enr_img) + b["tc"], b["l_img"]
    )
    t_cold = through(b["tc"], b["l_rf"]) + r * through(b["tc"], b["l_img"])
    y = h / c
    te = (t_hot - y * t_cold) / (y - 1)
    if b["calibrated"]:
        hcd, ccd = p.densities_w_per_hz["hot_cal"], p.densities_w_per_hz["cold_cal"]
        hc, cc = ufloat(hcd, b["rel_u"] * hcd), ufloat(ccd, b["rel_u"] * ccd)
        enr_if = ufloat(b["enr_if"], b["u_enr_if"])
        th_if = T0 * _ulin(enr_if) + b["tc_cal"]
        te2 = (th_if - hc / cc * b["tc_cal"]) / (hc / cc - 1)
        g = ((h - c) / (t_hot - t_cold)) / ((hc - cc) / (th_if - b["tc_cal"]))
        lout = _lin(b["l_if"])
        te = te - te2 / g - (lout - 1) * b["tp"] / (g * lout)  # Friis at the IF, output loss
        inputs |= {"hot_cal": hc, "cold_cal": cc, "enr_cal": enr_if}
    f_ssb = 1 + r + te / T0
    nf = 10 * umath.log10(f_ssb if b["nf_type"] == "ssb" else f_ssb / (1 + r))
    assert p.nf_db == pytest.approx(nf.nominal_value, abs=1e-9)
    _assert_agree(p.notes["u_nf_db_contributions"], _signed(nf, inputs))


@settings(max_examples=60)
@given(b=converter_benches())
def test_converter_gain_method_contributions_match_the_uncertainties_package(b):
    p = _converter_gain_point(b)
    nd = p.densities_w_per_hz["dut"]
    n_m = ufloat(nd, b["rel_u"] * nd)
    g_db = ufloat(b["gs_db"], b["u_gain"])
    inputs = {"dut": n_m, "gain": g_db}
    r = 0.0
    if b["irr_db"] is not None:
        irr = ufloat(b["irr_db"], b["u_rej"])
        r = _ulin(-irr)
        inputs["image_rejection"] = irr
    lout = _lin(b["l_if"])
    n = n_m
    if b["floor"]:
        nf_val = K * (b["t_term"] + b["t2"])
        n_f = ufloat(nf_val, b["rel_u"] * nf_val)
        n = n_m - n_f + K * b["t_term"]
        inputs["floor"] = n_f
    g_path = _ulin(g_db) / lout
    t_in = _through(b["ts"], b["l_rf"], b["tp"]) + r * _through(b["ts"], b["l_img"], b["tp"])
    # docs/references.md §17 (eq. 6): N = k G (T_s' + r T_i' + Te); then the output loss (§3)
    te = n / (K * g_path) - t_in - (lout - 1) * b["tp"] / (g_path * lout)
    f_ssb = 1 + r + te / T0
    nf = 10 * umath.log10(f_ssb if b["nf_type"] == "ssb" else f_ssb / (1 + r))
    assert p.nf_db == pytest.approx(nf.nominal_value, abs=1e-9)
    _assert_agree(p.notes["u_nf_db_contributions"], _signed(nf, inputs))


# --------------------------------------------------------------------------- refusals kept


def test_y_barely_above_one_is_still_refused_with_the_reason():
    # the numerical propagation refused Y - 1 below its 1e-6 step; the analytic one keeps that
    # for readings exact enough that such a Y is significant (1e-12 relative: 3.5e5 u(Y))
    cold = K * 1000.0
    hot = cold * (1 + 5e-7)
    with pytest.raises(MeasurementError, match="by too little to give a noise figure"):
        y_factor_point(_density(hot, 1e-12), _density(cold, 1e-12), 15.0, cold_temperature_k=T0)
    with pytest.raises(MeasurementError, match="calibration at 1 GHz: Y - 1 = 5e-07"):
        calibrate_point(_density(hot, 1e-12), _density(cold, 1e-12), 15.0, cold_temperature_k=T0)
    # with 1 % readings the same Y is 3.5e-5 u(Y) above 1: no usable Y-factor, said in words,
    # and never "not above" (hot is above cold; project issue 10, item 8)
    for call in (y_factor_point, calibrate_point):
        with pytest.raises(YNotSignificantError) as info:
            call(_density(hot, 0.01), _density(cold, 0.01), 15.0, cold_temperature_k=T0)
        text = str(info.value)
        assert "above the cold one by only 3.5e-05 standard uncertainties" in text, text
        assert "not above" not in text
        assert info.value.significance == pytest.approx(5e-7 / (math.sqrt(2) * 0.01), rel=1e-3)


def test_enr_beyond_float_range_is_refused_naming_the_field():
    with (
        np.errstate(over="ignore"),
        pytest.raises(InputError, match="enr_db: gives a hot temperature that is not finite"),
    ):
        y_factor_sweep([2.0], [1.0], [4000.0], cold_temperature_k=T0)


def test_point_results_are_still_validated_at_construction():
    # the point functions build PointResult with validation on (measured: pydantic validation
    # costs ~4 us, model_construct ~6 us), so a negative uncertainty is still refused
    from pydantic import ValidationError

    with pytest.raises(ValidationError, match="u_nf_db"):
        PointResult(freq_hz=1e9, method=Method.GAIN, nf_db=2.0, te_k=170.0, u_nf_db=-0.1, u_te_k=1)
