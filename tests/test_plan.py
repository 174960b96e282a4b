"""Plans: TOML loading, one message per problem with its key path, point generation."""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pytest

from noisebench.bench.acquisition import AveragingScale, Detector
from noisebench.errors import InputError
from noisebench.running.plan import (
    PlanError,
    load_plan,
    parse_plan,
    validate_plan_file,
)
from noisebench.science.point import Method
from noisebench.sims.address import parse_sim_address


def _base(**sections) -> dict:
    plan = {
        "method": "y_factor",
        "bench": {"analyzer": "sim://demo-lna?seed=1"},
        "sweep": {"freqs_hz": [1e9, 2e9]},
    }
    plan.update(sections)
    return plan


def _problems(data: dict, **kwargs) -> list[str]:
    with pytest.raises(PlanError) as info:
        parse_plan(data, **kwargs)
    return info.value.problems


def _write(tmp_path: Path, text: str, name: str = "plan.toml") -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


# --------------------------------------------------------------------------- messages


def test_several_problems_reported_at_once_with_key_paths():
    data = _base(
        sweep={
            "segments": [
                {"start_hz": 1e9, "stop_hz": 2e9, "points": 3},
                {"freqs_hz": [1.5e9, -2.0]},
                {"start_hz": 3e9, "stop_hz": 4e9, "points": 3, "rbw_hz": -1.0},
                {"start_hz": 5e9},
            ]
        },
        corrections={"source_temperature_k": "hot"},
    )
    data["bench"]["bogus"] = 1
    problems = _problems(data)
    assert problems == [
        "bench.bogus: unknown key (check its spelling and section)",
        "sweep.segments[1].freqs_hz[1]: must be a finite frequency > 0 (got -2.0)",
        "sweep.segments[2].rbw_hz: must be > 0.0 (got -1.0)",
        "sweep.segments[3].stop_hz: is missing: a range needs start_hz and stop_hz",
        "corrections.source_temperature_k: must be a number or 'bench' (got 'hot')",
    ]


def test_nested_section_messages_carry_no_pydantic_prefix():
    data = _base(
        uncertainty={"enr_db": {"expanded": 0.2}},
        limits={"bands": [{"start_hz": 1e9, "stop_hz": 0.5e9, "nf_max_db": 2.0}]},
    )
    problems = _problems(data)
    assert any(
        p.startswith("uncertainty.enr_db: 'expanded' and 'k' go together") for p in problems
    ), problems
    assert any(p.startswith("limits.bands[0].stop_hz: must be above start_hz") for p in problems), (
        problems
    )
    assert not any("value error" in p.lower() for p in problems)


def test_plan_error_is_an_input_error_listing_every_problem():
    data = _base(acquisition={"rbw_hz": 0}, gain={"source": "file"})
    with pytest.raises(InputError) as info:
        parse_plan(data, source="p.toml")
    text = str(info.value)
    assert text.startswith("plan: p.toml: 2 problem(s) in the plan")
    assert "acquisition.rbw_hz: must be > 0.0 (got 0)" in text
    assert 'gain.file: is required with source = "file"' in text


def test_cross_field_problems_after_schema_checks():
    data = _base(
        sweep={
            "freqs_hz": [1e9, 2e9],
            "segments": [
                {"start_hz": 1e9, "stop_hz": 2e9, "points": 2, "span_hz": 1e3},
                {"freqs_hz": [3e9], "min_averages": 50_000},
            ],
        }
    )
    data["method"] = "gain"
    assert _problems(data) == [
        "sweep.segments[0].span_hz: 1 kHz is narrower than rbw_hz 1 MHz "
        "(use span_hz >= rbw_hz, or 0 for zero span)",
        "sweep.segments[1].min_averages: 50000 exceeds max_averages 20000 "
        "(make min_averages <= max_averages)",
        "sweep.segments[0]: 1 GHz is also in sweep.freqs_hz (each frequency once)",
        "sweep.segments[0]: 2 GHz is also in sweep.freqs_hz (each frequency once)",
        'gain: the gain method needs the DUT gain ([gain] source = "measure", "file" or '
        '"constant")',
    ]


def test_peak_detector_refused_for_noise():
    (line,) = _problems(_base(acquisition={"detector": "peak"}))
    assert line.startswith("acquisition.detector: 'peak' is biased for noise")
    assert 'use "rms" or "sample"' in line


def test_gain_measure_needs_a_generator_and_y_factor_needs_a_source():
    (line,) = _problems(_base(method="gain", gain={"source": "measure"}))
    assert line == (
        'gain.max_gain_db: is required with source = "measure" (it sets the '
        "generator level) (give the DUT's datasheet value)"
    )
    data = _base(
        method="gain", gain={"source": "measure", "max_gain_db": 30.0, "dut_p1db_out_dbm": 10.0}
    )
    assert _problems(data) == [
        'bench.generator: gain source "measure" needs a generator (or use source = "file" '
        '/ "constant")'
    ]
    data = _base(bench={"analyzer": "sim://demo-lna", "noise_source": {"drive": "none"}})
    (line,) = _problems(data)
    assert line.startswith("bench.noise_source.drive: the Y-factor method needs a noise source")


