"""Converter plans end to end: validation of the [conversion] section, the sequencer (LO per
point, IF calibration, LO lines cut, LO off at the end, power guard counting the LO line) and
the results files."""

from __future__ import annotations

import copy
import csv
import math
from pathlib import Path

import pytest

from noisebench.bench.registry import simulated_session
from noisebench.errors import InputError, SafetyError
from noisebench.running.plan import load_plan, parse_plan
from noisebench.running.sequencer import Sequencer
from noisebench.sims.bench import SimulatedBench

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

BASE = {
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


def plan_with(**changes):
    data = copy.deepcopy(BASE)
    for key, value in changes.items():
        section, _, name = key.partition("__")
        if name:
            data[section][name] = value
        elif value is None:
            data.pop(section, None)
        else:
            data[section] = value
    return parse_plan(data)


def problems_of(**changes) -> str:
    with pytest.raises(InputError) as info:
        plan_with(**changes)
    return str(info.value)


# --------------------------------------------------------------------------- plan checks


def test_points_are_read_at_the_if_and_reported_at_the_rf():
    points = plan_with().points()
    assert [(p.report_hz, p.freq_hz, p.lo_hz) for p in points] == [
        (2.2e9, 400e6, 1.8e9),
        (2.4e9, 400e6, 2.0e9),
    ]
    fixed_lo = plan_with(
        conversion__mode="fixed_lo",
        conversion__lo_hz=1.9e9,
        conversion__if_hz=None,
        conversion__sideband=None,
    )
    # a fixed LO lets one trace cover several IF points
    assert [p.freq_hz for p in fixed_lo.points()] == pytest.approx([300e6, 500e6])


def test_triples_make_their_own_sweep():
    data = copy.deepcopy(BASE)
    data.pop("sweep")
    data["conversion"] = {
        "mode": "triples",
        "triples": [[2.1e9, 1.7e9, 0.4e9], [2.45e9, 3.05e9, 0.6e9]],
        "image_rejection_db": "none",
        "lo": {"level_dbm": 10.0},
        "lo_leakage_dbm": -30.0,
    }
    plan = parse_plan(data)
    assert [(p.report_hz, p.lo_hz, p.freq_hz) for p in plan.points()] == [
        (2.1e9, 1.7e9, 0.4e9),
        (2.45e9, 3.05e9, 0.6e9),
    ]
    data["sweep"] = {"freqs_hz": [2e9]}
    with pytest.raises(InputError, match="sweep: is not used in conversion mode 'triples'"):
        parse_plan(data)


@pytest.mark.parametrize(
    ("changes", "expected"),
    [
        # the IF must lie in the analyzer's range (the simulated analyzer stops at 7.5 GHz)
        (
            {
                "conversion__if_hz": 8e9,
                "conversion__sideband": "lower",
                "sweep": {"freqs_hz": [10e9]},
            },
            "outside the analyzer",
        ),
        # the IF band must stay clear of the LO line (LO 408 MHz, IF 400 MHz +/- 5 MHz, keep-out
        # 5 RBW = 5 MHz)
        ({"sweep": {"freqs_hz": [0.808e9]}}, "overlaps LO leakage at 408 MHz"),
        # ENR table (simulated source: 10 MHz-18 GHz) must cover the image when there is one
        (
            {
                "conversion__if_hz": 10e9,
                "conversion__sideband": "lower",
                "sweep": {"freqs_hz": [2e9]},
            },
            "does not cover the image",
        ),
        ({"conversion__sideband": "lower", "conversion__mode": "fixed_lo"}, "lo_hz"),
        ({"conversion__lo": {"source": "generator"}}, "conversion.lo.level_dbm"),
        (
            {"conversion__lo": {"source": "external"}, "conversion__lo_leakage_dbm": None},
            "conversion.lo_leakage_dbm: needed with an external LO",
        ),
        ({"conversion__image_rejection_db": -40.0}, "conversion.image_rejection_db"),
        ({"conversion__nf_type": "both"}, "conversion.nf_type"),
    ],
)
def test_conversion_problems_name_the_key(changes, expected):
    changes = {k: v for k, v in changes.items()}
    data = copy.deepcopy(BASE)
    for key, value in changes.items():
        section, _, name = key.partition("__")
        if name and value is None:
            data[section].pop(name, None)
        elif name:
            data[section][name] = value
        else:
            data[section] = value
    with pytest.raises(InputError) as info:
        parse_plan(data)
    assert expected in str(info.value)


def test_fixed_lo_sideband_must_match_the_sweep():
    text = problems_of(
        conversion={
            "mode": "fixed_lo",
            "lo_hz": 2.6e9,
            "sideband": "upper",
            "image_rejection_db": "equal",
            "lo_leakage_dbm": -30.0,
            "lo": {"level_dbm": 10.0},
        }
    )
    assert "conversion.sideband" in text and "lower side of the LO" in text


def test_lo_level_must_respect_the_lo_generators_limit():
    data = copy.deepcopy(BASE)
    data["bench"] = {
        "analyzer": {"resource": "TCPIP0::127.0.0.1::5025::SOCKET"},
        "lo": {"resource": "TCPIP0::127.0.0.1::5028::SOCKET", "max_level_dbm": 7.0},
    }
    data["enr"] = {"table": str(EXAMPLES / "enr_demo_source.csv")}
    with pytest.raises(InputError, match=r"conversion.lo.level_dbm: 10 dBm is above"):
        parse_plan(data, check_files=True)
    data["bench"].pop("lo")
    with pytest.raises(InputError, match="bench.lo: the LO comes from a generator"):
        parse_plan(data, check_files=True)


# --------------------------------------------------------------------------- runs


def _run(plan, tmp_path, seed=2, **overrides):
    sim = SimulatedBench.from_scenario("demo-downconverter", seed=seed, ideal=True, **overrides)
    record = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "run")
    return sim, record


