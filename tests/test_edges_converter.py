"""Frequency-converting DUTs at the edges (issue: no wrong number, no wrong verdict).

Found by trying the converter methods as a production engineer would: a nearly dead mixer (LO
too weak, a broken diode) read by the gain method with its stated conversion gain, or a
converter Y-factor reading larger than the source's Th/Tc allows, gave a noise temperature far
below zero that was only flagged (the single-band methods refuse it); an image rejection given
with the wrong sign (-20 dB meant as 20 dB) was accepted and moved the SSB figure by 20 dB.
"""

from __future__ import annotations

import copy
import math

import pytest
import scipy.constants

from noisebench.errors import InputError, MeasurementError
from noisebench.running.plan import parse_plan
from noisebench.science.density import NoiseDensity
from noisebench.science.methods.converter import (
    converter_gain_method_point,
    converter_y_factor_point,
)

K = scipy.constants.k  # exact SI value (scipy.constants)
T0 = 290.0
RF, LO, IF = 5.8e9, 5.1e9, 0.7e9
GS_DB = 9.5


def density(value: float, rel_u: float = 1e-3) -> NoiseDensity:
    return NoiseDensity(freq_hz=IF, density_w_per_hz=value, u_density_w_per_hz=rel_u * value)


@pytest.mark.parametrize("alive", [0.0, 0.1, 0.5, 0.9])
def test_a_nearly_dead_mixer_is_refused_by_the_gain_method(alive):
    # the converter delivers only `alive` of what its stated conversion gain predicts from the
    # RF termination (a weak LO, a broken mixer): Te_SSB = (alive - 1) Ts, far below zero
    ts = 296.0
    n_sa = K * 1900.0  # analyzer's own noise, W/Hz
    gs = 10 ** (GS_DB / 10)
    n_dut = K * alive * gs * ts + n_sa
    with pytest.raises(MeasurementError, match="LO") as info:
        converter_gain_method_point(
            density(n_dut),
            GS_DB,
            rf_hz=RF,
            lo_hz=LO,
            image_rejection_db=None,
            floor=density(K * ts + n_sa),
            source_temperature_k=ts,
            floor_temperature_k=ts,
        )
    if alive > 0:  # (at 0 the reading is at the floor: refused before any propagation)
        assert "standard uncertainties below zero" in str(info.value)


def test_a_working_converter_slightly_below_zero_is_kept():
    # Te_SSB = 0 read with 1 % density jitter: a number (possibly flagged), never refused
    ts = 296.0
    n_sa = K * 1900.0
    gs = 10 ** (GS_DB / 10)
    p = converter_gain_method_point(
        density(K * gs * ts + n_sa, 0.01),
        GS_DB,
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=None,
        floor=density(K * ts + n_sa, 0.01),
        source_temperature_k=ts,
        floor_temperature_k=ts,
    )
    assert p.te_k == pytest.approx(0.0, abs=1e-6)


def test_a_converter_y_above_th_over_tc_is_refused():
    # Y = 1.5 Th/Tc: the exact Y-factor relation gives Te = (Th - Y Tc) / (Y - 1) = -100.9 K,
    # above -T0 (so the noise factor alone does not refuse it) but hundreds of u below zero
    enr_db, tc = 15.0, 296.5
    th = T0 * 10 ** (enr_db / 10) + tc
    y = 1.5 * th / tc
    assert (th - y * tc) / (y - 1) == pytest.approx(-100.94, abs=0.01)
    with pytest.raises(MeasurementError, match=r"-100\.9 K.*LO"):
        converter_y_factor_point(
            density(y * 1e-20),
            density(1e-20),
            rf_hz=RF,
            lo_hz=LO,
            enr_rf_db=enr_db,
            enr_image_db=None,
            image_rejection_db=None,
            cold_temperature_k=tc,
        )


BASE = {  # the converter plan of tests/test_conversion_run.py
    "method": "y_factor",
    "bench": {"analyzer": {"resource": "sim://demo-downconverter?seed=2"}},
    "conversion": {
        "mode": "fixed_if",
        "if_hz": 400e6,
        "sideband": "upper",
        "image_rejection_db": 14.0,
        "lo_leakage_dbm": -30.0,
        "lo": {"level_dbm": 10.0},
    },
    "acquisition": {"attenuation_db": 0, "target_u_nf_db": 0.15},
    "sweep": {"freqs_hz": [2.2e9, 2.4e9]},
    "expect": {"dut_gain_db": 18.0},
    "output": {"plots": False, "report": False},
}