def test_simulated_and_real_instruments_cannot_be_mixed():
    data = _base(
        bench={"analyzer": "sim://demo-lna?seed=1", "generator": "TCPIP0::10.0.0.7::5025::SOCKET"}
    )
    (line,) = _problems(data)
    assert line.startswith(
        "bench.generator.resource: 'TCPIP0::10.0.0.7::5025::SOCKET' cannot be mixed"
    )


def test_bad_sim_address_named():
    data = _base(bench={"analyzer": "sim://demo-lna?seed=x"})
    assert _problems(data) == [
        "bench.analyzer.resource: seed 'x' in 'sim://demo-lna?seed=x' is not an integer "
        "(e.g. sim://demo-lna?seed=1)"
    ]


def test_real_bench_y_factor_needs_an_enr_table(tmp_path):
    data = _base(bench={"analyzer": "TCPIP0::127.0.0.1::5025::SOCKET"})
    assert _problems(data, base_dir=tmp_path) == [
        "enr.table: the Y-factor method needs the noise source's ENR table "
        '(e.g. table = "enr_ns1234.csv")'
    ]
    data["enr"] = {"table": "missing.csv"}
    (line,) = _problems(data, base_dir=tmp_path)
    assert line == f"enr.table: file {str(tmp_path / 'missing.csv')!r} not found"


def test_enr_table_must_cover_the_sweep(tmp_path):
    (tmp_path / "enr.csv").write_text("freq_hz,enr_db\n1e9,15.2\n1.5e9,15.1\n", encoding="utf-8")
    data = _base(enr={"table": "enr.csv"})
    (line,) = _problems(data, base_dir=tmp_path)
    assert line == (
        "enr.table: enr.csv covers 1 GHz to 1.5 GHz but the sweep has 1 point(s) "
        'outside it (first 2 GHz); narrow the sweep or allow extrapolate = "clamp"'
    )
    data["enr"]["extrapolate"] = "clamp"
    assert parse_plan(data, base_dir=tmp_path).enr.extrapolate == "clamp"


def test_loss_file_must_exist_and_losses_be_positive(tmp_path):
    data = _base(corrections={"input_loss": "cable.s2p", "output_loss": -0.5})
    problems = _problems(data, base_dir=tmp_path)
    assert problems == [
        "corrections.output_loss: must be a finite loss >= 0 dB (got -0.5) "
        "(a loss is positive dB; an amplifier is not a loss)"
    ]
    data["corrections"]["output_loss"] = 0.5
    assert _problems(data, base_dir=tmp_path) == [
        f"corrections.input_loss: file {str(tmp_path / 'cable.s2p')!r} not found"
    ]


def test_toml_syntax_error_is_one_line(tmp_path):
    path = _write(tmp_path, 'method = "gain"\n[bench\n')
    with pytest.raises(PlanError) as info:
        load_plan(path)
    (line,) = info.value.problems
    assert line.startswith("not valid TOML:")
    assert validate_plan_file(path) == info.value.problems
    assert validate_plan_file(tmp_path / "absent.toml")[0].endswith(
        "cannot read (No such file or directory)"
    )


# --------------------------------------------------------------------------- points


def test_linear_log_and_step_ranges():
    # a real analyzer (its range is not known to the plan), so the sweep may reach 50 GHz
    data = _base(
        method="gain",
        gain={"source": "constant", "value_db": 20.0},
        bench={"analyzer": "TCPIP0::127.0.0.1::5025::SOCKET", "noise_source": {"drive": "none"}},
        sweep={
            "segments": [
                {"start_hz": 1e9, "stop_hz": 2e9, "points": 5},
                {"start_hz": 3e9, "stop_hz": 30e9, "points": 3, "spacing": "log"},
                {"start_hz": 40e9, "stop_hz": 40.3e9, "step_hz": 0.1e9},
                {"freqs_hz": [50e9, 45e9]},
            ]
        },
    )
    freqs = parse_plan(data).freqs_hz()
    expected = np.concatenate(
        [
            np.linspace(1e9, 2e9, 5),
            np.geomspace(3e9, 30e9, 3),
            40e9 + 0.1e9 * np.arange(4),
            [45e9, 50e9],
        ]
    )
    np.testing.assert_allclose(freqs, expected, rtol=1e-15)
    assert np.all(np.diff(freqs) > 0)
    # log spacing: constant ratio
    assert freqs[6] / freqs[5] == pytest.approx(freqs[7] / freqs[6], rel=1e-12)