def test_run_sets_the_lo_per_point_and_switches_it_off(tmp_path):
    plan = plan_with()
    seen = []
    sim = SimulatedBench.from_scenario("demo-downconverter", seed=2, ideal=True)
    seq = Sequencer(
        plan,
        simulated_session(sim, plan.bench),
        on_point=lambda p: seen.append(
            (p.freq_hz, sim.lo_generator.freq_hz, sim.lo_generator.level_dbm)
        ),
    )
    record = seq.run(tmp_path / "run")
    assert record.info.status == "complete"
    assert seen == [(2.2e9, 1.8e9, 10.0), (2.4e9, 2.0e9, 10.0)]
    assert not sim.lo_generator.output_on  # safe state at the end
    # the analyzer was calibrated once, at the IF (both points share it)
    assert seq.calibrations_measured == 1
    assert [c["freq_hz"] for e in record.info.calibration["entries"] for c in e["summary"]] == [
        400e6
    ]
    for p in record.points:
        truth = sim.converter_truth(p.freq_hz, p.conversion.lo_hz, 10.0)
        assert p.conversion.if_hz == 400e6 and p.conversion.sideband == "upper"
        assert p.conversion.image_correction_db == pytest.approx(10 * math.log10(1 + 10**-1.4))
        # stated image rejection 14 dB vs true ~14-18 dB: only the SSB/DSB split leans on it
        assert abs(p.conversion.nf_dsb_db - truth["nf_dsb_db"]) < 5 * p.u_nf_db
    notes = record.info.notes["conversion"]
    assert notes["mode"] == "fixed_if" and len(notes["points"]) == 2


def test_results_csv_carries_the_frequency_plan(tmp_path):
    from noisebench.results.exports import results_csv_text

    _, record = _run(plan_with(), tmp_path)
    rows = list(csv.DictReader(results_csv_text(record).splitlines()))
    assert [r["rf_hz"] for r in rows] == ["2200000000.0", "2400000000.0"]
    assert [r["lo_hz"] for r in rows] == ["1800000000.0", "2000000000.0"]
    assert {r["if_hz"] for r in rows} == {"400000000.0"}
    assert {r["sideband"] for r in rows} == {"upper"} and {r["nf_type"] for r in rows} == {"ssb"}
    for r in rows:
        assert float(r["nf_ssb_db"]) - float(r["nf_dsb_db"]) == pytest.approx(
            float(r["image_correction_db"])
        )


