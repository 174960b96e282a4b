"""Instrument profiles: the generic profile, strict validation, safe command formatting."""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from noisebench.bench.acquisition import AveragingScale, Detector, SweepMode
from noisebench.drivers.profile import (
    BoolSetting,
    EnumSetting,
    FloatSetting,
    IntSetting,
    ProfileError,
    ReplyError,
    TextSetting,
    available_profiles,
    load_profile,
    parse_profile,
    safe_text,
)
from noisebench.errors import CommunicationError, InputError

GENERIC_TOML = (
    Path(__file__).resolve().parents[1] / "noisebench" / "drivers" / "profiles" / "generic.toml"
).read_text(encoding="utf-8")

MINIMAL_ANALYZER = """
[profile]
name = "mini"
[analyzer.settings.center_hz]
set = "FREQ:CENT {value:.12g}"
get = "FREQ:CENT?"
[analyzer.settings.span_hz]
set = "FREQ:SPAN {value:.12g}"
get = "FREQ:SPAN?"
[analyzer.settings.rbw_shape]
fixed = "gaussian"
[analyzer.settings.rbw_hz]
set = "BAND {value:.12g}"
get = "BAND?"
[analyzer.settings.points]
set = "SWE:POIN {value:d}"
get = "SWE:POIN?"
[analyzer.settings.detector]
set = "DET {value}"
get = "DET?"
choices = { rms = "RMS", sample = "SAMPle" }
[analyzer.settings.averaging_scale]
fixed = "power"
[analyzer.settings.averages]
set = "AVER:COUN {value:d}"
get = "AVER:COUN?"
"""


def _bound(setting, name="x"):
    setting._bind(name, "test")
    return setting


def _problem_keys(text: str) -> list[str]:
    with pytest.raises(ProfileError) as info:
        parse_profile(text, source="bad.toml")
    return [key for key, _ in info.value.problems]


# ----------------------------------------------------------------------------- generic


def test_generic_profile_loads_by_name_and_covers_every_instrument():
    profile = load_profile("generic")
    assert "generic" in available_profiles()
    assert profile.name == "generic"
    assert profile.source.endswith("generic.toml")
    assert profile.analyzer is not None and profile.generator is not None
    assert profile.supply is not None
    assert profile.connection.read_termination == "\n"
    assert profile.connection.write_termination == "\n"


def test_generic_enumerations_cover_every_value_of_the_shared_enums():
    s = load_profile("generic").analyzer.settings
    assert set(s.detector.choices) == {d.value for d in Detector}
    assert set(s.averaging_scale.choices) == {a.value for a in AveragingScale}
    assert set(s.mode.choices) == {m.value for m in SweepMode}


def test_generic_commands_are_the_simulator_command_set():
    # reference: noisebench/sims/SCPI.md (the generic profile speaks exactly the simulator's set)
    scpi_md = (Path(__file__).resolve().parents[1] / "noisebench" / "sims" / "SCPI.md").read_text()
    assert "`[SENSe:]BANDwidth[:RESolution]`" in scpi_md
    a = load_profile("generic").analyzer
    assert a.settings.rbw_hz.command(1e6) == "BAND 1000000"
    assert a.settings.detector.command(Detector.RMS) == "DET RMS"
    assert a.settings.averaging_scale.command("log_power") == "AVER:TYPE LOG"
    assert a.settings.points.command(1001) == "SWE:POIN 1001"
    assert a.settings.center_hz.command(1.5e9) == "FREQ:CENT 1500000000"
    assert a.settings.preamp.command(True) == "INP:GAIN:STAT ON"
    assert a.noise_drive.command(False) == "OUTP:NOIS OFF"
    assert a.sim_path.command("through") == "SIM:PATH THRough"
    assert a.trace.query == "TRAC? TRACE1"
    assert a.marker.function.command("noise_density") == "CALC:MARK:QUAN DENSity"


def test_reply_tokens_are_understood_in_short_and_long_form_any_case():
    det = load_profile("generic").analyzer.settings.detector
    assert det.parse("SAMP") == "sample"
    assert det.parse("sample") == "sample"
    assert det.parse('"POS"') == "peak"
    assert det.parse("NEGATIVE") == "negative_peak"
    with pytest.raises(ReplyError, match="DET\\?"):
        det.parse("PEAK")