def test_segment_overrides_merge_with_plan_defaults():
    data = _base(
        acquisition={"rbw_hz": 3e6, "span_hz": 20e6, "target_u_nf_db": 0.1},
        sweep={
            "freqs_hz": [0.5e9],
            "segments": [
                {
                    "start_hz": 1e9,
                    "stop_hz": 2e9,
                    "points": 2,
                    "rbw_hz": 1e6,
                    "span_hz": 5e6,
                    "detector": "sample",
                    "averaging_scale": "log_power",
                }
            ],
        },
    )
    points = parse_plan(data).points()
    assert [p.segment for p in points] == [None, 0, 0]
    plain, seg = points[0].policy, points[1].policy
    assert (plain.rbw_hz, plain.span_hz, plain.detector) == (3e6, 20e6, Detector.RMS)
    assert (seg.rbw_hz, seg.span_hz, seg.detector) == (1e6, 5e6, Detector.SAMPLE)
    assert seg.averaging_scale is AveragingScale.LOG_POWER
    assert seg.target_u_nf_db == 0.1  # inherited


def test_range_forms_are_exclusive():
    problems = _problems(
        _base(
            sweep={
                "segments": [
                    {"freqs_hz": [1e9], "start_hz": 1e9, "stop_hz": 2e9, "points": 2},
                    {"start_hz": 1e9, "stop_hz": 2e9},
                    {"start_hz": 2e9, "stop_hz": 1e9, "points": 3},
                    {"start_hz": 1e9, "stop_hz": 2e9, "step_hz": 1e8, "spacing": "log"},
                ]
            }
        )
    )
    assert problems == [
        "sweep.segments[0].freqs_hz: give either freqs_hz or start_hz/stop_hz, not both",
        "sweep.segments[1].points: a range needs points or step_hz (e.g. points = 51)",
        "sweep.segments[2].stop_hz: 1 GHz is below start_hz 2 GHz (swap them)",
        "sweep.segments[3].step_hz: a fixed step needs linear spacing (use points with "
        'spacing = "log")',
    ]


def test_full_plan_file_round_trip(tmp_path):
    (tmp_path / "enr.csv").write_text("freq_hz,enr_db\n1e8,15.0\n1e10,14.0\n", encoding="utf-8")
    path = _write(
        tmp_path,
        """
        method = "y_factor"
        operator = "R. Example"
        [dut]
        id = "LNA-0007"
        [bench]
        analyzer = { resource = "TCPIP0::127.0.0.1::5025::SOCKET", profile = "generic" }
        noise_source = { drive = "analyzer", settle_time_s = 0.02 }
        [enr]
        table = "enr.csv"
        [sweep]
        freqs_hz = [1e9, 2e9, 3e9]
        [corrections]
        source_temperature_k = 296.5
        input_loss = 0.3
    """,
    )
    plan = load_plan(path)
    assert plan.method is Method.Y_FACTOR
    assert plan.dut.id == "LNA-0007"
    assert plan.bench.analyzer.profile == "generic"
    assert plan.resolve_path("enr.csv") == tmp_path / "enr.csv"
    assert plan.corrections.source_temperature_k == 296.5
    again = parse_plan(plan.to_dict(), base_dir=tmp_path)
    assert again.to_dict() == plan.to_dict()


def test_sim_address_parsing():
    assert parse_sim_address("sim://demo-lna?seed=7").seed == 7
    assert parse_sim_address("sim://demo-lna").scenario == "demo-lna"
    with pytest.raises(InputError, match="unknown option 'speed'"):
        parse_sim_address("sim://demo-lna?speed=2")
    with pytest.raises(InputError, match="names no scenario"):
        parse_sim_address("sim://")


def test_examples_validate():
    examples = sorted((Path(__file__).parents[1] / "examples").glob("*.toml"))
    assert len(examples) >= 3
    for path in examples:
        assert validate_plan_file(path) == [], path.name


def test_points_outside_the_simulated_analyzer_range_are_refused_before_the_run():
    # demo-lna's analyzer tunes 9 kHz .. 7.5 GHz (noisebench/sims/scenarios/demo-lna.toml)
    data = _base(sweep={"freqs_hz": [1e9, 7.6e9, 10e9]})
    problems = _problems(data)
    assert any(
        p.startswith(
            "sweep: 2 point(s) (7.6 GHz, 10 GHz) with their span fall "
            "outside the simulated analyzer's range 9 kHz to 7.5 GHz"
        )
        for p in problems
    ), problems
    edge = _base(sweep={"freqs_hz": [7.5e9 - 4e6]}, acquisition={"span_hz": 10e6})
    assert any("outside the simulated analyzer's range" in p for p in _problems(edge))
