"""Error paths a careless user or a flaky bench reaches: each a one-line message naming the
field and the fix (exit code 2 for bad input), never a traceback, a NaN or lost points."""

from __future__ import annotations

import re
import textwrap
from pathlib import Path

import numpy as np
import pytest
from _sequencer_helpers import ideal_session, ideal_sim, make_plan

from noisebench.bench.registry import simulated_session
from noisebench.errors import InputError
from noisebench.frontends import cli
from noisebench.frontends.station import units_from_file
from noisebench.results.store import load_run
from noisebench.running.sequencer import Sequencer
from noisebench.science.enr import EnrTable
from noisebench.science.gain_files import GainTable, load_gain_table

PLAN = """\
method = "y_factor"
[dut]
id = "ERR-TEST"
[bench]
analyzer = {{ resource = "{resource}", compression_dbm = -3.0 }}
[acquisition]
attenuation_db = 0
target_u_nf_db = {target}
time_limit_s = {time_limit}
[sweep]
{sweep}
[corrections]
input_loss = {loss}
[expect]
dut_gain_db = 20.0
"""


def _plan(
    folder: Path,
    *,
    resource: str = "sim://demo-lna?seed=1",
    target: str = "0.2",
    time_limit: str = "20",
    sweep: str = "freqs_hz = [1e9, 2e9]",
    loss: str = "0.3",
    extra: str = "",
    name: str = "plan.toml",
    prefix: str = "",
) -> Path:
    text = PLAN.format(
        resource=resource, target=target, time_limit=time_limit, sweep=sweep, loss=loss
    ) + textwrap.dedent(extra)
    path = folder / name
    path.write_text(prefix + text, encoding="utf-8")
    return path


def _cli(capsys, *argv: str) -> tuple[int, str, str]:
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _assert_clean_error(err: str) -> None:
    assert "Traceback" not in err and "unexpected" not in err
    assert "validation error for" not in err and "errors.pydantic.dev" not in err


# --------------------------------------------------------------------------- plans


def test_a_tiny_step_is_refused_not_a_memory_error(tmp_path, capsys):
    sweep = "[[sweep.segments]]\nstart_hz = 1e9\nstop_hz = 2e9\nstep_hz = 1e-3"
    code, _, err = _cli(capsys, "validate", _plan(tmp_path, sweep=sweep))
    assert code == cli.EXIT_INPUT
    _assert_clean_error(err)
    assert "sweep.segments[0].step_hz: 0.001 Hz makes more than 100000 points" in err
    assert "points between 1 GHz and 2 GHz" in err  # engineering units, not 1e+09


def test_an_infinite_time_limit_is_refused_by_validate_and_estimate(tmp_path, capsys):
    path = _plan(tmp_path, time_limit="inf")
    for command in ("validate", "estimate"):
        code, _, err = _cli(capsys, command, path)
        assert code == cli.EXIT_INPUT, command
        _assert_clean_error(err)
        assert "acquisition.time_limit_s: input should be a finite number" in err


def test_nan_is_called_not_finite_rather_than_out_of_range(tmp_path, capsys):
    code, _, err = _cli(capsys, "validate", _plan(tmp_path, target="nan"))
    assert code == cli.EXIT_INPUT
    assert "acquisition.target_u_nf_db: input should be a finite number" in err
    assert "must be <=" not in err  # nan is not above 10 dB: the old message misled


def test_a_plan_saved_with_a_byte_order_mark_is_read(tmp_path, capsys):
    code, out, err = _cli(capsys, "validate", _plan(tmp_path, prefix="\ufeff"))
    assert (code, err) == (cli.EXIT_OK, "")
    assert out.startswith("ok: y-factor plan plan.toml, 2 points")


def test_a_plan_that_is_not_utf8_names_the_file_and_the_fix(tmp_path, capsys):
    path = tmp_path / "plan.toml"
    raw = 'method = "y_factor"\nname = "caf\u00e9"\n'.encode("latin-1")
    path.write_bytes(raw)
    for command in ("validate", "run"):
        code, _, err = _cli(capsys, command, path)
        assert code == cli.EXIT_INPUT, command
        assert f"plan.toml: not UTF-8 text (byte {raw.index(0xE9)}); save the plan as UTF-8" in err