def test_numeric_replies_parse_and_scpi_nan_is_refused():
    rbw = load_profile("generic").analyzer.settings.rbw_hz
    assert rbw.parse("+3.00000E+05") == 300e3
    # reference: SCPI-1999 Vol. 1 7.2.1 (from memory): 9.91E37 represents NaN
    with pytest.raises(ReplyError, match="NaN"):
        rbw.parse("9.91E37")
    with pytest.raises(ReplyError):
        rbw.parse("abc")
    assert isinstance(ReplyError("x"), CommunicationError)


def test_bool_replies_accept_1_0_and_tokens():
    pre = load_profile("generic").analyzer.settings.preamp
    assert pre.parse("1") is True and pre.parse("OFF") is False and pre.parse(" on ") is True
    with pytest.raises(ReplyError):
        pre.parse("2")


def test_integer_reply_in_exponent_form_is_accepted_but_fraction_refused():
    pts = load_profile("generic").analyzer.settings.points
    assert pts.parse("1.001E+03") == 1001
    with pytest.raises(ReplyError):
        pts.parse("10.5")


# ----------------------------------------------------------------------------- values


def test_out_of_range_value_names_setting_range_and_profile():
    att = load_profile("generic").analyzer.settings.attenuation_db
    with pytest.raises(InputError) as info:
        att.command(80.0)
    assert info.value.field == "attenuation_db"
    assert "[0, 70] dB" in str(info.value) and "generic" in str(info.value)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, None, object(), "fast"])
def test_non_numbers_are_refused_before_formatting(bad):
    rbw = load_profile("generic").analyzer.settings.rbw_hz
    with pytest.raises(InputError) as info:
        rbw.command(bad)
    assert info.value.field == "rbw_hz"


def test_enum_value_missing_from_profile_is_refused_with_the_choices():
    profile = parse_profile(MINIMAL_ANALYZER, "mini.toml")
    with pytest.raises(InputError, match="use one of \\['rms', 'sample'\\]"):
        profile.analyzer.settings.detector.command(Detector.PEAK)


def test_integer_setting_refuses_bool_and_fraction():
    pts = load_profile("generic").analyzer.settings.points
    for bad in (True, 10.5, "7"):
        with pytest.raises(InputError):
            pts.command(bad)


@pytest.mark.parametrize("label", ["DUT;*RST", 'a"b', "x\ny", "x\rINIT", "semi;", "é", "x" * 40])
def test_text_values_cannot_inject_commands(label):
    text = _bound(TextSetting.model_validate({"set": 'DISP:TEXT "{value}"'}), "title")
    with pytest.raises(InputError) as info:
        text.command(label)
    assert info.value.field == "title"


def test_safe_text_accepts_plain_labels():
    text = _bound(TextSetting.model_validate({"set": 'DISP:TEXT "{value}"'}), "title")
    assert text.command("LNA-7 sn 0042") == 'DISP:TEXT "LNA-7 sn 0042"'
    assert safe_text("label", "a_b.c+d-e/f") == "a_b.c+d-e/f"


@settings(max_examples=200, deadline=None)
@given(st.text(min_size=1, max_size=20))
@example("\n")  # regression: a regex ending in '$' also matches before a final newline
@example("ok\n")
@example("a;b")
def test_no_text_with_a_separator_quote_or_line_break_reaches_a_command(label):
    text = _bound(TextSetting.model_validate({"set": 'DISP:TEXT "{value}"'}), "title")
    try:
        command = text.command(label)
    except InputError:
        return
    body = command[len('DISP:TEXT "') : -1]
    assert not re.search(r'[;"\'\n\r]', body)
    assert body == label


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1.0, max_value=1e11, allow_nan=False))
def test_frequency_survives_formatting_to_twelve_significant_digits(freq):
    center = load_profile("generic").analyzer.settings.center_hz
    command = center.command(freq)
    header, number = command.split(" ")
    assert header == "FREQ:CENT"
    assert math.isclose(float(number), freq, rel_tol=1e-11)


# ----------------------------------------------------------------------------- validation


def test_unknown_keys_are_reported_with_their_path():
    keys = _problem_keys(MINIMAL_ANALYZER + '\n[analyzer.settings.rbw_hzz]\nget = "X?"\n')
    assert keys == ["analyzer.settings.rbw_hzz"]


