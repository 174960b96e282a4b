"""End-to-end reference: a noisy cascade built in scikit-rf -> the densities an analyzer reads ->
noisebench's methods -> the DUT's noise figure that scikit-rf computes.

Reference library: scikit-rf's noisy ``Network`` (``set_noise_a``, cascade with ``**``, ``nf(z)``),
which cascades noise correlation matrices (Hillbrand & Russer 1976, IEEE Trans. Circuits Syst.
CAS-23(4); docs/references.md §15). noisebench's methods invert the cascade with Friis's formula
(Friis 1944, Proc. IRE 32(7); docs/references.md §3-§5). Nothing of noisebench builds the
readings: the densities come from scikit-rf's noise factors and gains and the definition
``N = k (T_source + Te) G`` (IRE 1960 / IEEE Std 161 definitions; docs/references.md §1-§2).

Every stage is matched (S11 = S22 = 0), so each stage sees a 50-ohm source and Friis with the
|S21|^2 gains is exact; the DUT's optimum source reflection is not 50 ohm, so its NF at 50 ohm
is above its minimum, and the input cable is a matched attenuator at T0 whose noise parameters
follow from thermal equilibrium: Fmin = L, Gamma_opt = 0, Rn = Z0 (L - 1/L) / 4 (derived from the
available gain of a matched attenuator, docs/references.md §3).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.constants

from noisebench.science.density import NoiseDensity
from noisebench.science.methods import (
    calibrate_point,
    gain_method_nf_db,
    gain_method_point,
    y_factor_point,
    y_factor_sweep,
)
from noisebench.science.uncertainty import UncertaintyInputs, budget_for_point

skrf = pytest.importorskip("skrf")  # the [touchstone] extra; installed by .[test]

K = scipy.constants.k  # exact SI value (docs/references.md §1)
T0 = 290.0
Z0 = 50.0
FREQS_HZ = np.array([1.0e9, 1.5e9, 2.0e9, 2.5e9, 3.0e9])
CABLE_LOSS_DB = 1.5
ENR_DB = 15.0
TC_K = 296.5  # the noise source's physical (cold) temperature, not T0
TS_K = 296.5  # the gain method's input termination, at ambient
TOL_DB = 1e-9  # floating-point agreement: the relations are exact for matched stages


def _matched(freq, gain_db: np.ndarray, nfmin_db, gamma_opt, rn_ohm):
    s = np.zeros((len(freq), 2, 2), dtype=complex)
    s[:, 1, 0] = 10 ** (np.asarray(gain_db) / 20)
    s[:, 0, 1] = 10 ** (np.asarray(gain_db) / 20) * 0.01  # a little reverse isolation
    net = skrf.Network(frequency=freq, s=s, z0=Z0)
    net.set_noise_a(freq, nfmin_db=nfmin_db, gamma_opt=gamma_opt, rn=rn_ohm)
    return net


def _cable(freq):
    loss = 10 ** (CABLE_LOSS_DB / 10)
    s = np.zeros((len(freq), 2, 2), dtype=complex)
    s[:, 1, 0] = s[:, 0, 1] = loss**-0.5  # reciprocal, matched
    net = skrf.Network(frequency=freq, s=s, z0=Z0)
    net.set_noise_a(freq, nfmin_db=CABLE_LOSS_DB, gamma_opt=0.0, rn=Z0 * (loss - 1 / loss) / 4)
    return net


@pytest.fixture(scope="module")
def bench():
    """scikit-rf's answer: DUT NF and gain, and the noise factors of the measured paths."""
    freq = skrf.Frequency.from_f(FREQS_HZ, unit="Hz")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scikit-rf warns about noise-frequency interpolation
        dut = _matched(
            freq,
            gain_db=np.linspace(22.0, 18.0, len(FREQS_HZ)),
            nfmin_db=np.linspace(0.8, 1.4, len(FREQS_HZ)),
            gamma_opt=0.35 * np.exp(1j * np.deg2rad(40.0)),
            rn_ohm=12.0,
        )
        analyzer = _matched(
            freq, gain_db=np.full(len(FREQS_HZ), 6.0), nfmin_db=12.0, gamma_opt=0.1, rn_ohm=300.0
        )
        cable = _cable(freq)
        system = cable**dut**analyzer
        path = cable**dut
        out = {
            "nf_dut_db": 10 * np.log10(np.real(dut.nf(Z0))),  # nf() is the linear factor
            "gain_dut_db": 20 * np.log10(np.abs(dut.s[:, 1, 0])),
            "f_cable": np.real(cable.nf(Z0)),
            "f_analyzer": np.real(analyzer.nf(Z0)),
            "f_system": np.real(system.nf(Z0)),
            "g_path": np.abs(path.s[:, 1, 0]) ** 2,  # source plane -> analyzer input
        }
    return out


