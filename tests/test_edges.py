"""No wrong number and no wrong verdict at the edges: dead DUTs, stuck or mis-decoded traces,
non-finite values, calibration flags, messages.

Each test reproduces a reported symptom (it failed before the fix), then covers the class
around it. The physics of the reference values is the gain-method and Y-factor relations of
the contributor guide (Te = (N_m - N_f + k T)/(k G) - T; Te = (Th - Y Tc)/(Y - 1)), recomputed
here from scipy.constants.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError
from scipy import stats

from noisebench.bench.acquisition import AcquisitionSettings, Trace, TraceUnit
from noisebench.errors import InputError, MeasurementError
from noisebench.science.density import NoiseDensity
from noisebench.science.estimator import estimate_density
from noisebench.science.limits import LimitMask, Verdict, judge
from noisebench.science.methods import calibrate_point, gain_method_point, y_factor_point
from noisebench.science.point import (
    GAIN_CHECK_BLOCKING_FLAGS,
    VERDICT_BLOCKING_FLAGS,
    PointFlag,
    calibration_point_flags,
)

K = scipy.constants.k
T0 = 290.0
TE_SA = T0 * (10**1.2 - 1)  # an analyzer with NF 12 dB
N_FLOOR = K * (T0 + TE_SA)  # its floor with a matched load at T0
MASK = LimitMask.from_dict(
    {"bands": [{"start_hz": 0.5e9, "stop_hz": 2e9, "nf_max_db": 2.2, "gain_min_db": 19.0}]}
)


def density(n: float, rel_u: float = 0.01, freq_hz: float = 1e9) -> NoiseDensity:
    return NoiseDensity(freq_hz=freq_hz, density_w_per_hz=n, u_density_w_per_hz=rel_u * n)


# --- 1. a dead DUT never passes ----------------------------------------------------------------


def test_dead_dut_gain_method_is_refused_not_passed():
    # reported: DUT reading equal to the floor gave NF -20 dB (Te = -287 K) and a PASS
    with pytest.raises(MeasurementError) as info:
        gain_method_point(density(N_FLOOR), 20.0, floor=density(N_FLOOR))
    text = str(info.value)
    assert "-287.1 K" in text and "unpowered or not connected" in text
    assert info.value.context["freq_hz"] == 1e9


def test_y_larger_than_the_source_allows_is_refused():
    # reported: Y = 1.5 Th/Tc gave NF -1.86 dB with u 0.007 dB
    enr_db, tc = 15.0, 296.5
    th = T0 * 10 ** (enr_db / 10) + tc
    y = 1.5 * th / tc
    te = (th - y * tc) / (y - 1)  # the exact Y-factor relation: -100.9 K (NF -1.86 dB)
    assert te == pytest.approx(-100.94, abs=0.01)
    with pytest.raises(MeasurementError, match=r"-100\.9 K.*ENR table"):
        y_factor_point(density(y * 1e-20), density(1e-20), enr_db, cold_temperature_k=tc)


def test_slightly_negative_te_is_kept_flagged_and_never_passes():
    # a quiet DUT whose Te reads 1.5 u below zero: kept (refusing would bias averages), flagged
    g = 100.0
    u_rel = 0.01
    te_target = -2.0
    n_m = N_FLOOR + K * g * (T0 + te_target) - K * T0
    r = gain_method_point(density(n_m, u_rel), 20.0, floor=density(N_FLOOR, 0.0))
    assert r.te_k == pytest.approx(te_target, abs=1e-6)
    assert r.u_te_k > abs(te_target) / 4  # inside 4 u: a number, not a fault
    assert PointFlag.NEGATIVE_TE in r.flags
    verdict = judge([r], None, MASK)
    assert verdict.unit is Verdict.INDETERMINATE
    nf_check = verdict.points[0].checks[0]
    assert nf_check.verdict is Verdict.INDETERMINATE and "negative_te" in nf_check.note


@pytest.mark.parametrize("flag", sorted(VERDICT_BLOCKING_FLAGS, key=lambda f: f.value))
def test_each_blocking_flag_withholds_a_pass(flag):
    g = 100.0
    te = 100.0
    n_m = N_FLOOR + K * g * (T0 + te) - K * T0
    r = gain_method_point(density(n_m, 1e-4), 20.0, floor=density(N_FLOOR, 1e-4))
    assert judge([r], None, MASK).unit is Verdict.PASS  # clean: a clear pass
    flagged = r.model_copy(update={"flags": [*r.flags, flag]})
    assert judge([flagged], None, MASK).unit is Verdict.INDETERMINATE
    # a FAIL is never softened by a flag
    failing = flagged.model_copy(update={"nf_db": 5.0})
    assert judge([failing], None, MASK).unit is Verdict.FAIL


@pytest.mark.parametrize(
    "flag",
    sorted(
        set(PointFlag) - VERDICT_BLOCKING_FLAGS - GAIN_CHECK_BLOCKING_FLAGS, key=lambda f: f.value
    ),
)
def test_annotating_flags_leave_the_verdict_alone(flag):
    n_m = N_FLOOR + K * 100.0 * (T0 + 100.0) - K * T0
    r = gain_method_point(density(n_m, 1e-4), 20.0, floor=density(N_FLOOR, 1e-4))
    flagged = r.model_copy(update={"flags": [flag]})
    assert judge([flagged], None, MASK).unit is Verdict.PASS


@settings(max_examples=150, deadline=None, derandomize=True)
@given(
    alive=st.floats(0.0, 0.98),  # fraction of the termination's kT G the DUT still delivers
    gain_db=st.floats(10.0, 40.0),
    rel_u=st.floats(1e-4, 0.05),
    analyzer_nf_db=st.floats(5.0, 25.0),
)
def test_random_dead_or_partial_duts_never_pass_the_gain_method(
    alive, gain_db, rel_u, analyzer_nf_db
):
    """A DUT that delivers less noise than the source termination alone would through the
    stated gain (dead, partly powered, disconnected) is refused or flagged: never PASS."""
    g = 10 ** (gain_db / 10)
    floor = K * (T0 + T0 * (10 ** (analyzer_nf_db / 10) - 1))
    n_m = floor - K * T0 + alive * K * T0 * g  # the DUT adds at most 98 % of k T0 G
    limits = LimitMask.from_dict(
        {"bands": [{"start_hz": 0.5e9, "stop_hz": 2e9, "nf_max_db": 30.0}]}
    )
    try:
        r = gain_method_point(density(n_m, rel_u), gain_db, floor=density(floor, rel_u))
    except MeasurementError:
        return  # refused: fine
    assert r.te_k < 0
    assert judge([r], None, limits).unit is not Verdict.PASS


@settings(max_examples=150, deadline=None, derandomize=True)
@given(
    excess=st.floats(1.0005, 3.0),  # Y over the largest Y the source allows (Te = 0)
    enr_db=st.floats(5.0, 25.0),
    tc=st.floats(280.0, 310.0),
    rel_u=st.floats(1e-4, 0.02),
)
def test_random_impossible_y_never_passes(excess, enr_db, tc, rel_u):
    th = T0 * 10 ** (enr_db / 10) + tc
    y = excess * th / tc
    limits = LimitMask.from_dict(
        {"bands": [{"start_hz": 0.5e9, "stop_hz": 2e9, "nf_max_db": 30.0}]}
    )
    try:
        r = y_factor_point(
            density(y * 1e-20, rel_u), density(1e-20, rel_u), enr_db, cold_temperature_k=tc
        )
    except MeasurementError:
        return
    assert r.te_k < 0 and PointFlag.NEGATIVE_TE in r.flags
    assert judge([r], None, limits).unit is not Verdict.PASS


# --- 5. non-finite values: one guard at the boundary --------------------------------------------


@pytest.mark.parametrize("field", ["density_w_per_hz", "u_density_w_per_hz", "scatter_ratio"])
@pytest.mark.parametrize("bad", [math.inf, math.nan])
def test_noise_density_refuses_non_finite(field, bad):
    # reported: NoiseDensity accepted infinity; the Y-factor path then failed on u_nf_db = NaN
    data = {"freq_hz": 1e9, "density_w_per_hz": 1e-20, "u_density_w_per_hz": 1e-22}
    data[field] = bad
    with pytest.raises(ValidationError, match=field):
        NoiseDensity(**data)


# --- 3./4. traces that contradict their settings -------------------------------------------------


def _settings(averages: int = 10, points: int = 101, **kw) -> AcquisitionSettings:
    base = dict(
        center_hz=1e9,
        span_hz=100e6,
        rbw_hz=1e6,
        averages=averages,
        points=points,
        detector="rms",
        averaging_scale="power",
        detector_samples=1,
    )
    return AcquisitionSettings(**(base | kw))


def _noise_trace(seed: int, true_averages: int, said: AcquisitionSettings) -> Trace:
    """Points 1 MHz apart with a 1 MHz RBW (nearly independent): mean of ``true_averages``
    exponential powers, labelled with the settings ``said``."""
    rng = np.random.default_rng(seed)
    p = rng.exponential(1e-12, size=(true_averages, said.points)).mean(axis=0)
    return Trace(freq_hz=said.frequencies_hz(), values=10 * np.log10(p / 1e-3), settings=said)


@pytest.mark.parametrize("value", [-90.0, 0.0])
def test_stuck_trace_is_refused(value):
    # reported: a constant trace (or zeros in dBm) gave a density with 4.8 % u and no flag
    s = _settings()
    trace = Trace(freq_hz=s.frequencies_hz(), values=np.full(101, value), settings=s)
    with pytest.raises(MeasurementError, match="frozen or held display"):
        estimate_density(trace)


def test_clipped_trace_is_refused():
    s = _settings(averages=1)
    trace = _noise_trace(3, 1, s)
    clipped = np.minimum(trace.values, np.percentile(trace.values, 5))  # 95 % at a ceiling
    with pytest.raises(MeasurementError, match="clipped or overranged"):
        estimate_density(trace.model_copy(update={"values": clipped}))


def test_more_averaging_than_reported_is_refused():
    said = _settings(averages=1)
    with pytest.raises(MeasurementError, match="more averaging than the analyzer reported"):
        estimate_density(_noise_trace(4, 100, said))


def test_averaging_left_off_names_the_cause():
    # reported: "only 0 of 40 points in the band are free of spurs"
    said = _settings(averages=100, points=40, span_hz=39e6)
    with pytest.raises(MeasurementError, match="averaging left off") as info:
        estimate_density(_noise_trace(5, 1, said))
    assert "spurs" not in str(info.value)


@pytest.mark.parametrize("true_averages", [1, 3, 10, 100])
def test_clean_traces_are_never_refused_by_the_scatter_state_checks(true_averages):
    """The checks' false-alarm rate is 1e-6 per trace by design: 200 clean traces per setting
    pass (a false alarm here would have probability < 4e-4)."""
    said = _settings(averages=true_averages)
    for seed in range(200):
        estimate_density(_noise_trace(1000 + seed, true_averages, said))


def test_scpi_not_a_number_is_named():
    # reported: 9.91e37 in a trace overflowed and failed with "level: must be > 0"
    s = _settings(averages=100)
    trace = _noise_trace(6, 100, s)
    values = trace.values.copy()
    values[17] = 9.91e37
    with pytest.raises(InputError, match=r"no data at point 17 \(967 MHz\)") as info:
        with np.errstate(all="raise"):  # and no numpy overflow warning on the way
            estimate_density(trace.model_copy(update={"values": values}))
    assert "not-a-number" in str(info.value)


def test_wrong_byte_order_is_named():
    # reported: a profile announcing one byte order while the instrument sends the other gave
    # "level: must be > 0" and a numpy overflow warning
    s = _settings(averages=100)
    trace = _noise_trace(7, 100, s)
    swapped = trace.values.astype(">f4").view("<f4").astype(float)
    with pytest.raises(InputError, match="byte-order"):
        with np.errstate(all="raise"):
            estimate_density(trace.model_copy(update={"values": swapped}))


def test_linear_trace_with_dbm_values_is_named():
    s = _settings(averages=100)
    trace = _noise_trace(8, 100, s)
    with pytest.raises(InputError, match="trace unit"):
        estimate_density(trace.model_copy(update={"unit": TraceUnit.WATT}))


# --- 6. calibration flags reach the points -------------------------------------------------------


def test_calibration_flags_map_to_point_flags():
    assert calibration_point_flags(["time_limit", "y_too_small", "enr_extrapolated"]) == [
        PointFlag.CAL_TIME_LIMIT,
        PointFlag.CAL_Y_TOO_SMALL,
        PointFlag.ENR_EXTRAPOLATED,
    ]
    assert calibration_point_flags([PointFlag.EXCESS_SCATTER, "unknown"]) == [
        PointFlag.CAL_EXCESS_SCATTER
    ]


def test_y_factor_point_carries_the_calibrations_flags():
    # reported: a calibration with Y 0.3-0.6 dB printed a warning, but points kept only
    # enr_extrapolated from it
    enr_db, tc = 5.0, 296.5
    th = T0 * 10 ** (enr_db / 10) + tc
    te2 = 30 * T0  # a noisy system: Y = 0.55 dB
    y_cal = (th + te2) / (tc + te2)
    cal = calibrate_point(
        density(y_cal * 1e-18, 1e-4), density(1e-18, 1e-4), enr_db, cold_temperature_k=tc
    )
    assert PointFlag.Y_TOO_SMALL in cal.flags
    g = 100.0
    te1 = 100.0
    hot = K * g * (th + te1) + K * te2
    cold = K * g * (tc + te1) + K * te2
    scale = 1e-18 / (K * (tc + te2))  # calibration densities were scaled to 1e-18 W/Hz
    r = y_factor_point(
        density(hot * scale, 1e-4),
        density(cold * scale, 1e-4),
        enr_db,
        cold_temperature_k=tc,
        calibration=cal,
    )
    assert r.te_k == pytest.approx(te1, rel=1e-6)
    assert PointFlag.CAL_Y_TOO_SMALL in r.flags


# --- 8. messages ---------------------------------------------------------------------------------


def test_y_just_above_one_says_so():
    # reported: "hot reading is not above the cold one" although hot was above cold (Y - 1 <
    # 1e-6: the numerical derivative step crossed)
    with pytest.raises(MeasurementError) as info:
        y_factor_point(density(1.0000005e-20), density(1e-20), 15.0, cold_temperature_k=290.0)
    text = str(info.value)
    assert "Y - 1 = 5e-07" in text and "not above" not in text
    with pytest.raises(MeasurementError, match="Y - 1 = 5e-07"):
        calibrate_point(density(1.0000005e-20), density(1e-20), 15.0, cold_temperature_k=290.0)


def test_scatter_state_false_alarm_design_is_the_chi_square_quantile():
    """80 successive differences of 81 independent Gaussian points: 2*80/3 degrees of freedom
    (their squares' relative variance is 3/N: neighbouring differences share a point), and the
    low limit is the 1e-6 quantile of chi2(dof)/dof (scipy.stats)."""
    from noisebench.science.estimator import SCATTER_STATE_FALSE_ALARM, scatter_state

    rng = np.random.default_rng(9)
    power = rng.normal(1.0, 0.01, 81)
    state = scatter_state(power, 1e-4, np.array([1.0, 0.0]), 0.0)
    dof = 2 * 80 / 3
    assert state is not None and state.dof == pytest.approx(dof)
    assert state.low_limit == pytest.approx(
        math.sqrt(stats.chi2.ppf(SCATTER_STATE_FALSE_ALARM, dof) / dof)
    )
    assert state.ratio == pytest.approx(1.0, abs=5 * 0.5 * math.sqrt(3 / 80))
    # the relative variance of the mean squared difference is (k + 3)/N: check by Monte Carlo
    sims = rng.normal(0.0, 1.0, (20000, 81))
    msd = np.mean(np.diff(sims, axis=1) ** 2, axis=1) / 2.0
    assert np.var(msd) == pytest.approx(3 / 80, rel=0.05)


# --- 7. false spur exclusions match the design rate at any trace length -------------------------


@pytest.mark.parametrize(
    "points, averages, traces",
    [(9, 1, 1500), (27, 1, 1000), (27, 10, 1000), (101, 1, 300)],
)
def test_false_spur_exclusions_match_the_design_rate(points, averages, traces):
    """Clean noise (independent gamma points) at a 3-sigma threshold, so that the design rate
    (one-sided normal tail 1.35e-3 per point) is countable in a few thousand traces. Before the
    fix a short trace's single noisy median gave 6.4x (9 points) and 2.3x (27 points) the
    design rate; now the count must lie within the Poisson limits of the design (at most the
    design plus 5 sigma, and not below 0.3x: the threshold must not be far too high either)."""
    from noisebench.science.estimator import _prepare

    s = _settings(averages=averages, points=points, span_hz=3e6 * (points - 1))
    rng = np.random.default_rng(4242 + points + averages)
    freqs = s.frequencies_hz()
    found = 0
    for _ in range(traces):
        p = rng.gamma(averages, 1e-12 / averages, points)
        trace = Trace(freq_hz=freqs, values=10 * np.log10(p / 1e-3), settings=s)
        found += _prepare(trace, reject_spurs=True, threshold_sigma=3.0).spurs_hz.size
    design = stats.norm.sf(3.0) * points * traces
    assert 0.3 * design <= found <= design + 5 * math.sqrt(design), (found, design)


def test_median_threshold_ratio_matches_monte_carlo():
    """P(X > t * median of m points) = 1e-3 checked by drawing (numpy), for small m."""
    from noisebench.science.estimator import median_threshold_ratio

    rng = np.random.default_rng(77)
    for shape, bins in ((1.0, 9), (4.0, 11)):
        t = median_threshold_ratio(shape, bins, 1e-3)
        med = np.median(rng.gamma(shape, 1 / shape, (200_000, bins)), axis=1)
        rate = np.mean(rng.gamma(shape, 1 / shape, 200_000) > t * med)
        assert rate == pytest.approx(1e-3, abs=5 * math.sqrt(1e-3 / 200_000))


# --- 8. connection failures in words ------------------------------------------------------------


def test_refused_connection_is_named_at_open():
    # reported: a refused TCP connection printed "opened ..." and then "the instrument closed
    # the connection (before '*IDN?')"
    import socket

    from noisebench.drivers.transport import VisaSession
    from noisebench.errors import CommunicationError

    free = socket.create_server(("127.0.0.1", 0))
    port = free.getsockname()[1]
    free.close()
    with pytest.raises(CommunicationError) as info:
        VisaSession(f"TCPIP0::127.0.0.1::{port}::SOCKET", timeout_s=1.0, open_timeout_s=2.0)
    text = str(info.value)
    assert "connection refused" in text and "nothing listens on that port" in text
    assert "closed the connection" not in text


def test_unreachable_host_is_named_in_words():
    # reported: an unreachable host gave the raw VISA code -1073807339 (VI_ERROR_TMO)
    import pyvisa

    from noisebench.drivers.transport import VisaSession
    from noisebench.errors import CommunicationError

    class Unreachable:
        def open_resource(self, resource, open_timeout=None):
            raise pyvisa.errors.VisaIOError(pyvisa.constants.StatusCode.error_timeout)

    with pytest.raises(CommunicationError) as info:
        VisaSession(
            "TCPIP0::192.0.2.1::5025::SOCKET", resource_manager=Unreachable(), open_timeout_s=3
        )
    message = info.value.message
    assert "no connection within 3 s" in message and "check the IP address" in message
    assert "-1073807339" not in message and "VI_ERROR_TMO" not in message
    assert info.value.visa_code == -1073807339  # kept for the log, not as the message


# --- 2. unit slips in tables, caught by validate on the table alone -----------------------------


def test_enr_table_in_mhz_under_a_freq_hz_header_is_refused_alone(tmp_path):
    # reported: only caught when a plan used the table, not by `validate` on the table
    from noisebench.science.enr import validate_enr_file

    path = tmp_path / "enr.csv"
    path.write_text("freq_hz,enr_db\n10,15.2\n1000,15.1\n18000,14.6\n", encoding="utf-8")
    problems = validate_enr_file(path)
    assert len(problems) == 1
    assert "enr.csv line 2, freq_hz" in problems[0] and "look like MHz" in problems[0]
    assert "highest 18 kHz" in problems[0]


@pytest.mark.parametrize(
    "line, expected",
    [
        ("# nominal_drive_v: inf", "nominal_drive_v: Input should be a finite number"),
        ("# nominal_drive_v: 280", "280 V is above the plausible 60 V"),
        ("# calibration_temperature_k: 23", "looks like degrees Celsius"),
    ],
)
def test_enr_table_header_values_get_their_ranges(tmp_path, line, expected):
    from noisebench.science.enr import validate_enr_file

    path = tmp_path / "enr.csv"
    path.write_text(f"{line}\nfreq_hz,enr_db\n1e9,15.2\n2e9,15.1\n", encoding="utf-8")
    problems = validate_enr_file(path)
    assert len(problems) == 1 and expected in problems[0], problems
    assert "enr.csv line 1" in problems[0]


def test_loss_table_temperature_refuses_celsius_and_allows_a_stated_cryogenic_cable():
    from noisebench.science.gain_files import GainTable

    with pytest.raises(InputError, match="looks like degrees Celsius"):
        GainTable.from_csv("# temperature_k: 23\nfreq_hz,loss_db\n1e9,0.5\n2e9,0.7\n")
    with pytest.raises(InputError, match="cryogenic: true"):
        GainTable.from_csv("# temperature_k: 77\nfreq_hz,loss_db\n1e9,0.5\n2e9,0.7\n")
    cold = GainTable.from_csv(
        "# temperature_k: 77\n# cryogenic: true\nfreq_hz,loss_db\n1e9,0.5\n2e9,0.7\n"
    )
    assert cold.temperature_k == 77.0


def test_gain_table_in_mhz_is_refused_and_khz_states_a_low_table_on_purpose():
    from noisebench.science.gain_files import GainTable

    with pytest.raises(InputError, match="look like MHz"):
        GainTable.from_csv("freq_hz,gain_db\n500,20\n2500,19\n")
    low = GainTable.from_csv("freq_khz,gain_db\n50,20\n250,19\n")
    assert low.range_hz == (50e3, 250e3)


def test_range_table_is_complete_and_sourced():
    from noisebench.science.ranges import RANGES, check_range, describe_ranges

    for key, spec in RANGES.items():
        assert spec.source, key
        if spec.refuse_below is not None and spec.usual_low is not None:
            assert spec.refuse_below <= spec.usual_low, key
        if spec.refuse_above is not None and spec.usual_high is not None:
            assert spec.usual_high <= spec.refuse_above, key
    rows = describe_ranges()
    assert [row[0] for row in rows] == list(RANGES)
    assert ("reference_temperature_k", "200..400 K", "290 K") == rows[1][:3]
    # the liquid-nitrogen cold load: refused as a typo, accepted when stated on purpose
    with pytest.raises(InputError, match="cryogenic = true"):
        check_range("physical_temperature_k", "cold_temperature_k", 77.0)
    assert check_range("physical_temperature_k", "cold_temperature_k", 77.0, on_purpose=True) == 77
    with pytest.raises(InputError, match="below the plausible 1 K"):
        check_range("physical_temperature_k", "cold_temperature_k", 0.5, on_purpose=True)


def test_unusual_values_warn_once(caplog):
    from noisebench.science.ranges import check_range

    with caplog.at_level("WARNING", logger="noisebench.science.ranges"):
        for _ in range(3):
            check_range("dut_gain_db", "expect.dut_gain_db", -6.0)
    warnings = [r for r in caplog.records if "expect.dut_gain_db" in r.getMessage()]
    assert len(warnings) == 1 and "legal but unusual" in warnings[0].getMessage()


# --- 2. unit slips and implausible settings in plans (one range mechanism) ---------------------


def _plan_problems(**sections) -> list[str]:
    from noisebench.running.plan import PlanError, parse_plan

    data = {
        "method": "y_factor",
        "bench": {"analyzer": "sim://demo-lna?seed=1"},
        "sweep": {"freqs_hz": [1e9, 2e9]},
    }
    for key, value in sections.items():
        data[key] = {**data.get(key, {}), **value} if isinstance(value, dict) else value
    try:
        parse_plan(data, check_files=False)
    except PlanError as exc:
        return exc.problems
    return []


@pytest.mark.parametrize(
    "sections, expected",
    [
        # reported: source_temperature_k = 23 (meant 23 degC) ran silently, NF 2.5 dB off
        (
            {"corrections": {"source_temperature_k": 23.0}},
            "corrections.source_temperature_k: 23 K is below the plausible 200 K: a value this "
            "low looks like degrees Celsius",
        ),
        ({"corrections": {"input_loss_temperature_k": 25.0}}, "25 degC would be 298.15 K"),
        ({"bench": {"analyzer": "sim://demo-lna?seed=1", "ambient_k": 21.5}}, "bench.ambient_k"),
        ({"corrections": {"source_temperature_k": 77.0}}, "say cryogenic = true"),
        ({"sweep": {"freqs_hz": [2000.0]}}, "sweep.freqs_hz[0]: 2 kHz is below the plausible"),
        ({"acquisition": {"rbw_hz": 0.001}}, "looks like kHz or MHz given where Hz is asked"),
        # issue 14's list: values no bench can have
        (
            {"bench": {"analyzer": {"resource": "sim://demo-lna?seed=1", "max_input_dbm": -1e308}}},
            "bench.analyzer.max_input_dbm: -1e+308 dBm is below the plausible -30 dBm",
        ),
        (
            {
                "bench": {
                    "analyzer": {
                        "resource": "sim://demo-lna?seed=1",
                        "max_input_dbm": 20.0,
                        "compression_dbm": 20.0,
                    }
                }
            },
            "compression_dbm: 20 dBm is not below max_input_dbm 20 dBm",
        ),
        (
            {
                "bench": {
                    "analyzer": "sim://demo-lna?seed=1",
                    "generator": {"resource": "sim", "max_level_dbm": -1e308},
                }
            },
            "bench.generator.max_level_dbm: -1e+308 dBm is below the plausible -150 dBm",
        ),
        ({"expect": {"dut_gain_db": -75.0}}, "expect.dut_gain_db: -75 dB is below"),
        (
            {"limits": {"bands": [{"start_hz": 1e9, "stop_hz": 2e9, "nf_max_db": -1.0}]}},
            "nf_max_db: -1 dB is below the plausible 0 dB",
        ),
    ],
)
def test_implausible_plan_values_are_refused_with_the_likely_slip(sections, expected):
    problems = _plan_problems(**sections)
    assert any(expected in p for p in problems), problems


def test_a_cryogenic_cold_load_stated_on_purpose_stays_possible():
    assert _plan_problems(corrections={"source_temperature_k": 77.0, "cryogenic": True}) == []


@pytest.mark.parametrize(
    "sections, label",
    [
        # issue 14's list: legal but unusual values warn once (attenuators stay possible)
        (
            {"bench": {"analyzer": {"resource": "sim://demo-lna?seed=1", "max_input_dbm": -1.0}}},
            "bench.analyzer.max_input_dbm",
        ),
        ({"expect": {"dut_gain_db": 0.0}}, "expect.dut_gain_db"),
        ({"expect": {"dut_gain_db": -1.0}}, "expect.dut_gain_db"),
        (
            {"limits": {"bands": [{"start_hz": 1e9, "stop_hz": 2e9, "gain_min_db": 0.0}]}},
            "limits.bands[].gain_min_db",
        ),
        (
            {
                "method": "gain",
                "bench": {"analyzer": "sim://demo-lna?seed=1", "generator": "sim"},
                "gain": {"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": -1.0},
            },
            "gain.dut_p1db_out_dbm",
        ),
        ({"acquisition": {"rbw_hz": 300.0}}, "acquisition.rbw_hz"),
    ],
)
def test_unusual_plan_values_warn_once(sections, label, caplog):
    from noisebench.science import ranges

    ranges._warned.clear()
    with caplog.at_level("WARNING", logger="noisebench.science.ranges"):
        assert _plan_problems(**sections) == []
        _plan_problems(**sections)  # the same value again: no second warning
    lines = [r.getMessage() for r in caplog.records if label in r.getMessage()]
    assert len(lines) == 1 and "legal but unusual" in lines[0], caplog.text


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    field=st.sampled_from(
        ["source_temperature_k", "input_loss_temperature_k", "output_loss_temperature_k"]
    ),
    kelvin=st.one_of(st.floats(0.01, 199.9), st.floats(500.1, 1e6)),
)
def test_random_out_of_range_temperatures_never_run_silently(field, kelvin):
    problems = _plan_problems(corrections={field: kelvin})
    assert any(f"corrections.{field}" in p and "plausible" in p for p in problems), problems


# --- 4. end to end over TCP: a profile whose byte order disagrees with its command --------------


def test_wrong_byte_order_in_a_profile_is_named_over_the_socket(sim_server, tmp_path):
    """The profile sends FORM:BORD NORM (big-endian) but decodes little-endian: every trace
    is garbage. The error names the byte order, never a level or an overflow."""
    from importlib.resources import files

    from noisebench.bench.acquisition import AcquisitionRequest
    from noisebench.drivers import open_analyzer
    from noisebench.errors import CommunicationError

    text = (files("noisebench.drivers") / "profiles" / "generic.toml").read_text(encoding="utf-8")
    assert text.count("big_endian = true") == 1
    profile = tmp_path / "swapped.toml"
    profile.write_text(text.replace("big_endian = true", "big_endian = false"), encoding="utf-8")
    sa = open_analyzer(sim_server.resource("analyzer"), profile, timeout_s=10.0)
    try:
        sa.configure(
            AcquisitionRequest(center_hz=1e9, span_hz=10e6, rbw_hz=1e6, averages=4, points=101)
        )
        with np.errstate(all="raise"), pytest.raises((InputError, CommunicationError)) as info:
            sa.acquire_trace()
    finally:
        sa.close()
    text = str(info.value)
    assert "byte-order" in text and "big_endian" in text and "mis-decoded" in text, text
    assert "must be > 0" not in text