def test_validate_names_an_unknown_simulator_scenario(tmp_path, capsys):
    code, _, err = _cli(capsys, "validate", _plan(tmp_path, resource="sim://demo-lan?seed=1"))
    assert code == cli.EXIT_INPUT
    assert "bench.analyzer.resource: no scenario 'demo-lan'" in err
    assert "'demo-lna'" in err  # the fix lists the packaged scenarios


def test_a_folder_given_as_a_table_is_called_a_folder(tmp_path, capsys):
    (tmp_path / "tables").mkdir()
    code, _, err = _cli(capsys, "validate", _plan(tmp_path, loss='"tables"'))
    assert code == cli.EXIT_INPUT
    assert "corrections.input_loss:" in err and "is a folder, not a file" in err
    assert "not found" not in err


def test_an_absurd_constant_loss_is_refused_before_the_run(tmp_path, capsys):
    # 1e300 dB used to reach the physics and end the run with an OverflowError
    code, _, err = _cli(capsys, "run", _plan(tmp_path, loss="1e300"), "--out", tmp_path / "r")
    assert code == cli.EXIT_INPUT
    _assert_clean_error(err)
    assert "corrections.input_loss: 1e+300 dB is not a plausible loss" in err
    assert not (tmp_path / "r").exists()


def test_coverage_fix_names_only_keys_that_exist_and_spots_mhz(tmp_path, capsys):
    (tmp_path / "cable.csv").write_text("freq_mhz,loss_db\n500,0.2\n1500,0.3\n", encoding="utf-8")
    code, _, err = _cli(capsys, "validate", _plan(tmp_path, loss='"cable.csv"'))
    assert code == cli.EXIT_INPUT
    assert "corrections.input_loss: cable.csv covers 500 MHz to 1.5 GHz" in err
    assert "extend the table" in err and "extrapolate" not in err  # no such key for losses
    (tmp_path / "cable.csv").write_text("freq_hz,loss_db\n500,0.2\n2500,0.3\n", encoding="utf-8")
    _, _, err = _cli(capsys, "validate", _plan(tmp_path, loss='"cable.csv"'))
    assert "the numbers look like MHz or GHz under a freq_hz header" in err
    # a sweep in MHz is refused by the frequency range on its own, table or not
    _, _, err = _cli(capsys, "validate", _plan(tmp_path, sweep="freqs_hz = [1000, 2000]"))
    assert "sweep.freqs_hz[0]: 1 kHz is below the plausible 9 kHz" in err
    assert "looks like MHz or GHz given where Hz is asked" in err


# --------------------------------------------------------------------------- tables


def test_enr_and_gain_csv_with_a_byte_order_mark_load(tmp_path):
    # spreadsheet "CSV UTF-8" exports start with U+FEFF
    enr = tmp_path / "enr.csv"
    enr.write_text("\ufeff# serial: NS-1\nfreq_hz,enr_db\n1e9,15.1\n2e9,15.3\n", encoding="utf-8")
    assert EnrTable.from_csv(enr).metadata.serial == "NS-1"
    gain = tmp_path / "gain.csv"
    gain.write_text("\ufefffreq_hz,gain_db\n1e9,20\n2e9,21\n", encoding="utf-8")
    assert float(load_gain_table(gain).at(1.5e9).gain_db) == pytest.approx(20.5)


@pytest.mark.parametrize("separator", [";", "\t"])
def test_a_semicolon_or_tab_table_says_so(tmp_path, separator):
    text = separator.join(["freq_hz", "enr_db"]) + "\n" + separator.join(["1e9", "15"]) + "\n"
    with pytest.raises(InputError) as enr_info:
        EnrTable.from_csv(text)
    assert f"columns are separated by {separator!r}" in str(enr_info.value)
    with pytest.raises(InputError) as gain_info:
        GainTable.from_csv(text.replace("enr_db", "gain_db"))
    assert f"columns are separated by {separator!r}" in str(gain_info.value)