def _read(t_source_k, f_chain, g_chain):
    """Density at the analyzer input, W/Hz: N = k (T_source + Te_chain) G_chain, with the chain
    ending at (and including) the analyzer's own noise referred to its input."""
    return K * (t_source_k + T0 * (f_chain - 1.0)) * g_chain


def _density(freq_hz, value):
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=value, u_density_w_per_hz=1e-3 * value)


def test_the_cable_model_is_a_matched_loss_at_t0(bench):
    # scikit-rf: a matched attenuator at T0 has F = L (docs/references.md §3)
    np.testing.assert_allclose(bench["f_cable"], 10 ** (CABLE_LOSS_DB / 10), rtol=1e-12)


def test_y_factor_with_second_stage_correction_gives_scikit_rf_nf(bench):
    th = T0 * 10 ** (ENR_DB / 10) + TC_K  # docs/references.md §5 ("t0" reference)
    for i, f in enumerate(FREQS_HZ):
        # calibration: the source straight into the analyzer
        cal = calibrate_point(
            _density(f, _read(th, bench["f_analyzer"][i], 1.0)),
            _density(f, _read(TC_K, bench["f_analyzer"][i], 1.0)),
            ENR_DB,
            cold_temperature_k=TC_K,
        )
        hot = _read(th, bench["f_system"][i], bench["g_path"][i])
        cold = _read(TC_K, bench["f_system"][i], bench["g_path"][i])
        point = y_factor_point(
            _density(f, hot),
            _density(f, cold),
            ENR_DB,
            cold_temperature_k=TC_K,
            calibration=cal,
            input_loss_db=CABLE_LOSS_DB,
            input_loss_temperature_k=T0,
        )
        # scikit-rf: Network.nf(50) of the DUT alone, and |S21|^2
        assert point.nf_db == pytest.approx(bench["nf_dut_db"][i], abs=TOL_DB)
        assert point.gain_db == pytest.approx(bench["gain_dut_db"][i], abs=TOL_DB)
        # the uncertainty budget states the same model: its NF is the DUT's too
        budget = budget_for_point(point, UncertaintyInputs(), calibration=cal)
        assert budget.nf_db == pytest.approx(bench["nf_dut_db"][i], abs=TOL_DB)


def test_y_factor_sweep_array_form_gives_scikit_rf_nf(bench):
    th = T0 * 10 ** (ENR_DB / 10) + TC_K
    sweep = y_factor_sweep(
        _read(th, bench["f_system"], bench["g_path"]),
        _read(TC_K, bench["f_system"], bench["g_path"]),
        np.full(len(FREQS_HZ), ENR_DB),
        cold_temperature_k=TC_K,
        hot_cal_w_per_hz=_read(th, bench["f_analyzer"], 1.0),
        cold_cal_w_per_hz=_read(TC_K, bench["f_analyzer"], 1.0),
        input_loss_db=CABLE_LOSS_DB,
        input_loss_temperature_k=T0,
    )
    np.testing.assert_allclose(sweep.nf_db, bench["nf_dut_db"], atol=TOL_DB)  # scikit-rf


def test_gain_method_with_floor_correction_gives_scikit_rf_nf(bench):
    for i, f in enumerate(FREQS_HZ):
        dut = _read(TS_K, bench["f_system"][i], bench["g_path"][i])
        floor = _read(TS_K, bench["f_analyzer"][i], 1.0)  # analyzer input terminated at TS
        path_gain_db = 10 * np.log10(bench["g_path"][i])  # cable + DUT: holds the input loss
        point = gain_method_point(
            _density(f, dut),
            path_gain_db,
            floor=_density(f, floor),
            source_temperature_k=TS_K,
            input_loss_db=CABLE_LOSS_DB,
            input_loss_temperature_k=T0,
        )
        assert point.nf_db == pytest.approx(bench["nf_dut_db"][i], abs=TOL_DB)  # scikit-rf
        assert point.gain_db == pytest.approx(bench["gain_dut_db"][i], abs=TOL_DB)
        budget = budget_for_point(point, UncertaintyInputs())
        assert budget.nf_db == pytest.approx(bench["nf_dut_db"][i], abs=TOL_DB)


def test_gain_method_array_form_gives_the_path_nf(bench):
    # without de-embedding the cable, the array form returns the path's NF: cable + DUT,
    # i.e. scikit-rf's (cable ** dut).nf(50) = Friis of the two (docs/references.md §3)
    nf_path = gain_method_nf_db(
        _read(TS_K, bench["f_system"], bench["g_path"]),
        bench["g_path"],
        n_floor_w_per_hz=_read(TS_K, bench["f_analyzer"], 1.0),
        source_temperature_k=TS_K,
    )
    f_dut = 10 ** (bench["nf_dut_db"] / 10)
    f_path = bench["f_cable"] + (f_dut - 1.0) * 10 ** (CABLE_LOSS_DB / 10)
    np.testing.assert_allclose(nf_path, 10 * np.log10(f_path), atol=TOL_DB)