def test_lo_off_at_the_converter_is_refused_point_by_point(tmp_path):
    plan = plan_with(conversion__lo={"source": "external"})
    _, record = _run(plan, tmp_path)  # nothing drives the simulated LO: no conversion
    assert record.points == []
    reasons = {s["reason"] for s in record.info.notes["skipped_points"]}
    assert all("LO is on" in r for r in reasons)
    assert {s["freq_hz"] for s in record.info.notes["skipped_points"]} == {2.2e9, 2.4e9}


def test_power_guard_counts_the_lo_line(tmp_path):
    # without a declared LO leakage the guard assumes the whole LO drive reaches the analyzer
    plan = plan_with(conversion__lo_leakage_dbm=None)
    with pytest.raises(SafetyError, match="noise source hot"):
        _run(plan, tmp_path)


def test_resume_skips_points_stored_at_their_rf(tmp_path):
    plan = plan_with()
    sim = SimulatedBench.from_scenario("demo-downconverter", seed=2, ideal=True)
    stop = {"n": 0}

    def interrupt(point):
        stop["n"] += 1
        raise KeyboardInterrupt

    record = Sequencer(plan, simulated_session(sim, plan.bench), on_point=interrupt).run(
        tmp_path / "run"
    )
    assert record.info.status == "interrupted" and len(record.points) == 1
    again = Sequencer(plan, simulated_session(sim, plan.bench)).run(tmp_path / "run", resume=True)
    assert again.info.status == "complete"
    assert sorted(p.freq_hz for p in again.points) == [2.2e9, 2.4e9]


def test_example_plan_validates_and_runs(tmp_path):
    plan = load_plan(EXAMPLES / "downconverter_simulated.toml")
    assert plan.conversion is not None and len(plan.points()) == 9


def test_converter_run_with_an_uncertainty_section_writes_full_budgets(tmp_path):
    # was refused at plan time ("full budgets are not available for a frequency-converting DUT")
    plan = plan_with(
        uncertainty={"cold_temperature_k": 0.5, "linearity_db": 0.02, "input_loss_db": 0.02}
    )
    _, record = _run(plan, tmp_path)
    budgets = record.budgets_by_freq()
    assert sorted(budgets) == [2.2e9, 2.4e9]  # keyed by the RF, like the points
    for p in record.points:
        b = budgets[p.freq_hz]
        assert b["model"] == "converter_y_factor"
        assert b["nf_db"] == pytest.approx(p.nf_db, abs=1e-9)
        names = {c["name"] for c in b["contributions"]}
        assert {"ENR at the RF", "ENR at the image", "ENR at the IF (calibration)"} <= names
        assert "image rejection" not in names  # a number without u: no term
        # the full budget holds the statistical part and more (ENR at three frequencies)
        assert b["u_combined_db"] > p.u_nf_db


# --------------------------------------------------------------------------- forecasts