@pytest.mark.parametrize(
    ("rows", "expected"),
    [
        (
            "0.4 -20 0 nan 0 -40 0 -15 0\n7 -20 0 20 0 -40 0 -15 0\n",
            "g.s2p data row 1, S21: is not a finite number",
        ),
        (
            "0.4 -20 0 20 0 -40 0 -15 0\n0.4 -20 0 20 0 -40 0 -15 0\n",
            "g.s2p data row 2, freq_hz: not strictly ascending",
        ),
    ],
)
def test_a_bad_touchstone_file_gets_one_plain_line(tmp_path, capsys, rows, expected):
    path = tmp_path / "g.s2p"
    path.write_text("# GHZ S DB R 50\n" + rows, encoding="utf-8")
    with pytest.raises(InputError) as info:  # not a pydantic ValidationError
        load_gain_table(path)
    assert expected in str(info.value)
    plan = _plan(tmp_path, loss='"g.s2p"')
    code, _, err = _cli(capsys, "validate", plan)
    assert code == cli.EXIT_INPUT
    _assert_clean_error(err)
    assert err.count("\n") == 1  # one line: no scikit-rf warning text, no pydantic dump


# --------------------------------------------------------------------------- database


@pytest.mark.parametrize("command", [["yield"], ["stats"], ["history", "SN1"], ["info"]])
def test_a_query_on_a_missing_sqlite_url_is_refused_and_creates_nothing(tmp_path, capsys, command):
    target = tmp_path / "typo.sqlite"
    code, out, err = _cli(capsys, "db", *command, "--db", f"sqlite:///{target}")
    assert code == cli.EXIT_INPUT
    assert f"--db: no database file '{target}'" in err
    assert not target.exists()


def test_import_still_creates_a_new_sqlite_database(tmp_path, capsys):
    target = tmp_path / "new.sqlite"
    code, _, err = _cli(capsys, "db", "import", tmp_path / "missing", "--db", f"sqlite:///{target}")
    assert code == cli.EXIT_INPUT and "no database file" not in err  # the folder is wrong


# --------------------------------------------------------------------------- station


def test_a_units_file_with_a_byte_order_mark_is_read(tmp_path):
    path = tmp_path / "units.txt"
    path.write_bytes("\ufeffSN:A1;LOT:L1\r\nSN:A2\r\n".encode())
    assert [u.serial for u in units_from_file(path)] == ["A1", "A2"]


# --------------------------------------------------------------------------- resume


def _run_with_a_stuck_source(folder: Path, mode: str = "auto"):
    """A run whose analyzer display freezes above 1.5 GHz (DUT connected, source hot): the physics
    refuses those readings and the points are skipped, whichever order the schedule reads them
    in (per group, or sweep-level blocks)."""
    plan = make_plan("y_factor", freqs_hz=[1e9, 2e9, 3e9], switching={"mode": mode})
    sim = ideal_sim()
    session = simulated_session(sim, plan.bench)
    original = sim.analyzer.acquire_trace

    def frozen_above_1_5_ghz():
        trace = original()
        if sim.path.value == "dut" and sim.noise_source.is_hot and trace.settings.center_hz > 1.5e9:
            return trace.model_copy(update={"values": np.full_like(trace.values, -90.0)})
        return trace

    sim.analyzer.acquire_trace = frozen_above_1_5_ghz
    record = Sequencer(plan, session).run(folder)
    return plan, record


@pytest.mark.parametrize("mode", ["per_sweep", "per_group"])
def test_points_the_physics_refused_can_be_measured_by_resume(tmp_path, mode):
    plan, first = _run_with_a_stuck_source(tmp_path / "run", mode)
    assert first.info.status == "complete"
    skipped = [s["freq_hz"] for s in first.info.notes["skipped_points"]]
    assert skipped == [2e9, 3e9] and [p.freq_hz for p in first.points] == [1e9]
    record = Sequencer(plan, ideal_session(plan)).run(tmp_path / "run", resume=True)
    assert [p.freq_hz for p in record.points] == [1e9, 2e9, 3e9]
    assert record.points[0].nf_db == first.points[0].nf_db  # the finished point is kept
    assert "skipped_points" not in load_run(tmp_path / "run").info.notes  # no stale note