@pytest.mark.parametrize("value", [-20.0, -14.0, -3.5])
def test_an_image_rejection_with_the_wrong_sign_is_refused(value):
    data = copy.deepcopy(BASE)
    data["conversion"]["image_rejection_db"] = value
    with pytest.raises(InputError) as info:
        parse_plan(data)
    text = str(info.value)
    assert "conversion.image_rejection_db" in text
    assert f"{-value:g}" in text and "below the signal" in text


@pytest.mark.parametrize("value", [0.0, -1.0, 14.0])
def test_a_plausible_image_rejection_is_accepted(value):
    data = copy.deepcopy(BASE)
    data["conversion"]["image_rejection_db"] = value
    plan = parse_plan(data)
    assert plan.conversion is not None
    assert math.isclose(float(plan.conversion.image_rejection_db), value)


# ----------------------------------------------------------------- SSB / DSB limits, ENR(IF)


def _converter_point():
    """A working converter (Te_SSB 600 K) read by the gain method: an SSB figure."""
    ts = 296.0
    n_sa = K * 1900.0
    gs = 10 ** (GS_DB / 10)
    return converter_gain_method_point(
        density(K * gs * (ts + 600.0) + n_sa, 0.002),
        GS_DB,
        rf_hz=RF,
        lo_hz=LO,
        image_rejection_db=None,
        floor=density(K * ts + n_sa, 0.002),
        source_temperature_k=ts,
        floor_temperature_k=ts,
    )


def _converter_plan(tmp_path, **changes):
    from test_conversion_run import BASE

    data = copy.deepcopy(BASE)
    data.update(changes)
    return parse_plan(data, base_dir=tmp_path)


def test_a_converters_nf_limit_must_say_ssb_or_dsb(tmp_path):
    # a DSB figure is up to 3.01 dB below the SSB one (10 log10 2, IRE/IEEE multiple-response
    # definitions, docs/references.md): judged against a limit meant for the other, a unit
    # passes or fails by the definition, not by its noise
    band = {"start_hz": 2e9, "stop_hz": 3e9, "nf_max_db": 12.0}
    with pytest.raises(InputError) as info:
        _converter_plan(tmp_path, limits={"bands": [band]})
    assert "limits.nf_type" in str(info.value) and 'nf_type = "ssb" or "dsb"' in str(info.value)
    with pytest.raises(InputError) as info:
        _converter_plan(tmp_path, limits={"bands": [band], "nf_type": "dsb"})
    text = str(info.value)
    assert "limits.nf_type: the limit bounds the DSB figure but the plan measures the SSB" in text
    assert 'conversion.nf_type = "dsb"' in text
    plan = _converter_plan(tmp_path, limits={"bands": [band], "nf_type": "ssb"})
    assert plan.limits is not None and plan.limits.nf_type == "ssb"
    # a gain-only mask needs no nf_type; an amplifier's mask may carry one (one response)
    _converter_plan(tmp_path, limits={"bands": [{**band, "nf_max_db": None, "gain_min_db": 5}]})


def test_a_converter_point_is_never_judged_against_a_limit_of_the_other_figure():
    from noisebench.science.limits import LimitMask, Verdict

    point = _converter_point()  # SSB figure
    assert point.conversion is not None and point.conversion.nf_type == "ssb"
    band = {"start_hz": 5e9, "stop_hz": 7e9}
    for nf_type, expected_note in ((None, "does not say SSB or DSB"), ("dsb", "bounds the DSB")):
        for limit in (point.nf_db + 10.0, 0.5):  # a clear pass, a clear fail
            mask = LimitMask(bands=[{**band, "nf_max_db": limit}], nf_type=nf_type)
            verdict = mask.judge([point])
            (check,) = verdict.points[0].checks
            assert check.verdict is Verdict.INDETERMINATE
            assert expected_note in (check.note or "")
            assert verdict.unit is Verdict.INDETERMINATE
    passing = LimitMask(bands=[{**band, "nf_max_db": point.nf_db + 10.0}], nf_type="ssb")
    assert passing.judge([point]).unit is Verdict.PASS


def test_the_enr_table_must_cover_the_if_where_the_analyzer_is_calibrated(tmp_path):
    # the converter's analyzer is calibrated at the IF with ENR(IF); a table over the RF
    # and the image only would leave ENR(IF) to extrapolation
    table = tmp_path / "enr_rf_only.csv"
    table.write_text(
        "freq_hz,enr_db,u_enr_db\n1.0e9,15.2,0.1\n2.0e9,15.1,0.1\n3.0e9,15.0,0.1\n",
        encoding="utf-8",
    )
    with pytest.raises(InputError) as info:
        _converter_plan(tmp_path, enr={"table": str(table)})
    text = str(info.value)
    assert "enr.table: does not cover the IF 400 MHz, where the analyzer is calibrated" in text
