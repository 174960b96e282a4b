"""Gain method: exact floor correction, source temperature, losses, uncertainty, flags.

Worked examples from docs/references.md §4 and §7, recomputed from their formulas.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants

from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.methods import gain_method_nf_db, gain_method_point, gain_method_te_k
from noisebench.science.physics import friis_te_k, passive_loss_te_k
from noisebench.science.point import Method, PointFlag

K = scipy.constants.k
T0 = 290.0
C_DB = 10 / math.log(10)

# docs/references.md §4 worked example: G = 20 dB, NF = 2 dB, analyzer NF = 12 dB, Ts = T0
G = 100.0
TE_DUT = T0 * (10**0.2 - 1)
TE_SA = T0 * (10**1.2 - 1)
N_M = K * (G * (T0 + TE_DUT) + TE_SA)  # DUT in place: DUT noise plus analyzer's own
N_F = K * (T0 + TE_SA)  # analyzer input terminated at T0


def density(n: float, rel_u: float = 0.01, freq_hz: float = 1e9, **kw) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=n, u_density_w_per_hz=rel_u * n, **kw)


def dbm_per_hz(w: float) -> float:
    return 10 * math.log10(w / 1e-3)


def test_worked_example_inputs():
    assert TE_DUT == pytest.approx(169.619, abs=5e-4)  # docs/references.md §4
    assert TE_SA == pytest.approx(4306.190, abs=5e-4)
    assert dbm_per_hz(N_M) == pytest.approx(-151.5862, abs=5e-5)
    assert dbm_per_hz(N_F) == pytest.approx(-161.9752, abs=5e-5)


def test_exact_floor_correction_gives_the_true_nf():
    r = gain_method_point(density(N_M), 20.0, floor=density(N_F))
    # docs/references.md §4: exact correction N_DUT = N_m - N_f + kTs -> 2.0000 dB
    assert r.nf_db == pytest.approx(2.0, abs=1e-12)
    assert r.te_k == pytest.approx(TE_DUT, rel=1e-12)
    assert r.method is Method.GAIN and r.gain_db == pytest.approx(20.0)
    assert r.freq_hz == 1e9 and r.source_temperature_k == T0
    assert r.densities_w_per_hz == {"dut": N_M, "floor": N_F}
    assert r.notes["u_densities_w_per_hz"] == {"dut": 0.01 * N_M, "floor": 0.01 * N_F}


def test_plain_subtraction_and_no_correction_read_wrong():
    plain = 10 * math.log10((N_M - N_F) / (K * T0 * G))  # the wrong formula
    assert plain == pytest.approx(1.9725, abs=5e-5)  # docs/references.md §4
    uncorrected = gain_method_point(density(N_M), 20.0)
    assert uncorrected.nf_db == pytest.approx(2.3889, abs=5e-5)  # docs/references.md §4
    assert uncorrected.floor_margin_db is None and uncorrected.floor_correction_db is None
    # plain subtraction under-reads F by exactly 1/G (docs/references.md §4)
    exact = gain_method_point(density(N_M), 20.0, floor=density(N_F))
    assert 10 ** (exact.nf_db / 10) - 10 ** (plain / 10) == pytest.approx(1 / G, rel=1e-12)


@pytest.mark.parametrize("gain_db, error_db", [(20.0, -0.0275), (10.0, -0.283), (3.0, -1.651)])
def test_plain_subtraction_error_table(gain_db, error_db):
    g = 10 ** (gain_db / 10)
    n_m, n_f = K * (g * (T0 + TE_DUT) + TE_SA), K * (T0 + TE_SA)
    exact = float(gain_method_nf_db(n_m, g, n_floor_w_per_hz=n_f))
    plain = 10 * math.log10((n_m - n_f) / (K * T0 * g))
    assert exact == pytest.approx(2.0, abs=1e-12)
    assert plain - exact == pytest.approx(error_db, abs=6e-4)  # docs/references.md §4 (3 digits)


def test_floor_correction_and_margin_are_consistent():
    r = gain_method_point(density(N_M), 20.0, floor=density(N_F))
    # margin: DUT noise over the analyzer's own noise; uncorrected error = 10log10(1 + 10^-m/10)
    n_dut, n_sa = N_M - N_F + K * T0, N_F - K * T0
    assert r.floor_margin_db == pytest.approx(10 * math.log10(n_dut / n_sa), rel=1e-12)
    assert r.floor_correction_db == pytest.approx(
        10 * math.log10(1 + 10 ** (-r.floor_margin_db / 10)), rel=1e-10
    )  # docs/references.md §4
    assert r.floor_correction_db == pytest.approx(
        2.3889 - 2.0000, abs=1e-4
    )  # docs/references.md §4
    assert r.notes["nf_uncorrected_db"] - r.nf_db == pytest.approx(r.floor_correction_db)
    assert PointFlag.NEAR_ANALYZER_FLOOR not in r.flags


def test_near_floor_flag_below_the_threshold():
    g = 10**0.8  # 8 dB gain with a 12 dB analyzer NF: DUT noise near the analyzer's own
    n_m = K * (g * (T0 + TE_DUT) + TE_SA)
    r = gain_method_point(density(n_m), 8.0, floor=density(N_F))
    assert r.floor_margin_db < 3.0
    assert r.nf_db == pytest.approx(2.0, abs=1e-10)  # still exact
    assert PointFlag.NEAR_ANALYZER_FLOOR in r.flags and PointFlag.LOW_GAIN in r.flags
    relaxed = gain_method_point(
        density(n_m), 8.0, floor=density(N_F), floor_warning_db=-3.0, low_gain_db=5.0
    )
    assert relaxed.flags == []


def test_termination_not_at_t0():
    ts = 300.0
    for nf, offset in [(0.5, 0.1315), (2.0, 0.0935), (3.0, 0.0744)]:
        te = T0 * (10 ** (nf / 10) - 1)
        n_m = K * G * (ts + te)  # no analyzer noise: a DUT-only reading
        # docs/references.md §4: Te = N_DUT/(kG) - Ts is exact
        r = gain_method_point(density(n_m), 20.0, source_temperature_k=ts)
        assert r.nf_db == pytest.approx(nf, abs=1e-12)
        assert r.source_temperature_k == ts
        # treating the 300 K termination as 290 K reads high (docs/references.md §4)
        wrong = gain_method_point(density(n_m), 20.0, source_temperature_k=T0)
        assert wrong.nf_db - nf == pytest.approx(offset, abs=5e-5)


def test_floor_termination_at_its_own_temperature():
    ts, t_term = 296.0, 303.0  # DUT termination and analyzer termination differ
    n_m = K * (G * (ts + TE_DUT) + TE_SA)
    n_f = K * (t_term + TE_SA)
    r = gain_method_point(
        density(n_m), 20.0, floor=density(n_f), source_temperature_k=ts, floor_temperature_k=t_term
    )
    assert r.te_k == pytest.approx(TE_DUT, rel=1e-12)


def test_losses_are_deembedded():
    # physical path: input cable 0.7 dB at 300 K, DUT, output cable 1.3 dB at 305 K (Friis)
    l_in, l_out, tp_in, tp_out, ts = 10**0.07, 10**0.13, 300.0, 305.0, 297.0
    te_path = friis_te_k(
        [passive_loss_te_k(l_in, tp_in), TE_DUT, passive_loss_te_k(l_out, tp_out)],
        [1 / l_in, G, 1 / l_out],
    )
    g_path = G / (l_in * l_out)
    n_m = K * (g_path * (ts + te_path) + TE_SA)
    n_f = K * (ts + TE_SA)
    r = gain_method_point(
        density(n_m),
        10 * math.log10(g_path),
        floor=density(n_f),
        source_temperature_k=ts,
        input_loss_db=0.7,
        input_loss_temperature_k=tp_in,
        output_loss_db=1.3,
        output_loss_temperature_k=tp_out,
    )
    assert r.te_k == pytest.approx(TE_DUT, rel=1e-11)
    assert r.gain_db == pytest.approx(20.0, abs=1e-12)
    assert r.notes["path_gain_db"] == pytest.approx(18.0)
    # the same point when the gain given is the DUT's own (cables cancelled in its measurement)
    own = gain_method_point(
        density(n_m),
        20.0,
        floor=density(n_f),
        source_temperature_k=ts,
        input_loss_db=0.7,
        input_loss_temperature_k=tp_in,
        output_loss_db=1.3,
        output_loss_temperature_k=tp_out,
        gain_includes_losses=False,
    )
    assert own.te_k == pytest.approx(TE_DUT, rel=1e-11) and own.gain_db == pytest.approx(20.0)


# --------------------------------------------------------------------------- uncertainty §7


def test_statistical_uncertainty_of_the_worked_example():
    # docs/references.md §7: 1 % on each density -> 0.0434 dB without floor, 0.0477 dB with it
    alone = gain_method_point(density(N_M), 20.0)
    assert alone.u_nf_db == pytest.approx(C_DB * 0.01, rel=1e-6)
    assert alone.u_nf_db == pytest.approx(0.0434, abs=5e-5)
    with_floor = gain_method_point(density(N_M), 20.0, floor=density(N_F))
    expected = C_DB * math.hypot(0.01 * N_M, 0.01 * N_F) / (N_M - N_F + K * T0)  # §7 formula
    assert with_floor.u_nf_db == pytest.approx(expected, rel=1e-6)
    assert with_floor.u_nf_db == pytest.approx(0.0477, abs=5e-5)
    dnf_dte = C_DB / (T0 + with_floor.te_k)
    assert with_floor.u_te_k * dnf_dte == pytest.approx(with_floor.u_nf_db, rel=1e-12)


def test_gain_uncertainty_enters_one_to_one_and_stays_out_of_the_statistical_part():
    r = gain_method_point(density(N_M), 20.0, floor=density(N_F), u_gain_db=0.1)
    c = r.notes["u_nf_db_contributions"]
    # errors in G(dB) pass into NF(dB) 1:1 (docs/references.md §4) when Ts = T0
    assert c["gain"] == pytest.approx(-0.1, rel=1e-6)
    assert r.u_gain_db == 0.1
    assert r.u_nf_db == pytest.approx(math.hypot(c["dut"], c["floor"]), rel=1e-12)
    assert r.notes["u_nf_db_with_gain"] == pytest.approx(
        math.sqrt(c["dut"] ** 2 + c["floor"] ** 2 + 0.01), rel=1e-6
    )


def test_linear_propagation_matches_monte_carlo():
    # JCGM 101:2008 style check: draw the two densities (1 % normal), compare the NF spread
    rng = np.random.default_rng(20240601)
    m = 40_000
    n_m = N_M * (1 + 0.01 * rng.standard_normal(m))
    n_f = N_F * (1 + 0.01 * rng.standard_normal(m))
    nf = gain_method_nf_db(n_m, G, n_floor_w_per_hz=n_f)
    s = float(np.std(nf, ddof=1))
    u = gain_method_point(density(N_M), 20.0, floor=density(N_F)).u_nf_db
    # sampling std of a sample std: s / sqrt(2 (M - 1)); allow 5 of them
    assert abs(s - u) < 5 * u / math.sqrt(2 * (m - 1))


# --------------------------------------------------------------------------- flags and refusals


def test_flags_from_the_densities():
    spur = density(N_M, excluded_freq_hz=[1.0001e9])
    scatter = density(N_F, scatter_ratio=2.0)
    r = gain_method_point(spur, 20.0, floor=scatter)
    assert PointFlag.SPURS_EXCLUDED in r.flags and PointFlag.EXCESS_SCATTER in r.flags
    calm = gain_method_point(density(N_M, scatter_ratio=1.2), 20.0, floor=density(N_F))
    assert calm.flags == []


def test_negative_te_is_flagged_not_hidden():
    n_m = K * (G * (T0 - 5.0) + TE_SA)  # scatter made the DUT read below a noiseless one
    r = gain_method_point(density(n_m), 20.0, floor=density(N_F))
    assert r.te_k == pytest.approx(-5.0, rel=1e-9)
    assert r.nf_db < 0 and PointFlag.NEGATIVE_TE in r.flags


def test_no_dut_noise_after_the_floor_correction_raises_naming_the_frequency():
    with pytest.raises(MeasurementError) as info:
        gain_method_point(
            density(N_F - K * T0 * 1.01, freq_hz=2.5e9), 20.0, floor=density(N_F, freq_hz=2.5e9)
        )
    assert "no DUT noise" in str(info.value)
    assert info.value.context["freq_hz"] == 2.5e9 and "2500000000.0" in str(info.value)


def test_floor_without_analyzer_noise_is_refused():
    with pytest.raises(MeasurementError, match="holds no analyzer noise"):
        gain_method_point(density(N_M), 20.0, floor=density(K * T0 * 0.99))


@pytest.mark.parametrize(
    "kwargs, field",
    [
        ({"gain_db": float("nan")}, "gain_db"),
        ({"u_gain_db": -0.1}, "u_gain_db"),
        ({"source_temperature_k": -3.0}, "source_temperature_k"),
        ({"source_temperature_k": 0.0}, "source_temperature_k"),
        ({"t0_k": float("inf")}, "t0_k"),
        ({"input_loss_db": -0.5}, "input_loss_db"),
        ({"output_loss_temperature_k": -1.0}, "output_loss_temperature_k"),
        ({"floor_temperature_k": float("nan")}, "floor_temperature_k"),
    ],
)
def test_bad_inputs_name_the_field(kwargs, field):
    args = {"gain_db": 20.0} | kwargs
    gain_db = args.pop("gain_db")
    with pytest.raises(InputError) as info:
        gain_method_point(density(N_M), gain_db, floor=density(N_F), **args)
    assert info.value.field == field


def test_densities_must_share_the_frequency_and_type():
    with pytest.raises(InputError, match="floor.freq_hz"):
        gain_method_point(density(N_M), 20.0, floor=density(N_F, freq_hz=1.1e9))
    with pytest.raises(InputError, match="dut"):
        gain_method_point(N_M, 20.0)  # type: ignore[arg-type]


def test_pure_function_refuses_bad_arrays():
    with pytest.raises(InputError, match="gain_lin"):
        gain_method_te_k(N_M, 0.0)
    with pytest.raises(InputError, match="n_meas_w_per_hz"):
        gain_method_te_k(np.array([N_M, float("nan")]), G)
    with pytest.raises(MeasurementError, match="element 1"):
        gain_method_te_k(np.array([N_M, N_F * 0.5]), G, n_floor_w_per_hz=N_F)


def test_vectorized_form_matches_the_point_form():
    gains_db = np.array([5.0, 12.0, 20.0, 35.0])
    g = 10 ** (gains_db / 10)
    te = np.array([30.0, 400.0, TE_DUT, 2000.0])
    n_m = K * (g * (T0 + te) + TE_SA)
    nf = gain_method_nf_db(n_m, g, n_floor_w_per_hz=N_F)
    assert nf.shape == (4,)
    np.testing.assert_allclose(nf, 10 * np.log10(1 + te / T0), atol=1e-11)
    for i in range(4):
        p = gain_method_point(density(n_m[i]), gains_db[i], floor=density(N_F))
        assert p.nf_db == pytest.approx(nf[i], abs=1e-12)
    assert isinstance(gain_method_nf_db(N_M, G), float)


def test_instrument_time_comes_from_the_dut_density():
    r = gain_method_point(
        density(N_M, acquisition_time_s=0.25), 20.0, floor=density(N_F, acquisition_time_s=3.0)
    )
    assert r.instrument_time_s == 0.25  # the floor is a calibration, reused across points
    assert gain_method_point(density(N_M), 20.0).instrument_time_s is None