def test_cli_names_the_resume_fix_for_skipped_points_and_resume_measures_them(
    tmp_path, capsys, monkeypatch
):
    # a source sheet 10 dB low at every frequency: each point's Te comes out about -250 K,
    # hundreds of u below zero, so the physics refuses every point at any noise draw and in
    # any reading order (a stuck source left hot - cold to a coin flip, and an absurd number
    # got through when the schedule's order of draws changed)
    dead = ideal_sim(noise_source__calibration_error_db=[-10.0] * 16)
    monkeypatch.setattr(
        "noisebench.bench.registry.open_bench",
        lambda section, **_: simulated_session(dead, section),
    )
    plan_path, folder = _plan(tmp_path), tmp_path / "run"
    code, _, err = _cli(capsys, "run", plan_path, "--out", folder)
    assert code == cli.EXIT_MEASUREMENT
    assert f"--resume {folder}` measures them" in err
    assert load_run(folder).points == []

    monkeypatch.setattr(
        "noisebench.bench.registry.open_bench",
        lambda section, **_: simulated_session(ideal_sim(), section),
    )
    code, _, err = _cli(capsys, "run", plan_path, "--resume", folder)
    assert code == cli.EXIT_OK, err  # before: refused as "already complete"
    assert "not measured" not in err  # and no stale note claims skipped points
    assert [p.freq_hz for p in load_run(folder).points] == [1e9, 2e9]


@pytest.mark.parametrize("make_folder", ["empty", "complete"])
def test_a_wrong_resume_folder_is_refused_before_the_bench_is_opened(
    tmp_path, capsys, monkeypatch, make_folder
):
    plan_path = _plan(tmp_path)
    folder = tmp_path / "run"
    if make_folder == "complete":
        assert cli.main(["run", str(plan_path), "--out", str(folder)]) == cli.EXIT_OK
    else:
        folder.mkdir()
    capsys.readouterr()

    def no_bench(*_args, **_kwargs):
        raise AssertionError("the bench was opened for a folder that cannot be resumed")

    monkeypatch.setattr("noisebench.bench.registry.open_bench", no_bench)
    code, _, err = _cli(capsys, "run", plan_path, "--resume", folder)
    assert code == cli.EXIT_INPUT
    assert ("already complete" if make_folder == "complete" else "holds no run.json") in err


def test_a_journal_point_edited_to_nan_is_skipped_with_a_warning_not_shown(tmp_path, capsys):
    plan_path, folder = _plan(tmp_path), tmp_path / "run"
    assert cli.main(["run", str(plan_path), "--out", str(folder)]) == cli.EXIT_OK
    (folder / "results.json").unlink()  # render rebuilds the run from the journal
    journal = folder / "points.jsonl"
    lines = journal.read_text(encoding="utf-8").splitlines()
    index = next(
        i for i, line in enumerate(lines) if '"kind": "point"' in line or '"kind":"point"' in line
    )
    lines[index] = re.sub(r'"nf_db": ?[-0-9.eE+]+', '"nf_db": NaN', lines[index], count=1)
    journal.write_text("\n".join(lines) + "\n", encoding="utf-8")
    capsys.readouterr()
    code, out, err = _cli(capsys, "render", folder, "--no-plots")
    assert code == cli.EXIT_OK
    (nf_line,) = [line for line in out.splitlines() if line.strip().startswith("NF ")]
    assert "nan" not in nf_line  # before: "NF min nan dB at 1 GHz, max nan dB at 1 GHz"
    assert f"points.jsonl line {index + 1}: damaged entry skipped" in err
    assert len(load_run(folder).points) == 1


@pytest.mark.parametrize(
    ("argv", "expected"),
    [
        (["demo", "--seed", "-1"], "argument --seed: must be >= 0 (got -1)"),
        (["info", "--no-scan", "--timeout", "nan"], "argument --timeout: must be a finite number"),
        (["info", "--no-scan", "--timeout", "-1"], "argument --timeout: must be a finite number"),
        (
            ["station", "plan.toml", "--max-cal-age", "nan", "--unit", "A1", "--no-db"],
            "argument --max-cal-age: must be a finite number of seconds > 0 (got nan)",
        ),
    ],
)
def test_numeric_options_name_the_option(tmp_path, capsys, monkeypatch, argv, expected):
    monkeypatch.chdir(tmp_path)
    code, _, err = _cli(capsys, *argv)
    assert code == cli.EXIT_INPUT
    assert expected in err