@pytest.mark.parametrize("method", ["y_factor", "gain"])
def test_forecast_of_a_converter_plan_matches_the_measured_averaging(tmp_path, method):
    # was refused: "noisebench estimate does not forecast frequency-converting DUTs yet"
    from noisebench.running.forecast import forecast_plan
    from noisebench.sims.forecast_model import SimulatedBenchModel

    changes: dict = {"acquisition__target_u_nf_db": 0.05}
    if method == "gain":
        changes |= {"method": "gain", "gain": {"source": "constant", "value_db": 21.5}}
    plan = plan_with(**changes)
    sim = SimulatedBench.from_scenario("demo-downconverter", seed=5, ideal=True)
    forecast = forecast_plan(plan, model=SimulatedBenchModel(sim))
    _, record = _run(plan, tmp_path, seed=5)
    assert [f.freq_hz for f in forecast.points] == [400e6, 400e6]  # read at the IF
    assert [f.rf_hz for f in forecast.points] == [2.2e9, 2.4e9]
    # one IF, one calibration (the sequencer finds calibrations by IF)
    assert forecast.points[0].calibration_averages > 0
    assert forecast.points[1].calibration_averages == 0
    assert len(record.calibrations) == 1
    for f, p in zip(forecast.points, record.points, strict=True):
        assert 0.045 < f.u_nf_db <= 0.05 and f.limited_by is None
        # the same bound as the amplifier forecast (tests/test_sequencer.py): measured =
        # forecast x planning margin, pilot rounds and the scatter of the u estimate
        assert 0.8 < p.averages / f.averages < 2.0, (p.averages, f.averages)


REAL_BENCH = {
    "analyzer": {"resource": "TCPIP0::127.0.0.1::5025::SOCKET"},
    "lo": {"resource": "TCPIP0::127.0.0.1::5028::SOCKET", "max_level_dbm": 13.0},
}


def test_forecast_of_a_converter_plan_from_declared_priors(tmp_path):
    from noisebench.running.forecast import forecast_plan

    table = tmp_path / "enr.csv"
    table.write_text("freq_hz,enr_db,u_enr_db\n1e8,15.0,0.1\n5e9,15.0,0.1\n")
    expect = {"dut_gain_db": 20.0, "dut_nf_db": 5.0, "analyzer_nf_db": 12.0, "enr_db": 15.0}
    common = dict(
        bench=REAL_BENCH, expect=expect, sweep={"freqs_hz": [2.2e9]}, enr={"table": str(table)}
    )
    none = forecast_plan(plan_with(conversion__image_rejection_db="none", **common)).points[0]
    # no image response and one flat ENR: the converter read at the IF is an amplifier at the
    # IF (eqs. 1-5 with r = 0), so the forecast must be the amplifier's, average for average
    amplifier = forecast_plan(
        plan_with(conversion=None, **(common | {"sweep": {"freqs_hz": [400e6]}}))
    ).points[0]
    assert none.freq_hz == amplifier.freq_hz == 400e6
    assert (none.averages, none.calibration_averages) == (
        amplifier.averages,
        amplifier.calibration_averages,
    )
    assert none.u_nf_db == pytest.approx(amplifier.u_nf_db, rel=1e-9)
    # the image share: at the same SSB NF, equal responses leave less added noise
    # (Te_SSB = T0 (F - 1 - r)) and twice the source's excess at the IF: a larger Y, fewer
    # averages to the same target (the forecast plays the sequencer's rounds, whose whole
    # averages may come out equal: then the same averages reach a lower u)
    equal = forecast_plan(plan_with(conversion__image_rejection_db="equal", **common)).points[0]
    assert equal.averages < none.averages or (
        equal.averages == none.averages and equal.u_nf_db < none.u_nf_db
    )
    assert 0.0 < equal.u_nf_db <= 0.15 * (1 + 1e-9)


# --------------------------------------------------------------------------- report


def test_report_of_a_converter_run_has_a_frequency_plan_section(tmp_path):
    from noisebench.results.report import render_report

    _, record = _run(plan_with(), tmp_path)
    html = render_report(record, {})
    assert '<h2 id="frequency-plan">Frequency plan</h2>' in html
    assert 'href="#frequency-plan"' in html
    section = html.split('id="frequency-plan"')[1].split("<h2")[0]
    for text in ("fixed_if", "upper", "SSB", "14 dB", "LO (GHz)", "Image (GHz)", "IF (GHz)"):
        assert text in section, text
    # each point's LO and image, in the table's unit (GHz): RF 2.2 GHz -> LO 1.8, image 1.4
    for p in record.points:
        c = p.conversion
        assert f"<td>{c.lo_hz / 1e9:.1f}</td>" in section
        assert f"<td>{c.image_hz / 1e9:.1f}</td>" in section