def test_every_problem_is_reported_at_once_with_the_file_name():
    text = MINIMAL_ANALYZER.replace('set = "BAND {value:.12g}"', 'set = "BAND {val}"')
    text = text.replace('[profile]\nname = "mini"', '[profile]\nname = "mini"\nformat = 2')
    with pytest.raises(ProfileError) as info:
        parse_profile(text, source="mine.toml")
    keys = [k for k, _ in info.value.problems]
    assert "profile.format" in keys
    assert any(k.startswith("analyzer.settings.rbw_hz") for k in keys)
    assert "mine.toml" in str(info.value)
    assert "exactly one '{value}'" in str(info.value)


def test_toml_syntax_error_names_the_file():
    with pytest.raises(ProfileError, match="broken.toml.*not valid TOML"):
        parse_profile("[profile\nname=", source="broken.toml")


@pytest.mark.parametrize(
    "template, reason",
    [
        ("FREQ {value:;>9}", "not allowed"),  # fill character could smuggle a ';'
        ("FREQ {value:d}", "does not fit a float"),
        ("FREQ {value} {value}", "exactly one"),
        ("FREQ {value!r}", "exactly one"),
        ("FREQ {0}", "exactly one"),
        ("FREQ\n{value}", "one line"),
        ("", "one line"),
    ],
)
def test_bad_set_templates_are_refused(template, reason):
    with pytest.raises(ValueError, match=reason):
        FloatSetting.model_validate({"set": template})


def test_tokens_with_separators_are_refused():
    with pytest.raises(ValueError, match="letters, digits"):
        EnumSetting.model_validate({"set": "DET {value}", "choices": {"rms": "RMS;*RST"}})
    with pytest.raises(ValueError, match="letters, digits"):
        BoolSetting.model_validate({"set": "X {value}", "true": 'ON"', "false": "OFF"})


def test_ambiguous_reply_tokens_are_refused():
    with pytest.raises(ValueError, match="would mean both"):
        EnumSetting.model_validate(
            {"set": "X {value}", "choices": {"sample": "SAMPle", "rms": "SAMP"}}
        )


def test_query_with_braces_and_fixed_with_get_are_refused():
    with pytest.raises(ValueError, match="braces"):
        IntSetting.model_validate({"get": "POIN? {value}"})
    with pytest.raises(ValueError, match="fixed"):
        IntSetting.model_validate({"get": "POIN?", "fixed": 4})


def test_required_readback_missing_is_a_profile_error():
    text = MINIMAL_ANALYZER.replace(
        'set = "BAND {value:.12g}"\nget = "BAND?"', 'set = "BAND {value:.12g}"'
    )
    with pytest.raises(ProfileError, match="rbw_hz needs a 'get' query"):
        parse_profile(text, "mini.toml")


def test_synchronous_shape_needs_its_poles():
    text = MINIMAL_ANALYZER.replace(
        '[analyzer.settings.rbw_shape]\nfixed = "gaussian"',
        '[analyzer.settings.rbw_shape]\nfixed = "synchronous"',
    )
    with pytest.raises(ProfileError, match="rbw_poles"):
        parse_profile(text, "mini.toml")
    ok = parse_profile(text + "[analyzer.settings.rbw_poles]\nfixed = 4\n", "mini.toml")
    assert ok.analyzer.settings.rbw_poles.parse("") == 4


def test_enum_keys_must_be_our_values():
    text = MINIMAL_ANALYZER.replace(
        'choices = { rms = "RMS", sample = "SAMPle" }',
        'choices = { rms = "RMS", max_hold = "MAXH" }',
    )
    with pytest.raises(ProfileError, match="max_hold"):
        parse_profile(text, "mini.toml")


def test_minimal_profile_with_fixed_values_reads_them_back_without_io():
    profile = parse_profile(MINIMAL_ANALYZER, "mini.toml")
    s = profile.analyzer.settings
    assert s.rbw_shape.parse("") == "gaussian" and not s.rbw_shape.writable
    assert s.averaging_scale.readable and s.averaging_scale.parse("") == "power"
    assert profile.generator is None
    with pytest.raises(ProfileError, match="no \\[generator\\] section"):
        profile.section("generator")


def test_load_profile_from_a_path_and_refuse_unknown_names(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text(GENERIC_TOML.replace('name = "generic"', 'name = "mine"'))
    assert load_profile(path).name == "mine"
    assert load_profile(str(path)).source == str(path)
    with pytest.raises(InputError, match="generic"):
        load_profile("no_such_profile")
    with pytest.raises(InputError):
        load_profile(tmp_path / "missing.toml")
