"""SCPI-1999 / IEEE 488.2 program-message parsing (noisebench/sims/scpi_parser.py), no sockets."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from noisebench.sims.scpi_parser import (
    CommandTree,
    Mnemonic,
    NumericSpecial,
    ScpiError,
    compile_pattern,
    format_number,
    match_choice,
    parse_boolean,
    parse_integer,
    parse_numeric,
    parse_string,
    parse_unit,
    split_units,
)


def _code(fn, *args, **kwargs) -> int:
    with pytest.raises(ScpiError) as info:
        fn(*args, **kwargs)
    return info.value.code


# ----------------------------------------------------------------------------- splitting


def test_units_split_at_semicolons_outside_quotes():
    line = 'FREQ:CENT 1e9;:SYST:ERR?; *IDN? ;LAB \'a;b\';LAB "c;""d"'
    assert split_units(line) == ["FREQ:CENT 1e9", ":SYST:ERR?", "*IDN?", "LAB 'a;b'", 'LAB "c;""d"']


def test_empty_units_are_dropped():
    assert split_units(";;*RST;;") == ["*RST"]


def test_unterminated_string_is_invalid_string_data():
    assert _code(split_units, "LAB 'abc") == -151


def test_non_ascii_is_invalid_character():
    assert _code(split_units, "FREQ 1e9\u00b5") == -101


def test_unit_parts():
    unit = parse_unit(":SENS:FREQ:CENT?  MAX")
    assert unit.absolute and unit.query and not unit.common
    assert unit.mnemonics == (Mnemonic("SENS"), Mnemonic("FREQ"), Mnemonic("CENT"))
    assert unit.params == ("MAX",)


def test_numeric_suffix_is_split_from_the_mnemonic():
    unit = parse_unit("calc:mark12:x 1e9")
    assert unit.mnemonics[1] == Mnemonic("MARK", 12)


def test_parameters_split_at_commas_outside_quotes():
    assert parse_unit("FORM REAL, 32").params == ("REAL", "32")
    assert parse_unit("LAB 'a,b', 3").params == ("'a,b'", "3")


def test_common_command():
    unit = parse_unit("*esr?")
    assert unit.common and unit.query and unit.mnemonics == (Mnemonic("*ESR"),)


@pytest.mark.parametrize(
    "text, code",
    [
        ("FREQ::CENT 1", -103),  # empty node
        ("FREQ?:CENT", -102),  # misplaced '?'
        ("FREQ 1,,2", -103),  # empty parameter
        ("VERYLONGMNEMONIC 1", -112),  # IEEE 488.2, from memory: at most 12 characters
        ("*1DN?", -102),
    ],
)
def test_malformed_units(text, code):
    assert _code(parse_unit, text) == code


# ----------------------------------------------------------------------------- headers


@pytest.fixture
def tree() -> CommandTree[str]:
    t: CommandTree[str] = CommandTree()
    t.add("[SENSe:]FREQuency:CENTer", "center")
    t.add("[SENSe:]FREQuency:SPAN", "span")
    t.add("[SENSe:]BANDwidth[:RESolution]", "rbw")
    t.add("[SENSe:]BANDwidth:VIDeo", "vbw")
    t.add("CALCulate:MARKer<n>:X", "marker x", suffix_max=4)
    t.add("INITiate[:IMMediate]", "init")
    t.add("INITiate:CONTinuous", "cont")
    t.add("*IDN", "idn")
    return t


def _resolve(tree: CommandTree[str], text: str) -> str:
    return tree.resolve(parse_unit(text)).handler


@pytest.mark.parametrize(
    "text",
    [
        "FREQ:CENT 1",
        "freq:cent 1",
        "FREQuency:CENTer 1",
        "FREQUENCY:CENTER 1",
        "SENS:FREQ:CENT 1",
        "sense:frequency:center 1",
        ":SENS:FREQ:CENT 1",
        "Freq:Center 1",
    ],
)
def test_short_long_optional_and_case_forms_resolve(tree, text):
    assert _resolve(tree, text) == "center"


@pytest.mark.parametrize("text", ["FREQU:CENT 1", "FRE:CENT 1", "FREQ:CENTR 1", "SEN:FREQ:CENT 1"])
def test_forms_between_short_and_long_are_undefined(tree, text):
    # SCPI-1999 Vol. 1, from memory: only the short form or the long form is accepted.
    assert _code(_resolve, tree, text) == -113


def test_optional_leaf_and_sibling(tree):
    assert _resolve(tree, "BAND 1") == "rbw"
    assert _resolve(tree, "BAND:RES 1") == "rbw"
    assert _resolve(tree, "SENS:BAND:VID 1") == "vbw"
    assert _resolve(tree, "INIT") == "init"
    assert _resolve(tree, "INIT:IMM") == "init"
    assert _resolve(tree, "INIT:CONT ON") == "cont"


def test_numeric_suffixes(tree):
    assert tree.resolve(parse_unit("CALC:MARK:X 1")).suffixes == (1,)  # default suffix 1
    assert tree.resolve(parse_unit("CALC:MARK3:X 1")).suffixes == (3,)
    assert _code(_resolve, tree, "CALC:MARK5:X 1") == -114  # suffix out of range
    # SCPI-1999 Vol. 2, from memory: -114 when a suffix makes the header invalid (also on a node
    # that takes none); a header that is wrong without its suffix stays -113
    assert _code(_resolve, tree, "FREQ2:CENT 1") == -114
    assert _code(_resolve, tree, "FREQ2:NONE 1") == -113


def test_relative_header_continues_from_previous_path(tree):
    # SCPI-1999 Vol. 1, from memory: "FREQ:CENT 1;SPAN 2" sets the span
    first = tree.resolve(parse_unit("FREQ:CENT 1"))
    assert tree.resolve(parse_unit("SPAN 2"), first).handler == "span"
    # a header relative to FREQ that does not exist there is undefined, even if it exists at root
    assert _code(tree.resolve, parse_unit("BAND 1"), first) == -113
    # a leading colon goes back to the root; common commands ignore the path
    assert tree.resolve(parse_unit(":BAND 1"), first).handler == "rbw"
    assert tree.resolve(parse_unit("*IDN?"), first).handler == "idn"


def test_relative_header_after_an_omitted_optional_leaf(tree):
    # "BAND" is "BAND:RES": a following "VID" continues under BAND
    first = tree.resolve(parse_unit("BAND 1e6"))
    assert tree.resolve(parse_unit("VID 1e5"), first).handler == "vbw"
    # the suffix of the previous header stays on the path
    t: CommandTree[str] = CommandTree()
    t.add("CALCulate:MARKer<n>:X", "x", suffix_max=4)
    t.add("CALCulate:MARKer<n>:Y", "y", suffix_max=4)
    t.add("SOURce:VOLTage[:LEVel]", "volt")
    t.add("SOURce:CURRent[:LEVel]", "curr")
    t.add("FORMat[:DATA]", "format")
    t.add("FORMat:BORDer", "order")
    marker = t.resolve(parse_unit("CALC:MARK3:X 1e9"))
    assert t.resolve(parse_unit("Y?"), marker).suffixes == (3,)
    # both readings of the path work: received nodes, and the full header
    assert (
        t.resolve(parse_unit("CURR 0.1"), t.resolve(parse_unit("SOUR:VOLT 28"))).handler == "curr"
    )
    assert t.resolve(parse_unit("BORD SWAP"), t.resolve(parse_unit("FORM REAL"))).handler == "order"


def test_compile_pattern_forms():
    nodes = compile_pattern("[SENSe:]BANDwidth[:RESolution]")
    assert [(n.short, n.long, n.optional) for n in nodes] == [
        ("SENS", "SENSE", True),
        ("BAND", "BANDWIDTH", False),
        ("RES", "RESOLUTION", True),
    ]


WORD = st.text(alphabet="abcdefghijklmnopqrstuvwxyz", min_size=1, max_size=5)


@given(upper=WORD, lower=st.text(alphabet="abcdefghijklmnopqrstuvwxyz", max_size=6))
def test_any_pattern_word_accepts_exactly_its_two_forms(upper, lower):
    pattern = upper.upper() + lower
    t: CommandTree[str] = CommandTree()
    t.add(f"ROOT:{pattern}", "leaf")
    for form in {upper, upper.upper(), pattern, pattern.upper(), pattern.lower()}:
        assert _resolve(t, f"ROOT:{form}") == "leaf"
    for cut in range(len(upper) + 1, len(pattern)):  # strictly between short and long
        assert _code(_resolve, t, f"ROOT:{pattern[:cut]}") == -113


# ----------------------------------------------------------------------------- parameters


@pytest.mark.parametrize(
    "token, unit, value",
    [
        ("1e9", "HZ", 1e9),
        ("1 MHZ", "HZ", 1e6),  # SCPI-1999 Vol. 1, from memory: MHZ is megahertz
        ("1MHz", "HZ", 1e6),
        ("2.5 GHZ", "HZ", 2.5e9),
        ("130 kHz", "HZ", 130e3),
        ("1 MAHZ", "HZ", 1e6),
        ("10 MS", "S", 10e-3),  # M is milli for every other unit
        ("10 us", "S", 10e-6),
        ("250 MA", "A", 0.25),
        ("28 V", "V", 28.0),
        ("-30 DBM", "DBM", -30.0),
        ("10 dB", "DB", 10.0),
        ("+.5", None, 0.5),
        ("-1.5E+3", None, -1500.0),
        ("1e-3 S", "S", 1e-3),
    ],
)
def test_numeric_with_units(token, unit, value):
    assert parse_numeric(token, unit) == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize(
    "token, unit, code",
    [
        ("abc", "HZ", -104),
        ("1 V", "HZ", -131),  # wrong unit
        ("1 QHZ", "HZ", -131),  # unknown multiplier
        ("1 KDBM", "DBM", -131),  # log units take no multiplier
        ("1 HZ", None, -138),  # unitless parameter
        ("1e999", None, -222),  # overflows to inf
        ("", None, -104),
    ],
)
def test_bad_numbers(token, unit, code):
    assert _code(parse_numeric, token, unit) == code


@pytest.mark.parametrize(
    "token, special",
    [
        ("MIN", NumericSpecial.MINIMUM),
        ("minimum", NumericSpecial.MINIMUM),
        ("MAX", NumericSpecial.MAXIMUM),
        ("Maximum", NumericSpecial.MAXIMUM),
        ("DEF", NumericSpecial.DEFAULT),
        ("default", NumericSpecial.DEFAULT),
    ],
)
def test_min_max_def(token, special):
    assert parse_numeric(token, "HZ") is special
    assert _code(parse_numeric, token, "HZ", allow_special=False) == -224


def test_integer_rounds_like_ieee4882():
    assert parse_integer("1001") == 1001
    assert parse_integer("1e3") == 1000
    assert parse_integer("2.5") == 3  # rounded half up
    assert parse_integer("MAX") is NumericSpecial.MAXIMUM


@pytest.mark.parametrize(
    "token, value",
    [
        ("ON", True),
        ("on", True),
        ("OFF", False),
        ("off", False),
        ("1", True),
        ("0", False),
        ("0.4", False),
        ("0.6", True),
        ("-1", True),
        ("2", True),
    ],
)
def test_booleans(token, value):
    # SCPI-1999 Vol. 1, from memory: numeric booleans are rounded; non-zero is ON
    assert parse_boolean(token) is value


def test_bad_boolean():
    assert _code(parse_boolean, "YES") == -104


def test_choices_short_or_long_form():
    choices = {"GAUSsian": "g", "SYNChronous": "s", "FFT": "f"}
    assert match_choice("gaus", choices) == "g"
    assert match_choice("GAUSSIAN", choices) == "g"
    assert match_choice("Sync", choices) == "s"
    assert match_choice("fft", choices) == "f"
    assert _code(match_choice, "GAUSS", choices) == -224
    assert _code(match_choice, "'GAUS'", choices) == -104


def test_strings():
    assert parse_string("'it''s'") == "it's"
    assert parse_string('"a ""b"""') == 'a "b"'
    assert _code(parse_string, "bare") == -104


@given(st.floats(allow_nan=False, allow_infinity=False))
def test_number_replies_read_back_exactly(value):
    assert float(format_number(value)) == value


def test_error_entry_text():
    assert ScpiError(-113, "FOO:BAR").entry() == '-113,"Undefined header;FOO:BAR"'
    assert ScpiError(0).entry() == '0,"No error"'
    assert ScpiError(-222, 'say "x"').entry() == "-222,\"Data out of range;say 'x'\""
    assert ScpiError(-113).is_command_error and not ScpiError(-222).is_command_error
    assert math.isfinite(float(format_number(1e-300)))