def test_validate_of_a_folder_names_the_folder(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code, _, err = _cli(capsys, "validate", ".")
    assert code == cli.EXIT_INPUT
    assert err.startswith(".: ") and "cannot read (Is a directory)" in err  # before: ": .: "


@pytest.mark.parametrize(
    ("target", "t0", "expected"),
    [
        # 1e-300 dB used to overflow the radiometer forecast ("unexpected OverflowError")
        ("1e-300", "290", "acquisition.target_u_nf_db: must be >= 0.001 (got 1e-300)"),
        # 1e-300 K used to surface as a misleading ENR complaint
        ("0.2", "1e-300", "corrections.t0_k: must be >= 200.0 (got 1e-300)"),
    ],
)
def test_implausible_targets_and_reference_temperatures_are_named(
    tmp_path, capsys, target, t0, expected
):
    path = _plan(tmp_path, target=target)
    path.write_text(
        path.read_text(encoding="utf-8").replace(
            "input_loss = 0.3", f"input_loss = 0.3\nt0_k = {t0}"
        ),
        encoding="utf-8",
    )
    for command in ("validate", "estimate"):
        code, _, err = _cli(capsys, command, path)
        assert code == cli.EXIT_INPUT, command
        _assert_clean_error(err)
        assert expected in err


SCPI_PLAN = """\
method = "y_factor"
[bench]
analyzer = {{ resource = "TCPIP0::127.0.0.1::5025::SOCKET", profile = "{profile}" }}
[sweep]
freqs_hz = [1e9]
[enr]
table = "enr.csv"
[corrections]
source_temperature_k = 296.5
[expect]
dut_nf_db = 1.0
dut_gain_db = 20.0
analyzer_nf_db = 16.0
"""


def _scpi_plan(folder: Path, profile: str) -> Path:
    folder.mkdir(exist_ok=True)
    (folder / "enr.csv").write_text("enr_db\n15.0\n", encoding="utf-8")
    path = folder / "plan.toml"
    path.write_text(SCPI_PLAN.format(profile=profile), encoding="utf-8")
    return path


def test_validate_checks_the_instrument_profile_the_run_would_load(tmp_path, capsys):
    (tmp_path / "broken.toml").write_text("[analyzer\n", encoding="utf-8")
    for profile, expected in [
        ("missing.toml", "no profile file or packaged profile"),
        ("broken.toml", "not valid TOML"),
    ]:
        code, _, err = _cli(capsys, "validate", _scpi_plan(tmp_path, profile))
        assert code == cli.EXIT_INPUT, profile  # before: "ok", and the run refused it later
        assert "bench.analyzer.profile: " in err and expected in err


def test_a_profile_next_to_the_plan_is_found_from_another_folder(tmp_path, monkeypatch):
    from noisebench.drivers.profile import load_profile
    from noisebench.running.plan import load_plan

    lab = tmp_path / "lab"
    plan_path = _scpi_plan(lab, "my_analyzer.toml")
    generic = load_profile("generic").source
    (lab / "my_analyzer.toml").write_text(
        Path(generic).read_text(encoding="utf-8"), encoding="utf-8"
    )
    monkeypatch.chdir(tmp_path)  # README: relative file names are relative to the plan
    plan = load_plan(plan_path)
    assert Path(plan.bench.analyzer.profile) == lab / "my_analyzer.toml"
    assert load_profile(plan.bench.analyzer.profile).source == str(lab / "my_analyzer.toml")


def test_validate_refuses_a_loss_table_that_gives_gain_as_the_run_would(tmp_path, capsys):
    (tmp_path / "cable.csv").write_text("freq_hz,loss_db\n0.5e9,-3\n5e9,-3\n", encoding="utf-8")
    path = _plan(tmp_path, loss='"cable.csv"')
    code, _, err = _cli(capsys, "validate", path)
    assert code == cli.EXIT_INPUT  # before: "ok", then the run failed at its first point
    assert "corrections.input_loss: cable.csv gives a gain of 3.000 dB at 1 GHz" in err
    (tmp_path / "cable.csv").write_text("freq_hz,loss_db\n0.5e9,0.3\n5e9,0.6\n", encoding="utf-8")
    assert _cli(capsys, "validate", path)[0] == cli.EXIT_OK
