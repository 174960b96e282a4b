"""``noisebench validate`` recognises each file kind by its content and checks it as that
kind; the file name is printed once; a missing file is worded as ``run`` words it."""

from __future__ import annotations

from pathlib import Path

import pytest

from noisebench.frontends import cli
from noisebench.frontends.validate import file_kind
from noisebench.units import format_frequency, format_frequency_range

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.parametrize(
    ("path", "kind", "summary"),
    [
        ("examples/yfactor_simulated.toml", "plan", "y-factor plan {name}, 56 points"),
        (
            "examples/enr_demo_source.csv",
            "ENR table",
            "ENR table {name}, 16 values, 10 MHz to 18 GHz",
        ),
        ("examples/dut_gain_example.csv", "gain table", "gain table {name}, 6 values, 500 MHz"),
        ("examples/input_cable.csv", "loss table", "loss table {name}, 62 values, 400 MHz"),
        ("noisebench/drivers/profiles/generic.toml", "profile", "instrument profile generic"),
        ("noisebench/sims/scenarios/demo-lna.toml", "scenario", "simulator scenario demo-lna"),
    ],
)
def test_each_kind_is_recognised_and_checked_as_itself(capsys, path, kind, summary):
    assert file_kind(ROOT / path) == kind
    assert cli.main(["validate", str(ROOT / path)]) == 0
    out, err = capsys.readouterr()
    assert f"ok: {summary.format(name=Path(path).name)}" in out and err == ""


def test_a_broken_loss_table_gets_loss_errors_naming_the_file_once(tmp_path, capsys):
    bad = tmp_path / "cable.csv"
    bad.write_text("freq_hz,loss_db\n1e9,abc\n", encoding="utf-8")
    assert cli.main(["validate", str(bad)]) == cli.EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert err.startswith("cable.csv: ") and err.count("cable.csv") == 1
    assert "loss_db" in err and "ENR" not in err


def test_a_broken_profile_is_checked_as_a_profile(tmp_path, capsys):
    bad = tmp_path / "mine.toml"
    bad.write_text('[profile]\nname = "mine"\n', encoding="utf-8")
    assert cli.main(["validate", str(bad)]) == cli.EXIT_INPUT
    err = capsys.readouterr().err
    assert err.startswith("mine.toml: ") and "plan" not in err.split(":", 1)[1]
    assert err.count("mine.toml") == 1


def test_a_missing_file_is_worded_as_run_words_it(tmp_path, capsys):
    missing = str(tmp_path / "nope.toml")
    assert cli.main(["run", missing]) == cli.EXIT_INPUT
    run_err = capsys.readouterr().err
    assert cli.main(["validate", missing]) == cli.EXIT_INPUT
    assert capsys.readouterr().err == run_err


@pytest.mark.parametrize(
    ("hz", "text"),
    [
        (2e9, "2 GHz"),
        (1e7, "10 MHz"),
        (1.8e10, "18 GHz"),
        (9e9 / 7, "1.28571 GHz"),
        (950.0, "950 Hz"),
        (1.5e3, "1.5 kHz"),
    ],
)
def test_one_frequency_formatter_with_engineering_units(hz, text):
    assert format_frequency(hz) == text
    assert "e+" not in format_frequency(hz)


def test_frequency_ranges_read_low_to_high():
    assert format_frequency_range(1e7, 1.8e10) == "10 MHz to 18 GHz"
    assert format_frequency_range(1e9, 1e9) == "1 GHz"
